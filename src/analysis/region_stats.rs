//! How strongly a stage responds inside a labelled region compared with the rest of the image.
//!
//! A region's *weight* on a token is the fraction of the token's pixel footprint
//! ([`StageGeometry::footprint`], clipped to the image) that the region covers, in [0, 1].
//! Tokens whose footprint lies wholly in the padding added to reach the patch or window size have
//! no footprint; they get weight 0 and take part in no statistic. Over the remaining
//! ("image") tokens, with weights `w` and map values `v`:
//!
//! - `inside_mean = Σ w v / Σ w`, the coverage-weighted mean inside the region;
//! - `outside_mean = Σ (1 - w) v / Σ (1 - w)`, the complementary weighted mean, so a token
//!   half covered counts half inside and half outside and the two means split the image's
//!   total exactly;
//! - `ratio = inside_mean / outside_mean`;
//! - `auroc`: the probability that a token counted as inside (weight >= 0.5) has a larger value
//!   than a token counted as outside (every other image token), ties counting one half
//!   (the Mann–Whitney statistic `U / (n_in n_out)`);
//! - `tokens`: the number of tokens with weight >= 0.5;
//! - `coverage = Σ w / (number of image tokens)`, the share of the image's tokens the region
//!   covers.

use super::map::Map;
use crate::annotation::{Region, Shape};
use crate::engine::geometry::StageGeometry;
use crate::engine::StageOutputs;
use crate::error::{Error, Result};
use crate::numeric::auroc;
use serde::{Deserialize, Serialize};

/// The weight at or above which a token counts as inside a region for `tokens` and `auroc`.
pub const INSIDE_WEIGHT: f64 = 0.5;

/// One region's response statistics at one stage for one map: one row of the window's table
/// and of the report's `regions.csv` (the field order is the CSV's column order).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RegionStats {
    /// Image file name (empty when the caller gave none).
    pub image: String,
    /// Region id within its sidecar.
    pub region: u64,
    pub label: String,
    pub stage: usize,
    /// The map kind's id (`norm`, `channel:12`).
    pub map: String,
    /// `Σ w v / Σ w`; `None` when the region covers no image token at all.
    pub inside_mean: Option<f64>,
    /// `Σ (1 - w) v / Σ (1 - w)`; `None` when the region covers every image token fully.
    pub outside_mean: Option<f64>,
    /// `inside_mean / outside_mean`; `None` when either is missing or `outside_mean` is 0.
    /// Meaningful for maps that are never negative (`norm`); for signed maps read the sign too.
    pub ratio: Option<f64>,
    /// Mann–Whitney AUROC of inside (weight >= 0.5) against the other image tokens; `None` when
    /// one side has no token or a value is not a number.
    pub auroc: Option<f64>,
    /// Tokens with weight >= 0.5.
    pub tokens: usize,
    /// The other image tokens (the AUROC's second group); not a `regions.csv` column.
    #[serde(skip)]
    pub outside_tokens: usize,
    /// `Σ w` over the number of image tokens.
    pub coverage: f64,
}

/// The columns of a [`RegionStats`] row in a CSV file, in order (the `regions.csv` contract).
pub const CSV_COLUMNS: [&str; 11] = [
    "image",
    "region",
    "label",
    "stage",
    "map",
    "inside_mean",
    "outside_mean",
    "ratio",
    "auroc",
    "tokens",
    "coverage",
];

/// Rows as CSV text: the [`CSV_COLUMNS`] header (also when there is no row), then one line per
/// row, every f64 in its shortest exact form.
pub fn rows_csv(rows: &[RegionStats]) -> Result<String> {
    let internal = |e: csv::Error| Error::Internal(e.to_string());
    let mut w = csv::WriterBuilder::new()
        .has_headers(false)
        .from_writer(Vec::new());
    w.write_record(CSV_COLUMNS).map_err(internal)?;
    for r in rows {
        w.serialize(r).map_err(internal)?;
    }
    let bytes = w.into_inner().map_err(|e| Error::Internal(e.to_string()))?;
    String::from_utf8(bytes).map_err(|e| Error::Internal(e.to_string()))
}

/// Per token of `stage` (row-major over `stage.grid`), the fraction of its footprint inside
/// `image` (height, width) that `shape` covers. Tokens with an empty footprint get 0.
pub fn token_weights(stage: &StageGeometry, image: (usize, usize), shape: &Shape) -> Vec<f64> {
    crate::probe::heavy_work();
    let (rows, cols) = stage.grid;
    let mut w = vec![0.0; rows * cols];
    let Some(b) = shape.bounds() else { return w };
    let s = stage.stride as f64;
    // Only tokens whose footprint can meet the shape's bounding box need clipping.
    let lo = |v: f64| (v / s).floor().max(0.0) as usize;
    let hi = |v: f64, n: usize| ((v / s).ceil().max(0.0) as usize).min(n);
    let (r0, r1) = (lo(b[1]).min(rows), hi(b[3], rows));
    let (c0, c1) = (lo(b[0]).min(cols), hi(b[2], cols));
    for r in r0..r1 {
        for c in c0..c1 {
            let [y0, y1, x0, x1] = stage.footprint(r, c, image);
            let area = ((y1 - y0) * (x1 - x0)) as f64;
            if area == 0.0 {
                continue;
            }
            let rect = [x0 as f64, y0 as f64, x1 as f64, y1 as f64];
            w[r * cols + c] = (shape.intersection_area(rect) / area).clamp(0.0, 1.0);
        }
    }
    w
}

/// Whether token `(r, c)` of `stage` has any pixel inside `image`.
fn has_footprint(stage: &StageGeometry, r: usize, c: usize, image: (usize, usize)) -> bool {
    let [y0, y1, x0, x1] = stage.footprint(r, c, image);
    y1 > y0 && x1 > x0
}

/// Statistics of one region from its token weights and the map values of the same stage
/// (both row-major over the grid); `image_token[i]` says whether token `i` has a footprint.
/// Returns inside mean, outside mean, ratio, AUROC, tokens inside and outside, and coverage.
#[allow(clippy::type_complexity)]
fn stats_from_weights(
    weights: &[f64],
    values: &[f32],
    image_token: &[bool],
) -> (
    Option<f64>,
    Option<f64>,
    Option<f64>,
    Option<f64>,
    (usize, usize),
    f64,
) {
    let (mut sw, mut swv, mut sow, mut sowv) = (0.0f64, 0.0f64, 0.0f64, 0.0f64);
    let mut inside = Vec::new();
    let mut outside = Vec::new();
    let mut n_image = 0usize;
    for ((&w, &v), &real) in weights.iter().zip(values).zip(image_token) {
        if !real {
            continue;
        }
        n_image += 1;
        let v = v as f64;
        sw += w;
        swv += w * v;
        sow += 1.0 - w;
        sowv += (1.0 - w) * v;
        if w >= INSIDE_WEIGHT {
            inside.push(v);
        } else {
            outside.push(v);
        }
    }
    let inside_mean = (sw > 0.0).then(|| swv / sw);
    let outside_mean = (sow > 0.0).then(|| sowv / sow);
    let ratio = match (inside_mean, outside_mean) {
        (Some(i), Some(o)) if o != 0.0 => Some(i / o),
        _ => None,
    };
    let coverage = if n_image > 0 {
        sw / n_image as f64
    } else {
        0.0
    };
    (
        inside_mean,
        outside_mean,
        ratio,
        auroc(&inside, &outside),
        (inside.len(), outside.len()),
        coverage,
    )
}

/// Statistics of every region at every stage of one forward pass.
///
/// `maps` holds one scalar map per stage (as a [`crate::analysis::MapKind`] computes them from
/// `out`), `map_id` is that kind's id, `image` the image's file name for the rows. Rows come
/// region by region, stages in order.
pub fn region_stats(
    out: &StageOutputs,
    maps: &[Map],
    map_id: &str,
    regions: &[Region],
    image: &str,
) -> Result<Vec<RegionStats>> {
    crate::probe::heavy_work();
    let g = &out.geometry;
    if maps.len() != g.stages.len() {
        return Err(Error::BadArgument(format!(
            "region statistics need one map per stage: {} maps for {} stages",
            maps.len(),
            g.stages.len()
        )));
    }
    let mut per_stage = Vec::with_capacity(maps.len());
    for (stage, map) in g.stages.iter().zip(maps) {
        let values = map.scalars().ok_or_else(|| {
            Error::BadArgument(format!(
                "map '{map_id}' gives colours; region statistics need one number per token"
            ))
        })?;
        if map.dims() != stage.grid {
            return Err(Error::BadArgument(format!(
                "map '{map_id}' of stage {} is {}x{} tokens but the stage grid is {}x{}",
                stage.index,
                map.dims().0,
                map.dims().1,
                stage.grid.0,
                stage.grid.1
            )));
        }
        let cols = stage.grid.1;
        let real: Vec<bool> = (0..stage.grid.0 * cols)
            .map(|i| has_footprint(stage, i / cols, i % cols, g.image))
            .collect();
        per_stage.push((stage, values, real));
    }
    let mut rows = Vec::with_capacity(regions.len() * per_stage.len());
    for region in regions {
        for (stage, values, real) in &per_stage {
            let w = token_weights(stage, g.image, &region.shape);
            let (inside_mean, outside_mean, ratio, auroc, (tokens, outside_tokens), coverage) =
                stats_from_weights(&w, values, real);
            rows.push(RegionStats {
                image: image.to_string(),
                region: region.id,
                label: region.label.clone(),
                stage: stage.index,
                map: map_id.to_string(),
                inside_mean,
                outside_mean,
                ratio,
                auroc,
                tokens,
                outside_tokens,
                coverage,
            });
        }
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_columns_are_the_rows_fields() {
        let row = RegionStats {
            image: "a.png".into(),
            region: 3,
            label: "weed".into(),
            stage: 1,
            map: "norm".into(),
            inside_mean: Some(1.5),
            outside_mean: None,
            ratio: None,
            auroc: Some(0.75),
            tokens: 4,
            outside_tokens: 12,
            coverage: 0.25,
        };
        let mut w = csv::Writer::from_writer(Vec::new());
        w.serialize(&row).unwrap();
        let text = String::from_utf8(w.into_inner().unwrap()).unwrap();
        let header = text.lines().next().unwrap();
        assert_eq!(header, CSV_COLUMNS.join(","));
    }
}
