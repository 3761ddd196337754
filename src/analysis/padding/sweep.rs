//! The padding sweep: the image as it is against the image with `p` extra zero rows at the
//! bottom and `p` zero columns at the right, added after normalisation (the zeros the model's
//! own padding adds). Per stage, every token of the unpadded run's grid is compared with the
//! token at the same grid position of the padded run (same top-left origin): their cosine.
//! Tokens whose cosine is 1 did not notice the extra padding; the padding sensitivity map
//! `1 - cosine` shows which rows and columns move when only the padding grows.

use crate::analysis::compare::token_cosines;
use crate::analysis::map::{stage_tokens, Map, MapKind, Tokens, Variant};
use crate::engine::StageOutputs;
use crate::error::{Error, Result};
use candle_core::Tensor;

/// Largest extra padding accepted, in pixels (the padded image must stay a valid input).
pub const MAX_PAD_PX: usize = 4096;

/// `x` (`[chans, H, W]`) with `rows` zero rows appended at the bottom and `cols` zero columns
/// at the right.
pub fn pad_input(x: &Tensor, rows: usize, cols: usize) -> Result<Tensor> {
    Ok(x.pad_with_zeros(1, 0, rows)?.pad_with_zeros(2, 0, cols)?)
}

/// The tokens of `t` inside its top-left `rows x cols` corner.
fn crop(t: &Tokens, rows: usize, cols: usize) -> Result<Tokens> {
    if rows > t.rows || cols > t.cols {
        return Err(Error::Internal(format!(
            "a padded run's grid {}x{} is smaller than the unpadded {rows}x{cols}",
            t.rows, t.cols
        )));
    }
    let mut data = Vec::with_capacity(rows * cols * t.channels);
    for r in 0..rows {
        let start = r * t.cols * t.channels;
        data.extend_from_slice(&t.data[start..start + cols * t.channels]);
    }
    Tokens::new(rows, cols, t.channels, data)
}

/// Per token of `stage`'s unpadded grid, the cosine between the unpadded pass `base` and the
/// padded pass `padded` (row-major over the unpadded grid).
pub fn sweep_cosines(
    base: &StageOutputs,
    padded: &StageOutputs,
    stage: usize,
) -> Result<(Tokens, Vec<f64>)> {
    let a = stage_tokens(base, stage)?;
    let b = crop(&stage_tokens(padded, stage)?, a.rows, a.cols)?;
    let cos = token_cosines(&a, &b)?;
    Ok((a, cos))
}

/// `1 - cos(token, same token with p more pixels of zero padding)`: the padding sensitivity.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct PaddingSensitivity {
    /// Extra zero rows (bottom) and columns (right), in input pixels.
    pub pad_px: usize,
}

impl PaddingSensitivity {
    pub fn new(pad_px: usize) -> Result<Self> {
        if pad_px > MAX_PAD_PX {
            return Err(Error::BadArgument(format!(
                "a padding of {pad_px} pixels is more than the {MAX_PAD_PX} allowed"
            )));
        }
        Ok(PaddingSensitivity { pad_px })
    }
}

impl MapKind for PaddingSensitivity {
    fn id(&self) -> String {
        format!("padding:{}", self.pad_px)
    }
    fn label(&self) -> String {
        format!(
            "padding sensitivity: 1 - cosine(token, token with {} px more zero padding)",
            self.pad_px
        )
    }
    fn variant(&self) -> Option<Variant> {
        Some(Variant::PaddedInput {
            rows: self.pad_px,
            cols: self.pad_px,
        })
    }
    fn compute(&self, _out: &StageOutputs, _stage: usize) -> Result<Map> {
        Err(Error::BadArgument(format!(
            "the map '{}' compares the image with a padded copy; run the padded pass first",
            self.id()
        )))
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
        let (t, cos) = sweep_cosines(a, b, stage)?;
        Ok(Map::Scalar {
            rows: t.rows,
            cols: t.cols,
            values: cos.iter().map(|c| (1.0 - c) as f32).collect(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pad_appends_zeros_bottom_right() {
        let x = Tensor::from_vec(
            (1..=6).map(|v| v as f32).collect::<Vec<_>>(),
            (1, 2, 3),
            &candle_core::Device::Cpu,
        )
        .unwrap();
        let y = pad_input(&x, 1, 2).unwrap();
        assert_eq!(y.dims(), &[1, 3, 5]);
        let v: Vec<f32> = y.flatten_all().unwrap().to_vec1().unwrap();
        assert_eq!(
            v,
            vec![1., 2., 3., 0., 0., 4., 5., 6., 0., 0., 0., 0., 0., 0., 0.]
        );
    }

    #[test]
    fn crop_keeps_the_top_left_corner() {
        // 2x3 grid of 1-channel tokens 0..6; the 1x2 corner is tokens 0 and 1.
        let t = Tokens::new(2, 3, 1, (0..6).map(|v| v as f32).collect()).unwrap();
        let c = crop(&t, 2, 2).unwrap();
        assert_eq!(c.data, vec![0., 1., 3., 4.]);
        assert!(crop(&t, 3, 1).is_err());
    }
}
