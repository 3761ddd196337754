//! The attention inspector's spotlight baked into a saved picture: the query's window open,
//! every other token veiled, each key veiled less the more attention it gets, the query ringed
//! white inside dark (no colour of its own, so it is never taken for a region label), keys
//! removed by the shift mask crossed in the shifted-grid colour. The window draws the same spotlight on screen
//! (`app::inspector`) with the same veil.

use super::figure::{stack_figures, text_figure};
use super::panel::{render_panel, PanelStyle, SHIFTED_GRID};
use crate::analysis::inspect::QueryAttention;
use crate::analysis::PreparedStage;
use crate::engine::geometry::Geometry;
use crate::error::Result;
use image::{RgbImage, RgbaImage};
use std::collections::HashMap;

/// Veil over tokens outside the window, and over a key with no attention.
pub const VEIL: f32 = 0.72;

/// The query's ring: white inside, ink outside.
pub const QUERY_RING: [[u8; 3]; 2] = [[255, 255, 255], super::panel::INK];

/// How dark the veil over a key of `weight` is, when the largest weight is `max`.
pub fn key_veil(weight: f32, max: f32) -> f32 {
    if max <= 0.0 {
        return VEIL;
    }
    VEIL * (1.0 - (weight / max).clamp(0.0, 1.0))
}

/// Veil, ring and crosses on a stage picture drawn at `scale` output pixels per input pixel,
/// for a stage of `stride` input pixels per token.
pub fn bake_spotlight(panel: &mut RgbaImage, q: &QueryAttention, stride: usize, scale: f32) {
    let max = q.keys.iter().map(|k| k.weight).fold(0.0, f32::max);
    let veil: HashMap<(usize, usize), f32> = q
        .keys
        .iter()
        .map(|k| ((k.row, k.col), key_veil(k.weight, max)))
        .collect();
    let cell_px = stride as f32 * scale;
    for (x, y, p) in panel.enumerate_pixels_mut() {
        let cell = ((y as f32 / cell_px) as usize, (x as f32 / cell_px) as usize);
        let a = veil.get(&cell).copied().unwrap_or(VEIL);
        for c in 0..3 {
            p[c] = (p[c] as f32 * (1.0 - a)).round() as u8;
        }
    }
    let (w, h) = panel.dimensions();
    let mut put = |x: i64, y: i64, c: [u8; 3]| {
        if x >= 0 && y >= 0 && (x as u32) < w && (y as u32) < h {
            panel.put_pixel(x as u32, y as u32, image::Rgba([c[0], c[1], c[2], 255]));
        }
    };
    let side = cell_px.round().max(1.0) as i64;
    for k in q.keys.iter().filter(|k| k.masked) {
        let (x0, y0) = (
            (k.col as f32 * cell_px) as i64,
            (k.row as f32 * cell_px) as i64,
        );
        for t in 0..side {
            put(x0 + t, y0 + t, SHIFTED_GRID);
            put(x0 + side - 1 - t, y0 + t, SHIFTED_GRID);
        }
    }
    let (x0, y0) = (
        (q.query.1 as f32 * cell_px) as i64,
        (q.query.0 as f32 * cell_px) as i64,
    );
    let ring = (scale.round() as i64).clamp(1, 3);
    // The ink ring just outside the cell, the white one on its edge.
    for (grow, colour) in [(ring, QUERY_RING[1]), (0, QUERY_RING[0])] {
        let (a, b) = (-grow, side - 1 + grow);
        for t in a..=b {
            for d in 0..ring {
                let (lo, hi) = (a + d, b - d);
                put(x0 + t, y0 + lo, colour);
                put(x0 + t, y0 + hi, colour);
                put(x0 + lo, y0 + t, colour);
                put(x0 + hi, y0 + t, colour);
            }
        }
    }
}

/// The inspector's part of a saved figure: the query's stage picture with the spotlight, and
/// the inspector's lines below it.
pub fn attention_figure(
    image: &RgbImage,
    geometry: &Geometry,
    stage: &PreparedStage,
    style: &PanelStyle,
    q: &QueryAttention,
    lines: &[String],
    text_px: f32,
) -> Result<RgbaImage> {
    let mut panel = render_panel(image, &stage.map, geometry, stage.stage, style)?;
    let stride = geometry.stages[stage.stage].stride;
    bake_spotlight(&mut panel, q, stride, style.scale);
    stack_figures(&[panel, text_figure(lines, text_px)?])
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::inspect::KeyWeight;

    fn key(row: usize, col: usize, weight: f32, masked: bool) -> KeyWeight {
        KeyWeight {
            row,
            col,
            weight,
            padding: false,
            masked,
        }
    }

    #[test]
    fn keys_are_lit_by_their_weight_and_the_rest_veiled() {
        // A 4x4-token picture at stride 2, scale 1: 8x8 pixels of grey 200.
        let mut img = RgbaImage::from_pixel(8, 8, image::Rgba([200, 200, 200, 255]));
        let q = QueryAttention {
            query: (0, 0),
            window: 0,
            position: 0,
            head: None,
            heads: 1,
            keys: vec![
                key(0, 0, 0.6, false),
                key(0, 1, 0.3, false),
                key(1, 1, 0.0, true),
            ],
        };
        bake_spotlight(&mut img, &q, 2, 1.0);
        // (0, 1): half the largest weight -> half the veil; inner pixel (3, 1).
        let half = (200.0 * (1.0 - VEIL / 2.0)).round() as u8;
        assert_eq!(img.get_pixel(3, 1)[0], half);
        // A token that is no key: the full veil.
        let full = (200.0 * (1.0 - VEIL)).round() as u8;
        assert_eq!(img.get_pixel(6, 6)[0], full);
        // The query is ringed (white on its edge), the masked key crossed.
        assert_eq!(img.get_pixel(0, 0).0[..3], QUERY_RING[0]);
        assert_eq!(img.get_pixel(1, 0).0[..3], QUERY_RING[0]);
        assert_eq!(img.get_pixel(3, 3).0[..3], SHIFTED_GRID);
    }
}
