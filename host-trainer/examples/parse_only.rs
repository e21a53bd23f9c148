//! Parse a CSV into `f64` with the trainer's reader and the same split into byte ranges as the
//! fit, and nothing else: the floor the fit's wall time is compared with.
//!
//! `cargo run --release -p ellipsoid-trainer --example parse_only -- FILE.csv [THREADS]`

use std::path::PathBuf;
use std::time::Instant;

use ellipsoid_trainer::data::ingest::{self, CsvOptions, Layout, Reader};

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let path: PathBuf = args
        .next()
        .ok_or_else(|| anyhow::anyhow!("usage: parse_only FILE.csv [THREADS]"))?
        .into();
    let threads: usize = args.next().map_or(Ok(2), |s| s.parse())?;
    let started = Instant::now();
    let opts = CsvOptions {
        quiet: true,
        ..Default::default()
    };
    let layout = Layout::read(&path, &opts)?;
    let bounds = ingest::split_ranges(&path, layout.data_start, layout.file_len, threads)?;
    let results: Vec<anyhow::Result<(u64, f64)>> = std::thread::scope(|s| {
        let handles: Vec<_> = bounds
            .windows(2)
            .map(|b| {
                let (path, layout, opts) = (&path, &layout, &opts);
                let (start, end) = (b[0], b[1]);
                s.spawn(move || {
                    let mut r = Reader::range(path, layout, opts, start, end, 1)?;
                    let (mut rows, mut sum) = (0u64, 0.0f64);
                    while let Some(row) = r.next_row()? {
                        rows += 1;
                        sum += row.values.iter().sum::<f64>();
                    }
                    Ok((rows, sum))
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("thread"))
            .collect()
    });
    let (mut rows, mut sum) = (0u64, 0.0);
    for r in results {
        let (n, s) = r?;
        rows += n;
        sum += s;
    }
    println!(
        "parsed {rows} rows x {} features in {:.3} s (checksum {sum:.6e})",
        layout.features.len(),
        started.elapsed().as_secs_f64()
    );
    Ok(())
}
