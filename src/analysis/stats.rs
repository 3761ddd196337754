//! Per-stage statistics of a scalar map, for export as JSON or CSV.

use super::map::Map;
use super::scale::percentile_sorted;
use crate::engine::geometry::Geometry;
use crate::error::{Error, Result};
use serde::Serialize;
use std::path::Path;

/// Numbers describing one stage's scalar map (raw values, before display scaling).
/// Flat, so one stage is one CSV row.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct StageStats {
    /// The map kind's id (`norm`, `channel:N`).
    pub map: String,
    pub stage: usize,
    /// Token grid of the stage.
    pub rows: usize,
    pub cols: usize,
    /// Input pixels per token side.
    pub stride: usize,
    pub min: f32,
    pub mean: f32,
    pub max: f32,
    /// Percentiles, numpy's "linear" definition (see [`super::percentile`]).
    pub p1: f32,
    pub p5: f32,
    pub p50: f32,
    pub p95: f32,
    pub p99: f32,
    /// Image size in pixels.
    pub input_h: usize,
    pub input_w: usize,
    /// Pixels of zero padding added to the input (bottom, right) to reach a patch multiple.
    pub input_pad_bottom: usize,
    pub input_pad_right: usize,
    /// Tokens of window padding at the bottom/right of the stage (largest over its blocks).
    pub window_pad_rows: usize,
    pub window_pad_cols: usize,
}

/// Statistics of every stage's scalar map; `maps[i]` belongs to stage `i` of `geometry`.
pub fn stage_stats(map_id: &str, maps: &[Map], geometry: &Geometry) -> Result<Vec<StageStats>> {
    maps.iter()
        .enumerate()
        .map(|(stage, m)| {
            let values = m.scalars().ok_or_else(|| {
                Error::BadArgument(format!(
                    "statistics need a scalar map; '{map_id}' gives colours"
                ))
            })?;
            let sg = geometry.stages.get(stage).ok_or_else(|| {
                Error::Internal(format!("map for stage {stage} beyond the geometry"))
            })?;
            let mut v: Vec<f32> = values.iter().copied().filter(|x| x.is_finite()).collect();
            v.sort_by(f32::total_cmp);
            if v.is_empty() {
                return Err(Error::BadArgument(format!(
                    "stage {stage}: the map has no finite value"
                )));
            }
            let p = |q: f32| percentile_sorted(&v, q).unwrap_or(f32::NAN);
            let mean = (v.iter().map(|&x| x as f64).sum::<f64>() / v.len() as f64) as f32;
            let (rows, cols) = m.dims();
            let padded = sg.padded();
            let pad = geometry.input_pad();
            Ok(StageStats {
                map: map_id.to_string(),
                stage,
                rows,
                cols,
                stride: sg.stride,
                min: v[0],
                mean,
                max: v[v.len() - 1],
                p1: p(1.0),
                p5: p(5.0),
                p50: p(50.0),
                p95: p(95.0),
                p99: p(99.0),
                input_h: geometry.image.0,
                input_w: geometry.image.1,
                input_pad_bottom: pad.0,
                input_pad_right: pad.1,
                window_pad_rows: padded.0 - sg.grid.0,
                window_pad_cols: padded.1 - sg.grid.1,
            })
        })
        .collect()
}

/// The statistics as JSON text: an array, one object per stage, ending in a newline.
pub fn stats_json(stats: &[StageStats]) -> Result<String> {
    let text = serde_json::to_string_pretty(stats).map_err(|e| Error::Internal(e.to_string()))?;
    Ok(format!("{text}\n"))
}

/// Write the statistics as a JSON array, one object per stage.
pub fn write_stats_json(stats: &[StageStats], path: &Path) -> Result<()> {
    crate::io::write_text_atomic(path, &stats_json(stats)?)
}

/// The statistics as CSV text: a header row, then one row per stage.
pub fn stats_csv(stats: &[StageStats]) -> Result<String> {
    let mut w = csv::Writer::from_writer(Vec::new());
    for s in stats {
        w.serialize(s).map_err(|e| Error::Internal(e.to_string()))?;
    }
    let bytes = w.into_inner().map_err(|e| Error::Internal(e.to_string()))?;
    String::from_utf8(bytes).map_err(|e| Error::Internal(e.to_string()))
}

/// Write the statistics as CSV.
pub fn write_stats_csv(stats: &[StageStats], path: &Path) -> Result<()> {
    crate::io::write_text_atomic(path, &stats_csv(stats)?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{ModelShape, PadOrder, Semantics, SmallStage};

    #[test]
    fn stats_and_exports() {
        let g = Geometry::new(
            (10, 9),
            &ModelShape {
                patch: 4,
                depths: vec![2],
                window: (2, 2),
                built_for: None,
            },
            Semantics {
                pad_order: PadOrder::PadThenShift,
                small_stage: SmallStage::PadUp,
            },
        );
        // 10x9 pixels, patch 4 -> 3x3 tokens, input padded to 12x12, windows of 2 -> 4x4.
        let m = Map::Scalar {
            rows: 3,
            cols: 3,
            values: (1..=9).map(|v| v as f32).collect(),
        };
        let s = stage_stats("norm", &[m], &g).unwrap();
        let s = &s[0];
        assert_eq!((s.min, s.mean, s.max, s.p50), (1.0, 5.0, 9.0, 5.0));
        assert!((s.p1 - 1.08).abs() < 1e-5); // rank 0.08
        assert!((s.p95 - 8.6).abs() < 1e-5); // rank 7.6
        assert_eq!((s.input_pad_bottom, s.input_pad_right), (2, 3));
        assert_eq!((s.window_pad_rows, s.window_pad_cols), (1, 1));
        let csv = stats_csv(std::slice::from_ref(s)).unwrap();
        let mut lines = csv.lines();
        assert!(lines
            .next()
            .unwrap()
            .starts_with("map,stage,rows,cols,stride,min,mean,max,p1"));
        assert!(lines
            .next()
            .unwrap()
            .starts_with("norm,0,3,3,4,1.0,5.0,9.0,"));
        let json: serde_json::Value =
            serde_json::from_str(&serde_json::to_string(&[s]).unwrap()).unwrap();
        assert_eq!(json[0]["p50"], 5.0);
    }
}
