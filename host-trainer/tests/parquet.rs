//! Parquet input, checked against files written by pyarrow (the Apache Arrow project's Python
//! library, an implementation independent of the Rust `parquet` crate we read with). The files and
//! the script that wrote them are in `tests/data/parquet/` (`make_twins.py` says how to run it).

use std::path::{Path, PathBuf};

use assert_cmd::Command;
use ellipsoid_trainer::data::ingest::{is_parquet, read_table, CsvOptions};

fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/parquet")
        .join(name)
}

fn opts(columns: &[&str]) -> CsvOptions {
    CsvOptions {
        columns: Some(columns.iter().map(|s| s.to_string()).collect()),
        label: Some("fault".into()),
        ..CsvOptions::default()
    }
}

const FEATURES: [&str; 5] = ["pressure", "flow", "temp", "count", "level"];

#[test]
fn the_parquet_file_reads_back_to_its_csv_twin() {
    assert!(is_parquet(&data("small.parquet")));
    assert!(!is_parquet(&data("small.csv")));
    let p = read_table(&data("small.parquet"), &opts(&FEATURES)).unwrap();
    let c = read_table(&data("small.csv"), &opts(&FEATURES)).unwrap();
    assert_eq!(p.rows(), 12, "3 row groups of 5, 5 and 2 rows");
    assert_eq!(p.features, c.features);
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&p.values), bits(&c.values));
    assert_eq!(p.labels, c.labels);
    assert_eq!(p.labels.as_ref().unwrap().iter().filter(|l| **l).count(), 2);
    assert_eq!(
        p.timestamps, c.timestamps,
        "the timestamp column is found by name and kept as text"
    );
    assert_eq!(
        p.lines,
        (1..=12).collect::<Vec<u64>>(),
        "Parquet rows count from 1"
    );
}

#[test]
fn every_column_but_the_timestamp_is_a_feature_by_default() {
    let o = CsvOptions::default();
    let err = read_table(&data("small.parquet"), &o)
        .unwrap_err()
        .to_string();
    // `fault` is BOOLEAN: it must be named as the label or left out.
    assert!(err.contains("column `fault` holds BOOLEAN values"), "{err}");
    let o = CsvOptions {
        label: Some("fault".into()),
        ..CsvOptions::default()
    };
    let t = read_table(&data("small.parquet"), &o).unwrap();
    assert_eq!(t.features, FEATURES);
}

#[test]
fn bad_parquet_input_names_file_row_and_column() {
    let file = data("null.parquet").display().to_string();
    let err = read_table(&data("null.parquet"), &opts(&FEATURES))
        .unwrap_err()
        .to_string();
    assert_eq!(
        err,
        format!("{file}: row 7: column `flow` is null (no reading)")
    );
    // With missing readings allowed the null is a NaN for the core to refuse.
    let mut o = opts(&FEATURES);
    o.allow_missing = true;
    let t = read_table(&data("null.parquet"), &o).unwrap();
    assert!(t.row(6)[1].is_nan() && t.row(5)[1] == 107.5);
    // Skipping bad rows drops and counts it.
    let mut o = opts(&FEATURES);
    o.skip_bad_rows = true;
    let t = read_table(&data("null.parquet"), &o).unwrap();
    assert_eq!((t.rows(), t.skipped), (11, 1));

    let err = read_table(&data("text.parquet"), &opts(&FEATURES))
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("text.parquet: column `flow` holds BYTE_ARRAY values"),
        "{err}"
    );
    let err = read_table(&data("small.parquet"), &opts(&["pressure", "nope"]))
        .unwrap_err()
        .to_string();
    assert!(
        err.contains(
            "small.parquet: no feature column named `nope` (the file has: timestamp, pressure,"
        ),
        "{err}"
    );

    // A file cut short keeps its magic number at both ends but not its footer.
    let dir = tempfile::tempdir().unwrap();
    let whole = std::fs::read(data("small.parquet")).unwrap();
    let mut cut = whole[..whole.len() / 2].to_vec();
    cut.extend_from_slice(&whole[whole.len() - 4..]);
    let path = dir.path().join("cut.parquet");
    std::fs::write(&path, &cut).unwrap();
    assert!(is_parquet(&path));
    let err = read_table(&path, &opts(&FEATURES)).unwrap_err().to_string();
    assert!(
        err.contains("cut.parquet: not a readable Parquet file"),
        "{err}"
    );
    // A codec this build leaves out is named as such, not as damage.
    let err = read_table(&data("zstd.parquet"), &CsvOptions::default())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("zstd.parquet: the data is compressed with a codec this build does not read"),
        "{err}"
    );
    // A damaged column chunk (footer intact): the row group is named.
    let mut bad = whole.clone();
    for b in &mut bad[4..200] {
        *b = 0xA5;
    }
    let path = dir.path().join("bad.parquet");
    std::fs::write(&path, &bad).unwrap();
    let err = read_table(&path, &opts(&FEATURES)).unwrap_err().to_string();
    assert!(err.contains("bad.parquet: row group 1:"), "{err}");
}

fn ellipsoid() -> Command {
    Command::cargo_bin("ellipsoid").unwrap()
}

#[test]
fn a_fit_on_the_parquet_twin_of_the_demo_baseline_writes_the_same_blob() {
    let dir = tempfile::tempdir().unwrap();
    let demo = dir.path().join("demo");
    ellipsoid()
        .args(["demo", "--quiet", "--out"])
        .arg(&demo)
        .assert()
        .success();
    let fit = |input: &Path, out: &str| {
        let out = dir.path().join(out);
        ellipsoid()
            .args([
                "fit",
                "--threads",
                "1",
                "--trained-at",
                "1",
                "--quiet",
                "--out",
            ])
            .arg(&out)
            .arg(input)
            .assert()
            .success();
        std::fs::read(out).unwrap()
    };
    let from_csv = fit(&demo.join("baseline.csv"), "csv.blob");
    let from_parquet = fit(&data("demo_baseline.parquet"), "parquet.blob");
    assert_eq!(from_csv, from_parquet);

    // Replay and evaluate read Parquet too: the same scores as from the CSV twin.
    let blob = dir.path().join("csv.blob");
    let replay = |input: &Path, out: &str| {
        let out = dir.path().join(out);
        ellipsoid()
            .args(["replay", "--quiet", "--model"])
            .arg(&blob)
            .arg("--input")
            .arg(input)
            .arg("--out")
            .arg(&out)
            .assert()
            .success();
        std::fs::read_to_string(out).unwrap()
    };
    let a = replay(&demo.join("baseline.csv"), "a.csv");
    let b = replay(&data("demo_baseline.parquet"), "b.csv");
    assert_eq!(a.lines().count(), 21_601);
    assert_eq!(a, b);
}

#[test]
fn a_parquet_fit_reports_rows_of_the_parquet_file() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("m.blob");
    let assert = ellipsoid()
        .args([
            "fit",
            "--columns",
            "pressure,flow",
            "--holdout",
            "0",
            "--out",
        ])
        .arg(&out)
        .arg(data("null.parquet"))
        .assert()
        .failure();
    let err = String::from_utf8_lossy(&assert.get_output().stderr).into_owned();
    assert!(
        err.contains("null.parquet: row 7: column `flow`: the cell is null"),
        "{err}"
    );
    assert!(!out.exists());
}
