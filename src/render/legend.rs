//! Colour bars with numbered ticks under every stage panel, and the key of PCA colours.

use super::panel::{fill_rect, BACKGROUND, INK};
use super::text::{draw_text, line_height, text_width};
use crate::analysis::{Colormap, ScaleRange};
use image::{Rgba, RgbaImage};

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
    crate::probe::heavy_work();
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
    crate::probe::heavy_work();
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
