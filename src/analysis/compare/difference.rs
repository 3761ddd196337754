//! The difference map: per token, `1 - cos(a_t, b_t)` between two checkpoints' outputs for the
//! same image (0 where the token's direction did not move, up to 2 where it reversed). It is a
//! map kind like the others, but it needs the second forward pass: it implements
//! [`MapKind::compute_pair`] and says so with [`MapKind::needs_pair`].

use super::cosine::token_cosines;
use crate::analysis::map::{stage_tokens, Map, MapKind};
use crate::engine::StageOutputs;
use crate::error::{Error, Result};

/// `1 - cosine` per token between checkpoint A's and checkpoint B's stage outputs.
#[derive(Clone, Copy, Debug, Default)]
pub struct TokenDifference;

impl MapKind for TokenDifference {
    fn id(&self) -> String {
        "difference".into()
    }
    fn label(&self) -> String {
        "1 - cosine(A token, B token)".into()
    }
    fn needs_pair(&self) -> bool {
        true
    }
    fn compute(&self, _out: &StageOutputs, _stage: usize) -> Result<Map> {
        Err(Error::BadArgument(
            "the difference map compares two checkpoints; give a second one".into(),
        ))
    }
    fn compute_pair(
        &self,
        a: &StageOutputs,
        b: Option<&StageOutputs>,
        stage: usize,
    ) -> Result<Map> {
        let Some(b) = b else {
            return self.compute(a, stage);
        };
        let (ta, tb) = (stage_tokens(a, stage)?, stage_tokens(b, stage)?);
        let cos = token_cosines(&ta, &tb)
            .map_err(|e| Error::BadArgument(format!("stage {stage}: {e}")))?;
        Ok(Map::Scalar {
            rows: ta.rows,
            cols: ta.cols,
            values: cos.iter().map(|c| (1.0 - c) as f32).collect(),
        })
    }
}
