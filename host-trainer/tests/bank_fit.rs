//! `ellipsoid fit` with the bank options: --modes, --max-modes, --mode-column, --window,
//! --differences, --drift-half-life, --drift-bound. Test data is invented (seeded).

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use assert_cmd::Command;
use ellipsoid_core::bank::{FlashBank, ModeSelect};
use predicates::prelude::*;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

fn ellipsoid() -> Command {
    Command::cargo_bin("ellipsoid").unwrap()
}

/// Two duty points of a pump, alternating in blocks of `block` readings, with the duty point
/// written in a `speed` column (0 or 1). `rows` readings.
fn two_points(rows: usize, block: usize, seed: u64) -> String {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut s = String::from("flow,pressure,speed\n");
    for i in 0..rows {
        let md = (i / block) % 2;
        let a: f64 = StandardNormal.sample(&mut rng);
        let b: f64 = StandardNormal.sample(&mut rng);
        let (flow, pressure) = if md == 0 {
            (20.0 + a, 3.0 + 0.3 * a + 0.2 * b)
        } else {
            (35.0 + 1.5 * a, 5.0 - 0.2 * a + 0.3 * b)
        };
        let _ = writeln!(s, "{flow:.4},{pressure:.4},{md}");
    }
    s
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

fn fit(base: &Path, out: &Path) -> Command {
    let mut c = ellipsoid();
    c.args([
        "fit",
        base.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--quiet",
        "--trained-at",
        "1767225600",
        "--simulations",
        "200",
    ]);
    c
}

fn card(out: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(out.with_extension("json")).unwrap()).unwrap()
}

/// A fit that needs nothing new writes version 1, with the same bytes whether the bank options
/// are left out or given at their defaults: the deployed firmware keeps reading it.
#[test]
fn plain_options_write_the_version_1_blob() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "b.csv", &two_points(2000, 2000, 1));
    let a = dir.path().join("a.blob");
    let b = dir.path().join("b.blob");
    fit(&base, &a)
        .args(["--columns", "flow,pressure"])
        .assert()
        .success();
    fit(&base, &b)
        .args([
            "--columns",
            "flow,pressure",
            "--modes",
            "1",
            "--window",
            "1",
            "--drift-bound",
            "3",
        ])
        .assert()
        .failure()
        .stderr(predicate::str::contains("--drift-half-life"));
    fit(&base, &b)
        .args([
            "--columns",
            "flow,pressure",
            "--modes",
            "1",
            "--window",
            "1",
        ])
        .assert()
        .success();
    let (ba, bb) = (std::fs::read(&a).unwrap(), std::fs::read(&b).unwrap());
    assert_eq!(ba, bb);
    assert_eq!(ellipsoid_core::blob::Header::parse(&ba).unwrap().version, 1);
    assert!(ellipsoid_core::Model::<2>::from_blob(&ba).is_ok());
    let c = card(&a);
    assert!(c.get("modes").is_none() && c.get("window").is_none(), "{c}");
}

#[test]
fn modes_find_the_two_duty_points_and_write_version_2() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "b.csv", &two_points(4000, 500, 2));
    let out = dir.path().join("m.blob");
    fit(&base, &out)
        .args(["--columns", "flow,pressure", "--modes", "2"])
        .assert()
        .success()
        .stdout(predicate::str::contains("Bank of 2 mode(s)"))
        .stdout(predicate::str::contains("nearest mode, found by EM"))
        .stdout(predicate::str::contains("── Mode 1 ──"));
    let blob = std::fs::read(&out).unwrap();
    let bank = FlashBank::<2, 2>::from_blob(&blob).unwrap();
    assert_eq!(bank.modes(), 2);
    assert_eq!(bank.select(), ModeSelect::Nearest);
    assert_eq!(
        bank.names_digest(),
        Some(ellipsoid_core::blob::names_digest(["flow", "pressure"]))
    );
    let c = card(&out);
    assert_eq!(c["version"], 3);
    assert_eq!(c["select"], "nearest");
    let modes = c["modes"].as_array().unwrap();
    assert_eq!(modes.len(), 2);
    // Half the readings at each duty point: EM finds each within a few rows.
    for m in modes {
        let w = m["weight"].as_f64().unwrap();
        assert!((w - 0.5).abs() < 0.01, "{c}");
        assert!(m["alarm"].as_f64().unwrap() > 0.0);
    }
    // `auto` picks 2 by BIC; the JSON summary lists what it tried.
    let out2 = dir.path().join("auto.blob");
    let json = fit(&base, &out2)
        .args(["--columns", "flow,pressure", "--modes", "auto", "--json"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let v: serde_json::Value = serde_json::from_slice(&json).unwrap();
    assert_eq!(v["modes"].as_array().unwrap().len(), 2, "{v}");
    assert_eq!(v["mode_search"]["bic"].as_array().unwrap().len(), 4);
    // Too many modes: named, with the counts.
    fit(&base, &dir.path().join("x.blob"))
        .args(["--columns", "flow,pressure", "--modes", "9"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("`9` is not a mode count"));
}

#[test]
fn a_mode_column_gives_a_known_mode_bank() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "b.csv", &two_points(3000, 300, 3));
    let out = dir.path().join("m.blob");
    fit(&base, &out)
        .args(["--mode-column", "speed"])
        .assert()
        .success()
        .stdout(predicate::str::contains(
            "known mode, told by column `speed`",
        ));
    let blob = std::fs::read(&out).unwrap();
    let bank = FlashBank::<2, 2>::from_blob(&blob).unwrap();
    assert_eq!(bank.select(), ModeSelect::Known);
    let c = card(&out);
    assert_eq!(c["mode_column"], "speed");
    assert_eq!(c["features"], serde_json::json!(["flow", "pressure"]));
    assert_eq!(c["modes"].as_array().unwrap().len(), 2);
    // Inspect reads the card (its digest covers the mode column).
    // --modes with --mode-column: refused by the command line.
    fit(&base, &dir.path().join("x.blob"))
        .args(["--mode-column", "speed", "--modes", "2"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("cannot be used with"));
    // No such column.
    fit(&base, &dir.path().join("x.blob"))
        .args(["--mode-column", "gear"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("no column `gear`"));
    // A value that is not a mode: file, line and column.
    let mut text = two_points(600, 300, 4);
    text = text.replacen(",0\n", ",2.5\n", 1);
    let bad = write(dir.path(), "bad.csv", &text);
    fit(&bad, &dir.path().join("x.blob"))
        .args(["--mode-column", "speed"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("bad.csv: line 2, column `speed`"))
        .stderr(predicate::str::contains("2.5 is not a mode"));
    // A mode value missing (0 and 2, no 1): named with its count.
    let gap = two_points(600, 300, 5).replace(",1\n", ",2\n");
    let gap = write(dir.path(), "gap.csv", &gap);
    fit(&gap, &dir.path().join("x.blob"))
        .args(["--mode-column", "speed"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("mode 1 has 0 sample(s)"));
    assert!(!dir.path().join("x.blob").exists());
}

#[test]
fn window_differences_and_drift_are_in_blob_and_card() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "b.csv", &two_points(3000, 3000, 6));
    let out = dir.path().join("m.blob");
    fit(&base, &out)
        .args([
            "--columns",
            "flow,pressure",
            "--window",
            "4",
            "--differences",
            "--drift-half-life",
            "600",
            "--drift-bound",
            "2.5",
        ])
        .assert()
        .success()
        .stdout(predicate::str::contains(
            "Window: 4 reading(s), with first differences",
        ))
        .stdout(predicate::str::contains("Drift: half-life 600 readings"));
    let blob = std::fs::read(&out).unwrap();
    let bank = FlashBank::<2, 4>::from_blob(&blob).unwrap();
    assert_eq!(bank.window().length, 4);
    assert!(bank.window().differences);
    let drift = bank.drift().expect("drift is on");
    let rate = 1.0 - 0.5f64.powf(1.0 / 600.0);
    assert_eq!(drift.rate, rate as f32);
    let c = card(&out);
    assert_eq!(c["window"], 4);
    assert_eq!(c["differences"], true);
    assert_eq!(
        c["scored_features"],
        serde_json::json!(["flow", "pressure", "Δflow", "Δpressure"])
    );
    let d = &c["drift"];
    assert_eq!(d["bound_sigma"], 2.5);
    let sd: Vec<f64> = serde_json::from_value(d["sd"].clone()).unwrap();
    let bound: Vec<f64> = serde_json::from_value(d["bound"].clone()).unwrap();
    for ((s, b), dev) in sd.iter().zip(&bound).zip(drift.bound) {
        assert!((b - 2.5 * s).abs() < 1e-12);
        assert_eq!(dev, *b as f32);
    }
    // The window mean of 4 readings of unit noise: sd about 1/2 for flow.
    assert!((sd[0] - 0.5).abs() < 0.05, "{sd:?}");
    // 3000 readings, 3 spent filling the window (4 needed).
    assert!(std::str::from_utf8(
        &fit(&base, &dir.path().join("j.blob"))
            .args(["--columns", "flow,pressure", "--window", "4", "--json"])
            .assert()
            .success()
            .get_output()
            .stdout
    )
    .unwrap()
    .contains("\"readings_filling_window\": 3"));
}

#[test]
fn bad_bank_options_are_refused_by_name() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "b.csv", &two_points(1000, 1000, 7));
    let x = dir.path().join("x.blob");
    for (args, want) in [
        (vec!["--window", "17"], "--window 17"),
        (vec!["--window", "0"], "--window 0"),
        (vec!["--drift-half-life", "0.5"], "--drift-half-life 0.5"),
        (
            vec!["--drift-half-life", "10", "--drift-bound", "0"],
            "--drift-bound 0",
        ),
        (vec!["--modes", "auto", "--max-modes", "9"], "--max-modes 9"),
        (
            vec!["--modes", "2", "--no-fpu"],
            "--no-fpu cannot be used with a bank",
        ),
        (
            vec!["--window", "2", "--report", "r.html"],
            "--report is not available for a bank",
        ),
        (
            vec!["--window", "2", "--by", "speed"],
            "--by cannot be combined",
        ),
        (
            vec!["--window", "2", "--log", "flow", "--log", "nope"],
            "--log names `nope`",
        ),
    ] {
        let mut cmd = fit(&base, &x);
        cmd.args(["--columns", "flow,pressure"]).args(&args);
        if args.contains(&"--by") {
            // --by takes the whole log: no --columns.
            cmd = fit(&base, dir.path());
            cmd.args(&args);
        }
        cmd.assert()
            .failure()
            .stderr(predicate::str::contains(want));
        assert!(!x.exists());
    }
    // A log feature that is not positive: file, line, column.
    let neg = write(dir.path(), "neg.csv", "flow,pressure\n1,2\n-1,2\n3,4\n");
    fit(&neg, &x)
        .args(["--window", "2", "--log", "flow"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("neg.csv: line 3, column `flow`"));
}

/// `--modes auto` sets aside a mode count whose extra mode is one slow excursion of the
/// baseline: its samples count as a handful of independent rows, so its Phase II limit is many
/// times the chi-square quantile, and under the nearest rule it would take in readings far
/// from every mode. The two real duty points are kept. An explicit `--modes 3` keeps the mode
/// and warns.
#[test]
fn auto_sets_aside_a_mode_known_from_one_slow_excursion() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut s = String::from("flow,pressure\n");
    for i in 0..6000 {
        let a: f64 = StandardNormal.sample(&mut rng);
        let b: f64 = StandardNormal.sample(&mut rng);
        let (flow, pressure) = if (i / 500) % 2 == 0 {
            (20.0 + a, 3.0 + 0.3 * a + 0.2 * b)
        } else {
            (35.0 + 1.5 * a, 5.0 - 0.2 * a + 0.3 * b)
        };
        let _ = writeln!(s, "{flow:.4},{pressure:.4}");
    }
    // The excursion: 300 readings far from both, moving slowly (one slow swing), little noise.
    for i in 0..300 {
        let a: f64 = StandardNormal.sample(&mut rng);
        let phase = std::f64::consts::PI * i as f64 / 300.0;
        let _ = writeln!(
            s,
            "{:.4},{:.4}",
            27.0 + 2.0 * phase.sin() + 0.05 * a,
            12.0 + 1.5 * phase.cos() + 0.05 * a
        );
    }
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "b.csv", &s);
    let out = dir.path().join("m.blob");
    let o = fit(&base, &out)
        .args([
            "--modes",
            "auto",
            "--max-modes",
            "3",
            "--holdout",
            "0",
            "--json",
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let skipped = &v["mode_search"]["skipped"];
    let k3 = skipped
        .as_array()
        .unwrap()
        .iter()
        .find(|x| x["k"] == 3)
        .unwrap_or_else(|| panic!("K = 3 not set aside: {}", v["mode_search"]));
    assert!(
        k3["reason"]
            .as_str()
            .unwrap()
            .contains("times the chi-square quantile"),
        "{k3}"
    );
    println!("{k3}");
    assert_eq!(
        v["modes"].as_array().unwrap().len(),
        2,
        "{}",
        v["mode_search"]
    );
    // Asked for explicitly, the mode is kept, with a warning.
    let o = ellipsoid()
        .args([
            "fit",
            base.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .args(["--modes", "3", "--holdout", "0", "--simulations", "200"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("Bank of 3 mode(s)"), "{text}");
    assert!(
        text.contains("Warning: mode 2's limit is") && text.contains("ask for fewer modes"),
        "{text}"
    );
}
