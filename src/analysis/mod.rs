//! What to show of a stage: map kinds that turn a stage's tokens into one value (or one colour)
//! per token, the scaling of those values for display, per-stage statistics and colour maps.
//!
//! Every kind implements [`MapKind`], so new kinds (attention, comparison of two checkpoints)
//! drop in beside the ones here without touching the renderer: it only sees a [`Map`].
//! Maps are computed from `StageOutputs::stages[stage]`, the raw output of the stage's blocks
//! (`[rows, cols, C]`, no output norm), over the stage's own token grid; window padding tokens
//! are never part of a stage output, so every value belongs to a real token.

pub mod colormap;
mod colormap_data;
pub mod regions;
pub mod scale;
pub mod stats;

pub use colormap::Colormap;
pub use scale::{normalise_maps, percentile, ScaleRange, ScaleSpec};
pub use stats::{stage_stats, write_stats_csv, write_stats_json, StageStats};

use crate::backbone::StageOutputs;
use crate::error::{Error, Result};
use nalgebra::{DMatrix, SymmetricEigen};

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

/// A way of looking at a stage: one value or colour per token.
pub trait MapKind: Send + Sync {
    /// Short machine name, as the command line spells it (`norm`, `channel:12`, `pca`).
    fn id(&self) -> String;
    /// Human-readable name for captions and menus.
    fn label(&self) -> String;
    /// The map of `stage` of one forward pass.
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map>;
}

/// The tokens of one stage as a row-major `[rows * cols, channels]` matrix of f32.
pub struct Tokens {
    pub rows: usize,
    pub cols: usize,
    pub channels: usize,
    pub data: Vec<f32>,
}

impl Tokens {
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

/// Per token, the Euclidean length of its channel vector: how strongly the stage responds there,
/// whatever the direction. The default map.
#[derive(Clone, Copy, Debug, Default)]
pub struct TokenNorm;

impl MapKind for TokenNorm {
    fn id(&self) -> String {
        "norm".into()
    }
    fn label(&self) -> String {
        "token L2 norm".into()
    }
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map> {
        Ok(token_norm(&stage_tokens(out, stage)?))
    }
}

/// The L2 norm map of a token matrix (accumulated in f64 so wide stages lose nothing).
pub fn token_norm(t: &Tokens) -> Map {
    let values = (0..t.len())
        .map(|i| {
            t.token(i)
                .iter()
                .map(|&v| (v as f64) * (v as f64))
                .sum::<f64>()
                .sqrt() as f32
        })
        .collect();
    Map::Scalar {
        rows: t.rows,
        cols: t.cols,
        values,
    }
}

/// The raw value of one channel at every token.
#[derive(Clone, Copy, Debug)]
pub struct Channel(pub usize);

impl MapKind for Channel {
    fn id(&self) -> String {
        format!("channel:{}", self.0)
    }
    fn label(&self) -> String {
        format!("channel {}", self.0)
    }
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map> {
        let t = stage_tokens(out, stage)?;
        if self.0 >= t.channels {
            return Err(Error::BadArgument(format!(
                "channel {} does not exist at stage {stage}, which has channels 0 to {}",
                self.0,
                t.channels - 1
            )));
        }
        Ok(Map::Scalar {
            rows: t.rows,
            cols: t.cols,
            values: (0..t.len()).map(|i| t.token(i)[self.0]).collect(),
        })
    }
}

/// Channels of `stage` ranked by their mean raw value over the stage's tokens, largest first
/// (signed mean, not mean magnitude: a channel that is strongly negative everywhere ranks last).
/// Ties keep the lower channel index first.
pub fn rank_channels(out: &StageOutputs, stage: usize) -> Result<Vec<(usize, f32)>> {
    Ok(rank_token_channels(&stage_tokens(out, stage)?))
}

/// [`rank_channels`] on a token matrix.
pub fn rank_token_channels(t: &Tokens) -> Vec<(usize, f32)> {
    let mut sums = vec![0f64; t.channels];
    for i in 0..t.len() {
        for (s, &v) in sums.iter_mut().zip(t.token(i)) {
            *s += v as f64;
        }
    }
    let n = t.len().max(1) as f64;
    let mut ranked: Vec<(usize, f32)> = sums
        .iter()
        .enumerate()
        .map(|(c, s)| (c, (s / n) as f32))
        .collect();
    // A stable sort keeps index order among equal means.
    ranked.sort_by(|a, b| b.1.total_cmp(&a.1));
    ranked
}

/// The stage's tokens projected on their top three principal components, shown as red, green
/// and blue. The components are fitted on this image's tokens of this stage alone, so colours
/// are not comparable between stages or images.
#[derive(Clone, Copy, Debug, Default)]
pub struct Pca;

impl MapKind for Pca {
    fn id(&self) -> String {
        "pca".into()
    }
    fn label(&self) -> String {
        "top 3 principal components as RGB".into()
    }
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map> {
        let t = stage_tokens(out, stage)?;
        Ok(fit_pca(&t)?.rgb)
    }
}

/// A principal component fit of one stage's tokens.
#[derive(Clone, Debug)]
pub struct PcaFit {
    /// Eigenvalues of the token covariance (divisor N - 1), largest first, all of them.
    pub eigenvalues: Vec<f64>,
    /// The top (up to) three unit eigenvectors, each of length C, sign fixed so that the entry
    /// of largest magnitude is positive (the lower index wins a tie).
    pub components: Vec<Vec<f64>>,
    /// Share of the total variance each of the top components explains.
    pub explained: Vec<f64>,
    /// The projections min-max scaled per component to [0, 1] over the stage's tokens
    /// (a component that is constant gives 0.5); missing components (C < 3) are 0.
    pub rgb: Map,
}

/// Fit PCA on a token matrix: center, form the C x C covariance, and take its eigen-decomposition
/// (nalgebra's symmetric eigen solver), in f64.
pub fn fit_pca(t: &Tokens) -> Result<PcaFit> {
    let (n, c) = (t.len(), t.channels);
    if n < 2 || c == 0 {
        return Err(Error::BadArgument(format!(
            "PCA needs at least two tokens and one channel (this stage has {n} tokens, {c} channels)"
        )));
    }
    let x = DMatrix::<f64>::from_fn(n, c, |i, j| t.data[i * c + j] as f64);
    let mean = x.row_mean();
    let mut xc = x;
    for mut row in xc.row_iter_mut() {
        row -= &mean;
    }
    let cov = (xc.transpose() * &xc) / (n as f64 - 1.0);
    let eig = SymmetricEigen::new(cov);
    let mut order: Vec<usize> = (0..c).collect();
    order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
    let eigenvalues: Vec<f64> = order.iter().map(|&k| eig.eigenvalues[k].max(0.0)).collect();
    let total: f64 = eigenvalues.iter().sum();
    let k = c.min(3);
    let mut components = Vec::with_capacity(k);
    for &idx in &order[..k] {
        let mut v: Vec<f64> = eig.eigenvectors.column(idx).iter().copied().collect();
        let mut big = 0;
        for (j, &e) in v.iter().enumerate() {
            if e.abs() > v[big].abs() {
                big = j;
            }
        }
        if v[big] < 0.0 {
            v.iter_mut().for_each(|e| *e = -*e);
        }
        components.push(v);
    }
    let explained = eigenvalues[..k]
        .iter()
        .map(|&e| if total > 0.0 { e / total } else { 0.0 })
        .collect();
    let mut values = vec![[0f32; 3]; n];
    for (ch, v) in components.iter().enumerate() {
        let proj: Vec<f64> = (0..n)
            .map(|i| xc.row(i).iter().zip(v).map(|(a, b)| a * b).sum())
            .collect();
        let lo = proj.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = proj.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        for (dst, p) in values.iter_mut().zip(&proj) {
            dst[ch] = if hi > lo {
                ((p - lo) / (hi - lo)) as f32
            } else {
                0.5
            };
        }
    }
    Ok(PcaFit {
        eigenvalues,
        components,
        explained,
        rgb: Map::Rgb {
            rows: t.rows,
            cols: t.cols,
            values,
        },
    })
}

/// A map kind from its command-line name: `norm`, `channel:N` or `pca`.
pub fn parse_map_kind(s: &str) -> Result<Box<dyn MapKind>> {
    let s = s.trim();
    match s {
        "norm" => Ok(Box::new(TokenNorm)),
        "pca" => Ok(Box::new(Pca)),
        _ => match s.strip_prefix("channel:") {
            Some(n) => n
                .trim()
                .parse::<usize>()
                .map(|n| Box::new(Channel(n)) as Box<dyn MapKind>)
                .map_err(|_| {
                    Error::BadArgument(format!("map '{s}': the channel must be a whole number"))
                }),
            None => Err(Error::BadArgument(format!(
                "map '{s}': expected norm, channel:N or pca"
            ))),
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tokens(rows: usize, cols: usize, channels: usize, data: Vec<f32>) -> Tokens {
        assert_eq!(data.len(), rows * cols * channels);
        Tokens {
            rows,
            cols,
            channels,
            data,
        }
    }

    #[test]
    fn norm_matches_hand_computation() {
        // (3, 4) -> 5; (0, 0) -> 0; (1, -2) -> sqrt(5); (-6, 8) -> 10.
        let t = tokens(2, 2, 2, vec![3., 4., 0., 0., 1., -2., -6., 8.]);
        let Map::Scalar { rows, cols, values } = token_norm(&t) else {
            panic!("scalar expected")
        };
        assert_eq!((rows, cols), (2, 2));
        assert_eq!(values, vec![5.0, 0.0, 5f32.sqrt(), 10.0]);
    }

    #[test]
    fn channels_rank_by_signed_mean() {
        // Means: channel 0 = 1.0, channel 1 = -3.0 (large magnitude, ranks last), channel 2 = 2.0,
        // channel 3 = 1.0 (ties with 0; the lower index comes first).
        let t = tokens(1, 2, 4, vec![0.5, -2.0, 1.0, 1.0, 1.5, -4.0, 3.0, 1.0]);
        let r = rank_token_channels(&t);
        let order: Vec<usize> = r.iter().map(|p| p.0).collect();
        assert_eq!(order, vec![2, 0, 3, 1]);
        assert_eq!(r[0].1, 2.0);
        assert_eq!(r[3].1, -3.0);
    }

    #[test]
    fn pca_recovers_known_directions() {
        // Tokens x = a u1 + b u2 + c u3 + m, with u_k orthonormal in R^5 and the coefficients
        // zero-mean patterns of known variance. Then the covariance is sum var_k u_k u_k^T, so its
        // eigenvalues are exactly those variances (closed form, no solver needed) and its
        // eigenvectors are +-u_k.
        // Each u_k has a unique largest-magnitude entry, and it is positive, so the sign rule
        // must return +u_k exactly (not just up to sign).
        let u = [
            [0.8, 0.6, 0.0, 0.0, 0.0],
            [-0.6, 0.8, 0.0, 0.0, 0.0],
            [0.0, 0.0, -0.6, 0.8, 0.0],
        ];
        let m = [0.3, -1.0, 2.0, 0.1, 5.0];
        let n = 8usize;
        // Over n = 8 tokens: a = +-3 (alternating), b = +-2 (pairs), c = +-1 (quads): mutually
        // orthogonal patterns, each of mean zero.
        let coef = |i: usize| {
            let sg = |k: usize| if (i >> k) & 1 == 0 { 1.0 } else { -1.0 };
            [3.0 * sg(0), 2.0 * sg(1), 1.0 * sg(2)]
        };
        let mut data = Vec::new();
        for i in 0..n {
            let k = coef(i);
            for j in 0..5 {
                data.push((m[j] + k[0] * u[0][j] + k[1] * u[1][j] + k[2] * u[2][j]) as f32);
            }
        }
        let fit = fit_pca(&tokens(2, 4, 5, data)).unwrap();
        // Sample variance with divisor n - 1: sum of squares / 7.
        let var = [9.0 * 8.0 / 7.0, 4.0 * 8.0 / 7.0, 8.0 / 7.0];
        for k in 0..3 {
            assert!(
                (fit.eigenvalues[k] - var[k]).abs() < 1e-5,
                "{:?}",
                fit.eigenvalues
            );
            let dot: f64 = fit.components[k]
                .iter()
                .zip(&u[k])
                .map(|(a, b)| a * b)
                .sum();
            assert!((dot - 1.0).abs() < 1e-5, "component {k}: dot {dot}");
        }
        let total: f64 = var.iter().sum();
        assert!((fit.explained[0] - var[0] / total).abs() < 1e-6);
        assert!(fit.eigenvalues[3].abs() < 1e-5);
        // Sign rule: the largest-magnitude entry of each component is positive.
        for v in &fit.components {
            let big = v
                .iter()
                .copied()
                .fold(0.0f64, |a, e| if e.abs() > a.abs() { e } else { a });
            assert!(big > 0.0);
        }
        // Components are +u_k, so token 0 (a, b, c all positive) is the top of every component,
        // token 7 (all negative) the bottom, token 1 (a negative) the bottom of PC1 only.
        let Map::Rgb { values, .. } = &fit.rgb else {
            panic!("rgb expected")
        };
        let near = |a: [f32; 3], b: [f32; 3]| a.iter().zip(&b).all(|(x, y)| (x - y).abs() < 1e-5);
        assert!(near(values[0], [1.0, 1.0, 1.0]), "{:?}", values[0]);
        assert!(near(values[7], [0.0, 0.0, 0.0]), "{:?}", values[7]);
        assert!(near(values[1], [0.0, 1.0, 1.0]), "{:?}", values[1]);
    }

    #[test]
    fn map_kinds_parse() {
        assert_eq!(parse_map_kind("norm").unwrap().id(), "norm");
        assert_eq!(parse_map_kind("channel:7").unwrap().id(), "channel:7");
        assert_eq!(parse_map_kind("pca").unwrap().id(), "pca");
        assert!(parse_map_kind("channel:x").is_err());
        assert!(parse_map_kind("attention").is_err());
    }
}
