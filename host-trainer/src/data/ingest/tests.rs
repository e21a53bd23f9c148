//! Tests of [`super`].

use super::cell::parse_f64;
use super::*;
use std::io::Write;

fn write(dir: &tempfile::TempDir, name: &str, body: &str) -> std::path::PathBuf {
    let p = dir.path().join(name);
    std::fs::File::create(&p)
        .unwrap()
        .write_all(body.as_bytes())
        .unwrap();
    p
}

fn err(body: &str, opts: &CsvOptions) -> String {
    let dir = tempfile::tempdir().unwrap();
    let p = write(&dir, "baseline.csv", body);
    match read_table(&p, opts) {
        Ok(t) => panic!("expected an error, read {t:?}"),
        Err(e) => {
            let s = e.to_string();
            assert!(s.contains("baseline.csv"), "no file name in {s}");
            s
        }
    }
}

#[test]
fn reads_comma_file_skipping_timestamp() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        &dir,
        "a.csv",
        "Timestamp,flow_lpm,pressure_bar\n2024-05-01T00:00,12.5,2.25\n2024-05-01T00:01,13,-1e-3\n",
    );
    let t = read_table(&p, &CsvOptions::default()).unwrap();
    assert_eq!(t.features, ["flow_lpm", "pressure_bar"]);
    assert_eq!(t.values, [12.5, 2.25, 13.0, -1e-3]);
    assert_eq!(t.lines, [2, 3]);
    assert_eq!(
        t.timestamps.unwrap(),
        ["2024-05-01T00:00", "2024-05-01T00:01"]
    );
    assert!(t.labels.is_none());
}

#[test]
fn detects_semicolon_and_tab_and_handles_crlf() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(&dir, "s.csv", "a;b;c\r\n1;2;3\r\n\r\n4;5;6\r\n");
    let t = read_table(&p, &CsvOptions::default()).unwrap();
    assert_eq!(t.features, ["a", "b", "c"]);
    assert_eq!(t.values, [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
    assert_eq!(t.lines, [2, 4]);
    let p = write(&dir, "t.tsv", "time\tx\ty\nt0\t1.5\t2\nt1\t3\t4");
    let t = read_table(&p, &CsvOptions::default()).unwrap();
    assert_eq!(t.features, ["x", "y"]);
    assert_eq!(t.values, [1.5, 2.0, 3.0, 4.0]);
}

#[test]
fn parses_like_std() {
    // The reference is Rust's own `str::parse::<f64>` (correctly rounded, IEEE 754).
    let cases = [
        "0",
        "-0",
        "+1.5",
        "1e5",
        "1E-5",
        ".5",
        "5.",
        "123456789012345678901234567890",
        "2.2250738585072014e-308",
        "4.9e-324",
        "1.7976931348623157e308",
        "0.1",
        "43.12345",
        "-2881.09165",
        "9007199254740993",
        "1e400",
        "nan",
        "NaN",
        "inf",
        "-Infinity",
        "1_0",
        "0x10",
        "",
        "1.2.3",
        "e5",
        "1e",
        "--1",
        "١",
    ];
    for c in cases {
        let ours = parse_f64(c.as_bytes());
        let std = c.parse::<f64>().ok();
        match (ours, std) {
            (Some(a), Some(b)) if a.is_nan() => assert!(b.is_nan(), "{c}"),
            (a, b) => assert_eq!(a.map(f64::to_bits), b.map(f64::to_bits), "{c}"),
        }
    }
}

#[test]
fn quoted_cells_are_unquoted() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        &dir,
        "q.csv",
        "\"time\",\"a\",b\n\"2024-05-01, 00:00\",\"1.5\",2\n",
    );
    let t = read_table(&p, &CsvOptions::default()).unwrap();
    assert_eq!(t.features, ["a", "b"]);
    assert_eq!(t.values, [1.5, 2.0]);
    assert_eq!(t.timestamps.unwrap(), ["2024-05-01, 00:00"]);
}

#[test]
fn selects_columns_in_the_order_asked_and_reads_labels() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        &dir,
        "l.csv",
        "a,b,c,state\n1,2,3,ok\n4,5,6,FAULT\n7,8,9,0\n1,1,1,True\n",
    );
    let opts = CsvOptions {
        columns: Some(vec!["c".into(), "a".into()]),
        label: Some("state".into()),
        ..Default::default()
    };
    let t = read_table(&p, &opts).unwrap();
    assert_eq!(t.features, ["c", "a"]);
    assert_eq!(t.values, [3.0, 1.0, 6.0, 4.0, 9.0, 7.0, 1.0, 1.0]);
    assert_eq!(t.labels.unwrap(), [false, true, false, true]);
}

#[test]
fn every_bad_input_names_file_line_and_column() {
    let d = CsvOptions::default();
    let e = err("a,flow_lpm\n1,2\n3,abc\n", &d);
    assert!(e.contains("baseline.csv:3:") && e.contains("`flow_lpm`") && e.contains("`abc`"));
    let e = err("a,b\n1,2\n3\n", &d);
    assert!(
        e.contains(":3:") && e.contains("1 fields") && e.contains("has 2"),
        "{e}"
    );
    assert!(err("", &d).contains("empty"));
    assert!(err("  \n", &d).contains("empty"));
    assert!(err("a,b\n", &d).contains("no data rows"));
    assert!(err("a,b\n\n", &d).contains("no data rows"));
    let e = err(
        "a,b\n1,2\n",
        &CsvOptions {
            columns: Some(vec!["zz".into()]),
            ..Default::default()
        },
    );
    assert!(e.contains("`zz`") && e.contains("a, b"), "{e}");
    let e = err("a,b,a\n1,2,3\n", &d);
    assert!(e.contains(":1:") && e.contains("`a`") && e.contains("columns 1 and 3"));
    for bad in ["NaN", "inf", "-infinity"] {
        let e = err(&format!("a,b\n1,2\n4,{bad}\n"), &d);
        assert!(
            e.contains(":3:") && e.contains("`b`") && e.contains(bad),
            "{e}"
        );
    }
    let e = err("a,b\n1,\n", &d);
    assert!(
        e.contains(":2:") && e.contains("`b`") && e.contains("empty"),
        "{e}"
    );
    let e = err(
        "a,lab\n1,maybe\n",
        &CsvOptions {
            label: Some("lab".into()),
            ..Default::default()
        },
    );
    assert!(e.contains(":2:") && e.contains("`lab`") && e.contains("`maybe`"));
    let e = err("a;b\n1,5;2\n", &d);
    assert!(e.contains("decimal mark"), "{e}");
}

#[test]
fn skip_bad_rows_counts_and_keeps_reasons() {
    let dir = tempfile::tempdir().unwrap();
    let mut body = String::from("a,b\n");
    for i in 0..10 {
        body.push_str(&format!("{i},x\n{i},{i}\n"));
    }
    let p = write(&dir, "s.csv", &body);
    let t = read_table(
        &p,
        &CsvOptions {
            skip_bad_rows: true,
            ..Default::default()
        },
    )
    .unwrap();
    assert_eq!(t.rows(), 10);
    assert_eq!(t.skipped, 10);
    assert_eq!(t.skipped_reasons.len(), KEEP_REASONS);
    assert!(
        t.skipped_reasons[0].contains(":2:"),
        "{:?}",
        t.skipped_reasons
    );
    assert_eq!(t.lines[0], 3);
}

#[test]
fn allow_missing_reads_dropouts_as_nan_but_not_junk() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(&dir, "m.csv", "a,b,c\n1,,nan\nNaN,inf,3\n");
    let opts = CsvOptions {
        allow_missing: true,
        ..Default::default()
    };
    let t = read_table(&p, &opts).unwrap();
    assert_eq!(t.values[0], 1.0);
    assert!(t.values[1].is_nan() && t.values[2].is_nan() && t.values[3].is_nan());
    assert_eq!(t.values[4], f64::INFINITY);
    let p = write(&dir, "baseline.csv", "a,b\n1,n/a\n");
    let e = read_table(&p, &opts).unwrap_err().to_string();
    assert!(e.contains(":2:") && e.contains("`n/a`"), "{e}");
}

#[test]
fn ranges_read_disjoint_parts_with_shifted_lines() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(&dir, "r.csv", "a,b\n1,2\n3,4\n5,x\n");
    let lay = Layout::read(&p, &CsvOptions::default()).unwrap();
    assert_eq!(lay.data_start, 4);
    // Second half: "5,x\n" starts at byte 12, which is line 4.
    let mut r = Reader::range(&p, &lay, &CsvOptions::default(), 12, 16, 1).unwrap();
    let mut e = r.next_row().unwrap_err();
    assert_eq!(e.line(), Some(1));
    e.shift_line(3);
    assert!(e.to_string().contains("r.csv:4:"), "{e}");
    let mut r = Reader::range(&p, &lay, &CsvOptions::default(), 4, 12, 2).unwrap();
    let row = r.next_row().unwrap().unwrap();
    assert_eq!((row.line, row.byte), (2, 4));
    assert_eq!(row.values, [1.0, 2.0]);
    let row = r.next_row().unwrap().unwrap();
    assert_eq!((row.line, row.byte), (3, 8));
    assert!(r.next_row().unwrap().is_none());
    assert_eq!(r.lines_read(), 2);
}
