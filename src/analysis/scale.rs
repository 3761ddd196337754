//! From raw scalar maps to [0, 1] for display, with the numeric range the legend shows.
//!
//! The range is `[lo, hi]` = the `clip_percentiles` of the values (so a few extreme tokens do
//! not wash out the rest), taken per stage or over all stages pooled; values outside it are
//! clamped. Percentiles interpolate linearly between order statistics, as numpy.percentile does
//! with its default method "linear".

use super::map::Map;
use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};

/// How scalar maps are scaled for display.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct ScaleSpec {
    /// One range for every stage (pooled over all their tokens) instead of one per stage.
    pub shared_across_stages: bool,
    /// Logarithmic scale (base 10) between `lo` and `hi`; see [`ScaleRange::normalise`].
    pub log: bool,
    /// Lower and upper percentile (0..=100) that set the range.
    pub clip_percentiles: (f32, f32),
}

impl Default for ScaleSpec {
    fn default() -> Self {
        ScaleSpec {
            shared_across_stages: false,
            log: false,
            clip_percentiles: (1.0, 99.0),
        }
    }
}

impl ScaleSpec {
    /// Check the percentiles.
    pub fn validate(&self) -> Result<()> {
        let (a, b) = self.clip_percentiles;
        if !(0.0..=100.0).contains(&a) || !(0.0..=100.0).contains(&b) || a >= b {
            return Err(Error::BadArgument(format!(
                "clip percentiles {a}, {b}: need 0 <= low < high <= 100"
            )));
        }
        Ok(())
    }
}

/// The numeric range of a scaled map, as the legend labels it.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct ScaleRange {
    pub lo: f32,
    pub hi: f32,
    pub log: bool,
}

impl ScaleRange {
    /// A value's display position in [0, 1]. Linear: `(v - lo) / (hi - lo)`. Log: the same on
    /// log10 of the values (both ends positive by construction; `v <= 0` goes to 0). Values
    /// beyond the range clamp; an empty range (`lo == hi`) puts everything at 0.5.
    pub fn normalise(&self, v: f32) -> f32 {
        if !v.is_finite() {
            return if v == f32::INFINITY { 1.0 } else { 0.0 };
        }
        if self.hi <= self.lo {
            return 0.5;
        }
        let t = if self.log {
            if v <= 0.0 {
                return 0.0;
            }
            let (l, h) = (self.lo.log10(), self.hi.log10());
            (v.log10() - l) / (h - l)
        } else {
            (v - self.lo) / (self.hi - self.lo)
        };
        t.clamp(0.0, 1.0)
    }

    /// The value at display position `t` (the inverse of [`Self::normalise`] inside the range).
    pub fn value_at(&self, t: f32) -> f32 {
        if self.log && self.lo > 0.0 {
            let (l, h) = (self.lo.log10(), self.hi.log10());
            10f32.powf(l + (h - l) * t)
        } else {
            self.lo + (self.hi - self.lo) * t
        }
    }
}

/// The `p`-th percentile (0..=100) of `values`, numpy.percentile's default "linear" method:
/// sort, take rank `p / 100 * (n - 1)` and interpolate between the two order statistics around
/// it. Non-finite values are left out; `None` when nothing is left.
pub fn percentile(values: &[f32], p: f32) -> Option<f32> {
    let mut v: Vec<f32> = values.iter().copied().filter(|x| x.is_finite()).collect();
    v.sort_by(f32::total_cmp);
    percentile_sorted(&v, p)
}

/// [`percentile`] on values already sorted ascending and finite.
pub fn percentile_sorted(sorted: &[f32], p: f32) -> Option<f32> {
    if sorted.is_empty() {
        return None;
    }
    let rank = (p.clamp(0.0, 100.0) as f64 / 100.0) * (sorted.len() - 1) as f64;
    let i = rank.floor() as usize;
    let j = (i + 1).min(sorted.len() - 1);
    let f = rank - i as f64;
    let (a, b) = (sorted[i] as f64, sorted[j] as f64);
    Some((a + (b - a) * f) as f32)
}

fn range_of(values: &[f32], spec: &ScaleSpec) -> ScaleRange {
    let mut v: Vec<f32> = values.iter().copied().filter(|x| x.is_finite()).collect();
    v.sort_by(f32::total_cmp);
    let (pa, pb) = spec.clip_percentiles;
    let mut lo = percentile_sorted(&v, pa).unwrap_or(0.0);
    let hi = percentile_sorted(&v, pb).unwrap_or(0.0);
    let mut log = spec.log;
    if log && lo <= 0.0 {
        // A log axis cannot start at or below zero: start at the smallest positive value, or
        // fall back to linear when no value is positive.
        match v.iter().copied().find(|&x| x > 0.0) {
            Some(min_pos) if min_pos <= hi => lo = min_pos,
            _ => log = false,
        }
    }
    ScaleRange { lo, hi, log }
}

/// Scale scalar maps to [0, 1] by `spec`; returns each map normalised (same grid) with its range.
/// Errors on a colour map, which has no scalar values.
pub fn normalise_maps(maps: &[Map], spec: &ScaleSpec) -> Result<Vec<(Map, ScaleRange)>> {
    spec.validate()?;
    let scalars: Vec<&[f32]> = maps
        .iter()
        .map(|m| {
            m.scalars().ok_or_else(|| {
                Error::BadArgument("only scalar maps can be scaled (this one is RGB)".into())
            })
        })
        .collect::<Result<_>>()?;
    let shared = spec
        .shared_across_stages
        .then(|| range_of(&scalars.concat(), spec));
    Ok(maps
        .iter()
        .zip(&scalars)
        .map(|(m, v)| {
            let range = shared.unwrap_or_else(|| range_of(v, spec));
            let (rows, cols) = m.dims();
            let values = v.iter().map(|&x| range.normalise(x)).collect();
            (Map::Scalar { rows, cols, values }, range)
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentiles_follow_numpy_linear() {
        // numpy.percentile([1, 2, 3, 4], q) with method "linear": rank = q/100 * 3.
        let a = [4.0, 1.0, 3.0, 2.0];
        assert_eq!(percentile(&a, 0.0), Some(1.0));
        assert_eq!(percentile(&a, 100.0), Some(4.0));
        assert_eq!(percentile(&a, 50.0), Some(2.5)); // rank 1.5
        assert!((percentile(&a, 25.0).unwrap() - 1.75).abs() < 1e-6); // rank 0.75
        assert!((percentile(&a, 99.0).unwrap() - 3.97).abs() < 1e-6); // rank 2.97
                                                                      // 0..=100 (101 values): rank equals q, so the percentile is q itself; 1.5 interpolates.
        let b: Vec<f32> = (0..=100).map(|i| i as f32).collect();
        assert_eq!(percentile(&b, 1.0), Some(1.0));
        assert_eq!(percentile(&b, 1.5), Some(1.5));
        assert_eq!(percentile(&[7.0], 30.0), Some(7.0));
        assert_eq!(percentile(&[f32::NAN], 30.0), None);
        assert_eq!(percentile(&[1.0, f32::NAN, 3.0], 50.0), Some(2.0));
    }

    #[test]
    fn per_stage_and_shared_ranges() {
        let m = |v: Vec<f32>| Map::Scalar {
            rows: 1,
            cols: v.len(),
            values: v,
        };
        let maps = [m(vec![0.0, 10.0]), m(vec![20.0, 30.0])];
        let spec = ScaleSpec {
            clip_percentiles: (0.0, 100.0),
            ..Default::default()
        };
        let own = normalise_maps(&maps, &spec).unwrap();
        assert_eq!((own[1].1.lo, own[1].1.hi), (20.0, 30.0));
        assert_eq!(own[1].0.scalars().unwrap(), &[0.0, 1.0]);
        let shared = normalise_maps(
            &maps,
            &ScaleSpec {
                shared_across_stages: true,
                ..spec
            },
        )
        .unwrap();
        assert_eq!((shared[0].1.lo, shared[0].1.hi), (0.0, 30.0));
        let v = shared[1].0.scalars().unwrap();
        assert!((v[0] - 2.0 / 3.0).abs() < 1e-6 && v[1] == 1.0);
        // Clipping at the 25th/75th percentile of [0, 10] -> [2.5, 7.5]; 0 and 10 clamp.
        let clipped = normalise_maps(
            &maps[..1],
            &ScaleSpec {
                clip_percentiles: (25.0, 75.0),
                ..spec
            },
        )
        .unwrap();
        assert_eq!((clipped[0].1.lo, clipped[0].1.hi), (2.5, 7.5));
        assert_eq!(clipped[0].0.scalars().unwrap(), &[0.0, 1.0]);
        assert!(normalise_maps(
            &maps,
            &ScaleSpec {
                clip_percentiles: (50.0, 10.0),
                ..spec
            }
        )
        .is_err());
    }

    #[test]
    fn log_scale() {
        let r = ScaleRange {
            lo: 1.0,
            hi: 1000.0,
            log: true,
        };
        assert!((r.normalise(10.0) - 1.0 / 3.0).abs() < 1e-6);
        assert!((r.normalise(100.0) - 2.0 / 3.0).abs() < 1e-6);
        assert_eq!(r.normalise(0.0), 0.0);
        assert_eq!(r.normalise(5000.0), 1.0);
        assert!((r.value_at(0.5) - 1000f32.sqrt()).abs() < 1e-3);
        // A range that starts at zero starts at the smallest positive value instead.
        let maps = [Map::Scalar {
            rows: 1,
            cols: 4,
            values: vec![0.0, 0.01, 1.0, 100.0],
        }];
        let spec = ScaleSpec {
            log: true,
            clip_percentiles: (0.0, 100.0),
            ..Default::default()
        };
        let out = normalise_maps(&maps, &spec).unwrap();
        assert_eq!(
            out[0].1,
            ScaleRange {
                lo: 0.01,
                hi: 100.0,
                log: true
            }
        );
        let v = out[0].0.scalars().unwrap();
        assert_eq!(v[0], 0.0);
        assert!((v[2] - 0.5).abs() < 1e-6);
        // Nothing positive: linear.
        let neg = [Map::Scalar {
            rows: 1,
            cols: 2,
            values: vec![-2.0, -1.0],
        }];
        assert!(!normalise_maps(&neg, &spec).unwrap()[0].1.log);
    }
}
