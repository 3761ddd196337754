//! The stage strip: the image, then one panel per stage side by side with its legend, reflowing
//! on narrow windows. Clicking a stage puts it in the lens; the region tools work here too.

use super::pointer::{crosshair, to_input_px, Pointer};
use crate::analysis::PreparedStage;
use crate::app::actions::Action;
use crate::app::canvas::{CanvasTools, Placement, Tool};
use crate::app::overlay::paint_overlays;
use crate::app::state::Workbench;
use crate::render;
use crate::render::Overlays;
use egui::{Color32, Pos2, Sense, Stroke, Vec2};

pub struct StageStrip {
    /// The height the strip may take (the window sets it each frame).
    pub max_height: f32,
}

impl Default for StageStrip {
    fn default() -> Self {
        StageStrip { max_height: 520.0 }
    }
}

/// The key of what is drawn over the pictures: each grid on screen with its block, and the
/// padding hatch, in their colours.
fn grid_key(ui: &mut egui::Ui, overlays: &Overlays, bench: &Workbench) {
    let swatch = |ui: &mut egui::Ui, c: [u8; 3], hatch: bool| {
        let (r, painter) = ui.allocate_painter(Vec2::new(22.0, 12.0), Sense::hover());
        let rect = r.rect;
        let colour = Color32::from_rgb(c[0], c[1], c[2]);
        painter.rect_filled(rect, 0.0, Color32::from_gray(60));
        if hatch {
            for k in 0..4 {
                let x = rect.min.x + k as f32 * 6.0;
                painter.line_segment(
                    [Pos2::new(x, rect.max.y), Pos2::new(x + 12.0, rect.min.y)],
                    Stroke::new(1.5, colour),
                );
            }
        } else {
            painter.line_segment(
                [rect.left_center(), rect.right_center()],
                Stroke::new(2.0, colour),
            );
        }
    };
    let pair = (overlays.block / 2) * 2;
    ui.horizontal_wrapped(|ui| {
        if overlays.regular_grid {
            swatch(ui, render::REGULAR_GRID, false);
            ui.small(format!("regular windows (block {pair})"));
        }
        if overlays.shifted_grid {
            swatch(ui, render::SHIFTED_GRID, false);
            ui.small(format!(
                "shifted windows and mask regions (block {})",
                pair + 1
            ));
        }
        if overlays.padding {
            swatch(ui, render::PADDING_HATCH, true);
            ui.small("padding (outside the image)");
        }
        if !bench.settings.show_regions {
            ui.small("region outlines hidden");
        }
    });
}

/// What the central area says when there are no pictures to show.
pub fn empty_reason(bench: &Workbench) -> String {
    if let Some(p) = &bench.pictures.problem {
        return p.clone();
    }
    if let Some(p) = &bench.run_problem {
        return p.clone();
    }
    if let Some(p) = &bench.loader.loading_image {
        return format!("loading {}…", crate::io::file_name(p));
    }
    if bench.is_busy() {
        return "running the backbone…".into();
    }
    if bench.shown.is_some() {
        return "preparing the maps…".into();
    }
    "Open an image (or a folder) and a checkpoint — or drop them here.".into()
}

/// The colour bar's title and its range: what the colours mean, for which stage, on which
/// scale.
fn legend_text(ui: &mut egui::Ui, st: Option<&PreparedStage>, label: &str, shared: bool) {
    let Some(st) = st else { return };
    match (&st.range, &st.explained) {
        (Some(r), _) => {
            let scale = if shared {
                "scale shared by all stages"
            } else {
                "scale of this stage"
            };
            ui.small(format!("{label}, stage {}: {scale}", st.stage));
            ui.small(format!(
                "{:.3} … {:.3}{}",
                r.lo,
                r.hi,
                if r.log { " (log)" } else { "" }
            ));
        }
        (None, Some(e)) => {
            ui.small(format!(
                "stage {}: relative colours (min-max per component)",
                st.stage
            ));
            let pct: Vec<String> = e.iter().map(|v| format!("{:.0}%", v * 100.0)).collect();
            ui.small(format!("RGB = PC1..3 ({})", pct.join(", ")));
        }
        _ => {}
    }
}

impl StageStrip {
    pub fn ui(
        &mut self,
        ui: &mut egui::Ui,
        bench: &Workbench,
        canvas: &mut CanvasTools,
        pointer: &mut Pointer,
    ) -> Vec<Action> {
        let mut out = Vec::new();
        let Some((maps, tex)) = bench.pictures.on_screen() else {
            ui.centered_and_justified(|ui| {
                ui.label(empty_reason(bench));
            });
            return out;
        };
        let g = &maps.outputs.geometry;
        let overlays = bench.settings.overlays();
        let (sx, sy) = maps.image_to_input();
        let to_image = (1.0 / sx, 1.0 / sy);
        ui.label(egui::RichText::new(format!("Stage strip — {}", maps.map_label)).strong());
        grid_key(ui, &overlays, bench);
        let n = tex.strip.len() + 1;
        let avail = ui.available_width();
        // All pictures in one row while each keeps 110 points; otherwise as many as fit.
        let per_row = ((avail / 110.0).floor() as usize).clamp(1, n);
        let cell_w = (avail / per_row as f32 - 8.0).max(80.0);
        let canvases: Vec<(f32, f32)> = std::iter::once((g.image.1 as f32, g.image.0 as f32))
            .chain(g.stages.iter().map(|s| {
                let (h, w) = render::canvas_size(s);
                (w as f32, h as f32)
            }))
            .collect();
        let max_h = canvases
            .iter()
            .map(|c| c.1 / c.0 * cell_w)
            .fold(0.0, f32::max)
            .min(240.0)
            .min((self.max_height - 90.0).max(60.0));
        egui::Grid::new("strip").spacing([8.0, 4.0]).show(ui, |ui| {
            for (idx, &canvas_px) in canvases.iter().enumerate().take(n) {
                let scale = (cell_w / canvas_px.0).min(max_h / canvas_px.1);
                let size = Vec2::new(canvas_px.0 * scale, canvas_px.1 * scale);
                ui.vertical(|ui| {
                    // Captions wrap inside the cell; the row never grows past the strip.
                    ui.set_max_width(cell_w);
                    let mut dense = false;
                    let title = if idx == 0 {
                        "image".to_string()
                    } else {
                        format!("stage {}", idx - 1)
                    };
                    ui.small(title.clone());
                    let texture = if idx == 0 {
                        Some(&tex.image)
                    } else {
                        tex.strip.get(idx - 1)
                    };
                    if let Some(t) = texture {
                        let resp = ui
                            .add(egui::Image::new((t.id(), size)).sense(Sense::click_and_drag()))
                            .on_hover_text_at_pointer(title.clone());
                        if let Some(p) = resp.hover_pos() {
                            pointer.set(to_input_px(resp.rect, canvas_px, p));
                        }
                        if resp.clicked() && idx > 0 && canvas.tool == Tool::Pick {
                            out.push(Action::FocusStage(idx - 1));
                        }
                        let at = Placement {
                            rect: resp.rect,
                            canvas: canvas_px,
                            to_image,
                        };
                        out.extend(canvas.interact(&resp, &at, &bench.regions));
                        let painter = ui.painter_at(resp.rect);
                        if idx > 0 {
                            dense = !paint_overlays(
                                &painter,
                                &g.stages[idx - 1],
                                g.image,
                                &overlays,
                                resp.rect,
                            )
                            .is_empty();
                        }
                        canvas.paint(&painter, &at, &bench.regions, None);
                        crosshair(&painter, resp.rect, resp.rect, canvas_px, pointer.hover);
                    }
                    if dense {
                        ui.small("windows too small here for a grid; see the lens");
                    }
                    if idx > 0 {
                        if let Some(t) = tex.legends.get(idx - 1) {
                            let w = size.x.min(240.0);
                            ui.add(egui::Image::new((t.id(), Vec2::new(w, w / 6.0))));
                        }
                        legend_text(
                            ui,
                            maps.stages.get(idx - 1),
                            &maps.map_label,
                            maps.key.spec.shared_across_stages,
                        );
                    }
                });
                if (idx + 1) % per_row == 0 {
                    ui.end_row();
                }
            }
        });
        out
    }
}
