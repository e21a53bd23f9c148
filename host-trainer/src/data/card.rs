//! The model card: a JSON file written beside every blob, `model.blob` → `model.json`.
//!
//! The blob holds only what the device needs. The card holds what a person and the trainer's
//! other commands need: the feature names (to match CSV columns), how the threshold was chosen,
//! the reading rate it was chosen for. It carries the blob's CRC so a card that does not belong
//! to its blob is refused, and a digest of its feature names tied to that CRC
//! ([`names_digest`]), so a card whose names were edited by hand (two names swapped: the CRC
//! still matches, and every reading would be scored against the wrong columns) is refused too.
//! The digest guards against mistakes, not against someone who recomputes it on purpose.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use serde::{Deserialize, Serialize};

use crate::data::output;

/// The card format this trainer writes. Version 2 added `names_digest`; version 3 the bank's
/// fields ([`ModelCard::modes`], [`ModelCard::mode_column`], window, differences, drift), which a
/// single-model card leaves out. Versions 2 and 3 are read.
pub const CARD_VERSION: u32 = 3;

/// The oldest card format this trainer reads.
pub const CARD_VERSION_OLDEST: u32 = 2;

/// One mode of a bank, as the card lists it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CardMode {
    /// The mode's number: the mode column's value for a known-mode bank.
    pub mode: u8,
    /// Baseline samples of this mode (fitted and held out).
    pub samples: u64,
    /// Its share of the baseline's samples.
    pub weight: f64,
    /// Its alarm limit on d².
    pub alarm: f32,
    /// Its clear limit on d².
    pub clear: f32,
    /// The expected false readings a day the limit promises on this mode's samples.
    pub expected_false_readings_per_day: f64,
    /// The same, not exceeded with [`CardMode::confidence`].
    pub at_most_false_readings_per_day: f64,
    /// Confidence of that figure.
    pub confidence: f64,
}

/// Drift of a bank, as the card states it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CardDrift {
    /// Half-life of the re-centring, in readings.
    pub half_life_readings: f64,
    /// The rate `1 − 0.5^(1/half-life)`.
    pub rate: f64,
    /// The bound of the total shift of each scored value, in standard deviations.
    pub bound_sigma: f64,
    /// That bound in model units (after the log, before offset and scale), per scored value.
    pub bound: Vec<f64>,
    /// The pooled within-mode standard deviation each bound is a multiple of, model units.
    pub sd: Vec<f64>,
}

fn is_false(b: &bool) -> bool {
    !*b
}

fn is_one(w: &u8) -> bool {
    *w == 1
}

fn one() -> u8 {
    1
}

/// CRC-32 (the blob's own checksum) of the blob's CRC, then each feature name and each log
/// feature name, in order, each ended by a zero byte, the two lists separated by a `0x01` byte.
pub fn names_digest(blob_crc: u32, features: &[String], log_features: &[String]) -> String {
    digest_with_mode(blob_crc, features, log_features, None)
}

/// [`names_digest`], then for a known-mode bank a `0x02` byte and the mode column's name, so that
/// a mode column renamed by hand in the card is refused as well (without one: the same digest).
pub fn digest_with_mode(
    blob_crc: u32,
    features: &[String],
    log_features: &[String],
    mode_column: Option<&str>,
) -> String {
    let mut bytes = blob_crc.to_le_bytes().to_vec();
    for name in features {
        bytes.extend_from_slice(name.as_bytes());
        bytes.push(0);
    }
    bytes.push(1);
    for name in log_features {
        bytes.extend_from_slice(name.as_bytes());
        bytes.push(0);
    }
    if let Some(mc) = mode_column {
        bytes.push(2);
        bytes.extend_from_slice(mc.as_bytes());
    }
    format!("{:08x}", ellipsoid_core::blob::checksum(&bytes))
}

/// What `fit` knew about a model that the blob does not carry.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelCard {
    /// Always `"ellipsoid-model-card"`.
    pub kind: String,
    /// Card format version, [`CARD_VERSION`].
    pub version: u32,
    /// Feature names in model order: CSV columns are matched against these.
    pub features: Vec<String>,
    /// The features that are log-transformed on the device.
    pub log_features: Vec<String>,
    /// The CRC-32 in the last four bytes of the blob this card describes.
    pub blob_crc: u32,
    /// Bytes in that blob.
    pub blob_len: usize,
    /// [`names_digest`] of `features` and `log_features` with `blob_crc`, as 8 hex digits.
    pub names_digest: String,
    /// How the alarm threshold was chosen (`hotelling`, `confidence`, `chi-square`, `empirical`,
    /// `f1`).
    pub threshold_method: String,
    /// The per-reading false-alarm probability aimed at.
    pub alpha: f64,
    /// Readings a second the false-alarm figures assume.
    pub rate_hz: f64,
    /// The baseline file the model was trained on.
    pub trained_on: String,
    /// A bank's modes (empty for a single model).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub modes: Vec<CardMode>,
    /// How a bank picks the mode: `"nearest"` or `"known"` (absent for a single model).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub select: Option<String>,
    /// A known-mode bank: the column of the readings that holds the mode (part of the digest).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mode_column: Option<String>,
    /// Readings averaged in the window (1: none).
    #[serde(default = "one", skip_serializing_if = "is_one")]
    pub window: u8,
    /// First differences scored beside the window's mean.
    #[serde(default, skip_serializing_if = "is_false")]
    pub differences: bool,
    /// The names of the scored values when they are not the features (window differences).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub scored_features: Vec<String>,
    /// Slow-drift re-centring, if on.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub drift: Option<CardDrift>,
}

impl ModelCard {
    /// The card's path for a blob path: the same name with the extension `json`.
    pub fn path_for(blob: &Path) -> PathBuf {
        blob.with_extension("json")
    }

    /// Write the card atomically.
    pub fn write(&self, path: &Path) -> Result<()> {
        output::write_atomic(path, |w| self.write_to(w))
    }

    /// The card's JSON text, into `w`.
    pub fn write_to(&self, w: &mut dyn std::io::Write) -> Result<()> {
        serde_json::to_writer_pretty(&mut *w, self)?;
        w.write_all(b"\n")?;
        Ok(())
    }

    /// Read the card beside `blob_path` and check it belongs to `blob`.
    pub fn read_for(blob_path: &Path, blob: &[u8]) -> Result<Self> {
        let path = Self::path_for(blob_path);
        let text = std::fs::read_to_string(&path).with_context(|| {
            format!(
                "cannot read the model card {} that names the features of {} \
                 (give --features NAME,NAME,... instead)",
                path.display(),
                blob_path.display()
            )
        })?;
        let value: serde_json::Value = serde_json::from_str(&text)
            .with_context(|| format!("{}: not a valid model card", path.display()))?;
        let version = value.get("version").and_then(serde_json::Value::as_u64);
        if version.is_some_and(|v| {
            !(u64::from(CARD_VERSION_OLDEST)..=u64::from(CARD_VERSION)).contains(&v)
        }) {
            bail!(
                "{}: a model card of version {}; this trainer reads versions {CARD_VERSION_OLDEST} \
                 to {CARD_VERSION} (whose feature names are protected by a digest): fit the model \
                 again, or give --features NAME,... in model order",
                path.display(),
                version.unwrap_or(0)
            );
        }
        let card: ModelCard = serde_json::from_value(value)
            .with_context(|| format!("{}: not a valid model card", path.display()))?;
        if card.kind != "ellipsoid-model-card" {
            bail!("{}: not an Ellipsoid model card", path.display());
        }
        let crc = blob_crc(blob);
        if card.blob_crc != crc || card.blob_len != blob.len() {
            bail!(
                "{} describes another blob (CRC {:#010x}, {} bytes) than {} (CRC {:#010x}, {} bytes)",
                path.display(),
                card.blob_crc,
                card.blob_len,
                blob_path.display(),
                crc,
                blob.len()
            );
        }
        // The CRC above says these bytes are the blob the card was written for; its header holds
        // N, so a card must name exactly N distinct features.
        let n = ellipsoid_core::blob::Header::parse(blob).map(|h| usize::from(h.n));
        if let Some(n) = n.ok().filter(|n| card.features.len() != *n) {
            bail!(
                "{}: names {} features, but {} holds a model of {n}",
                path.display(),
                card.features.len(),
                blob_path.display()
            );
        }
        let mut seen = std::collections::HashSet::new();
        if let Some(twice) = card.features.iter().find(|f| !seen.insert(f.as_str())) {
            bail!("{}: names the feature `{twice}` twice", path.display());
        }
        let want = digest_with_mode(
            card.blob_crc,
            &card.features,
            &card.log_features,
            card.mode_column.as_deref(),
        );
        if card.names_digest != want {
            bail!(
                "{}: its feature names ({}) were changed after fit wrote the card (their digest \
                 does not match): scoring with them would match the wrong columns; fit again, or \
                 give --features NAME,... in model order",
                path.display(),
                card.features.join(", ")
            );
        }
        Ok(card)
    }
}

/// The CRC stored in a blob's last four bytes (0 for a blob too short to hold one).
pub fn blob_crc(blob: &[u8]) -> u32 {
    match blob.len().checked_sub(4).and_then(|s| blob.get(s..)) {
        Some(t) => u32::from_le_bytes([t[0], t[1], t[2], t[3]]),
        None => 0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn card_round_trips_and_refuses_another_blob() {
        let dir = tempfile::tempdir().unwrap();
        let blob_path = dir.path().join("m.blob");
        let blob = [1u8, 2, 3, 4, 5, 6, 7, 8];
        let card = ModelCard {
            kind: "ellipsoid-model-card".into(),
            version: CARD_VERSION,
            features: vec!["a".into(), "b".into()],
            log_features: vec![],
            blob_crc: blob_crc(&blob),
            blob_len: blob.len(),
            names_digest: names_digest(blob_crc(&blob), &["a".into(), "b".into()], &[]),
            threshold_method: "chi-square".into(),
            alpha: 1e-4,
            rate_hz: 1.0,
            trained_on: "x.csv".into(),
            modes: vec![],
            select: None,
            mode_column: None,
            window: 1,
            differences: false,
            scored_features: vec![],
            drift: None,
        };
        card.write(&ModelCard::path_for(&blob_path)).unwrap();
        assert_eq!(ModelCard::read_for(&blob_path, &blob).unwrap(), card);
        let other = [1u8, 2, 3, 4, 5, 6, 7, 9];
        let e = ModelCard::read_for(&blob_path, &other).unwrap_err();
        assert!(e.to_string().contains("describes another blob"), "{e}");
        // Names swapped by hand: the CRC still matches, the digest does not.
        let mut swapped = card.clone();
        swapped.features.swap(0, 1);
        swapped.write(&ModelCard::path_for(&blob_path)).unwrap();
        let e = ModelCard::read_for(&blob_path, &blob).unwrap_err();
        assert!(e.to_string().contains("were changed after fit"), "{e}");
        // So is a log feature added by hand.
        let mut logged = card.clone();
        logged.log_features.push("a".into());
        logged.write(&ModelCard::path_for(&blob_path)).unwrap();
        assert!(ModelCard::read_for(&blob_path, &blob).is_err());
        // A version-2 card (written before banks) still reads, and writes no bank field.
        let mut v2 = card.clone();
        v2.version = 2;
        v2.write(&ModelCard::path_for(&blob_path)).unwrap();
        assert_eq!(ModelCard::read_for(&blob_path, &blob).unwrap(), v2);
        let text = std::fs::read_to_string(ModelCard::path_for(&blob_path)).unwrap();
        for field in ["modes", "mode_column", "window", "drift", "differences"] {
            assert!(!text.contains(field), "{field} in {text}");
        }
        let mut v1 = card.clone();
        v1.version = 1;
        v1.write(&ModelCard::path_for(&blob_path)).unwrap();
        let e = ModelCard::read_for(&blob_path, &blob).unwrap_err();
        assert!(e.to_string().contains("versions 2 to 3"), "{e}");
    }

    #[test]
    fn a_renamed_mode_column_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let blob_path = dir.path().join("m.blob");
        let blob = [1u8, 2, 3, 4, 5, 6, 7, 8];
        let features = vec!["a".to_string()];
        let card = ModelCard {
            kind: "ellipsoid-model-card".into(),
            version: CARD_VERSION,
            features: features.clone(),
            log_features: vec![],
            blob_crc: blob_crc(&blob),
            blob_len: blob.len(),
            names_digest: digest_with_mode(blob_crc(&blob), &features, &[], Some("speed")),
            threshold_method: "hotelling".into(),
            alpha: 1e-4,
            rate_hz: 1.0,
            trained_on: "x.csv".into(),
            modes: vec![CardMode {
                mode: 0,
                samples: 10,
                weight: 1.0,
                alarm: 20.0,
                clear: 15.0,
                expected_false_readings_per_day: 1.0,
                at_most_false_readings_per_day: 2.0,
                confidence: 0.9,
            }],
            select: Some("known".into()),
            mode_column: Some("speed".into()),
            window: 4,
            differences: true,
            scored_features: vec!["a".into(), "Δa".into()],
            drift: None,
        };
        card.write(&ModelCard::path_for(&blob_path)).unwrap();
        assert_eq!(ModelCard::read_for(&blob_path, &blob).unwrap(), card);
        let mut renamed = card.clone();
        renamed.mode_column = Some("valve".into());
        renamed.write(&ModelCard::path_for(&blob_path)).unwrap();
        let e = ModelCard::read_for(&blob_path, &blob).unwrap_err();
        assert!(e.to_string().contains("were changed after fit"), "{e}");
        // Without the mode column the digest is the single model's.
        assert_eq!(
            digest_with_mode(7, &features, &[], None),
            names_digest(7, &features, &[])
        );
    }
}
