//! A trained bank's outputs: the version-2 blob through the core's encoder (read back by the
//! core's decoder), the model card and the summaries.

use anyhow::Result;
use ellipsoid_core::bank::{BankParams, DriftSpec, FlashBank, ModeParams, ModeSelect};
use ellipsoid_core::window::WindowSpec;
use ellipsoid_core::{blob, AlarmPolicy, ModelMeta};

use crate::data::card::{blob_crc, digest_with_mode, CardDrift, CardMode, ModelCard, CARD_VERSION};
use crate::pipeline::bank::{fit_bank, with_shape, BankFit, BankSpec};
use crate::pipeline::train::{method_name, TrainSpec};

/// A trained bank: its modes, the version-2 blob and the card.
pub struct BankTrained {
    /// The modes and how they were found.
    pub fit: BankFit,
    /// The bank settings.
    pub spec: BankSpec,
    /// The blob's bytes (version 2).
    pub blob: Vec<u8>,
    /// The card beside it.
    pub card: ModelCard,
    /// The alarm policy in the blob.
    pub policy: AlarmPolicy,
    /// Identity of the blob.
    pub meta: ModelMeta,
    /// Readings a second.
    pub rate_hz: f64,
    /// Baseline file.
    pub baseline: String,
    /// `ellipsoid_core::blob::names_digest` of the raw feature names, in the blob.
    pub blob_names_digest: u32,
}

impl BankTrained {
    /// The bank's expected false readings a day on a baseline like this one: each mode's
    /// promise weighted by its share of the samples (an upper bound: see the module notes).
    pub fn expected_per_day(&self) -> f64 {
        self.fit
            .modes
            .iter()
            .map(|m| m.weight * m.trained.promise.expected_per_day)
            .sum()
    }
}

/// Fit a bank and encode it (blob version 2) with the core, reading it back with the core.
pub fn train_bank(a: &TrainSpec, b: &BankSpec) -> Result<BankTrained> {
    let fit = fit_bank(a, b)?;
    let n = fit.features.len();
    let m = fit.scored.len();
    let policy = a.policy;
    let log_mask = fit.modes[0].trained.fitted.log_mask;
    let meta = ModelMeta {
        model_id: a.model_id.unwrap_or_else(|| {
            let mut bytes = Vec::new();
            for md in &fit.modes {
                bytes.extend_from_slice(&md.trained.model.params().meta.model_id.to_le_bytes());
            }
            blob::checksum(&bytes)
        }),
        trained_at: fit.modes[0].trained.model.params().meta.trained_at,
        sequence: a.sequence,
    };
    let digest = blob::names_digest(fit.features.iter().map(String::as_str));
    let select = if b.mode_column.is_some() {
        ModeSelect::Known
    } else {
        ModeSelect::Nearest
    };
    let window = WindowSpec {
        length: b.window,
        differences: b.differences,
    };
    let bytes = with_shape!(n, b.differences, N, M => {
        let modes: Vec<ModeParams<M>> = fit
            .modes
            .iter()
            .map(|md| {
                let t = &md.trained;
                let p = t.fitted.params::<M>(t.thresholds, policy, meta);
                ModeParams {
                    offset: p.preprocess.offset,
                    scale: p.preprocess.scale,
                    mean: p.mean,
                    w: p.w,
                    thresholds: t.thresholds,
                }
            })
            .collect();
        let drift = fit.drift.as_ref().map(|d| {
            let mut bound = [0f32; M];
            for (o, v) in bound.iter_mut().zip(&d.bound) {
                *o = *v as f32;
            }
            DriftSpec { rate: d.rate as f32, bound }
        });
        let params = BankParams::<N, M> {
            meta,
            log_mask,
            select,
            modes: &modes,
            window,
            drift,
            policy,
            names_digest: digest,
        };
        let mut buf = vec![0u8; blob::max_bank_len(N, M, modes.len(), drift.is_some())];
        let len = blob::encode_bank(&params, &mut buf)
            .map_err(|e| anyhow::anyhow!("the bank cannot be encoded: {e}"))?;
        buf.truncate(len);
        FlashBank::<N, M>::from_blob(&buf)
            .map_err(|e| anyhow::anyhow!("the core refused the bank it was given: {e}"))?;
        Ok::<Vec<u8>, anyhow::Error>(buf)
    })
    .ok_or_else(|| anyhow::anyhow!("{n} features, {m} scored values: no bank has that shape"))??;
    let log_features: Vec<String> = fit
        .features
        .iter()
        .enumerate()
        .filter(|(i, _)| (log_mask >> i) & 1 == 1)
        .map(|(_, f)| f.clone())
        .collect();
    let crc = blob_crc(&bytes);
    let first = &fit.modes[0].trained;
    let card = ModelCard {
        kind: "ellipsoid-model-card".into(),
        version: CARD_VERSION,
        names_digest: digest_with_mode(crc, &fit.features, &log_features, b.mode_column.as_deref()),
        features: fit.features.clone(),
        log_features,
        blob_crc: crc,
        blob_len: bytes.len(),
        threshold_method: method_name(a.threshold).into(),
        alpha: first.card.alpha,
        rate_hz: a.rate_hz,
        trained_on: a.baseline.display().to_string(),
        modes: fit
            .modes
            .iter()
            .enumerate()
            .map(|(k, md)| CardMode {
                mode: k as u8,
                samples: md.samples,
                weight: md.weight,
                alarm: md.trained.thresholds.alarm,
                clear: md.trained.thresholds.clear,
                expected_false_readings_per_day: md.trained.promise.expected_per_day,
                at_most_false_readings_per_day: md.trained.promise.at_most_per_day,
                confidence: md.trained.promise.confidence,
            })
            .collect(),
        select: Some(select.name().to_string()),
        mode_column: b.mode_column.clone(),
        window: b.window,
        differences: b.differences,
        scored_features: if b.differences {
            fit.scored.clone()
        } else {
            Vec::new()
        },
        drift: fit.drift.as_ref().map(|d| CardDrift {
            half_life_readings: d.half_life,
            rate: d.rate,
            bound_sigma: d.bound_sigma,
            bound: d.bound.clone(),
            sd: d.sd.clone(),
        }),
    };
    Ok(BankTrained {
        fit,
        spec: b.clone(),
        blob: bytes,
        card,
        policy,
        meta,
        rate_hz: a.rate_hz,
        baseline: a.baseline.display().to_string(),
        blob_names_digest: digest,
    })
}

/// The text summary of a bank: the bank, each mode's row, then each mode's own fit summary.
pub fn bank_summary_text(t: &BankTrained) -> String {
    use std::fmt::Write;
    let f = &t.fit;
    let mut s = String::new();
    let how =
        match (&t.spec.mode_column, &f.search) {
            (Some(mc), _) => format!("known mode, told by column `{mc}`"),
            (None, Some(search)) => {
                let bic: Vec<String> = search
                    .bic
                    .iter()
                    .map(|(k, b)| format!("K={k}: {b:.1}"))
                    .collect();
                format!(
                "nearest mode, found by EM on {} standardised samples ({} iterations{}; BIC {})",
                search.rows,
                search.iterations,
                if search.converged { "" } else { ", not converged" },
                bic.join(", ")
            )
            }
            (None, None) => "nearest mode".to_string(),
        };
    let _ = writeln!(
        s,
        "Bank of {} mode(s) from {} ({how}).",
        f.modes.len(),
        t.baseline
    );
    if let Some(search) = &f.search {
        for sk in &search.skipped {
            let _ = writeln!(
                s,
                "Mode count K={} skipped, not compared by BIC: {}.",
                sk.k, sk.reason
            );
        }
    }
    let _ = writeln!(
        s,
        "Window: {} reading(s){}; {} scored values a sample; {} readings, {} of them spent filling the window.",
        t.spec.window,
        if t.spec.differences {
            ", with first differences"
        } else {
            ""
        },
        f.scored.len(),
        f.readings,
        f.filling
    );
    let conf = f.modes[0].trained.promise.confidence;
    let _ = writeln!(
        s,
        "\n  mode  samples  weight  alarm d²  clear d²  false readings/day: expected, at most ({:.0} %)",
        100.0 * conf
    );
    for (k, md) in f.modes.iter().enumerate() {
        let tr = &md.trained;
        let _ = writeln!(
            s,
            "  {k:>4}  {:>7}  {:>6.3}  {:>8.3}  {:>8.3}  {:.3}, {:.3}",
            md.samples,
            md.weight,
            tr.thresholds.alarm,
            tr.thresholds.clear,
            tr.promise.expected_per_day,
            tr.promise.at_most_per_day
        );
    }
    let _ = writeln!(
        s,
        "  A reading is flagged only when it is outside every mode's alarm limit, so each mode's \
         figure bounds the bank's on that mode's readings; weighted by the modes' shares: at most \
         {:.3} expected false readings a day.",
        t.expected_per_day()
    );
    if let Some((md, ratio)) = crate::pipeline::bank::most_inflated(&f.modes) {
        let _ = writeln!(
            s,
            "  Warning: mode {md}'s limit is {ratio:.0} times its chi-square quantile: its samples \
             count as too few independent rows for an ellipsoid of its own, and under the nearest \
             rule it takes in readings far from every mode (--modes auto would not keep it; ask \
             for fewer modes)."
        );
    }
    if let Some(d) = &f.drift {
        let _ = writeln!(
            s,
            "Drift: half-life {} readings (rate {:.6}); the centre moves at most {} pooled \
             within-mode standard deviations per scored value (model units):",
            d.half_life, d.rate, d.bound_sigma
        );
        for ((name, b), sd) in f.scored.iter().zip(&d.bound).zip(&d.sd) {
            let _ = writeln!(s, "    {name}: ±{b:.6} (σ = {sd:.6})");
        }
        let _ = writeln!(
            s,
            "  The shift follows the readings' noise too, which widens their spread about the \
             centre by up to 2 / (2 − rate) = {:.6} in variance: the alarm and clear limits in the \
             table above are the modes' own limits (in each mode's section below) times that factor, \
             so the figures in the table still hold.",
            d.widen
        );
    }
    for (k, md) in f.modes.iter().enumerate() {
        let _ = writeln!(s, "\n── Mode {k} ──");
        s.push_str(&crate::pipeline::summary::mode_summary_text(&md.trained));
    }
    let _ = writeln!(
        s,
        "\nBlob: version 2, {} bytes (model id {:#010x}, sequence {}, names digest {:#010x}).",
        t.blob.len(),
        t.meta.model_id,
        t.meta.sequence,
        t.blob_names_digest
    );
    s
}

/// The JSON summary of a bank.
pub fn bank_summary_json(t: &BankTrained) -> serde_json::Value {
    let f = &t.fit;
    serde_json::json!({
        "baseline": t.baseline,
        "features": f.features,
        "scored_features": f.scored,
        "select": t.card.select,
        "mode_column": t.spec.mode_column,
        "window": t.spec.window,
        "differences": t.spec.differences,
        "readings": f.readings,
        "readings_filling_window": f.filling,
        "mode_search": f.search,
        "drift": f.drift,
        "expected_false_readings_per_day": t.expected_per_day(),
        "modes": f.modes.iter().enumerate().map(|(k, md)| {
            let mut v = crate::pipeline::summary::summary_json(&md.trained);
            v["mode"] = serde_json::json!(k);
            v["samples"] = serde_json::json!(md.samples);
            v["weight"] = serde_json::json!(md.weight);
            v
        }).collect::<Vec<_>>(),
        "policy": {
            "raise_after": t.policy.raise_after,
            "clear_after": t.policy.clear_after,
            "latch": t.policy.latch,
        },
        "rate_hz": t.rate_hz,
        "blob_version": 2,
        "blob_bytes": t.blob.len(),
        "model_id": t.meta.model_id,
        "sequence": t.meta.sequence,
        "names_digest": format!("{:08x}", t.blob_names_digest),
    })
}
