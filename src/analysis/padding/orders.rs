//! Pad-order disagreement: one checkpoint run with pad-then-shift (`f1`) and with
//! shift-then-pad (`f2`), the small-stage rule kept. Per stage `max_rel_diff = max|f1 - f2| /
//! max|f1|` over every value of the stage, and the share of tokens whose relative change
//! `||f1(t) - f2(t)|| / ||f1(t)||` is above [`ORDER_THRESHOLD`]; the map kind draws that
//! per-token ratio. Teams that train with one library and deploy with another see here where
//! their features part.

use crate::analysis::map::{stage_tokens, Map, MapKind, Tokens, Variant};
use crate::engine::geometry::PadOrder;
use crate::engine::StageOutputs;
use crate::error::{Error, Result};

/// Relative change above which a token counts as disagreeing.
pub const ORDER_THRESHOLD: f64 = 1e-3;

/// One stage's disagreement between the two pad orders.
#[derive(Clone, Debug, PartialEq)]
pub struct OrderStats {
    /// `max|f1 - f2| / max|f1|` over every value of the stage (0 when `f1` is all zero and
    /// equal to `f2`).
    pub max_rel_diff: f64,
    /// Share of tokens with `||f1(t) - f2(t)|| / ||f1(t)|| > 1e-3`.
    pub share_over: f64,
    /// Per token, `||f1(t) - f2(t)|| / ||f1(t)||` (infinite where `f1(t)` is zero and `f2(t)`
    /// is not; 0 where both are zero), row-major.
    pub ratio: Vec<f64>,
    pub rows: usize,
    pub cols: usize,
}

/// Compare `f1` (pad-then-shift) with `f2` (shift-then-pad), token by token.
pub fn order_disagreement(f1: &Tokens, f2: &Tokens) -> Result<OrderStats> {
    if (f1.rows, f1.cols, f1.channels) != (f2.rows, f2.cols, f2.channels) {
        return Err(Error::Internal(format!(
            "the two pad orders gave different grids ({}x{}x{} vs {}x{}x{})",
            f1.rows, f1.cols, f1.channels, f2.rows, f2.cols, f2.channels
        )));
    }
    let (mut max_diff, mut max_f1) = (0f64, 0f64);
    let mut ratio = Vec::with_capacity(f1.len());
    for t in 0..f1.len() {
        let (mut dd, mut nn) = (0f64, 0f64);
        for (&a, &b) in f1.token(t).iter().zip(f2.token(t)) {
            let (a, b) = (a as f64, b as f64);
            let d = a - b;
            dd += d * d;
            nn += a * a;
            max_diff = max_diff.max(d.abs());
            max_f1 = max_f1.max(a.abs());
        }
        ratio.push(match (dd > 0.0, nn > 0.0) {
            (_, true) => (dd / nn).sqrt(),
            (false, false) => 0.0,
            (true, false) => f64::INFINITY,
        });
    }
    let over = ratio.iter().filter(|&&r| r > ORDER_THRESHOLD).count();
    let max_rel_diff = if max_f1 > 0.0 {
        max_diff / max_f1
    } else if max_diff > 0.0 {
        f64::INFINITY
    } else {
        0.0
    };
    Ok(OrderStats {
        max_rel_diff,
        share_over: over as f64 / f1.len().max(1) as f64,
        ratio,
        rows: f1.rows,
        cols: f1.cols,
    })
}

/// The two passes as (pad-then-shift, shift-then-pad), whichever order `a` ran with.
pub fn ordered<'a>(
    a: &'a StageOutputs,
    b: &'a StageOutputs,
) -> Result<(&'a StageOutputs, &'a StageOutputs)> {
    let (oa, ob) = (
        a.geometry.semantics.pad_order,
        b.geometry.semantics.pad_order,
    );
    match (oa, ob) {
        (PadOrder::PadThenShift, PadOrder::ShiftThenPad) => Ok((a, b)),
        (PadOrder::ShiftThenPad, PadOrder::PadThenShift) => Ok((b, a)),
        _ => Err(Error::Internal(
            "the pad-order comparison needs one pass of each pad order".into(),
        )),
    }
}

/// `||f1(t) - f2(t)|| / ||f1(t)||` per token: pad-then-shift against shift-then-pad.
#[derive(Clone, Copy, Debug, Default)]
pub struct OrderDisagreement;

impl MapKind for OrderDisagreement {
    fn id(&self) -> String {
        "pad-order".into()
    }
    fn label(&self) -> String {
        "pad-order disagreement: ||f1 - f2|| / ||f1|| (pad-then-shift vs shift-then-pad)".into()
    }
    fn variant(&self) -> Option<Variant> {
        Some(Variant::OtherPadOrder)
    }
    fn compute(&self, _out: &StageOutputs, _stage: usize) -> Result<Map> {
        Err(Error::BadArgument(
            "the map 'pad-order' compares the two pad orders; run the other order first".into(),
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
        let (p1, p2) = ordered(a, b)?;
        let st = order_disagreement(&stage_tokens(p1, stage)?, &stage_tokens(p2, stage)?)?;
        Ok(Map::Scalar {
            rows: st.rows,
            cols: st.cols,
            // An infinite ratio (a zero token that became non-zero) is drawn as the largest.
            values: st.ratio.iter().map(|&r| (r as f32).min(f32::MAX)).collect(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // By hand: token 0 equal; token 1 (3,4) vs (3,4.01): ||d|| = 0.01, ||f1|| = 5, ratio 2e-3;
    // token 2 (1,0) vs (1,0.0005): ratio 5e-4. max|d| = 0.01, max|f1| = 4.
    #[test]
    fn disagreement_by_hand() {
        let f1 = Tokens::new(1, 3, 2, vec![1., 2., 3., 4., 1., 0.]).unwrap();
        let f2 = Tokens::new(1, 3, 2, vec![1., 2., 3., 4.01, 1., 0.0005]).unwrap();
        let s = order_disagreement(&f1, &f2).unwrap();
        assert!((s.ratio[1] - 2e-3).abs() < 1e-6, "{:?}", s.ratio);
        assert!((s.ratio[2] - 5e-4).abs() < 1e-7);
        assert_eq!(s.ratio[0], 0.0);
        assert!((s.share_over - 1.0 / 3.0).abs() < 1e-12);
        assert!((s.max_rel_diff - 0.01 / 4.0).abs() < 1e-6);
    }
}
