//! The attention of one query token over the keys of its window, for the attention inspector:
//! which window the query sits in for a block (regular or shifted), where each key of that
//! window lies on the stage's padded grid, its attention weight (one head, or the mean over
//! heads), and which keys are padding or removed by the shift mask. Positions come from the
//! block's geometry (`engine::geometry`), the same one the forward pass gathered with.

use crate::engine::geometry::BlockGeometry;
use crate::error::{Error, Result};
use candle_core::Tensor;

/// One key of the query's window.
#[derive(Clone, Debug, PartialEq)]
pub struct KeyWeight {
    /// Position on the stage's padded grid (rows and columns past the stage grid are padding).
    pub row: usize,
    pub col: usize,
    /// Attention weight of the query on this key (after softmax).
    pub weight: f32,
    /// A zero padding token, not part of the image.
    pub padding: bool,
    /// In another shift-mask region than the query: the mask removes it (weight ~ 0).
    pub masked: bool,
}

/// A query's attention over its window.
#[derive(Clone, Debug, PartialEq)]
pub struct QueryAttention {
    /// Query token (stage-grid row, column).
    pub query: (usize, usize),
    /// Window index in the block's own window order, and the query's position in it.
    pub window: usize,
    pub position: usize,
    /// `None`: the mean over heads.
    pub head: Option<usize>,
    pub heads: usize,
    pub keys: Vec<KeyWeight>,
}

impl QueryAttention {
    /// The share of the attention on padding keys and on keys the shift mask removes.
    pub fn shares(&self) -> (f64, f64) {
        let mut pad = 0f64;
        let mut masked = 0f64;
        for k in &self.keys {
            if k.padding {
                pad += k.weight as f64;
            }
            if k.masked {
                masked += k.weight as f64;
            }
        }
        (pad, masked)
    }
}

/// Where each window slot of one axis lies on the padded axis (the inverse of `slot_of`).
fn slot_positions(plan: &crate::engine::geometry::AxisPlan) -> Vec<usize> {
    let mut pos = vec![0usize; plan.padded];
    for p in 0..plan.padded {
        pos[plan.slot_of(p)] = p;
    }
    pos
}

/// The attention of query `(row, col)` (a real token of the stage grid) in `probs`
/// (`[windows, heads, N, N]`, the block's attention as the model computed it), for `head` or,
/// with `None`, the mean over heads.
pub fn query_attention(
    probs: &Tensor,
    block: &BlockGeometry,
    (row, col): (usize, usize),
    head: Option<usize>,
) -> Result<QueryAttention> {
    let (nw, heads, n, n2) = probs.dims4()?;
    if row >= block.rows.len || col >= block.cols.len {
        return Err(Error::BadArgument(format!(
            "token (row {row}, col {col}) is outside the {}x{} stage grid",
            block.rows.len, block.cols.len
        )));
    }
    if nw != block.n_windows() || n != block.window_area() || n2 != n {
        return Err(Error::Internal(format!(
            "attention [{nw}, {heads}, {n}, {n2}] does not fit the block's {} windows of {}",
            block.n_windows(),
            block.window_area()
        )));
    }
    if let Some(h) = head.filter(|&h| h >= heads) {
        return Err(Error::BadArgument(format!(
            "head {h}: this block has heads 0 to {}",
            heads - 1
        )));
    }
    let (window, position) = block.window_of(row, col);
    // [heads, N] for this query.
    let rows = probs.get(window)?.narrow(1, position, 1)?.squeeze(1)?;
    let weights: Vec<f32> = match head {
        Some(h) => rows.get(h)?.to_vec1()?,
        None => rows.mean(0)?.to_vec1()?,
    };
    let (wh, ww) = block.window();
    let (row_pos, col_pos) = (slot_positions(&block.rows), slot_positions(&block.cols));
    let (wr, wc) = (
        window / block.cols.n_windows(),
        window % block.cols.n_windows(),
    );
    let ids = block.region_ids();
    let qid = ids[window * n + position];
    let keys = (0..n)
        .map(|k| {
            let (sr, sc) = (wr * wh + k / ww, wc * ww + k % ww);
            let (r, c) = (row_pos[sr], col_pos[sc]);
            KeyWeight {
                row: r,
                col: c,
                weight: weights[k],
                padding: block.rows.source_of_slot(sr).is_none()
                    || block.cols.source_of_slot(sc).is_none(),
                masked: block.is_shifted() && ids[window * n + k] != qid,
            }
        })
        .collect();
    Ok(QueryAttention {
        query: (row, col),
        window,
        position,
        head,
        heads,
        keys,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{AxisPlan, PadOrder};
    use candle_core::Device;

    fn block(len: (usize, usize), shift: usize, order: PadOrder) -> BlockGeometry {
        BlockGeometry {
            rows: AxisPlan::new(len.0, 3, shift, order),
            cols: AxisPlan::new(len.1, 3, shift, order),
        }
    }

    /// probs[w, h, q, k] = a value that names (w, h, q, k), so the test can tell which row
    /// was read.
    fn labelled(nw: usize, heads: usize, n: usize) -> Tensor {
        let v: Vec<f32> = (0..nw * heads * n * n).map(|i| i as f32).collect();
        Tensor::from_vec(v, (nw, heads, n, n), &Device::Cpu).unwrap()
    }

    #[test]
    fn reads_the_query_row_of_its_window_and_places_every_key() {
        // 5x4 grid, window 3, no shift: padded 6x6, 4 windows; token (4, 1) is in window 2
        // (second row of windows, first column) at position (1, 1) -> 4.
        let b = block((5, 4), 0, PadOrder::PadThenShift);
        let probs = labelled(4, 2, 9);
        let q = query_attention(&probs, &b, (4, 1), Some(1)).unwrap();
        assert_eq!((q.window, q.position), (2, 4));
        // probs[2, 1, 4, k] = ((2 * 2 + 1) * 9 + 4) * 9 + k.
        let base = ((2 * 2 + 1) * 9 + 4) * 9;
        let w: Vec<f32> = q.keys.iter().map(|k| k.weight).collect();
        assert_eq!(w, (0..9).map(|k| (base + k) as f32).collect::<Vec<_>>());
        // Keys are the window's 3x3 cells at rows 3..6, cols 0..3; row 5 is padding.
        let cells: Vec<(usize, usize, bool)> =
            q.keys.iter().map(|k| (k.row, k.col, k.padding)).collect();
        assert_eq!(cells[0], (3, 0, false));
        assert_eq!(cells[8], (5, 2, true));
        assert!(q.keys.iter().all(|k| !k.masked));
        // The mean over heads.
        let m = query_attention(&probs, &b, (4, 1), None).unwrap();
        let h0 = ((2 * 2) * 9 + 4) * 9;
        assert_eq!(m.keys[0].weight, ((h0 + base) as f32) / 2.0);
    }

    #[test]
    fn shifted_windows_wrap_and_mark_masked_keys() {
        // 6x6 grid, window 3, shift 1 (pad-then-shift; nothing to pad): the first window holds
        // grid rows/cols 1..4; the last window wraps (rows 4, 5, 0) and mixes mask regions.
        let b = block((6, 6), 1, PadOrder::PadThenShift);
        let probs = labelled(4, 1, 9);
        let q = query_attention(&probs, &b, (1, 1), None).unwrap();
        assert_eq!((q.window, q.position), (0, 0));
        assert_eq!((q.keys[8].row, q.keys[8].col), (3, 3));
        assert!(q.keys.iter().all(|k| !k.masked && !k.padding));
        let w = query_attention(&probs, &b, (0, 0), None).unwrap();
        assert_eq!(w.window, 3);
        let rows: Vec<usize> = w.keys.iter().step_by(3).map(|k| k.row).collect();
        assert_eq!(rows, [4, 5, 0]);
        // Row 0 wrapped in from the top: another mask region than rows 4 and 5.
        assert!(w.keys.iter().any(|k| k.masked));
        assert!(w
            .keys
            .iter()
            .filter(|k| k.row == 0 && k.col == 0)
            .all(|k| !k.masked));
    }

    #[test]
    fn bad_tokens_and_heads_are_refused() {
        let b = block((5, 4), 0, PadOrder::PadThenShift);
        let probs = labelled(4, 2, 9);
        assert!(query_attention(&probs, &b, (5, 0), None).is_err());
        assert!(query_attention(&probs, &b, (0, 0), Some(2)).is_err());
    }
}
