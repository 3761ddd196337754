//! Mullion: look inside a shifted-window hierarchical vision transformer backbone, on the CPU,
//! from your own checkpoint and your own images.
//!
//! The library holds everything; the binary only parses arguments and dispatches. Modules are
//! layered and imports run one way, from the bottom up (`tests/suite/architecture.rs` checks it):
//!
//! ```text
//! error, io, numeric,    the foundation: errors, atomic files, image listing, AUROC, the
//! caution, probe         caution text, the per-thread count of heavy work
//! engine                 geometry, config, checkpoint, layers, model, input, session, worker
//! annotation             shapes and clipping, the sidecar file, undo history, palette
//! analysis               map kinds, PCA, scaling, colour maps, statistics, map preparation,
//!                        region statistics, two-checkpoint comparison (CKA, cosine, the
//!                        difference map, weight drift), padding studies (sweep, pad order,
//!                        attention on padding, profiles, size advice)
//! render                 panels, legends, text, composed figures
//! headless               one image's figure, the report over a folder, the comparison of
//!                        two checkpoints, merging split runs, the padding study of one
//!                        image, one block's attention weights
//! demo                   the seedling-tray generator, its labels, demo training
//!                        (uses only the foundation, engine and annotation)
//! app                    the window
//! commands               one file per subcommand; the only module that knows clap
//! ```

pub mod analysis;
pub mod annotation;
pub mod app;
pub mod caution;
pub mod commands;
pub mod demo;
pub mod engine;
pub mod error;
pub mod headless;
pub mod io;
pub mod numeric;
pub mod probe;
pub mod render;

pub use error::{Error, Result};
