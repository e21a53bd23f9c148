//! `fit --by`: one model per machine from one long log, each the same as a plain fit of that
//! machine's rows alone. Test data is invented here (seeded), for these checks only.

use std::fmt::Write as _;
use std::path::Path;

use assert_cmd::Command;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn ellipsoid() -> Command {
    Command::cargo_bin("ellipsoid").unwrap()
}

/// Rows `timestamp, current_a, pressure_bar, temp_c` of one machine (correlated, seeded).
fn machine_rows(rows: usize, seed: u64, scale: f64) -> Vec<[String; 4]> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..rows)
        .map(|i| {
            let a: f64 = rng.random_range(-1.0..1.0) + rng.random_range(-1.0..1.0);
            let b: f64 = rng.random_range(-1.0..1.0) + rng.random_range(-1.0..1.0);
            let c: f64 = rng.random_range(-1.0..1.0) + rng.random_range(-1.0..1.0);
            [
                format!(
                    "2026-01-01T{:02}:{:02}:{:02}Z",
                    i / 3600,
                    (i / 60) % 60,
                    i % 60
                ),
                format!("{:.4}", 10.0 * scale + a),
                format!("{:.4}", 3.0 + 0.5 * a + 0.1 * b),
                format!("{:.4}", 40.0 + 2.0 * c * scale),
            ]
        })
        .collect()
}

/// The machines: id, rows. `tiny` has too few rows for 3 features: its fit must fail alone.
const MACHINES: [(&str, usize); 4] = [
    ("pump A", 900),
    ("pump-b", 1300),
    ("site/3", 700),
    ("tiny", 3),
];

/// Write the interleaved log (machine column second) and each machine's own file.
fn write_log(dir: &Path) -> Vec<std::path::PathBuf> {
    let data: Vec<Vec<[String; 4]>> = MACHINES
        .iter()
        .enumerate()
        .map(|(k, (_, n))| machine_rows(*n, 11 + k as u64, 1.0 + k as f64 * 0.3))
        .collect();
    let mut log = String::from("timestamp,machine,current_a,pressure_bar,temp_c\n");
    let longest = data.iter().map(Vec::len).max().unwrap();
    for i in 0..longest {
        for (k, rows) in data.iter().enumerate() {
            if let Some(r) = rows.get(i) {
                let _ = writeln!(log, "{},{},{},{},{}", r[0], MACHINES[k].0, r[1], r[2], r[3]);
            }
        }
    }
    std::fs::write(dir.join("log.csv"), log).unwrap();
    data.iter()
        .enumerate()
        .map(|(k, rows)| {
            let mut s = String::from("timestamp,current_a,pressure_bar,temp_c\n");
            for r in rows {
                let _ = writeln!(s, "{}", r.join(","));
            }
            let p = dir.join(format!("alone-{k}.csv"));
            std::fs::write(&p, s).unwrap();
            p
        })
        .collect()
}

#[test]
fn each_machine_model_is_the_plain_fit_of_its_rows() {
    let dir = tempfile::tempdir().unwrap();
    let alone = write_log(dir.path());
    let out = dir.path().join("fleet");
    std::fs::create_dir(&out).unwrap();
    // A blob an earlier run wrote for the machine that fails this time: it must not stay where
    // `*.blob` would take it for this run's model.
    std::fs::write(out.join("tiny.blob"), b"earlier run").unwrap();
    let assert = ellipsoid()
        .args([
            "fit",
            "--by",
            "machine",
            "--trained-at",
            "1",
            "--json",
            "--out",
        ])
        .arg(&out)
        .arg(dir.path().join("log.csv"))
        .assert()
        // One machine failed: the others are written, and the exit status says it was partial.
        .code(3)
        .stderr(predicates::str::contains(
            "1 of 4 machines could not be fitted",
        ));
    let json: serde_json::Value = serde_json::from_slice(&assert.get_output().stdout).unwrap();
    let machines = json["machines"].as_array().unwrap();
    assert_eq!(machines.len(), 4);
    for (k, (id, rows)) in MACHINES.iter().enumerate() {
        let m = &machines[k];
        assert_eq!(m["machine"], *id);
        assert_eq!(m["rows"], *rows as u64);
        if *id == "tiny" {
            let err = m["error"].as_str().unwrap();
            assert!(
                err.contains("only 2 usable training row(s) for 3 feature(s)"),
                "{err}"
            );
            assert!(err.contains("log.csv"), "the message names the log: {err}");
            assert!(!out.join("tiny.blob").exists());
            assert_eq!(
                std::fs::read(out.join("tiny.blob.previous")).unwrap(),
                b"earlier run"
            );
            let warned = m["warnings"].as_array().unwrap();
            assert!(
                warned
                    .iter()
                    .any(|w| w.as_str().unwrap().contains("renamed")),
                "{m}"
            );
            continue;
        }
        assert!(m["error"].is_null(), "{m}");
        let blob = out.join(m["blob"].as_str().unwrap());
        let plain = dir.path().join(format!("plain-{k}.blob"));
        ellipsoid()
            .args(["fit", "--trained-at", "1", "--quiet", "--out"])
            .arg(&plain)
            .arg(&alone[k])
            .assert()
            .success();
        assert_eq!(
            std::fs::read(&blob).unwrap(),
            std::fs::read(&plain).unwrap(),
            "machine {id}: the fleet's blob differs from the plain fit's"
        );
        let card = std::fs::read_to_string(blob.with_extension("json")).unwrap();
        assert!(card.contains("machine = "), "{card}");
        assert!(m["threshold"].as_f64().unwrap() > 0.0);
        assert!(m["holdout_alarms_per_day"].as_f64().is_some());
    }
    let names: Vec<Option<&str>> = machines.iter().map(|m| m["blob"].as_str()).collect();
    // The failed machine names no blob: none was written for it.
    assert_eq!(
        names,
        [
            Some("pump_A.blob"),
            Some("pump-b.blob"),
            Some("site_3.blob"),
            None
        ]
    );
    let summary = std::fs::read_to_string(out.join("fleet.csv")).unwrap();
    assert_eq!(summary.lines().count(), 5);
    assert!(summary.starts_with("machine,blob,rows,rows_fitted,threshold,holdout_alarms_per_day,"));
    let html = std::fs::read_to_string(out.join("fleet.html")).unwrap();
    let first_row = html.find("<td>tiny</td>").unwrap();
    assert!(
        first_row < html.find("<td>pump-b</td>").unwrap(),
        "the failed fit is listed first"
    );
    // Nothing else is left in the folder (the per-machine parts are removed).
    let mut left: Vec<String> = std::fs::read_dir(&out)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    left.sort();
    assert_eq!(
        left,
        [
            "fleet.csv",
            "fleet.html",
            "pump-b.blob",
            "pump-b.json",
            "pump_A.blob",
            "pump_A.json",
            "site_3.blob",
            "site_3.json",
            "tiny.blob.previous"
        ]
    );
}

#[test]
fn stop_on_bad_machine_writes_nothing_and_colliding_names_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    write_log(dir.path());
    let out = dir.path().join("fleet");
    std::fs::create_dir(&out).unwrap();
    ellipsoid()
        .args(["fit", "--by", "machine", "--stop-on-bad-machine", "--out"])
        .arg(&out)
        .arg(dir.path().join("log.csv"))
        .assert()
        .failure()
        .stderr(predicates::str::contains("machine `tiny`"))
        .stderr(predicates::str::contains("nothing was written"));
    assert_eq!(std::fs::read_dir(&out).unwrap().count(), 0);

    // `pump A` and `pump_a` would both be pump_A.blob (or pump_a.blob on a case-blind disk).
    let log = std::fs::read_to_string(dir.path().join("log.csv")).unwrap();
    let log = log.replacen(",pump-b,", ",pump_a,", 1);
    std::fs::write(dir.path().join("clash.csv"), log).unwrap();
    ellipsoid()
        .args(["fit", "--by", "machine", "--out"])
        .arg(&out)
        .arg(dir.path().join("clash.csv"))
        .assert()
        .failure()
        .stderr(predicates::str::contains(
            "machines `pump A` and `pump_a` would both be written",
        ));
    assert_eq!(std::fs::read_dir(&out).unwrap().count(), 0);

    // A row with no machine id names its line.
    let log = std::fs::read_to_string(dir.path().join("log.csv")).unwrap();
    let mut lines: Vec<&str> = log.lines().collect();
    let bad = lines[5]
        .replacen(",pump A,", ",,", 1)
        .replacen(",pump-b,", ",,", 1)
        .replacen(",site/3,", ",,", 1)
        .replacen(",tiny,", ",,", 1);
    lines[5] = &bad;
    std::fs::write(dir.path().join("hole.csv"), lines.join("\n")).unwrap();
    ellipsoid()
        .args(["fit", "--by", "machine", "--out"])
        .arg(&out)
        .arg(dir.path().join("hole.csv"))
        .assert()
        .failure()
        .stderr(predicates::str::contains(
            "hole.csv:6: column `machine` is empty",
        ));
    assert_eq!(std::fs::read_dir(&out).unwrap().count(), 0);
}

#[test]
fn a_bad_row_of_one_machine_names_the_log_line() {
    let dir = tempfile::tempdir().unwrap();
    write_log(dir.path());
    let log = std::fs::read_to_string(dir.path().join("log.csv")).unwrap();
    let mut lines: Vec<String> = log.lines().map(str::to_string).collect();
    // Line 42 of the log (index 41) belongs to some machine; spoil its current.
    let cells: Vec<&str> = lines[41].split(',').collect();
    let machine = cells[1].to_string();
    lines[41] = format!("{},{},oops,{},{}", cells[0], cells[1], cells[3], cells[4]);
    std::fs::write(dir.path().join("log.csv"), lines.join("\n") + "\n").unwrap();
    let out = dir.path().join("fleet");
    std::fs::create_dir(&out).unwrap();
    let assert = ellipsoid()
        .args(["fit", "--by", "machine", "--json", "--out"])
        .arg(&out)
        .arg(dir.path().join("log.csv"))
        .assert()
        .code(3);
    let json: serde_json::Value = serde_json::from_slice(&assert.get_output().stdout).unwrap();
    let m = json["machines"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["machine"] == machine.as_str())
        .unwrap();
    let err = m["error"].as_str().unwrap();
    assert!(
        err.contains("log.csv:42: column `current_a`: `oops` is not a number"),
        "{err}"
    );
}

#[test]
fn a_parquet_fleet_log_gives_the_models_of_its_csv_twin() {
    // Both written by pyarrow's `make_twins.py` (tests/data/parquet), the same numbers.
    let data = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/parquet");
    let dir = tempfile::tempdir().unwrap();
    let run = |input: &str| {
        let out = dir.path().join(input);
        std::fs::create_dir(&out).unwrap();
        ellipsoid()
            .args(["fit", "--by", "machine", "--trained-at", "1", "--out"])
            .arg(&out)
            .arg(data.join(input))
            .assert()
            .success()
            .stdout(predicates::str::contains("Fitted 3 of 3 machines"));
        out
    };
    let (c, p) = (run("fleet.csv"), run("fleet.parquet"));
    for name in ["north-1.blob", "north_2.blob", "south_3.blob"] {
        assert_eq!(
            std::fs::read(c.join(name)).unwrap(),
            std::fs::read(p.join(name)).unwrap(),
            "{name}"
        );
    }
}
