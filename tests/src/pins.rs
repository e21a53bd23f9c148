//! Pinned scores: a model blob, a fixed set of readings and the exact bits of the d² each must
//! score (or the fault it must be), in a small text file (`tests/golden/*.pins`).
//!
//! The host test `tests/tests/golden_scores.rs` checks that the core reproduces every pin, and
//! `firmware-example/e2e.sh` (through `node-tool pins-load` and `pins-compare`) that the device
//! in the emulator does. A change of the summation order, of the fold, or of anything else that
//! moves one bit of one d² fails both.
//!
//! # The file
//!
//! ```text
//! # comment lines start with '#'; so does a comment at the end of a line
//! blob 454c5344...             the model blob, hex
//! r 0 41480000 40452ce4 d2=40800000   # reading 0: N f32 bit patterns, then the pinned d² bits
//! r 1 7fc00000 40452ce4 fault=not-finite:0
//! ```
//!
//! A fault is named as the device names it (`not-finite:I`, `log-domain:I`, `overflow`).

use ellipsoid_core::ReadingFault;

/// What a reading must give.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Expect {
    /// Scored, with these d² bits.
    D2(u32),
    /// Not scored: this fault, by name.
    Fault(String),
}

impl std::fmt::Display for Expect {
    /// As in the file: `d2=` and 8 hex digits, or `fault=` and the fault's name.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Expect::D2(b) => write!(f, "d2={b:08x}"),
            Expect::Fault(name) => write!(f, "fault={name}"),
        }
    }
}

/// One pinned reading.
#[derive(Clone, Debug, PartialEq)]
pub struct Pin {
    /// Its index, counted from 0 in file order.
    pub index: usize,
    /// The reading, in raw units.
    pub x: Vec<f32>,
    /// What it must give.
    pub expect: Expect,
}

/// A parsed pins file.
#[derive(Clone, Debug, PartialEq)]
pub struct Pins {
    /// The model blob.
    pub blob: Vec<u8>,
    /// The readings, in file order.
    pub pins: Vec<Pin>,
}

/// The name of a fault in a pins file and in the device's report (`cause=`).
pub fn fault_name(f: &ReadingFault) -> String {
    match f {
        ReadingFault::NotFinite { feature } => format!("not-finite:{feature}"),
        ReadingFault::LogDomain { feature } => format!("log-domain:{feature}"),
        ReadingFault::Overflow => "overflow".to_string(),
        other => format!("{other:?}"),
    }
}

fn hex32(w: &str, what: &str, ln: usize) -> Result<u32, String> {
    if w.len() != 8 {
        return Err(format!("line {ln}: {what} {w:?} is not 8 hex digits"));
    }
    u32::from_str_radix(w, 16).map_err(|e| format!("line {ln}: {what} {w:?}: {e}"))
}

/// Parse a pins file. `n` is the number of features a reading must have. Errors name the line.
pub fn parse(text: &str, n: usize) -> Result<Pins, String> {
    let mut blob = None;
    let mut pins = Vec::new();
    for (k, raw) in text.lines().enumerate() {
        let ln = k + 1;
        let line = raw.split('#').next().unwrap_or("").trim();
        if line.is_empty() {
            continue;
        }
        let mut words = line.split_whitespace();
        match words.next() {
            Some("blob") => {
                let hex = words
                    .next()
                    .ok_or(format!("line {ln}: blob without bytes"))?;
                if hex.len() % 2 != 0 {
                    return Err(format!("line {ln}: blob has an odd number of hex digits"));
                }
                let bytes = (0..hex.len())
                    .step_by(2)
                    .map(|i| u8::from_str_radix(&hex[i..i + 2], 16))
                    .collect::<Result<Vec<u8>, _>>()
                    .map_err(|e| format!("line {ln}: blob: {e}"))?;
                if blob.replace(bytes).is_some() {
                    return Err(format!("line {ln}: a second blob line"));
                }
            }
            Some("r") => {
                let index: usize = words
                    .next()
                    .and_then(|w| w.parse().ok())
                    .ok_or(format!("line {ln}: no reading index"))?;
                if index != pins.len() {
                    return Err(format!(
                        "line {ln}: reading index {index}, expected {}",
                        pins.len()
                    ));
                }
                let rest: Vec<&str> = words.collect();
                if rest.len() != n + 1 {
                    return Err(format!(
                        "line {ln}: {} words after the index, expected {n} values and one result",
                        rest.len()
                    ));
                }
                let x = rest[..n]
                    .iter()
                    .enumerate()
                    .map(|(i, w)| hex32(w, &format!("x[{i}]"), ln).map(f32::from_bits))
                    .collect::<Result<Vec<f32>, _>>()?;
                let result = rest[n];
                let expect = if let Some(b) = result.strip_prefix("d2=") {
                    Expect::D2(hex32(b, "d2", ln)?)
                } else if let Some(f) = result.strip_prefix("fault=") {
                    let known = f == "overflow"
                        || ["not-finite:", "log-domain:"]
                            .iter()
                            .any(|k| f.strip_prefix(k).is_some_and(|i| i.parse::<u8>().is_ok()));
                    if !known {
                        return Err(format!("line {ln}: unknown fault {f:?}"));
                    }
                    Expect::Fault(f.to_string())
                } else {
                    return Err(format!(
                        "line {ln}: result {result:?} is neither d2= nor fault="
                    ));
                };
                pins.push(Pin { index, x, expect });
            }
            Some(other) => return Err(format!("line {ln}: unknown line kind {other:?}")),
            None => {}
        }
    }
    let blob = blob.ok_or("no blob line")?;
    if pins.is_empty() {
        return Err("no readings".to_string());
    }
    Ok(Pins { blob, pins })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_and_refuses_with_the_line() {
        let ok = "# x\nblob 0102\nr 0 3f800000 00000000 d2=3f800000 # 1 0\nr 1 7fc00000 3f800000 fault=not-finite:0\n";
        let p = parse(ok, 2).unwrap();
        assert_eq!(p.blob, [1, 2]);
        assert_eq!(p.pins[0].x, [1.0, 0.0]);
        assert_eq!(p.pins[0].expect, Expect::D2(0x3f80_0000));
        assert_eq!(p.pins[1].expect, Expect::Fault("not-finite:0".into()));
        assert_eq!(p.pins[0].expect.to_string(), "d2=3f800000");
        assert_eq!(p.pins[1].expect.to_string(), "fault=not-finite:0");
        assert!(p.pins[1].x[0].is_nan());
        let e = parse("blob 01\nr 0 3f800000 d2=3f800000\n", 2).unwrap_err();
        assert!(e.starts_with("line 2:"), "{e}");
        let e = parse("blob 01\nr 1 3f800000 00000000 d2=3f800000\n", 2).unwrap_err();
        assert!(e.contains("index 1, expected 0"), "{e}");
        let e = parse("blob 01\nr 0 3f800000 00000000 fault=odd\n", 2).unwrap_err();
        assert!(e.contains("unknown fault"), "{e}");
        assert!(parse("r 0 3f800000 00000000 d2=3f800000\n", 2).is_err());
    }
}
