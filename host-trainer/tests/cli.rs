//! End-to-end tests of the `ellipsoid` binary: every subcommand, and every bad-input case.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use assert_cmd::Command;
use ellipsoid_core::{blob, Model};
use predicates::prelude::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn ellipsoid() -> Command {
    Command::cargo_bin("ellipsoid").unwrap()
}

/// A correlated 3-channel baseline (x, y ≈ 2x + noise, z independent), seeded; test data only.
fn baseline_csv(rows: usize, seed: u64) -> String {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut s = String::from("timestamp,current_a,pressure_bar,temp_c\n");
    for i in 0..rows {
        let a: f64 = rng.random_range(-1.0..1.0) + rng.random_range(-1.0..1.0);
        let b: f64 = rng.random_range(-1.0..1.0) + rng.random_range(-1.0..1.0);
        let c: f64 = rng.random_range(-1.0..1.0) + rng.random_range(-1.0..1.0);
        let _ = writeln!(
            s,
            "2026-01-01T00:{:02}:{:02}Z,{:.4},{:.4},{:.4}",
            (i / 60) % 60,
            i % 60,
            10.0 + a,
            3.0 + 0.5 * a + 0.1 * b,
            40.0 + 2.0 * c
        );
    }
    s
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

/// `ellipsoid fit BASE --out OUT`, to which a test adds its options.
fn fit(base: &Path, out: &Path) -> Command {
    let mut c = ellipsoid();
    c.args([
        "fit",
        base.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    c
}

fn fit_ok(dir: &Path) -> PathBuf {
    let base = write(dir, "base.csv", &baseline_csv(2000, 1));
    let out = dir.join("m.blob");
    fit(&base, &out)
        .args(["--quiet", "--trained-at", "1767225600"])
        .assert()
        .success()
        .stdout(predicate::str::contains("chi-square(3)"));
    out
}

#[test]
fn fit_refuses_outputs_that_would_overwrite_each_other() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "base.csv", &baseline_csv(200, 5));
    let out = dir.path().join("m.json");
    fit(&base, &out)
        .args(["--quiet"])
        .assert()
        .failure()
        .stderr(predicate::str::contains(
            "overwritten by its own model card",
        ));
    assert!(!out.exists());
    let out = dir.path().join("m.blob");
    fit(&base, &out)
        .args(["--quiet"])
        .args(["--report", dir.path().join("m.json").to_str().unwrap()])
        .assert()
        .failure()
        .stderr(predicate::str::contains("same file"));
    assert!(!out.exists());
}

#[test]
fn every_subcommand_has_help_with_an_example() {
    for sub in ["fit", "inspect", "replay", "evaluate", "demo"] {
        ellipsoid()
            .args([sub, "--help"])
            .assert()
            .success()
            .stdout(predicate::str::contains("Example"));
    }
}

#[test]
fn fit_writes_a_blob_and_card_that_inspect_validates() {
    let dir = tempfile::tempdir().unwrap();
    let out = fit_ok(dir.path());
    assert!(out.exists());
    assert!(out.with_extension("json").exists());
    ellipsoid()
        .args(["inspect", out.to_str().unwrap()])
        .assert()
        .success()
        .stdout(predicate::str::contains("a valid Ellipsoid model blob"))
        .stdout(predicate::str::contains("pressure_bar"));
    let json = ellipsoid()
        .args(["inspect", out.to_str().unwrap(), "--json"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let v: serde_json::Value = serde_json::from_slice(&json).unwrap();
    assert_eq!(v["dimension"], 3);
    assert_eq!(v["blob_bytes"], std::fs::metadata(&out).unwrap().len());
    // The covariance rebuilt from W matches the data: var(current) ≈ 2·(1/3) = 0.667.
    let var0 = v["covariance"][0][0].as_f64().unwrap();
    assert!((var0 - 0.667).abs() < 0.06, "{var0}");
}

#[test]
fn fit_json_matches_the_nist_worked_example() {
    // NIST/SEMATECH e-Handbook, section 6.5.4.1 (shared/reference-values.md).
    let dir = tempfile::tempdir().unwrap();
    let base = write(
        dir.path(),
        "nist.csv",
        "len,wid,ht\n4.0,2.0,0.60\n4.2,2.1,0.59\n3.9,2.0,0.58\n4.3,2.1,0.62\n4.1,2.2,0.63\n",
    );
    let out = dir.path().join("nist.blob");
    let json = fit(&base, &out)
        .args(["--holdout", "0", "--json", "--quiet"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let v: serde_json::Value = serde_json::from_slice(&json).unwrap();
    let mean: Vec<f64> = serde_json::from_value(v["mean"].clone()).unwrap();
    for (got, want) in mean.iter().zip([4.10, 2.08, 0.604]) {
        assert!((got - want).abs() < 1e-12, "{got} vs {want}");
    }
    let cov: Vec<f64> = serde_json::from_value(v["covariance"].clone()).unwrap();
    let want = [
        0.025, 0.0075, 0.00175, 0.0075, 0.007, 0.00135, 0.00175, 0.00135, 0.00043,
    ];
    for (got, want) in cov.iter().zip(want) {
        assert!((got - want).abs() < 1e-12, "{got} vs {want}");
    }
    // Five rows for three features is allowed (≥ N+1) but warned about (< 10·N).
    assert!(
        v["warnings"]
            .to_string()
            .contains("fewer than 10 per feature"),
        "{}",
        v["warnings"]
    );
}

#[test]
fn replay_is_bit_identical_to_the_core_and_matches_columns_by_name() {
    let dir = tempfile::tempdir().unwrap();
    let model_path = fit_ok(dir.path());
    // Columns in another order, a NaN dropout, and a reading far off the pattern.
    let readings = write(
        dir.path(),
        "r.csv",
        "temp_c,pressure_bar,current_a\n40,3,10\n41,3.2,10.5\n,3,10\n40,1.0,13\n40,1.0,13\n40,1.0,13\n40,3,10\n",
    );
    let out = dir.path().join("r-scored.csv");
    ellipsoid()
        .args(["replay", "--model", model_path.to_str().unwrap()])
        .args(["--input", readings.to_str().unwrap()])
        .args(["--out", out.to_str().unwrap(), "--quiet"])
        .assert()
        .success();
    let text = std::fs::read_to_string(&out).unwrap();
    let bytes = std::fs::read(&model_path).unwrap();
    let model = Model::<3>::from_blob(&bytes).unwrap();
    let rows = [
        [10.0f32, 3.0, 40.0],
        [10.5, 3.2, 41.0],
        [10.0, 3.0, f32::NAN],
        [13.0, 1.0, 40.0],
        [13.0, 1.0, 40.0],
        [13.0, 1.0, 40.0],
        [10.0, 3.0, 40.0],
    ];
    let mut lines = text.lines();
    assert_eq!(
        lines.next().unwrap(),
        "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,c_current_a,c_pressure_bar,c_temp_c"
    );
    for (i, (line, x)) in lines.zip(rows).enumerate() {
        let cells: Vec<&str> = line.split(',').collect();
        assert_eq!(cells[0], i.to_string());
        match model.score(&x) {
            Ok(s) => {
                assert_eq!(cells[2], format!("{:08x}", s.d2.to_bits()), "row {i}");
                assert_eq!(cells[1].parse::<f32>().unwrap().to_bits(), s.d2.to_bits());
            }
            Err(_) => {
                assert_eq!(cells[3], "fault");
                assert_eq!(cells[5], "1");
            }
        }
    }
    // Three readings in a row far off the pattern raise the alarm (k = 3 by default).
    assert!(text.lines().nth(6).unwrap().contains(",above,1,0,raised,"));
}

#[test]
fn replay_refuses_a_csv_that_does_not_fit() {
    let dir = tempfile::tempdir().unwrap();
    let model_path = fit_ok(dir.path());
    let readings = write(dir.path(), "r.csv", "current_a,temp_c\n10,40\n");
    let out = dir.path().join("o.csv");
    ellipsoid()
        .args(["replay", "--model", model_path.to_str().unwrap()])
        .args(["--input", readings.to_str().unwrap()])
        .args(["--out", out.to_str().unwrap()])
        .assert()
        .failure()
        .stderr(predicate::str::contains("pressure_bar"));
    assert!(!out.exists(), "a failed replay must write nothing");
}

#[test]
fn evaluate_reports_metrics_and_json() {
    let dir = tempfile::tempdir().unwrap();
    let model_path = fit_ok(dir.path());
    let mut csv = String::from("current_a,pressure_bar,temp_c,label\n");
    for i in 0..200 {
        if (100..120).contains(&i) {
            csv.push_str("13,1.0,40,1\n");
        } else {
            let _ = writeln!(csv, "{},{},40,0", 10.0 + (i % 7) as f64 * 0.05, 3.0);
        }
    }
    let labelled = write(dir.path(), "l.csv", &csv);
    let report = dir.path().join("eval.html");
    ellipsoid()
        .args(["evaluate", "--model", model_path.to_str().unwrap()])
        .args(["--input", labelled.to_str().unwrap(), "--quiet"])
        .args(["--report", report.to_str().unwrap()])
        .assert()
        .success()
        .stdout(predicate::str::contains("recall"));
    let html = std::fs::read_to_string(&report).unwrap();
    assert!(html.starts_with("<!DOCTYPE html>"));
    assert!(html.contains("Full covariance against one feature at a time"));
    let json = ellipsoid()
        .args(["evaluate", "--model", model_path.to_str().unwrap()])
        .args(["--input", labelled.to_str().unwrap(), "--json", "--quiet"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let v: serde_json::Value = serde_json::from_slice(&json).unwrap();
    assert_eq!(v["readings"], 200);
    assert_eq!(v["anomalous_readings"], 20);
}

#[test]
fn inspect_refuses_a_corrupt_blob() {
    let dir = tempfile::tempdir().unwrap();
    let model_path = fit_ok(dir.path());
    let mut bytes = std::fs::read(&model_path).unwrap();
    bytes[20] ^= 0x04;
    let bad = write(dir.path(), "bad.blob", "");
    std::fs::write(&bad, &bytes).unwrap();
    ellipsoid()
        .args(["inspect", bad.to_str().unwrap()])
        .assert()
        .failure()
        .stderr(predicate::str::contains("CRC"));
    // And the core agrees.
    assert!(blob::decode::<3>(&bytes).is_err());
}

/// Each bad input: the error names the file, the line and the column (and the value).
#[test]
fn bad_inputs_are_refused_with_file_line_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let good = baseline_csv(50, 2);
    let mut lines: Vec<String> = good.lines().map(str::to_string).collect();
    let cases: Vec<(&str, String, Vec<&str>)> = vec![
        (
            "not-a-number",
            {
                let mut l = lines.clone();
                l[7] = "2026-01-01T00:00:07Z,10.1,abc,40".into();
                l.join("\n")
            },
            vec![":8", "pressure_bar", "abc"],
        ),
        (
            "field-count",
            {
                let mut l = lines.clone();
                l[5] = "2026-01-01T00:00:05Z,10.1,3.0".into();
                l.join("\n")
            },
            vec![":6"],
        ),
        (
            "nan-cell",
            {
                let mut l = lines.clone();
                l[9] = "2026-01-01T00:00:09Z,NaN,3.0,40".into();
                l.join("\n")
            },
            vec![":10", "current_a"],
        ),
        ("empty", String::new(), vec!["empty"]),
        (
            "duplicate",
            {
                let mut l = lines.clone();
                l[0] = "timestamp,current_a,current_a,temp_c".into();
                l.join("\n")
            },
            vec!["current_a"],
        ),
    ];
    for (name, text, needles) in cases {
        let path = write(dir.path(), &format!("{name}.csv"), &text);
        let out = dir.path().join(format!("{name}.blob"));
        let assert = fit(&path, &out).args(["--quiet"]).assert().failure();
        let stderr = String::from_utf8_lossy(&assert.get_output().stderr).to_string();
        assert!(stderr.contains(&format!("{name}.csv")), "{name}: {stderr}");
        for n in needles {
            assert!(stderr.contains(n), "{name}: `{n}` not in {stderr}");
        }
        assert!(!out.exists(), "{name}: a failed fit must write nothing");
    }
    // The same column twice in --columns.
    // (The output goes to a folder that exists but is never written: the input error comes first.)
    let path0 = write(dir.path(), "twice.csv", &good);
    let never = dir.path().join("never.blob");
    ellipsoid()
        .args([
            "fit",
            path0.to_str().unwrap(),
            "--out",
            never.to_str().unwrap(),
            "--quiet",
        ])
        .args(["--columns", "current_a,temp_c,current_a"])
        .assert()
        .failure()
        .stderr(predicate::str::contains(
            "names `current_a` twice (positions 1 and 3",
        ));
    // A missing column asked for by --columns.
    let path = write(dir.path(), "ok.csv", &good);
    ellipsoid()
        .args([
            "fit",
            path.to_str().unwrap(),
            "--out",
            never.to_str().unwrap(),
            "--quiet",
        ])
        .args(["--columns", "current_a,flow_lpm"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("flow_lpm"));
    assert!(!never.exists());
    // --skip-bad-rows gets past bad rows and says how many.
    lines[7] = "2026-01-01T00:00:07Z,10.1,abc,40".into();
    lines[9] = "2026-01-01T00:00:09Z,NaN,3.0,40".into();
    let path = write(dir.path(), "skip.csv", &lines.join("\n"));
    let out = dir.path().join("skip.blob");
    fit(&path, &out)
        .args(["--skip-bad-rows", "--quiet", "--holdout", "0"])
        .assert()
        .success()
        .stdout(predicate::str::contains("2 skipped"));
    // Fewer than N + 1 usable rows.
    let path = write(dir.path(), "few.csv", "a,b,c\n1,2,3\n2,3,1\n3,1,2\n");
    fit(&path, &out)
        .args(["--quiet", "--holdout", "0"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("only 3 usable training row(s)"));
}

#[test]
fn constant_and_collinear_features_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = String::from("a,b,c\n");
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for _ in 0..100 {
        let a: f64 = rng.random_range(0.0..1.0);
        let _ = writeln!(s, "{a},{},{}", rng.random_range(0.0..1.0), 5.0);
    }
    let path = write(dir.path(), "const.csv", &s);
    let out = dir.path().join("o.blob");
    fit(&path, &out)
        .args(["--quiet"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("constant feature(s)"))
        .stderr(predicate::str::contains("`c` (mean 5"));
    let mut s = String::from("a,b,c\n");
    for _ in 0..100 {
        let a: f64 = rng.random_range(0.0..1.0);
        let b: f64 = rng.random_range(0.0..1.0);
        let _ = writeln!(s, "{a},{b},{}", 2.0 * a - b);
    }
    let path = write(dir.path(), "coll.csv", &s);
    fit(&path, &out)
        .args(["--quiet"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("linear combination of `a`, `b`"));
    assert!(!out.exists());
}

#[test]
fn demo_runs_end_to_end() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("demo");
    ellipsoid()
        .args(["demo", "--out", out.to_str().unwrap()])
        .assert()
        .success()
        .stdout(predicate::str::contains("clogging").or(predicate::str::contains("filter")))
        .stdout(predicate::str::contains("not a safety function"));
    for f in [
        "baseline.csv",
        "readings.csv",
        "model.blob",
        "model.json",
        "replay.csv",
        "report.html",
        "summary.txt",
    ] {
        assert!(out.join(f).exists(), "{f} missing");
    }
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.starts_with("<!DOCTYPE html>"));
    assert!(html.matches("<svg").count() >= 5);
    // The demo blob decodes in the core as a 5-feature model.
    let bytes = std::fs::read(out.join("model.blob")).unwrap();
    assert!(Model::<5>::from_blob(&bytes).is_ok());
    for f in [
        "baseline-duty.csv",
        "readings-duty.csv",
        "bank.blob",
        "bank.json",
        "bank-replay.csv",
    ] {
        assert!(out.join(f).exists(), "{f} missing");
    }
    let summary = std::fs::read_to_string(out.join("summary.txt")).unwrap();
    for v in [
        "one Gaussian",
        "bank, nearest mode",
        "bank, known mode (duty_point)",
        "+ drift",
    ] {
        assert!(summary.contains(v), "no `{v}` in the side-by-side");
    }
    assert!(html.contains("The bank's modes") && html.contains("Drift of the centre"));
    demo_drift_follows_the_warming(&out);
}

/// The bank's blob replayed by the core's own tracker over the demo's readings: the greenhouse
/// warms the bearing temperature from test row 3 600 on (`scenario::WARMING_START`), so its drift
/// shift must grow positive (the core's rule s ← s + rate·(t − s − c_k) follows the readings),
/// and it must stay inside the bound given in the card.
fn demo_drift_follows_the_warming(out: &Path) {
    use ellipsoid_core::track::Tracker;
    let bytes = std::fs::read(out.join("bank.blob")).unwrap();
    let mut t = Tracker::<5, 5>::from_blob(&bytes).expect("the demo bank is N = M = 5");
    let card: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("bank.json")).unwrap()).unwrap();
    let bound = card["drift"]["bound"][3].as_f64().expect("a drift bound");
    let text = std::fs::read_to_string(out.join("readings.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(header[4], "bearing_temp_c");
    let mut at = Vec::new();
    for (i, line) in lines.enumerate() {
        let cells: Vec<&str> = line.split(',').collect();
        let mut x = [f32::NAN; 5];
        for (d, c) in x.iter_mut().zip(&cells[1..6]) {
            *d = c.parse().unwrap_or(f32::NAN);
        }
        t.step(&x, None);
        if i == 3600 || i == 11_399 {
            at.push(t.shift()[3]);
        }
    }
    let (start, before_wear) = (at[0], at[1]);
    assert!(
        before_wear > 0.0 && before_wear > start + 0.5,
        "bearing temperature shift {start} at the warming's start, {before_wear} before the wear"
    );
    assert!(
        f64::from(before_wear) <= bound * 1.0001,
        "{before_wear} past {bound}"
    );
}

#[test]
fn fit_options_f1_robust_shrinkage_and_log() {
    let dir = tempfile::tempdir().unwrap();
    // A baseline with three planted bad rows (lines 102, 503, 904 of the file).
    let mut lines: Vec<String> = baseline_csv(1500, 4).lines().map(str::to_string).collect();
    for l in [101usize, 502, 903] {
        lines[l] = "2026-01-01T00:00:00Z,14.0,1.0,40.0".into();
    }
    let base = write(dir.path(), "dirty.csv", &(lines.join("\n") + "\n"));
    let out = dir.path().join("m.blob");
    let run = |extra: &[&str]| {
        let a = fit(&base, &out)
            .args(["--quiet", "--json"])
            .args(extra)
            .assert()
            .success();
        serde_json::from_slice::<serde_json::Value>(&a.get_output().stdout).unwrap()
    };
    // Few simulated refits: this checks the rows set aside, and a debug build's FAST-MCD is slow.
    let v = run(&["--robust", "--holdout", "0", "--simulations", "3"]);
    let set_aside: Vec<u64> = serde_json::from_value(v["robust_set_aside_lines"].clone()).unwrap();
    for planted in [102u64, 503, 904] {
        assert!(
            set_aside.contains(&planted),
            "{planted} not in {set_aside:?}"
        );
    }
    let v = run(&["--shrinkage", "ledoit-wolf", "--simulations", "50"]);
    assert_eq!(
        v["threshold"]["promise"]["simulation"]["kind"],
        "simulated-refits"
    );
    assert_eq!(v["threshold"]["promise"]["simulation"]["baselines"], 50);
    let intensity = v["shrinkage"][1].as_f64().unwrap();
    assert!((0.0..=1.0).contains(&intensity), "{intensity}");
    let v = run(&["--log", "temp_c"]);
    assert_eq!(v["log_features"][0], "temp_c");
    // F1 on a labelled validation file: the chosen threshold is the F1 candidate.
    let mut csv = String::from("current_a,pressure_bar,temp_c,label\n");
    for i in 0..300 {
        if (200..230).contains(&i) {
            csv.push_str("13,1.0,40,1\n");
        } else {
            let _ = writeln!(csv, "{},{},40,0", 10.0 + (i % 5) as f64 * 0.1, 3.0);
        }
    }
    let val = write(dir.path(), "val.csv", &csv);
    let v = run(&["--threshold", "f1", "--validation", val.to_str().unwrap()]);
    assert_eq!(v["threshold"]["method"], "f1");
    let f1 = &v["threshold"]["candidates"]["f1"];
    assert_eq!(f1[1].as_f64().unwrap(), 1.0, "{f1}");
    let chosen = v["threshold"]["alarm"].as_f64().unwrap();
    assert!((chosen - f1[0].as_f64().unwrap()).abs() <= 1e-4 * chosen);
    // The empirical method without a hold-out is refused, naming the option that is missing.
    fit(&base, &out)
        .args(["--quiet", "--threshold", "empirical", "--holdout", "0"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("--holdout"));
}

fn bytes(p: &Path) -> Vec<u8> {
    std::fs::read(p).unwrap()
}

/// The names of the files in `dir`, sorted.
fn listing(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

/// `assert` failed, its stderr names `a` and `b`, and `keep` still has the bytes it had.
fn refused(cmd: &mut Command, a: &str, b: &str, keep: &Path, before: &[u8]) {
    let out = cmd.assert().failure();
    let stderr = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(stderr.contains("same file"), "{stderr}");
    assert!(
        stderr.contains(a) && stderr.contains(b),
        "`{a}`, `{b}` not in {stderr}"
    );
    assert_eq!(
        bytes(keep),
        before,
        "{} was changed: {stderr}",
        keep.display()
    );
}

#[test]
fn no_output_ever_replaces_an_input() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let base = write(d, "t.csv", &baseline_csv(300, 8));
    let before = bytes(&base);
    let s = |p: &Path| p.to_str().unwrap().to_string();
    // fit: --out is the baseline, also spelled another way and through a hard link.
    let dotted = d.join(".").join("t.csv");
    let hard = d.join("hard.csv");
    std::fs::hard_link(&base, &hard).unwrap();
    for out in [&base, &dotted, &hard] {
        refused(
            fit(&base, out).args(["--quiet"]),
            &s(out),
            &s(&base),
            &base,
            &before,
        );
    }
    // --report is the baseline.
    refused(
        fit(&base, &d.join("m.blob")).args(["--quiet", "--report", &s(&base)]),
        "--report",
        &s(&base),
        &base,
        &before,
    );
    assert!(!d.join("m.blob").exists());
    // A baseline named pump.json and --out pump.blob: the card would overwrite the baseline.
    let pump = write(d, "pump.json", &baseline_csv(300, 9));
    let pump_before = bytes(&pump);
    refused(
        fit(&pump, &d.join("pump.blob")).args(["--quiet"]),
        "model card",
        &s(&pump),
        &pump,
        &pump_before,
    );
    assert!(!d.join("pump.blob").exists());
    // --out is the --validation file.
    let val = write(
        d,
        "val.csv",
        "current_a,pressure_bar,temp_c,label\n10,3,40,0\n13,1,40,1\n",
    );
    let val_before = bytes(&val);
    refused(
        fit(&base, &val).args(["--quiet", "--validation", &s(&val)]),
        "--validation",
        &s(&val),
        &val,
        &val_before,
    );
    // replay --out is the input, the blob or the card; evaluate --report is the input or the blob.
    let model = fit_ok(d);
    let card = model.with_extension("json");
    let readings = write(
        d,
        "r.csv",
        "current_a,pressure_bar,temp_c,label\n10,3,40,0\n13,1,40,1\n",
    );
    for (victim, role) in [
        (&readings, "--input"),
        (&model, "--model"),
        (&card, "model card"),
    ] {
        let keep = bytes(victim);
        let mut c = ellipsoid();
        c.args(["replay", "--model", &s(&model), "--input", &s(&readings)])
            .args(["--out", &s(victim), "--quiet"]);
        refused(&mut c, role, &s(victim), victim, &keep);
    }
    for (victim, role) in [(&readings, "--input"), (&model, "--model")] {
        let keep = bytes(victim);
        let mut c = ellipsoid();
        c.args(["evaluate", "--model", &s(&model), "--input", &s(&readings)])
            .args(["--report", &s(victim), "--quiet"]);
        refused(&mut c, role, &s(victim), victim, &keep);
    }
}

#[test]
fn fit_writes_all_its_outputs_or_none() {
    let dir = tempfile::tempdir().unwrap();
    let model = fit_ok(dir.path());
    let card = model.with_extension("json");
    let (blob_before, card_before) = (bytes(&model), bytes(&card));
    let other = write(dir.path(), "other.csv", &baseline_csv(1500, 77));
    fit(&other, &model)
        .args(["--quiet", "--report", "/proc/r.html"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("/proc"));
    assert_eq!(bytes(&model), blob_before, "the blob was replaced");
    assert_eq!(bytes(&card), card_before, "the card was replaced");
    assert_eq!(
        listing(dir.path()),
        ["base.csv", "m.blob", "m.json", "other.csv"]
    );
    // A temporary file a killed run left an hour ago is removed by the next fit there; the
    // report goes to another folder, and all three files are replaced.
    let orphan = write(dir.path(), ".ellipsoid-Xk3Lq9.tmp", "half a blob");
    let hour_ago = std::time::SystemTime::now() - std::time::Duration::from_secs(3600);
    std::fs::File::options()
        .write(true)
        .open(&orphan)
        .unwrap()
        .set_modified(hour_ago)
        .unwrap();
    let elsewhere = tempfile::tempdir().unwrap();
    let report = elsewhere.path().join("r.html");
    fit(&other, &model)
        .args(["--quiet", "--report", report.to_str().unwrap()])
        .assert()
        .success();
    assert_ne!(bytes(&model), blob_before);
    assert_ne!(bytes(&card), card_before);
    assert!(report.exists());
    assert_eq!(
        listing(dir.path()),
        ["base.csv", "m.blob", "m.json", "other.csv"]
    );
    assert_eq!(listing(elsewhere.path()), ["r.html"]);
}

/// Many fits at once to one --out, each from its own baseline with its own model id: afterwards
/// the blob and the card always come from the same fit, and no temporary file is left.
#[test]
fn concurrent_fits_to_one_out_leave_a_matching_blob_and_card() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let bin = assert_cmd::cargo::cargo_bin("ellipsoid");
    let out = d.join("m.blob");
    let bases: Vec<PathBuf> = (0..6)
        .map(|k| {
            write(
                d,
                &format!("b{k}.csv"),
                &baseline_csv(400 + 50 * k, 100 + k as u64),
            )
        })
        .collect();
    for round in 0..8 {
        let children: Vec<_> = bases
            .iter()
            .enumerate()
            .map(|(k, b)| {
                std::process::Command::new(&bin)
                    .args(["fit", b.to_str().unwrap(), "--out", out.to_str().unwrap()])
                    .args([
                        "--quiet",
                        "--holdout",
                        "0",
                        "--model-id",
                        &(1000 + k).to_string(),
                    ])
                    .stdout(std::process::Stdio::null())
                    .spawn()
                    .unwrap()
            })
            .collect();
        for mut c in children {
            assert!(c.wait().unwrap().success());
        }
        let blob = bytes(&out);
        let card: serde_json::Value =
            serde_json::from_slice(&bytes(&out.with_extension("json"))).unwrap();
        let crc = u32::from_le_bytes(blob[blob.len() - 4..].try_into().unwrap());
        assert_eq!(
            card["blob_crc"].as_u64().unwrap(),
            u64::from(crc),
            "round {round}"
        );
        let k = bases
            .iter()
            .position(|b| card["trained_on"].as_str().unwrap() == b.to_str().unwrap())
            .expect("the card names one of the baselines");
        let id = blob::decode::<3>(&blob).unwrap().meta.model_id;
        assert_eq!(
            id,
            1000 + k as u32,
            "round {round}: blob of one fit, card of another"
        );
    }
    let litter: Vec<String> = listing(d)
        .into_iter()
        .filter(|n| n.starts_with('.'))
        .collect();
    assert!(litter.is_empty(), "{litter:?}");
}

/// The 500-row baseline with `cell` as `pressure_bar` on file line 300.
fn with_cell(cell: &str) -> String {
    let mut lines: Vec<String> = baseline_csv(500, 21).lines().map(str::to_string).collect();
    let mut cells: Vec<String> = lines[299].split(',').map(str::to_string).collect();
    cells[2] = cell.to_string();
    lines[299] = cells.join(",");
    lines.join("\n") + "\n"
}

#[test]
fn a_gross_outlier_in_the_baseline_is_refused_at_its_line() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("m.blob");
    for cell in ["1e39", "1e30", "1e308", "-9999"] {
        let base = write(dir.path(), "base.csv", &with_cell(cell));
        fit(&base, &out)
            .args(["--quiet"])
            .assert()
            .failure()
            .stderr(predicate::str::contains(
                "base.csv:300: column `pressure_bar`",
            ))
            .stderr(predicate::str::contains("robust standard deviations"))
            .stderr(predicate::str::contains("--skip-bad-rows"))
            .stderr(predicate::str::contains("--robust"))
            .stderr(predicate::str::contains("constant").not());
        assert!(!out.exists(), "{cell}");
    }
    // --skip-bad-rows skips the row, and the model sees pressure as it is (sd about 0.35).
    let base = write(dir.path(), "base.csv", &with_cell("1e30"));
    let a = fit(&base, &out)
        .args(["--quiet", "--json", "--skip-bad-rows", "--holdout", "0"])
        .assert()
        .success();
    let v: serde_json::Value = serde_json::from_slice(&a.get_output().stdout).unwrap();
    assert_eq!(v["rows_used"], 499, "{v}");
    let var = v["covariance"][4].as_f64().unwrap();
    assert!(var > 0.05 && var < 0.3, "pressure variance {var}");
    // --robust sets the row aside and says so.
    let a = fit(&base, &out)
        .args(["--quiet", "--json", "--robust", "--holdout", "0"])
        .assert()
        .success();
    let v: serde_json::Value = serde_json::from_slice(&a.get_output().stdout).unwrap();
    let set_aside: Vec<u64> = serde_json::from_value(v["robust_set_aside_lines"].clone()).unwrap();
    assert!(set_aside.contains(&300), "{set_aside:?}");
    let var = v["covariance"][4].as_f64().unwrap();
    assert!(var < 0.3, "pressure variance {var}");
}

#[test]
fn edited_feature_names_in_the_card_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let model = fit_ok(dir.path());
    let card = model.with_extension("json");
    let text = std::fs::read_to_string(&card).unwrap();
    let swapped = text
        .replace("\"current_a\"", "\"@\"")
        .replace("\"temp_c\"", "\"current_a\"")
        .replace("\"@\"", "\"temp_c\"");
    assert_ne!(text, swapped);
    std::fs::write(&card, swapped).unwrap();
    let readings = write(
        dir.path(),
        "r.csv",
        "current_a,pressure_bar,temp_c,label\n10,3,40,0\n13,1,40,1\n",
    );
    let m = model.to_str().unwrap();
    let r = readings.to_str().unwrap();
    let o = dir.path().join("o.csv");
    ellipsoid()
        .args([
            "replay",
            "--model",
            m,
            "--input",
            r,
            "--out",
            o.to_str().unwrap(),
        ])
        .assert()
        .failure()
        .stderr(predicate::str::contains("were changed after fit"));
    assert!(!o.exists());
    ellipsoid()
        .args(["evaluate", "--model", m, "--input", r])
        .assert()
        .failure()
        .stderr(predicate::str::contains("were changed after fit"));
}

#[test]
fn a_label_column_in_the_baseline_is_warned_about() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = String::from("current_a,pressure_bar,temp_c,label\n");
    for (i, line) in baseline_csv(400, 31).lines().skip(1).enumerate() {
        let cells: Vec<&str> = line.split(',').collect();
        let _ = writeln!(
            s,
            "{},{},{},{}",
            cells[1],
            cells[2],
            cells[3],
            u8::from(i % 9 == 0)
        );
    }
    let base = write(dir.path(), "labelled.csv", &s);
    let a = fit(&base, &dir.path().join("m.blob"))
        .args(["--quiet", "--json"])
        .assert()
        .success();
    let v: serde_json::Value = serde_json::from_slice(&a.get_output().stdout).unwrap();
    let w = v["warnings"].to_string();
    assert!(w.contains("`label` holds only the values 0 and 1"), "{w}");
    assert!(!w.contains("`current_a` holds"), "{w}");
}

#[test]
fn replay_names_the_bad_input_cell_first() {
    let dir = tempfile::tempdir().unwrap();
    let model = fit_ok(dir.path());
    let readings = write(
        dir.path(),
        "r.csv",
        "current_a,pressure_bar,temp_c\n10,3,40\n10,x7,40\n",
    );
    let out = dir.path().join("out.csv");
    let a = ellipsoid()
        .args(["replay", "--model", model.to_str().unwrap()])
        .args([
            "--input",
            readings.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .assert()
        .failure();
    let stderr = String::from_utf8_lossy(&a.get_output().stderr).to_string();
    let first = stderr.lines().next().unwrap();
    assert!(
        first.contains("r.csv:3: column `pressure_bar`: `x7`"),
        "{stderr}"
    );
    assert!(!stderr.contains("while writing"), "{stderr}");
    assert!(!out.exists());
}

#[test]
fn a_column_f32_cannot_resolve_is_explained() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("m.blob");
    let mut rng = ChaCha8Rng::seed_from_u64(41);
    // sd 2 around 1e9, and epoch milliseconds at one reading a second.
    let mut a = String::from("a,b,big\n");
    let mut b = String::from("a,b,epoch_ms\n");
    for i in 0..500u64 {
        let x: f64 = rng.random_range(0.0..1.0);
        let y: f64 = rng.random_range(0.0..1.0);
        let _ = writeln!(
            a,
            "{x},{y},{}",
            1e9 + rng.random_range(-3.5f64..3.5).round()
        );
        let _ = writeln!(b, "{x},{y},{}", 1_767_225_600_000 + 1000 * i);
    }
    for (name, text, col) in [("big.csv", a, "`big`"), ("ms.csv", b, "`epoch_ms`")] {
        let base = write(dir.path(), name, &text);
        fit(&base, &out)
            .args(["--quiet"])
            .assert()
            .failure()
            .stderr(predicate::str::contains(col))
            .stderr(predicate::str::contains("f32"))
            .stderr(predicate::str::contains("Subtract an offset"))
            .stderr(predicate::str::contains("constant feature(s)").not());
    }
}

#[test]
fn long_cells_are_cut_and_cr_only_files_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("m.blob");
    let mut lines: Vec<String> = baseline_csv(50, 2).lines().map(str::to_string).collect();
    let huge = "9".repeat(100_000) + "x";
    lines[4] = format!("2026-01-01T00:00:04Z,10.1,{huge},40");
    let base = write(dir.path(), "long.csv", &lines.join("\n"));
    let a = fit(&base, &out).args(["--quiet"]).assert().failure();
    let stderr = String::from_utf8_lossy(&a.get_output().stderr).to_string();
    assert!(stderr.len() < 600, "{} bytes of stderr", stderr.len());
    assert!(
        stderr.contains("long.csv:5: column `pressure_bar`"),
        "{stderr}"
    );
    assert!(stderr.contains("… (100001 bytes)"), "{stderr}");
    // Lines ended by a lone CR.
    let cr = baseline_csv(50, 2).replace('\n', "\r");
    let base = write(dir.path(), "mac.csv", &cr);
    fit(&base, &out)
        .args(["--quiet"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("mac.csv:1"))
        .stderr(predicate::str::contains("lone carriage return"));
    // CRLF is still read.
    let crlf = baseline_csv(50, 2).replace('\n', "\r\n");
    let base = write(dir.path(), "dos.csv", &crlf);
    fit(&base, &out).args(["--quiet"]).assert().success();
}

/// The default limit through the binary: with `--independent-rows` it is the Phase II Hotelling
/// UCL for m = rows fitted, checked against scipy 1.17.1 (`f.ppf`; shared/reference-values.md:
/// p = 3, m = 40, α = 0.01 gives 14.13021105). 50 rows with the default 0.2 hold-out leave 40.
#[test]
fn fit_default_is_the_phase2_hotelling_limit() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "base.csv", &baseline_csv(50, 8));
    let out = dir.path().join("m.blob");
    let a = fit(&base, &out)
        .args(["--quiet", "--json", "--alpha", "0.01", "--independent-rows"])
        .assert()
        .success();
    let v: serde_json::Value = serde_json::from_slice(&a.get_output().stdout).unwrap();
    let t = &v["threshold"];
    assert_eq!(t["method"], "hotelling");
    assert_eq!(t["promise"]["m"], 40);
    let alarm = t["alarm"].as_f64().unwrap();
    assert!((alarm - 14.130_211_05).abs() < 1e-5 * 14.13, "{alarm}");
    assert!((t["expected_false_readings_per_day"].as_f64().unwrap() - 864.0).abs() < 1e-6);
    assert!(t["at_most_false_readings_per_day"].as_f64().unwrap() > 864.0);
    assert_eq!(t["promise"]["lengths"][0]["within"], 2.0);
    // The text names the method, m, both rates and the length check; `inspect` shows the card's method.
    let text = fit(&base, &out)
        .args(["--quiet", "--alpha", "0.01"])
        .assert()
        .success();
    let text = String::from_utf8(text.get_output().stdout.clone()).unwrap();
    for want in [
        "hotelling (Phase II, F limit)",
        "m = 40 rows fitted",
        "expected",
        "with 90 % confidence",
        "baseline length",
    ] {
        assert!(text.contains(want), "missing `{want}` in\n{text}");
    }
    ellipsoid()
        .args(["inspect", out.to_str().unwrap()])
        .assert()
        .success()
        .stdout(predicate::str::contains("threshold chosen by `hotelling`"));
}

/// The empirical method at a target its hold-out cannot reach is refused, naming the rows and
/// the log length it needs; a short baseline is refused under --strict-baseline.
#[test]
fn fit_refuses_empirical_beyond_the_data_and_short_baselines_when_strict() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "base.csv", &baseline_csv(300, 9));
    let out = dir.path().join("m.blob");
    fit(&base, &out)
        .args(["--quiet", "--threshold", "empirical", "--rate-hz", "2"])
        .assert()
        .failure()
        .stderr(predicate::str::contains(
            "needs at least 172799 held-out rows",
        ))
        .stderr(predicate::str::contains("24.0 h of log at 2 Hz"))
        .stderr(predicate::str::contains("the hold-out has 60"));
    assert!(!out.exists());
    // α = 0.05 needs 19 held-out rows; 60 are there: rank ⌈61 · 0.95⌉ = 58.
    fit(&base, &out)
        .args([
            "--quiet",
            "--threshold",
            "empirical",
            "--alpha",
            "0.05",
            "--json",
        ])
        .assert()
        .success()
        .stdout(predicate::str::contains("\"rank\": 58"));
    // 20 rows fitted are too few for the promise to hold within 2×: refused when strict, a
    // warning otherwise.
    let short = write(dir.path(), "short.csv", &baseline_csv(25, 9));
    fit(&short, &out)
        .args(["--quiet", "--strict-baseline"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("--strict-baseline"))
        .stderr(predicate::str::contains("within 2×"));
    fit(&short, &out)
        .args(["--quiet"])
        .assert()
        .success()
        .stdout(predicate::str::contains("warning: this baseline is short"));
}

/// A card with the wrong number of names (or a name twice), even with its digest recomputed, is
/// refused by name; `inspect` reports it instead of indexing past the names (it panicked before).
#[test]
fn a_card_must_name_each_feature_once() {
    use ellipsoid_trainer::data::card::{names_digest, ModelCard};
    let dir = tempfile::tempdir().unwrap();
    let model = fit_ok(dir.path());
    let card_path = model.with_extension("json");
    let original: ModelCard =
        serde_json::from_str(&std::fs::read_to_string(&card_path).unwrap()).unwrap();
    let readings = write(
        dir.path(),
        "r.csv",
        "current_a,pressure_bar,temp_c\n10,3,40\n",
    );
    let m = model.to_str().unwrap();
    for (features, why) in [
        (original.features[..2].to_vec(), "names 2 features"),
        (
            vec![
                original.features[0].clone(),
                original.features[0].clone(),
                original.features[2].clone(),
            ],
            "twice",
        ),
    ] {
        let mut card = original.clone();
        card.names_digest = names_digest(card.blob_crc, &features, &card.log_features);
        card.features = features;
        std::fs::write(&card_path, serde_json::to_string(&card).unwrap()).unwrap();
        ellipsoid()
            .args(["inspect", m])
            .assert()
            .success()
            .stdout(predicate::str::contains("model card refused"))
            .stdout(predicate::str::contains(why));
        let o = dir.path().join("o.csv");
        ellipsoid()
            .args([
                "replay",
                "--model",
                m,
                "--input",
                readings.to_str().unwrap(),
            ])
            .args(["--out", o.to_str().unwrap()])
            .assert()
            .failure()
            .stderr(predicate::str::contains("m.json"))
            .stderr(predicate::str::contains(why));
        assert!(!o.exists());
    }
}

/// An output into a folder that does not exist is refused before any work, naming the folder.
#[test]
fn an_output_folder_that_does_not_exist_is_named_up_front() {
    let dir = tempfile::tempdir().unwrap();
    let base = write(dir.path(), "base.csv", &baseline_csv(200, 3));
    let out = dir.path().join("no-such-folder").join("m.blob");
    fit(&base, &out)
        .args(["--quiet"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("no-such-folder"))
        .stderr(predicate::str::contains("does not exist"));
    assert!(!dir.path().join("no-such-folder").exists());
}
