//! What a map is: one value (or one colour) per token of a stage grid, the trait every map kind
//! implements, and the tokens of one stage copied out of the forward pass.
//!
//! Maps are computed from `StageOutputs::stages[stage]`, the raw output of the stage's blocks
//! (`[rows, cols, C]`, no output norm), over the stage's own token grid; window padding tokens
//! are never part of a stage output, so every value belongs to a real token.

use crate::engine::StageOutputs;
use crate::error::{Error, Result};

/// One value (or one colour) per token of a stage grid, row-major.
#[derive(Clone, Debug, PartialEq)]
pub enum Map {
    /// A scalar per token; raw (any range) until [`normalise_maps`] maps it to [0, 1].
    Scalar {
        rows: usize,
        cols: usize,
        values: Vec<f32>,
    },
    /// A colour per token, each channel in [0, 1]; drawn as is, without a colour map.
    Rgb {
        rows: usize,
        cols: usize,
        values: Vec<[f32; 3]>,
    },
}

impl Map {
    /// Token grid (rows, cols).
    pub fn dims(&self) -> (usize, usize) {
        match self {
            Map::Scalar { rows, cols, .. } | Map::Rgb { rows, cols, .. } => (*rows, *cols),
        }
    }

    /// The scalar values, or `None` for a colour map.
    pub fn scalars(&self) -> Option<&[f32]> {
        match self {
            Map::Scalar { values, .. } => Some(values),
            Map::Rgb { .. } => None,
        }
    }
}

/// How the second forward pass a kind needs differs from the image's own pass, for kinds that
/// compare a pass of the *same* checkpoint with a changed one (see `analysis::padding`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Variant {
    /// `rows` zero rows at the bottom and `cols` zero columns at the right of the normalised
    /// input (the zeros the model's own padding adds).
    PaddedInput { rows: usize, cols: usize },
    /// The other pad order, the small-stage rule kept.
    OtherPadOrder,
    /// The same input and semantics, keeping every block's attention weights.
    Attention,
}

/// A way of looking at a stage: one value or colour per token.
pub trait MapKind: Send + Sync {
    /// Short machine name, as the command line spells it (`norm`, `channel:12`, `pca`).
    fn id(&self) -> String;
    /// Human-readable name for captions and menus.
    fn label(&self) -> String;
    /// The map of `stage` of one forward pass.
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map>;
    /// Whether the kind compares two checkpoints and so needs `b` in [`MapKind::compute_pair`].
    fn needs_pair(&self) -> bool {
        false
    }
    /// The second pass of the same checkpoint this kind needs, if any. Such a kind gets that
    /// pass as `b` in [`MapKind::compute_pair`]; `analysis::padding::run_variant` runs it.
    fn variant(&self) -> Option<Variant> {
        None
    }
    /// The map of `stage` from the forward pass `a` and, for kinds that compare two
    /// checkpoints (or a pass with its [`MapKind::variant`]), the pass `b` of the same image through the second one. Kinds of one pass
    /// ignore `b`.
    fn compute_pair(
        &self,
        a: &StageOutputs,
        b: Option<&StageOutputs>,
        stage: usize,
    ) -> Result<Map> {
        let _ = b;
        self.compute(a, stage)
    }
}

/// The tokens of one stage as a row-major `[rows * cols, channels]` matrix of f32.
pub struct Tokens {
    pub rows: usize,
    pub cols: usize,
    pub channels: usize,
    pub data: Vec<f32>,
}

impl Tokens {
    /// Tokens from a row-major `[rows * cols, channels]` buffer.
    pub fn new(rows: usize, cols: usize, channels: usize, data: Vec<f32>) -> Result<Self> {
        if rows.checked_mul(cols).and_then(|n| n.checked_mul(channels)) != Some(data.len()) {
            return Err(Error::BadArgument(format!(
                "{} values do not fill {rows}x{cols} tokens of {channels} channels",
                data.len()
            )));
        }
        Ok(Tokens {
            rows,
            cols,
            channels,
            data,
        })
    }

    /// Token `i`'s channel vector.
    pub fn token(&self, i: usize) -> &[f32] {
        &self.data[i * self.channels..(i + 1) * self.channels]
    }
    /// Number of tokens.
    pub fn len(&self) -> usize {
        self.rows * self.cols
    }
    /// True when the grid has no token.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// Copy the output of `stage` out of the tensor, checking the stage exists.
pub fn stage_tokens(out: &StageOutputs, stage: usize) -> Result<Tokens> {
    let t = out.stages.get(stage).ok_or_else(|| {
        Error::BadArgument(format!(
            "stage {stage} does not exist; this model has stages 0 to {}",
            out.stages.len().saturating_sub(1)
        ))
    })?;
    let (rows, cols, channels) = t.dims3()?;
    let data = t
        .to_dtype(candle_core::DType::F32)?
        .flatten_all()?
        .to_vec1::<f32>()?;
    Ok(Tokens {
        rows,
        cols,
        channels,
        data,
    })
}
