//! Weight drift between two checkpoints of the same backbone: for every canonical tensor
//! ([`Part`], named as timm >= 0.9 lays the backbone out, whatever each file's own layout),
//! `relative_change = ||B - A||_F / ||A||_F` and `base_norm = ||A||_F`, in f64. Tensors that
//! only one checkpoint has, or that differ in shape, are listed as unmatched; tensors outside
//! the backbone (heads, buffers) are listed as not compared.

use crate::engine::checkpoint::{block_parts, Checkpoint, Family, Part};
use crate::error::Result;
use serde::{Deserialize, Serialize};
use std::collections::BTreeSet;

/// The columns of `drift.csv`, in order.
pub const DRIFT_COLUMNS: [&str; 5] = ["tensor", "stage", "block", "relative_change", "base_norm"];

/// One tensor's drift (one row of `drift.csv`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DriftRow {
    /// The timm >= 0.9 name (`layers.2.blocks.1.attn.qkv.weight`); stage output norms, which
    /// timm does not have, are `stage_norm.{i}.weight` / `.bias`.
    pub tensor: String,
    /// Stage and block for block tensors; empty otherwise.
    pub stage: Option<usize>,
    pub block: Option<usize>,
    /// `||B - A||_F / ||A||_F`; empty when A is all zeros.
    pub relative_change: Option<f64>,
    pub base_norm: f64,
}

/// Every compared tensor, and what could not be compared.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Drift {
    pub rows: Vec<DriftRow>,
    /// Backbone tensors only one checkpoint has, or whose shapes differ (one line each).
    pub unmatched: Vec<String>,
    /// File tensors that are no part of the backbone (heads, buffers), by file and file name.
    pub not_compared: Vec<String>,
}

/// Every canonical part a backbone with up to these depths may have, in model order, with the
/// block tensors of each family in `families` (a part neither file has is skipped later).
fn candidate_parts(depths: &[usize], families: &[Family]) -> Vec<Part> {
    let mut parts: Vec<&str> = Vec::new();
    for s in families.iter().flat_map(|f| block_parts(*f)) {
        if !parts.contains(s) {
            parts.push(s);
        }
    }
    let mut out: Vec<Part> = ["proj.weight", "proj.bias", "norm.weight", "norm.bias"]
        .iter()
        .map(|s| Part::embed(s))
        .collect();
    for (i, &depth) in depths.iter().enumerate() {
        if i > 0 {
            for s in ["norm.weight", "norm.bias", "reduction.weight"] {
                out.push(Part::merge(i, s));
            }
        }
        for j in 0..depth {
            for s in &parts {
                out.push(Part::block(i, j, s));
            }
        }
        for s in ["weight", "bias"] {
            out.push(Part::StageNorm(i, s.into()));
        }
    }
    for s in ["weight", "bias"] {
        out.push(Part::FinalNorm(s.into()));
    }
    out
}

fn values(c: &Checkpoint, part: &Part, shape: &[usize]) -> Result<Vec<f32>> {
    Ok(c.load(part, shape)?.flatten_all()?.to_vec1::<f32>()?)
}

/// `(||b - a||_F / ||a||_F, ||a||_F)`, accumulated in f64.
pub fn relative_change(a: &[f32], b: &[f32]) -> (Option<f64>, f64) {
    let (mut d2, mut a2) = (0f64, 0f64);
    for (&x, &y) in a.iter().zip(b) {
        let (x, y) = (x as f64, y as f64);
        d2 += (y - x) * (y - x);
        a2 += x * x;
    }
    let base = a2.sqrt();
    ((base > 0.0).then(|| d2.sqrt() / base), base)
}

/// Compare every backbone tensor of `base` (A) with the same tensor of `tuned` (B).
pub fn weight_drift(base: &Checkpoint, tuned: &Checkpoint) -> Result<Drift> {
    let (da, db) = (base.infer_depths()?, tuned.infer_depths()?);
    let depths: Vec<usize> = (0..da.len().max(db.len()))
        .map(|i| {
            da.get(i)
                .copied()
                .unwrap_or(0)
                .max(db.get(i).copied().unwrap_or(0))
        })
        .collect();
    let mut drift = Drift::default();
    // File keys that belong to a backbone part, per checkpoint.
    let (mut known_a, mut known_b) = (BTreeSet::new(), BTreeSet::new());
    let names = |c: &Checkpoint, p: &Part| c.layout.file_names(p).join(" + ");
    for part in candidate_parts(&depths, &[base.family, tuned.family]) {
        let (pa, pb) = (base.present(&part), tuned.present(&part));
        if pa {
            known_a.extend(base.layout.file_names(&part));
        }
        if pb {
            known_b.extend(tuned.layout.file_names(&part));
        }
        let name = part.canonical();
        match (pa, pb) {
            (false, false) => continue,
            (true, false) => drift.unmatched.push(format!(
                "only in the base checkpoint: {name} ({})",
                names(base, &part)
            )),
            (false, true) => drift.unmatched.push(format!(
                "only in the tuned checkpoint: {name} ({})",
                names(tuned, &part)
            )),
            (true, true) => match (base.shape(&part), tuned.shape(&part)) {
                (Some(sa), Some(sb)) if sa == sb => {
                    let (a, b) = (values(base, &part, &sa)?, values(tuned, &part, &sb)?);
                    let (relative_change, base_norm) = relative_change(&a, &b);
                    let (stage, block) = match part {
                        Part::Block(i, j, _) => (Some(i), Some(j)),
                        _ => (None, None),
                    };
                    drift.rows.push(DriftRow {
                        tensor: name,
                        stage,
                        block,
                        relative_change,
                        base_norm,
                    });
                }
                (sa, sb) => {
                    let shape = |s: Option<Vec<usize>>| {
                        s.map_or("tensors that do not stack into one".to_string(), |s| {
                            format!("{s:?}")
                        })
                    };
                    drift.unmatched.push(format!(
                        "shapes differ: {name}: base {} ({}), tuned {} ({})",
                        shape(sa),
                        names(base, &part),
                        shape(sb),
                        names(tuned, &part)
                    ))
                }
            },
        }
    }
    // Keys read through a second place (transformers 5.x stage norms) count as known too.
    known_a.extend(base.used());
    known_b.extend(tuned.used());
    for (which, c, known) in [("base", base, &known_a), ("tuned", tuned, &known_b)] {
        for n in c.names().filter(|n| !known.contains(*n)) {
            drift.not_compared.push(format!(
                "{which} checkpoint: {n} ({})",
                crate::engine::checkpoint::ignored_reason(n)
            ));
        }
    }
    Ok(drift)
}

/// The weight groups the drift chart draws: a block's parts, and the patch merging that
/// starts a stage.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum DriftGroup {
    Qkv,
    Proj,
    Fc1,
    Fc2,
    /// `norm1` and `norm2` of a block.
    Norms,
    /// The relative-position bias table.
    BiasTable,
    /// Patch merging (its norm and reduction) at the start of a stage.
    Merging,
}

impl DriftGroup {
    pub const ALL: [DriftGroup; 7] = [
        DriftGroup::Qkv,
        DriftGroup::Proj,
        DriftGroup::Fc1,
        DriftGroup::Fc2,
        DriftGroup::Norms,
        DriftGroup::BiasTable,
        DriftGroup::Merging,
    ];

    pub fn name(self) -> &'static str {
        match self {
            DriftGroup::Qkv => "qkv",
            DriftGroup::Proj => "proj",
            DriftGroup::Fc1 => "fc1",
            DriftGroup::Fc2 => "fc2",
            DriftGroup::Norms => "norms",
            DriftGroup::BiasTable => "bias table",
            DriftGroup::Merging => "patch merging",
        }
    }

    /// The group of a canonical tensor name, with its stage and block (block `None` for
    /// patch merging); `None` for tensors outside blocks and merging (embedding, norms).
    pub fn of(tensor: &str) -> Option<(DriftGroup, usize, Option<usize>)> {
        let rest = tensor.strip_prefix("layers.")?;
        let (stage, rest) = rest.split_once('.')?;
        let stage: usize = stage.parse().ok()?;
        if rest.starts_with("downsample.") {
            return Some((DriftGroup::Merging, stage, None));
        }
        let rest = rest.strip_prefix("blocks.")?;
        let (block, part) = rest.split_once('.')?;
        let block: usize = block.parse().ok()?;
        let group = match part {
            p if p.starts_with("attn.qkv.") => DriftGroup::Qkv,
            // Swin V2: the q and v biases belong to qkv; the bias MLP and the logit scales
            // make the position bias.
            "attn.q_bias" | "attn.v_bias" => DriftGroup::Qkv,
            p if p.starts_with("attn.proj.") => DriftGroup::Proj,
            p if p.starts_with("attn.relative_position_bias_table")
                || p.starts_with("attn.cpb_mlp.")
                || p == "attn.logit_scale" =>
            {
                DriftGroup::BiasTable
            }
            p if p.starts_with("mlp.fc1.") => DriftGroup::Fc1,
            p if p.starts_with("mlp.fc2.") => DriftGroup::Fc2,
            p if p.starts_with("norm1.") || p.starts_with("norm2.") => DriftGroup::Norms,
            _ => return None,
        };
        Some((group, stage, Some(block)))
    }
}

/// How far one weight group of one block (or one stage's patch merging) moved:
/// `||B - A||_F / ||A||_F` over the group's tensors taken together.
#[derive(Clone, Debug, PartialEq)]
pub struct GroupDrift {
    pub group: DriftGroup,
    pub stage: usize,
    pub block: Option<usize>,
    pub relative_change: Option<f64>,
    pub base_norm: f64,
}

/// Join the per-tensor rows into groups: for tensors t of a group,
/// `sqrt(sum ||B_t - A_t||^2) / sqrt(sum ||A_t||^2)` (the drift of the tensors concatenated),
/// ordered by stage, then block (merging first in its stage), then group.
pub fn group_drift(drift: &Drift) -> Vec<GroupDrift> {
    use std::collections::BTreeMap;
    // key: (stage, block + 1 with 0 for merging, group) -> (sum d^2, sum a^2, any undefined)
    let mut sums: BTreeMap<(usize, usize, DriftGroup), (f64, f64)> = BTreeMap::new();
    for r in &drift.rows {
        let Some((group, stage, block)) = DriftGroup::of(&r.tensor) else {
            continue;
        };
        let e = sums
            .entry((stage, block.map_or(0, |b| b + 1), group))
            .or_default();
        let d = r.relative_change.unwrap_or(0.0) * r.base_norm;
        e.0 += d * d;
        e.1 += r.base_norm * r.base_norm;
    }
    sums.into_iter()
        .map(|((stage, b, group), (d2, a2))| GroupDrift {
            group,
            stage,
            block: b.checked_sub(1),
            relative_change: (a2 > 0.0).then(|| (d2 / a2).sqrt()),
            base_norm: a2.sqrt(),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(tensor: &str, rc: f64, n: f64) -> DriftRow {
        DriftRow {
            tensor: tensor.into(),
            stage: None,
            block: None,
            relative_change: Some(rc),
            base_norm: n,
        }
    }

    #[test]
    fn groups_join_tensors_as_one_concatenated_tensor() {
        // weight: ||A|| = 3, ||B - A|| = 0.3; bias: ||A|| = 4, ||B - A|| = 0.4: together
        // ||A|| = 5 and ||B - A|| = 0.5, so 0.1 (by hand).
        let d = Drift {
            rows: vec![
                row("patch_embed.proj.weight", 0.5, 1.0),
                row("layers.1.downsample.reduction.weight", 0.2, 2.0),
                row("layers.1.blocks.0.attn.qkv.weight", 0.1, 3.0),
                row("layers.1.blocks.0.attn.qkv.bias", 0.1, 4.0),
                row("layers.1.blocks.0.norm2.weight", 0.0, 1.0),
                row(
                    "layers.0.blocks.1.attn.relative_position_bias_table",
                    0.25,
                    2.0,
                ),
            ],
            ..Default::default()
        };
        let g = group_drift(&d);
        assert_eq!(g.len(), 4, "{g:?}");
        assert_eq!(
            (g[0].group, g[0].stage, g[0].block),
            (DriftGroup::BiasTable, 0, Some(1))
        );
        assert_eq!((g[1].group, g[1].block), (DriftGroup::Merging, None));
        assert_eq!(g[2].group, DriftGroup::Qkv);
        assert!((g[2].relative_change.unwrap() - 0.1).abs() < 1e-12);
        assert!((g[2].base_norm - 5.0).abs() < 1e-12);
        assert_eq!(g[3].group, DriftGroup::Norms);
    }

    #[test]
    fn relative_change_by_hand() {
        // a = (3, 4): ||a|| = 5; b - a = (0, -1.5, ...) -> 1.5 / 5 = 0.3.
        let (r, n) = relative_change(&[3.0, 4.0], &[3.0, 2.5]);
        assert_eq!((r, n), (Some(0.3), 5.0));
        assert_eq!(relative_change(&[0.0], &[1.0]), (None, 0.0));
    }

    #[test]
    fn parts_cover_merging_blocks_and_norms() {
        let p = candidate_parts(&[1, 2], &[Family::V1]);
        let names: Vec<String> = p.iter().map(Part::canonical).collect();
        assert!(names.contains(&"layers.1.downsample.reduction.weight".to_string()));
        assert!(names.contains(&"layers.1.blocks.1.attn.qkv.weight".to_string()));
        assert!(!names.contains(&"layers.0.downsample.reduction.weight".to_string()));
        assert_eq!(names.last().unwrap(), "norm.bias");
        assert_eq!(p.len(), 4 + 13 + 2 + 3 + 2 * 13 + 2 + 2);
    }
}
