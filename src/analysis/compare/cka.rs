//! Linear CKA (centred kernel alignment with the linear kernel; Kornblith, Norouzi, Lee and
//! Hinton, 2019, "Similarity of Neural Network Representations Revisited", ICML, the
//! linear form): for token matrices X `[n, p]` and Y `[n, q]` of the same n tokens with centred
//! columns,
//!
//! ```text
//! CKA(X, Y) = ||Y^T X||_F^2 / (||X^T X||_F * ||Y^T Y||_F)
//! ```
//!
//! in [0, 1], invariant to orthogonal transforms and isotropic scaling of either side (Sec. 3
//! of the paper), so two stages of different widths can be compared. Computed in f64.
//!
//! [`linear_cka`] centres and computes directly. [`CkaSums`] streams: it keeps `X^T X`, `Y^T Y`,
//! `Y^T X`, the column sums and `n` (in double-double, see `exact.rs`), and centres at the end
//! with `Xc^T Xc = X^T X - s_x s_x^T / n` (and likewise for the other two), so a pooled CKA over
//! thousands of images never holds more than one image's tokens, and sums from separate runs
//! merge by addition.

use super::exact::Dd;
use crate::error::{Error, Result};
use candle_core::{Device, Tensor};
use nalgebra::DMatrix;
use std::collections::HashMap;

fn check(x: &[f32], y: &[f32], n: usize, p: usize, q: usize) -> Result<()> {
    if n.checked_mul(p) != Some(x.len()) || n.checked_mul(q) != Some(y.len()) {
        return Err(Error::BadArgument(format!(
            "CKA needs X [{n}, {p}] and Y [{n}, {q}]: got {} and {} values",
            x.len(),
            y.len()
        )));
    }
    Ok(())
}

fn matrix(data: &[f32], n: usize, p: usize) -> DMatrix<f64> {
    DMatrix::from_row_iterator(n, p, data.iter().map(|&v| v as f64))
}

fn centre(m: &mut DMatrix<f64>) {
    let n = m.nrows().max(1) as f64;
    for mut col in m.column_iter_mut() {
        let mean = col.sum() / n;
        col.add_scalar_mut(-mean);
    }
}

fn cka_of_grams(xtx: f64, yty: f64, ytx: f64) -> Option<f64> {
    let den = xtx.sqrt() * yty.sqrt();
    (den > 0.0 && den.is_finite()).then(|| ytx / den)
}

/// Linear CKA between `x` (`n` rows of `p`, row-major) and `y` (`n` rows of `q`), columns
/// centred here. `None` when either side has no variance (all tokens equal) or `n` is 0.
pub fn linear_cka(x: &[f32], y: &[f32], n: usize, p: usize, q: usize) -> Result<Option<f64>> {
    check(x, y, n, p, q)?;
    if n == 0 {
        return Ok(None);
    }
    let mut xm = matrix(x, n, p);
    let mut ym = matrix(y, n, q);
    centre(&mut xm);
    centre(&mut ym);
    let xtx = xm.tr_mul(&xm).norm_squared();
    let yty = ym.tr_mul(&ym).norm_squared();
    let ytx = ym.tr_mul(&xm).norm_squared();
    Ok(cka_of_grams(xtx, yty, ytx))
}

/// Running sums for a pooled linear CKA: `n`, column sums of X and Y, and the uncentred
/// `X^T X` `[p, p]`, `Y^T Y` `[q, q]`, `Y^T X` `[q, p]` (row-major), in double-double.
#[derive(Clone, Debug, PartialEq)]
pub struct CkaSums {
    pub p: usize,
    pub q: usize,
    pub n: u64,
    sx: Vec<Dd>,
    sy: Vec<Dd>,
    xtx: Vec<Dd>,
    yty: Vec<Dd>,
    ytx: Vec<Dd>,
}

fn add_gram(acc: &mut [Dd], g: &DMatrix<f64>) {
    let cols = g.ncols();
    for i in 0..g.nrows() {
        for j in 0..cols {
            let a = &mut acc[i * cols + j];
            *a = a.add_f64(g[(i, j)]);
        }
    }
}

fn centred_sq_norm(g: &[Dd], s_row: &[Dd], s_col: &[Dd], n: f64) -> f64 {
    let cols = s_col.len();
    let mut sum = 0.0f64;
    for (i, si) in s_row.iter().enumerate() {
        for (j, sj) in s_col.iter().enumerate() {
            let c = g[i * cols + j].add(si.mul(*sj).div_f64(n).neg()).to_f64();
            sum += c * c;
        }
    }
    sum
}

impl CkaSums {
    /// Empty sums for X of width `p` and Y of width `q`.
    pub fn new(p: usize, q: usize) -> CkaSums {
        CkaSums {
            p,
            q,
            n: 0,
            sx: vec![Dd::default(); p],
            sy: vec![Dd::default(); q],
            xtx: vec![Dd::default(); p * p],
            yty: vec![Dd::default(); q * q],
            ytx: vec![Dd::default(); q * p],
        }
    }

    /// Add `n` more rows of X (`p` wide) and Y (`q` wide), row-major.
    pub fn push(&mut self, x: &[f32], y: &[f32], n: usize) -> Result<()> {
        check(x, y, n, self.p, self.q)?;
        if n == 0 {
            return Ok(());
        }
        let xm = matrix(x, n, self.p);
        let ym = matrix(y, n, self.q);
        for (a, col) in self.sx.iter_mut().zip(xm.column_iter()) {
            *a = a.add_f64(col.sum());
        }
        for (a, col) in self.sy.iter_mut().zip(ym.column_iter()) {
            *a = a.add_f64(col.sum());
        }
        add_gram(&mut self.xtx, &xm.tr_mul(&xm));
        add_gram(&mut self.yty, &ym.tr_mul(&ym));
        add_gram(&mut self.ytx, &ym.tr_mul(&xm));
        self.n += n as u64;
        Ok(())
    }

    /// Add another run's sums (of the same widths).
    pub fn merge(&mut self, o: &CkaSums) -> Result<()> {
        if (o.p, o.q) != (self.p, self.q) {
            return Err(Error::BadArgument(format!(
                "CKA sums of widths {}x{} cannot be merged into {}x{}",
                o.p, o.q, self.p, self.q
            )));
        }
        for (a, b) in [
            (&mut self.sx, &o.sx),
            (&mut self.sy, &o.sy),
            (&mut self.xtx, &o.xtx),
            (&mut self.yty, &o.yty),
            (&mut self.ytx, &o.ytx),
        ] {
            for (u, v) in a.iter_mut().zip(b) {
                *u = u.add(*v);
            }
        }
        self.n += o.n;
        Ok(())
    }

    /// The pooled linear CKA over every row pushed; `None` with no rows or no variance.
    pub fn cka(&self) -> Option<f64> {
        if self.n == 0 {
            return None;
        }
        let n = self.n as f64;
        let xtx = centred_sq_norm(&self.xtx, &self.sx, &self.sx, n);
        let yty = centred_sq_norm(&self.yty, &self.sy, &self.sy, n);
        let ytx = centred_sq_norm(&self.ytx, &self.sy, &self.sx, n);
        cka_of_grams(xtx, yty, ytx)
    }

    /// The sums as f64 tensors named `<prefix>.<field>.hi` / `.lo` (and `<prefix>.n`), for a
    /// safetensors file that [`CkaSums::from_tensors`] reads back exactly.
    pub fn to_tensors(&self, prefix: &str) -> Result<Vec<(String, Tensor)>> {
        let dev = Device::Cpu;
        let mut out = vec![(
            format!("{prefix}.n"),
            Tensor::from_vec(vec![self.n as f64], 1, &dev)?,
        )];
        for (name, v, shape) in [
            ("sx", &self.sx, vec![self.p]),
            ("sy", &self.sy, vec![self.q]),
            ("xtx", &self.xtx, vec![self.p, self.p]),
            ("yty", &self.yty, vec![self.q, self.q]),
            ("ytx", &self.ytx, vec![self.q, self.p]),
        ] {
            let hi: Vec<f64> = v.iter().map(|d| d.hi).collect();
            let lo: Vec<f64> = v.iter().map(|d| d.lo).collect();
            out.push((
                format!("{prefix}.{name}.hi"),
                Tensor::from_vec(hi, shape.as_slice(), &dev)?,
            ));
            out.push((
                format!("{prefix}.{name}.lo"),
                Tensor::from_vec(lo, shape.as_slice(), &dev)?,
            ));
        }
        Ok(out)
    }

    /// Sums written by [`CkaSums::to_tensors`]; the error says which tensor is missing or wrong.
    pub fn from_tensors(t: &HashMap<String, Tensor>, prefix: &str) -> Result<CkaSums> {
        let get = |name: &str| -> Result<(Vec<usize>, Vec<f64>)> {
            let key = format!("{prefix}.{name}");
            let v = t
                .get(&key)
                .ok_or_else(|| Error::BadArgument(format!("tensor {key} is missing")))?;
            let dims = v.dims().to_vec();
            let data = v
                .to_dtype(candle_core::DType::F64)?
                .flatten_all()?
                .to_vec1::<f64>()?;
            Ok((dims, data))
        };
        let (_, n) = get("n")?;
        let (pd, _) = get("sx.hi")?;
        let (qd, _) = get("sy.hi")?;
        let (p, q) = (
            pd.first().copied().unwrap_or(0),
            qd.first().copied().unwrap_or(0),
        );
        let n = n.first().copied().unwrap_or(-1.0);
        if !(n >= 0.0 && n.fract() == 0.0) {
            return Err(Error::BadArgument(format!(
                "tensor {prefix}.n is {n}, not a count"
            )));
        }
        let mut s = CkaSums::new(p, q);
        s.n = n as u64;
        for (name, want) in [
            ("sx", vec![p]),
            ("sy", vec![q]),
            ("xtx", vec![p, p]),
            ("yty", vec![q, q]),
            ("ytx", vec![q, p]),
        ] {
            let (dh, hi) = get(&format!("{name}.hi"))?;
            let (dl, lo) = get(&format!("{name}.lo"))?;
            if dh != want || dl != want {
                return Err(Error::BadArgument(format!(
                    "tensor {prefix}.{name} has shape {dh:?} / {dl:?}; expected {want:?}"
                )));
            }
            let v: Vec<Dd> = hi
                .iter()
                .zip(&lo)
                .map(|(&h, &l)| Dd { hi: h, lo: l })
                .collect();
            match name {
                "sx" => s.sx = v,
                "sy" => s.sy = v,
                "xtx" => s.xtx = v,
                "yty" => s.yty = v,
                _ => s.ytx = v,
            }
        }
        Ok(s)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A deterministic pseudo-random matrix (a linear congruential generator; no dependency).
    fn noise(n: usize, seed: u64) -> Vec<f32> {
        let mut s = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (0..n)
            .map(|_| {
                s = s
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                ((s >> 40) as f32 / (1u64 << 24) as f32) - 0.5
            })
            .collect()
    }

    #[test]
    fn identical_sides_give_one() {
        let x = noise(40 * 6, 1);
        let c = linear_cka(&x, &x, 40, 6, 6).unwrap().unwrap();
        assert!((c - 1.0).abs() < 1e-12, "{c}");
    }

    #[test]
    fn constant_side_has_no_cka() {
        let x = noise(10 * 3, 2);
        let y = vec![2.5f32; 10 * 2];
        assert_eq!(linear_cka(&x, &y, 10, 3, 2).unwrap(), None);
        assert!(linear_cka(&x, &y, 10, 3, 3).is_err());
    }

    #[test]
    fn streamed_sums_match_the_direct_value_and_survive_a_file() {
        let (n, p, q) = (90, 5, 3);
        let x = noise(n * p, 3);
        let y: Vec<f32> = noise(n * q, 4)
            .iter()
            .enumerate()
            .map(|(i, v)| v + 0.7 * x[(i / q) * p + i % q])
            .collect();
        let direct = linear_cka(&x, &y, n, p, q).unwrap().unwrap();
        // Three chunks in two accumulators, merged.
        let mut a = CkaSums::new(p, q);
        a.push(&x[..20 * p], &y[..20 * q], 20).unwrap();
        let mut b = CkaSums::new(p, q);
        b.push(&x[20 * p..50 * p], &y[20 * q..50 * q], 30).unwrap();
        b.push(&x[50 * p..], &y[50 * q..], 40).unwrap();
        a.merge(&b).unwrap();
        assert_eq!(a.n, n as u64);
        let streamed = a.cka().unwrap();
        assert!((streamed - direct).abs() < 1e-12, "{streamed} vs {direct}");
        let t: HashMap<String, Tensor> = a.to_tensors("s0").unwrap().into_iter().collect();
        assert_eq!(CkaSums::from_tensors(&t, "s0").unwrap(), a);
        assert!(CkaSums::from_tensors(&t, "s1").is_err());
        assert!(a.merge(&CkaSums::new(p, p)).is_err());
    }
}
