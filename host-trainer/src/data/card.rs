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

/// The card format this trainer writes and reads. Version 2 added `names_digest`.
pub const CARD_VERSION: u32 = 2;

/// CRC-32 (the blob's own checksum) of the blob's CRC, then each feature name and each log
/// feature name, in order, each ended by a zero byte, the two lists separated by a `0x01` byte.
pub fn names_digest(blob_crc: u32, features: &[String], log_features: &[String]) -> String {
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
        if version.is_some_and(|v| v != u64::from(CARD_VERSION)) {
            bail!(
                "{}: a model card of version {}; this trainer reads version {CARD_VERSION} \
                 (whose feature names are protected by a digest): fit the model again, or give \
                 --features NAME,... in model order",
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
        let want = names_digest(card.blob_crc, &card.features, &card.log_features);
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
    }
}
