//! Two checkpoints side by side: linear CKA between their stage tokens (direct, and streamed
//! over many images with mergeable sums), per-token cosine, the difference map kind
//! (1 - cosine per token) and the drift of every weight tensor.

pub mod cka;
pub mod cosine;
pub mod difference;
pub mod drift;
mod exact;
pub mod pair;

pub use cka::{linear_cka, CkaSums};
pub use cosine::{token_cosines, CosineStats, CosineSums};
pub use difference::TokenDifference;
pub use drift::{
    group_drift, weight_drift, Drift, DriftGroup, DriftRow, GroupDrift, DRIFT_COLUMNS,
};
pub use pair::{pair_problem, prepare_pair_view, DifferenceStage, PairView};
