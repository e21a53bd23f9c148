//! The decoder and the scorer under arbitrary input: see `fuzz/src/lib.rs` for what must hold.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| ellipsoid_fuzz::check(data));
