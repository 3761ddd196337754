//! Attention on padding: for every real query token of a block, the share of its attention
//! (softmax weights, averaged over heads) that falls on keys that are zero padding tokens of
//! the window. Padding tokens are the positions the block's geometry fills with the zero row
//! (`BlockGeometry::gather_index`); queries that are padding themselves are left out.

use crate::analysis::map::{Map, MapKind, Variant};
use crate::engine::geometry::{BlockGeometry, Geometry};
use crate::engine::StageOutputs;
use crate::error::{Error, Result};
use candle_core::Tensor;

/// Per real token of the block's grid (row-major), the mean over heads of the attention weight
/// its query gives to padding keys. `probs` is the block's `[windows, heads, N, N]` tap.
pub fn pad_attention_shares(probs: &Tensor, block: &BlockGeometry) -> Result<Vec<f64>> {
    let n = block.window_area();
    let (windows, heads, q, k) = probs.dims4()?;
    if windows != block.n_windows() || q != n || k != n {
        return Err(Error::Internal(format!(
            "attention weights {:?} do not fit {} windows of {n} tokens",
            probs.dims(),
            block.n_windows()
        )));
    }
    let w: Vec<f32> = probs
        .to_dtype(candle_core::DType::F32)?
        .flatten_all()?
        .to_vec1()?;
    let gather = block.gather_index();
    let real = (block.rows.len * block.cols.len) as u32;
    let mut share = vec![0f64; real as usize];
    for win in 0..windows {
        let tokens = &gather[win * n..(win + 1) * n];
        let pads: Vec<usize> = (0..n).filter(|&j| tokens[j] == real).collect();
        if pads.is_empty() {
            continue;
        }
        for (i, &t) in tokens.iter().enumerate() {
            if t == real {
                continue;
            }
            let mut s = 0f64;
            for h in 0..heads {
                let row = &w[((win * heads + h) * n + i) * n..][..n];
                s += pads.iter().map(|&j| row[j] as f64).sum::<f64>();
            }
            share[t as usize] = s / heads as f64;
        }
    }
    Ok(share)
}

/// Bytes the attention weights of every block take when a pass keeps them all
/// (`ForwardOptions::attention_all`): f32 `[windows, heads, N, N]` per block. `None` when too
/// many to count.
pub fn all_attention_bytes(geometry: &Geometry, heads: &[usize]) -> Option<u64> {
    let mut total = 0u64;
    for (sg, &h) in geometry.stages.iter().zip(heads) {
        for b in &sg.blocks {
            let n = b.window_area() as u64;
            let bytes = (b.n_windows() as u64)
                .checked_mul(h as u64)?
                .checked_mul(n.checked_mul(n)?)?
                .checked_mul(4)?;
            total = total.checked_add(bytes)?;
        }
    }
    Some(total)
}

/// Mean and largest share over a block's real query tokens.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PadShareStats {
    pub stage: usize,
    pub block: usize,
    pub mean_share: f64,
    pub max_share: f64,
    pub tokens: usize,
}

/// The statistics of every block whose attention `out` kept (a pass with `attention_all`).
pub fn pad_attention_stats(out: &StageOutputs) -> Result<Vec<PadShareStats>> {
    if out.attentions.is_empty() {
        return Err(Error::Internal(
            "attention on padding needs a pass that kept every block's attention".into(),
        ));
    }
    out.attentions
        .iter()
        .map(|tap| {
            let geo = &out.geometry.stages[tap.stage].blocks[tap.block];
            let s = pad_attention_shares(&tap.weights, geo)?;
            Ok(PadShareStats {
                stage: tap.stage,
                block: tap.block,
                mean_share: s.iter().sum::<f64>() / s.len().max(1) as f64,
                max_share: s.iter().copied().fold(0.0, f64::max),
                tokens: s.len(),
            })
        })
        .collect()
}

/// The attention-on-padding map of block `.0` of every stage.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct AttentionOnPadding(pub usize);

impl MapKind for AttentionOnPadding {
    fn id(&self) -> String {
        format!("pad-attention:{}", self.0)
    }
    fn label(&self) -> String {
        format!(
            "attention on padding: share of each token's attention on pad keys (block {}, mean over heads)",
            self.0
        )
    }
    fn variant(&self) -> Option<Variant> {
        Some(Variant::Attention)
    }
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map> {
        let sg = out.geometry.stages.get(stage).ok_or_else(|| {
            Error::BadArgument(format!(
                "stage {stage} does not exist; this model has stages 0 to {}",
                out.geometry.stages.len().saturating_sub(1)
            ))
        })?;
        let geo = sg.blocks.get(self.0).ok_or_else(|| {
            Error::BadArgument(format!(
                "block {} does not exist in stage {stage}, which has blocks 0 to {}",
                self.0,
                sg.blocks.len().saturating_sub(1)
            ))
        })?;
        let tap = out
            .attentions
            .iter()
            .find(|t| (t.stage, t.block) == (stage, self.0))
            .ok_or_else(|| {
                Error::BadArgument(format!(
                    "the map '{}' needs a pass that kept the attention weights; run it first",
                    self.id()
                ))
            })?;
        let s = pad_attention_shares(&tap.weights, geo)?;
        Ok(Map::Scalar {
            rows: sg.grid.0,
            cols: sg.grid.1,
            values: s.iter().map(|&v| v as f32).collect(),
        })
    }
    fn compute_pair(
        &self,
        a: &StageOutputs,
        b: Option<&StageOutputs>,
        stage: usize,
    ) -> Result<Map> {
        // Whichever pass kept the attention weights.
        match b {
            Some(b) if a.attentions.is_empty() => self.compute(b, stage),
            _ => self.compute(a, stage),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{AxisPlan, PadOrder};

    // Swin-T at 224: per block windows x heads x 49^2 x 4 bytes; windows 64, 16, 4, 1 and
    // heads 3, 6, 12, 24 over 2, 2, 6, 2 blocks: 2401 * 4 * (384 + 192 + 288 + 48).
    #[test]
    fn attention_bytes_of_swin_t_at_224() {
        use crate::engine::geometry::{ModelShape, Semantics, SmallStage};
        let shape = ModelShape {
            patch: 4,
            depths: vec![2, 2, 6, 2],
            window: (7, 7),
            built_for: None,
        };
        let sem = Semantics {
            pad_order: PadOrder::PadThenShift,
            small_stage: SmallStage::Clamp,
        };
        let g = Geometry::new((224, 224), &shape, sem);
        assert_eq!(
            all_attention_bytes(&g, &[3, 6, 12, 24]),
            Some(2401 * 4 * 912)
        );
    }

    // A 1x3 grid in one window of 1x4: position 3 is padding. With uniform weights 1/4 every
    // real query gives 1/4 to the pad key; with one head giving 0.5 and the other 0, the mean
    // over heads is 0.25.
    #[test]
    fn share_by_hand() {
        let block = BlockGeometry {
            rows: AxisPlan::new(1, 1, 0, PadOrder::PadThenShift),
            cols: AxisPlan::new(3, 4, 0, PadOrder::PadThenShift),
        };
        let mut w = vec![0.25f32; 2 * 16];
        for i in 0..4 {
            // head 0: 0.5 on the pad key; head 1: 0 on it.
            w[i * 4..i * 4 + 4].copy_from_slice(&[0.5 / 3.0, 0.5 / 3.0, 0.5 / 3.0, 0.5]);
            w[16 + i * 4..16 + i * 4 + 4].copy_from_slice(&[1.0 / 3.0, 1.0 / 3.0, 1.0 / 3.0, 0.0]);
        }
        let t = Tensor::from_vec(w, (1, 2, 4, 4), &candle_core::Device::Cpu).unwrap();
        let s = pad_attention_shares(&t, &block).unwrap();
        assert_eq!(s.len(), 3);
        assert!(s.iter().all(|v| (v - 0.25).abs() < 1e-7), "{s:?}");
    }
}
