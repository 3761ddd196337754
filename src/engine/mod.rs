//! The shifted-window backbone on the CPU: the geometry of stages and windows (one source of
//! truth for padding, windows, masks and token footprints), the model's shape, checkpoint
//! loading, the layers and the forward pass, the input (decode, policy, normalise, limits), a
//! session that opens a checkpoint and runs an image, and the worker thread.
//!
//! Depends on the foundation (`error`, `io`) only.

pub mod checkpoint;
pub mod config;
pub mod folder;
pub mod geometry;
pub mod input;
pub mod kernels;
pub mod layers;
pub mod model;
pub mod session;
pub mod worker;

pub use checkpoint::{Checkpoint, LayoutKind, Part};
pub use config::{Config, ConfigOverride};
pub use model::{
    random_timm_state_dict, AttentionTap, Backbone, ForwardOptions, LoadReport, Progress,
    RunControl, StageOutputs,
};
pub use session::{
    open_checkpoint, open_checkpoint_with, read_override, LoadedCheckpoint, Session, SessionOptions,
};
