//! `replay`, `evaluate` and `inspect` on a model bank (blob format 2), through the binary: the
//! replay is the core's `Tracker` run directly over the same readings, bit for bit, with its
//! state carried from row to row; the names digest and the mode column are checked with errors
//! that name the file, the line and the field.
//!
//! The banks here are written by the core's own encoder (`blob::encode_bank`) from invented
//! parameters: test data only.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use assert_cmd::Command;
use ellipsoid_core::{
    blob, AlarmPolicy, BankParams, DriftSpec, EventKind, ModeParams, ModeSelect, ReadingFault,
    Thresholds, Tracker, WindowSpec,
};
use predicates::prelude::*;

fn ellipsoid() -> Command {
    Command::cargo_bin("ellipsoid").unwrap()
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

const NAMES: [&str; 2] = ["flow", "head"];

/// Two modes over `flow` and `head` (duty points near (10, 5) and (20, 8)), window 3 with the
/// first differences (M = 4), drift on: a bank as `fit` would write it, from invented numbers.
fn bank(select: ModeSelect) -> Vec<u8> {
    let mode = |centre: [f32; 2], alarm: f32| ModeParams::<4> {
        offset: [centre[0], centre[1], 0.0, 0.0],
        scale: [2.0, 1.0, 1.0, 4.0],
        mean: [0.0; 4],
        w: [
            [1.0, 0.0, 0.0, 0.0],
            [-0.5, 1.2, 0.0, 0.0],
            [0.0, 0.0, 1.0, 0.0],
            [0.1, 0.0, 0.0, 0.9],
        ],
        thresholds: Thresholds {
            alarm,
            clear: 0.5 * alarm,
        },
    };
    let modes = [mode([10.0, 5.0], 9.0), mode([20.0, 8.0], 12.0)];
    let p = BankParams::<2, 4> {
        meta: ellipsoid_core::ModelMeta {
            model_id: 0x0102_0304,
            trained_at: 1_767_225_600,
            sequence: 7,
        },
        log_mask: 0,
        select,
        modes: &modes,
        window: WindowSpec {
            length: 3,
            differences: true,
        },
        drift: Some(DriftSpec {
            rate: 0.2,
            bound: [0.3, 0.3, 1.0, 1.0],
        }),
        policy: AlarmPolicy {
            raise_after: 2,
            clear_after: 2,
            latch: false,
        },
        names_digest: blob::names_digest(NAMES),
    };
    let mut buf = vec![0u8; blob::max_bank_len(2, 4, 2, true)];
    let len = blob::encode_bank(&p, &mut buf).unwrap();
    buf.truncate(len);
    buf
}

/// Readings (flow, head, mode, label) through both duty points, a dropout, a fault episode and
/// a slow creep in mode 0 that walks the drift to its bound.
fn readings() -> Vec<(f64, f64, u8, bool)> {
    let mut r = vec![
        (10.0, 5.0, 0, false),
        (10.2, 5.1, 0, false),
        (9.9, 4.9, 0, false),
        (10.1, 5.0, 0, false),
        (f64::NAN, 5.0, 0, false),
        (10.0, 5.0, 0, false),
        (10.0, 5.0, 0, false),
        (10.0, 5.0, 0, false),
        (20.0, 8.0, 1, false),
        (20.1, 8.0, 1, false),
        (20.0, 7.9, 1, false),
        (20.0, 8.1, 1, false),
        (30.0, 1.0, 1, true),
        (30.0, 1.0, 1, true),
        (30.0, 1.0, 1, true),
        (10.0, 5.0, 0, false),
    ];
    for i in 0..60 {
        r.push((
            10.0 + 0.02 * f64::from(i),
            5.0 + 0.005 * f64::from(i),
            0,
            i > 50,
        ));
    }
    r
}

/// The readings as a CSV with the columns in another order than the model's, a timestamp and,
/// when asked, the mode column.
fn csv(rows: &[(f64, f64, u8, bool)], mode: bool) -> String {
    let mut s = String::from(if mode {
        "time,head,op_mode,flow,label\n"
    } else {
        "time,head,flow,label\n"
    });
    for (i, (f, h, m, l)) in rows.iter().enumerate() {
        let f = if f.is_nan() {
            String::new()
        } else {
            format!("{f}")
        };
        if mode {
            let _ = writeln!(s, "{i},{h},{m},{f},{}", u8::from(*l));
        } else {
            let _ = writeln!(s, "{i},{h},{f},{}", u8::from(*l));
        }
    }
    s
}

struct Cli {
    _dir: tempfile::TempDir,
    blob: PathBuf,
    input: PathBuf,
    out: PathBuf,
}

fn setup(select: ModeSelect, mode_column: bool) -> Cli {
    let dir = tempfile::tempdir().unwrap();
    let blob = dir.path().join("pump.blob");
    std::fs::write(&blob, bank(select)).unwrap();
    let input = write(dir.path(), "r.csv", &csv(&readings(), mode_column));
    let out = dir.path().join("scored.csv");
    Cli {
        _dir: dir,
        blob,
        input,
        out,
    }
}

fn replay(c: &Cli, features: &str) -> Command {
    let mut cmd = ellipsoid();
    cmd.args(["replay", "--model", c.blob.to_str().unwrap()])
        .args(["--input", c.input.to_str().unwrap()])
        .args(["--out", c.out.to_str().unwrap(), "--quiet"])
        .args(["--features", features]);
    cmd
}

/// The device's loop: one tracker, one step per reading, values rounded to `f32` once.
fn direct(select: ModeSelect, modes: bool) -> Vec<ellipsoid_core::TrackStep<4>> {
    let bytes = bank(select);
    let mut t = Tracker::<2, 4>::from_blob(&bytes).unwrap();
    readings()
        .iter()
        .map(|(f, h, m, _)| t.step_explained(&[*f as f32, *h as f32], modes.then_some(*m)))
        .collect()
}

fn check_rows(text: &str, want: &[ellipsoid_core::TrackStep<4>]) {
    let mut rdr = csv::Reader::from_reader(text.as_bytes());
    let h = rdr.headers().unwrap().clone();
    assert_eq!(
        h.iter().collect::<Vec<_>>(),
        [
            "index",
            "d2",
            "d2_bits",
            "verdict",
            "alarm",
            "fault",
            "event",
            "top_feature",
            "mode",
            "drift_at_bound",
            "c_flow",
            "c_head",
            "c_Δflow",
            "c_Δhead"
        ]
    );
    let rows: Vec<csv::StringRecord> = rdr.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), want.len());
    for (i, (r, w)) in rows.iter().zip(want).enumerate() {
        assert_eq!(&r[0], i.to_string(), "row {i}");
        match &w.score {
            Ok(s) => {
                assert_eq!(&r[2], format!("{:08x}", s.d2.to_bits()), "row {i}");
                assert_eq!(&r[8], s.mode.to_string(), "row {i}");
                let c = w.contributions.unwrap();
                for j in 0..4 {
                    let got: f32 = r[10 + j].parse().unwrap();
                    assert_eq!(got.to_bits(), c[j].to_bits(), "row {i} contribution {j}");
                }
            }
            Err(_) => {
                assert_eq!((&r[2], &r[3], &r[8]), ("", "fault", ""), "row {i}");
            }
        }
        let flag = |b: bool| if b { "1" } else { "0" };
        assert_eq!(&r[4], flag(w.step.alarm), "row {i}");
        assert_eq!(&r[5], flag(w.step.fault), "row {i}");
        assert_eq!(&r[9], flag(w.drift_at_bound), "row {i}");
        let events: Vec<&str> = w.step.events.iter().map(|e| e.kind.name()).collect();
        assert_eq!(&r[6], events.join("+"), "row {i}");
    }
}

#[test]
fn a_bank_replays_as_the_core_tracker_bit_for_bit_with_its_state_carried() {
    let c = setup(ModeSelect::Nearest, false);
    replay(&c, "flow,head").assert().success();
    let text = std::fs::read_to_string(&c.out).unwrap();
    let want = direct(ModeSelect::Nearest, false);
    check_rows(&text, &want);
    // What the stream was built to reach: both modes, the window's faults, a drift event.
    assert!(want.iter().any(|w| w.score.is_ok_and(|s| s.mode == 1)));
    let filling = want
        .iter()
        .filter(|w| matches!(w.score, Err(ReadingFault::WindowFilling { .. })))
        .count();
    // Two at the start (a window of 3) and two after the dropout.
    assert_eq!(filling, 4);
    assert_eq!(
        want.iter()
            .flat_map(|w| w.step.events.iter())
            .filter(|e| matches!(e.kind, EventKind::Drift { .. }))
            .count(),
        1
    );
}

#[test]
fn a_bank_is_refused_on_columns_other_than_it_was_trained_on() {
    let c = setup(ModeSelect::Nearest, false);
    // The names swapped: the digest in the blob says these are not the trained columns.
    replay(&c, "head,flow")
        .assert()
        .failure()
        .stderr(predicate::str::contains(c.input.display().to_string()))
        .stderr(predicate::str::contains(
            "head,flow (in this order, from --features)",
        ))
        .stderr(predicate::str::contains(format!(
            "its names digest is {:#010x}",
            blob::names_digest(NAMES)
        )));
    // When the file's own column order is the trained one, the message says where they differ.
    std::fs::write(&c.input, "flow,head\n10,5\n10,5\n10,5\n").unwrap();
    replay(&c, "head,flow")
        .assert()
        .failure()
        .stderr(predicate::str::contains(c.input.display().to_string()))
        .stderr(predicate::str::contains("head,flow"))
        .stderr(predicate::str::contains("names digest"))
        .stderr(predicate::str::contains(
            "the file's own column order is the trained one: position 1: `head` given, `flow` \
             expected, position 2: `flow` given, `head` expected (in order: flow,head)",
        ));
    // A name the bank never had.
    replay(&c, "flow,label")
        .assert()
        .failure()
        .stderr(predicate::str::contains("flow,label"))
        .stderr(predicate::str::contains("are not the ones"));
    assert!(!c.out.exists(), "nothing is written for a refused run");
}

#[test]
fn a_known_mode_bank_reads_its_mode_column_and_faults_what_it_cannot_score() {
    let c = setup(ModeSelect::Known, true);
    // Without a mode column, a known-mode bank cannot run.
    replay(&c, "flow,head")
        .assert()
        .failure()
        .stderr(predicate::str::contains("give --mode-column"));
    replay(&c, "flow,head")
        .args(["--mode-column", "op_mode"])
        .assert()
        .success();
    let text = std::fs::read_to_string(&c.out).unwrap();
    let want = direct(ModeSelect::Known, true);
    check_rows(&text, &want);
    // The change of mode at reading 8 restarts the window: readings 8 and 9 are faults.
    for w in &want[8..10] {
        assert!(matches!(w.score, Err(ReadingFault::WindowFilling { .. })));
    }

    // A mode the bank does not have (7), and a reading without one: faults from the core, not
    // errors; the rows around them are scored.
    let dir = c._dir.path();
    let odd = write(
        dir,
        "odd.csv",
        "flow,head,op_mode\n10,5,0\n10,5,0\n10,5,0\n10,5,7\n10,5,\n10,5,0\n",
    );
    let out = dir.join("odd-scored.csv");
    ellipsoid()
        .args(["replay", "--model", c.blob.to_str().unwrap()])
        .args([
            "--input",
            odd.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .args([
            "--quiet",
            "--features",
            "flow,head",
            "--mode-column",
            "op_mode",
        ])
        .assert()
        .success();
    let lines: Vec<String> = std::fs::read_to_string(&out)
        .unwrap()
        .lines()
        .map(String::from)
        .collect();
    assert!(
        lines[3].starts_with("2,") && lines[3].contains(",below,"),
        "{}",
        lines[3]
    );
    assert!(lines[4].starts_with("3,,,fault,0,1,fault,"), "{}", lines[4]);
    assert!(lines[5].starts_with("4,,,fault,0,1,fault,"), "{}", lines[5]);
    // An unknown mode is not a restart of the window: the next good reading is scored.
    assert!(
        lines[6].starts_with("5,") && lines[6].contains(",below,"),
        "{}",
        lines[6]
    );

    // Bad mode values are errors naming the file, the line and the field.
    for (cell, why) in [
        ("1.5", "not a whole number"),
        ("-1", "not a whole number"),
        ("300", "not a whole number"),
        ("inf", "not a whole number"),
        ("idle", "idle"),
    ] {
        let bad = write(
            dir,
            "bad.csv",
            &format!("flow,head,op_mode\n10,5,0\n10,5,{cell}\n"),
        );
        ellipsoid()
            .args(["replay", "--model", c.blob.to_str().unwrap()])
            .args(["--input", bad.to_str().unwrap()])
            .args(["--out", dir.join("bad-out.csv").to_str().unwrap()])
            .args([
                "--quiet",
                "--features",
                "flow,head",
                "--mode-column",
                "op_mode",
            ])
            .assert()
            .failure()
            .stderr(predicate::str::contains(bad.display().to_string()))
            .stderr(predicate::str::contains("3"))
            .stderr(predicate::str::contains("op_mode"))
            .stderr(predicate::str::contains(why));
        assert!(!dir.join("bad-out.csv").exists());
    }
    // A mode column the file does not have.
    replay(&c, "flow,head")
        .args(["--mode-column", "setpoint"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("no mode column named `setpoint`"));
    // The mode column cannot be a feature.
    replay(&c, "flow,head")
        .args(["--mode-column", "flow"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("is one of the model's features"));
}

#[test]
fn a_nearest_mode_bank_refuses_a_mode_column() {
    let c = setup(ModeSelect::Nearest, true);
    replay(&c, "flow,head")
        .args(["--mode-column", "op_mode"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("nearest mode itself"));
}

#[test]
fn evaluate_runs_the_same_tracker_and_counts_window_faults_as_flagged() {
    let c = setup(ModeSelect::Nearest, false);
    let out = ellipsoid()
        .args(["evaluate", "--model", c.blob.to_str().unwrap()])
        .args(["--input", c.input.to_str().unwrap()])
        .args(["--features", "flow,head", "--json", "--quiet"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    // The figures of the direct tracker loop, through the trainer's metrics.
    let want = direct(ModeSelect::Nearest, false);
    let labels: Vec<bool> = readings().iter().map(|r| r.3).collect();
    let d2: Vec<Option<f32>> = want.iter().map(|w| w.score.ok().map(|s| s.d2)).collect();
    let above: Vec<bool> = want
        .iter()
        .map(|w| {
            w.score
                .is_ok_and(|s| s.verdict == ellipsoid_core::Verdict::Above)
        })
        .collect();
    let alarm: Vec<bool> = want.iter().map(|w| w.step.alarm).collect();
    let fault: Vec<bool> = want.iter().map(|w| w.step.fault).collect();
    let e = ellipsoid_trainer::stats::metrics::evaluate(&d2, &above, &alarm, &fault, &labels, 1.0);
    let e = serde_json::to_value(&e).unwrap();
    for key in [
        "readings",
        "unscored",
        "unscored_labelled_normal",
        "per_reading",
        "after_policy",
    ] {
        assert_eq!(v[key], e[key], "{key}");
    }
    let filling = want
        .iter()
        .filter(|w| matches!(w.score, Err(ReadingFault::WindowFilling { .. })))
        .count();
    assert_eq!(v["unscored_by_cause"]["window_filling"], filling as u64);
    assert_eq!(v["unscored_by_cause"]["bad_reading"], 1);
    assert_eq!(v["unscored"], filling as u64 + 1);
    assert_eq!(v["drift"]["events"], 1);
    assert!(v["drift"]["first_at_bound"].as_u64().is_some());
    // The window's faults at the start are flagged readings labelled normal.
    assert!(v["per_reading"]["confusion"]["fp"].as_u64().unwrap() >= filling as u64);

    // The text says how the faults counted.
    ellipsoid()
        .args(["evaluate", "--model", c.blob.to_str().unwrap()])
        .args(["--input", c.input.to_str().unwrap()])
        .args(["--features", "flow,head", "--quiet"])
        .assert()
        .success()
        .stdout(predicate::str::contains(format!(
            "not scored, by cause: 1 bad reading(s), {filling} with the reading window filling"
        )))
        .stdout(predicate::str::contains(
            "drift: the centre's shift reached its bound",
        ));
}

#[test]
fn inspect_shows_a_bank() {
    let c = setup(ModeSelect::Nearest, false);
    let bytes = std::fs::read(&c.blob).unwrap();
    let crc = u32::from_le_bytes(bytes[bytes.len() - 4..].try_into().unwrap());
    let out = ellipsoid()
        .args(["inspect", c.blob.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    for want in [
        "a valid Ellipsoid model bank blob (format 2)".to_string(),
        format!(
            "{} bytes; 2 mode(s) over 2 raw feature(s), 4 scored",
            bytes.len()
        ),
        format!("CRC-32 {crc:#010x}"),
        format!("names digest {:#010x}", blob::names_digest(NAMES)),
        "mode: nearest".into(),
        "window: the mean of the last 3 reading(s), and the first differences".into(),
        "drift: on, rate 0.2 (half-life 3.1 readings)".into(),
        "feature_0 0.3, feature_1 0.3, Δfeature_0 1, Δfeature_1 1".into(),
        "mode 0: alarm when d² > 9, clear when d² < 4.5".into(),
        "mode 1: alarm when d² > 12, clear when d² < 6".into(),
        "model id 0x01020304, sequence 7".into(),
    ] {
        assert!(text.contains(&want), "missing `{want}` in:\n{text}");
    }
    // Mode 1's centre: (20, 8) and no drift in the differences.
    let mode1 = &text[text.find("mode 1:").unwrap()..];
    assert!(
        mode1.contains("20.000000") && mode1.contains("8.000000"),
        "{mode1}"
    );

    let out = ellipsoid()
        .args(["inspect", "--json", c.blob.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(out.status.success());
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["format"], 2);
    assert_eq!(v["blob_bytes"], bytes.len());
    assert_eq!(v["crc"], format!("{crc:#010x}"));
    assert_eq!(v["mode_select"], "nearest");
    assert_eq!(v["window"], 3);
    assert_eq!(v["differences"], true);
    assert_eq!(v["scored_dimension"], 4);
    assert_eq!(
        v["names_digest"],
        format!("{:#010x}", blob::names_digest(NAMES))
    );
    assert_eq!(v["modes"].as_array().unwrap().len(), 2);
    assert_eq!(v["modes"][1]["alarm_threshold"], 12.0);
    assert_eq!(v["modes"][1]["centre"][0], 20.0);
    assert_eq!(v["modes"][0]["centre"][1], 5.0);
    let rate = v["drift"]["rate"].as_f64().unwrap();
    assert_eq!(rate as f32, 0.2f32);
    assert_eq!(v["drift"]["bound"][2], 1.0);

    // export packages a bank for a slot like a single model.
    let hex = c._dir.path().join("pump.hex");
    ellipsoid()
        .args(["export", c.blob.to_str().unwrap(), "--format", "raw"])
        .args(["--out", hex.to_str().unwrap()])
        .assert()
        .success();
    assert_eq!(std::fs::read(&hex).unwrap(), bytes);
}

/// A model card beside the blob, as `fit` writes one for a bank (its fields from JSON, so that
/// the test does not depend on every field the card may gain).
fn write_card(blob_path: &Path, mode_column: Option<&str>, scored: &[&str]) {
    let bytes = std::fs::read(blob_path).unwrap();
    let crc = ellipsoid_trainer::data::card::blob_crc(&bytes);
    let features: Vec<String> = NAMES.iter().map(|s| s.to_string()).collect();
    let digest = ellipsoid_trainer::data::card::digest_with_mode(crc, &features, &[], mode_column);
    let mut card = serde_json::json!({
        "kind": "ellipsoid-model-card",
        "version": 3,
        "features": features,
        "log_features": [],
        "blob_crc": crc,
        "blob_len": bytes.len(),
        "names_digest": digest,
        "threshold_method": "hotelling",
        "alpha": 1e-4,
        "rate_hz": 1.0,
        "trained_on": "base.csv",
        "window": 3,
        "differences": true,
        "scored_features": scored,
    });
    if let Some(m) = mode_column {
        card["mode_column"] = m.into();
        card["select"] = "known".into();
    }
    let path = ellipsoid_trainer::data::card::ModelCard::path_for(blob_path);
    std::fs::write(path, serde_json::to_string_pretty(&card).unwrap()).unwrap();
}

#[test]
fn the_card_names_the_mode_column_and_the_scored_values() {
    let c = setup(ModeSelect::Known, true);
    write_card(
        &c.blob,
        Some("op_mode"),
        &["flow", "head", "d_flow", "d_head"],
    );
    // No --features and no --mode-column: both come from the card.
    ellipsoid()
        .args(["replay", "--model", c.blob.to_str().unwrap()])
        .args(["--input", c.input.to_str().unwrap()])
        .args(["--out", c.out.to_str().unwrap(), "--quiet"])
        .assert()
        .success();
    let text = std::fs::read_to_string(&c.out).unwrap();
    assert!(
        text.starts_with(
            "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,mode,drift_at_bound,\
             c_flow,c_head,c_d_flow,c_d_head\n"
        ),
        "{}",
        &text[..120]
    );
    // The rows are the direct loop's (the header is the only difference from --features).
    let want = direct(ModeSelect::Known, true);
    let renamed = text.replacen("c_d_flow,c_d_head", "c_Δflow,c_Δhead", 1);
    check_rows(&renamed, &want);
    // --mode-column, when given, is used instead of the card's (here a feature: refused).
    ellipsoid()
        .args(["replay", "--model", c.blob.to_str().unwrap()])
        .args(["--input", c.input.to_str().unwrap()])
        .args(["--out", c.out.to_str().unwrap(), "--quiet"])
        .args(["--mode-column", "head"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("is one of the model's features"));
    // inspect names the scored values by the card and checks its names against the digest.
    ellipsoid()
        .args(["inspect", c.blob.to_str().unwrap()])
        .assert()
        .success()
        .stdout(predicate::str::contains(
            "matches the card's features, in order",
        ))
        .stdout(predicate::str::contains(
            "mode: known, told with each reading (0 to 1)",
        ))
        .stdout(predicate::str::contains("d_head"));
}
