//! The one renderer for the window and for saved figures: stage panels (a map over the image,
//! window grids, hatched padding), legends, text and the composed figure.
//!
//! The window shows exactly what a saved figure shows because both draw through here. Window
//! borders come from [`BlockGeometry::pieces`]; nothing here recomputes a window.
//!
//! Coordinates: a panel's canvas covers the stage's padded token grid times its stride, in input
//! pixels, which always contains the image (top-left aligned). With `scale` output pixels per
//! input pixel, input coordinate `b` lands on output pixel `round(b * scale)`; map cells, image
//! pixels and grid lines all use that one rounding, so lines sit exactly on cell borders.

use crate::analysis::{Colormap, Map, ScaleRange};
use crate::error::{Error, Result};
use crate::geometry::{BlockGeometry, Geometry, StageGeometry};
use ab_glyph::{point, Font, FontRef, PxScale, ScaleFont};
use image::{RgbImage, Rgba, RgbaImage};
use std::path::Path;
use std::sync::OnceLock;

/// Colour of the regular (unshifted) window grid.
pub const REGULAR_GRID: [u8; 3] = [255, 255, 255];
/// Colour of the shifted window grid (window and mask-region borders).
pub const SHIFTED_GRID: [u8; 3] = [0, 220, 255];
/// Base colour of padding (outside the image, inside the padded map).
pub const PADDING_FILL: [u8; 3] = [176, 176, 176];
/// Colour of the diagonal hatching on padding.
pub const PADDING_HATCH: [u8; 3] = [112, 112, 112];
/// Figure and legend background.
pub const BACKGROUND: [u8; 3] = [255, 255, 255];
/// Text colour.
pub const INK: [u8; 3] = [28, 28, 32];

/// Period of the padding hatch along each axis, in output pixels.
pub const HATCH_PERIOD: u32 = 8;

/// The caution every figure carries.
pub const CAUTION: &str = "Response maps show where features are large, not why the model \
decides; they are no evidence of safety for high-stakes use, where local rules and qualified \
review come first.";

/// Largest side of any rendered image, in pixels.
pub const MAX_SIDE: u32 = 32768;

/// Which overlays a panel draws. Each toggle is independent.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Overlays {
    /// Borders of the regular windows of the chosen block pair.
    pub regular_grid: bool,
    /// Borders of the shifted windows (and the mask regions inside them) of the chosen pair.
    pub shifted_grid: bool,
    /// Hatch everything outside the image: input padding and window padding.
    pub padding: bool,
    /// Chooses the block pair: blocks `2k` (regular) and `2k + 1` (shifted) with `k = block / 2`,
    /// clamped to each stage's depth.
    pub block: usize,
    /// Draw window borders over the padded area too (windows do extend there), not only over
    /// the image.
    pub grid_in_padding: bool,
    /// Grid line width in output pixels.
    pub line_width: u32,
}

impl Default for Overlays {
    fn default() -> Self {
        Overlays {
            regular_grid: true,
            shifted_grid: true,
            padding: true,
            block: 0,
            grid_in_padding: true,
            line_width: 1,
        }
    }
}

impl Overlays {
    /// The (regular, shifted) blocks whose windows this stage draws; `None` for a missing or
    /// unshifted second block (a stage whose windows are clamped has no shifted grid).
    pub fn blocks<'a>(
        &self,
        stage: &'a StageGeometry,
    ) -> (Option<&'a BlockGeometry>, Option<&'a BlockGeometry>) {
        let n = stage.blocks.len();
        if n == 0 {
            return (None, None);
        }
        let first = (self.block.min(n - 1) / 2) * 2;
        let regular = stage.blocks.get(first);
        let shifted = stage.blocks.get(first + 1).filter(|b| b.is_shifted());
        (regular, shifted)
    }
}

/// How a panel is drawn.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PanelStyle {
    pub colormap: Colormap,
    /// Map opacity over the image, 0 (image only) to 1 (map only).
    pub opacity: f32,
    pub overlays: Overlays,
    /// Output pixels per input pixel.
    pub scale: f32,
}

impl Default for PanelStyle {
    fn default() -> Self {
        PanelStyle {
            colormap: Colormap::Viridis,
            opacity: 0.6,
            overlays: Overlays::default(),
            scale: 1.0,
        }
    }
}

impl PanelStyle {
    fn validate(&self) -> Result<()> {
        if !(self.scale.is_finite() && self.scale > 0.0) {
            return Err(Error::BadArgument(format!(
                "scale {}: must be a positive number",
                self.scale
            )));
        }
        if !(0.0..=1.0).contains(&self.opacity) {
            return Err(Error::BadArgument(format!(
                "opacity {}: must be between 0 and 1",
                self.opacity
            )));
        }
        Ok(())
    }
}

/// Output pixel of input coordinate `b` at `scale`.
pub fn to_px(b: usize, scale: f32) -> u32 {
    (b as f64 * scale as f64).round() as u32
}

/// The canvas of a stage panel in input pixels (height, width): the padded token grid of the
/// stage times its stride.
pub fn canvas_size(stage: &StageGeometry) -> (usize, usize) {
    let (pr, pc) = stage.padded();
    (pr * stage.stride, pc * stage.stride)
}

/// `base` with `colour` (in [0, 1]) laid over it at `opacity`, rounded to 8 bits.
pub fn blend(base: [u8; 3], colour: [f32; 3], opacity: f32) -> [u8; 3] {
    let mut out = [0u8; 3];
    for k in 0..3 {
        let v = (1.0 - opacity) * base[k] as f32 + opacity * colour[k] * 255.0;
        out[k] = v.round().clamp(0.0, 255.0) as u8;
    }
    out
}

/// For every output pixel along one axis, the input coordinate it shows.
fn axis_sources(len_in: usize, scale: f32) -> Vec<usize> {
    let out_len = to_px(len_in, scale) as usize;
    let mut src = vec![0usize; out_len];
    for i in 0..len_in {
        let (a, b) = (to_px(i, scale) as usize, to_px(i + 1, scale) as usize);
        for s in &mut src[a.min(out_len)..b.min(out_len)] {
            *s = i;
        }
    }
    src
}

fn check_size(h: u32, w: u32) -> Result<()> {
    if h == 0 || w == 0 || h > MAX_SIDE || w > MAX_SIDE {
        return Err(Error::Limit(format!(
            "a rendered image of {w}x{h} pixels is outside 1..={MAX_SIDE} per side; use a smaller scale"
        )));
    }
    Ok(())
}

fn fill_rect(img: &mut RgbaImage, x0: u32, y0: u32, x1: u32, y1: u32, c: [u8; 3]) {
    for y in y0..y1.min(img.height()) {
        for x in x0..x1.min(img.width()) {
            img.put_pixel(x, y, Rgba([c[0], c[1], c[2], 255]));
        }
    }
}

/// Is output pixel (x, y) on the padding hatch?
pub fn is_hatch(x: u32, y: u32) -> bool {
    (x + y) % HATCH_PERIOD < 2
}

/// A stage panel: the map over the image, then the overlays. `map` must already be in [0, 1]
/// (scalar maps through the colour map, RGB maps as they are) on the stage's token grid.
pub fn render_panel(
    image: &RgbImage,
    map: &Map,
    geometry: &Geometry,
    stage: usize,
    style: &PanelStyle,
) -> Result<RgbaImage> {
    let (w, h) = image.dimensions();
    if (h as usize, w as usize) != geometry.image {
        return Err(Error::BadArgument(format!(
            "image of {w}x{h} pixels does not match the forward pass ({}x{})",
            geometry.image.1, geometry.image.0
        )));
    }
    draw_panel(Some(image), map, geometry, stage, style)
}

/// A stage panel without the image: the map alone (fully opaque), padding and grids.
pub fn render_map_only(
    map: &Map,
    geometry: &Geometry,
    stage: usize,
    style: &PanelStyle,
) -> Result<RgbaImage> {
    draw_panel(None, map, geometry, stage, style)
}

fn draw_panel(
    image: Option<&RgbImage>,
    map: &Map,
    geometry: &Geometry,
    stage: usize,
    style: &PanelStyle,
) -> Result<RgbaImage> {
    style.validate()?;
    let sg = geometry.stages.get(stage).ok_or_else(|| {
        Error::BadArgument(format!(
            "stage {stage} does not exist; this model has {} stages",
            geometry.stages.len()
        ))
    })?;
    if map.dims() != sg.grid {
        return Err(Error::BadArgument(format!(
            "map of {}x{} tokens does not match stage {stage} ({}x{})",
            map.dims().0,
            map.dims().1,
            sg.grid.0,
            sg.grid.1
        )));
    }
    let (ch, cw) = canvas_size(sg);
    let scale = style.scale;
    let (oh, ow) = (to_px(ch, scale), to_px(cw, scale));
    check_size(oh, ow)?;
    let (ih, iw) = geometry.image;
    let rows = axis_sources(ch, scale);
    let cols = axis_sources(cw, scale);
    let opacity = if image.is_some() { style.opacity } else { 1.0 };
    let stride = sg.stride;
    let mut out = RgbaImage::new(ow, oh);
    for (y, &iy) in rows.iter().enumerate() {
        for (x, &ix) in cols.iter().enumerate() {
            let c = if iy < ih && ix < iw {
                let t = (iy / stride) * sg.grid.1 + ix / stride;
                let colour = match map {
                    Map::Scalar { values, .. } => style.colormap.lookup(values[t]),
                    Map::Rgb { values, .. } => values[t].map(|v| v.clamp(0.0, 1.0)),
                };
                let base = image.map_or([0, 0, 0], |im| im.get_pixel(ix as u32, iy as u32).0);
                blend(base, colour, opacity)
            } else if style.overlays.padding && is_hatch(x as u32, y as u32) {
                PADDING_HATCH
            } else {
                PADDING_FILL
            };
            out.put_pixel(x as u32, y as u32, Rgba([c[0], c[1], c[2], 255]));
        }
    }
    let clip = if style.overlays.grid_in_padding {
        (ch, cw)
    } else {
        (ih, iw)
    };
    let (regular, shifted) = style.overlays.blocks(sg);
    if style.overlays.regular_grid {
        if let Some(b) = regular {
            draw_pieces(&mut out, b, stride, clip, style, REGULAR_GRID);
        }
    }
    if style.overlays.shifted_grid {
        if let Some(b) = shifted {
            draw_pieces(&mut out, b, stride, clip, style, SHIFTED_GRID);
        }
    }
    Ok(out)
}

/// The output pixel where a border at input coordinate `b` is drawn (kept inside the image).
pub fn border_px(b: usize, scale: f32, line_width: u32, out_len: u32) -> u32 {
    to_px(b, scale).min(out_len.saturating_sub(line_width.max(1)))
}

/// Draw the border of every piece of `block` (token rectangles times the stride, clipped to
/// `clip` = (height, width) in input pixels).
fn draw_pieces(
    img: &mut RgbaImage,
    block: &BlockGeometry,
    stride: usize,
    clip: (usize, usize),
    style: &PanelStyle,
    colour: [u8; 3],
) {
    let lw = style.overlays.line_width.max(1);
    let (oh, ow) = (img.height(), img.width());
    for p in block.pieces() {
        let y0 = (p.row0 * stride).min(clip.0);
        let y1 = (p.row1 * stride).min(clip.0);
        let x0 = (p.col0 * stride).min(clip.1);
        let x1 = (p.col1 * stride).min(clip.1);
        if y0 >= y1 || x0 >= x1 {
            continue;
        }
        let (py0, py1) = (
            border_px(y0, style.scale, lw, oh),
            border_px(y1, style.scale, lw, oh),
        );
        let (px0, px1) = (
            border_px(x0, style.scale, lw, ow),
            border_px(x1, style.scale, lw, ow),
        );
        // Horizontal edges span the piece including the far corner; vertical ones likewise.
        fill_rect(img, px0, py0, px1 + lw, py0 + lw, colour);
        fill_rect(img, px0, py1, px1 + lw, py1 + lw, colour);
        fill_rect(img, px0, py0, px0 + lw, py1 + lw, colour);
        fill_rect(img, px1, py0, px1 + lw, py1 + lw, colour);
    }
}

// ---------------------------------------------------------------------------------------------
// Text

fn font() -> &'static FontRef<'static> {
    static FONT: OnceLock<FontRef<'static>> = OnceLock::new();
    FONT.get_or_init(|| {
        FontRef::try_from_slice(epaint_default_fonts::HACK_REGULAR)
            .expect("the bundled font parses")
    })
}

/// Width in pixels of `text` at `px` pixels per em.
pub fn text_width(text: &str, px: f32) -> f32 {
    let f = font().as_scaled(PxScale::from(px));
    let mut w = 0.0;
    let mut prev = None;
    for c in text.chars() {
        let id = f.glyph_id(c);
        if let Some(p) = prev {
            w += f.kern(p, id);
        }
        w += f.h_advance(id);
        prev = Some(id);
    }
    w
}

/// Height of one line of text at `px` (ascent + descent + gap).
pub fn line_height(px: f32) -> f32 {
    let f = font().as_scaled(PxScale::from(px));
    f.ascent() - f.descent() + f.line_gap()
}

/// Draw `text` with its top-left at (x, y), anti-aliased over what is there.
pub fn draw_text(img: &mut RgbaImage, text: &str, x: f32, y: f32, px: f32, colour: [u8; 3]) {
    let f = font().as_scaled(PxScale::from(px));
    let baseline = y + f.ascent();
    let mut caret = x;
    let mut prev = None;
    for c in text.chars() {
        let id = f.glyph_id(c);
        if let Some(p) = prev {
            caret += f.kern(p, id);
        }
        let glyph = id.with_scale_and_position(PxScale::from(px), point(caret, baseline));
        caret += f.h_advance(id);
        prev = Some(id);
        let Some(outlined) = font().outline_glyph(glyph) else {
            continue;
        };
        let b = outlined.px_bounds();
        outlined.draw(|gx, gy, cov| {
            let (px_, py_) = (b.min.x as i64 + gx as i64, b.min.y as i64 + gy as i64);
            if px_ < 0 || py_ < 0 || px_ >= img.width() as i64 || py_ >= img.height() as i64 {
                return;
            }
            let p = img.get_pixel_mut(px_ as u32, py_ as u32);
            let a = cov.clamp(0.0, 1.0);
            for (dst, &c) in p.0.iter_mut().zip(&colour) {
                *dst = ((1.0 - a) * *dst as f32 + a * c as f32).round() as u8;
            }
            p.0[3] = 255;
        });
    }
}

/// Break `text` into lines no wider than `max_width` at `px` (words longer than a line stay
/// whole).
pub fn wrap_text(text: &str, px: f32, max_width: f32) -> Vec<String> {
    let mut lines = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        let candidate = if line.is_empty() {
            word.to_string()
        } else {
            format!("{line} {word}")
        };
        if !line.is_empty() && text_width(&candidate, px) > max_width {
            lines.push(std::mem::replace(&mut line, word.to_string()));
        } else {
            line = candidate;
        }
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

// ---------------------------------------------------------------------------------------------
// Legends

/// Tick positions for a linear axis over [lo, hi]: multiples of 1, 2 or 5 times a power of ten,
/// about `target` of them.
pub fn linear_ticks(lo: f32, hi: f32, target: usize) -> (Vec<f32>, f32) {
    if hi <= lo || !lo.is_finite() || !hi.is_finite() {
        return (vec![lo], 0.0);
    }
    let span = (hi - lo) as f64;
    let target = target.max(2) as f64;
    let e = (span / target).log10().floor() as i32;
    // Among 1, 2 and 5 times nearby powers of ten, the step whose tick count is closest to the
    // target (the larger step on a tie).
    let count = |step: f64| ((hi as f64 / step).floor() - (lo as f64 / step).ceil() + 1.0).max(0.0);
    let mut step = 10f64.powi(e);
    let mut best = f64::INFINITY;
    for p in [e - 1, e, e + 1] {
        for m in [1.0, 2.0, 5.0] {
            let s = m * 10f64.powi(p);
            let d = (count(s) - target).abs();
            if d < best || (d == best && s > step) {
                best = d;
                step = s;
            }
        }
    }
    let first = (lo as f64 / step).ceil() as i64;
    let last = (hi as f64 / step).floor() as i64;
    let ticks = (first..=last).map(|k| (k as f64 * step) as f32).collect();
    (ticks, step as f32)
}

/// Ticks for a log axis: the powers of ten in [lo, hi], with 2x and 5x added when there are
/// fewer than three; a linear set when even that gives fewer than two.
pub fn log_ticks(lo: f32, hi: f32) -> Vec<f32> {
    if !(lo > 0.0 && hi > lo) {
        return vec![lo];
    }
    let (a, b) = (lo.log10().floor() as i32, hi.log10().ceil() as i32);
    let decades: Vec<f32> = (a..=b).map(|k| 10f32.powi(k)).collect();
    let inside = |v: &f32| *v >= lo * (1.0 - 1e-6) && *v <= hi * (1.0 + 1e-6);
    let mut t: Vec<f32> = decades.iter().copied().filter(inside).collect();
    if t.len() < 3 {
        t = decades
            .iter()
            .flat_map(|&d| [d, 2.0 * d, 5.0 * d])
            .filter(inside)
            .collect();
    }
    if t.len() < 2 {
        t = linear_ticks(lo, hi, 4).0;
    }
    t
}

/// A tick label: as few digits as the tick spacing needs, exponent form for very large or
/// very small magnitudes.
pub fn format_tick(v: f32, step: f32) -> String {
    let a = v.abs();
    if v == 0.0 {
        return "0".into();
    }
    if !(1e-3..1e5).contains(&a) {
        return format!("{v:.1e}");
    }
    let reference = if step > 0.0 { step.min(a) } else { a };
    let decimals = (-(reference.log10().floor()) as i32).clamp(0, 6) as usize;
    format!("{v:.decimals$}")
}

/// A colour bar with numbered ticks. Horizontal when `width >= height` (bar on top, numbers
/// below), otherwise vertical (bar on the left, numbers to its right, high end at the top).
pub fn render_legend(colormap: Colormap, range: &ScaleRange, width: u32, height: u32) -> RgbaImage {
    let (width, height) = (width.max(8), height.max(8));
    let mut img = RgbaImage::from_pixel(
        width,
        height,
        Rgba([BACKGROUND[0], BACKGROUND[1], BACKGROUND[2], 255]),
    );
    let ticks: Vec<(f32, String)> = if range.log {
        log_ticks(range.lo, range.hi)
            .into_iter()
            .map(|v| (v, format_tick(v, 0.0)))
            .collect()
    } else {
        let (t, step) = linear_ticks(range.lo, range.hi, 5);
        t.into_iter().map(|v| (v, format_tick(v, step))).collect()
    };
    let pos = |v: f32| {
        if range.hi > range.lo {
            range.normalise(v)
        } else {
            0.5
        }
    };
    if width >= height {
        let px = (height as f32 * 0.34).clamp(9.0, 22.0);
        let margin = (text_width("-0.000", px) / 2.0).ceil() as u32 + 2;
        let bar_h = (height as f32 * 0.42).round().max(4.0) as u32;
        let x0 = margin.min(width / 4);
        let x1 = width.saturating_sub(x0).max(x0 + 2);
        for x in x0..x1 {
            let t = (x - x0) as f32 / (x1 - x0 - 1).max(1) as f32;
            let c = colormap.lookup_u8(t);
            fill_rect(&mut img, x, 1, x + 1, 1 + bar_h, c);
        }
        let mut last_right = f32::NEG_INFINITY;
        for (v, label) in ticks {
            let x = x0 as f32 + pos(v) * (x1 - x0 - 1) as f32;
            fill_rect(
                &mut img,
                x.round() as u32,
                1 + bar_h,
                x.round() as u32 + 1,
                4 + bar_h,
                INK,
            );
            let tw = text_width(&label, px);
            let left = (x - tw / 2.0).clamp(0.0, (width as f32 - tw).max(0.0));
            if left > last_right + px * 0.4 {
                draw_text(&mut img, &label, left, (5 + bar_h) as f32, px, INK);
                last_right = left + tw;
            }
        }
    } else {
        let px = (width as f32 * 0.16).clamp(9.0, 22.0);
        let bar_w = (width as f32 * 0.28).round().max(4.0) as u32;
        let y0 = (line_height(px) / 2.0).ceil() as u32;
        let y1 = height.saturating_sub(y0).max(y0 + 2);
        for y in y0..y1 {
            let t = 1.0 - (y - y0) as f32 / (y1 - y0 - 1).max(1) as f32;
            fill_rect(&mut img, 1, y, 1 + bar_w, y + 1, colormap.lookup_u8(t));
        }
        let mut last_top = f32::INFINITY;
        for (v, label) in ticks {
            let y = y1 as f32 - 1.0 - pos(v) * (y1 - y0 - 1) as f32;
            fill_rect(
                &mut img,
                1 + bar_w,
                y.round() as u32,
                4 + bar_w,
                y.round() as u32 + 1,
                INK,
            );
            let top = y - line_height(px) / 2.0;
            if top + line_height(px) < last_top {
                draw_text(&mut img, &label, (6 + bar_w) as f32, top, px, INK);
                last_top = top;
            }
        }
    }
    img
}

/// The key of an RGB (principal component) map: three swatches named PC1..PC3, with the share
/// of variance each explains when given.
pub fn render_rgb_legend(explained: Option<&[f64]>, width: u32, height: u32) -> RgbaImage {
    let (width, height) = (width.max(8), height.max(8));
    let mut img = RgbaImage::from_pixel(
        width,
        height,
        Rgba([BACKGROUND[0], BACKGROUND[1], BACKGROUND[2], 255]),
    );
    let px = (height as f32 * 0.34).clamp(9.0, 22.0);
    let sw = (px * 0.9) as u32;
    let mut x = 2.0f32;
    let y = ((height as f32 - line_height(px)) / 2.0).max(0.0);
    for (k, c) in [[230, 40, 40], [40, 180, 60], [50, 90, 235]]
        .into_iter()
        .enumerate()
    {
        let name = match explained.and_then(|e| e.get(k)) {
            Some(share) => format!("PC{} {:.0}%", k + 1, share * 100.0),
            None => format!("PC{}", k + 1),
        };
        let sy = (y + (line_height(px) - sw as f32) / 2.0) as u32;
        fill_rect(&mut img, x as u32, sy, x as u32 + sw, sy + sw, c);
        x += sw as f32 + 3.0;
        draw_text(&mut img, &name, x, y, px, INK);
        x += text_width(&name, px) + px * 0.8;
    }
    img
}

// ---------------------------------------------------------------------------------------------
// Figure

/// One stage of a figure: its map (already in [0, 1]) and, for scalar maps, the range the
/// legend labels.
#[derive(Clone, Debug)]
pub struct FigureStage {
    pub stage: usize,
    pub map: Map,
    pub range: Option<ScaleRange>,
    /// Share of variance of the principal components, for RGB maps from PCA.
    pub explained: Option<Vec<f64>>,
}

/// Every stage's map of one forward pass, raw (for read-outs and statistics) and scaled for
/// display with its legend range (or, for PCA, the variance shares). The window and the figure
/// command both prepare their pictures here.
pub fn figure_stages(
    out: &crate::backbone::StageOutputs,
    kind: &dyn crate::analysis::MapKind,
    spec: &crate::analysis::ScaleSpec,
) -> Result<(Vec<Map>, Vec<FigureStage>)> {
    let n = out.stages.len();
    if kind.id() == "pca" {
        let mut raw = Vec::with_capacity(n);
        let mut stages = Vec::with_capacity(n);
        for s in 0..n {
            let fit = crate::analysis::fit_pca(&crate::analysis::stage_tokens(out, s)?)?;
            raw.push(fit.rgb.clone());
            stages.push(FigureStage {
                stage: s,
                map: fit.rgb,
                range: None,
                explained: Some(fit.explained),
            });
        }
        return Ok((raw, stages));
    }
    let raw: Vec<Map> = (0..n)
        .map(|s| kind.compute(out, s))
        .collect::<Result<_>>()?;
    let stages = crate::analysis::normalise_maps(&raw, spec)?
        .into_iter()
        .enumerate()
        .map(|(s, (map, range))| FigureStage {
            stage: s,
            map,
            range: Some(range),
            explained: None,
        })
        .collect();
    Ok((raw, stages))
}

/// Output pixels per input pixel for a saved figure: 1, or the whole factor that makes the
/// image at least 256 pixels tall.
pub fn default_figure_scale(image_height: u32) -> f32 {
    if image_height >= 256 {
        1.0
    } else {
        256u32.div_ceil(image_height.max(1)) as f32
    }
}

/// Draw every region's outline into a copy of the image, in its label's colour.
pub fn outline_regions(image: &RgbImage, sc: &crate::labels::Sidecar) -> RgbImage {
    let mut img = image.clone();
    let (w, h) = img.dimensions();
    if w == 0 || h == 0 {
        return img;
    }
    let thick = (w.min(h) / 250).max(1) as i64;
    let mut stamp = |x: f64, y: f64, c: [u8; 3]| {
        let (cx, cy) = (x.floor() as i64, y.floor() as i64);
        for dy in 0..thick {
            for dx in 0..thick {
                let (px, py) = (cx + dx - thick / 2, cy + dy - thick / 2);
                if px >= 0 && py >= 0 && (px as u32) < w && (py as u32) < h {
                    img.put_pixel(px as u32, py as u32, image::Rgb(c));
                }
            }
        }
    };
    for r in &sc.regions {
        let colour = sc.colour_of(&r.label).unwrap_or(crate::labels::PALETTE[0]);
        let ring: Vec<[f64; 2]> = match &r.shape {
            // The last covered pixel of [x0, x1) is x1 - 1.
            crate::labels::Shape::Box { x0, y0, x1, y1 } => {
                let (a, b) = (*x0, (x1 - 1.0).max(*x0));
                let (c, d) = (*y0, (y1 - 1.0).max(*y0));
                vec![[a, c], [b, c], [b, d], [a, d]]
            }
            crate::labels::Shape::Polygon { points } => points.clone(),
        };
        for i in 0..ring.len() {
            let (p, q) = (ring[i], ring[(i + 1) % ring.len()]);
            let steps = ((q[0] - p[0]).abs().max((q[1] - p[1]).abs()) * 2.0).ceil() as usize;
            for k in 0..=steps.max(1) {
                let t = k as f64 / steps.max(1) as f64;
                stamp(p[0] + t * (q[0] - p[0]), p[1] + t * (q[1] - p[1]), colour);
            }
        }
    }
    img
}

/// Regions, pins, labels and notes for a saved figure: the image with every region outlined in
/// its label's colour and every pin marked, and caption lines with the colour key, each
/// region's note and each pin's text.
pub fn annotate_regions(image: &RgbImage, sc: &crate::labels::Sidecar) -> (RgbImage, Vec<String>) {
    let mut img = outline_regions(image, sc);
    let (w, h) = img.dimensions();
    for pin in &sc.pins {
        let (cx, cy) = (pin.at[0].round() as i64, pin.at[1].round() as i64);
        for d in -4i64..=4 {
            for (x, y) in [(cx + d, cy), (cx, cy + d)] {
                if x >= 0 && y >= 0 && (x as u32) < w && (y as u32) < h {
                    img.put_pixel(x as u32, y as u32, image::Rgb([255, 245, 120]));
                }
            }
        }
    }
    let mut notes = Vec::new();
    if sc.regions.is_empty() && sc.pins.is_empty() {
        return (img, notes);
    }
    let mut used: Vec<&str> = sc.regions.iter().map(|r| r.label.as_str()).collect();
    used.sort();
    used.dedup();
    let key: Vec<String> = used
        .iter()
        .map(|l| {
            format!(
                "{l} {}",
                crate::labels::colour_name(sc.colour_of(l).unwrap_or(crate::labels::PALETTE[0]))
            )
        })
        .collect();
    notes.push(format!(
        "outlines: {} labelled regions; {}",
        sc.regions.len(),
        key.join(", ")
    ));
    for r in sc.regions.iter().filter(|r| !r.note.trim().is_empty()) {
        notes.push(format!("region #{} ({}): {}", r.id, r.label, r.note.trim()));
    }
    for p in &sc.pins {
        notes.push(format!(
            "pin at ({:.0}, {:.0}), yellow cross: {}",
            p.at[0],
            p.at[1],
            p.text.trim()
        ));
    }
    (img, notes)
}

/// Everything a figure shows.
pub struct FigureSpec<'a> {
    pub image: &'a RgbImage,
    pub geometry: &'a Geometry,
    pub stages: &'a [FigureStage],
    pub style: PanelStyle,
    /// Name of the checkpoint (file name).
    pub checkpoint: String,
    /// The map kind's label.
    pub map_label: String,
    /// Further caption lines (scaling, settings).
    pub notes: Vec<String>,
    /// Text size in pixels.
    pub text_px: f32,
}

fn blit(dst: &mut RgbaImage, src: &RgbaImage, x: u32, y: u32) {
    for (sx, sy, p) in src.enumerate_pixels() {
        if x + sx < dst.width() && y + sy < dst.height() {
            dst.put_pixel(x + sx, y + sy, *p);
        }
    }
}

/// The full figure: the image, then one panel per stage side by side, each with a title and
/// a legend right below it, and a caption (checkpoint, input size, map kind, grid key, caution) below.
pub fn compose_figure(spec: &FigureSpec) -> Result<RgbaImage> {
    let g = spec.geometry;
    let style = &spec.style;
    let px = spec.text_px.clamp(8.0, 64.0);
    let small = px * 0.9;
    let gap = (px * 1.2).round() as u32;
    let margin = gap;
    let lh = line_height(px).ceil() as u32;
    let legend_h = (px * 2.6).round() as u32;

    // Columns: (title, panel, legend).
    let mut columns: Vec<(String, RgbaImage, Option<RgbaImage>)> = Vec::new();
    let (iw, ih) = spec.image.dimensions();
    let (ow, oh) = (
        to_px(iw as usize, style.scale),
        to_px(ih as usize, style.scale),
    );
    check_size(oh, ow)?;
    let mut input = RgbaImage::new(ow, oh);
    let xs = axis_sources(iw as usize, style.scale);
    let ys = axis_sources(ih as usize, style.scale);
    for (y, &sy) in ys.iter().enumerate() {
        for (x, &sx) in xs.iter().enumerate() {
            let p = spec.image.get_pixel(sx as u32, sy as u32).0;
            input.put_pixel(x as u32, y as u32, Rgba([p[0], p[1], p[2], 255]));
        }
    }
    columns.push((format!("input {iw}x{ih}"), input, None));
    for fs in spec.stages {
        let panel = render_panel(spec.image, &fs.map, g, fs.stage, style)?;
        let sg = &g.stages[fs.stage];
        let title = format!(
            "stage {} · {}x{} tokens · stride {}",
            fs.stage, sg.grid.1, sg.grid.0, sg.stride
        );
        let lw = panel
            .width()
            .max(text_width(&title, small).ceil() as u32)
            .max((px * 12.0) as u32);
        let legend = match (&fs.map, &fs.range) {
            (Map::Scalar { .. }, Some(r)) => render_legend(style.colormap, r, lw, legend_h),
            _ => render_rgb_legend(fs.explained.as_deref(), lw, legend_h),
        };
        columns.push((title, panel, Some(legend)));
    }
    let col_w: Vec<u32> = columns
        .iter()
        .map(|(t, p, l)| {
            p.width()
                .max(text_width(t, small).ceil() as u32)
                .max(l.as_ref().map_or(0, |l| l.width()))
        })
        .collect();
    let strip_w: u32 = col_w.iter().sum::<u32>() + gap * (columns.len() as u32 - 1);
    let panel_h = columns.iter().map(|c| c.1.height()).max().unwrap_or(0);
    let width = (strip_w + 2 * margin).max((px * 40.0) as u32);

    // Caption lines.
    let (regular, shifted) = g
        .stages
        .first()
        .map_or((None, None), |s| style.overlays.blocks(s));
    let pair = (style.overlays.block / 2) * 2;
    let mut caption: Vec<String> = vec![
        format!("checkpoint {}", spec.checkpoint),
        format!(
            "input {}x{} pixels (width x height), padded to {}x{} for patch {}; {} and small stages '{}'",
            g.image.1,
            g.image.0,
            g.input_padded.1,
            g.input_padded.0,
            g.patch,
            g.semantics.pad_order.name(),
            g.semantics.small_stage.name()
        ),
        format!("map: {}", spec.map_label),
    ];
    caption.extend(spec.notes.iter().cloned());
    let text_w = (width - 2 * margin) as f32;
    let mut wrapped: Vec<(String, Option<[u8; 3]>)> = Vec::new();
    for line in &caption {
        wrapped.extend(wrap_text(line, px, text_w).into_iter().map(|l| (l, None)));
    }
    let mut key: Vec<(String, [u8; 3])> = Vec::new();
    if style.overlays.regular_grid && regular.is_some() {
        key.push((format!("regular windows (block {pair})"), REGULAR_GRID));
    }
    if style.overlays.shifted_grid
        && (shifted.is_some()
            || g.stages
                .iter()
                .any(|s| style.overlays.blocks(s).1.is_some()))
    {
        key.push((
            format!("shifted windows and mask regions (block {})", pair + 1),
            SHIFTED_GRID,
        ));
    }
    if style.overlays.padding {
        key.push(("padding (outside the image)".into(), PADDING_HATCH));
    }
    let caution = wrap_text(CAUTION, px, text_w);
    let key_rows = key.len() as u32;
    let caption_h = (wrapped.len() as u32 + key_rows + caution.len() as u32) * lh + lh / 2;

    let title_h = line_height(small).ceil() as u32 + 4;
    let height = margin + title_h + panel_h + 4 + legend_h + gap + caption_h + margin;
    check_size(height, width)?;
    let mut fig = RgbaImage::from_pixel(
        width,
        height,
        Rgba([BACKGROUND[0], BACKGROUND[1], BACKGROUND[2], 255]),
    );
    let mut x = margin;
    for ((title, panel, legend), w) in columns.iter().zip(&col_w) {
        draw_text(&mut fig, title, x as f32, margin as f32, small, INK);
        let y = margin + title_h;
        blit(&mut fig, panel, x, y);
        if let Some(l) = legend {
            blit(&mut fig, l, x, y + panel.height() + 4);
        }
        x += w + gap;
    }
    let mut y = margin + title_h + panel_h + 4 + legend_h + gap;
    for (line, _) in &wrapped {
        draw_text(&mut fig, line, margin as f32, y as f32, px, INK);
        y += lh;
    }
    for (label, colour) in &key {
        let sw = (px * 1.6) as u32;
        let sy = y + lh / 2;
        let thick = (px / 6.0).max(2.0) as u32;
        // The key swatch sits on a mid grey so a white grid colour still shows.
        fill_rect(
            &mut fig,
            margin,
            y + 2,
            margin + sw,
            y + lh - 2,
            PADDING_FILL,
        );
        if *colour == PADDING_HATCH {
            for yy in y + 2..y + lh - 2 {
                for xx in margin..margin + sw {
                    if is_hatch(xx, yy) {
                        fill_rect(&mut fig, xx, yy, xx + 1, yy + 1, PADDING_HATCH);
                    }
                }
            }
        } else {
            fill_rect(
                &mut fig,
                margin,
                sy - thick / 2,
                margin + sw,
                sy - thick / 2 + thick,
                *colour,
            );
        }
        draw_text(&mut fig, label, (margin + sw + 6) as f32, y as f32, px, INK);
        y += lh;
    }
    for line in &caution {
        draw_text(&mut fig, line, margin as f32, y as f32, px, INK);
        y += lh;
    }
    Ok(fig)
}

// ---------------------------------------------------------------------------------------------
// Files

/// Run `write` on a temporary path next to `path`, then rename it over `path`, so a reader never
/// sees a half-written file. The temporary file is removed on failure.
pub fn write_atomic(path: &Path, write: impl FnOnce(&Path) -> Result<()>) -> Result<()> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    if !dir.is_dir() {
        return Err(Error::bad_file(
            path,
            format!("the folder {} does not exist", dir.display()),
        ));
    }
    let name = path
        .file_name()
        .ok_or_else(|| Error::BadArgument(format!("{}: not a file name", path.display())))?;
    let tmp = dir.join(format!(".{}.partial", name.to_string_lossy()));
    // Probe first so an unwritable folder gives a plain message naming the target.
    std::fs::File::create(&tmp).map_err(|e| {
        Error::bad_file(
            path,
            format!("cannot write in the folder {}: {e}", dir.display()),
        )
    })?;
    let result =
        write(&tmp).and_then(|()| std::fs::rename(&tmp, path).map_err(|e| Error::io(path, e)));
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// Save an image as PNG atomically (temporary file in the same folder, then rename).
pub fn save_png_atomic(img: &RgbaImage, path: &Path) -> Result<()> {
    write_atomic(path, |tmp| {
        img.save_with_format(tmp, image::ImageFormat::Png)
            .map_err(|e| Error::bad_file(path, format!("cannot write the PNG: {e}")))
    })
}
