//! One cell: trimming, numbers, labels.

/// Read a label cell: `0`, `false`, `normal`, `ok` are normal (`false`); `1`, `true`, `anomaly`,
/// `fault` are anomalies (`true`); case does not matter and surrounding spaces are ignored.
pub fn parse_label(cell: &[u8]) -> Option<bool> {
    let c = trim(cell);
    const NORMAL: [&[u8]; 4] = [b"0", b"false", b"normal", b"ok"];
    const ANOMALY: [&[u8]; 4] = [b"1", b"true", b"anomaly", b"fault"];
    if NORMAL.iter().any(|w| c.eq_ignore_ascii_case(w)) {
        Some(false)
    } else if ANOMALY.iter().any(|w| c.eq_ignore_ascii_case(w)) {
        Some(true)
    } else {
        None
    }
}

pub(super) fn trim(b: &[u8]) -> &[u8] {
    let mut s = b;
    while let [first, rest @ ..] = s {
        if first.is_ascii_whitespace() {
            s = rest;
        } else {
            break;
        }
    }
    while let [rest @ .., last] = s {
        if last.is_ascii_whitespace() {
            s = rest;
        } else {
            break;
        }
    }
    s
}

/// Parse a number cell, correctly rounded, straight from the bytes. `fast-float2` accepts the
/// same forms as `str::parse::<f64>` (sign, exponent, `nan`, `inf`, `infinity`) and measured about
/// 1.8× faster on the cells of a wide baseline (4 M cells: 100 ms against 55 ms), which matters
/// because parsing is most of a fit. The test `parses_like_std` pins the agreement.
#[inline]
pub(super) fn parse_f64(cell: &[u8]) -> Option<f64> {
    fast_float2::parse::<f64, _>(cell).ok()
}

pub(super) fn lossy(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// Cells longer than this many characters are cut in messages.
pub const SHOW_CHARS: usize = 40;

/// A cell's text for an error message: as it is, or its first [`SHOW_CHARS`] characters, an
/// ellipsis and its length, so that a 2 MB cell does not flood the terminal.
pub fn shown(b: &[u8]) -> String {
    let text = String::from_utf8_lossy(b);
    let count = text.chars().count();
    if count <= SHOW_CHARS {
        return text.into_owned();
    }
    let head: String = text.chars().take(SHOW_CHARS).collect();
    format!("{head}… ({} bytes)", b.len())
}
