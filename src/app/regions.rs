//! Labelled regions in the window: draw boxes, polygons and pinned notes on the image or any
//! stage panel (mapped back to image pixels), move, resize and edit vertices, undo and redo,
//! a per-image label list, autosave to the sidecar after every edit, and the statistics table.

use super::Workbench;
use crate::analysis::{region_stats, token_weights, RegionStats, INSIDE_WEIGHT};
use crate::annotation::{self, Edits, Shape, Sidecar};
use egui::{Color32, Pos2, Rect, Response, Stroke, Vec2};
use std::path::{Path, PathBuf};

/// What a click or drag on a picture does.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Tool {
    /// Pick a region; drag it, its corners or its vertices.
    Pick,
    Box,
    Polygon,
    Pin,
}

/// What a drag in the pick tool holds.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Grab {
    Whole { id: u64, last: [f64; 2] },
    Vertex { id: u64, index: usize },
}

/// Columns of the statistics table.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Column {
    Region,
    Stage,
    Inside,
    Outside,
    Ratio,
    Auroc,
    Tokens,
    Coverage,
}

pub struct RegionsState {
    pub sidecar: Option<Sidecar>,
    pub path: Option<PathBuf>,
    /// Folder for sidecars instead of next to the images (empty: next to them).
    pub project_dir: String,
    pub edits: Edits,
    pub tool: Tool,
    /// Label given to new regions.
    pub label: String,
    pub new_label: String,
    pub pin_text: String,
    pub selected: Option<u64>,
    draft: Vec<[f64; 2]>,
    drag_from: Option<[f64; 2]>,
    drag_to: Option<[f64; 2]>,
    grab: Option<Grab>,
    pub stats: Vec<RegionStats>,
    stats_for: Option<String>,
    pub sort: (Column, bool),
}

impl Default for RegionsState {
    fn default() -> Self {
        RegionsState {
            sidecar: None,
            path: None,
            project_dir: String::new(),
            edits: Edits::new(200),
            tool: Tool::Pick,
            label: "seedling".into(),
            new_label: String::new(),
            pin_text: String::new(),
            selected: None,
            draft: Vec::new(),
            drag_from: None,
            drag_to: None,
            grab: None,
            stats: Vec::new(),
            stats_for: None,
            sort: (Column::Region, false),
        }
    }
}

fn colour(c: [u8; 3]) -> Color32 {
    Color32::from_rgb(c[0], c[1], c[2])
}

impl RegionsState {
    /// Whether a drag is moving a region or one of its handles.
    pub fn is_grabbing(&self) -> bool {
        self.grab.is_some()
    }
}

impl Workbench {
    /// Load (or start) the sidecar of the image just opened.
    pub(super) fn open_regions(&mut self, image: &Path, size: (u32, u32)) {
        let dir = self.regions.project_dir.trim();
        let dir = (!dir.is_empty()).then(|| PathBuf::from(dir));
        let path = annotation::sidecar_path(image, dir.as_deref());
        let name = image
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let r = &mut self.regions;
        r.edits.clear();
        r.selected = None;
        r.draft.clear();
        r.stats_for = None;
        let loaded = annotation::load_with_warnings(&path);
        let sidecar = match loaded {
            Ok(Some((sc, warnings))) => {
                for w in warnings {
                    self.messages.push(super::Message {
                        level: super::Level::Info,
                        text: format!("{}: {w}", path.display()),
                    });
                }
                sc
            }
            // A new image starts with the label list in use, so one list serves the project.
            Ok(None) => {
                let mut sc = Sidecar::new(name, size.0, size.1);
                if let Some(prev) = &self.regions.sidecar {
                    sc.labels = prev.labels.clone();
                }
                sc
            }
            Err(e) => {
                self.error(e);
                Sidecar::new(name, size.0, size.1)
            }
        };
        if let Some(first) = sidecar.labels.first() {
            if sidecar.colour_of(&self.regions.label).is_none() {
                self.regions.label = first.name.clone();
            }
        }
        self.regions.sidecar = Some(sidecar);
        self.regions.path = Some(path);
    }

    /// Change the sidecar, remember the previous state for undo, and save at once.
    pub fn edit_regions(&mut self, change: impl FnOnce(&mut Sidecar)) {
        let Some(sc) = &mut self.regions.sidecar else {
            return;
        };
        if self.regions.edits.apply(sc, change) {
            self.save_regions();
        }
    }

    pub fn undo_regions(&mut self) {
        if let Some(sc) = &mut self.regions.sidecar {
            if self.regions.edits.undo(sc) {
                self.save_regions();
            }
        }
    }

    pub fn redo_regions(&mut self) {
        if let Some(sc) = &mut self.regions.sidecar {
            if self.regions.edits.redo(sc) {
                self.save_regions();
            }
        }
    }

    /// Write the sidecar atomically; an error is a message and the work stays in memory.
    fn save_regions(&mut self) {
        self.regions.stats_for = None;
        let (Some(sc), Some(path)) = (&self.regions.sidecar, &self.regions.path) else {
            return;
        };
        if let Err(e) = annotation::save(path, sc) {
            self.error(format!(
                "regions not saved (they are kept in the window): {e}"
            ));
        }
    }

    /// Add a region with the current label.
    pub fn add_region(&mut self, shape: Shape) {
        let label = self.regions.label.trim().to_string();
        let label = if label.is_empty() {
            "region".to_string()
        } else {
            label
        };
        let mut new_id = None;
        self.edit_regions(|sc| new_id = Some(sc.add_region(shape, &label, "")));
        self.regions.selected = new_id;
    }

    /// Recompute the statistics when the result or the map changed; every region edit clears
    /// `stats_for` (in `save_regions` and `open_regions`), so nothing is compared per frame.
    pub(super) fn refresh_region_stats(&mut self) {
        let (Some(shown), Some(sc)) = (&self.shown, &self.regions.sidecar) else {
            self.regions.stats.clear();
            return;
        };
        let map = super::view::map_id(self);
        let sig = format!("{}|{}", shown.key, map);
        if self.regions.stats_for.as_deref() == Some(sig.as_str()) {
            return;
        }
        let raw = self.view_raw_maps();
        self.regions.stats_for = Some(sig);
        self.regions.stats = if raw.is_empty() || raw.iter().any(|m| m.scalars().is_none()) {
            Vec::new()
        } else {
            match region_stats(&shown.outputs, &raw, &map, &sc.regions, &sc.image) {
                Ok(s) => s,
                Err(e) => {
                    self.error(e);
                    Vec::new()
                }
            }
        };
    }
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

/// Handle clicks and drags on a picture drawn in `rect` that shows `canvas` image pixels.
pub fn interact(bench: &mut Workbench, resp: &Response, rect: Rect, canvas: (f32, f32)) {
    if bench.regions.sidecar.is_none() {
        return;
    }
    let to_img = |p: Pos2| -> [f64; 2] {
        [
            ((p.x - rect.min.x) / rect.width() * canvas.0) as f64,
            ((p.y - rect.min.y) / rect.height() * canvas.1) as f64,
        ]
    };
    let px_per_image = rect.width() / canvas.0;
    let pointer = resp.interact_pointer_pos().or(resp.hover_pos());
    match bench.regions.tool {
        Tool::Box => {
            if resp.drag_started() {
                bench.regions.drag_from = pointer.map(to_img);
            }
            if resp.dragged() {
                bench.regions.drag_to = pointer.map(to_img);
            }
            if resp.drag_stopped() {
                if let (Some(a), Some(b)) =
                    (bench.regions.drag_from.take(), bench.regions.drag_to.take())
                {
                    if (a[0] - b[0]).abs() >= 1.0 && (a[1] - b[1]).abs() >= 1.0 {
                        bench.add_region(normalised_box(a, b));
                    }
                }
            }
        }
        Tool::Polygon => {
            if resp.double_clicked() {
                finish_polygon(bench);
            } else if resp.clicked() {
                if let Some(p) = pointer {
                    bench.regions.draft.push(to_img(p));
                }
            }
        }
        Tool::Pin => {
            if resp.clicked() {
                if let Some(p) = pointer {
                    let at = to_img(p);
                    let text = if bench.regions.pin_text.trim().is_empty() {
                        "note".to_string()
                    } else {
                        bench.regions.pin_text.trim().to_string()
                    };
                    bench.edit_regions(|sc| {
                        sc.add_pin(at, &text);
                    });
                }
            }
        }
        Tool::Pick => {
            let Some(p) = pointer else { return };
            let at = to_img(p);
            if resp.drag_started() {
                let sc = bench.regions.sidecar.as_ref().expect("checked");
                // A handle of the selected region within 6 screen pixels, else the region below.
                let near = bench.regions.selected.and_then(|id| {
                    let r = sc.region(id)?;
                    handles(&r.shape)
                        .iter()
                        .position(|h| {
                            let d = ((h[0] - at[0]).powi(2) + (h[1] - at[1]).powi(2)).sqrt() as f32
                                * px_per_image;
                            d <= 6.0
                        })
                        .map(|index| Grab::Vertex { id, index })
                });
                bench.regions.grab =
                    near.or_else(|| region_at(sc, at).map(|id| Grab::Whole { id, last: at }));
                if let Some(Grab::Whole { id, .. } | Grab::Vertex { id, .. }) = bench.regions.grab {
                    bench.regions.selected = Some(id);
                    // One undo step for the whole drag.
                    let before = bench.regions.sidecar.clone().expect("checked");
                    bench.regions.edits.record(&before);
                }
            } else if resp.dragged() {
                let grab = bench.regions.grab;
                if let (Some(g), Some(sc)) = (grab, &mut bench.regions.sidecar) {
                    match g {
                        Grab::Whole { id, last } => {
                            if let Some(r) = sc.regions.iter_mut().find(|r| r.id == id) {
                                translate(&mut r.shape, [at[0] - last[0], at[1] - last[1]]);
                            }
                            bench.regions.grab = Some(Grab::Whole { id, last: at });
                        }
                        Grab::Vertex { id, index } => {
                            if let Some(r) = sc.regions.iter_mut().find(|r| r.id == id) {
                                move_handle(&mut r.shape, index, at);
                            }
                        }
                    }
                }
            } else if resp.drag_stopped() {
                if bench.regions.grab.take().is_some() {
                    if let Some(Shape::Box { .. }) = bench
                        .regions
                        .selected
                        .and_then(|id| bench.regions.sidecar.as_ref()?.region(id))
                        .map(|r| &r.shape)
                    {
                        // Corners dragged past each other: keep the box well formed.
                        let id = bench.regions.selected.expect("selected");
                        if let Some(r) = bench
                            .regions
                            .sidecar
                            .as_mut()
                            .and_then(|sc| sc.regions.iter_mut().find(|r| r.id == id))
                        {
                            if let Shape::Box { x0, y0, x1, y1 } = r.shape {
                                r.shape = normalised_box([x0, y0], [x1, y1]);
                            }
                        }
                    }
                    bench.save_regions();
                }
            } else if resp.clicked() {
                bench.regions.selected =
                    region_at(bench.regions.sidecar.as_ref().expect("checked"), at);
            }
        }
    }
}

/// Close the polygon being drawn (three vertices at least).
pub fn finish_polygon(bench: &mut Workbench) {
    let points = std::mem::take(&mut bench.regions.draft);
    if points.len() >= 3 {
        bench.add_region(Shape::Polygon { points });
    }
}

/// Draw the regions, pins and the shape being drawn over a picture; for the lens, also the
/// tokens of `highlight_stage` that count as inside the selected region.
pub fn paint(
    bench: &Workbench,
    painter: &egui::Painter,
    rect: Rect,
    canvas: (f32, f32),
    highlight_stage: Option<usize>,
) {
    let Some(sc) = &bench.regions.sidecar else {
        return;
    };
    let to_screen = |p: [f64; 2]| {
        Pos2::new(
            rect.min.x + p[0] as f32 / canvas.0 * rect.width(),
            rect.min.y + p[1] as f32 / canvas.1 * rect.height(),
        )
    };
    if let (Some(stage), Some(id), Some(shown)) =
        (highlight_stage, bench.regions.selected, &bench.shown)
    {
        if let (Some(r), Some(sg)) = (sc.region(id), shown.outputs.geometry.stages.get(stage)) {
            let g = &shown.outputs.geometry;
            let w = token_weights(sg, g.image, &r.shape);
            for (i, &wt) in w.iter().enumerate() {
                if wt >= INSIDE_WEIGHT {
                    let (row, col) = (i / sg.grid.1, i % sg.grid.1);
                    let f = sg.footprint(row, col, g.image);
                    let a = to_screen([f[2] as f64, f[0] as f64]);
                    let b = to_screen([f[3] as f64, f[1] as f64]);
                    painter.rect_filled(
                        Rect::from_min_max(a, b),
                        0.0,
                        Color32::from_rgba_unmultiplied(255, 255, 255, 50),
                    );
                }
            }
        }
    }
    for r in &sc.regions {
        let c = colour(sc.colour_of(&r.label).unwrap_or([255, 255, 255]));
        let selected = bench.regions.selected == Some(r.id);
        let stroke = Stroke::new(if selected { 3.0 } else { 2.0 }, c);
        let pts: Vec<Pos2> = handles(&r.shape).into_iter().map(to_screen).collect();
        painter.add(egui::Shape::closed_line(pts.clone(), stroke));
        if selected {
            for p in &pts {
                painter.rect_filled(Rect::from_center_size(*p, Vec2::splat(7.0)), 1.0, c);
            }
        }
        // Names only in the lens, and only where they stay readable.
        let named = highlight_stage.is_some() && (selected || sc.regions.len() <= 12);
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
    for pin in &sc.pins {
        let p = to_screen(pin.at);
        painter.circle_filled(p, 4.0, Color32::from_rgb(255, 245, 120));
        painter.text(
            p + Vec2::new(6.0, 0.0),
            egui::Align2::LEFT_CENTER,
            &pin.text,
            egui::FontId::proportional(12.0),
            Color32::from_rgb(255, 245, 120),
        );
    }
    let draft_colour = Color32::from_rgb(255, 255, 255);
    if let (Some(a), Some(b)) = (bench.regions.drag_from, bench.regions.drag_to) {
        painter.rect_stroke(
            Rect::from_two_pos(to_screen(a), to_screen(b)),
            0.0,
            Stroke::new(1.5, draft_colour),
            egui::StrokeKind::Middle,
        );
    }
    if !bench.regions.draft.is_empty() {
        let pts: Vec<Pos2> = bench.regions.draft.iter().copied().map(to_screen).collect();
        painter.add(egui::Shape::line(pts, Stroke::new(1.5, draft_colour)));
    }
}

fn fmt(v: Option<f64>) -> String {
    v.map_or("–".into(), |v| format!("{v:.3}"))
}

fn sort_key(s: &RegionStats, c: Column) -> f64 {
    let f = |v: Option<f64>| v.unwrap_or(f64::NEG_INFINITY);
    match c {
        Column::Region => s.region as f64,
        Column::Stage => s.stage as f64,
        Column::Inside => f(s.inside_mean),
        Column::Outside => f(s.outside_mean),
        Column::Ratio => f(s.ratio),
        Column::Auroc => f(s.auroc),
        Column::Tokens => s.tokens as f64,
        Column::Coverage => s.coverage,
    }
}

/// The right-hand panel: tools, labels, the selected region, pins, undo/redo and statistics.
pub fn panel(bench: &mut Workbench, ui: &mut egui::Ui) {
    egui::Panel::right("regions")
        .default_size(330.0)
        .show(ui, |ui| {
            egui::ScrollArea::vertical().show(ui, |ui| panel_contents(bench, ui));
        });
}

fn panel_contents(bench: &mut Workbench, ui: &mut egui::Ui) {
    ui.heading("Regions");
    if bench.regions.sidecar.is_none() {
        ui.label("Open an image to mark regions.");
        return;
    }
    ui.horizontal_wrapped(|ui| {
        let t = &mut bench.regions.tool;
        ui.selectable_value(t, Tool::Pick, "Pick");
        ui.selectable_value(t, Tool::Box, "Box");
        ui.selectable_value(t, Tool::Polygon, "Polygon");
        ui.selectable_value(t, Tool::Pin, "Pin note");
    });
    if bench.regions.tool == Tool::Polygon {
        ui.horizontal(|ui| {
            ui.small(format!(
                "{} vertices — double-click or",
                bench.regions.draft.len()
            ));
            if ui.small_button("Close polygon").clicked() {
                finish_polygon(bench);
            }
        });
    }
    if bench.regions.tool == Tool::Pin {
        ui.horizontal(|ui| {
            let l = ui.label("note text");
            ui.text_edit_singleline(&mut bench.regions.pin_text)
                .labelled_by(l.id);
        });
    }
    ui.horizontal(|ui| {
        let l = ui.label("Sidecar folder");
        ui.add(
            egui::TextEdit::singleline(&mut bench.regions.project_dir)
                .hint_text("next to each image")
                .desired_width(150.0),
        )
        .labelled_by(l.id);
    });
    ui.horizontal(|ui| {
        if ui
            .add_enabled(bench.regions.edits.can_undo(), egui::Button::new("Undo"))
            .clicked()
        {
            bench.undo_regions();
        }
        if ui
            .add_enabled(bench.regions.edits.can_redo(), egui::Button::new("Redo"))
            .clicked()
        {
            bench.redo_regions();
        }
    });

    ui.separator();
    ui.strong("Labels");
    let labels: Vec<(String, [u8; 3])> = bench
        .regions
        .sidecar
        .as_ref()
        .map(|sc| {
            sc.labels
                .iter()
                .map(|l| (l.name.clone(), l.colour))
                .collect()
        })
        .unwrap_or_default();
    let mut recolour = None;
    for (name, c) in &labels {
        ui.horizontal(|ui| {
            let mut rgb = *c;
            if ui.color_edit_button_srgb(&mut rgb).changed() {
                recolour = Some((name.clone(), rgb));
            }
            let current = bench.regions.label == *name;
            if ui.selectable_label(current, name).clicked() {
                bench.regions.label = name.clone();
            }
        });
    }
    if let Some((name, rgb)) = recolour {
        bench.edit_regions(|sc| {
            if let Some(l) = sc.labels.iter_mut().find(|l| l.name == name) {
                l.colour = rgb;
            }
        });
    }
    ui.horizontal(|ui| {
        let l = ui.label("New label");
        ui.add(egui::TextEdit::singleline(&mut bench.regions.new_label).desired_width(120.0))
            .labelled_by(l.id);
        if ui.button("Add label").clicked() {
            let name = bench.regions.new_label.trim().to_string();
            if !name.is_empty() {
                bench.edit_regions(|sc| {
                    sc.ensure_label(&name);
                });
                bench.regions.label = name;
                bench.regions.new_label.clear();
            }
        }
    });
    ui.small(format!("new regions get: {}", bench.regions.label));

    ui.separator();
    let selected = bench
        .regions
        .selected
        .and_then(|id| bench.regions.sidecar.as_ref()?.region(id).cloned());
    if let Some(r) = selected {
        ui.strong(format!("Selected: {} #{}", r.label, r.id));
        let mut label = r.label.clone();
        egui::ComboBox::from_label("region label")
            .selected_text(label.clone())
            .show_ui(ui, |ui| {
                for (name, _) in &labels {
                    ui.selectable_value(&mut label, name.clone(), name);
                }
            });
        let mut note = r.note.clone();
        let l = ui.label("region note");
        let note_resp = ui.text_edit_multiline(&mut note).labelled_by(l.id);
        if label != r.label
            || (note != r.note && note_resp.lost_focus())
            || (note != r.note && !note_resp.has_focus())
        {
            let id = r.id;
            bench.edit_regions(|sc| {
                if let Some(x) = sc.regions.iter_mut().find(|x| x.id == id) {
                    x.label = label;
                    x.note = note;
                }
            });
        } else if note != r.note {
            // Typing: keep the text live; it is saved when the field loses focus.
            if let Some(x) = bench
                .regions
                .sidecar
                .as_mut()
                .and_then(|sc| sc.regions.iter_mut().find(|x| x.id == r.id))
            {
                x.note = note;
            }
        }
        if ui.button("Delete region").clicked() {
            let id = r.id;
            bench.edit_regions(|sc| {
                sc.remove_region(id);
            });
            bench.regions.selected = None;
        }
    } else {
        ui.small("Pick a region to edit its label and note.");
    }

    ui.separator();
    ui.strong("Response inside regions");
    let map = super::view::map_id(bench);
    if bench.regions.stats.is_empty() {
        ui.small(if map == "pca" {
            "statistics need a scalar map (norm or one channel)"
        } else {
            "no regions yet"
        });
        return;
    }
    ui.small(format!(
        "map {map}; inside = token weight >= {INSIDE_WEIGHT} for AUROC and tokens"
    ));
    let mut rows = bench.regions.stats.clone();
    let (col, desc) = bench.regions.sort;
    rows.sort_by(|a, b| {
        let o = sort_key(a, col).total_cmp(&sort_key(b, col));
        let o = if desc { o.reverse() } else { o };
        o.then(a.stage.cmp(&b.stage))
    });
    let mut clicked = None;
    egui::Grid::new("region-stats")
        .striped(true)
        .show(ui, |ui| {
            for (c, name) in [
                (Column::Region, "region"),
                (Column::Stage, "stage"),
                (Column::Inside, "inside"),
                (Column::Outside, "outside"),
                (Column::Ratio, "ratio"),
                (Column::Auroc, "AUROC"),
                (Column::Tokens, "tokens"),
                (Column::Coverage, "cover"),
            ] {
                let arrow = if bench.regions.sort.0 == c {
                    if desc {
                        " (desc)"
                    } else {
                        " (asc)"
                    }
                } else {
                    ""
                };
                if ui.small_button(format!("{name}{arrow}")).clicked() {
                    bench.regions.sort = (
                        c,
                        if bench.regions.sort.0 == c {
                            !desc
                        } else {
                            false
                        },
                    );
                }
            }
            ui.end_row();
            for s in &rows {
                let sel = bench.regions.selected == Some(s.region);
                if ui
                    .selectable_label(sel, format!("{} #{}", s.label, s.region))
                    .clicked()
                {
                    clicked = Some((s.region, s.stage));
                }
                ui.label(s.stage.to_string());
                ui.label(fmt(s.inside_mean));
                ui.label(fmt(s.outside_mean));
                ui.label(fmt(s.ratio));
                ui.label(fmt(s.auroc));
                ui.label(s.tokens.to_string());
                ui.label(format!("{:.1}%", 100.0 * s.coverage));
                ui.end_row();
            }
        });
    if let Some((id, stage)) = clicked {
        bench.regions.selected = Some(id);
        bench.settings.focus_stage = stage;
    }
}
