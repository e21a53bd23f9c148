//! Write a wide synthetic baseline for timing the fit: a seconds timestamp and 16 correlated
//! readings of an invented greenhouse irrigation booster pump station, one row a second.
//!
//! `cargo run --release -p ellipsoid-trainer --example gen_wide -- OUT.csv [ROWS] [SEED]`
//! (default 1,000,000 rows, about 155 MB). The file is written to a temporary name and renamed.

use std::io::Write;
use std::path::PathBuf;

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

const NAMES: [&str; 16] = [
    "flow_lpm",
    "suction_bar",
    "discharge_bar",
    "motor_a",
    "motor_v",
    "motor_c",
    "bearing_c",
    "vib_x_mms",
    "vib_y_mms",
    "vib_z_mms",
    "speed_rpm",
    "tank_level_cm",
    "ec_ms_cm",
    "ph",
    "water_c",
    "air_c",
];

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let out: PathBuf = args
        .next()
        .ok_or_else(|| anyhow::anyhow!("usage: gen_wide OUT.csv [ROWS] [SEED]"))?
        .into();
    let rows: u64 = args.next().map_or(Ok(1_000_000), |s| s.parse())?;
    let seed: u64 = args.next().map_or(Ok(7), |s| s.parse())?;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let g = Normal::new(0.0, 1.0)?;
    // Each reading = centre + loadings · (load, heat, supply) factors + its own noise.
    let centre = [
        42.0, 0.8, 3.2, 6.1, 230.0, 48.0, 44.0, 1.8, 1.6, 1.1, 2900.0, 120.0, 1.9, 6.2, 19.0, 24.0,
    ];
    let load = [
        3.0, -0.05, 0.2, 0.5, -1.0, 2.0, 1.5, 0.2, 0.15, 0.1, 20.0, -4.0, 0.0, 0.0, 0.1, 0.0,
    ];
    let heat = [
        0.0, 0.0, 0.0, 0.1, 0.0, 2.5, 2.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.02, 0.0, 0.8, 2.0,
    ];
    let supply = [
        0.5, 0.04, 0.02, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 8.0, 0.05, 0.03, 0.0, 0.0,
    ];
    let noise = [
        0.8, 0.02, 0.05, 0.15, 1.5, 0.6, 0.5, 0.1, 0.1, 0.08, 10.0, 1.0, 0.04, 0.05, 0.2, 0.5,
    ];
    ellipsoid_trainer::data::output::write_atomic(&out, |w| {
        let mut w = std::io::BufWriter::with_capacity(1 << 20, w);
        writeln!(w, "timestamp,{}", NAMES.join(","))?;
        let mut line = String::with_capacity(256);
        for r in 0..rows {
            use std::fmt::Write as _;
            line.clear();
            let (a, b, c): (f64, f64, f64) =
                (g.sample(&mut rng), g.sample(&mut rng), g.sample(&mut rng));
            write!(line, "{}", 1_717_200_000 + r)?;
            for j in 0..16 {
                let v = centre[j]
                    + load[j] * a
                    + heat[j] * b
                    + supply[j] * c
                    + noise[j] * g.sample(&mut rng);
                write!(line, ",{v:.5}")?;
            }
            line.push('\n');
            w.write_all(line.as_bytes())?;
        }
        w.flush()?;
        Ok(())
    })?;
    eprintln!("wrote {rows} rows to {}", out.display());
    Ok(())
}
