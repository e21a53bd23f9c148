//! `ellipsoid inspect`: validate a blob with the core's decoder and show everything in it.

use std::path::{Path, PathBuf};

use anyhow::Result;
use clap::Args;
use ellipsoid_core::bank::ModeSelect;
use ellipsoid_core::blob;
use serde_json::json;

use crate::data::card::ModelCard;
use crate::device::dims::{read_blob_file, Decoded};
use crate::device::replay::scored_names;
use crate::device::track::BankView;

/// Options of `inspect`.
#[derive(Debug, Clone, Args)]
pub struct InspectArgs {
    /// The blob.
    pub blob: PathBuf,
    /// Print as JSON.
    #[arg(long)]
    pub json: bool,
}

/// Run `inspect`.
pub fn run(path: &Path, as_json: bool) -> Result<()> {
    let settled = crate::data::output::settle(path)?;
    let (bytes, decoded) = read_blob_file(path)?;
    let (card, card_problem) = match ModelCard::read_for(path, &bytes) {
        Ok(c) => (Some(c), None),
        Err(e) if ModelCard::path_for(path).exists() => (None, Some(format!("{e:#}"))),
        Err(_) => (None, None),
    };
    drop(settled);
    let model = match decoded {
        Decoded::Model(m) => m,
        Decoded::Bank(b) => return show_bank(path, &bytes, &b, card, card_problem, as_json),
    };
    let p = model.params();
    let n = model.n();
    let names: Vec<String> = match &card {
        Some(c) => c.features.clone(),
        None => (0..n).map(|i| format!("feature_{i}")).collect(),
    };
    // W has a positive diagonal (the decoder checks it), so WᵀW is invertible; NaN marks the
    // impossible case instead of a panic.
    let cov = p.covariance().unwrap_or_else(|| vec![f64::NAN; n * n]);
    let mean = p.raw_mean();
    let logs: Vec<bool> = (0..n).map(|i| (p.log_mask >> i) & 1 == 1).collect();
    // Unlike `model_id`, the CRC differs for any two models that differ at all.
    let crc = blob_crc(&bytes);
    // Header flag bit 1 (`core/FORMAT.md`): the model is scored in fixed point (`fit --no-fpu`).
    let fixed = bytes.get(6).is_some_and(|f| f & 0b10 != 0);
    let (arithmetic, form) = if fixed {
        ("fixed-point", format!("FixedModel<{n}>"))
    } else {
        ("f32", format!("Model<{n}>"))
    };
    if as_json {
        let v = json!({
            "file": path.display().to_string(),
            "valid": true,
            "blob_bytes": bytes.len(),
            "decoded_model_ram_bytes": model.ram_bytes(),
            "arithmetic": arithmetic,
            "features": names,
            "dimension": n,
            "model_id": p.meta.model_id,
            "crc": format!("{crc:#010x}"),
            "trained_at": p.meta.trained_at,
            "sequence": p.meta.sequence,
            "log_transformed": logs,
            "offset": p.offset,
            "scale": p.scale,
            "mean_standardised": p.mean,
            "mean": mean,
            "w": (0..n).map(|i| p.w[i * n..i * n + i + 1].to_vec()).collect::<Vec<_>>(),
            "covariance": (0..n).map(|i| cov[i * n..(i + 1) * n].to_vec()).collect::<Vec<_>>(),
            "alarm_threshold": p.thresholds.alarm,
            "clear_threshold": p.thresholds.clear,
            "raise_after": p.policy.raise_after,
            "clear_after": p.policy.clear_after,
            "latch": p.policy.latch,
            "card": card,
            "card_problem": card_problem,
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    println!(
        "{}: a valid Ellipsoid model blob (format 1)",
        path.display()
    );
    println!(
        "  {} bytes; decoded, the model takes {} bytes of RAM (size_of {form})",
        bytes.len(),
        model.ram_bytes()
    );
    if fixed {
        println!(
            "  arithmetic: fixed point (header flag bit 1, `fit --no-fpu`): readings enter as integers, no floating-point operation on the score path"
        );
    } else {
        println!(
            "  arithmetic: f32; the node firmware scores it in place in flash (FlashModel<{n}>, no copy of the parameters in RAM)"
        );
    }
    println!(
        "  identity: CRC-32 {crc:#010x} (the device reports it as crc=; it changes with any byte)"
    );
    println!(
        "  model id {:#010x}, sequence {}, trained at {} ({} s since 1970)",
        p.meta.model_id,
        p.meta.sequence,
        humantime::format_rfc3339_seconds(
            std::time::UNIX_EPOCH + std::time::Duration::from_secs(p.meta.trained_at)
        ),
        p.meta.trained_at
    );
    match (&card, &card_problem) {
        (None, Some(why)) => println!("  model card refused: {why}"),
        (None, None) => println!("  (no model card beside it: feature names unknown)"),
        (Some(c), _) => println!(
            "  threshold chosen by `{}` for α = {:.3e} a reading ({:.3} false readings a day at {} Hz), per the model card",
            c.threshold_method,
            c.alpha,
            c.alpha * 86_400.0 * c.rate_hz,
            crate::stats::threshold::hz(c.rate_hz)
        ),
    }
    println!(
        "  alarm when d² > {} for {} reading(s) in a row; clear when d² < {} for {}{}",
        p.thresholds.alarm,
        p.policy.raise_after,
        p.thresholds.clear,
        p.policy.clear_after,
        if p.policy.latch {
            "; latched until reset"
        } else {
            ""
        }
    );
    println!();
    let width = names.iter().map(|s| s.len()).max().unwrap_or(8).max(8);
    println!(
        "  {:<width$}  {:>5}  {:>14}  {:>14}  {:>12}",
        "feature", "log", "mean", "sd", "scale"
    );
    for i in 0..n {
        println!(
            "  {:<width$}  {:>5}  {:>14.6}  {:>14.6}  {:>12.6e}",
            names[i],
            if logs[i] { "yes" } else { "no" },
            mean[i],
            cov.get(i * n + i).map_or(f64::NAN, |v| v.sqrt()),
            p.scale[i]
        );
    }
    println!();
    println!("  W = L⁻¹ (standardised space, lower triangle):");
    for i in 0..n {
        let row: Vec<String> = p.w[i * n..i * n + i + 1]
            .iter()
            .map(|v| format!("{v:>10.5}"))
            .collect();
        println!("    {}", row.join(" "));
    }
    println!();
    println!("  covariance rebuilt from W, in the readings' units:");
    for i in 0..n {
        let row: Vec<String> = cov[i * n..(i + 1) * n]
            .iter()
            .map(|v| format!("{v:>12.5e}"))
            .collect();
        println!("    {}", row.join(" "));
    }
    Ok(())
}

/// The CRC-32 in the blob's last four bytes: the model's identity, as the device's console
/// reports it (`crc=`).
fn blob_crc(bytes: &[u8]) -> u32 {
    bytes
        .len()
        .checked_sub(4)
        .and_then(|at| bytes.get(at..))
        .and_then(|b| <[u8; 4]>::try_from(b).ok())
        .map_or(0, u32::from_le_bytes)
}

/// The half-life in readings of a drift rate: `ln ½ / ln(1 − rate)`.
fn half_life(rate: f32) -> f64 {
    0.5f64.ln() / (1.0 - f64::from(rate)).ln()
}

/// Show a model bank (format 2): its modes with their limits and centres, how a mode is chosen,
/// the window, the drift, the names digest.
fn show_bank(
    path: &Path,
    bytes: &[u8],
    b: &BankView,
    card: Option<ModelCard>,
    card_problem: Option<String>,
    as_json: bool,
) -> Result<()> {
    let crc = blob_crc(bytes);
    let raw: Vec<String> = match &card {
        Some(c) => c.features.clone(),
        None => (0..b.n).map(|i| format!("feature_{i}")).collect(),
    };
    let names = match &card {
        Some(c) if c.scored_features.len() == b.m => c.scored_features.clone(),
        _ => scored_names(&raw, b.m),
    };
    let logs: Vec<bool> = (0..b.n).map(|i| (b.log_mask >> i) & 1 == 1).collect();
    let select = match b.select {
        ModeSelect::Nearest => "nearest",
        ModeSelect::Known => "known",
    };
    let digest_ok = card
        .as_ref()
        .map(|c| b.names_digest == Some(blob::names_digest(c.features.iter().map(String::as_str))));
    let modes: Vec<_> = b
        .modes
        .iter()
        .map(|p| {
            let cov = p.covariance().unwrap_or_else(|| vec![f64::NAN; b.m * b.m]);
            let sd: Vec<f64> = (0..b.m).map(|i| cov[i * b.m + i].sqrt()).collect();
            (p, p.raw_mean(), sd)
        })
        .collect();
    if as_json {
        let v = json!({
            "file": path.display().to_string(),
            "valid": true,
            "format": b.version,
            "blob_bytes": bytes.len(),
            "arithmetic": "f32",
            "features": raw,
            "scored_features": names,
            "dimension": b.n,
            "scored_dimension": b.m,
            "model_id": b.meta.model_id,
            "crc": format!("{crc:#010x}"),
            "trained_at": b.meta.trained_at,
            "sequence": b.meta.sequence,
            "log_transformed": logs,
            "names_digest": b.names_digest.map(|d| format!("{d:#010x}")),
            "names_digest_matches_card": digest_ok,
            "mode_select": select,
            "window": b.window.length,
            "differences": b.window.differences,
            "drift": b.drift.as_ref().map(|(rate, bound)| json!({
                "rate": rate,
                "half_life_readings": half_life(*rate),
                "bound": bound,
            })),
            "modes": modes.iter().enumerate().map(|(k, (p, centre, sd))| json!({
                "mode": k,
                "alarm_threshold": p.thresholds.alarm,
                "clear_threshold": p.thresholds.clear,
                "offset": p.offset,
                "scale": p.scale,
                "mean_standardised": p.mean,
                "centre": centre,
                "sd": sd,
                "w": (0..b.m).map(|i| p.w[i * b.m..i * b.m + i + 1].to_vec()).collect::<Vec<_>>(),
            })).collect::<Vec<_>>(),
            "raise_after": b.policy.raise_after,
            "clear_after": b.policy.clear_after,
            "latch": b.policy.latch,
            "card": card,
            "card_problem": card_problem,
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    println!(
        "{}: a valid Ellipsoid model bank blob (format {})",
        path.display(),
        b.version
    );
    println!(
        "  {} bytes; {} mode(s) over {} raw feature(s), {} scored; arithmetic f32",
        bytes.len(),
        b.modes.len(),
        b.n,
        b.m
    );
    println!(
        "  identity: CRC-32 {crc:#010x} (the device reports it as crc=; it changes with any byte)"
    );
    println!(
        "  model id {:#010x}, sequence {}, trained at {} ({} s since 1970)",
        b.meta.model_id,
        b.meta.sequence,
        humantime::format_rfc3339_seconds(
            std::time::UNIX_EPOCH + std::time::Duration::from_secs(b.meta.trained_at)
        ),
        b.meta.trained_at
    );
    match (b.names_digest, digest_ok) {
        (Some(d), Some(true)) => {
            println!("  names digest {d:#010x}: matches the card's features, in order")
        }
        (Some(d), Some(false)) => {
            println!("  names digest {d:#010x}: does NOT match the card's features in their order")
        }
        (Some(d), None) => println!("  names digest {d:#010x}"),
        (None, _) => {}
    }
    match (&card, &card_problem) {
        (None, Some(why)) => println!("  model card refused: {why}"),
        (None, None) => println!("  (no model card beside it: feature names unknown)"),
        (Some(c), _) => println!(
            "  thresholds chosen by `{}` for α = {:.3e} a reading, per the model card",
            c.threshold_method, c.alpha
        ),
    }
    match b.select {
        ModeSelect::Nearest => println!(
            "  mode: nearest, the mode k with the least d²ₖ / alarmₖ (no weights, no \
             log-determinants): a reading is flagged only outside every mode's alarm ellipsoid"
        ),
        ModeSelect::Known => println!(
            "  mode: known, told with each reading (0 to {}); no mode or another one is a fault",
            b.modes.len() - 1
        ),
    }
    println!(
        "  window: the mean of the last {} reading(s){}; a bad reading restarts it, and the \
         readings until it is whole again are faults",
        b.window.length,
        if b.window.differences {
            ", and the first differences xₜ − xₜ₋₁ as more features"
        } else {
            ""
        }
    );
    match &b.drift {
        None => println!("  drift: off"),
        Some((rate, bound)) => {
            println!(
                "  drift: on, rate {rate} (half-life {:.1} readings); the centre moves only on a \
                 scored reading inside its mode's alarm limit while the alarm is quiet; bound per \
                 scored feature, model units:",
                half_life(*rate)
            );
            let cells: Vec<String> = names
                .iter()
                .zip(bound)
                .map(|(n, v)| format!("{n} {v}"))
                .collect();
            println!("    {}", cells.join(", "));
        }
    }
    println!(
        "  alarm after {} reading(s) in a row above the mode's limit; clear after {} below its \
         clear limit{}",
        b.policy.raise_after,
        b.policy.clear_after,
        if b.policy.latch {
            "; latched until reset"
        } else {
            ""
        }
    );
    let width = names.iter().map(|s| s.len()).max().unwrap_or(8).max(8);
    for (k, (p, centre, sd)) in modes.iter().enumerate() {
        println!();
        println!(
            "  mode {k}: alarm when d² > {}, clear when d² < {}",
            p.thresholds.alarm, p.thresholds.clear
        );
        println!(
            "    {:<width$}  {:>5}  {:>14}  {:>14}",
            "feature", "log", "centre", "sd"
        );
        for i in 0..b.m {
            println!(
                "    {:<width$}  {:>5}  {:>14.6}  {:>14.6}",
                names[i],
                if logs.get(i).copied().unwrap_or(false) {
                    "yes"
                } else {
                    "no"
                },
                centre[i],
                sd[i]
            );
        }
    }
    Ok(())
}
