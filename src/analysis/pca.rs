//! Principal components of one stage's tokens, shown as red, green and blue.

use super::map::{stage_tokens, Map, MapKind, Tokens};
use crate::engine::StageOutputs;
use crate::error::{Error, Result};
use nalgebra::{DMatrix, SymmetricEigen};

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
    crate::probe::heavy_work();
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

#[cfg(test)]
mod tests {
    use super::*;

    fn tokens(rows: usize, cols: usize, channels: usize, data: Vec<f32>) -> Tokens {
        Tokens::new(rows, cols, channels, data).unwrap()
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
}
