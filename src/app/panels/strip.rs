//! The stage strip: the image, then one panel per stage side by side with its legend, reflowing
//! on narrow windows. Clicking a stage puts it in the lens; the region tools work here too.

use super::pointer::{crosshair, to_input_px, Pointer};
use crate::analysis::compare::{DifferenceStage, PairView};
use crate::analysis::PreparedStage;
use crate::app::actions::Action;
use crate::app::canvas::{CanvasTools, Placement, Tool};
use crate::app::inspector::paint_spotlight;
use crate::app::overlay::paint_overlays;
use crate::app::pictures::PairTextures;
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

/// Where a picture cell sits and what it shows.
struct Cell<'a> {
    texture: &'a egui::TextureHandle,
    title: String,
    /// The stage drawn (`None`: the image itself).
    stage: Option<usize>,
    /// Whether this picture is of the checkpoint the attention inspector reads (B when
    /// comparing): its spotlight is drawn here and clicks pick its query.
    inspectable: bool,
    canvas_px: (f32, f32),
    size: Vec2,
}

/// What every cell shares in one frame.
struct Frame<'a> {
    bench: &'a Workbench,
    maps: &'a crate::app::pictures::PreparedMaps,
    overlays: Overlays,
    to_image: (f64, f64),
}

/// The inspector's query at screen point `p` of a picture of `stage`, if it is a real token.
pub fn inspect_action(
    maps: &crate::app::pictures::PreparedMaps,
    stage: usize,
    rect: egui::Rect,
    canvas: (f32, f32),
    p: egui::Pos2,
) -> Option<Action> {
    let sg = maps.outputs.geometry.stages.get(stage)?;
    let (x, y) = to_input_px(rect, canvas, p);
    if x < 0.0 || y < 0.0 {
        return None;
    }
    let (row, col) = (y as usize / sg.stride, x as usize / sg.stride);
    (row < sg.grid.0 && col < sg.grid.1).then_some(Action::InspectToken { stage, row, col })
}

/// One line under a comparison panel: what the colours span and on which scale.
fn compact_range(what: &str, st: Option<&PreparedStage>, shared: bool) -> String {
    match st.and_then(|st| st.range.as_ref()) {
        Some(r) => format!(
            "{what}: {:.3} … {:.3}{}{}",
            r.lo,
            r.hi,
            if r.log { " (log)" } else { "" },
            if shared { ", all stages" } else { "" }
        ),
        None => format!("{what}: relative colours, PCA fitted on each side"),
    }
}

impl StageStrip {
    /// One picture: pointer, stage pick, region tools, grids and crosshair. Returns whether
    /// the windows were too dense for a grid.
    fn cell(
        ui: &mut egui::Ui,
        f: &Frame,
        c: &Cell,
        canvas: &mut CanvasTools,
        pointer: &mut Pointer,
        out: &mut Vec<Action>,
    ) -> bool {
        let g = &f.maps.outputs.geometry;
        let resp = ui
            .add(egui::Image::new((c.texture.id(), c.size)).sense(Sense::click_and_drag()))
            .on_hover_text_at_pointer(c.title.clone());
        // Every picture is named for screen readers and tests, with its caption shown or not.
        resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, &c.title));
        if let Some(p) = resp.hover_pos() {
            pointer.set(to_input_px(resp.rect, c.canvas_px, p));
        }
        if let (true, Some(s), Tool::Pick) = (resp.clicked(), c.stage, canvas.tool) {
            let inspect = f.bench.settings.inspecting && c.inspectable;
            match resp.interact_pointer_pos().filter(|_| inspect) {
                Some(p) => out.extend(inspect_action(f.maps, s, resp.rect, c.canvas_px, p)),
                None => out.push(Action::FocusStage(s)),
            }
        }
        let at = Placement {
            rect: resp.rect,
            canvas: c.canvas_px,
            to_image: f.to_image,
        };
        // With the inspector on, a click on this checkpoint's pictures picks a query token and
        // leaves the regions alone.
        if !(f.bench.settings.inspecting && c.inspectable && canvas.tool == Tool::Pick) {
            out.extend(canvas.interact(&resp, &at, &f.bench.regions));
        }
        let painter = ui.painter_at(resp.rect);
        let dense = c.stage.is_some_and(|s| {
            !paint_overlays(&painter, &g.stages[s], g.image, &f.overlays, resp.rect).is_empty()
        });
        canvas.paint(&painter, &at, &f.bench.regions, None);
        if let (true, Some(ins)) = (c.inspectable, &f.bench.inspected) {
            if c.stage.is_none_or(|s| s == ins.query.stage) {
                if let Some(sg) = g.stages.get(ins.query.stage) {
                    paint_spotlight(&painter, resp.rect, c.canvas_px, sg.stride, &ins.attention);
                }
            }
        }
        crosshair(&painter, resp.rect, resp.rect, c.canvas_px, pointer.hover);
        dense
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
            ui.centered_and_justified(|ui| {
                ui.label(empty_reason(bench));
            });
            return out;
        };
        let g = &maps.outputs.geometry;
        let overlays = bench.settings.overlays();
        let (sx, sy) = maps.image_to_input();
        let frame = Frame {
            bench,
            maps,
            overlays,
            to_image: (1.0 / sx, 1.0 / sy),
        };
        let pair = maps.pair.as_ref().zip(tex.pair.as_ref());
        let heading = match pair {
            Some((p, _)) => format!(
                "Stage strip — A (base), B and 1 - cosine per stage; A and B rows: {}",
                p.kind_label
            ),
            None => format!("Stage strip — {}", maps.map_label),
        };
        ui.label(egui::RichText::new(heading).strong());
        if let Some(problem) = &maps.pair_problem {
            ui.colored_label(
                Color32::from_rgb(230, 90, 70),
                format!("A and B not compared: {problem}"),
            );
        }
        grid_key(ui, &frame.overlays, bench);
        let n = tex.strip.len() + 1;
        let rows = if pair.is_some() { 3.0 } else { 1.0 };
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
            .min(((self.max_height - 60.0 * rows - 30.0) / rows).max(60.0));
        let fit = |canvas_px: (f32, f32)| {
            let scale = (cell_w / canvas_px.0).min(max_h / canvas_px.1);
            Vec2::new(canvas_px.0 * scale, canvas_px.1 * scale)
        };
        if let Some((view, ptex)) = pair {
            self.pair_grid(
                ui, &frame, view, ptex, &canvases, cell_w, &fit, canvas, pointer, &mut out,
            );
            return out;
        }
        egui::Grid::new("strip").spacing([8.0, 4.0]).show(ui, |ui| {
            for (idx, &canvas_px) in canvases.iter().enumerate().take(n) {
                let size = fit(canvas_px);
                ui.vertical(|ui| {
                    // Captions wrap inside the cell; the row never grows past the strip.
                    ui.set_max_width(cell_w);
                    let stage = idx.checked_sub(1);
                    let title = stage.map_or("image".to_string(), |s| format!("stage {s}"));
                    ui.small(title.clone());
                    let texture = match stage {
                        None => Some(&tex.image),
                        Some(s) => tex.strip.get(s),
                    };
                    let mut dense = false;
                    if let Some(t) = texture {
                        let c = Cell {
                            texture: t,
                            title,
                            stage,
                            inspectable: true,
                            canvas_px,
                            size,
                        };
                        dense = Self::cell(ui, &frame, &c, canvas, pointer, &mut out);
                    }
                    if dense {
                        ui.small("windows too small here for a grid; see the lens");
                    }
                    if let Some(s) = stage {
                        if let Some(t) = tex.legends.get(s) {
                            let w = size.x.min(240.0);
                            ui.add(egui::Image::new((t.id(), Vec2::new(w, w / 6.0))));
                        }
                        legend_text(
                            ui,
                            maps.stages.get(s),
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

    /// The comparison: a row each for A, B and the difference; the image leads the A row,
    /// the other rows start with their name. CKA stands beside each stage title.
    #[allow(clippy::too_many_arguments)]
    fn pair_grid(
        &self,
        ui: &mut egui::Ui,
        frame: &Frame,
        view: &PairView,
        ptex: &PairTextures,
        canvases: &[(f32, f32)],
        cell_w: f32,
        fit: &dyn Fn((f32, f32)) -> Vec2,
        canvas: &mut CanvasTools,
        pointer: &mut Pointer,
        out: &mut Vec<Action>,
    ) {
        let bench = frame.bench;
        let names = (
            bench
                .base
                .as_ref()
                .map_or(String::new(), |w| w.name.clone()),
            bench
                .weights
                .as_ref()
                .map_or(String::new(), |w| w.name.clone()),
        );
        let shared = frame.maps.key.spec.shared_across_stages;
        // On a short window (1280x720) the B and difference rows drop their captions: the
        // column's A caption names the stage, the row's first cell names the row, and each
        // picture keeps its full title on hover.
        let compact = self.max_height < 420.0;
        egui::Grid::new("pair-strip")
            .spacing([8.0, 4.0])
            .show(ui, |ui| {
                for row in 0..3 {
                    ui.vertical(|ui| {
                        ui.set_max_width(cell_w);
                        match row {
                            0 => {
                                ui.small(format!("A (base): {}", names.0));
                                if let Some(t) = frame.bench.pictures.textures.as_ref() {
                                    let c = Cell {
                                        texture: &t.image,
                                        title: "image".into(),
                                        stage: None,
                                        inspectable: true,
                                        canvas_px: canvases[0],
                                        size: fit(canvases[0]),
                                    };
                                    Self::cell(ui, frame, &c, canvas, pointer, out);
                                }
                            }
                            1 => {
                                ui.small(format!("B: {}", names.1));
                            }
                            _ => {
                                ui.small("A vs B: 1 - cosine").on_hover_text(
                                    "per token: 0 same direction, 1 orthogonal, 2 opposite",
                                );
                            }
                        }
                    });
                    for (s, &canvas_px) in
                        canvases.iter().enumerate().skip(1).map(|(i, c)| (i - 1, c))
                    {
                        ui.vertical(|ui| {
                            ui.set_max_width(cell_w);
                            let size = fit(canvas_px);
                            let cka = view.cka.get(s).copied().flatten();
                            let cka_text = cka.map_or("CKA none".into(), |c| format!("CKA {c:.3}"));
                            let (title, texture) = match row {
                                0 => (format!("A stage {s} · {cka_text}"), ptex.a.get(s)),
                                1 => (format!("B stage {s}"), ptex.b.get(s)),
                                _ => (
                                    format!("A vs B stage {s}"),
                                    ptex.difference.get(s).and_then(Option::as_ref),
                                ),
                            };
                            if row == 0 || !compact {
                                ui.small(title.clone());
                            }
                            match texture {
                                Some(t) => {
                                    let c = Cell {
                                        texture: t,
                                        title,
                                        stage: Some(s),
                                        inspectable: row == 1,
                                        canvas_px,
                                        size,
                                    };
                                    if Self::cell(ui, frame, &c, canvas, pointer, out) {
                                        ui.small("windows too small here for a grid");
                                    }
                                }
                                None => {
                                    if let Some(DifferenceStage::Absent(why)) =
                                        view.difference.get(s)
                                    {
                                        ui.small(why.clone());
                                    }
                                }
                            }
                            let w = size.x.min(240.0);
                            match row {
                                1 => {
                                    if let Some(t) = ptex.ab_legends.get(s) {
                                        ui.add(egui::Image::new((t.id(), Vec2::new(w, w / 8.0))));
                                    }
                                    ui.small(compact_range("A and B", view.b.get(s), shared));
                                }
                                2 => {
                                    if let Some(Some(t)) = ptex.difference_legends.get(s) {
                                        ui.add(egui::Image::new((t.id(), Vec2::new(w, w / 8.0))));
                                    }
                                    if let Some(DifferenceStage::Shown {
                                        prepared,
                                        mean_cosine,
                                        min_cosine,
                                        ..
                                    }) = view.difference.get(s)
                                    {
                                        ui.small(compact_range("1 - cos", Some(prepared), shared));
                                        ui.small(format!(
                                            "cosine mean {mean_cosine:.3}, min {min_cosine:.3}"
                                        ));
                                    }
                                }
                                _ => {}
                            }
                        });
                    }
                    ui.end_row();
                }
            });
    }
}
