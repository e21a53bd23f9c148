//! The golden models whose blobs and scores are pinned: the worked example of `core/FORMAT.md`
//! (N = 2; its bytes are pinned in `tests/tests/golden_blob.rs`), and a model of the firmware
//! example's dimension (N = 5), so that the emulator run can score the same readings.
//!
//! The N = 5 model is invented, not fitted: a lower-triangular `W` with every element off the
//! diagonal non-zero and no value a short binary fraction, so that each product and each partial
//! sum of a score rounds, and another order of the operations gives other bits. (With N = 2 no
//! reordering can show: `a + b` and `b + a` are the same IEEE-754 sum, and a row of `W` has at
//! most two terms.)

use ellipsoid_core::{AlarmPolicy, ModelMeta, ModelParams, Preprocess, Thresholds};

/// The worked example of `core/FORMAT.md`.
pub fn golden_n2() -> ModelParams<2> {
    ModelParams {
        meta: ModelMeta {
            model_id: 0x00C0_FFEE,
            trained_at: 1_767_225_600, // 2026-01-01T00:00:00Z
            sequence: 3,
        },
        preprocess: Preprocess {
            log_mask: 0b10,
            offset: [12.5, 1.0],
            scale: [0.5, 2.0],
        },
        mean: [0.0, 0.25],
        w: [[1.0, 0.0], [-0.5, 1.5]],
        thresholds: Thresholds {
            alarm: 13.8155,
            clear: 9.2103,
        },
        policy: AlarmPolicy {
            raise_after: 3,
            clear_after: 300,
            latch: true,
        },
    }
}

/// A model of five features, the firmware example's dimension; feature 3 is log-transformed.
pub fn golden_n5() -> ModelParams<5> {
    ModelParams {
        meta: ModelMeta {
            model_id: 0x005E_ED05,
            trained_at: 1_767_225_600, // 2026-01-01T00:00:00Z
            sequence: 1,
        },
        preprocess: Preprocess {
            log_mask: 0b01000,
            offset: [41.3, 2.71, 118.6, 0.93, 6.17],
            scale: [0.127, 3.31, 0.0419, 2.23, 0.613],
        },
        mean: [0.013, 0.107, -0.051, 0.193, -0.029],
        w: [
            [1.07, 0.0, 0.0, 0.0, 0.0],
            [-0.313, 1.13, 0.0, 0.0, 0.0],
            [0.271, -0.443, 1.31, 0.0, 0.0],
            [-0.119, 0.367, -0.583, 1.47, 0.0],
            [0.093, -0.211, 0.337, -0.619, 1.66],
        ],
        thresholds: Thresholds {
            alarm: 15.0863,
            clear: 11.0705,
        },
        policy: AlarmPolicy {
            raise_after: 2,
            clear_after: 3,
            latch: false,
        },
    }
}
