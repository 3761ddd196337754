//! A stage panel: the map over the image, then the window grids of the chosen block pair (from
//! [`BlockGeometry::pieces`]; nothing here recomputes a window) and the hatched padding.
//!
//! Coordinates: a panel's canvas covers the stage's padded token grid times its stride, in input
//! pixels, which always contains the image (top-left aligned). With `scale` output pixels per
//! input pixel, input coordinate `b` lands on output pixel `round(b * scale)`; map cells, image
//! pixels and grid lines all use that one rounding, so lines sit exactly on cell borders.

use crate::analysis::{Colormap, Map};
use crate::engine::geometry::{BlockGeometry, Geometry, StageGeometry};
use crate::error::{Error, Result};
use image::{RgbImage, Rgba, RgbaImage};

/// Colour of the regular (unshifted) window grid.
pub const REGULAR_GRID: [u8; 3] = [255, 255, 255];
/// Colour of the shifted window grid (window and mask-region borders).
pub const SHIFTED_GRID: [u8; 3] = [255, 0, 255];
/// Base colour of padding (outside the image, inside the padded map).
pub const PADDING_FILL: [u8; 3] = [176, 176, 176];
/// Colour of the diagonal hatching on padding.
pub const PADDING_HATCH: [u8; 3] = [0, 0, 224];
/// Figure and legend background.
pub const BACKGROUND: [u8; 3] = [255, 255, 255];
/// Text colour.
pub const INK: [u8; 3] = [28, 28, 32];

/// Period of the padding hatch along each axis, in output pixels.
pub const HATCH_PERIOD: u32 = 8;

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
pub(crate) fn axis_sources(len_in: usize, scale: f32) -> Vec<usize> {
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

pub(crate) fn check_size(h: u32, w: u32) -> Result<()> {
    if h == 0 || w == 0 || h > MAX_SIDE || w > MAX_SIDE {
        return Err(Error::Limit(format!(
            "a rendered image of {w}x{h} pixels is outside 1..={MAX_SIDE} per side; use a smaller scale"
        )));
    }
    Ok(())
}

pub(crate) fn fill_rect(img: &mut RgbaImage, x0: u32, y0: u32, x1: u32, y1: u32, c: [u8; 3]) {
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
    crate::probe::heavy_work();
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
    let borders = window_borders(sg, &style.overlays, clip);
    draw_borders(&mut out, &borders, GridKind::Regular, style);
    draw_borders(&mut out, &borders, GridKind::Shifted, style);
    Ok(out)
}

/// The output pixel where a border at input coordinate `b` is drawn (kept inside the image).
pub fn border_px(b: usize, scale: f32, line_width: u32, out_len: u32) -> u32 {
    to_px(b, scale).min(out_len.saturating_sub(line_width.max(1)))
}

/// Which window grid a border belongs to.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum GridKind {
    Regular,
    Shifted,
}

/// One straight window border, in input pixels: along x at row `at` (`vertical` false) or
/// along y at column `at` (`vertical` true), from `from` to `to`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub struct Border {
    pub kind: GridKind,
    pub vertical: bool,
    pub at: usize,
    pub from: usize,
    pub to: usize,
}

/// Every window border the overlays ask for on `stage`, each once: the edges of every piece
/// of the chosen blocks ([`BlockGeometry::pieces`]), clipped to `clip` = (height, width) in input
/// pixels, with edges shared by neighbouring pieces merged into one border.
pub fn window_borders(
    stage: &StageGeometry,
    overlays: &Overlays,
    clip: (usize, usize),
) -> Vec<Border> {
    let (regular, shifted) = overlays.blocks(stage);
    let mut edges: std::collections::BTreeMap<(GridKind, bool, usize), Vec<(usize, usize)>> =
        Default::default();
    let chosen = [
        (GridKind::Regular, regular.filter(|_| overlays.regular_grid)),
        (GridKind::Shifted, shifted.filter(|_| overlays.shifted_grid)),
    ];
    for (kind, block) in chosen {
        let Some(block) = block else { continue };
        for p in block.pieces() {
            let s = stage.stride;
            let (y0, y1) = ((p.row0 * s).min(clip.0), (p.row1 * s).min(clip.0));
            let (x0, x1) = ((p.col0 * s).min(clip.1), (p.col1 * s).min(clip.1));
            if y0 >= y1 || x0 >= x1 {
                continue;
            }
            for (vertical, at, from, to) in [
                (false, y0, x0, x1),
                (false, y1, x0, x1),
                (true, x0, y0, y1),
                (true, x1, y0, y1),
            ] {
                edges
                    .entry((kind, vertical, at))
                    .or_default()
                    .push((from, to));
            }
        }
    }
    let mut out = Vec::new();
    for ((kind, vertical, at), mut spans) in edges {
        spans.sort_unstable();
        let mut cur = spans[0];
        for &(a, b) in &spans[1..] {
            if a <= cur.1 {
                cur.1 = cur.1.max(b);
            } else {
                out.push(Border {
                    kind,
                    vertical,
                    at,
                    from: cur.0,
                    to: cur.1,
                });
                cur = (a, b);
            }
        }
        out.push(Border {
            kind,
            vertical,
            at,
            from: cur.0,
            to: cur.1,
        });
    }
    out
}

/// Draw `borders` of one kind into a picture at the style's scale.
fn draw_borders(img: &mut RgbaImage, borders: &[Border], kind: GridKind, style: &PanelStyle) {
    let lw = style.overlays.line_width.max(1);
    let (oh, ow) = (img.height(), img.width());
    let colour = match kind {
        GridKind::Regular => REGULAR_GRID,
        GridKind::Shifted => SHIFTED_GRID,
    };
    for b in borders.iter().filter(|b| b.kind == kind) {
        if b.vertical {
            let x = border_px(b.at, style.scale, lw, ow);
            let (y0, y1) = (
                border_px(b.from, style.scale, lw, oh),
                border_px(b.to, style.scale, lw, oh),
            );
            fill_rect(img, x, y0, x + lw, y1 + lw, colour);
        } else {
            let y = border_px(b.at, style.scale, lw, oh);
            let (x0, x1) = (
                border_px(b.from, style.scale, lw, ow),
                border_px(b.to, style.scale, lw, ow),
            );
            fill_rect(img, x0, y, x1 + lw, y + lw, colour);
        }
    }
}

/// Grid line width in output pixels for a panel drawn at `scale` output pixels per input pixel:
/// two from a scale of 3 up, so lines stay visible next to large cells.
pub fn line_width_for_scale(scale: f32) -> u32 {
    if scale >= 3.0 {
        2
    } else {
        1
    }
}
