//! Work without the window, for the command line and scripts: one image's figure (with its
//! per-stage statistics), and the region report over a folder (`regions.csv`, `summary.json`,
//! optional figures, a rerun cache per image, split into shards and merged back), and the
//! comparison of two checkpoints (`stages.csv`, `drift.csv`, shards merged the same way), the
//! padding and seam study of one image and one block's attention weights.
//!
//! Above `render` (both save figures) and below `commands`, which only turns arguments into the
//! typed options here.

pub mod attention;
pub mod compare;
pub mod compare_merge;
pub mod figure;
pub mod merge;
pub mod padding;
pub mod report;

pub use attention::{run_attention, AttentionOptions, AttentionOutcome};
pub use compare::{run_compare, CompareOptions, CompareOutcome, StageRow};
pub use figure::{save_figure, FigureOptions, FigureOutcome};
pub use merge::{merge_reports, merge_shards, MergeOutcome, Merged};
pub use padding::{run_padding, PaddingOptions, PaddingOutcome};
pub use report::{run_report, ReportOptions, ReportOutcome, ReportRow, Shard, Summary};
