//! An example Ellipsoid sensor node for Cortex-M: model slots in flash, readings in, an alarm and
//! a fault line out.
//!
//! The application is board-independent and is tested on the host with mock pins and a mock
//! board:
//!
//! * [`slots`]: the two model slots, how a blob in one is checked, and which slot wins at boot.
//! * [`source`]: the [`source::ReadingSource`] trait, and the in-memory table the emulator uses.
//! * [`pins`]: an alarm or fault [`pins::Line`] on any embedded-hal 1.0 `OutputPin`, active-high or low.
//! * [`node`]: the application itself, boot and the scoring loop, and its report.
//! * [`app`]: the image's program on any board: the node on the board's slots, lines and
//!   readings, the lines around the node's report, and the end of the run.
//! * [`board`]: the [`board::Board`] trait, all the application asks of a board.
//!
//! What ties it to one board is one file, `src/board/<board>.rs`, and its memory map
//! `boards/<board>/memory.x`, both chosen by the board's cargo feature (here `mps2-an386`, the
//! emulated Arm MPS2 AN386, the default). The binary `ellipsoid-node` (in `src/main.rs`) only hands
//! that board to [`app::run`]. On bare-metal targets, `measure` holds what every Cortex-M board can
//! use for the figures: a SysTick counter and a stack painter.
//!
//! # Memory layout
//!
//! The memory map reserves, apart from the firmware's own flash, two model slots (`MODEL_A`,
//! `MODEL_B`) and, on the emulator only, a region for the reading table. Their addresses are
//! linker symbols (`_model_a_start`, `_model_b_start`, `_readings_start`), so `arm-none-eabi-nm` on
//! the image tells where to flash a blob. `arm-none-eabi-size -A` gives the sections' sizes.
#![cfg_attr(not(test), no_std)]
#![deny(missing_docs)]

pub mod app;
pub mod board;
#[cfg(test)]
mod fixtures;
#[cfg(all(feature = "cortex-m", target_os = "none"))]
pub mod measure;
pub mod node;
pub mod pins;
pub mod slots;
pub mod source;
