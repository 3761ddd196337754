//! Window grids and the padding hatch drawn in screen space over a picture, so that every window
//! border shows exactly once at every zoom: a picture drawn smaller than its pixels would lose or
//! bunch up lines baked into it. Borders come from the same geometry the forward pass used
//! ([`render::window_borders`]); each lands on one physical pixel. Where the windows are so
//! small on screen that neighbouring borders would touch, the grid is left out and the panel
//! says so instead of drawing a solid band that looks like a seam.

use crate::engine::geometry::StageGeometry;
use crate::render::{self, Border, GridKind, Overlays, PADDING_HATCH, REGULAR_GRID, SHIFTED_GRID};
use egui::{Color32, Pos2, Rect, Stroke};

/// Borders closer than this many physical pixels are not drawn (the grid would be a blur).
pub const MIN_GAP_PX: f32 = 3.0;

/// Distance between hatch lines, in screen points.
const HATCH_STEP: f32 = 8.0;

/// A border placed on screen.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ScreenLine {
    pub kind: GridKind,
    pub from: Pos2,
    pub to: Pos2,
    /// The physical pixel column (vertical lines) or row (horizontal) it lands on.
    pub pixel: i64,
}

/// The grid of one picture on screen: its lines, and the kinds left out as too dense.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ScreenGrid {
    pub lines: Vec<ScreenLine>,
    pub too_dense: Vec<GridKind>,
}

fn colour(kind: GridKind) -> Color32 {
    let c = match kind {
        GridKind::Regular => REGULAR_GRID,
        GridKind::Shifted => SHIFTED_GRID,
    };
    Color32::from_rgb(c[0], c[1], c[2])
}

/// Place `borders` (input pixels) of a picture drawn in `rect` that shows `canvas` (width,
/// height) input pixels, at `ppp` physical pixels per point.
pub fn place_borders(borders: &[Border], rect: Rect, canvas: (f32, f32), ppp: f32) -> ScreenGrid {
    let sx = rect.width() / canvas.0;
    let sy = rect.height() / canvas.1;
    // The physical pixel a coordinate falls in, and the centre of that pixel in points.
    let pixel = |v: f32| (v * ppp).floor() as i64;
    let centre = |p: i64| (p as f32 + 0.5) / ppp;
    let mut grid = ScreenGrid::default();
    for kind in [GridKind::Regular, GridKind::Shifted] {
        let mut placed = Vec::new();
        let mut dense = false;
        for vertical in [true, false] {
            let mut ats: Vec<usize> = borders
                .iter()
                .filter(|b| b.kind == kind && b.vertical == vertical)
                .map(|b| b.at)
                .collect();
            ats.sort_unstable();
            ats.dedup();
            let scale = if vertical { sx } else { sy };
            let gap = ats
                .windows(2)
                .map(|w| (w[1] - w[0]) as f32 * scale * ppp)
                .fold(f32::INFINITY, f32::min);
            if gap < MIN_GAP_PX {
                dense = true;
                continue;
            }
            for b in borders
                .iter()
                .filter(|b| b.kind == kind && b.vertical == vertical)
            {
                let line = if vertical {
                    // The far edge of the canvas is drawn on its last pixel, inside the picture.
                    let x = (rect.min.x + b.at as f32 * sx).min(rect.max.x - 0.5 / ppp);
                    let p = pixel(x);
                    ScreenLine {
                        kind,
                        from: Pos2::new(centre(p), rect.min.y + b.from as f32 * sy),
                        to: Pos2::new(centre(p), rect.min.y + b.to as f32 * sy),
                        pixel: p,
                    }
                } else {
                    let y = (rect.min.y + b.at as f32 * sy).min(rect.max.y - 0.5 / ppp);
                    let p = pixel(y);
                    ScreenLine {
                        kind,
                        from: Pos2::new(rect.min.x + b.from as f32 * sx, centre(p)),
                        to: Pos2::new(rect.min.x + b.to as f32 * sx, centre(p)),
                        pixel: p,
                    }
                };
                placed.push(line);
            }
        }
        grid.lines.extend(placed);
        if dense {
            grid.too_dense.push(kind);
        }
    }
    grid
}

/// Draw the grids and the padding hatch of `stage` over its picture in `rect` (`image` is the
/// network input's (height, width)); returns the kinds left out as too dense.
pub fn paint_overlays(
    painter: &egui::Painter,
    stage: &StageGeometry,
    image: (usize, usize),
    overlays: &Overlays,
    rect: Rect,
) -> Vec<GridKind> {
    let (ch, cw) = render::canvas_size(stage);
    let canvas = (cw as f32, ch as f32);
    let ppp = painter.ctx().pixels_per_point();
    if overlays.padding {
        let (sx, sy) = (rect.width() / canvas.0, rect.height() / canvas.1);
        let right = Rect::from_min_max(
            Pos2::new(rect.min.x + image.1 as f32 * sx, rect.min.y),
            rect.max,
        );
        let bottom = Rect::from_min_max(
            Pos2::new(rect.min.x, rect.min.y + image.0 as f32 * sy),
            Pos2::new(rect.min.x + image.1 as f32 * sx, rect.max.y),
        );
        for r in [right, bottom] {
            hatch(painter, r);
        }
    }
    let clip = if overlays.grid_in_padding {
        (ch, cw)
    } else {
        image
    };
    let grid = place_borders(
        &render::window_borders(stage, overlays, clip),
        rect,
        canvas,
        ppp,
    );
    for l in &grid.lines {
        painter.line_segment([l.from, l.to], Stroke::new(1.0 / ppp, colour(l.kind)));
    }
    grid.too_dense
}

/// Diagonal lines over `r`, `HATCH_STEP` points apart, clipped to `r`.
fn hatch(painter: &egui::Painter, r: Rect) {
    if r.width() <= 0.5 || r.height() <= 0.5 {
        return;
    }
    let p = painter.with_clip_rect(r.intersect(painter.clip_rect()));
    let c = Color32::from_rgb(PADDING_HATCH[0], PADDING_HATCH[1], PADDING_HATCH[2]);
    let stroke = Stroke::new(1.5, c);
    let mut x = r.min.x - r.height();
    while x < r.max.x {
        p.line_segment(
            [Pos2::new(x, r.max.y), Pos2::new(x + r.height(), r.min.y)],
            stroke,
        );
        x += HATCH_STEP;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{Geometry, ModelShape, PadOrder, Semantics, SmallStage};
    use std::collections::BTreeSet;

    fn geometry(h: usize, w: usize) -> Geometry {
        let shape = ModelShape {
            patch: 4,
            depths: vec![2, 2, 6, 2],
            window: (7, 7),
            built_for: None,
        };
        let sem = Semantics {
            pad_order: PadOrder::ShiftThenPad,
            small_stage: SmallStage::ClampPerAxis,
        };
        Geometry::new((h, w), &shape, sem)
    }

    /// At each scale, every distinct border position lands on its own physical pixel, exactly
    /// where `floor(at * scale)` puts it (an independent computation), or the grid says it is
    /// too dense because two borders would be closer than `MIN_GAP_PX`.
    #[test]
    fn every_border_shows_once_at_every_scale() {
        let both = Overlays {
            shifted_grid: true,
            ..Overlays::default()
        };
        for (h, w) in [(250, 333), (1500, 2000), (97, 160)] {
            let g = geometry(h, w);
            for st in &g.stages {
                let (ch, cw) = render::canvas_size(st);
                let borders = render::window_borders(st, &both, (ch, cw));
                assert!(!borders.is_empty());
                for scale in [0.05f32, 0.1, 0.25, 0.42, 1.0, 2.5] {
                    let rect = Rect::from_min_size(
                        Pos2::new(10.0, 20.0),
                        egui::vec2(cw as f32 * scale, ch as f32 * scale),
                    );
                    let grid = place_borders(&borders, rect, (cw as f32, ch as f32), 1.0);
                    for kind in [GridKind::Regular, GridKind::Shifted] {
                        let xs: BTreeSet<usize> = borders
                            .iter()
                            .filter(|b| b.kind == kind && b.vertical)
                            .map(|b| b.at)
                            .collect();
                        let drawn: BTreeSet<i64> = grid
                            .lines
                            .iter()
                            .filter(|l| l.kind == kind && l.from.x == l.to.x)
                            .map(|l| l.pixel)
                            .collect();
                        if grid.too_dense.contains(&kind) {
                            let xs: Vec<usize> = xs.into_iter().collect();
                            let tight = xs
                                .windows(2)
                                .any(|p| ((p[1] - p[0]) as f32 * scale) < MIN_GAP_PX);
                            let ys_tight = {
                                let mut ys: Vec<usize> = borders
                                    .iter()
                                    .filter(|b| b.kind == kind && !b.vertical)
                                    .map(|b| b.at)
                                    .collect();
                                ys.sort_unstable();
                                ys.dedup();
                                ys.windows(2)
                                    .any(|p| ((p[1] - p[0]) as f32 * scale) < MIN_GAP_PX)
                            };
                            assert!(tight || ys_tight, "{h}x{w} stage {} at {scale}", st.index);
                            continue;
                        }
                        let expected: BTreeSet<i64> = xs
                            .iter()
                            .map(|&x| {
                                let v = (10.0 + x as f32 * scale).min(rect.max.x - 0.5);
                                v.floor() as i64
                            })
                            .collect();
                        assert_eq!(expected.len(), xs.len(), "distinct borders stay distinct");
                        assert_eq!(drawn, expected, "{h}x{w} stage {} at {scale}", st.index);
                    }
                }
            }
        }
    }

    /// The demo tray's last stage has 2x2 windows; at the strip's size its grid is drawn.
    #[test]
    fn the_last_stage_of_a_demo_tray_keeps_its_grid() {
        let g = geometry(250, 333);
        let st = &g.stages[3];
        let (ch, cw) = render::canvas_size(st);
        let borders = render::window_borders(st, &Overlays::default(), (ch, cw));
        let rect =
            Rect::from_min_size(Pos2::ZERO, egui::vec2(180.0, 180.0 * ch as f32 / cw as f32));
        let grid = place_borders(&borders, rect, (cw as f32, ch as f32), 1.0);
        assert!(grid.too_dense.is_empty());
        let vertical: BTreeSet<i64> = grid
            .lines
            .iter()
            .filter(|l| l.kind == GridKind::Regular && l.from.x == l.to.x)
            .map(|l| l.pixel)
            .collect();
        assert_eq!(
            vertical.len(),
            3,
            "left edge, the border between the windows, right edge"
        );
    }
}
