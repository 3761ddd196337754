//! Drawing on a picture: the region tools (pick and drag, box, polygon, pinned note) turn
//! pointer input into [`RegionEdit`]s, and every picture paints the regions over itself.
//!
//! Pictures show the network input (padded canvas included); regions live in image pixels.
//! `to_image` converts: input pixels divided by the input policy's scale factors.

use super::actions::{Action, RegionEdit};
use super::region_doc::RegionDoc;
use crate::annotation::{Shape, Sidecar};
use egui::{Color32, Pos2, Rect, Response, Stroke, Vec2};

/// What a click or drag on a picture does.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum Tool {
    /// Pick a region; drag it, its corners or its vertices.
    #[default]
    Pick,
    Box,
    Polygon,
    Pin,
}

/// A drag that holds a region: its shape as it is being moved (shown, not yet saved).
#[derive(Clone, Debug, PartialEq)]
struct Grab {
    id: u64,
    /// The handle being dragged, or `None` for the whole region.
    handle: Option<usize>,
    last: [f64; 2],
    shape: Shape,
}

/// How a picture maps to image pixels.
#[derive(Clone, Copy, Debug)]
pub struct Placement {
    /// Where the picture is drawn on screen.
    pub rect: Rect,
    /// The picture's canvas in input pixels (width, height).
    pub canvas: (f32, f32),
    /// Image pixels per input pixel along x and y.
    pub to_image: (f64, f64),
}

impl Placement {
    pub fn image_point(&self, p: Pos2) -> [f64; 2] {
        [
            ((p.x - self.rect.min.x) / self.rect.width() * self.canvas.0) as f64 * self.to_image.0,
            ((p.y - self.rect.min.y) / self.rect.height() * self.canvas.1) as f64 * self.to_image.1,
        ]
    }

    pub fn screen_point(&self, p: [f64; 2]) -> Pos2 {
        Pos2::new(
            self.rect.min.x + (p[0] / self.to_image.0) as f32 / self.canvas.0 * self.rect.width(),
            self.rect.min.y + (p[1] / self.to_image.1) as f32 / self.canvas.1 * self.rect.height(),
        )
    }

    /// Screen pixels per image pixel (along x).
    fn zoom(&self) -> f32 {
        self.rect.width() / self.canvas.0 / self.to_image.0 as f32
    }
}

#[derive(Default)]
pub struct CanvasTools {
    pub tool: Tool,
    /// Text of the next pinned note.
    pub pin_text: String,
    /// Vertices of the polygon being drawn, image pixels.
    pub draft: Vec<[f64; 2]>,
    drag_from: Option<[f64; 2]>,
    drag_to: Option<[f64; 2]>,
    grab: Option<Grab>,
}

fn colour(c: [u8; 3]) -> Color32 {
    Color32::from_rgb(c[0], c[1], c[2])
}

/// Which region is under an image point (the last drawn wins).
fn region_at(sc: &Sidecar, p: [f64; 2]) -> Option<u64> {
    let tiny = [p[0] - 0.5, p[1] - 0.5, p[0] + 0.5, p[1] + 0.5];
    sc.regions
        .iter()
        .rev()
        .find(|r| r.shape.intersection_area(tiny) > 0.0)
        .map(|r| r.id)
}

/// The handles of a shape: box corners or polygon vertices.
fn handles(shape: &Shape) -> Vec<[f64; 2]> {
    match shape {
        Shape::Box { x0, y0, x1, y1 } => vec![[*x0, *y0], [*x1, *y0], [*x1, *y1], [*x0, *y1]],
        Shape::Polygon { points } => points.clone(),
    }
}

/// Move handle `index` of a shape to `to` (box corners keep the box axis-aligned).
fn move_handle(shape: &mut Shape, index: usize, to: [f64; 2]) {
    match shape {
        Shape::Box { x0, y0, x1, y1 } => match index {
            0 => (*x0, *y0) = (to[0], to[1]),
            1 => (*x1, *y0) = (to[0], to[1]),
            2 => (*x1, *y1) = (to[0], to[1]),
            _ => (*x0, *y1) = (to[0], to[1]),
        },
        Shape::Polygon { points } => {
            if let Some(p) = points.get_mut(index) {
                *p = to;
            }
        }
    }
}

fn translate(shape: &mut Shape, d: [f64; 2]) {
    match shape {
        Shape::Box { x0, y0, x1, y1 } => {
            *x0 += d[0];
            *x1 += d[0];
            *y0 += d[1];
            *y1 += d[1];
        }
        Shape::Polygon { points } => points.iter_mut().for_each(|p| {
            p[0] += d[0];
            p[1] += d[1];
        }),
    }
}

fn normalised_box(a: [f64; 2], b: [f64; 2]) -> Shape {
    Shape::Box {
        x0: a[0].min(b[0]),
        y0: a[1].min(b[1]),
        x1: a[0].max(b[0]),
        y1: a[1].max(b[1]),
    }
}

impl CanvasTools {
    /// Whether a drag is moving a region or one of its handles.
    pub fn is_grabbing(&self) -> bool {
        self.grab.is_some()
    }

    /// Close the polygon being drawn (three vertices at least).
    pub fn finish_polygon(&mut self) -> Option<Action> {
        let points = std::mem::take(&mut self.draft);
        (points.len() >= 3).then_some(Action::Region(RegionEdit::Add(Shape::Polygon { points })))
    }

    /// Clicks and drags on a picture placed at `at`.
    pub fn interact(&mut self, resp: &Response, at: &Placement, doc: &RegionDoc) -> Vec<Action> {
        let mut out = Vec::new();
        let Some(sc) = &doc.sidecar else {
            return out;
        };
        let pointer = resp.interact_pointer_pos().or(resp.hover_pos());
        let here = pointer.map(|p| at.image_point(p));
        match self.tool {
            Tool::Box => {
                if resp.drag_started() {
                    self.drag_from = here;
                }
                if resp.dragged() {
                    self.drag_to = here;
                }
                if resp.drag_stopped() {
                    if let (Some(a), Some(b)) = (self.drag_from.take(), self.drag_to.take()) {
                        if (a[0] - b[0]).abs() >= 1.0 && (a[1] - b[1]).abs() >= 1.0 {
                            out.push(Action::Region(RegionEdit::Add(normalised_box(a, b))));
                        }
                    }
                }
            }
            Tool::Polygon => {
                if resp.double_clicked() {
                    out.extend(self.finish_polygon());
                } else if resp.clicked() {
                    self.draft.extend(here);
                }
            }
            Tool::Pin => {
                if let (true, Some(p)) = (resp.clicked(), here) {
                    let text = match self.pin_text.trim() {
                        "" => "note".to_string(),
                        t => t.to_string(),
                    };
                    out.push(Action::Region(RegionEdit::AddPin { at: p, text }));
                }
            }
            Tool::Pick => {
                let Some(p) = here else { return out };
                if resp.drag_started() {
                    // A handle of the selected region within 6 screen pixels, else the region
                    // below the pointer.
                    let near = doc.selected.and_then(|id| {
                        let r = sc.region(id)?;
                        let index = handles(&r.shape).iter().position(|h| {
                            let d = ((h[0] - p[0]).powi(2) + (h[1] - p[1]).powi(2)).sqrt() as f32;
                            d * at.zoom() <= 6.0
                        })?;
                        Some((id, Some(index)))
                    });
                    let hit = near.or_else(|| region_at(sc, p).map(|id| (id, None)));
                    self.grab = hit.and_then(|(id, handle)| {
                        Some(Grab {
                            id,
                            handle,
                            last: p,
                            shape: sc.region(id)?.shape.clone(),
                        })
                    });
                    if let Some(g) = &self.grab {
                        out.push(Action::SelectRegion(Some(g.id)));
                    }
                } else if resp.dragged() {
                    if let Some(g) = &mut self.grab {
                        match g.handle {
                            None => translate(&mut g.shape, [p[0] - g.last[0], p[1] - g.last[1]]),
                            Some(i) => move_handle(&mut g.shape, i, p),
                        }
                        g.last = p;
                    }
                } else if resp.drag_stopped() {
                    if let Some(g) = self.grab.take() {
                        // One edit (and one undo step) for the whole drag.
                        out.push(Action::Region(RegionEdit::Reshape {
                            id: g.id,
                            shape: g.shape,
                        }));
                    }
                } else if resp.clicked() {
                    out.push(Action::SelectRegion(region_at(sc, p)));
                }
            }
        }
        out
    }

    /// Draw the regions, pins and the shape being drawn over a picture placed at `at`; for the
    /// lens, `highlight` holds the footprints (input pixels) of the tokens inside the selected
    /// region, and region names are written.
    pub fn paint(
        &self,
        painter: &egui::Painter,
        at: &Placement,
        doc: &RegionDoc,
        highlight: Option<&[[f32; 4]]>,
    ) {
        let Some(sc) = &doc.sidecar else {
            return;
        };
        let to_screen = |p: [f64; 2]| at.screen_point(p);
        for f in highlight.unwrap_or_default() {
            let a = to_screen([f[0] as f64 * at.to_image.0, f[1] as f64 * at.to_image.1]);
            let b = to_screen([f[2] as f64 * at.to_image.0, f[3] as f64 * at.to_image.1]);
            painter.rect_filled(
                Rect::from_min_max(a, b),
                0.0,
                Color32::from_rgba_unmultiplied(255, 255, 255, 50),
            );
        }
        let shown: &[crate::annotation::Region] = if doc.outlines { &sc.regions } else { &[] };
        for r in shown {
            let shape = match &self.grab {
                Some(g) if g.id == r.id => &g.shape,
                _ => &r.shape,
            };
            let c = colour(sc.colour_of(&r.label).unwrap_or([255, 255, 255]));
            let selected = doc.selected == Some(r.id);
            let stroke = Stroke::new(if selected { 3.0 } else { 2.0 }, c);
            let pts: Vec<Pos2> = handles(shape).into_iter().map(to_screen).collect();
            painter.add(egui::Shape::closed_line(pts.clone(), stroke));
            if selected {
                for p in &pts {
                    painter.rect_filled(Rect::from_center_size(*p, Vec2::splat(7.0)), 1.0, c);
                }
            }
            // Names only in the lens, and only where they stay readable.
            let named = highlight.is_some() && (selected || sc.regions.len() <= 12);
            if let (true, Some(first)) = (named, pts.first()) {
                painter.text(
                    *first + Vec2::new(3.0, -2.0),
                    egui::Align2::LEFT_BOTTOM,
                    format!("{} #{}", r.label, r.id),
                    egui::FontId::proportional(12.0),
                    c,
                );
            }
        }
        let pin_colour = colour(crate::annotation::PIN_COLOUR);
        for pin in &sc.pins {
            let p = to_screen(pin.at);
            painter.circle_filled(p, 4.0, pin_colour);
            painter.text(
                p + Vec2::new(6.0, 0.0),
                egui::Align2::LEFT_CENTER,
                &pin.text,
                egui::FontId::proportional(12.0),
                pin_colour,
            );
        }
        let draft = Stroke::new(1.5, Color32::WHITE);
        if let (Some(a), Some(b)) = (self.drag_from, self.drag_to) {
            painter.rect_stroke(
                Rect::from_two_pos(to_screen(a), to_screen(b)),
                0.0,
                draft,
                egui::StrokeKind::Middle,
            );
        }
        if !self.draft.is_empty() {
            let pts: Vec<Pos2> = self.draft.iter().copied().map(to_screen).collect();
            painter.add(egui::Shape::line(pts, draft));
        }
    }
}
