//! Fit a baseline file with `fit_file` and print a summary (for timing the fit on its own).
//!
//! `cargo run --release -p ellipsoid-trainer --example fit_only -- FILE.csv [THREADS] [HOLDOUT]`

use std::path::PathBuf;
use std::time::Instant;

use ellipsoid_trainer::data::ingest::CsvOptions;
use ellipsoid_trainer::fit::{fit_file, FitOptions};

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let path: PathBuf = args
        .next()
        .ok_or_else(|| anyhow::anyhow!("usage: fit_only FILE.csv [THREADS] [HOLDOUT]"))?
        .into();
    let threads: usize = args.next().map_or(Ok(2), |s| s.parse())?;
    let holdout: f64 = args.next().map_or(Ok(0.0), |s| s.parse())?;
    let started = Instant::now();
    let opts = FitOptions {
        csv: CsvOptions {
            quiet: true,
            ..Default::default()
        },
        holdout,
        threads,
        ..Default::default()
    };
    let f = fit_file(&path, &opts)?;
    println!(
        "fitted {} rows x {} features in {:.3} s; held out {}; condition number {:.3e}; \
         worst f32/f64 relative d2 difference {:.2e}; warnings: {:?}",
        f.rows_used,
        f.dim(),
        started.elapsed().as_secs_f64(),
        f.rows_holdout,
        f.condition_number,
        f.f32_vs_f64_worst_rel,
        f.warnings
    );
    Ok(())
}
