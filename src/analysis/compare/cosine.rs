//! Per-token cosine similarity between two checkpoints' outputs for the same token:
//! `cos(a_t, b_t) = a_t . b_t / (||a_t|| ||b_t||)`, in f64. Defined only when both stages have
//! the same width. A token whose vector is zero in one checkpoint and not the other has cosine
//! 0; zero in both, cosine 1 (the two tokens are the same).

use super::exact::Dd;
use crate::analysis::map::Tokens;
use crate::error::{Error, Result};

/// The cosine of every token of `a` with the same token of `b`, row-major over the grid.
/// An error when the grids or the widths differ (the message says which).
pub fn token_cosines(a: &Tokens, b: &Tokens) -> Result<Vec<f64>> {
    if (a.rows, a.cols) != (b.rows, b.cols) {
        return Err(Error::BadArgument(format!(
            "the token grids differ ({}x{} vs {}x{}): no token-by-token comparison",
            a.rows, a.cols, b.rows, b.cols
        )));
    }
    if a.channels != b.channels {
        return Err(Error::BadArgument(format!(
            "the stage widths differ ({} vs {} channels): no per-token cosine",
            a.channels, b.channels
        )));
    }
    Ok((0..a.len())
        .map(|i| {
            let (u, v) = (a.token(i), b.token(i));
            let (mut uv, mut uu, mut vv) = (0f64, 0f64, 0f64);
            for (&x, &y) in u.iter().zip(v) {
                let (x, y) = (x as f64, y as f64);
                uv += x * y;
                uu += x * x;
                vv += y * y;
            }
            match (uu > 0.0, vv > 0.0) {
                (true, true) => (uv / (uu * vv).sqrt()).clamp(-1.0, 1.0),
                (false, false) => 1.0,
                _ => 0.0,
            }
        })
        .collect())
}

/// Mean and minimum of a set of cosines, and how many there were.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CosineStats {
    pub mean: f64,
    pub min: f64,
    pub tokens: u64,
}

/// Running sum, minimum and count of cosines over many images (mergeable, in double-double
/// so the pooled mean does not depend on the order images or shards are added).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CosineSums {
    pub sum: (f64, f64),
    pub min: f64,
    pub n: u64,
}

impl Default for CosineSums {
    fn default() -> Self {
        CosineSums {
            sum: (0.0, 0.0),
            min: f64::INFINITY,
            n: 0,
        }
    }
}

impl CosineSums {
    pub fn push(&mut self, cosines: &[f64]) {
        let mut s = Dd::new(self.sum.0, self.sum.1);
        for &c in cosines {
            s = s.add_f64(c);
            self.min = self.min.min(c);
        }
        self.sum = (s.hi, s.lo);
        self.n += cosines.len() as u64;
    }

    pub fn merge(&mut self, o: &CosineSums) {
        let s = Dd::new(self.sum.0, self.sum.1).add(Dd::new(o.sum.0, o.sum.1));
        self.sum = (s.hi, s.lo);
        self.min = self.min.min(o.min);
        self.n += o.n;
    }

    /// `None` before any cosine.
    pub fn stats(&self) -> Option<CosineStats> {
        (self.n > 0).then(|| CosineStats {
            mean: Dd::new(self.sum.0, self.sum.1)
                .div_f64(self.n as f64)
                .to_f64(),
            min: self.min,
            tokens: self.n,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cosines_by_hand() {
        // (1,0)·(0,1) = 0; (3,4)·(6,8) = 1; (1,1)·(-1,-1) = -1; (0,0) vs (0,0) = 1; (0,0) vs (1,0) = 0.
        let a = Tokens::new(1, 5, 2, vec![1., 0., 3., 4., 1., 1., 0., 0., 0., 0.]).unwrap();
        let b = Tokens::new(1, 5, 2, vec![0., 1., 6., 8., -1., -1., 0., 0., 1., 0.]).unwrap();
        let c = token_cosines(&a, &b).unwrap();
        for (got, want) in c.iter().zip([0.0, 1.0, -1.0, 1.0, 0.0]) {
            assert!((got - want).abs() < 1e-15, "{c:?}");
        }
        let mut s = CosineSums::default();
        s.push(&c[..2]);
        let mut t = CosineSums::default();
        t.push(&c[2..]);
        s.merge(&t);
        let st = s.stats().unwrap();
        assert!((st.mean - 0.2).abs() < 1e-15 && (st.min + 1.0).abs() < 1e-15);
        assert_eq!(st.tokens, 5);
        let wide = Tokens::new(1, 5, 3, vec![0.; 15]).unwrap();
        assert!(token_cosines(&a, &wide)
            .unwrap_err()
            .to_string()
            .contains("widths"));
    }
}
