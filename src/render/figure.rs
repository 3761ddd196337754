//! The composed figure a reviewer gets: the image, one panel per stage with its title and
//! legend, and a caption (checkpoint, input size and padding, map kind, grid key, notes and the
//! caution); and the region outlines, pins and notes laid over it. The window's *Save figure*,
//! `mullion figure` and the report's figures all come through [`compose_figure`].

use super::legend::{render_legend, render_rgb_legend};
use super::panel::{
    axis_sources, check_size, fill_rect, is_hatch, line_width_for_scale, render_panel, to_px,
    PanelStyle, BACKGROUND, INK, PADDING_FILL, PADDING_HATCH, REGULAR_GRID, SHIFTED_GRID,
};
use super::text::{draw_text, line_height, text_width, wrap_text};
use crate::analysis::{Map, PreparedStage, CAUTION};
use crate::annotation::{colour_name, Shape, Sidecar, PALETTE, PIN_COLOUR};
use crate::engine::geometry::Geometry;
use crate::error::Result;
use image::{RgbImage, Rgba, RgbaImage};

/// Output pixels per input pixel for a saved figure: 1, or the whole factor that makes the
/// image at least 256 pixels tall.
pub fn default_figure_scale(image_height: u32) -> f32 {
    if image_height >= 256 {
        1.0
    } else {
        256u32.div_ceil(image_height.max(1)) as f32
    }
}

/// The caption line that says how scalar values became colours.
pub fn scale_note(
    spec: &crate::analysis::ScaleSpec,
    colormap: crate::analysis::Colormap,
) -> String {
    format!(
        "colour scale: {}, {}, percentiles {}-{} ({}), values beyond clamp",
        if spec.shared_across_stages {
            "shared by all stages"
        } else {
            "per stage"
        },
        if spec.log { "log10" } else { "linear" },
        spec.clip_percentiles.0,
        spec.clip_percentiles.1,
        colormap.name()
    )
}

/// The caption line of a PCA figure.
pub const PCA_NOTE: &str =
    "colours: each component min-max scaled over this stage's tokens of this image";

/// Caption text size of a saved figure drawn at `scale`: it grows with the panels so it stays
/// readable next to them.
pub fn figure_text_px(scale: f32) -> f32 {
    (11.0 + 3.0 * scale).clamp(12.0, 32.0)
}

/// The panel style of a saved figure at `scale` with the given colour map, opacity and overlays
/// (the line width follows the scale, see [`line_width_for_scale`]).
pub fn figure_panel_style(
    colormap: crate::analysis::Colormap,
    opacity: f32,
    overlays: super::panel::Overlays,
    scale: f32,
) -> PanelStyle {
    PanelStyle {
        colormap,
        opacity,
        overlays: super::panel::Overlays {
            line_width: line_width_for_scale(scale),
            ..overlays
        },
        scale,
    }
}

/// Draw every region's outline into a copy of the image, in its label's colour.
pub fn outline_regions(image: &RgbImage, sc: &Sidecar) -> RgbImage {
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
        let colour = sc.colour_of(&r.label).unwrap_or(PALETTE[0]);
        let ring: Vec<[f64; 2]> = match &r.shape {
            // The last covered pixel of [x0, x1) is x1 - 1.
            Shape::Box { x0, y0, x1, y1 } => {
                let (a, b) = (*x0, (x1 - 1.0).max(*x0));
                let (c, d) = (*y0, (y1 - 1.0).max(*y0));
                vec![[a, c], [b, c], [b, d], [a, d]]
            }
            Shape::Polygon { points } => points.clone(),
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
pub fn annotate_regions(image: &RgbImage, sc: &Sidecar) -> (RgbImage, Vec<String>) {
    let mut img = outline_regions(image, sc);
    let (w, h) = img.dimensions();
    for pin in &sc.pins {
        let (cx, cy) = (pin.at[0].round() as i64, pin.at[1].round() as i64);
        for d in -4i64..=4 {
            for (x, y) in [(cx + d, cy), (cx, cy + d)] {
                if x >= 0 && y >= 0 && (x as u32) < w && (y as u32) < h {
                    img.put_pixel(x as u32, y as u32, image::Rgb(PIN_COLOUR));
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
        .map(|l| format!("{l} {}", colour_name(sc.colour_of(l).unwrap_or(PALETTE[0]))))
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
            "pin at ({:.0}, {:.0}), lavender cross: {}",
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
    pub stages: &'a [PreparedStage],
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
    crate::probe::heavy_work();
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
    // The pair each stage really draws (a stage with fewer blocks draws its last pair).
    let drawn: Vec<usize> = g
        .stages
        .iter()
        .map(|s| (style.overlays.block.min(s.blocks.len().saturating_sub(1)) / 2) * 2)
        .collect();
    let per_stage = if drawn.iter().all(|&b| b == pair) {
        String::new()
    } else {
        let list: Vec<String> = drawn
            .iter()
            .enumerate()
            .map(|(i, b)| format!("stage {i}: {b}"))
            .collect();
        format!(
            "; stages with fewer blocks draw their last pair ({})",
            list.join(", ")
        )
    };
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
        key.push((
            format!("regular windows (block {pair}{per_stage})"),
            REGULAR_GRID,
        ));
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

/// Figures one above the other on the figure background, left-aligned, separated by a thin
/// rule: a comparison's A, B and difference figures in one file.
pub fn stack_figures(figures: &[RgbaImage]) -> Result<RgbaImage> {
    let rule = 3u32;
    let width = figures.iter().map(|f| f.width()).max().unwrap_or(1).max(1);
    let height = figures
        .iter()
        .map(|f| f.height() + rule)
        .sum::<u32>()
        .max(1);
    check_size(height, width)?;
    let mut out = RgbaImage::from_pixel(
        width,
        height,
        Rgba([BACKGROUND[0], BACKGROUND[1], BACKGROUND[2], 255]),
    );
    let mut y = 0;
    for f in figures {
        blit(&mut out, f, 0, y);
        y += f.height();
        fill_rect(&mut out, 0, y, width, y + rule, INK);
        y += rule;
    }
    Ok(out)
}

/// A figure of text lines only (for a part of a composed figure that cannot be drawn, saying
/// why).
pub fn text_figure(lines: &[String], text_px: f32) -> Result<RgbaImage> {
    let px = text_px.clamp(8.0, 64.0);
    let margin = (px * 1.2).round() as u32;
    let width = (px * 60.0) as u32;
    let lh = line_height(px).ceil() as u32;
    let wrapped: Vec<String> = lines
        .iter()
        .flat_map(|l| wrap_text(l, px, (width - 2 * margin) as f32))
        .collect();
    let height = 2 * margin + lh * wrapped.len() as u32;
    check_size(height, width)?;
    let mut img = RgbaImage::from_pixel(
        width,
        height,
        Rgba([BACKGROUND[0], BACKGROUND[1], BACKGROUND[2], 255]),
    );
    for (i, l) in wrapped.iter().enumerate() {
        draw_text(
            &mut img,
            l,
            margin as f32,
            (margin + i as u32 * lh) as f32,
            px,
            INK,
        );
    }
    Ok(img)
}
