//! Tests of [`super`].

use super::*;
use nalgebra::{DMatrix, DVector};
use statrs::distribution::{ChiSquared, ContinuousCDF};

fn range(rows: &[[f64; 5]], c: usize) -> (f64, f64) {
    rows.iter()
        .map(|r| r[c])
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), x| {
            (lo.min(x), hi.max(x))
        })
}

/// Full-covariance d² of `rows` under a Gaussian fitted (n − 1) to the baseline, in f64 with
/// nalgebra's Cholesky as the reference implementation.
fn mahalanobis(baseline: &[[f64; 5]], rows: &[[f64; 5]]) -> Vec<f64> {
    let n = baseline.len() as f64;
    let mut mean = DVector::<f64>::zeros(5);
    for r in baseline {
        mean += DVector::from_row_slice(r);
    }
    mean /= n;
    let mut cov = DMatrix::<f64>::zeros(5, 5);
    for r in baseline {
        let d = DVector::from_row_slice(r) - &mean;
        cov += &d * d.transpose();
    }
    cov /= n - 1.0;
    let chol = cov
        .cholesky()
        .expect("baseline covariance is positive definite");
    rows.iter()
        .map(|r| {
            let d = DVector::from_row_slice(r) - &mean;
            let z = chol.l().solve_lower_triangular(&d).unwrap();
            z.norm_squared()
        })
        .collect()
}

/// The baseline rows at duty point `k`.
fn at_duty(d: &DemoData, k: u8) -> Vec<[f64; 5]> {
    d.baseline
        .iter()
        .zip(&d.baseline_duty)
        .filter(|(_, m)| **m == k)
        .map(|(r, _)| *r)
        .collect()
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

#[test]
fn same_seed_same_data_other_seed_other_data() {
    let a = generate(7);
    let b = generate(7);
    let c = generate(8);
    assert_eq!(a.baseline.len(), BASELINE_ROWS);
    assert_eq!(a.test.len(), TEST_ROWS);
    assert_eq!(a.labels.len(), TEST_ROWS);
    // Compare bit patterns so that NaN rows compare equal.
    let bits = |d: &DemoData| -> Vec<u64> {
        d.baseline
            .iter()
            .chain(&d.test)
            .flatten()
            .map(|x| x.to_bits())
            .collect()
    };
    assert_eq!(bits(&a), bits(&b));
    assert_ne!(bits(&a), bits(&c));
}

#[test]
fn labels_are_the_union_of_the_episodes_and_cover_every_nan() {
    let d = generate(1);
    let mut expect = vec![false; d.test.len()];
    let mut last_end = 0;
    for ep in &d.episodes {
        assert!(ep.start >= last_end && ep.start < ep.end && ep.end <= d.test.len());
        last_end = ep.end;
        expect[ep.start..ep.end].fill(true);
    }
    assert_eq!(d.labels, expect);
    assert!(d.baseline.iter().flatten().all(|x| x.is_finite()));
    let nan_rows: Vec<usize> = (0..d.test.len())
        .filter(|&i| d.test[i].iter().any(|x| x.is_nan()))
        .collect();
    assert_eq!(nan_rows.len(), DROPOUT.1 - DROPOUT.0);
    assert!(nan_rows.iter().all(|&i| d.labels[i]));
    // The first part of the dropout loses every channel, the rest only pressure and flow.
    assert!(d.test[DROPOUT.0].iter().all(|x| x.is_nan()));
    let late = d.test[DROPOUT.1 - 1];
    assert!(late[1].is_nan() && late[2].is_nan());
    assert!(late[0].is_finite() && late[3].is_finite() && late[4].is_finite());
}

#[test]
fn baseline_is_physically_plausible_and_correlated() {
    let d = generate(3);
    // Plausible ranges for a 1 kW booster pump (our own design figures, not measurements).
    let bounds = [
        (1.5, 4.0),
        (1.5, 5.5),
        (50.0, 170.0),
        (25.0, 70.0),
        (1.0, 4.0),
    ];
    for (c, (lo, hi)) in bounds.iter().enumerate() {
        let (min, max) = range(&d.baseline, c);
        assert!(min > *lo && max < *hi, "{}: [{min}, {max}]", COLUMNS[c]);
    }
    // Both duty points are in the baseline, each for a good part of it.
    for k in 0..2u8 {
        let share = at_duty(&d, k).len() as f64 / d.baseline.len() as f64;
        assert!(share > 0.2, "duty point {k}: {share} of the baseline");
    }
    // At full speed, correlation signs follow the pump curve: more flow, less pressure, more current.
    let full = at_duty(&d, 0);
    let corr = |a: usize, b: usize| {
        let n = full.len() as f64;
        let m = |c: usize| full.iter().map(|r| r[c]).sum::<f64>() / n;
        let (ma, mb) = (m(a), m(b));
        let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
        for r in &full {
            sab += (r[a] - ma) * (r[b] - mb);
            saa += (r[a] - ma).powi(2);
            sbb += (r[b] - mb).powi(2);
        }
        sab / (saa * sbb).sqrt()
    };
    assert!(corr(1, 2) < -0.9, "pressure vs flow {}", corr(1, 2));
    assert!(corr(0, 2) > 0.9, "current vs flow {}", corr(0, 2));
    assert!(corr(4, 2) > 0.5, "vibration vs flow {}", corr(4, 2));
    assert!(corr(3, 0) > 0.3, "temperature vs current {}", corr(3, 0));
}

#[test]
fn clogging_filter_stays_inside_every_channel_range() {
    for seed in 0..24 {
        clog_in_range(seed);
    }
}

fn clog_in_range(seed: u64) {
    let d = generate(seed);
    // The clog is at full speed, and inside the baseline's full-speed range (so inside the whole
    // baseline's range too).
    assert!(d.test_duty[CLOG.0 - 300..CLOG.1].iter().all(|k| *k == 0));
    let full = at_duty(&d, 0);
    for c in 0..5 {
        let (min, max) = range(&full, c);
        for r in &d.test[CLOG.0..CLOG.1] {
            assert!(
                r[c] >= min && r[c] <= max,
                "seed {seed}: {} = {} outside the baseline's [{min}, {max}]",
                COLUMNS[c],
                r[c]
            );
        }
    }
}

#[test]
fn only_the_joint_model_sees_the_clog_and_every_episode_stands_out() {
    let d = generate(11);
    let full = at_duty(&d, 0);
    // The chi-square 99.9 % quantile for 5 degrees of freedom, from statrs (20.515 in the
    // NIST/SEMATECH e-Handbook table 1.3.6.7.4; that row is from memory, as the project's copy
    // of the table lists other degrees of freedom).
    let crit = ChiSquared::new(5.0).unwrap().inverse_cdf(0.999);
    assert!((crit - 20.515).abs() < 1e-3);
    let base_d2 = mahalanobis(&full, &full);
    let above = base_d2.iter().filter(|&&x| x > crit).count() as f64;
    assert!(
        above / (base_d2.len() as f64) < 0.01,
        "baseline above: {above}"
    );
    // Against the full-speed baseline (the clog and the stuck transmitter are at full speed).
    let test_d2 = mahalanobis(&full, &d.test);
    // Past each ramp, the episodes sit well above the critical value.
    let held = |a: usize, b: usize| median(test_d2[a..b].to_vec());
    assert!(
        held(CLOG.0 + 120, CLOG.1) > 2.0 * crit,
        "clog {}",
        held(CLOG.0 + 120, CLOG.1)
    );
    assert!(
        held(STUCK.0 + 400, STUCK.1) > 2.0 * crit,
        "stuck {}",
        held(STUCK.0 + 400, STUCK.1)
    );
    // A quiet full-speed stretch between the episodes (before the warming) stays mostly below it.
    let quiet = &test_d2[CLOG.1 + 100..STUCK.0];
    let loud = quiet.iter().filter(|&&x| x > crit).count();
    assert!(loud * 50 < quiet.len(), "{loud} of {}", quiet.len());
    // One Gaussian over both duty points sees the clog far less: pooling the two speeds widens
    // the ellipsoid across the direction the clog moves in.
    let pooled = median(mahalanobis(&d.baseline, &d.test[CLOG.0 + 120..CLOG.1]));
    assert!(
        pooled < 0.5 * held(CLOG.0 + 120, CLOG.1),
        "pooled {pooled}, full speed {}",
        held(CLOG.0 + 120, CLOG.1)
    );
    // The whole-baseline Gaussian still sees dry running and the worn bearing.
    let pooled_d2 = mahalanobis(&d.baseline, &d.test);
    let held_pooled = |a: usize, b: usize| median(pooled_d2[a..b].to_vec());
    assert!(held_pooled(DRY.0 + 60, DRY.1) > 5.0 * crit);
    assert!(held_pooled(BEARING.1 - 600, BEARING.1) > 5.0 * crit);
    // Per channel, the clog is unremarkable at its duty point: |z| stays below 3 in every channel.
    for c in 0..5 {
        let n = full.len() as f64;
        let m = full.iter().map(|r| r[c]).sum::<f64>() / n;
        let sd = (full.iter().map(|r| (r[c] - m).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        let worst = d.test[CLOG.0..CLOG.1]
            .iter()
            .map(|r| ((r[c] - m) / sd).abs())
            .fold(0.0, f64::max);
        assert!(worst < 3.0, "{}: |z| up to {worst}", COLUMNS[c]);
    }
}

#[test]
fn csv_has_the_header_iso_times_empty_nan_cells_and_reads_back_exactly() {
    let d = generate(5);
    let rows = &d.test[DROPOUT.0 - 2..DROPOUT.0 + 1];
    let labels = &d.labels[DROPOUT.0 - 2..DROPOUT.0 + 1];
    let mut out = Vec::new();
    // 1 714 550 400 is 2024-05-01T08:00:00Z (checked with GNU `date -u -d @1714550400`).
    write_csv(&mut out, rows, None, Some(labels), 1_714_550_400).unwrap();
    let text = String::from_utf8(out).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(
        lines[0],
        "timestamp,motor_current_a,discharge_pressure_bar,flow_lpm,bearing_temp_c,vibration_mm_s,label"
    );
    assert!(lines[1].starts_with("2024-05-01T08:00:00Z,"));
    assert!(lines[3].starts_with("2024-05-01T08:00:02Z,"));
    assert_eq!(lines[3], "2024-05-01T08:00:02Z,,,,,,1");
    for (line, row) in lines[1..3].iter().zip(rows) {
        let cells: Vec<&str> = line.split(',').collect();
        assert_eq!(cells.len(), 7);
        for c in 0..5 {
            let back: f64 = cells[c + 1].parse().unwrap();
            assert_eq!(back.to_bits(), row[c].to_bits(), "{}", cells[c + 1]);
        }
    }
    let mut plain = Vec::new();
    write_csv(&mut plain, &rows[..1], None, None, 0).unwrap();
    let plain = String::from_utf8(plain).unwrap();
    assert!(!plain.lines().next().unwrap().ends_with("label"));
    assert!(plain
        .lines()
        .nth(1)
        .unwrap()
        .starts_with("1970-01-01T00:00:00Z,"));
    assert!(write_csv(&mut Vec::new(), rows, None, None, -1).is_err());
    assert!(write_csv(&mut Vec::new(), rows, None, Some(&labels[..1]), 0).is_err());
}

#[test]
fn the_greenhouse_warms_past_the_baseline_range_slowly_and_without_a_label() {
    let d = generate(7);
    // Before the bearing wears, the bearing temperature has left the baseline's range at each
    // duty point (the warming is healthy: those rows are labelled normal).
    for k in 0..2u8 {
        let (_, max_k) = range(&at_duty(&d, k), 3);
        let warm = (WARMING_START..BEARING.0)
            .filter(|&i| d.test_duty[i] == k && d.test[i][3].is_finite())
            .map(|i| d.test[i][3])
            .fold(f64::NEG_INFINITY, f64::max);
        assert!(
            warm > max_k,
            "duty point {k}: up to {warm}, baseline up to {max_k}"
        );
    }
    let (_, max) = range(&d.baseline, 3);
    let late = &d.test[BEARING.0 - 1200..BEARING.0];
    assert!(d.labels[WARMING_START..BEARING.0]
        .iter()
        .zip(WARMING_START..)
        .all(|(l, i)| !*l || d.episodes.iter().any(|e| (e.start..e.end).contains(&i))));
    // Slow against the normal variation: a temperature step of an hour's warming is less than
    // the baseline's own range of the bearing temperature.
    let per_hour = WARMING_C * 3600.0 / (TEST_ROWS - WARMING_START) as f64;
    let (min, _) = range(&d.baseline, 3);
    assert!(per_hour < 0.5 * (max - min), "{per_hour} °C an hour");
    // Vibration does not warm: before the bearing wears it stays inside its baseline range.
    let (vmin, vmax) = range(&d.baseline, 4);
    assert!(late.iter().all(|r| r[4] >= vmin && r[4] <= vmax));
}

#[test]
fn the_duty_point_column_is_written_between_the_channels_and_the_label() {
    let d = generate(5);
    let mut out = Vec::new();
    write_csv(
        &mut out,
        &d.test[..3],
        Some(&[0, 1, 1]),
        Some(&d.labels[..3]),
        0,
    )
    .unwrap();
    let text = String::from_utf8(out).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert!(lines[0].ends_with(",vibration_mm_s,duty_point,label"));
    assert!(lines[1].ends_with(",0,0") && lines[2].ends_with(",1,0"));
    assert!(write_csv(&mut Vec::new(), &d.test[..3], Some(&[0]), None, 0).is_err());
    // At reduced speed the pump gives less flow on average (flow ∝ n).
    let mean_flow = |k: u8| {
        let r = at_duty(&d, k);
        r.iter().map(|x| x[2]).sum::<f64>() / r.len() as f64
    };
    assert!(mean_flow(1) < mean_flow(0));
}
