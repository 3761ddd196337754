//! The attention inspector drawn over the pictures: a spotlight on the query's window. Tokens
//! outside the window are veiled; inside it each key is veiled less the more attention the
//! query gives it, so the brightest cells are where it looks; the query is ringed white inside
//! dark, keys the shift mask removes are crossed in the shifted-grid colour, and
//! padding keys keep the padding hatch under them. No new colour is added to the screen.

use super::panels::pointer::from_input_px;
use crate::analysis::inspect::QueryAttention;
use crate::render::spotlight::{key_veil, QUERY_RING, VEIL};
use crate::render::SHIFTED_GRID;
use egui::{Color32, Rect, Stroke};

/// Paint the spotlight of `q` over a picture drawn in `rect` showing `canvas` input pixels,
/// for a stage of `stride` input pixels per token.
pub fn paint_spotlight(
    painter: &egui::Painter,
    rect: Rect,
    canvas: (f32, f32),
    stride: usize,
    q: &QueryAttention,
) {
    let s = stride as f32;
    let cell = |r: usize, c: usize| {
        Rect::from_min_max(
            from_input_px(rect, canvas, (c as f32 * s, r as f32 * s)),
            from_input_px(rect, canvas, ((c + 1) as f32 * s, (r + 1) as f32 * s)),
        )
        .intersect(rect)
    };
    // Outside the window: the bounding box of the keys is left open, the rest veiled in four
    // bands (a shifted window may wrap; its far cells are then lit inside the veil below).
    let veil = |a: f32| Color32::from_black_alpha((a * 255.0) as u8);
    let bbox = q
        .keys
        .iter()
        .map(|k| cell(k.row, k.col))
        .fold(Rect::NOTHING, |a, b| a.union(b));
    for band in [
        Rect::from_min_max(rect.min, egui::pos2(rect.max.x, bbox.min.y)),
        Rect::from_min_max(egui::pos2(rect.min.x, bbox.max.y), rect.max),
        Rect::from_min_max(
            egui::pos2(rect.min.x, bbox.min.y),
            egui::pos2(bbox.min.x, bbox.max.y),
        ),
        Rect::from_min_max(
            egui::pos2(bbox.max.x, bbox.min.y),
            egui::pos2(rect.max.x, bbox.max.y),
        ),
    ] {
        if band.is_positive() {
            painter.rect_filled(band, 0.0, veil(VEIL));
        }
    }
    let keys: std::collections::HashSet<(usize, usize)> =
        q.keys.iter().map(|k| (k.row, k.col)).collect();
    // Cells inside the bounding box that are not keys (a wrapped window) are veiled too.
    let (r0, c0) = (
        (((bbox.min.y - rect.min.y) / rect.height() * canvas.1) / s).floor() as usize,
        (((bbox.min.x - rect.min.x) / rect.width() * canvas.0) / s).floor() as usize,
    );
    let (r1, c1) = (
        (((bbox.max.y - rect.min.y) / rect.height() * canvas.1) / s).ceil() as usize,
        (((bbox.max.x - rect.min.x) / rect.width() * canvas.0) / s).ceil() as usize,
    );
    for r in r0..r1 {
        for c in c0..c1 {
            if !keys.contains(&(r, c)) {
                painter.rect_filled(cell(r, c), 0.0, veil(VEIL));
            }
        }
    }
    let max = q.keys.iter().map(|k| k.weight).fold(0.0, f32::max);
    let shift = Color32::from_rgb(SHIFTED_GRID[0], SHIFTED_GRID[1], SHIFTED_GRID[2]);
    for k in &q.keys {
        let r = cell(k.row, k.col);
        if !r.is_positive() {
            continue;
        }
        painter.rect_filled(r, 0.0, veil(key_veil(k.weight, max)));
        if k.masked {
            let st = Stroke::new(1.5, shift);
            painter.line_segment([r.left_top(), r.right_bottom()], st);
            painter.line_segment([r.right_top(), r.left_bottom()], st);
        }
    }
    let qr = cell(q.query.0, q.query.1);
    if qr.is_positive() {
        let c = |c: [u8; 3]| Color32::from_rgb(c[0], c[1], c[2]);
        painter.rect_stroke(
            qr,
            0.0,
            Stroke::new(2.0, c(QUERY_RING[1])),
            egui::StrokeKind::Outside,
        );
        painter.rect_stroke(
            qr,
            0.0,
            Stroke::new(2.0, c(QUERY_RING[0])),
            egui::StrokeKind::Inside,
        );
    }
}

/// The inspector's text: what is shown and where the attention goes.
pub fn describe(q: &QueryAttention, stage: usize, block: usize, shifted: bool) -> Vec<String> {
    let (pad, masked) = q.shares();
    let head = q.head.map_or(format!("mean of {} heads", q.heads), |h| {
        format!("head {h}")
    });
    let n_pad = q.keys.iter().filter(|k| k.padding).count();
    let n_masked = q.keys.iter().filter(|k| k.masked).count();
    let mut order: Vec<&crate::analysis::inspect::KeyWeight> = q.keys.iter().collect();
    order.sort_by(|a, b| b.weight.total_cmp(&a.weight));
    let top: Vec<String> = order
        .iter()
        .take(3)
        .map(|k| format!("({}, {}) {:.3}", k.row, k.col, k.weight))
        .collect();
    vec![
        format!(
            "query: stage {stage}, token (row {}, col {}); block {block} ({}), {head}",
            q.query.0,
            q.query.1,
            if shifted {
                "shifted windows"
            } else {
                "regular windows"
            }
        ),
        format!(
            "window {} of the block, {} keys: {n_pad} padding (attention {:.1}%), {n_masked} \
             removed by the shift mask (attention {:.1}%)",
            q.window,
            q.keys.len(),
            pad * 100.0,
            masked * 100.0
        ),
        format!("largest: {}", top.join(", ")),
    ]
}
