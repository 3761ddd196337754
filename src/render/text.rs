//! Text for saved figures and legends, drawn with the bundled font.

use ab_glyph::{point, Font, FontRef, PxScale, ScaleFont};
use image::RgbaImage;
use std::sync::OnceLock;

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
