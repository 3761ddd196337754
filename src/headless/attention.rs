//! One block's attention weights of one image (`mullion attention`): `probs`
//! `[windows, heads, N, N]` in the model's own window order for that block, and
//! `window_tokens` `[windows, N, 2]` (i64): the stage-grid row and column, in the unshifted
//! frame, of the token at every window position, -1 for padding. Both come from the block's
//! geometry, the one the model gathers with.

use crate::engine::geometry::BlockGeometry;
use crate::engine::{ForwardOptions, Session, SessionOptions};
use crate::error::{Error, Result};
use candle_core::{Device, Tensor};
use std::collections::HashMap;
use std::path::PathBuf;

/// What `mullion attention` needs, typed.
#[derive(Clone, Debug)]
pub struct AttentionOptions {
    pub session: SessionOptions,
    pub image: PathBuf,
    pub stage: usize,
    pub block: usize,
    /// Output safetensors file.
    pub out: PathBuf,
}

/// The shape of what was written.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct AttentionOutcome {
    pub windows: usize,
    pub heads: usize,
    pub tokens_per_window: usize,
    pub shifted: bool,
}

/// `[windows, N, 2]` (row, col) of every window position; (-1, -1) for padding.
pub fn window_tokens(block: &BlockGeometry) -> Result<Tensor> {
    let (h, w) = (block.rows.len, block.cols.len);
    let pad = (h * w) as u32;
    let gather = block.gather_index();
    let mut v = Vec::with_capacity(gather.len() * 2);
    for &t in &gather {
        if t == pad {
            v.extend([-1i64, -1]);
        } else {
            v.extend([(t as usize / w) as i64, (t as usize % w) as i64]);
        }
    }
    Ok(Tensor::from_vec(
        v,
        (block.n_windows(), block.window_area(), 2),
        &Device::Cpu,
    )?)
}

/// Check the stage and block exist in a model of these depths (the message names the limit).
pub fn check_block(depths: &[usize], stage: usize, block: usize) -> Result<()> {
    let Some(&d) = depths.get(stage) else {
        return Err(Error::BadArgument(format!(
            "--stage {stage}: this checkpoint has stages 0 to {}",
            depths.len().saturating_sub(1)
        )));
    };
    if block >= d {
        return Err(Error::BadArgument(format!(
            "--block {block}: stage {stage} has blocks 0 to {}",
            d.saturating_sub(1)
        )));
    }
    Ok(())
}

/// Run the image, keep the block's attention and write both tensors.
pub fn run_attention(opts: &AttentionOptions) -> Result<AttentionOutcome> {
    let inputs = opts.session.run_inputs(&opts.image);
    crate::io::check_outputs(&inputs, &[("--out", opts.out.as_path())])?;
    let session = Session::open(&opts.session)?;
    check_block(&session.model.config.depths, opts.stage, opts.block)?;
    let x = session.load_input(&opts.image)?;
    let out = session.forward_input(
        &opts.image,
        &x,
        &ForwardOptions {
            attention_of: Some((opts.stage, opts.block)),
            ..ForwardOptions::default()
        },
    )?;
    let tap = out
        .attention
        .ok_or_else(|| Error::Internal("the forward pass kept no attention".into()))?;
    let block = &out.geometry.stages[opts.stage].blocks[opts.block];
    let (windows, heads, n, _) = tap.weights.dims4()?;
    let mut tensors = HashMap::new();
    tensors.insert("probs".to_string(), tap.weights.contiguous()?);
    tensors.insert("window_tokens".to_string(), window_tokens(block)?);
    crate::io::save_tensors(&tensors, &opts.out)?;
    Ok(AttentionOutcome {
        windows,
        heads,
        tokens_per_window: n,
        shifted: block.is_shifted(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{AxisPlan, PadOrder};

    #[test]
    fn tokens_of_a_padded_window() {
        // 1x3 grid in one 1x4 window: the last position is padding.
        let b = BlockGeometry {
            rows: AxisPlan::new(1, 1, 0, PadOrder::PadThenShift),
            cols: AxisPlan::new(3, 4, 0, PadOrder::PadThenShift),
        };
        let t: Vec<i64> = window_tokens(&b)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        assert_eq!(t, vec![0, 0, 0, 1, 0, 2, -1, -1]);
        assert!(check_block(&[2, 2], 1, 1).is_ok());
        assert!(check_block(&[2, 2], 2, 0)
            .unwrap_err()
            .to_string()
            .contains("stages 0 to 1"));
        assert!(check_block(&[2, 2], 0, 2)
            .unwrap_err()
            .to_string()
            .contains("blocks 0 to 1"));
    }
}
