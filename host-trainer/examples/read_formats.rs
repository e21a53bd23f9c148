//! Time reading one file through the trainer's row reader (`Reader::open`, one thread, every row's
//! features into `f64`, nothing else), for CSV against Parquet.
//!
//! `cargo run --release -p ellipsoid-trainer --example read_formats -- A.csv B.parquet [RUNS]`
//!
//! Runs A and B alternately RUNS times (default 7) and prints each run, the median of each and
//! the ratio of the medians (Parquet ÷ CSV; below 1 is faster). Both files must hold the same rows:
//! the sums of their values are compared and must agree.

use std::path::Path;
use std::time::Instant;

use ellipsoid_trainer::data::ingest::{CsvOptions, Reader};

fn read(path: &Path) -> anyhow::Result<(f64, u64, f64)> {
    let opts = CsvOptions {
        quiet: true,
        ..CsvOptions::default()
    };
    let t = Instant::now();
    let mut r = Reader::open(path, &opts)?;
    let (mut sum, mut rows) = (0.0, 0u64);
    while let Some(row) = r.next_row()? {
        sum += row.values.iter().sum::<f64>();
        rows += 1;
    }
    Ok((t.elapsed().as_secs_f64(), rows, sum))
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let usage = || anyhow::anyhow!("usage: read_formats A.csv B.parquet [RUNS]");
    let csv = args.next().ok_or_else(usage)?;
    let pq = args.next().ok_or_else(usage)?;
    let runs: usize = args.next().map_or(Ok(7), |s| s.parse())?;
    let (mut a, mut b) = (Vec::new(), Vec::new());
    for k in 0..runs {
        let (ta, na, sa) = read(Path::new(&csv))?;
        let (tb, nb, sb) = read(Path::new(&pq))?;
        anyhow::ensure!(na == nb, "{na} rows in the CSV, {nb} in the Parquet file");
        anyhow::ensure!(
            (sa - sb).abs() <= 1e-9 * sa.abs(),
            "the files hold different values (sums {sa} and {sb})"
        );
        println!("run {k}: csv {ta:.3} s, parquet {tb:.3} s ({na} rows)");
        a.push(ta);
        b.push(tb);
    }
    let (ma, mb) = (median(&mut a), median(&mut b));
    println!(
        "median: csv {ma:.3} s, parquet {mb:.3} s, parquet/csv {:.3}",
        mb / ma
    );
    Ok(())
}
