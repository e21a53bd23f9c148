//! From a dimension known at run time to the core's `const N`.
//!
//! The core's `Model<N>` fixes the number of features at compile time, as a device build does.
//! The trainer learns it from a CSV header, so it picks the matching instantiation here.

/// Run `$body` with `$N` bound as a `const usize` equal to `$n` (1 to 32).
/// Evaluates to `Some(body)`, or `None` when `$n` is outside that range.
///
/// ```
/// let sum = ellipsoid_trainer::with_dim!(3usize, N => { [1u8; N].len() });
/// assert_eq!(sum, Some(3));
/// ```
#[macro_export]
macro_rules! with_dim {
    ($n:expr, $N:ident => $body:block) => {
        match $n {
            1 => { const $N: usize = 1; Some($body) }
            2 => { const $N: usize = 2; Some($body) }
            3 => { const $N: usize = 3; Some($body) }
            4 => { const $N: usize = 4; Some($body) }
            5 => { const $N: usize = 5; Some($body) }
            6 => { const $N: usize = 6; Some($body) }
            7 => { const $N: usize = 7; Some($body) }
            8 => { const $N: usize = 8; Some($body) }
            9 => { const $N: usize = 9; Some($body) }
            10 => { const $N: usize = 10; Some($body) }
            11 => { const $N: usize = 11; Some($body) }
            12 => { const $N: usize = 12; Some($body) }
            13 => { const $N: usize = 13; Some($body) }
            14 => { const $N: usize = 14; Some($body) }
            15 => { const $N: usize = 15; Some($body) }
            16 => { const $N: usize = 16; Some($body) }
            17 => { const $N: usize = 17; Some($body) }
            18 => { const $N: usize = 18; Some($body) }
            19 => { const $N: usize = 19; Some($body) }
            20 => { const $N: usize = 20; Some($body) }
            21 => { const $N: usize = 21; Some($body) }
            22 => { const $N: usize = 22; Some($body) }
            23 => { const $N: usize = 23; Some($body) }
            24 => { const $N: usize = 24; Some($body) }
            25 => { const $N: usize = 25; Some($body) }
            26 => { const $N: usize = 26; Some($body) }
            27 => { const $N: usize = 27; Some($body) }
            28 => { const $N: usize = 28; Some($body) }
            29 => { const $N: usize = 29; Some($body) }
            30 => { const $N: usize = 30; Some($body) }
            31 => { const $N: usize = 31; Some($body) }
            32 => { const $N: usize = 32; Some($body) }
            _ => None,
        }
    };
}

/// The largest dimension [`with_dim!`] handles, the same as the core's limit.
pub const MAX_DIM: usize = ellipsoid_core::MAX_FEATURES;

#[cfg(test)]
mod tests {
    #[test]
    fn every_dimension_maps_to_its_const() {
        for n in 1..=super::MAX_DIM {
            assert_eq!(with_dim!(n, N => { N }), Some(n));
        }
        assert_eq!(with_dim!(0usize, N => { N }), None);
        assert_eq!(with_dim!(33usize, N => { N }), None);
    }
}
