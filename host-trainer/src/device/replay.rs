//! Every reading through the core's own `f32` scoring and alarm state machine.
//!
//! Nothing here computes a score: [`Replayer::step`] hands the reading to the core's
//! `Model::score` and `Model::explain` (through [`AnyModel`]) and the result to the core's
//! `AlarmMachine`. What the workstation shows is what the device computes.

use std::io::Write;

use anyhow::Result;
use ellipsoid_core::{AlarmMachine, EventKind, ReadingFault, Scored, Verdict};

use crate::device::dims::AnyModel;

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
    /// Per-feature contributions to d² (scored readings only).
    pub contributions: Option<Vec<f32>>,
    /// The feature with the largest contribution, as the core picks it (scored readings only).
    pub top: Option<usize>,
    /// Alarm line after this reading.
    pub alarm: bool,
    /// Fault line after this reading.
    pub fault: bool,
    /// Events on this reading.
    pub events: Vec<EventKind>,
}

impl ReplayRow {
    /// d², if the reading was scored.
    pub fn d2(&self) -> Option<f32> {
        self.score.as_ref().ok().map(|s| s.d2)
    }

    /// Whether the verdict was "above the threshold".
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

/// Feeds readings through a model and its alarm state machine.
pub struct Replayer<'m> {
    model: &'m dyn AnyModel,
    alarm: AlarmMachine,
    next: u64,
}

impl<'m> Replayer<'m> {
    /// A replayer with the model's own thresholds and policy.
    pub fn new(model: &'m dyn AnyModel) -> Self {
        let p = model.params();
        Self {
            model,
            alarm: AlarmMachine::new(p.thresholds, p.policy),
            next: 0,
        }
    }

    /// Score one reading (already in model feature order) and advance the alarm state machine.
    pub fn step(&mut self, x: &[f32]) -> ReplayRow {
        let score = self.model.score(x);
        let (contributions, top) = match score.as_ref().ok().and(self.model.explain(x).ok()) {
            Some((_, c, top)) => (Some(c), Some(top)),
            None => (None, None),
        };
        let step = self.alarm.update(&score);
        let index = self.next;
        self.next += 1;
        ReplayRow {
            index,
            score,
            contributions,
            top,
            alarm: step.alarm,
            fault: step.fault,
            events: step.events.iter().map(|e| e.kind).collect(),
        }
    }
}

/// Writes replay rows as CSV: `index,d2,d2_bits,verdict,alarm,fault,event,top_feature,c_<feature>…`.
///
/// `d2` is printed with the shortest decimal that reads back to the same `f32`; `d2_bits` is its
/// bit pattern in 8 hex digits. Both are empty on a fault row, whose verdict is `fault`.
pub struct CsvSink<W: Write> {
    out: csv::Writer<W>,
    features: Vec<String>,
}

impl<W: Write> CsvSink<W> {
    /// Write the header.
    pub fn new(w: W, features: &[String]) -> Result<Self> {
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
        header.extend(features.iter().map(|f| format!("c_{f}")));
        out.write_record(&header)?;
        Ok(Self {
            out,
            features: features.to_vec(),
        })
    }

    /// Write one row.
    pub fn row(&mut self, r: &ReplayRow) -> Result<()> {
        let mut rec: Vec<String> = Vec::with_capacity(8 + self.features.len());
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
}
