//! Tests of [`super`].

use super::sample::{mix, Sample};
use super::*;
use crate::stats::moments::Moments;
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use std::fmt::Write as _;
use std::path::PathBuf;

fn write_csv(dir: &tempfile::TempDir, name: &str, header: &str, rows: &[Vec<f64>]) -> PathBuf {
    let mut s = String::from(header);
    s.push('\n');
    for (i, r) in rows.iter().enumerate() {
        write!(
            s,
            "2024-06-01T{:02}:{:02}:{:02}",
            i / 3600 % 24,
            i / 60 % 60,
            i % 60
        )
        .unwrap();
        for v in r {
            write!(s, ",{v:?}").unwrap();
        }
        s.push('\n');
    }
    let p = dir.path().join(name);
    std::fs::write(&p, s).unwrap();
    p
}

fn opts(threads: usize) -> FitOptions {
    FitOptions {
        threads,
        csv: CsvOptions {
            quiet: true,
            ..Default::default()
        },
        ..Default::default()
    }
}

/// Correlated pump-like readings: flow, pressure, motor current, temperature.
fn pump_rows(n: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let g = Normal::new(0.0, 1.0).unwrap();
    (0..n)
        .map(|_| {
            let a: f64 = g.sample(&mut rng);
            let b: f64 = g.sample(&mut rng);
            vec![
                40.0 + 3.0 * a,
                2.5 + 0.2 * a + 0.05 * b,
                6.0 + 0.4 * a + 0.3 * g.sample(&mut rng),
                31.0 + 0.8 * b + 0.5 * g.sample(&mut rng),
            ]
        })
        .collect()
}

const PUMP: &str = "timestamp,flow_lpm,pressure_bar,current_a,temp_c";

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

#[test]
fn iris_through_the_whole_pipeline() {
    let ds = linfa_datasets::iris();
    let x = ds.records();
    let rows: Vec<Vec<f64>> = x.outer_iter().map(|r| r.to_vec()).collect();
    let dir = tempfile::tempdir().unwrap();
    let path = write_csv(
        &dir,
        "iris.csv",
        "time,sepal_length,sepal_width,petal_length,petal_width",
        &rows,
    );
    let f = fit_file(&path, &opts(2)).unwrap();
    assert_eq!(f.rows_used, 150);
    assert_eq!(f.features.len(), 4);
    // shared/reference-values.md, Fisher's Iris (UCI copy shipped by linfa-datasets), computed
    // there with numpy and statrs: mean, covariance (n − 1), ln det Σ and row 0's d².
    let mean = [
        5.843333333333334,
        3.054,
        3.758666666666667,
        1.198666666666667,
    ];
    for (g, w) in f.mean.iter().zip(mean) {
        assert!(rel(*g, w) < 1e-12, "mean {g} vs {w}");
    }
    let diag = [
        0.6856935123042505,
        0.18800402684563763,
        3.1131794183445156,
        0.5824143176733784,
    ];
    for (i, w) in diag.iter().enumerate() {
        assert!(rel(f.cov[i * 4 + i], *w) < 1e-12, "var {i}");
    }
    let off = [
        ((0, 1), -0.03926845637583892),
        ((0, 2), 1.2736823266219242),
        ((0, 3), 0.5169038031319912),
        ((1, 2), -0.3217127516778524),
        ((1, 3), -0.11798120805369128),
        ((2, 3), 1.2963874720357944),
    ];
    for ((i, j), w) in off {
        assert!(rel(f.cov[i * 4 + j], w) < 1e-11, "cov ({i},{j})");
        assert_eq!(f.cov[i * 4 + j], f.cov[j * 4 + i]);
    }
    assert!(
        (f.ln_det_cov() - -6.264178773823227).abs() < 1e-10,
        "{}",
        f.ln_det_cov()
    );
    assert!(rel(f.d2_f64(&rows[0]), 2.1516696621207396) < 1e-10);
    // The invariant: Σ d² over the fitted rows = (n − 1) p = 596.
    let sum: f64 = rows.iter().map(|r| f.d2_f64(r)).sum();
    assert!((sum - 596.0).abs() < 1e-9, "{sum}");
    // The same density from statrs (a reference library): ln pdf of row 0 = −1.6194995769674443.
    let mut cm = vec![0.0; 16];
    for i in 0..4 {
        for j in 0..4 {
            cm[j * 4 + i] = 0.5 * (f.cov[i * 4 + j] + f.cov[j * 4 + i]);
        }
    }
    use statrs::distribution::Continuous;
    let mvn = statrs::distribution::MultivariateNormal::new(f.mean.clone(), cm).unwrap();
    let lp = mvn.ln_pdf(&nalgebra::DVector::from_vec(rows[0].clone()));
    assert!((lp - -1.6194995769674443).abs() < 1e-10, "{lp}");
    // And through the core's f32 model built from these parameters.
    let model = f.standardise().model::<4>().unwrap();
    let x0 = [
        rows[0][0] as f32,
        rows[0][1] as f32,
        rows[0][2] as f32,
        rows[0][3] as f32,
    ];
    let d2 = model.score(&x0).unwrap().d2;
    assert!(rel(f64::from(d2), 2.1516696621207396) < 1e-5, "{d2}");
    let lp32 = model.log_density(&x0).unwrap();
    assert!(
        (f64::from(lp32) - -1.6194995769674443).abs() < 1e-4,
        "{lp32}"
    );
    assert!(f.f32_vs_f64_worst_rel < 1e-5, "{}", f.f32_vs_f64_worst_rel);
    assert!(f.condition_number > 1.0 && f.condition_number.is_finite());
    // Every training row of a small file is in the f32 check (here all 150).
    assert!(f.holdout_d2.is_empty() && f.rows_holdout == 0);
    assert_eq!(f.diagnostics.rows, 150, "a small file is diagnosed whole");
}

#[test]
fn nist_handbook_example_through_fit() {
    // NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.1.
    let rows = vec![
        vec![4.0, 2.0, 0.60],
        vec![4.2, 2.1, 0.59],
        vec![3.9, 2.0, 0.58],
        vec![4.3, 2.1, 0.62],
        vec![4.1, 2.2, 0.63],
    ];
    let dir = tempfile::tempdir().unwrap();
    let path = write_csv(&dir, "nist.csv", "timestamp,len,wid,ht", &rows);
    let f = fit_file(&path, &opts(1)).unwrap();
    for (g, w) in f.mean.iter().zip([4.10, 2.08, 0.604]) {
        assert!((g - w).abs() < 1e-12);
    }
    let want = [
        0.025, 0.0075, 0.00175, 0.0075, 0.007, 0.00135, 0.00175, 0.00135, 0.00043,
    ];
    for (g, w) in f.cov.iter().zip(want) {
        assert!((g - w).abs() < 1e-14, "{g} vs {w}");
    }
    assert!(
        f.warnings
            .iter()
            .any(|w| w.contains("fewer than 10 per feature")),
        "{:?}",
        f.warnings
    );
    let sum: f64 = rows.iter().map(|r| f.d2_f64(r)).sum();
    assert!(
        (sum - 12.0).abs() < 1e-9,
        "Σ d² = (n − 1) p = 12, got {sum}"
    );
}

#[test]
fn threads_merge_to_the_one_thread_result() {
    let rows = pump_rows(3000, 1);
    let dir = tempfile::tempdir().unwrap();
    let path = write_csv(&dir, "pump.csv", PUMP, &rows);
    let mut o = opts(1);
    o.holdout = 0.1;
    let one = fit_file(&path, &o).unwrap();
    assert_eq!(one.rows_used, 2700);
    for t in [2, 3, 8] {
        o.threads = t;
        let f = fit_file(&path, &o).unwrap();
        assert_eq!(f.rows_used, one.rows_used);
        for (a, b) in f.mean.iter().zip(&one.mean) {
            assert!(rel(*a, *b) < 1e-12);
        }
        for (a, b) in f.cov.iter().zip(&one.cov) {
            assert!(rel(*a, *b) < 1e-12, "{t} threads: {a} vs {b}");
        }
        assert_eq!(f.holdout_lines, one.holdout_lines);
        for (a, b) in f.holdout_d2.iter().zip(&one.holdout_d2) {
            assert!(((a - b) / b.max(1.0)).abs() < 1e-5);
        }
        assert!((f.f32_vs_f64_worst_rel - one.f32_vs_f64_worst_rel).abs() < 1e-6);
    }
}

#[test]
fn holdout_is_the_tail_in_time_order() {
    let rows = pump_rows(100, 2);
    let dir = tempfile::tempdir().unwrap();
    let path = write_csv(&dir, "pump.csv", PUMP, &rows);
    let mut o = opts(2);
    o.holdout = 0.2;
    let f = fit_file(&path, &o).unwrap();
    assert_eq!(f.rows_used, 80);
    assert_eq!(f.rows_holdout, 20);
    assert_eq!(f.holdout_lines, (82..=101).collect::<Vec<u64>>());
    // The held-out scores are the core's f32 scores of those rows.
    let model = f.standardise().model::<4>().unwrap();
    for (d2, line) in f.holdout_d2.iter().zip(&f.holdout_lines) {
        let r = &rows[(*line - 2) as usize];
        let x = [r[0] as f32, r[1] as f32, r[2] as f32, r[3] as f32];
        assert_eq!(model.score(&x).unwrap().d2.to_bits(), d2.to_bits());
        assert!(rel(f64::from(*d2), f.d2_f64(r)) < 1e-4);
    }
    // The fit used only the first 80 rows.
    let mut m = Moments::new(4);
    rows[..80].iter().for_each(|r| m.push(r));
    for (a, b) in f.cov.iter().zip(m.covariance()) {
        assert!(rel(*a, b) < 1e-12);
    }
}

fn pump_text(n: usize, seed: u64) -> String {
    let rows = pump_rows(n, seed);
    let mut s = format!("{PUMP}\n");
    for (i, r) in rows.iter().enumerate() {
        writeln!(s, "t{i},{},{},{},{}", r[0], r[1], r[2], r[3]).unwrap();
    }
    s
}

fn replace_line(text: &str, line: usize, with: &str) -> String {
    text.lines()
        .enumerate()
        .map(|(i, l)| {
            if i + 1 == line {
                with.to_string()
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn bad_cells_in_any_thread_name_the_absolute_line() {
    let dir = tempfile::tempdir().unwrap();
    let text = pump_text(2000, 3);
    for (line, cell, col) in [
        (1700usize, "12..5", "pressure_bar"),
        (5, "x", "pressure_bar"),
        (2001, "", "pressure_bar"),
    ] {
        let bad = replace_line(&text, line, &format!("t,40,{cell},6,31"));
        let path = dir.path().join("baseline.csv");
        std::fs::write(&path, bad).unwrap();
        for t in [1, 4] {
            let e = fit_file(&path, &opts(t)).unwrap_err().to_string();
            assert!(
                e.contains(&format!("baseline.csv:{line}:"))
                    && e.contains(col)
                    && e.contains(&format!("`{cell}`")),
                "{t} threads: {e}"
            );
        }
        let mut o = opts(4);
        o.csv.skip_bad_rows = true;
        let f = fit_file(&path, &o).unwrap();
        assert_eq!(f.rows_skipped, 1);
        assert_eq!(f.rows_used, 1999);
        assert!(
            f.skipped_reasons[0].contains(&format!(":{line}:")),
            "{:?}",
            f.skipped_reasons
        );
    }
    // A wrong field count, in the held-out tail.
    let bad = replace_line(&text, 1990, "t,40,2.5,6");
    let path = dir.path().join("baseline.csv");
    std::fs::write(&path, bad).unwrap();
    let mut o = opts(2);
    o.holdout = 0.1;
    let e = fit_file(&path, &o).unwrap_err().to_string();
    assert!(
        e.contains("baseline.csv:1990:") && e.contains("4 fields"),
        "{e}"
    );
}

#[test]
fn log_features_are_fitted_in_log_space_and_refuse_non_positive_values() {
    let dir = tempfile::tempdir().unwrap();
    let text = pump_text(500, 4);
    let path = dir.path().join("baseline.csv");
    std::fs::write(&path, &text).unwrap();
    let mut o = opts(2);
    o.log_columns = vec!["current_a".into()];
    let f = fit_file(&path, &o).unwrap();
    assert_eq!(f.log_mask, 0b0100);
    let rows = pump_rows(500, 4);
    let mut m = Moments::new(4);
    for r in &rows {
        m.push(&[r[0], r[1], r[2].ln(), r[3]]);
    }
    for (a, b) in f.mean.iter().zip(m.mean()) {
        assert!(rel(*a, b) < 1e-12);
    }
    let sum: f64 = rows.iter().map(|r| f.d2_f64(r)).sum();
    assert!((sum - 499.0 * 4.0).abs() < 1e-8, "{sum}");
    let bad = replace_line(&text, 321, "t,40,2.5,-0.25,31");
    std::fs::write(&path, bad).unwrap();
    let e = fit_file(&path, &o).unwrap_err().to_string();
    assert!(
        e.contains("baseline.csv:321:") && e.contains("current_a") && e.contains("-0.25"),
        "{e}"
    );
    o.csv.skip_bad_rows = true;
    assert_eq!(fit_file(&path, &o).unwrap().rows_skipped, 1);
    // allow_missing does not let a dropout into a fit.
    o.csv.skip_bad_rows = false;
    o.csv.allow_missing = true;
    o.log_columns.clear();
    std::fs::write(&path, replace_line(&text, 77, "t,40,,6,31")).unwrap();
    let e = fit_file(&path, &o).unwrap_err().to_string();
    assert!(
        e.contains("baseline.csv:77:") && e.contains("pressure_bar"),
        "{e}"
    );
    o.log_columns = vec!["nope".into()];
    assert!(fit_file(&path, &o)
        .unwrap_err()
        .to_string()
        .contains("`nope`"));
}

#[test]
fn collinear_and_constant_features_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let rows: Vec<Vec<f64>> = pump_rows(400, 5)
        .into_iter()
        .map(|r| vec![r[0], r[1], r[3], r[0] - 2.0 * r[3]])
        .collect();
    let path = write_csv(
        &dir,
        "baseline.csv",
        "time,flow,pressure,temp,derived",
        &rows,
    );
    let e = fit_file(&path, &opts(2)).unwrap_err().to_string();
    assert!(
        e.contains("`derived`") && e.contains("`flow`") && e.contains("`temp`"),
        "{e}"
    );
    assert!(!e.contains("`pressure`"), "{e}");
    // Shrinkage makes it usable.
    let mut o = opts(2);
    o.shrinkage = Shrinkage::Diagonal(0.01);
    assert!(fit_file(&path, &o).is_ok());

    let rows: Vec<Vec<f64>> = pump_rows(400, 6)
        .into_iter()
        .map(|r| vec![r[0], 230.0, r[1]])
        .collect();
    let path = write_csv(&dir, "baseline.csv", "time,flow,mains_v,pressure", &rows);
    let e = fit_file(&path, &opts(2)).unwrap_err().to_string();
    assert!(
        e.contains("constant") && e.contains("`mains_v`") && !e.contains("`flow`"),
        "{e}"
    );
}

#[test]
fn too_few_rows_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_csv(&dir, "baseline.csv", PUMP, &pump_rows(4, 7));
    let e = fit_file(&path, &opts(1)).unwrap_err().to_string();
    assert!(
        e.contains("baseline.csv") && e.contains("only 4") && e.contains("5 are needed"),
        "{e}"
    );
    let path = write_csv(&dir, "ok.csv", PUMP, &pump_rows(5, 7));
    assert!(fit_file(&path, &opts(1)).is_ok());
}

#[test]
fn shrinkage_modes() {
    let dir = tempfile::tempdir().unwrap();
    let rows = pump_rows(60, 8);
    let path = write_csv(&dir, "pump.csv", PUMP, &rows);
    let plain = fit_file(&path, &opts(2)).unwrap();
    let mut o = opts(2);
    o.shrinkage = Shrinkage::Diagonal(0.25);
    let d = fit_file(&path, &o).unwrap();
    for i in 0..4 {
        assert!(rel(d.cov[i * 4 + i], 1.25 * plain.cov[i * 4 + i]) < 1e-12);
        for j in 0..i {
            assert!(rel(d.cov[i * 4 + j], plain.cov[i * 4 + j]) < 1e-12);
        }
    }
    assert!(d.condition_number < plain.condition_number);
    o.shrinkage = Shrinkage::LedoitWolf;
    let lw = fit_file(&path, &o).unwrap();
    let (name, intensity) = lw.shrinkage.clone().unwrap();
    assert_eq!(name, "Ledoit-Wolf");
    assert!((0.0..=1.0).contains(&intensity));
    assert!(lw.condition_number <= plain.condition_number * (1.0 + 1e-12));
    for (a, b) in lw.mean.iter().zip(&plain.mean) {
        assert!(rel(*a, *b) < 1e-12);
    }
}

#[test]
fn robust_fit_sets_gross_outliers_aside() {
    let dir = tempfile::tempdir().unwrap();
    let mut rows = pump_rows(400, 9);
    for k in [50usize, 51, 52, 300] {
        rows[k] = vec![80.0, 1.0, 20.0, 60.0];
    }
    let path = write_csv(&dir, "pump.csv", PUMP, &rows);
    let mut o = opts(2);
    o.robust = true;
    let f = fit_file(&path, &o).unwrap();
    let info = f.robust.clone().unwrap();
    for line in [52u64, 53, 54, 302] {
        assert!(
            info.set_aside_lines.contains(&line),
            "{:?}",
            info.set_aside_lines
        );
    }
    assert_eq!(info.rows_kept as usize, 400 - info.set_aside_lines.len());
    let plain = fit_file(&path, &opts(2)).unwrap();
    assert!(
        f.cov[0] < plain.cov[0],
        "outliers inflate the plain variance"
    );
}

#[test]
fn sample_is_independent_of_the_split() {
    let mut one = Sample::new(1);
    let mut parts = [Sample::new(1), Sample::new(1), Sample::new(1)];
    for b in 0..(SAMPLE_ROWS as u64 * 3) {
        one.offer(b * 17, &[b as f64]);
        parts[(b % 3) as usize].offer(b * 17, &[b as f64]);
    }
    let mut merged = Sample::new(1);
    for p in parts {
        merged.absorb(p);
    }
    let a = one.into_rows();
    assert_eq!(a.len(), SAMPLE_ROWS);
    assert_eq!(a, merged.into_rows());
    assert!(a.windows(2).all(|w| w[0] < w[1]), "file order");
    // Exactly the rows with the smallest keys, by brute force.
    let mut all: Vec<(u64, u64)> = (0..(SAMPLE_ROWS as u64 * 3))
        .map(|b| (mix((b * 17) ^ SAMPLE_SEED), b))
        .collect();
    all.sort();
    let mut want: Vec<f64> = all[..SAMPLE_ROWS].iter().map(|k| k.1 as f64).collect();
    want.sort_by(f64::total_cmp);
    assert_eq!(a, want);
}
