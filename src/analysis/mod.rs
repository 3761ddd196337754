//! What to show of a stage and what to measure: map kinds that turn a stage's tokens into one
//! value (or one colour) per token (norm, channel, PCA), their scaling for display, colour maps,
//! per-stage statistics, map preparation for every picture and region statistics.
//!
//! Every kind implements [`MapKind`], so new kinds drop in beside the ones here without touching
//! the renderer: it only sees a [`Map`]. Kinds that compare two checkpoints (the difference map
//! in `compare/`) get the second forward pass through [`MapKind::compute_pair`]; `compare/` also
//! holds linear CKA, per-token cosine and weight drift. Kinds that compare the image's pass
//! with a changed pass of the same checkpoint (padding sensitivity, pad-order disagreement,
//! attention on padding, in `padding/`) name that pass with [`MapKind::variant`].
//! Depends on the foundation, the engine and annotation.

pub mod colormap;
mod colormap_data;
pub mod compare;
pub mod inspect;
pub mod kinds;
pub mod map;
pub mod padding;
pub mod pca;
pub mod prepare;
pub mod region_stats;
pub mod scale;
pub mod stats;

/// The caution lives in the foundation so every room (the demo's model card too) shares it.
pub use crate::caution::CAUTION;
pub use colormap::Colormap;
pub use compare::TokenDifference;
pub use kinds::{
    parse_map_kind, rank_channels, rank_token_channels, token_norm, Channel, TokenNorm,
};
pub use map::{stage_tokens, Map, MapKind, Tokens, Variant};
pub use padding::{AttentionOnPadding, OrderDisagreement, PaddingSensitivity};
pub use pca::{fit_pca, Pca, PcaFit};
pub use prepare::{prepare_stage_pair, prepare_stages, PreparedStage};
pub use region_stats::{region_stats, rows_csv, token_weights, RegionStats, INSIDE_WEIGHT};
pub use scale::{normalise_maps, percentile, ScaleRange, ScaleSpec};
pub use stats::{
    stage_stats, stats_csv, stats_json, write_stats_csv, write_stats_json, StageStats,
};
