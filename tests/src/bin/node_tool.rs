//! `node-tool`: the host side of the firmware's emulator end-to-end check.
//!
//! `firmware-example/e2e.sh` calls it to turn the demo's readings into the table the emulator
//! loads, to damage blobs for the slot tests, to compare the device's report with
//! `ellipsoid replay`, to look for panic machinery on the image's decode and score paths, and to
//! write the figures into the firmware's README. Every check that fails ends with a non-zero status.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt::Write as _;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{anyhow, bail, ensure, Context, Result};
use clap::{Parser, Subcommand};
use ellipsoid_firmware_example::source::table_header;

#[derive(Parser)]
#[command(about = "Host side of the Ellipsoid firmware's emulator end-to-end check")]
struct Cli {
    #[command(subcommand)]
    command: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Convert a readings CSV to the table the firmware reads (empty cell = NaN).
    Table {
        /// The readings CSV.
        #[arg(long)]
        input: PathBuf,
        /// The model blob; its card names the feature columns, in model order.
        #[arg(long)]
        model: PathBuf,
        /// The table to write.
        #[arg(long)]
        out: PathBuf,
        /// A column of the CSV that holds the machine's mode for each reading (an integer; empty
        /// for none): the table then carries it with every reading (magic `ERTM`), for a
        /// known-mode bank.
        #[arg(long)]
        mode_column: Option<String>,
    },
    /// Damage a blob the way a slot can be damaged.
    Damage {
        /// A valid blob.
        #[arg(long)]
        input: PathBuf,
        /// `flip`: one bit in the body flipped; `torn`: the second half never written (0xFF).
        #[arg(long)]
        mode: String,
        /// The damaged blob to write.
        #[arg(long)]
        out: PathBuf,
    },
    /// Write a slot image as a programmer leaves it on erased flash: the blob (optionally with
    /// another sequence number, or with feature 0's scale multiplied, resealed with a new CRC),
    /// 0xFF up to a multiple of 4 bytes, and the confirmation word (erased, or the mark).
    SlotImage {
        /// A valid blob of the demo's dimension (N = 5).
        #[arg(long)]
        input: PathBuf,
        /// A new sequence number.
        #[arg(long)]
        sequence: Option<u32>,
        /// Multiply feature 0's scale by this (1e30: a unit error that overflows every d²).
        #[arg(long)]
        scale0_times: Option<f32>,
        /// Write the confirmation mark after the blob (else the word stays erased).
        #[arg(long)]
        confirmed: bool,
        /// The slot image to write.
        #[arg(long)]
        out: PathBuf,
    },
    /// Check a run that fell back: the first model faulted on every reading up to the fall-back,
    /// which the device reported, and from the next reading on its d² bits are those of the replay
    /// of the model it fell back to.
    Fallback {
        /// The device's semihosting output.
        #[arg(long)]
        device: PathBuf,
        /// The replay of the model fallen back to.
        #[arg(long)]
        replay: PathBuf,
        /// The slot fallen back from, and to.
        #[arg(long)]
        from: String,
        /// The slot fallen back to.
        #[arg(long)]
        to: String,
        /// Readings of the probation (the firmware's PROBATION_READINGS).
        #[arg(long)]
        probation: u32,
    },
    /// Compare the device's report with `ellipsoid replay` of the same readings.
    Compare {
        /// The device's semihosting output.
        #[arg(long)]
        device: PathBuf,
        /// The CSV `ellipsoid replay` wrote.
        #[arg(long)]
        replay: PathBuf,
        /// The readings CSV (for the feature names).
        #[arg(long)]
        readings: PathBuf,
        /// Columns of the readings CSV that are not features.
        #[arg(long, value_delimiter = ',', default_value = "timestamp,label")]
        skip: Vec<String>,
        /// The slot the device must have used.
        #[arg(long, default_value = "A")]
        slot: String,
        /// A slot the device must have reported as unusable.
        #[arg(long)]
        unusable: Option<String>,
    },
    /// Run the core's `Tracker` on a reading table (as `table` writes it, modes included) and
    /// write what the device must report, in the columns of `ellipsoid replay` for a bank.
    Track {
        /// The blob (version 1 or 2).
        #[arg(long)]
        model: PathBuf,
        /// The reading table.
        #[arg(long)]
        table: PathBuf,
        /// The raw feature names, in model order (for `top_feature`).
        #[arg(long, value_delimiter = ',')]
        features: Vec<String>,
        /// The CSV to write.
        #[arg(long)]
        out: PathBuf,
    },
    /// Check a run with no valid slot: fault on, alarm off, nothing scored.
    NoModel {
        /// The device's semihosting output.
        #[arg(long)]
        device: PathBuf,
    },
    /// Look for panic machinery on the paths from the given functions, in a release image.
    Reach {
        /// The image (ELF).
        #[arg(long)]
        elf: PathBuf,
        /// Roots: functions whose demangled name ends with one of these.
        #[arg(long, value_delimiter = ',')]
        roots: Vec<String>,
        /// A self-test: plant a call to `core::panicking::panic` after the last instruction of
        /// the first function whose name ends with this (inside its size, before any padding), in
        /// the disassembly only. The check must then fail.
        #[arg(long)]
        plant_panic_in: Option<String>,
    },
    /// Write the blob and the reading table of a pinned-scores file (tests/golden/*.pins).
    PinsLoad {
        /// The pins file.
        #[arg(long)]
        pins: PathBuf,
        /// The blob to write.
        #[arg(long)]
        blob: PathBuf,
        /// The reading table to write.
        #[arg(long)]
        table: PathBuf,
    },
    /// Compare the device's d² bits and faults with a pinned-scores file.
    PinsCompare {
        /// The pins file.
        #[arg(long)]
        pins: PathBuf,
        /// The device's semihosting output.
        #[arg(long)]
        device: PathBuf,
    },
    /// Flash per function group of a node image: the bytes of every function reachable from each
    /// group's out-of-line entry (`arm-none-eabi-nm -S` sizes, the calls of `objdump -d`).
    FlashGroups {
        /// The node image.
        #[arg(long)]
        elf: PathBuf,
        /// Where to write the `flash ...` lines.
        #[arg(long)]
        out: PathBuf,
    },
    /// Write the "Firmware figures" section of the README from measured data.
    Figures {
        /// The node image for the Cortex-M4F.
        #[arg(long)]
        elf: PathBuf,
        /// The same image built for the Cortex-M0+.
        #[arg(long)]
        elf_m0: PathBuf,
        /// Output of the `score-cost` image in the emulator.
        #[arg(long)]
        cost: PathBuf,
        /// The device's output of the end-to-end run.
        #[arg(long)]
        device: PathBuf,
        /// What `compare` printed.
        #[arg(long)]
        compared: PathBuf,
        /// What `reach` printed.
        #[arg(long)]
        reach: PathBuf,
        /// The README to update between its figure markers.
        #[arg(long)]
        readme: PathBuf,
        /// What `flash-groups` wrote (the flash-resident model's figures are written when given).
        #[arg(long)]
        flash_groups: Option<PathBuf>,
    },
    /// Write the Cortex-M0 (micro:bit) figures of the README from measured data.
    FiguresM0 {
        /// The node image for the micro:bit.
        #[arg(long)]
        elf: PathBuf,
        /// Output of the micro:bit `score-cost` image in the emulator.
        #[arg(long)]
        cost: PathBuf,
        /// Output of the Cortex-M4F `score-cost` image, for the ratio.
        #[arg(long)]
        cost_m4: PathBuf,
        /// The micro:bit's output of the end-to-end run with the demo in slot A.
        #[arg(long)]
        device: PathBuf,
        /// What the M0 checks printed.
        #[arg(long)]
        compared: PathBuf,
        /// What `reach` printed for the M0 image.
        #[arg(long)]
        reach: PathBuf,
        /// The README to update between its M0 figure markers.
        #[arg(long)]
        readme: PathBuf,
    },
}

fn main() -> Result<()> {
    match Cli::parse().command {
        Cmd::Table {
            input,
            model,
            out,
            mode_column,
        } => table(&input, &model, &out, mode_column.as_deref()),
        Cmd::Damage { input, mode, out } => damage(&input, &mode, &out),
        Cmd::Compare {
            device,
            replay,
            readings,
            skip,
            slot,
            unusable,
        } => compare(
            &device,
            &replay,
            &readings,
            &skip,
            &slot,
            unusable.as_deref(),
        ),
        Cmd::NoModel { device } => no_model(&device),
        Cmd::Track {
            model,
            table,
            features,
            out,
        } => track(&model, &table, &features, &out),
        Cmd::SlotImage {
            input,
            sequence,
            scale0_times,
            confirmed,
            out,
        } => slot_image(&input, sequence, scale0_times, confirmed, &out),
        Cmd::Fallback {
            device,
            replay,
            from,
            to,
            probation,
        } => fallback(&device, &replay, &from, &to, probation),
        Cmd::PinsLoad { pins, blob, table } => pins_load(&pins, &blob, &table),
        Cmd::PinsCompare { pins, device } => pins_compare(&pins, &device),
        Cmd::Reach {
            elf,
            roots,
            plant_panic_in,
        } => reach(&elf, &roots, plant_panic_in.as_deref()),
        Cmd::Figures {
            elf,
            elf_m0,
            cost,
            device,
            compared,
            reach,
            readme,
            flash_groups,
        } => figures(
            &elf,
            &elf_m0,
            &cost,
            &device,
            &compared,
            &reach,
            &readme,
            flash_groups.as_deref(),
        ),
        Cmd::FiguresM0 {
            elf,
            cost,
            cost_m4,
            device,
            compared,
            reach,
            readme,
        } => figures_m0(&M0Inputs {
            elf: &elf,
            cost: &cost,
            cost_m4: &cost_m4,
            device: &device,
            compared: &compared,
            reach: &reach,
            readme: &readme,
        }),
        Cmd::FlashGroups { elf, out } => flash_groups(&elf, &out),
    }
}

/// Write `bytes` to a temporary file beside `path`, then rename it into place.
fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let name = path
        .file_name()
        .ok_or_else(|| anyhow!("{}: not a file path", path.display()))?;
    let tmp = path.with_file_name(format!(".{}.tmp", name.to_string_lossy()));
    fs::write(&tmp, bytes).with_context(|| format!("writing {}", tmp.display()))?;
    fs::rename(&tmp, path).with_context(|| format!("renaming into {}", path.display()))
}

fn read_text(path: &Path) -> Result<String> {
    fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))
}

/// The feature columns of a readings CSV: (names, column indices).
fn feature_columns(path: &Path, skip: &[String]) -> Result<(Vec<String>, Vec<usize>)> {
    let mut rdr =
        csv::Reader::from_path(path).with_context(|| format!("opening {}", path.display()))?;
    let headers = rdr
        .headers()
        .with_context(|| format!("{}: line 1: reading the header", path.display()))?;
    let mut names = Vec::new();
    let mut cols = Vec::new();
    for (i, h) in headers.iter().enumerate() {
        if !skip.iter().any(|s| s == h) {
            names.push(h.to_string());
            cols.push(i);
        }
    }
    ensure!(
        !names.is_empty(),
        "{}: line 1: no feature columns",
        path.display()
    );
    Ok((names, cols))
}

fn table(input: &Path, model: &Path, out: &Path, mode_column: Option<&str>) -> Result<()> {
    use ellipsoid_firmware_example::source::{table_header_modes, NO_MODE};
    // Read the CSV exactly as `ellipsoid replay` does: the trainer's reader, columns matched to the
    // model card's feature names, and the trainer's one f64 → f32 conversion, so the device is fed
    // the very bits the replay scored.
    let blob = std::fs::read(model).with_context(|| format!("cannot read {}", model.display()))?;
    let card = ellipsoid_trainer::data::card::ModelCard::read_for(model, &blob)?;
    let names = card.features;
    let mut columns = names.clone();
    if let Some(m) = mode_column {
        ensure!(
            !names.iter().any(|n| n == m),
            "{}: the mode column {m:?} is one of the model's features",
            model.display()
        );
        columns.push(m.to_string());
    }
    let opts = ellipsoid_trainer::data::ingest::CsvOptions {
        columns: Some(columns),
        allow_missing: true,
        quiet: true,
        ..Default::default()
    };
    let mut reader = ellipsoid_trainer::data::ingest::Reader::open(input, &opts)?;
    let mut body = Vec::new();
    let mut count = 0u32;
    let mut given = 0u32;
    while let Some(row) = reader.next_row()? {
        let (features, mode) = row.values.split_at(names.len());
        for v in features {
            body.extend_from_slice(&ellipsoid_trainer::device::replay::to_device(*v).to_le_bytes());
        }
        if let (Some(name), Some(&m)) = (mode_column, mode.first()) {
            let word = if m.is_nan() {
                NO_MODE
            } else {
                ensure!(
                    m.fract() == 0.0 && (0.0..255.0).contains(&m),
                    "{}: line {}: field {name}: {m} is not a mode (an integer 0 to 254, or empty)",
                    input.display(),
                    row.line
                );
                given += 1;
                m as u32
            };
            body.extend_from_slice(&word.to_le_bytes());
        }
        count += 1;
    }
    let header = if mode_column.is_some() {
        table_header_modes(names.len() as u32, count)
    } else {
        table_header(names.len() as u32, count)
    };
    let mut bytes = header.to_vec();
    bytes.extend_from_slice(&body);
    write_atomic(out, &bytes)?;
    let modes = mode_column.map_or(String::new(), |m| {
        format!(", each with its mode from column {m} ({given} given)")
    });
    println!(
        "table: {count} readings of {} features{modes} -> {}",
        names.len(),
        out.display()
    );
    Ok(())
}

fn damage(input: &Path, mode: &str, out: &Path) -> Result<()> {
    let mut b = fs::read(input).with_context(|| format!("reading {}", input.display()))?;
    let h = ellipsoid_core::blob::Header::parse(&b)
        .map_err(|e| anyhow!("{}: not a blob: {e}", input.display()))?;
    ensure!(
        h.len == b.len(),
        "{}: blob length {} but file has {}",
        input.display(),
        h.len,
        b.len()
    );
    match mode {
        "flip" => {
            let at =
                ellipsoid_core::blob::HEADER_LEN + (h.len - ellipsoid_core::blob::HEADER_LEN) / 2;
            b[at] ^= 0x04;
        }
        "torn" => b[h.len / 2..].fill(0xFF),
        other => bail!("unknown damage mode {other:?} (flip or torn)"),
    }
    write_atomic(out, &b)?;
    println!("damage: {mode} {} -> {}", input.display(), out.display());
    Ok(())
}

fn slot_image(
    input: &Path,
    sequence: Option<u32>,
    scale0_times: Option<f32>,
    confirmed: bool,
    out: &Path,
) -> Result<()> {
    use ellipsoid_core::blob;
    use ellipsoid_firmware_example::slots::{mark_offset, CONFIRM_MARK};
    let bytes = fs::read(input).with_context(|| format!("reading {}", input.display()))?;
    let mut p = blob::decode::<5>(&bytes)
        .map_err(|e| anyhow!("{}: not a valid N = 5 blob: {e}", input.display()))?;
    if let Some(s) = sequence {
        p.meta.sequence = s;
    }
    if let Some(k) = scale0_times {
        p.preprocess.scale[0] *= k;
    }
    let mut buf = vec![0xFF; blob::max_len(5) + 8];
    let len = blob::encode(&p, &mut buf)
        .map_err(|e| anyhow!("{}: cannot re-encode: {e:?}", input.display()))?;
    let at = mark_offset(len);
    buf.truncate(at + 4);
    if confirmed {
        buf[at..].copy_from_slice(&CONFIRM_MARK.to_le_bytes());
    }
    write_atomic(out, &buf)?;
    println!(
        "slot-image: {} -> {} (sequence {}, {} bytes of blob, mark {})",
        input.display(),
        out.display(),
        p.meta.sequence,
        len,
        if confirmed { "confirmed" } else { "erased" }
    );
    Ok(())
}

fn fallback(device: &Path, replay: &Path, from: &str, to: &str, probation: u32) -> Result<()> {
    let dev = parse_device(device)?;
    let rep = parse_replay(replay)?;
    ensure!(
        has_line(
            &dev,
            &format!("probation slot={from} readings={probation} fallback={to}")
        ),
        "{}: no probation of slot {from} with fall-back {to}",
        device.display()
    );
    let last = probation - 1;
    ensure!(
        has_line(&dev, &format!("fallback from={from} at={last}: ")),
        "{}: no fall-back from {from} after reading {last}",
        device.display()
    );
    ensure!(
        has_line(&dev, &format!("model slot={to} "))
            && dev
                .lines
                .iter()
                .any(|l| l.starts_with(&format!("model slot={to} ")) && l.ends_with(" fallback=1")),
        "{}: no model line for slot {to} after the fall-back",
        device.display()
    );
    ensure!(
        !has_line(&dev, "probation passed"),
        "{}: the probation passed, yet the node fell back",
        device.display()
    );
    let (before, after): (Vec<&Row>, Vec<&Row>) = dev.rows.iter().partition(|r| r.index <= last);
    ensure!(
        before.len() == probation as usize && before.iter().all(|r| r.fault && r.d2_bits.is_none()),
        "{}: slot {from} did not fault on each of readings 0..={last}",
        device.display()
    );
    ensure!(
        !after.is_empty(),
        "{}: nothing scored after the fall-back",
        device.display()
    );
    let mut same = 0;
    for r in &after {
        let Some(e) = rep.iter().find(|e| e.index == r.index) else {
            bail!(
                "{}: reading {} is not in {}",
                device.display(),
                r.index,
                replay.display()
            );
        };
        ensure!(
            e.d2_bits == r.d2_bits,
            "MISMATCH reading {}: d2 bits device {:?}, replay {:?}",
            r.index,
            r.d2_bits,
            e.d2_bits
        );
        same += usize::from(r.d2_bits.is_some());
    }
    println!(
        "fallback: slot {from} (unconfirmed) faulted on all {probation} readings of its probation; the \
         node fell back to {to}, reported it, and scored readings {}..{} with d2 bit-identical to replay \
         ({same} scored)",
        last + 1,
        after.last().map_or(last, |r| r.index)
    );
    Ok(())
}

/// One scored or faulted reading, as either side reports it.
#[derive(Debug, PartialEq)]
struct Row {
    index: u32,
    d2_bits: Option<u32>,
    verdict: String,
    alarm: bool,
    fault: bool,
    events: String,
    top: Option<String>,
    /// The device's `cause=` of a fault (the replay has none).
    cause: Option<String>,
    /// The bank's mode the reading was scored against (`None`: no bank, or not scored).
    mode: Option<u8>,
    /// Whether the drift shift had reached its bound after the reading (`None`: no bank).
    drift: Option<bool>,
}

/// A mode as either side writes it: a number, or `-` / empty for none.
fn mode_field(v: Option<&str>, line: usize) -> Result<Option<u8>> {
    match v.map(str::trim) {
        None | Some("") | Some("-") => Ok(None),
        Some(m) => m
            .parse()
            .map(Some)
            .with_context(|| format!("line {line}: mode {m:?} is not a mode number")),
    }
}

/// The drift-at-bound flag as either side writes it: `0`/`1` (or `false`/`true`), empty for none.
fn drift_field(v: Option<&str>, line: usize) -> Result<Option<bool>> {
    match v.map(str::trim) {
        None | Some("") | Some("-") => Ok(None),
        Some("0") | Some("false") => Ok(Some(false)),
        Some("1") | Some("true") => Ok(Some(true)),
        Some(other) => bail!("line {line}: drift flag {other:?}, not 0 or 1"),
    }
}

fn kv<'a>(line: &'a str, key: &str) -> Option<&'a str> {
    line.split(' ')
        .find_map(|w| w.strip_prefix(key).and_then(|r| r.strip_prefix('=')))
}

fn flag(v: Option<&str>, what: &str, line: usize) -> Result<bool> {
    match v {
        Some("0") => Ok(false),
        Some("1") => Ok(true),
        other => bail!("line {line}: {what} is {other:?}, not 0 or 1"),
    }
}

struct Device {
    rows: Vec<Row>,
    /// (line, reading index or None for boot, active) per pin name.
    pins: BTreeMap<String, Vec<(Option<u32>, bool)>>,
    lines: Vec<String>,
}

fn parse_device(path: &Path) -> Result<Device> {
    let text = read_text(path)?;
    let mut dev = Device {
        rows: Vec::new(),
        pins: BTreeMap::new(),
        lines: text.lines().map(str::to_string).collect(),
    };
    for (k, line) in text.lines().enumerate() {
        let ln = k + 1;
        let ctx = || format!("{}: line {ln}: {line:?}", path.display());
        if line.starts_with("panic") {
            bail!("{}: the device panicked", ctx());
        }
        if let Some(rest) = line.strip_prefix("r ") {
            let index: u32 = rest
                .split(' ')
                .next()
                .and_then(|w| w.parse().ok())
                .ok_or_else(|| anyhow!("{}: no reading index", ctx()))?;
            let d2 = kv(line, "d2").ok_or_else(|| anyhow!("{}: no d2", ctx()))?;
            let d2_bits = if d2 == "-" {
                None
            } else {
                Some(u32::from_str_radix(d2, 16).with_context(ctx)?)
            };
            let ev = kv(line, "event").unwrap_or("-");
            dev.rows.push(Row {
                index,
                d2_bits,
                verdict: kv(line, "v").unwrap_or("").to_string(),
                alarm: flag(kv(line, "alarm"), "alarm", ln).with_context(ctx)?,
                fault: flag(kv(line, "fault"), "fault", ln).with_context(ctx)?,
                events: if ev == "-" {
                    String::new()
                } else {
                    ev.to_string()
                },
                top: kv(line, "top").map(str::to_string),
                cause: kv(line, "cause").map(str::to_string),
                mode: mode_field(kv(line, "mode"), ln).with_context(ctx)?,
                drift: drift_field(kv(line, "drift"), ln).with_context(ctx)?,
            });
        } else if let Some(rest) = line.strip_prefix("pin ") {
            let mut w = rest.split(' ');
            let name = w.next().unwrap_or("").to_string();
            let active = match w.next() {
                Some("on") => true,
                Some("off") => false,
                other => bail!("{}: pin state {other:?}", ctx()),
            };
            let at = match kv(line, "at") {
                Some("boot") => None,
                Some(i) => Some(i.parse().with_context(ctx)?),
                None => bail!("{}: pin change without at=", ctx()),
            };
            dev.pins.entry(name).or_default().push((at, active));
        }
    }
    Ok(dev)
}

fn has_line(dev: &Device, prefix: &str) -> bool {
    dev.lines.iter().any(|l| l.starts_with(prefix))
}

fn parse_replay(path: &Path) -> Result<Vec<Row>> {
    let mut rdr =
        csv::Reader::from_path(path).with_context(|| format!("opening {}", path.display()))?;
    let h = rdr.headers()?.clone();
    let col = |name: &str| {
        h.iter()
            .position(|c| c == name)
            .ok_or_else(|| anyhow!("{}: line 1: no column {name}", path.display()))
    };
    let (ci, cb, cv, ca, cf, ce, ct) = (
        col("index")?,
        col("d2_bits")?,
        col("verdict")?,
        col("alarm")?,
        col("fault")?,
        col("event")?,
        col("top_feature")?,
    );
    // A bank's replay (issue 10) adds the mode and the drift flag; a single model's may not.
    let (cm, cd) = (
        h.iter().position(|c| c == "mode"),
        h.iter().position(|c| c == "drift_at_bound"),
    );
    let mut rows = Vec::new();
    for (k, rec) in rdr.records().enumerate() {
        let ln = k + 2;
        let rec = rec.with_context(|| format!("{}: line {ln}", path.display()))?;
        let get = |c: usize| rec.get(c).unwrap_or("").trim();
        let field = |c: usize, name: &str| -> Result<bool> {
            flag(Some(get(c)), name, ln)
                .with_context(|| format!("{}: field {name}", path.display()))
        };
        let bits = get(cb);
        rows.push(Row {
            index: get(ci)
                .parse()
                .with_context(|| format!("{}: line {ln}: field index", path.display()))?,
            d2_bits: if bits.is_empty() {
                None
            } else {
                Some(
                    u32::from_str_radix(bits, 16)
                        .with_context(|| format!("{}: line {ln}: field d2_bits", path.display()))?,
                )
            },
            verdict: get(cv).to_string(),
            alarm: field(ca, "alarm")?,
            fault: field(cf, "fault")?,
            events: get(ce).to_string(),
            top: Some(get(ct).to_string()).filter(|s| !s.is_empty()),
            cause: None,
            mode: mode_field(cm.map(get), ln)
                .with_context(|| format!("{}: field mode", path.display()))?,
            drift: drift_field(cd.map(get), ln)
                .with_context(|| format!("{}: field drift_at_bound", path.display()))?,
        });
    }
    Ok(rows)
}

fn compare(
    device: &Path,
    replay: &Path,
    readings: &Path,
    skip: &[String],
    slot: &str,
    unusable: Option<&str>,
) -> Result<()> {
    let (names, _) = feature_columns(readings, skip)?;
    let dev = parse_device(device)?;
    let rep = parse_replay(replay)?;
    ensure!(
        has_line(&dev, &format!("model slot={slot} ")),
        "{}: the device did not use slot {slot}",
        device.display()
    );
    if let Some(u) = unusable {
        ensure!(
            has_line(&dev, &format!("slot {u} unusable")),
            "{}: the device did not report slot {u} as unusable",
            device.display()
        );
    }
    ensure!(
        has_line(&dev, "end "),
        "{}: the run did not finish",
        device.display()
    );
    ensure!(
        dev.rows.len() == rep.len(),
        "the device reported {} readings, the replay {}",
        dev.rows.len(),
        rep.len()
    );
    ensure!(!rep.is_empty(), "{}: no readings", replay.display());
    let mut mismatches = Vec::new();
    let (mut bits_equal, mut tops, mut banked, mut drift_at_bound) =
        (0usize, 0usize, 0usize, 0usize);
    let mut modes_seen = BTreeSet::new();
    for (k, (d, r)) in dev.rows.iter().zip(&rep).enumerate() {
        let mut why = Vec::new();
        if d.index != k as u32 || r.index != k as u32 {
            why.push(format!("index device {} replay {}", d.index, r.index));
        }
        if d.d2_bits != r.d2_bits {
            why.push(format!(
                "d2 bits device {:08x?} replay {:08x?}",
                d.d2_bits, r.d2_bits
            ));
        } else if d.d2_bits.is_some() {
            bits_equal += 1;
        }
        if (d.verdict.as_str(), d.alarm, d.fault, d.events.as_str())
            != (r.verdict.as_str(), r.alarm, r.fault, r.events.as_str())
        {
            why.push(format!(
                "timeline device {}/{}/{}/{:?} replay {}/{}/{}/{:?}",
                d.verdict,
                d.alarm as u8,
                d.fault as u8,
                d.events,
                r.verdict,
                r.alarm as u8,
                r.fault as u8,
                r.events
            ));
        }
        // A bank's log carries the mode and the drift flag on every reading, and they must be
        // the replay's. A single model's log carries neither: its replay may say mode 0 (the one
        // model) and no drift, nothing else.
        if d.drift.is_some() {
            banked += 1;
            if (d.mode, d.drift) != (r.mode, r.drift) {
                why.push(format!(
                    "mode/drift device {:?}/{:?} replay {:?}/{:?}",
                    d.mode, d.drift, r.mode, r.drift
                ));
            }
            modes_seen.insert(d.mode);
            drift_at_bound += usize::from(d.drift == Some(true));
        } else if d.mode.is_some() || r.mode.is_some_and(|m| m != 0) || r.drift == Some(true) {
            why.push(format!(
                "mode/drift device {:?}/{:?} (no bank) replay {:?}/{:?}",
                d.mode, d.drift, r.mode, r.drift
            ));
        }
        if let Some(t) = &d.top {
            tops += 1;
            let i: usize = t.parse().with_context(|| format!("device top={t}"))?;
            // A bank with differences: index N + j is feature j's first difference.
            let diff = i
                .checked_sub(names.len())
                .and_then(|j| names.get(j))
                .map(|f| format!("diff_{f}"));
            let name = names
                .get(i)
                .cloned()
                .or(diff)
                .ok_or_else(|| anyhow!("device top={t}: no such feature"))?;
            let name = &name;
            let same =
                r.top.as_deref() == Some(name.as_str()) || r.top.as_deref() == Some(t.as_str());
            if !same {
                why.push(format!("top feature device {name} replay {:?}", r.top));
            }
        }
        if !why.is_empty() {
            mismatches.push(format!("reading {k}: {}", why.join("; ")));
        }
    }
    // Every pin change must be where the replay's line level changes, and nowhere else.
    let alarm_of: fn(&Row) -> bool = |r| r.alarm;
    let fault_of: fn(&Row) -> bool = |r| r.fault;
    for (pin, level_of) in [("alarm", alarm_of), ("fault", fault_of)] {
        let mut expected = vec![(None, false)];
        let mut prev = false;
        for r in &rep {
            let now = level_of(r);
            if now != prev {
                expected.push((Some(r.index), now));
            }
            prev = now;
        }
        let got = dev.pins.get(pin).cloned().unwrap_or_default();
        if got != expected {
            mismatches.push(format!(
                "pin {pin}: device changed it {} times, the replay's timeline {} times (first difference at {:?})",
                got.len(),
                expected.len(),
                got.iter().zip(&expected).position(|(a, b)| a != b)
            ));
        }
    }
    let last = rep
        .last()
        .map_or(0, |r| u8::from(r.alarm) | u8::from(r.fault) << 1);
    let leds = dev
        .lines
        .iter()
        .find_map(|l| l.strip_prefix("leds="))
        .ok_or_else(|| anyhow!("{}: no leds= line", device.display()))?;
    if u8::from_str_radix(leds, 2).ok() != Some(last) {
        mismatches.push(format!(
            "LED register {leds} at the end, the replay's last levels {last:02b}"
        ));
    }
    if !mismatches.is_empty() {
        for m in mismatches.iter().take(20) {
            eprintln!("MISMATCH {m}");
        }
        bail!(
            "{} mismatches between the device and the replay",
            mismatches.len()
        );
    }
    let raised = rep.iter().filter(|r| r.events.contains("raised")).count();
    let faults = rep.iter().filter(|r| r.verdict == "fault").count();
    let bank = if banked > 0 {
        let modes: Vec<String> = modes_seen
            .iter()
            .map(|m| m.map_or("-".to_string(), |m| m.to_string()))
            .collect();
        let drift_events = rep
            .iter()
            .filter(|r| r.events.split('+').any(|e| e == "drift"))
            .count();
        format!(
            ", mode identical on all {banked} (modes seen {}), drift flag identical ({drift_at_bound} readings at \
             the bound, {drift_events} drift events)",
            modes.join(" ")
        )
    } else {
        String::new()
    };
    println!(
        "compare: slot {slot}: {} readings, d2 bit-identical on all {bits_equal} scored, {faults} faults, \
         {raised} alarms raised ({tops} with the same top feature){bank}, pin changes and final LED levels identical",
        rep.len()
    );
    Ok(())
}

/// The rows of a reading table file (`table`'s output): readings and modes.
fn read_table<const N: usize>(path: &Path) -> Result<Vec<([f32; N], Option<u8>)>> {
    use ellipsoid_firmware_example::source::{ReadingSource, Table};
    let bytes = fs::read(path).with_context(|| format!("reading {}", path.display()))?;
    let mut t = Table::<N>::new(&bytes).map_err(|e| anyhow!("{}: {e}", path.display()))?;
    let mut rows = Vec::new();
    while let Some(r) = t.next_with_mode() {
        rows.push(r);
    }
    Ok(rows)
}

fn track(model: &Path, table: &Path, features: &[String], out: &Path) -> Result<()> {
    let bytes = fs::read(model).with_context(|| format!("reading {}", model.display()))?;
    let h = ellipsoid_core::blob::Header::parse(&bytes)
        .map_err(|e| anyhow!("{}: not a blob: {e}", model.display()))?;
    ensure!(
        h.n == 5 && features.len() == 5,
        "{}: track runs N = 5 models with 5 feature names (N = {}, {} names)",
        model.display(),
        h.n,
        features.len()
    );
    let rows = read_table::<5>(table)?;
    let text = match ellipsoid_core::track::Tracker::<5, 5>::from_blob(&bytes) {
        Ok(t) => track_rows(t, &rows, features)?,
        Err(_) => {
            let t = ellipsoid_core::track::Tracker::<5, 10>::from_blob(&bytes)
                .map_err(|e| anyhow!("{}: {e}", model.display()))?;
            track_rows(t, &rows, features)?
        }
    };
    write_atomic(out, text.as_bytes())?;
    println!(
        "track: {} readings through the core's Tracker -> {}",
        rows.len(),
        out.display()
    );
    Ok(())
}

/// The replay CSV of a tracker over `rows` (`top_feature` on a raise, by `Explained::top`).
fn track_rows<const N: usize, const M: usize>(
    mut t: ellipsoid_core::track::Tracker<'_, N, M>,
    rows: &[([f32; N], Option<u8>)],
    features: &[String],
) -> Result<String> {
    use ellipsoid_core::{EventKind, Explained, Scored};
    let mut names = features.to_vec();
    if M == 2 * N {
        names.extend(features.iter().map(|f| format!("diff_{f}")));
    }
    let mut s = String::from(
        "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,mode,drift_at_bound\n",
    );
    for (i, (x, mode)) in rows.iter().enumerate() {
        let step = t.step_explained(x, *mode);
        let raised = step.step.events.iter().any(|e| e.kind == EventKind::Raised);
        let events: Vec<&str> = step.step.events.iter().map(|e| e.kind.name()).collect();
        let (d2, bits, verdict, k, top) = match (&step.score, step.contributions) {
            (Ok(b), c) => {
                let top = c.filter(|_| raised).map(|contributions| {
                    let e = Explained {
                        score: Scored {
                            d2: b.d2,
                            verdict: b.verdict,
                        },
                        contributions,
                    };
                    names.get(e.top().0).cloned().unwrap_or_default()
                });
                let v = if b.verdict == ellipsoid_core::Verdict::Above {
                    "above"
                } else {
                    "below"
                };
                (
                    format!("{}", b.d2),
                    format!("{:08x}", b.d2.to_bits()),
                    v,
                    b.mode.to_string(),
                    top.unwrap_or_default(),
                )
            }
            (Err(_), _) => Default::default(),
        };
        let verdict = if step.score.is_err() {
            "fault"
        } else {
            verdict
        };
        writeln!(
            s,
            "{i},{d2},{bits},{verdict},{},{},{},{top},{k},{}",
            u8::from(step.step.alarm),
            u8::from(step.step.fault),
            events.join("+"),
            u8::from(step.drift_at_bound)
        )?;
    }
    Ok(s)
}

fn no_model(device: &Path) -> Result<()> {
    let dev = parse_device(device)?;
    let d = device.display();
    ensure!(
        has_line(&dev, "model none"),
        "{d}: the device found a model"
    );
    ensure!(
        dev.rows.is_empty(),
        "{d}: the device scored {} readings without a model",
        dev.rows.len()
    );
    ensure!(has_line(&dev, "not scoring"), "{d}: no 'not scoring' line");
    ensure!(
        dev.pins.get("fault").map(Vec::as_slice) == Some(&[(None, true)]),
        "{d}: the fault line was not raised at boot: {:?}",
        dev.pins.get("fault")
    );
    ensure!(
        dev.pins.get("alarm").map(Vec::as_slice) == Some(&[(None, false)]),
        "{d}: the alarm line was not held off: {:?}",
        dev.pins.get("alarm")
    );
    ensure!(
        dev.lines.iter().any(|l| l == "leds=10"),
        "{d}: LED register is not fault on, alarm off"
    );
    let unusable = dev
        .lines
        .iter()
        .filter(|l| l.starts_with("slot ") && l.contains(" unusable"))
        .count();
    ensure!(
        unusable == 2,
        "{d}: {unusable} slots reported unusable, expected 2"
    );
    println!("no-model: both slots reported unusable, fault line on, alarm off, nothing scored");
    Ok(())
}

/// A pinned-scores file, with the dimension its blob states.
fn read_pins(path: &Path) -> Result<(usize, ellipsoid_tests::pins::Pins)> {
    let text = read_text(path)?;
    let blob_hex = text
        .lines()
        .find_map(|l| l.strip_prefix("blob "))
        .ok_or_else(|| anyhow!("{}: no blob line", path.display()))?;
    let n = usize::from_str_radix(blob_hex.get(10..12).unwrap_or("zz"), 16)
        .with_context(|| format!("{}: the blob line has no header", path.display()))?;
    let pins =
        ellipsoid_tests::pins::parse(&text, n).map_err(|e| anyhow!("{}: {e}", path.display()))?;
    Ok((n, pins))
}

fn pins_load(path: &Path, blob: &Path, table: &Path) -> Result<()> {
    let (n, pins) = read_pins(path)?;
    let mut bytes = table_header(n as u32, pins.pins.len() as u32).to_vec();
    for p in &pins.pins {
        for v in &p.x {
            bytes.extend_from_slice(&v.to_bits().to_le_bytes());
        }
    }
    write_atomic(blob, &pins.blob)?;
    write_atomic(table, &bytes)?;
    println!(
        "pins-load: {} readings of {n} features from {} -> {}, {}",
        pins.pins.len(),
        path.display(),
        blob.display(),
        table.display()
    );
    Ok(())
}

fn pins_compare(path: &Path, device: &Path) -> Result<()> {
    use ellipsoid_tests::pins::Expect;
    let (_, pins) = read_pins(path)?;
    let dev = parse_device(device)?;
    let d = device.display();
    ensure!(
        has_line(&dev, "model slot=A "),
        "{d}: the device did not use slot A"
    );
    ensure!(has_line(&dev, "end "), "{d}: the run did not finish");
    ensure!(
        dev.rows.len() == pins.pins.len(),
        "{d}: the device reported {} readings, {} pins {}",
        dev.rows.len(),
        path.display(),
        pins.pins.len()
    );
    let mut wrong = Vec::new();
    let (mut bits, mut faults) = (0usize, 0usize);
    for (row, pin) in dev.rows.iter().zip(&pins.pins) {
        let got = match (&row.d2_bits, &row.cause) {
            (Some(b), _) => Expect::D2(*b),
            (None, Some(c)) => Expect::Fault(c.clone()),
            (None, None) => Expect::Fault("(no cause)".to_string()),
        };
        if row.index as usize != pin.index || got != pin.expect {
            wrong.push(format!(
                "reading {}: pinned {}, device reading {} {got}",
                pin.index, pin.expect, row.index
            ));
        } else if matches!(got, Expect::D2(_)) {
            bits += 1;
        } else {
            faults += 1;
        }
        if row.fault != matches!(pin.expect, Expect::Fault(_)) {
            wrong.push(format!(
                "reading {}: fault line {} for {}",
                pin.index, row.fault as u8, pin.expect
            ));
        }
    }
    if !wrong.is_empty() {
        for w in &wrong {
            eprintln!("MISMATCH {w}");
        }
        bail!(
            "{} mismatches between the device and {}",
            wrong.len(),
            path.display()
        );
    }
    println!(
        "pins-compare: {}: d2 bits as pinned on all {bits} scored readings, the pinned fault on all {faults} others",
        path.display()
    );
    Ok(())
}

fn run_tool(tool: &str, args: &[&str]) -> Result<String> {
    let out = Command::new(tool)
        .args(args)
        .output()
        .with_context(|| format!("running {tool} (install binutils-arm-none-eabi)"))?;
    ensure!(
        out.status.success(),
        "{tool} {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    Ok(String::from_utf8_lossy(&out.stdout).into_owned())
}

/// Names that mean a panic can happen: the panic entry points, the handler, and the
/// `*_fail` / `unwrap_failed` helpers of bounds and option checks.
fn is_panic_machinery(name: &str) -> bool {
    name.contains("panic") || name.contains("rust_begin_unwind") || name.contains("_fail")
}

/// What the paths from some functions reach, in a disassembly.
#[derive(Debug)]
struct Reach {
    roots: usize,
    seen: BTreeSet<String>,
    panics: Vec<String>,
    indirect: Vec<String>,
}

/// The start address and name of a function header line of the disassembly
/// (`00001000 <name>:`).
fn func_header(line: &str) -> Option<(u64, &str)> {
    let (addr, name) = line.strip_suffix(">:")?.split_once(" <")?;
    Some((u64::from_str_radix(addr.trim(), 16).ok()?, name))
}

/// The address of an instruction line of the disassembly (`    1000:\tpush\t{r7, lr}`).
fn insn_addr(line: &str) -> Option<u64> {
    let (addr, _) = line.split_once(':')?;
    u64::from_str_radix(addr.trim(), 16).ok()
}

/// Function sizes by start address, from the symbol table (`arm-none-eabi-nm -S`): code symbols
/// only, the largest of aliases at one address.
fn parse_sizes(nm: &str) -> BTreeMap<u64, u64> {
    let mut m = BTreeMap::new();
    for line in nm.lines() {
        let mut w = line.split_whitespace();
        let (Some(addr), Some(size), Some(kind)) = (w.next(), w.next(), w.next()) else {
            continue;
        };
        if !matches!(kind, "t" | "T" | "W" | "w") {
            continue;
        }
        let (Ok(addr), Ok(size)) = (u64::from_str_radix(addr, 16), u64::from_str_radix(size, 16))
        else {
            continue;
        };
        let e = m.entry(addr & !1).or_insert(0);
        *e = (*e).max(size);
    }
    m
}

/// Follow direct calls and branches (`bl`, `b`, `b.w`, `cbz`...) from the functions whose name ends
/// with one of `roots`, in the text of `arm-none-eabi-objdump -d -C --no-show-raw-insn`.
///
/// `sizes` gives each function's size by its start address (from the symbol table). Bytes after
/// a function's end and before the next symbol are padding, not code: on thumbv6m the compiler's
/// built-ins are padded with `0xd4d4`, which objdump decodes as a `bmi.n` into whatever lies
/// before, and following it would reach functions no call reaches. Instructions at or past a
/// function's end are skipped; a function with no known size is read to the next header.
fn analyse(dis: &str, sizes: &BTreeMap<u64, u64>, roots: &[String]) -> Result<Reach> {
    // Function name -> (direct call or branch targets, whether it makes an indirect call).
    let mut funcs: BTreeMap<String, (BTreeSet<String>, bool)> = BTreeMap::new();
    let mut cur: Option<(String, Option<u64>)> = None;
    for line in dis.lines() {
        if let Some((start, name)) = func_header(line) {
            let end = sizes.get(&start).filter(|s| **s > 0).map(|s| start + s);
            cur = Some((name.to_string(), end));
            funcs.entry(name.to_string()).or_default();
            continue;
        }
        let Some((f, end)) = &cur else { continue };
        let mut parts = line.split('\t').map(str::trim);
        let (Some(_addr), Some(op)) = (parts.next(), parts.next()) else {
            continue;
        };
        if let (Some(end), Some(at)) = (end, insn_addr(line)) {
            if at >= *end {
                continue; // padding after the function
            }
        }
        let args = parts.next().unwrap_or("");
        let entry = funcs.entry(f.clone()).or_default();
        let mnemonic = op.split('.').next().unwrap_or(op);
        if (mnemonic == "blx" && !args.contains('<')) || (mnemonic == "bx" && args != "lr") {
            entry.1 = true;
        }
        if mnemonic.starts_with('b') || mnemonic.starts_with("cb") {
            if let Some(t) = args.split_once('<').and_then(|(_, t)| t.strip_suffix('>')) {
                let target = t.split('+').next().unwrap_or(t).to_string();
                if &target != f {
                    entry.0.insert(target);
                }
            }
        }
    }
    let mut stack: Vec<String> = Vec::new();
    for r in roots {
        let found: Vec<_> = funcs
            .keys()
            .filter(|k| k.ends_with(r.as_str()))
            .cloned()
            .collect();
        ensure!(!found.is_empty(), "no function named *{r}: was it inlined?");
        stack.extend(found);
    }
    let n_roots = stack.len();
    let mut seen = BTreeSet::new();
    while let Some(f) = stack.pop() {
        if seen.insert(f.clone()) {
            if let Some((targets, _)) = funcs.get(&f) {
                stack.extend(targets.iter().cloned());
            }
        }
    }
    let panics = seen
        .iter()
        .filter(|f| is_panic_machinery(f))
        .cloned()
        .collect();
    let indirect = seen
        .iter()
        .filter(|f| funcs.get(*f).is_some_and(|e| e.1))
        .cloned()
        .collect();
    Ok(Reach {
        roots: n_roots,
        seen,
        panics,
        indirect,
    })
}

/// The disassembly with a call to `core::panicking::panic` planted after the last instruction
/// inside the first function whose name ends with `func` (inside its size, so before any padding).
fn plant_panic(dis: &str, sizes: &BTreeMap<u64, u64>, func: &str) -> Result<String> {
    let lines: Vec<&str> = dis.lines().collect();
    let (head, start) = lines
        .iter()
        .enumerate()
        .find_map(|(i, l)| {
            func_header(l)
                .filter(|(_, n)| n.ends_with(func))
                .map(|(a, _)| (i, a))
        })
        .ok_or_else(|| anyhow!("no function named *{func} to plant a panic in"))?;
    let end = sizes
        .get(&start)
        .copied()
        .filter(|s| *s > 0)
        .map(|s| start + s);
    let mut last = None;
    for (i, l) in lines.iter().enumerate().skip(head + 1) {
        if func_header(l).is_some() {
            break;
        }
        if let Some(at) = insn_addr(l) {
            if end.is_none_or(|e| at < e) {
                last = Some((i, at));
            }
        }
    }
    let (i, at) = last.ok_or_else(|| anyhow!("*{func} has no instructions"))?;
    let mut out = String::new();
    for (k, l) in lines.iter().enumerate() {
        writeln!(out, "{l}")?;
        if k == i {
            writeln!(out, "{at:8x}:\tbl\t0 <core::panicking::panic>")?;
        }
    }
    Ok(out)
}

fn reach(elf: &Path, roots: &[String], plant: Option<&str>) -> Result<()> {
    let elf_s = elf.to_string_lossy();
    let mut dis = run_tool(
        "arm-none-eabi-objdump",
        &["-d", "-C", "--no-show-raw-insn", &elf_s],
    )?;
    let sizes = parse_sizes(&run_tool(
        "arm-none-eabi-nm",
        &["-S", "--defined-only", &elf_s],
    )?);
    if let Some(func) = plant {
        dis = plant_panic(&dis, &sizes, func)?;
    }
    let r = analyse(&dis, &sizes, roots).with_context(|| format!("{}", elf.display()))?;
    ensure!(
        r.panics.is_empty(),
        "panic machinery reachable from {roots:?} in {}: {:?}",
        elf.display(),
        r.panics
    );
    ensure!(
        r.indirect.is_empty(),
        "indirect calls on the paths from {roots:?} in {} (cannot be followed): {:?}",
        elf.display(),
        r.indirect
    );
    let in_image = dis
        .lines()
        .filter_map(|l| {
            l.strip_suffix(">:")
                .and_then(|l| l.split_once(" <"))
                .map(|(_, n)| n)
        })
        .filter(|n| is_panic_machinery(n))
        .count();
    println!(
        "reach: {} functions reachable from {} roots ({}), none of them panic machinery, no indirect calls \
         (panic functions in the whole image: {in_image})",
        r.seen.len(),
        r.roots,
        roots.join(", ")
    );
    Ok(())
}

/// Sizes of `.text`, `.rodata`, `.data`, `.bss` (the vector table counted with `.text`).
fn sections(elf: &Path) -> Result<BTreeMap<String, u64>> {
    let out = run_tool("arm-none-eabi-size", &["-A", &elf.to_string_lossy()])?;
    let mut m = BTreeMap::new();
    for line in out.lines() {
        let mut w = line.split_whitespace();
        if let (Some(name), Some(size)) = (w.next(), w.next().and_then(|s| s.parse::<u64>().ok())) {
            let key = if name == ".vector_table" {
                ".text"
            } else {
                name
            };
            *m.entry(key.to_string()).or_insert(0) += size;
        }
    }
    Ok(m)
}

/// The crates the core brings into an image.
const CORE_CRATES: [&str; 6] = [
    "ellipsoid_core",
    "postcard",
    "serde",
    "crc",
    "heapless",
    "libm",
];
/// The firmware's out-of-line wrappers whose bodies are the core's decode, score and explain.
const CORE_WRAPPERS: [&str; 3] = [
    "ellipsoid_firmware_example::slots::load",
    "ellipsoid_firmware_example::node::score",
    "ellipsoid_firmware_example::node::explain",
];

fn is_core_symbol(name: &str) -> bool {
    let n = name.trim_start_matches('<');
    CORE_CRATES.iter().any(|c| n.starts_with(&format!("{c}::")))
        || CORE_WRAPPERS.iter().any(|w| n.starts_with(w))
}

fn core_share(elf: &Path) -> Result<BTreeMap<&'static str, u64>> {
    let out = run_tool(
        "arm-none-eabi-nm",
        &["-S", "-C", "--size-sort", &elf.to_string_lossy()],
    )?;
    let mut m = BTreeMap::new();
    for line in out.lines() {
        let mut w = line.splitn(4, ' ');
        let (_, Some(size), Some(kind), Some(name)) = (w.next(), w.next(), w.next(), w.next())
        else {
            continue;
        };
        let Ok(size) = u64::from_str_radix(size, 16) else {
            continue;
        };
        let section = match kind {
            "t" | "T" => ".text",
            "r" | "R" => ".rodata",
            "d" | "D" => ".data",
            "b" | "B" => ".bss",
            _ => continue,
        };
        if is_core_symbol(name) {
            *m.entry(section).or_insert(0) += size;
        }
    }
    Ok(m)
}

/// The function groups of a node image: a name, and the out-of-line entries whose reachable code
/// is the group.
const GROUPS: [(&str, &[&str]); 4] = [
    ("decode and validate", &["slots::load"]),
    ("score", &["node::score"]),
    ("explain", &["node::explain"]),
    ("alarm", &["node::alarm_update"]),
];

/// Sum of `nm -S` sizes by demangled name (all the symbols of one name, if there are several).
fn symbol_sizes(elf: &Path) -> Result<BTreeMap<String, u64>> {
    let out = run_tool(
        "arm-none-eabi-nm",
        &["-S", "-C", "--size-sort", &elf.to_string_lossy()],
    )?;
    let mut m = BTreeMap::new();
    for line in out.lines() {
        let mut w = line.splitn(4, ' ');
        let (_, Some(size), Some(kind), Some(name)) = (w.next(), w.next(), w.next(), w.next())
        else {
            continue;
        };
        if !matches!(kind, "t" | "T" | "r" | "R") {
            continue;
        }
        if let Ok(size) = u64::from_str_radix(size, 16) {
            *m.entry(name.to_string()).or_insert(0) += size;
        }
    }
    Ok(m)
}

fn flash_groups(elf: &Path, out: &Path) -> Result<()> {
    let dis = run_tool(
        "arm-none-eabi-objdump",
        &["-d", "-C", "--no-show-raw-insn", &elf.to_string_lossy()],
    )?;
    let addr_sizes = parse_sizes(&run_tool(
        "arm-none-eabi-nm",
        &["-S", "--defined-only", &elf.to_string_lossy()],
    )?);
    let sizes = symbol_sizes(elf)?;
    let bytes = |fs: &BTreeSet<String>| -> u64 { fs.iter().filter_map(|f| sizes.get(f)).sum() };
    let mut text = String::new();
    let mut sets = BTreeMap::new();
    for (name, roots) in GROUPS {
        let roots: Vec<String> = roots.iter().map(|r| r.to_string()).collect();
        let r = analyse(&dis, &addr_sizes, &roots).with_context(|| format!("{}", elf.display()))?;
        let mut biggest: Vec<_> = r
            .seen
            .iter()
            .map(|f| (sizes.get(f).copied().unwrap_or(0), f.as_str()))
            .collect();
        biggest.sort_by(|a, b| b.cmp(a));
        let top: Vec<String> = biggest
            .iter()
            .take(4)
            .map(|(b, f)| format!("{f}:{b}"))
            .collect();
        writeln!(
            text,
            "flash group={} bytes={} functions={} largest={}",
            name.replace(' ', "_"),
            bytes(&r.seen),
            r.seen.len(),
            top.join(",")
        )?;
        sets.insert(name, r.seen);
    }
    let union: BTreeSet<String> = ["decode and validate", "score", "alarm"]
        .iter()
        .filter_map(|g| sets.get(g))
        .flatten()
        .cloned()
        .collect();
    writeln!(
        text,
        "flash union=decode+score+alarm bytes={} functions={}",
        bytes(&union),
        union.len()
    )?;
    print!("{text}");
    write_atomic(out, text.as_bytes())
}

/// The flash-resident model's figures: RAM and cost of the three forms, the boot stack, flash per
/// function group.
fn core_flash_figures(s: &mut String, cost: &str, dev: &str, groups: &str) -> Result<()> {
    let boot = dev
        .lines()
        .find_map(|l| l.strip_prefix("stack boot_peak_bytes="))
        .ok_or_else(|| anyhow!("the device log has no boot stack line"))?;
    writeln!(s, "**The model in RAM, three forms** (`score-cost`; RAM is `core::mem::size_of` on the device, pinned at")?;
    writeln!(s, "compile time in `core/src/flash.rs`). The node keeps the flash-resident `FlashModel`: a checked view of the")?;
    writeln!(s, "blob in its slot, which folds `V = W·diag(scale)` from the blob's bytes at every score. `CompactModel` keeps")?;
    writeln!(s, "the folded triangle in RAM for speed; `Model` is the full decoded form. All three give the same d² bits")?;
    writeln!(
        s,
        "(checked on the device by `score-cost` and on the host by the pinned scores).\n"
    )?;
    writeln!(
        s,
        "| N | form | RAM, bytes | instructions per score | per floor op |"
    )?;
    writeln!(s, "|---|---|---|---|---|")?;
    for line in cost.lines() {
        let (form, rest) = match line.split_once(' ') {
            Some(("cost", r)) => ("`CompactModel`", r),
            Some(("cost_flash", r)) => ("`FlashModel` (the node's)", r),
            Some(("cost_model", r)) => ("`Model`", r),
            _ => continue,
        };
        let get = |k: &str| kv(rest, k).ok_or_else(|| anyhow!("no {k}= in {line:?}"));
        writeln!(
            s,
            "| {} | {form} | {} | {} | {} |",
            get("n")?,
            get("ram_bytes")?,
            get("instr_per_score")?,
            get("instr_per_op")?
        )?;
    }
    writeln!(s)?;
    writeln!(s, "**Boot stack** (painted before the slots are checked, read after the node is up): **{boot} bytes** at")?;
    writeln!(s, "N = 5, against 2 552 bytes when boot decoded a `Model<5>` and moved it by value (measured the same way on")?;
    writeln!(s, "the code before the flash-resident model). A stack overflow faults instead of corrupting memory: the stack")?;
    writeln!(s, "is at the bottom of RAM with an MPU guard below it (`boards/mps2_an386/memory.x`); the `stack-guard` image")?;
    writeln!(s, "recurses until it hits the guard, and the run must end in the HardFault handler's report.\n")?;
    writeln!(s, "**Flash per function group**, N = 8 image (`ELLIPSOID_NODE_N=8`): the bytes of every function reachable")?;
    writeln!(s, "from the group's out-of-line entry (`arm-none-eabi-nm -S` sizes, calls from `objdump -d`); a function")?;
    writeln!(s, "two groups share counts in both, once in the union. Target: decode + score + alarm ≤ 4 096 bytes.\n")?;
    writeln!(s, "| group | entry | bytes | functions | largest |")?;
    writeln!(s, "|---|---|---|---|---|")?;
    for line in groups.lines() {
        if let Some(rest) = line.strip_prefix("flash group=") {
            let name = rest.split(' ').next().unwrap_or("");
            let entry = GROUPS
                .iter()
                .find(|(g, _)| g.replace(' ', "_") == name)
                .map(|(_, r)| r.join(", "))
                .unwrap_or_default();
            let largest = kv(rest, "largest").unwrap_or("").replace(',', ", ");
            writeln!(
                s,
                "| {} | `{entry}` | {} | {} | {largest} |",
                name.replace('_', " "),
                kv(rest, "bytes").unwrap_or("?"),
                kv(rest, "functions").unwrap_or("?"),
            )?;
        }
        if let Some(rest) = line.strip_prefix("flash union=") {
            let bytes: u64 = kv(rest, "bytes").unwrap_or("0").parse()?;
            writeln!(
                s,
                "| **decode + score + alarm** | | **{bytes}** | {} | target ≤ 4 096: {} |",
                kv(rest, "functions").unwrap_or("?"),
                if bytes <= 4096 {
                    "met".to_string()
                } else {
                    format!("missed by {} bytes (see below)", bytes - 4096)
                }
            )?;
        }
    }
    writeln!(s)?;
    writeln!(s, "Where the bytes go, and what was cut: `node::score` is the score loop fully unrolled by the compiler at")?;
    writeln!(s, "`opt-level = 3` (both the plain and the log-feature preprocessing are in it); `slots::load` is the header,")?;
    writeln!(s, "CRC, varint and rule checks inlined together. Two cuts were made while this was measured: the CRC is")?;
    writeln!(s, "computed bitwise (its 1 KiB table is gone; a blob is checked once, at boot), and boot no longer computes")?;
    writeln!(s, "the log-normaliser, whose `f64` logarithm pulled software double-precision and libm into the decode path.")?;
    writeln!(s, "No formatting or panic code is reachable from these entries (the `reach` check below); the `Display` impls")?;
    writeln!(s, "are only used by the console report. The rest of the gap is the unrolled score and the inlined checks.\n")?;
    Ok(())
}

/// The largest blob a 16 KiB model slot holds: the blob, padded to a multiple of 4 bytes, then
/// the 4-byte confirmation word (`slots::mark_offset`).
const SLOT_BYTES: usize = 16 * 1024;

fn fits_slot(blob_len: usize) -> bool {
    ellipsoid_firmware_example::slots::mark_offset(blob_len) + 4 <= SLOT_BYTES
}

/// The model bank's figures: cost per score for K = 1, 2, 4 at N = 8 and 16 (the `cost_bank`
/// lines of `score-cost`), a single model on the node's path against the tracker (`cost_v1`),
/// the tracker's RAM, and blob sizes per K and N with which fit a 16 KiB slot.
fn bank_figures(s: &mut String, cost: &str) -> Result<()> {
    let banks: Vec<&str> = cost
        .lines()
        .filter(|l| l.starts_with("cost_bank "))
        .collect();
    if banks.is_empty() {
        return Ok(());
    }
    let get = |line: &str, k: &str| -> Result<String> {
        kv(line, k)
            .map(str::to_string)
            .ok_or_else(|| anyhow!("no {k}= in {line:?}"))
    };
    writeln!(s, "**Model banks** (format version 2; `score-cost`, Cortex-M4F). Each bank has K modes of random")?;
    writeln!(s, "models of M scored values and the nearest-mode rule, so every score computes all K d²; the readings stay")?;
    writeln!(s, "close to mode 0, so the alarm stays quiet and drift (rate 0.01, bound 3) follows on every step. `Tracker::step`")?;
    writeln!(s, "is the core's whole step (window, K scores, alarm machine, drift); the node's `node::track` adds the test for")?;
    writeln!(s, "a raise (a reading that raises is split per feature for `top` by `Tracker::top_last`, from the last scored")?;
    writeln!(s, "vector the tracker keeps, with no copy of it); `step_explained` splits every reading (in `f64`), which is what")?;
    writeln!(
        s,
        "splitting only on a raise avoids. The bound of the issue,"
    )?;
    writeln!(s, "K·M(M+1)/2 multiply-adds, is in the `multiply-adds` column. RAM is `size_of::<Tracker<N, M>>()` on the")?;
    writeln!(s, "device (pinned in `core/src/track.rs`).\n")?;
    writeln!(s, "| N | M | K | window | differences | drift | `Tracker::step`, instructions | `node::track` | `step_explained` | multiply-adds | instructions per multiply-add | tracker RAM, bytes | blob, bytes |")?;
    writeln!(s, "|---|---|---|---|---|---|---|---|---|---|---|---|---|")?;
    let mut rows = Vec::new();
    for line in &banks {
        ensure!(
            get(line, "alarm_quiet")? == "1",
            "a bank's timed steps were not all quiet: {line:?}"
        );
        let n: u32 = get(line, "n")?.parse()?;
        let m: u32 = get(line, "m")?.parse()?;
        let k: u32 = get(line, "k")?.parse()?;
        rows.push((n, m, k, get(line, "w")?, *line));
    }
    rows.sort_by(|a, b| (a.0, a.1, &a.3, a.2).cmp(&(b.0, b.1, &b.3, b.2)));
    for (n, m, k, w, line) in &rows {
        writeln!(
            s,
            "| {n} | {m} | {k} | {w} | {} | {} | {} | {} | {} | {} | {} | {} | {} |",
            if get(line, "differences")? == "1" {
                "yes"
            } else {
                "no"
            },
            if get(line, "drift")? == "1" {
                "yes"
            } else {
                "no"
            },
            get(line, "instr_per_score")?,
            get(line, "instr_node_track")?,
            get(line, "instr_explained")?,
            get(line, "multiply_adds")?,
            get(line, "instr_per_mad")?,
            get(line, "ram_bytes")?,
            get(line, "blob_bytes")?,
        )?;
    }
    writeln!(s)?;
    let v1: Vec<&str> = cost.lines().filter(|l| l.starts_with("cost_v1 ")).collect();
    if !v1.is_empty() {
        writeln!(s, "**A single model (format version 1) on the node's path or through the tracker.** The node scores a v1")?;
        writeln!(s, "blob as before banks (`node::score` on the `FlashModel`, then `node::alarm_update`); the same blob through a")?;
        writeln!(s, "`Tracker<N, N>` (a bank of one, window 1, no drift) gives the same d² bits but costs more, so the node keeps")?;
        writeln!(s, "the v1 path:\n")?;
        writeln!(s, "| N | node's v1 path (score and alarm), instructions | through `Tracker::step` | ratio | same bits |")?;
        writeln!(s, "|---|---|---|---|---|")?;
        for line in v1 {
            ensure!(
                get(line, "same_bits")? == "1",
                "v1 and the tracker disagree: {line:?}"
            );
            writeln!(
                s,
                "| {} | {} | {} | {} | yes |",
                get(line, "n")?,
                get(line, "node_score_and_alarm")?,
                get(line, "tracker_step")?,
                get(line, "ratio")?,
            )?;
        }
        writeln!(s)?;
    }
    writeln!(s, "**Blob sizes** (`ellipsoid_core::blob::max_bank_len`, the longest a bank can encode to, drift on) and which fit")?;
    writeln!(s, "a 16 KiB model slot (the micro:bit's and the AN386's: the blob, padded to 4 bytes, then the 4-byte")?;
    writeln!(
        s,
        "confirmation word). Without differences M = N, with them M = 2 N.\n"
    )?;
    write!(s, "| N | M |")?;
    for k in 1..=ellipsoid_core::bank::MAX_MODES {
        write!(s, " K = {k} |")?;
    }
    writeln!(s)?;
    writeln!(
        s,
        "|---|---|{}",
        "---|".repeat(ellipsoid_core::bank::MAX_MODES)
    )?;
    for (n, m) in [(5, 5), (5, 10), (8, 8), (8, 16), (16, 16), (16, 32)] {
        write!(s, "| {n} | {m} |")?;
        for k in 1..=ellipsoid_core::bank::MAX_MODES {
            let len = ellipsoid_core::blob::max_bank_len(n, m, k, true);
            if fits_slot(len) {
                write!(s, " {len} |")?;
            } else {
                write!(s, " {len} (does not fit) |")?;
            }
        }
        writeln!(s)?;
    }
    writeln!(s)?;
    Ok(())
}

#[allow(clippy::too_many_arguments)]
fn figures(
    elf: &Path,
    elf_m0: &Path,
    cost: &Path,
    device: &Path,
    compared: &Path,
    reach: &Path,
    readme: &Path,
    groups: Option<&Path>,
) -> Result<()> {
    let m4 = sections(elf)?;
    let m0 = sections(elf_m0)?;
    let share = core_share(elf)?;
    let share_m0 = core_share(elf_m0)?;
    let cost_text = read_text(cost)?;
    let dev_text = read_text(device)?;
    let cal = cost_text
        .lines()
        .find(|l| l.starts_with("calibrate "))
        .ok_or_else(|| anyhow!("{}: no calibrate line", cost.display()))?;
    let field = |line: &str, k: &str| -> Result<String> {
        kv(line, k)
            .map(str::to_string)
            .ok_or_else(|| anyhow!("{}: no {k}= in {line:?}", cost.display()))
    };
    let peak = dev_text
        .lines()
        .find_map(|l| l.strip_prefix("stack peak_bytes="))
        .ok_or_else(|| anyhow!("{}: no stack line", device.display()))?;
    let get = |m: &BTreeMap<String, u64>, k: &str| m.get(k).copied().unwrap_or(0);
    let mut s = String::new();
    writeln!(s, "<!-- figures:begin (written by firmware-example/e2e.sh through node-tool; do not edit) -->")?;
    writeln!(s, "### Firmware figures\n")?;
    writeln!(
        s,
        "Measured by `firmware-example/e2e.sh` on the images of the `firmware` profile (`opt-level = 3`, LTO, one codegen unit).\n"
    )?;
    writeln!(s, "**Flash and RAM** (`arm-none-eabi-size -A`; the vector table counted in `.text`). The core's share is the")?;
    writeln!(s, "symbols of `ellipsoid_core` and the crates it brings (postcard, serde, crc, heapless, libm) plus the")?;
    writeln!(s, "firmware's out-of-line wrappers `slots::load`, `node::score` and `node::explain`, whose bodies are the")?;
    writeln!(s, "core's decode, score and explain inlined (`arm-none-eabi-nm -S`). Code the optimiser inlined elsewhere")?;
    writeln!(s, "is counted with the firmware.\n")?;
    writeln!(s, "| image | `.text` | `.rodata` | `.data` | `.bss` | core's `.text` | core's `.rodata` | core's `.data` + `.bss` |")?;
    writeln!(s, "|---|---|---|---|---|---|---|---|")?;
    for (name, m, sh) in [
        (
            "`ellipsoid-node`, thumbv7em-none-eabihf (Cortex-M4F)",
            &m4,
            &share,
        ),
        (
            "`ellipsoid-node`, thumbv6m-none-eabi (Cortex-M0, `microbit` board)",
            &m0,
            &share_m0,
        ),
    ] {
        writeln!(
            s,
            "| {name} | {} | {} | {} | {} | {} | {} | {} |",
            get(m, ".text"),
            get(m, ".rodata"),
            get(m, ".data"),
            get(m, ".bss"),
            sh.get(".text").copied().unwrap_or(0),
            sh.get(".rodata").copied().unwrap_or(0),
            sh.get(".data").copied().unwrap_or(0) + sh.get(".bss").copied().unwrap_or(0),
        )?;
    }
    writeln!(s)?;
    writeln!(s, "The model itself is not in the image: it sits in a slot (`MODEL_A`/`MODEL_B`, 16 KiB each), and the node")?;
    writeln!(s, "scores an `f32` blob in place through a `FlashModel<5>` (see below). A fixed-point blob (`fit --no-fpu`)")?;
    writeln!(s, "has no in-flash form: the node copies it into RAM once, at boot (`SlotModel`; its size is `ram_bytes` in")?;
    writeln!(s, "`score-cost`'s `cost_node_fixed` lines).\n")?;
    writeln!(s, "**Stack.** The stack below the stack pointer is painted with a pattern before the scoring loop, and")?;
    writeln!(s, "the deepest word overwritten is found afterwards. Peak while scoring the demo's readings (boot,")?;
    writeln!(s, "choosing the model in its slot, scoring, explaining raised alarms and formatting the report included): **{peak} bytes**.")?;
    writeln!(s, "The stack of one score alone (below its caller's frame, measured the same way in `score-cost`) is in the")?;
    writeln!(s, "last column of the table below.\n")?;
    writeln!(s, "**Cost per score on the Cortex-M4F** (`score-cost` in `qemu-system-arm -machine mps2-an386 -icount shift=0`).")?;
    writeln!(s, "The emulator is not cycle-accurate, but with `-icount shift=0` every instruction advances its clock by")?;
    writeln!(s, "1 ns, and SysTick on this board runs at 25 MHz, so SysTick counts instructions. Calibration: a loop of")?;
    writeln!(
        s,
        "{} instructions (`subs`/`bne`) advanced SysTick by {} ticks, that is {} instructions per tick.",
        field(cal, "instructions")?,
        field(cal, "ticks")?,
        field(cal, "instr_per_tick")?
    )?;
    writeln!(s, "Each figure is a loop of scores of four rotating readings through the out-of-line `node::score`")?;
    writeln!(s, "(call, preprocessing, factor, squares, the finiteness check and the verdict; no log features), divided")?;
    writeln!(s, "by the number of scores; the loop's own cost (the same loop around an empty out-of-line call) is shown")?;
    writeln!(s, "beside it and is *included* in the figure. The floor is F(N) = N(N+1)/2 + 2N floating-point operations;")?;
    writeln!(
        s,
        "the target is at most 3 instructions per floor operation at N = 8 and 16.\n"
    )?;
    writeln!(s, "| N | instructions per score | of which loop and call | floor F(N) | instructions per floor op | target | stack of a score, bytes |")?;
    writeln!(s, "|---|---|---|---|---|---|---|")?;
    for line in cost_text.lines().filter(|l| l.starts_with("cost ")) {
        let n = field(line, "n")?;
        let ipo: f64 = field(line, "instr_per_op")?.parse()?;
        let floor: f64 = field(line, "floor_ops")?.parse()?;
        let target = match n.as_str() {
            "8" | "16" => format!(
                "≤ {:.0}: {}",
                3.0 * floor,
                if ipo <= 3.0 { "met" } else { "**missed**" }
            ),
            _ => "—".to_string(),
        };
        let st = cost_text
            .lines()
            .find(|l| l.starts_with(&format!("stack n={n} ")))
            .and_then(|l| kv(l, "score_bytes"))
            .map(str::to_string)
            .ok_or_else(|| anyhow!("{}: no stack line for n={n}", cost.display()))?;
        writeln!(
            s,
            "| {n} | {} | {} | {} | {ipo:.2} | {target} | {st} |",
            field(line, "instr_per_score")?,
            field(line, "loop_overhead")?,
            floor as u64,
        )?;
    }
    writeln!(s)?;
    if let Some(g) = groups {
        core_flash_figures(&mut s, &cost_text, &dev_text, &read_text(g)?)?;
    }
    bank_figures(&mut s, &cost_text)?;
    writeln!(s, "**End to end** (the checks this run passed):\n")?;
    for line in read_text(compared)?
        .lines()
        .chain(read_text(reach)?.lines())
    {
        writeln!(s, "- {line}")?;
    }
    writeln!(s, "<!-- figures:end -->")?;
    let old = read_text(readme)?;
    let (Some(b), Some(e)) = (
        old.find("<!-- figures:begin"),
        old.find("<!-- figures:end -->"),
    ) else {
        bail!(
            "{}: no figure markers (<!-- figures:begin ... --> and <!-- figures:end -->)",
            readme.display()
        );
    };
    let new = format!(
        "{}{}{}",
        &old[..b],
        s,
        &old[e + "<!-- figures:end -->\n".len().min(old.len() - e)..]
    );
    write_atomic(readme, new.as_bytes())?;
    println!("figures: written to {}", readme.display());
    Ok(())
}

/// Replace the text between `begin` (a line starting with it) and `end` (a whole line) in a README.
fn splice(readme: &Path, begin: &str, end: &str, block: &str) -> Result<()> {
    let old = read_text(readme)?;
    let (Some(b), Some(e)) = (old.find(begin), old.find(end)) else {
        bail!("{}: no markers {begin} ... {end}", readme.display());
    };
    ensure!(b < e, "{}: {end} before {begin}", readme.display());
    let after = (e + end.len()).min(old.len());
    let after = after + usize::from(old[after..].starts_with('\n'));
    let new = format!("{}{}{}", &old[..b], block, &old[after..]);
    write_atomic(readme, new.as_bytes())?;
    println!("figures: written to {}", readme.display());
    Ok(())
}

/// What `figures-m0` reads.
struct M0Inputs<'a> {
    elf: &'a Path,
    cost: &'a Path,
    cost_m4: &'a Path,
    device: &'a Path,
    compared: &'a Path,
    reach: &'a Path,
    readme: &'a Path,
}

/// The `cost n=...` lines of a `score-cost` output, by N: (instructions per score, loop and call,
/// floor operations, instructions per floor operation).
fn cost_lines(path: &Path) -> Result<BTreeMap<u32, (f64, f64, u64, f64)>> {
    cost_lines_of(path, "cost ")
}

/// The `score-cost` lines that start with `prefix` (`"cost "`, `"cost_fixed "`...), by N:
/// instructions per score, loop overhead, floor operations, instructions per floor operation.
fn cost_lines_of(path: &Path, prefix: &str) -> Result<BTreeMap<u32, (f64, f64, u64, f64)>> {
    let text = read_text(path)?;
    let mut m = BTreeMap::new();
    for (i, line) in text.lines().enumerate() {
        if !line.starts_with(prefix) {
            continue;
        }
        let get = |k: &str| -> Result<&str> {
            kv(line, k).ok_or_else(|| anyhow!("{}:{}: no {k}= in {line:?}", path.display(), i + 1))
        };
        let num = |k: &str| -> Result<f64> {
            get(k)?
                .parse::<f64>()
                .with_context(|| format!("{}:{}: field {k}", path.display(), i + 1))
        };
        let n: u32 = get("n")?
            .parse()
            .with_context(|| format!("{}:{}: field n", path.display(), i + 1))?;
        let floor = num("floor_ops")? as u64;
        m.insert(
            n,
            (
                num("instr_per_score")?,
                num("loop_overhead")?,
                floor,
                num("instr_per_op")?,
            ),
        );
    }
    ensure!(!m.is_empty(), "{}: no cost lines", path.display());
    Ok(m)
}

fn figures_m0(i: &M0Inputs<'_>) -> Result<()> {
    let sec = sections(i.elf)?;
    let share = core_share(i.elf)?;
    let cost = cost_lines(i.cost)?;
    let cost_m4 = cost_lines(i.cost_m4)?;
    let cost_text = read_text(i.cost)?;
    let dev_text = read_text(i.device)?;
    let cal = cost_text
        .lines()
        .find(|l| l.starts_with("calibrate "))
        .ok_or_else(|| anyhow!("{}: no calibrate line", i.cost.display()))?;
    let cal_field = |k: &str| -> Result<&str> {
        kv(cal, k).ok_or_else(|| anyhow!("{}: no {k}= in {cal:?}", i.cost.display()))
    };
    let peak = dev_text
        .lines()
        .find_map(|l| l.strip_prefix("stack peak_bytes="))
        .ok_or_else(|| anyhow!("{}: no stack line", i.device.display()))?;
    let get = |k: &str| sec.get(k).copied().unwrap_or(0);
    let mut s = String::new();
    writeln!(s, "<!-- figures-m0:begin (written by firmware-example/e2e.sh through node-tool; do not edit) -->")?;
    writeln!(s, "### Cortex-M0 figures (emulated micro:bit)\n")?;
    writeln!(s, "Measured by `firmware-example/e2e.sh` on the `microbit` board's images (`thumbv6m-none-eabi`, the")?;
    writeln!(s, "`firmware` profile) in `qemu-system-arm -machine microbit` (nRF51822: Cortex-M0, no FPU, 256 KiB flash,")?;
    writeln!(s, "16 KiB RAM). The demo's readings come from a host file over semihosting, 8 readings a read.\n")?;
    writeln!(s, "| image | `.text` | `.rodata` | `.data` | `.bss` | core's `.text` | core's `.rodata` | flash for the firmware | RAM |")?;
    writeln!(s, "|---|---|---|---|---|---|---|---|---|")?;
    writeln!(
        s,
        "| `ellipsoid-node`, `microbit` | {} | {} | {} | {} | {} | {} | 224 KiB (slots: 2 × 16 KiB at 0x38000, 0x3C000) | 16 KiB |",
        get(".text"),
        get(".rodata"),
        get(".data"),
        get(".bss"),
        share.get(".text").copied().unwrap_or(0),
        share.get(".rodata").copied().unwrap_or(0),
    )?;
    writeln!(s)?;
    writeln!(s, "**Stack.** Peak while scoring the demo's readings at N = 5 (painted as on the M4F, boot and the decoded")?;
    writeln!(s, "model included): **{peak} bytes** of the 16 KiB.\n")?;
    writeln!(s, "**Cost per score in f32 (software float).** `score-cost` on this board, measured as on the M4F. With")?;
    writeln!(
        s,
        "`-icount shift=0`, a loop of {} instructions advanced SysTick by {} ticks: {} instructions per tick.",
        cal_field("instructions")?,
        cal_field("ticks")?,
        cal_field("instr_per_tick")?
    )?;
    writeln!(s, "Every f32 operation is a call into the compiler's software float (`__aeabi_fmul`, `__aeabi_fadd`...).\n")?;
    writeln!(s, "| N | instructions per score | of which loop and call | floor F(N) | instructions per floor op | × the M4F | stack of a score, bytes |")?;
    writeln!(s, "|---|---|---|---|---|---|---|")?;
    for (n, (per, overhead, floor, ipo)) in &cost {
        let ratio = cost_m4
            .get(n)
            .map_or("—".to_string(), |m4| format!("{:.1}", per / m4.0));
        let st = cost_text
            .lines()
            .find(|l| l.starts_with(&format!("stack n={n} ")))
            .and_then(|l| kv(l, "score_bytes"))
            .ok_or_else(|| anyhow!("{}: no stack line for n={n}", i.cost.display()))?;
        writeln!(
            s,
            "| {n} | {per:.1} | {overhead:.1} | {floor} | {ipo:.2} | {ratio} | {st} |"
        )?;
    }
    writeln!(s)?;
    let fixed = cost_lines_of(i.cost, "cost_fixed ")?;
    ensure!(
        !fixed.is_empty(),
        "{}: no cost_fixed lines (the fixed-point score's cost)",
        i.cost.display()
    );
    writeln!(s, "**Cost per score in fixed point** (`fit --no-fpu`: the core's integer score, `FixedModel::score`, on")?;
    writeln!(s, "integer readings; the same `score-cost` loop). Our target for this path is at most 12 instructions per")?;
    writeln!(s, "floor operation. Where it is not met, the disassembly shows why: the inner loop is not unrolled, spills")?;
    writeln!(
        s,
        "registers, and calls the compiler's 64-bit shift helper once a row.\n"
    )?;
    writeln!(s, "| N | instructions per score | instructions per floor op | × faster than software float | target, instructions per score | target |")?;
    writeln!(s, "|---|---|---|---|---|---|")?;
    for (n, (per, _, floor, ipo)) in &fixed {
        let soft = cost
            .get(n)
            .map_or("—".to_string(), |f| format!("{:.1}", f.0 / per));
        let target = 12 * floor;
        let verdict = if *per <= target as f64 {
            "met"
        } else {
            "not met"
        };
        writeln!(
            s,
            "| {n} | {per:.1} | {ipo:.2} | {soft} | ≤ {target} | {verdict} |"
        )?;
    }
    writeln!(s)?;
    writeln!(
        s,
        "**End to end on the M0** (the checks this run passed):\n"
    )?;
    for line in read_text(i.compared)?
        .lines()
        .chain(read_text(i.reach)?.lines())
    {
        writeln!(s, "- {line}")?;
    }
    writeln!(s, "<!-- figures-m0:end -->")?;
    splice(
        i.readme,
        "<!-- figures-m0:begin",
        "<!-- figures-m0:end -->",
        &s,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    // The shape of `arm-none-eabi-objdump -d -C --no-show-raw-insn` output (binutils 2.40).
    const DIS: &str = "
00001000 <app::node::score>:
    1000:\tpush\t{r7, lr}
    1002:\tbl\t1100 <app::helper>
    1006:\tcbz\tr0, 1010 <app::node::score+0x10>
    100a:\tpop\t{r7, pc}

00001100 <app::helper>:
    1100:\tb.w\t1200 <core::panicking::panic_bounds_check>

00001200 <core::panicking::panic_bounds_check>:
    1200:\tbl\t1300 <rust_begin_unwind>

00001300 <rust_begin_unwind>:
    1300:\tb.n\t1300 <rust_begin_unwind>

00001400 <app::safe>:
    1400:\tvmul.f32\ts0, s0, s0
    1404:\tbx\tlr

00001500 <app::dynamic>:
    1500:\tblx\tr3
";

    fn roots(r: &[&str]) -> Vec<String> {
        r.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn reach_finds_panics_through_calls_and_tail_branches() {
        let r = analyse(DIS, &BTreeMap::new(), &roots(&["node::score"])).unwrap();
        assert_eq!(r.roots, 1);
        assert_eq!(
            r.panics,
            ["core::panicking::panic_bounds_check", "rust_begin_unwind"]
        );
        assert!(r.seen.contains("app::helper"));
        assert!(r.indirect.is_empty());
    }

    #[test]
    fn reach_passes_a_clean_function_and_flags_indirect_calls() {
        let r = analyse(DIS, &BTreeMap::new(), &roots(&["::safe"])).unwrap();
        assert!(r.panics.is_empty() && r.indirect.is_empty());
        assert_eq!(r.seen.len(), 1);
        let r = analyse(DIS, &BTreeMap::new(), &roots(&["::dynamic"])).unwrap();
        assert_eq!(r.indirect, ["app::dynamic"]);
        assert!(analyse(DIS, &BTreeMap::new(), &roots(&["::missing"])).is_err());
    }

    // The shape of the thumbv6m image (binutils 2.40): `__aeabi_dmul` is 10 bytes long (its size in
    // the symbol table), and the two bytes after it are 0xd4d4 padding, which objdump reads as a
    // `bmi.n` back into the formatter.
    const DIS_M0: &str = "
00005800 <<&T as core::fmt::Display>::fmt>:
    5800:\tpush\t{r7, lr}
    5802:\tblx\tr3
    5804:\tbl\t5900 <core::panicking::panic_fmt>
    5808:\tpop\t{r7, pc}

00005850 <__aeabi_dmul>:
    5850:\tpush\t{r7, lr}
    5852:\tmov\tr7, sp
    5854:\tbl\t585c <compiler_builtins::float::mul::__muldf3>
    5858:\tpop\t{r7, pc}
    585a:\tbmi.n\t5806 <<&T as core::fmt::Display>::fmt+0x6>

0000585c <compiler_builtins::float::mul::__muldf3>:
    585c:\tpush\t{r4, r5, r6, r7, lr}
    585e:\tpop\t{r4, r5, r6, r7, pc}

00006000 <app::node::score>:
    6000:\tpush\t{r7, lr}
    6002:\tbl\t5850 <__aeabi_dmul>
    6006:\tpop\t{r7, pc}
";
    // `arm-none-eabi-nm -S --defined-only` of the same functions (thumb addresses are odd in some
    // tools' output: the low bit is ignored).
    const NM_M0: &str = "\
00005800 0000000a t <&T as core::fmt::Display>::fmt
00005850 0000000a T __aeabi_dmul
0000585d 00000004 t compiler_builtins::float::mul::__muldf3
00006000 00000008 t app::node::score
00007000 00000004 r some_table
";

    #[test]
    fn reach_skips_the_padding_after_a_function_and_still_catches_a_planted_panic() {
        let sizes = parse_sizes(NM_M0);
        assert_eq!(sizes.get(&0x585c), Some(&4));
        assert!(
            !sizes.contains_key(&0x7000),
            "data symbols are not functions"
        );
        let score = roots(&["node::score"]);
        // Without sizes the padding is read as a branch into the formatter: a false alarm.
        let naive = analyse(DIS_M0, &BTreeMap::new(), &score).unwrap();
        assert_eq!(naive.panics, ["core::panicking::panic_fmt"]);
        assert_eq!(naive.indirect, ["<&T as core::fmt::Display>::fmt"]);
        // With them, the path is clean...
        let r = analyse(DIS_M0, &sizes, &score).unwrap();
        assert!(r.panics.is_empty() && r.indirect.is_empty(), "{r:?}");
        assert_eq!(r.seen.len(), 3, "{r:?}");
        // ...and a call planted at the last instruction inside `__aeabi_dmul` (just before its
        // padding) is found.
        let planted = plant_panic(DIS_M0, &sizes, "__aeabi_dmul").unwrap();
        assert!(
            planted.contains("    5858:\tbl\t0 <core::panicking::panic>"),
            "{planted}"
        );
        let r = analyse(&planted, &sizes, &score).unwrap();
        assert_eq!(r.panics, ["core::panicking::panic"]);
        assert!(plant_panic(DIS_M0, &sizes, "::missing").is_err());
    }

    /// A device log that reports exactly the pins of `golden-n5.pins`, with `edit` applied to
    /// its reading lines.
    fn pinned_log(edit: impl Fn(usize, String) -> String) -> String {
        use ellipsoid_tests::pins::Expect;
        let text = include_str!("../../golden/golden-n5.pins");
        let pins = ellipsoid_tests::pins::parse(text, 5).unwrap();
        let mut log = String::from("boot ellipsoid-node n=5\nmodel slot=A seq=1 id=0x005eed05\n");
        for p in &pins.pins {
            let line = match &p.expect {
                Expect::D2(b) => {
                    format!("r {} d2={b:08x} v=below alarm=0 fault=0 event=-", p.index)
                }
                Expect::Fault(c) => format!(
                    "r {} d2=- v=fault alarm=0 fault=1 event=fault cause={c}",
                    p.index
                ),
            };
            log.push_str(&edit(p.index, line));
            log.push('\n');
        }
        log.push_str("end scored=1 faults=1\n");
        log
    }

    fn compare_log(name: &str, log: &str) -> Result<()> {
        let dir = std::env::temp_dir().join(format!("node-tool-test-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        let dev = dir.join(name);
        fs::write(&dev, log).unwrap();
        let pins = Path::new(env!("CARGO_MANIFEST_DIR")).join("golden/golden-n5.pins");
        let r = pins_compare(&pins, &dev);
        let _ = fs::remove_file(&dev);
        r
    }

    #[test]
    fn pins_compare_passes_the_pins_and_refuses_one_changed_bit_or_cause() {
        compare_log("same.log", &pinned_log(|_, l| l)).unwrap();
        let flipped = pinned_log(|i, l| {
            if i == 0 {
                l.replace("d2=391d337d", "d2=391d337c")
            } else {
                l
            }
        });
        assert!(compare_log("flipped.log", &flipped).is_err());
        let cause = pinned_log(|_, l| l.replace("cause=log-domain:3", "cause=not-finite:0"));
        assert!(compare_log("cause.log", &cause).is_err());
        let short = pinned_log(|i, l| if i == 29 { String::new() } else { l });
        assert!(compare_log("short.log", &short).is_err());
    }

    #[test]
    fn device_lines_parse() {
        let l = "r 7 d2=41800000 v=above alarm=1 fault=0 event=fault-cleared+raised top=3";
        assert_eq!(kv(l, "d2"), Some("41800000"));
        assert_eq!(kv(l, "event"), Some("fault-cleared+raised"));
        assert_eq!(kv(l, "top"), Some("3"));
        assert_eq!(kv(l, "nope"), None);
    }
}

#[cfg(test)]
mod bank_tests {
    use super::*;

    const COST: &str = "\
cost_v1 n=8 reps=4000 node_score_and_alarm=394.0 tracker_step=742.0 ratio=1.883 same_bits=1
cost_bank n=8 m=8 k=2 w=1 differences=0 drift=0 reps=4000 instr_per_score=981.0 instr_node_track=1875.0 instr_explained=10103.5 multiply_adds=72 instr_per_mad=13.63 ram_bytes=896 blob_bytes=524 alarm_quiet=1
cost_bank n=8 m=8 k=1 w=1 differences=0 drift=0 reps=4000 instr_per_score=742.0 instr_node_track=1636.0 instr_explained=9766.0 multiply_adds=36 instr_per_mad=20.61 ram_bytes=896 blob_bytes=276 alarm_quiet=1
";

    #[test]
    fn bank_figures_sort_the_rows_say_which_blobs_fit_and_refuse_an_unquiet_run() {
        let mut s = String::new();
        bank_figures(&mut s, COST).unwrap();
        let k1 = s.find("| 8 | 8 | 1 | 1 | no | no | 742.0 |").unwrap();
        let k2 = s.find("| 8 | 8 | 2 | 1 | no | no | 981.0 |").unwrap();
        assert!(k1 < k2, "{s}");
        assert!(s.contains("| 8 | 394.0 | 742.0 | 1.883 | yes |"), "{s}");
        // N = 16 with differences: one mode is 2 504 bytes of floats, so 7 modes do not fit.
        let row = s.lines().find(|l| l.starts_with("| 16 | 32 |")).unwrap();
        assert!(row.contains("(does not fit)"), "{row}");
        assert!(!s
            .lines()
            .find(|l| l.starts_with("| 5 | 5 |"))
            .unwrap()
            .contains("does not"));
        assert!(fits_slot(SLOT_BYTES - 4) && !fits_slot(SLOT_BYTES - 3));
        let loud = COST.replace("alarm_quiet=1", "alarm_quiet=0");
        assert!(bank_figures(&mut String::new(), &loud).is_err());
        assert!(bank_figures(&mut String::new(), "cost n=8\n").is_ok());
    }

    fn compare_files(dev: &str, rep: &str) -> Result<()> {
        let dir = std::env::temp_dir().join(format!("node-tool-bank-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        let (d, r, c) = (dir.join("dev.log"), dir.join("rep.csv"), dir.join("in.csv"));
        fs::write(&d, dev).unwrap();
        fs::write(&r, rep).unwrap();
        fs::write(&c, "timestamp,a,b,label\n").unwrap();
        let out = compare(&d, &r, &c, &["timestamp".into(), "label".into()], "A", None);
        let _ = fs::remove_dir_all(&dir);
        out
    }

    const DEV: &str = "model slot=A seq=1 modes=2\n\
pin fault off level=low at=boot\npin alarm off level=low at=boot\n\
r 0 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=window-filling:1\n\
pin fault on level=high at=0\n\
r 1 d2=3f800000 v=below mode=1 alarm=0 fault=0 event=fault-cleared+drift drift=1\n\
pin fault off level=low at=1\nend scored=1 faults=1\nleds=00\n";
    const REP: &str =
        "index,d2,d2_bits,verdict,alarm,fault,event,top_feature,mode,drift_at_bound\n\
0,,,fault,0,1,fault,,,0\n1,1,3f800000,below,0,0,fault-cleared+drift,,1,1\n";

    #[test]
    fn compare_checks_a_banks_mode_and_drift_flag() {
        compare_files(DEV, REP).unwrap();
        let other_mode = DEV.replace("v=below mode=1", "v=below mode=0");
        let e = compare_files(&other_mode, REP).unwrap_err();
        assert!(e.to_string().contains("1 mismatches"), "{e}");
        let no_drift = DEV.replace("drift drift=1", "drift drift=0");
        assert!(compare_files(&no_drift, REP).is_err());
        // A log without the bank's fields against a bank's replay that says mode 1: refused.
        let single = DEV
            .replace(" mode=1", "")
            .replace(" mode=-", "")
            .replace(" drift=1", "")
            .replace(" drift=0", "");
        assert!(compare_files(&single, REP).is_err());
    }
}
