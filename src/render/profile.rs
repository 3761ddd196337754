//! The seam and border profiles of one stage as a picture: the map's mean per position inside
//! the window for the regular and the shifted block (a small grid in the map's colours, one
//! scale for both), and the mean against the distance in tokens to the padded border (bars).
//! Saved figures carry it when the profiles are on screen.

use super::panel::check_size;
use super::panel::{BACKGROUND, INK};
use super::text::{draw_text, line_height};
use crate::analysis::padding::{ProfileBin, StageProfiles};
use crate::analysis::Colormap;
use crate::error::Result;
use image::{Rgba, RgbaImage};

/// The range of every bin's mean in the profiles, for one shared scale.
pub fn profile_range(p: &StageProfiles) -> (f64, f64) {
    let all = p
        .regular
        .iter()
        .chain(&p.shifted)
        .flat_map(|(_, b)| b.iter())
        .chain(&p.border)
        .map(|b| b.mean);
    let (lo, hi) = all.fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
        (l.min(v), h.max(v))
    });
    if lo.is_finite() {
        (lo, hi)
    } else {
        (0.0, 1.0)
    }
}

fn fill(img: &mut RgbaImage, x0: u32, y0: u32, w: u32, h: u32, c: [u8; 3]) {
    for y in y0..(y0 + h).min(img.height()) {
        for x in x0..(x0 + w).min(img.width()) {
            img.put_pixel(x, y, Rgba([c[0], c[1], c[2], 255]));
        }
    }
}

/// One window-position grid at (x, y), `cell` pixels a position; positions no token holds
/// stay background.
fn grid(
    img: &mut RgbaImage,
    (x, y): (u32, u32),
    cell: u32,
    window: (usize, usize),
    bins: &[ProfileBin],
    (lo, hi): (f64, f64),
    colormap: Colormap,
) {
    for r in 0..window.0 {
        for c in 0..window.1 {
            fill(
                img,
                x + c as u32 * cell,
                y + r as u32 * cell,
                cell,
                cell,
                INK,
            );
        }
    }
    for b in bins {
        let t = if hi > lo {
            (b.mean - lo) / (hi - lo)
        } else {
            0.5
        } as f32;
        fill(
            img,
            x + b.at.1 as u32 * cell + 1,
            y + b.at.0 as u32 * cell + 1,
            cell - 2,
            cell - 2,
            colormap.lookup_u8(t),
        );
    }
}

/// The profiles of `stage` drawn at text size `px`: both window grids side by side, the border
/// bars beside them, titles above, the range below.
pub fn profile_figure(
    stage: usize,
    map_label: &str,
    p: &StageProfiles,
    colormap: Colormap,
    px: f32,
) -> Result<RgbaImage> {
    let px = px.clamp(8.0, 64.0);
    let lh = line_height(px).ceil() as u32;
    let margin = (px * 1.2) as u32;
    let cell = (px * 1.6) as u32;
    let side = |w: Option<&((usize, usize), Vec<ProfileBin>)>| {
        w.map_or((0, 0), |(win, _)| {
            (win.1 as u32 * cell, win.0 as u32 * cell)
        })
    };
    let (rw, rh) = side(p.regular.as_ref());
    let (sw, sh) = side(p.shifted.as_ref());
    let bar_w = (px * 0.9) as u32;
    let far = p.border.len().min(16) as u32;
    let chart_w = far * bar_w + 2;
    let chart_h = (px * 8.0) as u32;
    let title_w = (px * 14.0) as u32;
    let width = 4 * margin + rw.max(title_w) + sw.max(title_w) + chart_w.max(title_w);
    let height = 2 * margin + 2 * lh + rh.max(sh).max(chart_h) + 3 * lh;
    check_size(height, width)?;
    let mut img = RgbaImage::from_pixel(
        width,
        height,
        Rgba([BACKGROUND[0], BACKGROUND[1], BACKGROUND[2], 255]),
    );
    let range = profile_range(p);
    let top = margin + 2 * lh;
    draw_text(
        &mut img,
        &format!(
            "stage {stage}: {map_label}, mean by window position and by distance to the border"
        ),
        margin as f32,
        margin as f32,
        px,
        INK,
    );
    let mut x = margin;
    for (name, w) in [
        ("regular windows", &p.regular),
        ("shifted windows", &p.shifted),
    ] {
        draw_text(
            &mut img,
            name,
            x as f32,
            (margin + lh) as f32,
            px * 0.9,
            INK,
        );
        match w {
            Some((win, bins)) => grid(&mut img, (x, top), cell, *win, bins, range, colormap),
            None => draw_text(
                &mut img,
                "none in this stage",
                x as f32,
                top as f32,
                px * 0.9,
                INK,
            ),
        }
        x += rw.max(sw).max(title_w) + margin;
    }
    draw_text(
        &mut img,
        "border distance 0, 1, 2 … (tokens)",
        x as f32,
        (margin + lh) as f32,
        px * 0.9,
        INK,
    );
    let base = top + chart_h;
    fill(&mut img, x, base, chart_w, 1, INK);
    for (i, b) in p.border.iter().take(far as usize).enumerate() {
        let t = if range.1 > range.0 {
            (b.mean - range.0) / (range.1 - range.0)
        } else {
            0.5
        };
        let h = ((t.clamp(0.0, 1.0) * (chart_h - 2) as f64) as u32).max(1);
        fill(
            &mut img,
            x + 1 + i as u32 * bar_w,
            base - h,
            bar_w - 1,
            h,
            colormap.lookup_u8(t as f32),
        );
    }
    draw_text(
        &mut img,
        &format!(
            "one scale for all three: {:.4} … {:.4} ({})",
            range.0,
            range.1,
            colormap.name()
        ),
        margin as f32,
        (base + lh / 2) as f32,
        px * 0.9,
        INK,
    );
    draw_text(
        &mut img,
        "seams show as edges in the grids, border effects as a slope near distance 0",
        margin as f32,
        (base + lh / 2 + lh) as f32,
        px * 0.9,
        INK,
    );
    Ok(img)
}
