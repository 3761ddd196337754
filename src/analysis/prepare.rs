//! Map preparation: every stage's map of one forward pass, raw (for read-outs and statistics)
//! and scaled for display with its legend range (or, for PCA, the variance shares). The window,
//! `mullion figure` and the report all prepare their pictures here.

use super::map::{stage_tokens, Map, MapKind};
use super::pca::fit_pca;
use super::scale::{normalise_maps, ScaleRange, ScaleSpec};
use crate::engine::StageOutputs;
use crate::error::Result;

/// One stage ready to draw: its map (already in [0, 1]) and, for scalar maps, the range the
/// legend labels.
#[derive(Clone, Debug)]
pub struct PreparedStage {
    pub stage: usize,
    pub map: Map,
    pub range: Option<ScaleRange>,
    /// Share of variance of the principal components, for RGB maps from PCA.
    pub explained: Option<Vec<f64>>,
}

/// Every stage's map of one forward pass, raw (for read-outs and statistics) and scaled for
/// display with its legend range (or, for PCA, the variance shares). The window and the figure
/// command both prepare their pictures here.
pub fn prepare_stages(
    out: &StageOutputs,
    kind: &dyn MapKind,
    spec: &ScaleSpec,
) -> Result<(Vec<Map>, Vec<PreparedStage>)> {
    prepare_stage_pair(out, None, kind, spec)
}

/// [`prepare_stages`] for a kind that may compare two checkpoints: `out` is checkpoint A's
/// forward pass (its geometry is the one drawn) and `other`, when given, checkpoint B's pass of
/// the same image. Kinds of one pass ignore `other`; a kind that needs it
/// ([`MapKind::needs_pair`]) is refused without it.
pub fn prepare_stage_pair(
    out: &StageOutputs,
    other: Option<&StageOutputs>,
    kind: &dyn MapKind,
    spec: &ScaleSpec,
) -> Result<(Vec<Map>, Vec<PreparedStage>)> {
    crate::probe::heavy_work();
    if kind.needs_pair() && other.is_none() {
        return Err(crate::error::Error::BadArgument(format!(
            "the map '{}' compares two checkpoints; give a second one",
            kind.id()
        )));
    }
    if let (Some(v), None) = (kind.variant(), other) {
        return Err(crate::error::Error::BadArgument(format!(
            "the map '{}' needs a second pass of the same checkpoint ({v:?}); run it first",
            kind.id()
        )));
    }
    let n = out.stages.len();
    if kind.id() == "pca" {
        let mut raw = Vec::with_capacity(n);
        let mut stages = Vec::with_capacity(n);
        for s in 0..n {
            let fit = fit_pca(&stage_tokens(out, s)?)?;
            raw.push(fit.rgb.clone());
            stages.push(PreparedStage {
                stage: s,
                map: fit.rgb,
                range: None,
                explained: Some(fit.explained),
            });
        }
        return Ok((raw, stages));
    }
    let raw: Vec<Map> = (0..n)
        .map(|s| kind.compute_pair(out, other, s))
        .collect::<Result<_>>()?;
    let stages = normalise_maps(&raw, spec)?
        .into_iter()
        .enumerate()
        .map(|(s, (map, range))| PreparedStage {
            stage: s,
            map,
            range: Some(range),
            explained: None,
        })
        .collect();
    Ok((raw, stages))
}
