//! Pinned tracking of the version 2 golden bank (`core/FORMAT.md`'s worked example): a fixed
//! sequence of readings and modes, and for each the exact result the core's `Tracker` gives (the
//! chosen mode and the bits of d², or the fault), the events, and the bits of the drift shift
//! after it, in `tests/golden/golden-bank.track`. A change to the window, the mode rule, the
//! alarm or the drift that moves one bit of one reading fails here; the device can be checked
//! against the same file.
//!
//! The pinned values were computed by the core when the file was written. They are also checked
//! against an independent `f64` implementation of the semantics (`reference` below: the window
//! mean, the log, the differences, the shift, the mode's d² from the unfolded definition
//! `‖W ((t − s − offset) · scale − mean)‖²`), which must give the same modes, faults and events
//! and the same d² and shift to within a relative 1e-4: so the pins are the `f32` rendering of
//! the documented behaviour, not arbitrary numbers.
//!
//! The file's lines: `r INDEX MODE X` then `mode=K d2=BITS` or `fault=NAME`, `ev=` a
//! comma-separated list of events (or `-`), `s=` the shift's bits. `MODE` is the mode the reading
//! came with (`-`: none); `X` the reading's f32 bits.

use ellipsoid_core::{EventKind, FaultCause, ReadingFault, Tracker};

const TRACK: &str = include_str!("../golden/golden-bank.track");

/// The bytes of `BANK_GOLDEN` in `golden_blob.rs`, as `tests/golden/bank_v2_golden.py` prints them.
const BANK_HEX: &str = "454c5344020100008800eeff830680f2d6ca06040173f40b51010204030000204000000000000080400000004000000000000000000000803f0000803e0000803f645d13415ebabf400000404000000000000000410000803f0000003e000000000000803f000000bf0000c03f645d13415ebabf400000803d0000003e0000003f03ac029f258beb";

fn unhex(s: &str) -> Vec<u8> {
    (0..s.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&s[i..i + 2], 16).unwrap())
        .collect()
}

fn fault_name(f: &ReadingFault) -> String {
    match f {
        ReadingFault::NotFinite { feature } => format!("not-finite:{feature}"),
        ReadingFault::LogDomain { feature } => format!("log-domain:{feature}"),
        ReadingFault::Overflow => "overflow".into(),
        ReadingFault::WindowFilling { missing } => format!("window-filling:{missing}"),
        ReadingFault::UnknownMode { given: None } => "unknown-mode:-".into(),
        ReadingFault::UnknownMode { given: Some(k) } => format!("unknown-mode:{k}"),
        other => format!("{other:?}"),
    }
}

fn event_name(k: &EventKind) -> String {
    match k {
        EventKind::Fault(FaultCause::Reading(f)) => format!("fault:{}", fault_name(f)),
        EventKind::Drift { feature } => format!("drift:{feature}"),
        other => other.name().to_string(),
    }
}

/// One reading of the sequence: its raw value and mode.
fn sequence() -> Vec<(f32, Option<u8>)> {
    let mut s = Vec::new();
    // Mode 0 near its centre (flow about e^2.5 ≈ 12.2), with a little wobble.
    for i in 0..8 {
        s.push((12.0 + 0.25 * (i % 3) as f32, Some(0)));
    }
    // A slow rise to 14.5: the drift follows it and reaches its bound of 0.125 on ln(flow).
    for i in 0..26 {
        s.push((14.5 + 0.1 * (i % 2) as f32, Some(0)));
    }
    // A bad reading: its fault, then the window fills again.
    s.push((f32::NAN, Some(0)));
    for _ in 0..4 {
        s.push((14.5, Some(0)));
    }
    // No mode given, then a mode the bank does not have.
    s.push((14.5, None));
    s.push((14.5, Some(5)));
    // Mode 1 (flow about e^3 ≈ 20): a restart, then normal readings.
    for i in 0..6 {
        s.push((20.0 + 0.5 * (i % 2) as f32, Some(1)));
    }
    // A surge in mode 1: above its limit, raised after three.
    for _ in 0..6 {
        s.push((45.0, Some(1)));
    }
    // Back to normal: still raised (clear_after is 300), the shift frozen.
    for _ in 0..5 {
        s.push((20.0, Some(1)));
    }
    // A zero flow on the log feature.
    s.push((0.0, Some(1)));
    s
}

fn render() -> Vec<String> {
    let bytes = unhex(BANK_HEX);
    let mut t = Tracker::<1, 2>::from_blob(&bytes).unwrap();
    let mut lines = Vec::new();
    for (i, (x, mode)) in sequence().into_iter().enumerate() {
        let s = t.step(&[x], mode);
        let result = match s.score {
            Ok(b) => format!("mode={} d2={:08x}", b.mode, b.d2.to_bits()),
            Err(f) => format!("fault={}", fault_name(&f)),
        };
        let ev: Vec<String> = s.step.events.iter().map(|e| event_name(&e.kind)).collect();
        let ev = if ev.is_empty() {
            "-".into()
        } else {
            ev.join(",")
        };
        let m = mode.map_or("-".to_string(), |k| k.to_string());
        let sh = t.shift();
        lines.push(format!(
            "r {i} {m} {:08x} {result} ev={ev} s={:08x},{:08x}",
            x.to_bits(),
            sh[0].to_bits(),
            sh[1].to_bits()
        ));
    }
    lines
}

fn pinned() -> Vec<String> {
    TRACK
        .lines()
        .map(|l| l.split('#').next().unwrap().trim())
        .filter(|l| l.starts_with("r "))
        .map(str::to_string)
        .collect()
}

#[test]
fn the_core_reproduces_every_pinned_step() {
    let blob_line = TRACK
        .lines()
        .find_map(|l| l.strip_prefix("blob "))
        .expect("a blob line");
    assert_eq!(blob_line.trim(), BANK_HEX);
    let got = render();
    let want = pinned();
    assert!(want.len() >= 50, "{} pinned readings", want.len());
    assert_eq!(got, want, "the core now gives:\n{}", got.join("\n"));
}

/// The golden bank in `f64`, from its parameters, unfolded: every rule of `core/src/track.rs`
/// written again without the core's code.
struct Reference {
    ring: Vec<f64>,
    shift: [f64; 2],
    last_mode: Option<u8>,
    above_run: u32,
    raised: bool,
    fault: Option<String>,
    at_bound: bool,
}

struct RefStep {
    result: Result<(u8, f64), String>,
    events: Vec<String>,
    shift: [f64; 2],
}

impl Reference {
    const OFFSET: [[f64; 2]; 2] = [[2.5, 0.0], [3.0, 0.0]];
    const SCALE: [[f64; 2]; 2] = [[4.0, 2.0], [8.0, 1.0]];
    const MEAN: [[f64; 2]; 2] = [[0.0, 0.0], [0.125, 0.0]];
    const W: [[f64; 3]; 2] = [[1.0, 0.25, 1.0], [1.0, -0.5, 1.5]];
    const ALARM: f64 = 9.2103;
    const RATE: f64 = 0.0625;
    const BOUND: [f64; 2] = [0.125, 0.5];
    const W_LEN: usize = 4;

    fn d2(k: usize, t: [f64; 2]) -> f64 {
        let u: Vec<f64> = (0..2)
            .map(|i| (t[i] - Self::OFFSET[k][i]) * Self::SCALE[k][i] - Self::MEAN[k][i])
            .collect();
        let w = Self::W[k];
        let z0 = w[0] * u[0];
        let z1 = w[1] * u[0] + w[2] * u[1];
        z0 * z0 + z1 * z1
    }

    fn center(k: usize, i: usize) -> f64 {
        Self::OFFSET[k][i] + Self::MEAN[k][i] / Self::SCALE[k][i]
    }

    fn step(&mut self, x: f32, mode: Option<u8>) -> RefStep {
        let mut events = Vec::new();
        let valid = mode.filter(|k| *k < 2);
        if let Some(k) = valid {
            if self.last_mode.is_some_and(|l| l != k) {
                self.ring.clear();
            }
            self.last_mode = Some(k);
        }
        let x = f64::from(x);
        let result: Result<(u8, f64, [f64; 2]), String> = if !x.is_finite() {
            self.ring.clear();
            Err("not-finite:0".into())
        } else if x <= 0.0 {
            self.ring.clear();
            Err("log-domain:0".into())
        } else {
            self.ring.push(x);
            match valid {
                None => Err(format!(
                    "unknown-mode:{}",
                    mode.map_or("-".into(), |k| k.to_string())
                )),
                Some(_) if self.ring.len() < Self::W_LEN => {
                    Err(format!("window-filling:{}", Self::W_LEN - self.ring.len()))
                }
                Some(k) => {
                    let last = &self.ring[self.ring.len() - Self::W_LEN..];
                    let mean = last.iter().sum::<f64>() / Self::W_LEN as f64;
                    let diff = last[3] - last[2];
                    let t = [mean.ln() - self.shift[0], diff - self.shift[1]];
                    let k = usize::from(k);
                    Ok((k as u8, Self::d2(k, t), t))
                }
            }
        };
        let quiet_before = !self.raised;
        match &result {
            Err(f) => {
                // A new cause is an event; a filling window whose count fell is the same cause.
                let kind = |f: &str| f.split(':').next().unwrap_or("").to_string();
                let same = self.fault.as_deref().is_some_and(|g| {
                    g == f || (kind(g) == "window-filling" && kind(f) == "window-filling")
                });
                if !same {
                    events.push(format!("fault:{f}"));
                }
                self.fault = Some(f.clone());
                self.above_run = 0;
            }
            Ok((_, d2, _)) => {
                if self.fault.take().is_some() {
                    events.push("fault-cleared".into());
                }
                if !self.raised {
                    if *d2 > Self::ALARM {
                        self.above_run += 1;
                        if self.above_run >= 3 {
                            self.raised = true;
                            self.above_run = 0;
                            events.push("raised".into());
                        }
                    } else {
                        self.above_run = 0;
                    }
                }
                // clear_after is 300: the sequence never clears.
            }
        }
        if let Ok((k, d2, t)) = &result {
            if *d2 <= Self::ALARM && quiet_before && !self.raised {
                let mut first = None;
                for (i, ti) in t.iter().enumerate() {
                    let d = ti - Self::center(usize::from(*k), i);
                    let s = (self.shift[i] + Self::RATE * d).clamp(-Self::BOUND[i], Self::BOUND[i]);
                    self.shift[i] = s;
                    if first.is_none() && s.abs() >= Self::BOUND[i] {
                        first = Some(i);
                    }
                }
                if let Some(i) = first {
                    if !self.at_bound {
                        self.at_bound = true;
                        events.push(format!("drift:{i}"));
                    }
                }
            }
        }
        RefStep {
            result: result.map(|(k, d2, _)| (k, d2)),
            events,
            shift: self.shift,
        }
    }
}

#[test]
fn the_pins_follow_an_independent_f64_implementation() {
    let mut r = Reference {
        ring: Vec::new(),
        shift: [0.0; 2],
        last_mode: None,
        above_run: 0,
        raised: false,
        fault: None,
        at_bound: false,
    };
    let pins = pinned();
    let seq = sequence();
    assert_eq!(pins.len(), seq.len());
    let (mut scored, mut drift_events, mut raised, mut filling_events) = (0, 0, 0, 0);
    for (line, (x, mode)) in pins.iter().zip(seq) {
        let want = r.step(x, mode);
        let words: Vec<&str> = line.split_whitespace().collect();
        // r INDEX MODE X RESULT... ev=... s=...
        let ev = words.iter().find_map(|w| w.strip_prefix("ev=")).unwrap();
        let ev: Vec<String> = if ev == "-" {
            vec![]
        } else {
            ev.split(',').map(str::to_string).collect()
        };
        assert_eq!(ev, want.events, "{line}");
        drift_events += ev.iter().filter(|e| e.starts_with("drift")).count();
        raised += ev.iter().filter(|e| *e == "raised").count();
        filling_events += ev
            .iter()
            .filter(|e| e.starts_with("fault:window-filling"))
            .count();
        match &want.result {
            Ok((k, d2)) => {
                scored += 1;
                assert_eq!(words[4], format!("mode={k}"), "{line}");
                let bits = u32::from_str_radix(words[5].strip_prefix("d2=").unwrap(), 16).unwrap();
                let got = f64::from(f32::from_bits(bits));
                assert!(
                    (got - d2).abs() <= 1e-4 * (1.0 + d2),
                    "{line}: f64 gives {d2}"
                );
            }
            Err(f) => assert_eq!(words[4], format!("fault={f}"), "{line}"),
        }
        let s = words.iter().find_map(|w| w.strip_prefix("s=")).unwrap();
        for (i, b) in s.split(',').enumerate() {
            let got = f64::from(f32::from_bits(u32::from_str_radix(b, 16).unwrap()));
            assert!((got - want.shift[i]).abs() <= 1e-5, "{line}: shift {i}");
        }
    }
    // The sequence exercises what it claims: scored readings of both modes, one drift event, a
    // raise, and three fillings of the window of 4 (boot, after the NaN, after the change to mode
    // 1), each one fault event however many readings it takes.
    assert!(
        scored >= 30 && drift_events == 1 && raised == 1 && filling_events == 3,
        "{scored} {drift_events} {raised} {filling_events}"
    );
}
