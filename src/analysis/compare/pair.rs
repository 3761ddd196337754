//! One image through two checkpoints, ready to show side by side: per stage, A's map and B's map
//! of one kind on one shared colour scale (so a brighter B means larger values in B, not a
//! different stretch), the difference map (1 - cosine per token) with its own scale, linear CKA
//! and the cosine statistics. When a stage's widths differ, that stage keeps its maps and CKA and
//! says why it has no difference map. The window's comparison strip and its saved comparison
//! figure are both made from this.

use super::cka::linear_cka;
use super::cosine::{token_cosines, CosineSums};
use crate::analysis::map::{stage_tokens, Map, MapKind};
use crate::analysis::prepare::{prepare_stages, PreparedStage};
use crate::analysis::scale::{normalise_maps, ScaleSpec};
use crate::analysis::TokenNorm;
use crate::engine::StageOutputs;
use crate::error::{Error, Result};

/// The difference row of one stage: its map, or why there is none.
#[derive(Clone, Debug)]
pub enum DifferenceStage {
    Shown {
        raw: Map,
        prepared: PreparedStage,
        /// Mean and minimum cosine over the stage's tokens.
        mean_cosine: f64,
        min_cosine: f64,
    },
    /// No per-token comparison (the stage widths differ); the reason, for the screen.
    Absent(String),
}

/// Everything the comparison view shows of one image.
#[derive(Clone, Debug)]
pub struct PairView {
    /// The kind the A and B rows show (the difference kind itself shows token norms there).
    pub kind_id: String,
    pub kind_label: String,
    /// A's and B's raw maps and their display versions (scalar kinds: one range per stage
    /// over A and B together).
    pub a_raw: Vec<Map>,
    pub b_raw: Vec<Map>,
    pub a: Vec<PreparedStage>,
    pub b: Vec<PreparedStage>,
    pub difference: Vec<DifferenceStage>,
    /// Linear CKA of A's and B's tokens per stage (`None` when a side has no variance).
    pub cka: Vec<Option<f64>>,
    /// Channels per stage in A and B.
    pub widths: Vec<(usize, usize)>,
}

impl PairView {
    /// Per-token cosine of (stage, row, col), when the stage has a difference map.
    pub fn cosine_at(&self, stage: usize, row: usize, col: usize) -> Option<f64> {
        match self.difference.get(stage)? {
            DifferenceStage::Shown { raw, .. } => {
                let (rows, cols) = raw.dims();
                if row >= rows || col >= cols {
                    return None;
                }
                raw.scalars()
                    .and_then(|v| v.get(row * cols + col))
                    .map(|d| 1.0 - *d as f64)
            }
            DifferenceStage::Absent(_) => None,
        }
    }
}

/// Why two passes of one image cannot be shown token by token, if they cannot.
pub fn pair_problem(a: &StageOutputs, b: &StageOutputs) -> Option<String> {
    if a.stages.len() != b.stages.len() {
        return Some(format!(
            "A has {} stages and B has {}: the checkpoints are not the same backbone shape",
            a.stages.len(),
            b.stages.len()
        ));
    }
    for (s, (ga, gb)) in a.geometry.stages.iter().zip(&b.geometry.stages).enumerate() {
        if ga.grid != gb.grid {
            return Some(format!(
                "stage {s} has {}x{} tokens in A but {}x{} in B (other patch size or merging): \
                 no token-by-token comparison",
                ga.grid.1, ga.grid.0, gb.grid.1, gb.grid.0
            ));
        }
    }
    None
}

/// Scale A's and B's scalar maps with one range per stage taken over both (or one range for
/// everything when `spec` shares it across stages).
fn normalise_joint(
    a: &[Map],
    b: &[Map],
    spec: &ScaleSpec,
) -> Result<(Vec<PreparedStage>, Vec<PreparedStage>)> {
    let joined: Vec<Map> = a
        .iter()
        .zip(b)
        .map(|(x, y)| {
            let (xs, ys) = (x.scalars(), y.scalars());
            match (xs, ys) {
                (Some(xs), Some(ys)) => Ok(Map::Scalar {
                    rows: 1,
                    cols: xs.len() + ys.len(),
                    values: [xs, ys].concat(),
                }),
                _ => Err(Error::Internal("joint scaling of an RGB map".into())),
            }
        })
        .collect::<Result<_>>()?;
    let ranges: Vec<_> = normalise_maps(&joined, spec)?
        .into_iter()
        .map(|(_, r)| r)
        .collect();
    let scaled = |maps: &[Map]| -> Vec<PreparedStage> {
        maps.iter()
            .zip(&ranges)
            .enumerate()
            .map(|(s, (m, r))| {
                let (rows, cols) = m.dims();
                let values = m
                    .scalars()
                    .unwrap_or(&[])
                    .iter()
                    .map(|&v| r.normalise(v))
                    .collect();
                PreparedStage {
                    stage: s,
                    map: Map::Scalar { rows, cols, values },
                    range: Some(*r),
                    explained: None,
                }
            })
            .collect()
    };
    Ok((scaled(a), scaled(b)))
}

/// Prepare the comparison of `a` (checkpoint A's pass) and `b` (checkpoint B's pass of the same
/// image) for `kind` under `spec`. A kind that itself needs a second pass (the difference, the
/// padding studies) shows token norms in the A and B rows. PCA rows are fitted on each side separately.
pub fn prepare_pair_view(
    a: &StageOutputs,
    b: &StageOutputs,
    kind: &dyn MapKind,
    spec: &ScaleSpec,
) -> Result<PairView> {
    if let Some(p) = pair_problem(a, b) {
        return Err(Error::BadArgument(p));
    }
    // Kinds that need a second pass (the difference itself, padding studies) show token
    // norms in the A and B rows.
    let row_kind: &dyn MapKind = if kind.needs_pair() || kind.variant().is_some() {
        &TokenNorm
    } else {
        kind
    };
    let (a_raw, a_prep) = prepare_stages(a, row_kind, spec)?;
    let (b_raw, b_prep) = prepare_stages(b, row_kind, spec)?;
    let scalar = a_raw.iter().chain(&b_raw).all(|m| m.scalars().is_some());
    let (a_prep, b_prep) = if scalar {
        normalise_joint(&a_raw, &b_raw, spec)?
    } else {
        (a_prep, b_prep)
    };
    let n = a.stages.len();
    let mut cka = Vec::with_capacity(n);
    let mut widths = Vec::with_capacity(n);
    let mut diff_raw: Vec<Option<(Map, f64, f64)>> = Vec::with_capacity(n);
    let mut reasons = Vec::with_capacity(n);
    for s in 0..n {
        let (ta, tb) = (stage_tokens(a, s)?, stage_tokens(b, s)?);
        widths.push((ta.channels, tb.channels));
        cka.push(linear_cka(
            &ta.data,
            &tb.data,
            ta.len(),
            ta.channels,
            tb.channels,
        )?);
        if ta.channels == tb.channels {
            let cos = token_cosines(&ta, &tb)?;
            let mut sums = CosineSums::default();
            sums.push(&cos);
            let st = sums.stats();
            // The same values `TokenDifference` computes, from the cosines already at hand.
            let map = Map::Scalar {
                rows: ta.rows,
                cols: ta.cols,
                values: cos.iter().map(|c| (1.0 - c) as f32).collect(),
            };
            diff_raw.push(Some((
                map,
                st.map_or(f64::NAN, |c| c.mean),
                st.map_or(f64::NAN, |c| c.min),
            )));
            reasons.push(String::new());
        } else {
            diff_raw.push(None);
            reasons.push(format!(
                "no difference map: stage {s} has {} channels in A and {} in B, so tokens \
                 have no per-token cosine (CKA still compares them)",
                ta.channels, tb.channels
            ));
        }
    }
    // The difference maps present are scaled together under `spec` (per stage or shared).
    let present: Vec<Map> = diff_raw
        .iter()
        .flatten()
        .map(|(m, _, _)| m.clone())
        .collect();
    let mut scaled = normalise_maps(&present, spec)?.into_iter();
    let difference = diff_raw
        .into_iter()
        .zip(reasons)
        .enumerate()
        .map(|(s, (d, why))| match d {
            Some((raw, mean_cosine, min_cosine)) => {
                let (map, range) = scaled.next().expect("one scaled map per present map");
                DifferenceStage::Shown {
                    raw,
                    prepared: PreparedStage {
                        stage: s,
                        map,
                        range: Some(range),
                        explained: None,
                    },
                    mean_cosine,
                    min_cosine,
                }
            }
            None => DifferenceStage::Absent(why),
        })
        .collect();
    Ok(PairView {
        kind_id: row_kind.id(),
        kind_label: row_kind.label(),
        a_raw,
        b_raw,
        a: a_prep,
        b: b_prep,
        difference,
        cka,
        widths,
    })
}
