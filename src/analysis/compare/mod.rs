//! Two checkpoints side by side: linear CKA between their stage tokens (direct, and streamed
//! over many images with mergeable sums), per-token cosine, the difference map kind
//! (1 - cosine per token) and the drift of every weight tensor.

pub mod cka;
pub mod cosine;
pub mod difference;
pub mod drift;
mod exact;

pub use cka::{linear_cka, CkaSums};
pub use cosine::{token_cosines, CosineStats, CosineSums};
pub use difference::TokenDifference;
pub use drift::{weight_drift, Drift, DriftRow, DRIFT_COLUMNS};
