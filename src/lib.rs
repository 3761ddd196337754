//! Mullion: look inside a shifted-window hierarchical vision transformer backbone, on the CPU,
//! from your own checkpoint and your own images.
//!
//! The library holds everything; the binary only parses arguments and dispatches.

pub mod analysis;
pub mod app;
pub mod backbone;
pub mod cli;
pub mod error;
pub mod figure_cli;
pub mod geometry;
pub mod input;
pub mod labels;
pub mod render;
pub mod report_cli;
pub mod scene;
pub mod train;
pub mod worker;

pub use error::{Error, Result};
