//! The shifted-window backbone: shape, checkpoint loading, layers and the forward pass.

pub mod checkpoint;
pub mod config;
pub mod layers;
pub mod model;

pub use checkpoint::{Checkpoint, LayoutKind, Part};
pub use config::{Config, ConfigOverride};
pub use model::{
    random_timm_state_dict, AttentionTap, Backbone, ForwardOptions, LoadReport, Progress,
    RunControl, StageOutputs,
};
