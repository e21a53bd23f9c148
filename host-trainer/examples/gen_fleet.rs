//! Write an invented fleet log for timing `fit --by`: MACHINES pumps, ROWS readings each of 8
//! correlated channels, interleaved one row a machine a second, a `machine` column first.
//!
//! `cargo run --release -p ellipsoid-trainer --example gen_fleet -- OUT.csv [MACHINES] [ROWS] [SEED]`
//! (default 1 000 × 10 000 rows, about 0.7 GB). Each machine has its own centre and scale.

use std::io::Write;
use std::path::PathBuf;

use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal};

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let out: PathBuf = args
        .next()
        .ok_or_else(|| anyhow::anyhow!("usage: gen_fleet OUT.csv [MACHINES] [ROWS] [SEED]"))?
        .into();
    let machines: usize = args.next().map_or(Ok(1000), |s| s.parse())?;
    let rows: u64 = args.next().map_or(Ok(10_000), |s| s.parse())?;
    let seed: u64 = args.next().map_or(Ok(7), |s| s.parse())?;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let g = Normal::new(0.0, 1.0)?;
    let load = [3.0, -0.05, 0.2, 0.5, 2.0, 1.5, 0.2, 20.0];
    let noise = [0.8, 0.02, 0.05, 0.15, 0.6, 0.5, 0.1, 10.0];
    let centres: Vec<[f64; 8]> = (0..machines)
        .map(|_| {
            let base = [42.0, 0.8, 3.2, 6.1, 48.0, 44.0, 1.8, 2900.0];
            let mut c = base;
            for v in &mut c {
                *v *= rng.random_range(0.8..1.2);
            }
            c
        })
        .collect();
    ellipsoid_trainer::data::output::write_atomic(&out, |w| {
        let mut w = std::io::BufWriter::with_capacity(1 << 20, w);
        writeln!(w, "machine,flow_lpm,suction_bar,discharge_bar,motor_a,motor_c,bearing_c,vib_mms,speed_rpm")?;
        let mut line = String::with_capacity(160);
        for _ in 0..rows {
            for (m, c) in centres.iter().enumerate() {
                use std::fmt::Write as _;
                line.clear();
                let a: f64 = g.sample(&mut rng);
                write!(line, "pump-{m:04}")?;
                for j in 0..8 {
                    let v = c[j] + load[j] * a + noise[j] * g.sample(&mut rng);
                    write!(line, ",{v:.4}")?;
                }
                line.push('\n');
                w.write_all(line.as_bytes())?;
            }
        }
        w.flush()?;
        Ok(())
    })?;
    eprintln!(
        "wrote {machines} machines × {rows} rows to {}",
        out.display()
    );
    Ok(())
}
