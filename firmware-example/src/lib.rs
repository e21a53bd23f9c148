//! An example Ellipsoid sensor node for Cortex-M: model slots in flash, readings in, an alarm and
//! a fault line out.
//!
//! The application logic is board-independent and is tested on the host with mock pins:
//!
//! * [`slots`]: the two model slots, how a blob in one is checked, and which slot wins at boot.
//! * [`source`]: the [`source::ReadingSource`] trait, and the in-memory table the emulator uses.
//! * [`pins`]: an alarm or fault [`pins::Line`] on any embedded-hal 1.0 `OutputPin`, active-high or low.
//! * [`node`]: the application itself, boot and the scoring loop, and its report.
//!
//! What ties it to a board is one module, `board` (here the emulated Arm MPS2 AN386, built with
//! the feature `mps2-an386`), and the memory map `boards/mps2_an386/memory.x`. The binary
//! `ellipsoid-node` (in `src/main.rs`) only joins the two.
//!
//! # Memory layout
//!
//! The memory map reserves, apart from the firmware's own flash, two model slots (`MODEL_A`,
//! `MODEL_B`) and, on the emulator only, a region for the reading table. Their addresses are
//! linker symbols (`_model_a_start`, `_model_b_start`, `_readings_start`), so `arm-none-eabi-nm` on
//! the image tells where to flash a blob. `arm-none-eabi-size -A` gives the sections' sizes.
#![cfg_attr(not(test), no_std)]
#![deny(missing_docs)]

#[cfg(all(feature = "mps2-an386", target_os = "none"))]
#[path = "board/mps2_an386.rs"]
pub mod board;
#[cfg(test)]
mod fixtures;
#[cfg(all(feature = "cortex-m", target_os = "none"))]
pub mod measure;
pub mod node;
pub mod pins;
pub mod slots;
pub mod source;
