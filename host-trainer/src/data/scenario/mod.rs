//! The demo scenario: a booster pump on a greenhouse irrigation skid, logged once a second.
//!
//! Everything here is invented for the demo. A small physical simulation gives five correlated
//! channels:
//!
//! * the irrigation controller moves a zone valve between openings (one zone after another, each
//!   for 6 to 20 minutes); the valve actuator slews at a limited rate and hunts slightly;
//! * the controller also switches between two programmes, each for 40 to 80 minutes: duty point 0
//!   runs the pump at full speed, duty point 1 (a misting programme) has the drive run it at
//!   [`REDUCED_SPEED`] of full speed. By the affinity laws the pump's head scales with n², its
//!   flow with n and its shaft power with n³; the controller's duty point is logged beside the
//!   readings (`duty_point`, 0 or 1), so that a bank can be told it;
//! * the operating point is where the pump curve `P = Ps + H0 − k·q²` meets the system curve
//!   `P = Hs + R(v)·q²`, with `q` the flow in hundreds of L/min, `Ps` the suction (tank) pressure and
//!   `R(v) = R0 / v²` the resistance of the valve at opening `v`. Opening the valve moves the point
//!   down the pump curve: more flow, less pressure;
//! * the pump's shaft power rises with flow (a radial pump's power curve), and the motor current
//!   follows the shaft power and the supply voltage;
//! * the bearing temperature follows the load through a first-order lag (time constant 10 minutes)
//!   on top of the greenhouse air temperature, which drifts; in the test stretch the sun comes
//!   round and the greenhouse warms by [`WARMING_C`] °C over the last three hours (healthy, slow
//!   against the zones and programmes, and beyond anything the baseline saw);
//! * the vibration rises slightly with flow and away from the best-efficiency flow.
//!
//! Each channel gets sensor noise and is rounded to its transmitter's resolution, so a value
//! written with [`write_csv`] reads back to the same `f64`.
//!
//! The baseline stretch (6 h) is healthy. The test stretch (4 h) follows it and carries five
//! injected [`Episode`]s, described in [`generate`]. The clogging filter happens at full speed
//! (duty point 0) and is built so that every channel stays inside its own baseline range at that
//! duty point: only a joint model can see it.

use std::io::Write;
use std::time::{Duration, UNIX_EPOCH};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// The five channels, with their units in the names.
pub const COLUMNS: [&str; 5] = [
    "motor_current_a",
    "discharge_pressure_bar",
    "flow_lpm",
    "bearing_temp_c",
    "vibration_mm_s",
];

/// Readings per second.
pub const RATE_HZ: f64 = 1.0;

/// Rows in the healthy baseline stretch (6 hours).
pub const BASELINE_ROWS: usize = 6 * 3600;
/// Rows in the test stretch (4 hours).
pub const TEST_ROWS: usize = 4 * 3600;

/// Decimal places each channel is logged with (its transmitter's resolution).
pub const DECIMALS: [usize; 5] = [3, 3, 1, 2, 2];

/// The column that logs the controller's duty point (0: full speed, 1: reduced speed).
pub const DUTY_COLUMN: &str = "duty_point";
/// Pump speed at duty point 1, as a fraction of full speed.
pub const REDUCED_SPEED: f64 = 0.8;
/// How much the greenhouse air warms in the test stretch, °C (from [`WARMING_START`] to the end).
pub const WARMING_C: f64 = 8.0;
/// Test row at which the afternoon warming starts (after the clog, so that the clog's channels
/// stay inside their baseline ranges).
pub const WARMING_START: usize = 3600;

/// An injected fault in the test stretch.
#[derive(Clone, Debug, serde::Serialize)]
pub struct Episode {
    /// Short name, fit for a table or a legend.
    pub name: &'static str,
    /// One sentence on what happens to the machine and the readings.
    pub description: &'static str,
    /// First test row of the episode.
    pub start: usize,
    /// One past the last test row (exclusive).
    pub end: usize,
}

/// The generated scenario.
#[derive(Clone, Debug)]
pub struct DemoData {
    /// The healthy stretch, one row per second, columns as in [`COLUMNS`].
    pub baseline: Vec<[f64; 5]>,
    /// The test stretch that follows the baseline, with faults injected. NaN marks a dropout.
    pub test: Vec<[f64; 5]>,
    /// Per test row: true inside an injected episode.
    pub labels: Vec<bool>,
    /// The controller's duty point of each baseline row (0 full speed, 1 reduced speed).
    pub baseline_duty: Vec<u8>,
    /// The controller's duty point of each test row.
    pub test_duty: Vec<u8>,
    /// The injected episodes, in time order.
    pub episodes: Vec<Episode>,
}

// Test-stretch rows of the episodes.
const CLOG: (usize, usize) = (1800, 3000);
const STUCK: (usize, usize) = (4200, 5400);
const DRY: (usize, usize) = (6600, 7200);
const DROPOUT: (usize, usize) = (8400, 8445);
/// Within the dropout, the rows before this one lose every channel; after it only pressure and flow.
const DROPOUT_ALL_UNTIL: usize = 8430;
const BEARING: (usize, usize) = (11400, TEST_ROWS);

/// Seconds simulated before the baseline starts, so that the lags and drifts have settled.
const WARM_UP: usize = 1800;

// Pump and system, pressures in bar, flow `q` in hundreds of L/min.
const H0: f64 = 4.6; // shut-off head of the pump
const K_PUMP: f64 = 1.0; // pump curve droop, bar per q²
const H_STATIC: f64 = 0.8; // static head of the irrigation lines and emitters
const R_VALVE: f64 = 0.9; // system resistance with the valve fully open, bar per q²
const FILTER_LOSS: f64 = 0.5; // extra suction loss of a clogged filter, bar per q²

/// A mean-reverting (Ornstein–Uhlenbeck) drift sampled once a second.
struct Drift {
    value: f64,
    keep: f64,
    kick: f64,
}

impl Drift {
    fn new(sd: f64, tau_s: f64, rng: &mut ChaCha8Rng) -> Self {
        let keep = (-1.0 / tau_s).exp();
        let first: f64 = rng.sample(StandardNormal);
        Drift {
            value: sd * first,
            keep,
            kick: sd * (1.0 - keep * keep).sqrt(),
        }
    }

    fn step(&mut self, rng: &mut ChaCha8Rng) -> f64 {
        let e: f64 = rng.sample(StandardNormal);
        self.value = self.keep * self.value + self.kick * e;
        self.value
    }
}

/// Smooth 0→1 ramp over `len` rows from `start`, holding 1 afterwards.
fn ramp(i: usize, start: usize, len: usize) -> f64 {
    if i < start {
        0.0
    } else {
        ((i - start) as f64 / len as f64).min(1.0)
    }
}

fn round_to(x: f64, decimals: usize) -> f64 {
    let f = 10f64.powi(decimals as i32);
    (x * f).round() / f
}

/// The zone valve's target opening for every simulated second (warm-up, baseline, test).
///
/// Random zones, except where the test stretch needs a known operating point: the clog happens
/// at a middle opening (so that sagging pressure stays inside its normal range), and the valve
/// moves twice while the pressure transmitter is stuck (so that the flat value stops fitting).
fn valve_targets(rng: &mut ChaCha8Rng, len: usize, test_at: usize) -> Vec<f64> {
    let mut target = Vec::with_capacity(len);
    while target.len() < len {
        let hold = rng.random_range(360..1200);
        let opening = rng.random_range(0.35..1.0);
        target.extend(std::iter::repeat_n(opening, hold));
    }
    target.truncate(len);
    let forced: [(usize, usize, f64); 4] = [
        (CLOG.0 - 300, CLOG.1 + 100, 0.62),
        (STUCK.0 - 200, STUCK.0 + 300, 0.75),
        (STUCK.0 + 300, STUCK.0 + 750, 0.42),
        (STUCK.0 + 750, STUCK.1 + 100, 0.95),
    ];
    for (a, b, v) in forced {
        target[test_at + a..test_at + b].fill(v);
    }
    target
}

/// The controller's duty point for every simulated second: programmes of 40 to 80 minutes,
/// alternating, except where the test stretch needs a known one: full speed from before the
/// clog to after the stuck transmitter (the episodes' stories are told at full speed), then
/// reduced speed for a while, so that the test stretch has both.
fn duty_points(rng: &mut ChaCha8Rng, len: usize, test_at: usize) -> Vec<u8> {
    let mut duty = Vec::with_capacity(len);
    let mut d: u8 = rng.random_range(0..2);
    while duty.len() < len {
        let hold = rng.random_range(2400..4800);
        duty.extend(std::iter::repeat_n(d, hold));
        d = 1 - d;
    }
    duty.truncate(len);
    duty[test_at + CLOG.0 - 400..test_at + STUCK.1 + 200].fill(0);
    duty[test_at + STUCK.1 + 200..test_at + STUCK.1 + 1000].fill(1);
    duty
}

/// Generate the scenario. The same seed gives the same data on every platform (ChaCha8).
///
/// The test stretch starts right after the baseline and carries, in this order:
///
/// | rows | episode | what the readings show |
/// |---|---|---|
/// | 1 800–3 000 | clogging intake filter | pressure and flow sag together, current barely moves, all in range |
/// | 4 200–5 400 | stuck pressure transmitter | pressure flat while the valve moves flow and current |
/// | 6 600–7 200 | dry running | flow and current drop, vibration rises |
/// | 8 400–8 445 | dropout | NaN in every channel, then in pressure and flow only |
/// | 11 400–end | wearing bearing | vibration and temperature creep up |
///
/// The clog and the stuck transmitter happen at full speed (duty point 0); the greenhouse
/// warming (healthy, not labelled) runs from row 3 600 to the end.
pub fn generate(seed: u64) -> DemoData {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let test_at = WARM_UP + BASELINE_ROWS;
    let total = test_at + TEST_ROWS;
    let targets = valve_targets(&mut rng, total, test_at);
    let duty = duty_points(&mut rng, total, test_at);

    let mut suction = Drift::new(0.04, 1200.0, &mut rng);
    let mut supply = Drift::new(0.008, 300.0, &mut rng);
    let mut air = Drift::new(0.4, 900.0, &mut rng);
    // The air temperature cycles every 3 h; the baseline sees two whole cycles. Its phase puts the
    // clog at the cycle's mean, so neither a warm nor a cool spell pushes the bearing temperature
    // past its baseline range there.
    let clog_mid = (test_at + (CLOG.0 + CLOG.1) / 2) as f64;
    let air_phase = -std::f64::consts::TAU * clog_mid / 10_800.0;
    let hunt_phase = rng.random_range(0.0..std::f64::consts::TAU);
    let noise_sd = [0.012, 0.012, 0.7, 0.06, 0.05];

    let mut opening = targets[0];
    let mut bearing_temp = f64::NAN; // set on the first step to its steady state
    let mut stuck_value = f64::NAN;
    let mut baseline = Vec::with_capacity(BASELINE_ROWS);
    let mut test = Vec::with_capacity(TEST_ROWS);
    // The speed follows the duty point through the drive's ramp (10 s from one to the other).
    let mut speed = if duty[0] == 0 { 1.0 } else { REDUCED_SPEED };

    for (s, &target) in targets.iter().enumerate() {
        // Row in the test stretch, if this second belongs to it.
        let row = s.checked_sub(test_at);
        let in_ep = |ep: (usize, usize)| row.is_some_and(|r| r >= ep.0 && r < ep.1);
        let r = row.unwrap_or(0);

        // Fault severities, 0 outside their episodes.
        let clog = if in_ep(CLOG) {
            ramp(r, CLOG.0, 90)
        } else {
            0.0
        };
        let dry = if in_ep(DRY) { ramp(r, DRY.0, 40) } else { 0.0 };
        let wear = if in_ep(BEARING) {
            ramp(r, BEARING.0, BEARING.1 - BEARING.0).powi(2)
        } else {
            0.0
        };

        // The valve actuator slews at most 1 % of travel a second and hunts by ±1 %.
        opening += (target - opening).clamp(-0.01, 0.01);
        let t = s as f64;
        let v = opening + 0.01 * (std::f64::consts::TAU * t / 97.0 + hunt_phase).sin();

        let speed_target = if duty[s] == 0 { 1.0 } else { REDUCED_SPEED };
        speed += (speed_target - speed).clamp(-0.02, 0.02);
        let n = speed;

        // Operating point: pump curve (head ∝ n², less when running dry, more suction loss when
        // the filter clogs) meets the system curve of the valve.
        let ps = 0.35 + suction.step(&mut rng);
        let head = n * n * H0 * (1.0 - 0.75 * dry);
        let r_sys = R_VALVE / (v * v);
        let drive = (ps + head - H_STATIC).max(0.0);
        let q = (drive / (K_PUMP + FILTER_LOSS * clog + r_sys)).sqrt();
        let pressure = H_STATIC + r_sys * q * q;

        // Shaft power rises with flow (∝ n³ at similar points: n³·P(q/n)); air in the pump lowers
        // it. Current follows power and supply.
        let shaft_w = (350.0 * n * n * n + 520.0 * n * n * q) * (1.0 - 0.55 * dry);
        let volt = 1.0 + supply.step(&mut rng);
        let current = 1.1 * volt + shaft_w / (3f64.sqrt() * 400.0 * 0.82 * volt);

        // Bearing temperature: first-order lag towards air + load heating (+ friction when worn).
        let warming = if row.is_some() {
            WARMING_C * ramp(r, WARMING_START, TEST_ROWS - WARMING_START)
        } else {
            0.0
        };
        let air_c = 23.0
            + 2.0 * (std::f64::consts::TAU * t / 10_800.0 + air_phase).sin()
            + air.step(&mut rng)
            + warming;
        let steady = air_c + 6.0 + 0.018 * shaft_w + 9.0 * wear;
        if bearing_temp.is_nan() {
            bearing_temp = steady;
        }
        bearing_temp += (steady - bearing_temp) / 600.0;

        // Vibration: flow, distance from the best-efficiency flow, a worn bearing, air.
        let dry_shake: f64 = rng.sample(StandardNormal);
        // The best-efficiency flow scales with the speed.
        let vibration = 1.3
            + 0.9 * q
            + 1.2 * (q - 1.1 * n).powi(2)
            + 2.2 * wear
            + dry * (2.0 + 0.3 * dry_shake.abs());

        let truth = [current, pressure, 100.0 * q, bearing_temp, vibration];
        let mut reading = [0.0; 5];
        for c in 0..5 {
            let e: f64 = rng.sample(StandardNormal);
            reading[c] = round_to(truth[c] + noise_sd[c] * e, DECIMALS[c]);
        }

        // Sensor faults act on the readings, not on the machine.
        if in_ep(STUCK) {
            if r == STUCK.0 {
                stuck_value = test.last().map_or(reading[1], |last: &[f64; 5]| last[1]);
            }
            reading[1] = stuck_value;
        }
        if in_ep(DROPOUT) {
            if r < DROPOUT_ALL_UNTIL {
                reading = [f64::NAN; 5];
            } else {
                reading[1] = f64::NAN;
                reading[2] = f64::NAN;
            }
        }

        if s >= test_at {
            test.push(reading);
        } else if s >= WARM_UP {
            baseline.push(reading);
        }
    }
    let baseline_duty = duty[WARM_UP..test_at].to_vec();
    let test_duty = duty[test_at..].to_vec();

    let episodes = vec![
        Episode {
            name: "clogging intake filter",
            description:
                "The suction filter clogs within 90 s at full speed: pressure and flow sag together \
                          while the motor current barely moves; every channel stays inside its normal \
                          range at that duty point.",
            start: CLOG.0,
            end: CLOG.1,
        },
        Episode {
            name: "stuck pressure transmitter",
            description:
                "The pressure transmitter freezes at its last value while the valve keeps \
                          moving flow and current.",
            start: STUCK.0,
            end: STUCK.1,
        },
        Episode {
            name: "dry running",
            description: "The supply tank runs low and the pump draws air: flow and current drop, \
                          vibration rises.",
            start: DRY.0,
            end: DRY.1,
        },
        Episode {
            name: "sensor dropout",
            description:
                "The node loses its inputs: 30 s of NaN in every channel, then 15 s of NaN \
                          in pressure and flow only.",
            start: DROPOUT.0,
            end: DROPOUT.1,
        },
        Episode {
            name: "wearing bearing",
            description:
                "A bearing wears out: vibration and bearing temperature creep up until the \
                          end of the log.",
            start: BEARING.0,
            end: BEARING.1,
        },
    ];
    let mut labels = vec![false; test.len()];
    for ep in &episodes {
        labels[ep.start..ep.end].fill(true);
    }
    DemoData {
        baseline,
        test,
        labels,
        baseline_duty,
        test_duty,
        episodes,
    }
}

/// Format a Unix time (seconds, not before 1970) as ISO-8601 UTC, e.g. `2024-05-01T06:00:00Z`.
fn iso_utc(unix: u64) -> String {
    humantime::format_rfc3339_seconds(UNIX_EPOCH + Duration::from_secs(unix)).to_string()
}

/// Write rows as CSV: a `timestamp` column (ISO-8601 UTC, the first row at `start_unix`, one row
/// per `1 / RATE_HZ` seconds), the five [`COLUMNS`], a [`DUTY_COLUMN`] (0 or 1) when duty points
/// are given, and a `label` column (0 or 1) when labels are given. NaN is written as an empty
/// cell. Values are written with [`DECIMALS`] places.
///
/// # Errors
/// When `labels` or `duty` has a different length from `rows`, when `start_unix` is before 1970,
/// or when writing fails.
pub fn write_csv(
    w: &mut dyn Write,
    rows: &[[f64; 5]],
    duty: Option<&[u8]>,
    labels: Option<&[bool]>,
    start_unix: i64,
) -> anyhow::Result<()> {
    if let Some(l) = labels {
        anyhow::ensure!(
            l.len() == rows.len(),
            "{} labels for {} rows",
            l.len(),
            rows.len()
        );
    }
    if let Some(d) = duty {
        anyhow::ensure!(
            d.len() == rows.len(),
            "{} duty points for {} rows",
            d.len(),
            rows.len()
        );
    }
    let start = u64::try_from(start_unix)
        .map_err(|_| anyhow::anyhow!("start time {start_unix} is before 1970-01-01"))?;
    let mut header = String::from("timestamp");
    for c in COLUMNS {
        header.push(',');
        header.push_str(c);
    }
    if duty.is_some() {
        header.push(',');
        header.push_str(DUTY_COLUMN);
    }
    if labels.is_some() {
        header.push_str(",label");
    }
    writeln!(w, "{header}")?;
    let step = 1.0 / RATE_HZ;
    let mut line = String::new();
    for (i, row) in rows.iter().enumerate() {
        line.clear();
        line.push_str(&iso_utc(start + (i as f64 * step).round() as u64));
        for (c, x) in row.iter().enumerate() {
            line.push(',');
            if x.is_finite() {
                line.push_str(&format!("{:.*}", DECIMALS[c], x));
            }
        }
        if let Some(d) = duty {
            line.push_str(&format!(",{}", d[i]));
        }
        if let Some(l) = labels {
            line.push_str(if l[i] { ",1" } else { ",0" });
        }
        writeln!(w, "{line}")?;
    }
    Ok(())
}

#[cfg(test)]
mod tests;
