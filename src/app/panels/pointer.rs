//! Where the pointer is over the pictures, shared by the strip, the lens (linked crosshairs) and
//! the read-out.

use egui::{Color32, Pos2, Rect, Stroke};

/// The hovered point, in network-input pixels; set while drawing a frame, read the next.
#[derive(Clone, Copy, Debug, Default)]
pub struct Pointer {
    pub hover: Option<(f32, f32)>,
    next: Option<(f32, f32)>,
}

impl Pointer {
    /// The pointer is over `p` (input pixels) this frame.
    pub fn set(&mut self, p: (f32, f32)) {
        self.next = Some(p);
    }

    /// End of frame: what was seen becomes what is shown.
    pub fn end_frame(&mut self) {
        self.hover = self.next.take();
    }
}

/// Input pixel under a screen point of a picture drawn in `rect` showing `canvas` input pixels.
pub fn to_input_px(rect: Rect, canvas: (f32, f32), pos: Pos2) -> (f32, f32) {
    (
        (pos.x - rect.min.x) / rect.width() * canvas.0,
        (pos.y - rect.min.y) / rect.height() * canvas.1,
    )
}

/// Screen point of an input pixel.
pub fn from_input_px(rect: Rect, canvas: (f32, f32), p: (f32, f32)) -> Pos2 {
    Pos2::new(
        rect.min.x + p.0 / canvas.0 * rect.width(),
        rect.min.y + p.1 / canvas.1 * rect.height(),
    )
}

/// The colour of the linked crosshair.
pub const CROSSHAIR: Color32 = Color32::from_rgb(255, 60, 160);

/// A crosshair at the hovered point, clipped to `clip`.
pub fn crosshair(
    painter: &egui::Painter,
    rect: Rect,
    clip: Rect,
    canvas: (f32, f32),
    hover: Option<(f32, f32)>,
) {
    let Some(p) = hover else { return };
    let c = from_input_px(rect, canvas, p);
    if !clip.contains(c) {
        return;
    }
    let stroke = Stroke::new(1.0, CROSSHAIR);
    painter.line_segment(
        [Pos2::new(clip.min.x, c.y), Pos2::new(clip.max.x, c.y)],
        stroke,
    );
    painter.line_segment(
        [Pos2::new(c.x, clip.min.y), Pos2::new(c.x, clip.max.y)],
        stroke,
    );
}
