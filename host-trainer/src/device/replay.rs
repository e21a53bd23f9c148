//! Every reading through the core's own `f32` scoring, reading window, model bank, alarm state
//! machine and drift: the device's code, with its state carried from row to row.
//!
//! Nothing here computes a score. A blob goes to the core's `Tracker` ([`crate::device::track`]):
//! a version 2 bank with its modes, window and drift, and a version 1 model as the bank of one
//! mode, window one, no drift that the core defines to give `Model::score`'s bits. A fixed-point
//! blob, or a model built in memory (the per-feature twin of a report), has no tracker; it goes
//! to the core's `Model::score` / `FixedModel` and `AlarmMachine` as before. What the workstation
//! shows is what the device computes.

use std::io::Write;

use anyhow::Result;
use ellipsoid_core::{
    blob, AlarmMachine, DecodeError, EventKind, ReadingFault, Scored, Step, Verdict,
};

use crate::device::dims::{decode_any, AnyModel};
use crate::device::track::{tracker, AnyTracker};

/// The one conversion from a CSV value to what the device receives: `f64` rounded to the
/// nearest `f32`. Tools that make device input tables must use it too, so both sides see the same bits.
pub fn to_device(x: f64) -> f32 {
    x as f32
}

/// One reading after the core has scored it.
#[derive(Clone, Debug, PartialEq)]
pub struct ReplayRow {
    /// 0-based index of the reading in the stream.
    pub index: u64,
    /// The core's result: d² and verdict, or why it could not be scored.
    pub score: Result<Scored, ReadingFault>,
    /// The mode that scored the reading (scored readings only; always 0 for a single model).
    pub mode: Option<u8>,
    /// Per-feature contributions to d² (scored readings only), one per scored feature: the raw
    /// features' window means, then (with differences) their first differences.
    pub contributions: Option<Vec<f32>>,
    /// The feature with the largest contribution, as the core picks it (scored readings only).
    pub top: Option<usize>,
    /// Alarm line after this reading.
    pub alarm: bool,
    /// Fault line after this reading.
    pub fault: bool,
    /// Events on this reading.
    pub events: Vec<EventKind>,
    /// Whether the drift shift has reached its bound (it stays so until a new blob is loaded).
    pub drift_at_bound: bool,
}

impl ReplayRow {
    /// d², if the reading was scored.
    pub fn d2(&self) -> Option<f32> {
        self.score.as_ref().ok().map(|s| s.d2)
    }

    /// Whether the verdict was "above the threshold" (of the mode that scored it).
    pub fn above(&self) -> bool {
        matches!(
            self.score,
            Ok(Scored {
                verdict: Verdict::Above,
                ..
            })
        )
    }

    /// Index of the feature with the largest contribution, on a reading above the threshold.
    pub fn top_feature(&self) -> Option<usize> {
        if !self.above() {
            return None;
        }
        self.top
    }
}

/// A model held by a replayer: borrowed from the caller, or decoded from a blob by it.
enum Held<'a> {
    Borrowed(&'a dyn AnyModel),
    Owned(Box<dyn AnyModel>),
}

impl Held<'_> {
    fn get(&self) -> &dyn AnyModel {
        match self {
            Held::Borrowed(m) => *m,
            Held::Owned(m) => m.as_ref(),
        }
    }
}

enum Engine<'a> {
    /// The core's tracker, for every f32 blob.
    Track(Box<dyn AnyTracker + 'a>),
    /// A single model and its alarm machine: fixed-point blobs and models built in memory.
    Single {
        model: Held<'a>,
        alarm: AlarmMachine,
    },
}

/// Feeds readings through the core, one stream, state carried from reading to reading.
pub struct Replayer<'a> {
    engine: Engine<'a>,
    bank: bool,
    next: u64,
}

impl<'a> Replayer<'a> {
    /// A replayer of a model built in memory, with the model's own thresholds and policy
    /// (`Model::score` and the alarm machine: no window, one mode, no drift).
    pub fn new(model: &'a dyn AnyModel) -> Self {
        Self::single(Held::Borrowed(model))
    }

    fn single(model: Held<'a>) -> Self {
        let p = model.get().params();
        Self {
            engine: Engine::Single {
                model,
                alarm: AlarmMachine::new(p.thresholds, p.policy),
            },
            bank: false,
            next: 0,
        }
    }

    /// A replayer of a blob, as the device runs it from its slot: an f32 blob of version 1 or
    /// 2 through the core's `Tracker`, a fixed-point one through `FixedModel`.
    pub fn from_blob(bytes: &'a [u8]) -> Result<Self, DecodeError> {
        let h = blob::Header::parse(bytes)?;
        if h.flags & blob::FLAG_FIXED != 0 {
            return Ok(Self::single(Held::Owned(decode_any(bytes)?)));
        }
        Ok(Self {
            engine: Engine::Track(tracker(bytes)?),
            bank: h.version != blob::VERSION,
            next: 0,
        })
    }

    /// Whether the blob is a version 2 bank (its replay CSV has the bank's columns).
    pub fn is_bank(&self) -> bool {
        self.bank
    }

    /// Length of the scored vector (the number of contributions a row carries).
    pub fn scored_len(&self) -> usize {
        match &self.engine {
            Engine::Track(t) => t.m(),
            Engine::Single { model, .. } => model.get().n(),
        }
    }

    /// The drift shift now, in model units (`None` without a tracker).
    pub fn shift(&self) -> Option<Vec<f32>> {
        match &self.engine {
            Engine::Track(t) => Some(t.shift()),
            Engine::Single { .. } => None,
        }
    }

    /// Score one reading (already in model feature order) with no mode given.
    pub fn step(&mut self, x: &[f32]) -> ReplayRow {
        self.step_mode(x, None)
    }

    /// Score one reading (in model feature order) with the mode the machine's controller gave
    /// (used by a known-mode bank; the others ignore it), and advance the state.
    pub fn step_mode(&mut self, x: &[f32], mode: Option<u8>) -> ReplayRow {
        let index = self.next;
        self.next += 1;
        match &mut self.engine {
            Engine::Track(t) => {
                let r = t.step(x, mode);
                ReplayRow {
                    index,
                    mode: r.score.as_ref().ok().map(|s| s.0),
                    score: r.score.map(|(_, d2, verdict)| Scored { d2, verdict }),
                    contributions: r.contributions,
                    top: r.top,
                    alarm: r.step.alarm,
                    fault: r.step.fault,
                    events: r.step.events.iter().map(|e| e.kind).collect(),
                    drift_at_bound: r.drift_at_bound,
                }
            }
            Engine::Single { model, alarm } => {
                let model = model.get();
                let score = model.score(x);
                let (contributions, top) = match score.as_ref().ok().and(model.explain(x).ok()) {
                    Some((_, c, top)) => (Some(c), Some(top)),
                    None => (None, None),
                };
                let step: Step = alarm.update(&score);
                ReplayRow {
                    index,
                    mode: score.is_ok().then_some(0),
                    score,
                    contributions,
                    top,
                    alarm: step.alarm,
                    fault: step.fault,
                    events: step.events.iter().map(|e| e.kind).collect(),
                    drift_at_bound: false,
                }
            }
        }
    }
}

/// The names of the scored features: the raw names, then (with differences, `m = 2 n`)
/// `Δ<name>` for each first difference, as the model card names them.
pub fn scored_names(raw: &[String], m: usize) -> Vec<String> {
    let mut names = raw.to_vec();
    if m == 2 * raw.len() && m > 0 {
        names.extend(raw.iter().map(|f| format!("Δ{f}")));
    }
    names
}

/// Writes replay rows as CSV: `index,d2,d2_bits,verdict,alarm,fault,event,top_feature,c_<feature>…`,
/// and for a version 2 bank `index,d2,d2_bits,verdict,alarm,fault,event,top_feature,mode,drift_at_bound,c_<feature>…`
/// (a version 1 blob's output stays byte for byte what it was before banks existed).
///
/// `d2` is printed with the shortest decimal that reads back to the same `f32`; `d2_bits` is its
/// bit pattern in 8 hex digits. Both are empty on a fault row, whose verdict is `fault`; so is
/// `mode`. `drift_at_bound` is 1 from the reading whose drift shift first reached its bound on.
pub struct CsvSink<W: Write> {
    out: csv::Writer<W>,
    features: Vec<String>,
    bank: bool,
}

impl<W: Write> CsvSink<W> {
    /// Write the header of a single model's replay (`features`: one name per scored feature).
    pub fn new(w: W, features: &[String]) -> Result<Self> {
        Self::with_layout(w, features, false)
    }

    /// Write the header for what `rp` replays: `names` are its scored features' names (the
    /// card's), or the raw feature names, which then become them ([`scored_names`]); a bank gets
    /// the `mode` and `drift_at_bound` columns.
    pub fn for_replayer(w: W, names: &[String], rp: &Replayer<'_>) -> Result<Self> {
        let m = rp.scored_len();
        let names = if names.len() == m {
            names.to_vec()
        } else {
            scored_names(names, m)
        };
        Self::with_layout(w, &names, rp.is_bank())
    }

    fn with_layout(w: W, features: &[String], bank: bool) -> Result<Self> {
        let mut out = csv::Writer::from_writer(w);
        let mut header: Vec<String> = [
            "index",
            "d2",
            "d2_bits",
            "verdict",
            "alarm",
            "fault",
            "event",
            "top_feature",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        if bank {
            header.extend(["mode".to_string(), "drift_at_bound".to_string()]);
        }
        header.extend(features.iter().map(|f| format!("c_{f}")));
        out.write_record(&header)?;
        Ok(Self {
            out,
            features: features.to_vec(),
            bank,
        })
    }

    /// Write one row.
    pub fn row(&mut self, r: &ReplayRow) -> Result<()> {
        let mut rec: Vec<String> = Vec::with_capacity(10 + self.features.len());
        rec.push(r.index.to_string());
        match &r.score {
            Ok(s) => {
                rec.push(format!("{}", s.d2));
                rec.push(format!("{:08x}", s.d2.to_bits()));
                rec.push(if r.above() { "above" } else { "below" }.into());
            }
            Err(_) => {
                rec.push(String::new());
                rec.push(String::new());
                rec.push("fault".into());
            }
        }
        rec.push(u8::from(r.alarm).to_string());
        rec.push(u8::from(r.fault).to_string());
        let events: Vec<&str> = r.events.iter().map(EventKind::name).collect();
        rec.push(events.join("+"));
        rec.push(
            r.top_feature()
                .and_then(|i| self.features.get(i).cloned())
                .unwrap_or_default(),
        );
        if self.bank {
            rec.push(r.mode.map(|k| k.to_string()).unwrap_or_default());
            rec.push(u8::from(r.drift_at_bound).to_string());
        }
        match &r.contributions {
            Some(c) => rec.extend(c.iter().map(|v| format!("{v}"))),
            None => rec.extend(self.features.iter().map(|_| String::new())),
        }
        self.out.write_record(&rec)?;
        Ok(())
    }

    /// Flush and return the writer.
    pub fn finish(self) -> Result<W> {
        self.out
            .into_inner()
            .map_err(|e| anyhow::anyhow!("cannot flush the replay output: {}", e.error()))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ellipsoid_core::{AlarmPolicy, Model, ModelParams, Preprocess, Thresholds};

    fn model() -> Model<2> {
        Model::new(ModelParams {
            meta: Default::default(),
            preprocess: Preprocess {
                log_mask: 0,
                offset: [10.0, 5.0],
                scale: [0.5, 2.0],
            },
            mean: [0.0; 2],
            w: [[1.0, 0.0], [-0.8, 1.6]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: AlarmPolicy {
                raise_after: 2,
                clear_after: 2,
                latch: false,
            },
        })
        .unwrap()
    }

    #[test]
    fn replay_is_bit_identical_to_the_core_and_drives_its_alarm_machine() {
        let m = model();
        let readings: Vec<[f32; 2]> = vec![
            [10.0, 5.0],
            [20.0, 5.0],
            [21.0, 4.0],
            [f32::NAN, 5.0],
            [22.0, 5.5],
            [22.5, 5.5],
            [10.1, 5.0],
            [10.0, 5.1],
        ];
        let mut rp = Replayer::new(&m);
        let mut direct = AlarmMachine::new(m.thresholds(), m.policy());
        for x in &readings {
            let row = rp.step(x);
            let want = m.score(x);
            let step = direct.update(&want);
            match (&row.score, &want) {
                (Ok(a), Ok(b)) => assert_eq!(a.d2.to_bits(), b.d2.to_bits()),
                (Err(a), Err(b)) => assert_eq!(a, b),
                other => panic!("replay and core disagree: {other:?}"),
            }
            assert_eq!((row.alarm, row.fault), (step.alarm, step.fault));
        }
    }

    #[test]
    fn csv_has_the_documented_columns_and_exact_bits() {
        let m = model();
        let mut rp = Replayer::new(&m);
        let names = vec!["a".to_string(), "b".to_string()];
        let mut sink = CsvSink::new(Vec::new(), &names).unwrap();
        for x in [[20.0f32, 5.0], [20.0, 5.0], [f32::NAN, 1.0]] {
            sink.row(&rp.step(&x)).unwrap();
        }
        let text = String::from_utf8(sink.finish().unwrap()).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(
            lines[0],
            "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,c_a,c_b"
        );
        // Reading 1 is the second above in a row, so it raises (k = 2).
        let d2 = m.score(&[20.0, 5.0]).unwrap().d2;
        assert!(lines[2].starts_with(&format!("1,{d2},{:08x},above,1,0,raised,a,", d2.to_bits())));
        assert!(lines[3].starts_with("2,,,fault,1,1,fault,,,"));
        // The printed decimal reads back to the same bits.
        let printed: f32 = lines[1].split(',').nth(1).unwrap().parse().unwrap();
        assert_eq!(printed.to_bits(), d2.to_bits());
    }

    /// A nearest-mode bank of two modes over 2 raw features, window 3 with differences (M = 4),
    /// drift on with a small bound, as the core's encoder writes it. Test data only.
    fn bank_blob(select: ellipsoid_core::ModeSelect) -> Vec<u8> {
        use ellipsoid_core::{BankParams, DriftSpec, ModeParams, WindowSpec};
        let mode = |centre: [f32; 2], alarm: f32| ModeParams::<4> {
            offset: [centre[0], centre[1], 0.0, 0.0],
            scale: [2.0, 1.0, 1.0, 4.0],
            mean: [0.0; 4],
            w: [
                [1.0, 0.0, 0.0, 0.0],
                [-0.5, 1.2, 0.0, 0.0],
                [0.0, 0.0, 1.0, 0.0],
                [0.1, 0.0, 0.0, 0.9],
            ],
            thresholds: Thresholds {
                alarm,
                clear: 0.5 * alarm,
            },
        };
        let modes = [mode([10.0, 5.0], 9.0), mode([20.0, 8.0], 12.0)];
        let p = BankParams::<2, 4> {
            meta: Default::default(),
            log_mask: 0,
            select,
            modes: &modes,
            window: WindowSpec {
                length: 3,
                differences: true,
            },
            drift: Some(DriftSpec {
                rate: 0.2,
                bound: [0.3, 0.3, 1.0, 1.0],
            }),
            policy: AlarmPolicy {
                raise_after: 2,
                clear_after: 2,
                latch: false,
            },
            names_digest: blob::names_digest(["a", "b"]),
        };
        let mut buf = vec![0u8; blob::max_bank_len(2, 4, 2, true)];
        let len = blob::encode_bank(&p, &mut buf).unwrap();
        buf.truncate(len);
        buf
    }

    /// Readings that visit both modes, drop out once, and creep slowly upwards in mode 0 (so
    /// that the drift reaches its bound).
    fn bank_readings() -> Vec<[f32; 2]> {
        let mut r = vec![
            [10.0, 5.0],
            [10.2, 5.1],
            [9.9, 4.9],
            [10.1, 5.0],
            [f32::NAN, 5.0],
            [10.0, 5.0],
            [10.0, 5.0],
            [10.0, 5.0],
            [20.0, 8.0],
            [20.1, 8.0],
            [20.0, 7.9],
            [20.0, 8.1],
            [30.0, 1.0],
            [30.0, 1.0],
            [30.0, 1.0],
            [10.0, 5.0],
        ];
        for i in 0..60 {
            r.push([10.0 + 0.02 * i as f32, 5.0 + 0.005 * i as f32]);
        }
        r
    }

    #[test]
    fn a_bank_replays_bit_for_bit_as_a_direct_tracker_loop() {
        use ellipsoid_core::{ModeSelect, Tracker};
        let bytes = bank_blob(ModeSelect::Nearest);
        let mut rp = Replayer::from_blob(&bytes).unwrap();
        assert!(rp.is_bank());
        assert_eq!(rp.scored_len(), 4);
        let mut direct = Tracker::<2, 4>::from_blob(&bytes).unwrap();
        let (mut modes_seen, mut faults, mut drift_events) = ([false; 2], 0, 0);
        for (i, x) in bank_readings().iter().enumerate() {
            let row = rp.step(x);
            let want = direct.step_explained(x, None);
            match (&row.score, &want.score) {
                (Ok(a), Ok(b)) => {
                    assert_eq!(a.d2.to_bits(), b.d2.to_bits(), "reading {i}");
                    assert_eq!(a.verdict, b.verdict, "reading {i}");
                    assert_eq!(row.mode, Some(b.mode), "reading {i}");
                    modes_seen[usize::from(b.mode)] = true;
                }
                (Err(a), Err(b)) => {
                    assert_eq!(a, b, "reading {i}");
                    assert_eq!(row.mode, None);
                    faults += 1;
                }
                other => panic!("reading {i}: replay and core disagree: {other:?}"),
            }
            let bits = |c: &Option<Vec<f32>>| {
                c.as_ref()
                    .map(|c| c.iter().map(|v| v.to_bits()).collect::<Vec<_>>())
            };
            assert_eq!(
                bits(&row.contributions),
                bits(&want.contributions.map(|c| c.to_vec())),
                "reading {i}"
            );
            assert_eq!(
                (row.alarm, row.fault),
                (want.step.alarm, want.step.fault),
                "reading {i}"
            );
            let kinds: Vec<EventKind> = want.step.events.iter().map(|e| e.kind).collect();
            assert_eq!(row.events, kinds, "reading {i}");
            assert_eq!(row.drift_at_bound, want.drift_at_bound, "reading {i}");
            drift_events += kinds
                .iter()
                .filter(|k| matches!(k, EventKind::Drift { .. }))
                .count();
            assert_eq!(
                rp.shift()
                    .unwrap()
                    .iter()
                    .map(|v| v.to_bits())
                    .collect::<Vec<_>>(),
                direct
                    .shift()
                    .iter()
                    .map(|v| v.to_bits())
                    .collect::<Vec<_>>(),
                "reading {i}"
            );
        }
        // The stream exercised what it is for: both modes, window faults, the drift's bound.
        assert_eq!(modes_seen, [true, true]);
        // Two to fill the window at the start (need 3), the NaN and two after it, and the change
        // from mode 0 to 1 restarts nothing in a nearest bank.
        assert!(faults >= 5, "{faults} faults");
        assert_eq!(drift_events, 1);
        assert!(rp.shift().unwrap().iter().any(|v| *v != 0.0));
    }

    #[test]
    fn a_single_model_blob_through_the_tracker_is_the_model_path_bit_for_bit() {
        let m = model();
        let mut buf = [0u8; blob::max_len(2)];
        let len = blob::encode(m.params(), &mut buf).unwrap();
        let mut tracked = Replayer::from_blob(&buf[..len]).unwrap();
        assert!(!tracked.is_bank());
        let mut single = Replayer::new(&m);
        let mut scored = 0;
        for x in [
            [10.0f32, 5.0],
            [20.0, 5.0],
            [21.0, 4.0],
            [f32::NAN, 5.0],
            [22.0, 5.5],
            [22.5, 5.5],
            [-1.0, f32::INFINITY],
            [10.1, 5.0],
            [10.0, 5.1],
            [10.0, 5.0],
        ] {
            let (a, b) = (tracked.step(&x), single.step(&x));
            assert_eq!(a.d2().map(f32::to_bits), b.d2().map(f32::to_bits));
            assert_eq!(a, b);
            scored += usize::from(a.d2().is_some());
        }
        assert_eq!(scored, 8);
        // And the CSV is the single model's layout, with no bank columns.
        let names = vec!["a".to_string(), "b".to_string()];
        let sink = CsvSink::for_replayer(Vec::new(), &names, &tracked).unwrap();
        let text = String::from_utf8(sink.finish().unwrap()).unwrap();
        assert_eq!(
            text.trim_end(),
            "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,c_a,c_b"
        );
    }

    #[test]
    fn a_bank_csv_has_mode_drift_and_the_window_fill_as_faults() {
        let bytes = bank_blob(ellipsoid_core::ModeSelect::Nearest);
        let mut rp = Replayer::from_blob(&bytes).unwrap();
        let names = vec!["a".to_string(), "b".to_string()];
        let mut sink = CsvSink::for_replayer(Vec::new(), &names, &rp).unwrap();
        for x in bank_readings() {
            let r = rp.step(&x);
            sink.row(&r).unwrap();
        }
        let text = String::from_utf8(sink.finish().unwrap()).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(
            lines[0],
            "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,mode,drift_at_bound,\
             c_a,c_b,c_Δa,c_Δb"
        );
        // The window of 3 is not whole for the first two readings: faults, the device's own,
        // and one fault event for the filling (its count of readings missing falls, the cause
        // stays the same).
        assert!(
            lines[1].starts_with("0,,,fault,0,1,fault,,,0,"),
            "{}",
            lines[1]
        );
        assert!(lines[2].starts_with("1,,,fault,0,1,,,,0,"), "{}", lines[2]);
        assert!(lines[3].starts_with("2,"), "{}", lines[3]);
        assert!(
            lines[3].contains(",below,0,0,fault-cleared,,0,0,"),
            "{}",
            lines[3]
        );
        // The dropout at reading 4, then two more readings to fill the window again.
        for l in &lines[5..8] {
            assert!(l.contains(",fault,0,1,"), "{l}");
        }
        assert!(!lines[8].contains(",fault,"), "{}", lines[8]);
        // Mode 1 scores the second duty point.
        assert!(lines
            .iter()
            .any(|l| l.contains(",1,0,") && l.contains(",below,")));
        // The drift event, once, and the flag from there on.
        let at = lines
            .iter()
            .position(|l| l.contains(",drift,") || l.contains("+drift,"))
            .unwrap();
        assert!(lines[at..].iter().all(|l| l.split(',').nth(9) == Some("1")));
        assert!(lines[1..at]
            .iter()
            .all(|l| l.split(',').nth(9) == Some("0")));
    }
}
