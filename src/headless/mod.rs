//! Work without the window, for the command line and scripts: one image's figure (with its
//! per-stage statistics), and the region report over a folder (`regions.csv`, `summary.json`,
//! optional figures, a rerun cache per image, split into shards and merged back).
//!
//! Above `render` (both save figures) and below `commands`, which only turns arguments into the
//! typed options here.

pub mod figure;
pub mod merge;
pub mod report;

pub use figure::{save_figure, FigureOptions, FigureOutcome};
pub use merge::{merge_reports, MergeOutcome};
pub use report::{run_report, ReportOptions, ReportOutcome, ReportRow, Shard, Summary};
