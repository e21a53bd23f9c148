//! Cross-crate and outside-reference tests live in `tests/tests/`.
