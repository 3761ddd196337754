//! The lens: one stage large over the image, with zoom (scroll) and pan (drag), the region
//! tools, the tokens inside the selected region lit, and the linked crosshair. It takes the
//! space left below the strip.

use super::pointer::{crosshair, to_input_px, Pointer};
use crate::app::actions::Action;
use crate::app::canvas::{CanvasTools, Placement, Tool};
use crate::app::overlay::paint_overlays;
use crate::app::state::Workbench;
use crate::render;
use egui::{Color32, Pos2, Rect, Sense, Vec2};

/// When set, the window writes this file once the first stage maps are on screen, so an
/// outside check (the real-window smoke test) knows when to take its screenshot.
pub const READY_FILE_ENV: &str = "MULLION_READY_FILE";

pub struct Lens {
    pub zoom: f32,
    pub pan: Vec2,
    announced: bool,
}

impl Default for Lens {
    fn default() -> Self {
        Lens {
            zoom: 1.0,
            pan: Vec2::ZERO,
            announced: false,
        }
    }
}

impl Lens {
    /// Zoom by `factor` keeping the point at `offset` from the lens centre where it is.
    pub fn zoom_at(&mut self, offset: Vec2, factor: f32) {
        let zoom = (self.zoom * factor).clamp(0.2, 40.0);
        let f = zoom / self.zoom;
        // The picture's centre is at `pan`; the point under the pointer is `offset - pan`
        // from it, and that distance scales with the zoom.
        self.pan = offset - (offset - self.pan) * f;
        self.zoom = zoom;
    }

    /// Back to the whole stage in view.
    pub fn fit(&mut self) {
        self.zoom = 1.0;
        self.pan = Vec2::ZERO;
    }

    pub fn ui(
        &mut self,
        ui: &mut egui::Ui,
        bench: &Workbench,
        canvas: &mut CanvasTools,
        pointer: &mut Pointer,
    ) -> Vec<Action> {
        let mut out = Vec::new();
        let Some((maps, tex)) = bench.pictures.on_screen() else {
            return out;
        };
        let (Some(lens_tex), Some(sg)) = (
            tex.lens.as_ref(),
            maps.outputs.geometry.stages.get(tex.key.focus),
        ) else {
            return out;
        };
        // The title names the stage the picture shows, not the one just asked for.
        ui.horizontal(|ui| {
            ui.label(egui::RichText::new(format!("Lens — stage {}", tex.key.focus)).strong());
            if ui.small_button("Fit").clicked() {
                self.fit();
            }
            if ui.small_button("Seams and border").clicked() {
                out.push(Action::ShowProfiles(!bench.show_profiles));
            }
            if bench.pictures.is_busy() {
                ui.small("updating…");
            }
        });
        let area = ui.available_rect_before_wrap();
        let resp = ui.allocate_rect(area, Sense::click_and_drag());
        let (h, w) = render::canvas_size(sg);
        let canvas_px = (w as f32, h as f32);
        if let (true, Some(at)) = (resp.hovered(), resp.hover_pos()) {
            let scroll = ui.input(|i| i.smooth_scroll_delta.y);
            if scroll != 0.0 {
                self.zoom_at(at - area.center(), 1.0 + scroll * 0.002);
            }
        }
        let fit = (area.width() / canvas_px.0).min(area.height() / canvas_px.1);
        let size = Vec2::new(canvas_px.0, canvas_px.1) * fit * self.zoom;
        let rect = Rect::from_center_size(area.center() + self.pan, size);
        let (sx, sy) = maps.image_to_input();
        let at = Placement {
            rect,
            canvas: canvas_px,
            to_image: (1.0 / sx, 1.0 / sy),
        };
        // Drawing tools take the drag; picking drags a region, or pans where there is none.
        // With the inspector on, a click picks the query token instead.
        let inspect_click =
            bench.settings.inspecting && canvas.tool == Tool::Pick && resp.clicked();
        match resp.interact_pointer_pos().filter(|_| inspect_click) {
            Some(p) => out.extend(super::strip::inspect_action(
                maps,
                tex.key.focus,
                rect,
                canvas_px,
                p,
            )),
            None => out.extend(canvas.interact(&resp, &at, &bench.regions)),
        }
        if resp.dragged() && canvas.tool == Tool::Pick && !canvas.is_grabbing() {
            self.pan += resp.drag_delta();
        }
        let painter = ui.painter_at(area);
        painter.image(
            lens_tex.id(),
            rect,
            Rect::from_min_max(Pos2::ZERO, Pos2::new(1.0, 1.0)),
            Color32::WHITE,
        );
        let dense = paint_overlays(
            &painter,
            sg,
            maps.outputs.geometry.image,
            &bench.settings.overlays(),
            rect,
        );
        canvas.paint(
            &painter,
            &at,
            &bench.regions,
            Some(&bench.regions.highlight),
        );
        if let Some(ins) = bench
            .inspected
            .as_ref()
            .filter(|i| i.query.stage == tex.key.focus)
        {
            crate::app::inspector::paint_spotlight(
                &painter,
                rect,
                canvas_px,
                sg.stride,
                &ins.attention,
            );
        }
        if !dense.is_empty() {
            painter.text(
                area.left_top() + Vec2::new(6.0, 6.0),
                egui::Align2::LEFT_TOP,
                "windows too small at this zoom for a grid; zoom in (scroll)",
                egui::FontId::proportional(12.0),
                Color32::WHITE,
            );
        }
        if let Some(p) = resp.hover_pos() {
            pointer.set(to_input_px(rect, canvas_px, p));
        }
        crosshair(&painter, rect, area, canvas_px, pointer.hover);
        if !self.announced {
            self.announced = true;
            if let Some(path) = std::env::var_os(READY_FILE_ENV) {
                // Announce after this frame is on screen.
                ui.ctx().request_repaint();
                let _ = std::fs::write(path, b"maps drawn\n");
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zooming_keeps_the_point_under_the_pointer() {
        let mut lens = Lens {
            pan: Vec2::new(30.0, -10.0),
            ..Lens::default()
        };
        let offset = Vec2::new(100.0, 40.0);
        // The picture point under the pointer, in picture units (distance from its centre
        // divided by the zoom), is the same before and after.
        let before = (offset - lens.pan) / lens.zoom;
        lens.zoom_at(offset, 1.7);
        let after = (offset - lens.pan) / lens.zoom;
        assert!((before - after).length() < 1e-4, "{before:?} vs {after:?}");
        assert!((lens.zoom - 1.7).abs() < 1e-6);
    }
}
