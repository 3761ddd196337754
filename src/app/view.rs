//! The panels of the window: the source bar, the controls, the stage strip, the lens (one stage
//! large, zoom and pan), hover read-out with a linked crosshair, messages, help and the load
//! report. Pictures come from the shared renderer, so the screen shows what a saved figure shows.

use super::{Level, Workbench};
use crate::analysis::{self, parse_map_kind, Colormap, Map, PreparedStage, ScaleSpec};
use crate::error::{Error, Result};
use crate::render::{self, FigureSpec, Overlays, PanelStyle};
use egui::{Color32, Pos2, Rect, Sense, Stroke, TextureHandle, TextureOptions, Vec2};
use std::path::PathBuf;

/// Runtime-only drawing state: textures of the current pictures, lens zoom and pan, hover.
#[derive(Default)]
pub struct ViewState {
    /// Signature of the settings the textures were made with.
    made_for: Option<String>,
    image: Option<TextureHandle>,
    stages: Vec<TextureHandle>,
    legends: Vec<TextureHandle>,
    lens: Option<TextureHandle>,
    /// Raw (unscaled) map values per stage, for the hover read-out.
    raw: Vec<Map>,
    pub prepared: Vec<PreparedStage>,
    pub zoom: f32,
    pub pan: Vec2,
    /// Hovered point in input-image pixels.
    pub hover: Option<(f32, f32)>,
    /// Whether the first drawn maps have been announced (see [`READY_FILE_ENV`]).
    announced: bool,
}

/// When set, the window writes this file once the first stage maps are on screen, so an
/// outside check (the real-window smoke test) knows when to take its screenshot.
pub const READY_FILE_ENV: &str = "MULLION_READY_FILE";

impl ViewState {
    pub fn invalidate(&mut self) {
        self.made_for = None;
    }

    pub fn raw_maps(&self) -> &[Map] {
        &self.raw
    }
}

/// The map kind's command-line name for the current settings.
pub fn map_id(bench: &Workbench) -> String {
    match bench.settings.map_kind.as_str() {
        "channel" => format!("channel:{}", bench.settings.channel),
        other => other.to_string(),
    }
}

pub fn scale_spec(bench: &Workbench) -> ScaleSpec {
    ScaleSpec {
        shared_across_stages: bench.settings.shared_scale,
        log: bench.settings.log_scale,
        clip_percentiles: (bench.settings.clip_low, bench.settings.clip_high),
    }
}

pub fn panel_style(bench: &Workbench, scale: f32) -> PanelStyle {
    let s = &bench.settings;
    PanelStyle {
        colormap: Colormap::parse(&s.colormap).unwrap_or(Colormap::Viridis),
        opacity: s.opacity.clamp(0.0, 1.0),
        overlays: Overlays {
            regular_grid: s.show_regular,
            shifted_grid: s.show_shifted,
            padding: s.show_padding,
            block: 2 * s.block_pair,
            grid_in_padding: true,
            line_width: if scale >= 3.0 { 2 } else { 1 },
        },
        scale,
    }
}

/// Every stage's map for the current settings (see [`render::figure_stages`]).
pub fn prepare_stages(
    out: &crate::engine::StageOutputs,
    map: &str,
    spec: &ScaleSpec,
) -> Result<(Vec<Map>, Vec<PreparedStage>)> {
    analysis::prepare_stages(out, parse_map_kind(map)?.as_ref(), spec)
}

fn to_color_image(img: &image::RgbaImage) -> egui::ColorImage {
    egui::ColorImage::from_rgba_unmultiplied(
        [img.width() as usize, img.height() as usize],
        img.as_raw(),
    )
}

fn signature(bench: &Workbench) -> Option<String> {
    let shown = bench.shown.as_ref()?;
    let s = &bench.settings;
    Some(format!(
        "{}|{}|{:?}|{}|{}|{}|{}|{}|{}|{}|{}|{}|{}",
        shown.key,
        map_id(bench),
        (s.clip_low, s.clip_high),
        s.shared_scale,
        s.log_scale,
        s.colormap,
        s.show_regular,
        s.show_shifted,
        s.show_padding,
        s.block_pair,
        s.focus_stage,
        s.opacity,
        bench
            .weights
            .as_ref()
            .map_or(0, |w| w.model.config.n_stages())
    ))
}

/// Re-render the pictures when the result or a setting changed.
pub fn refresh(bench: &mut Workbench, ctx: &egui::Context) {
    let Some(sig) = signature(bench) else { return };
    if bench.view.made_for.as_deref() == Some(sig.as_str()) {
        return;
    }
    bench.view.made_for = Some(sig);
    let shown = bench.shown.as_ref().expect("signature needs a result");
    let out = shown.outputs.clone();
    let input = shown.input.clone();
    let spec = scale_spec(bench);
    let (raw, prepared) = match spec
        .validate()
        .and_then(|_| prepare_stages(&out, &map_id(bench), &spec))
    {
        Ok(v) => v,
        Err(e) => {
            bench.error(e);
            return;
        }
    };
    let rgba = image::DynamicImage::ImageRgb8(input.clone()).to_rgba8();
    bench.view.image =
        Some(ctx.load_texture("input", to_color_image(&rgba), TextureOptions::NEAREST));
    let strip_style = panel_style(bench, 1.0);
    let mut textures = Vec::new();
    for st in &prepared {
        match render::render_panel(&input, &st.map, &out.geometry, st.stage, &strip_style) {
            Ok(img) => textures.push(ctx.load_texture(
                format!("stage{}", st.stage),
                to_color_image(&img),
                TextureOptions::NEAREST,
            )),
            Err(e) => {
                bench.error(e);
                return;
            }
        }
    }
    let focus = bench
        .settings
        .focus_stage
        .min(prepared.len().saturating_sub(1));
    let lens_scale = (768.0 / input.width().max(input.height()) as f32)
        .clamp(1.0, 4.0)
        .floor();
    let lens = prepared.get(focus).and_then(|st| {
        render::render_panel(
            &input,
            &st.map,
            &out.geometry,
            st.stage,
            &panel_style(bench, lens_scale),
        )
        .ok()
    });
    bench.view.lens =
        lens.map(|img| ctx.load_texture("lens", to_color_image(&img), TextureOptions::NEAREST));
    let colormap = strip_style.colormap;
    bench.view.legends = prepared
        .iter()
        .map(|st| {
            let img = match &st.range {
                Some(r) => render::render_legend(colormap, r, 240, 40),
                None => render::render_rgb_legend(st.explained.as_deref(), 240, 40),
            };
            ctx.load_texture(
                format!("legend{}", st.stage),
                to_color_image(&img),
                TextureOptions::LINEAR,
            )
        })
        .collect();
    bench.view.stages = textures;
    bench.view.raw = raw;
    bench.view.prepared = prepared;
}

/// Keyboard shortcuts (shown in the help overlay).
pub const SHORTCUTS: [(&str, &str); 14] = [
    ("N / B", "next / previous image in the list"),
    ("0 - 9", "put stage 0-9 in the lens"),
    ("W", "regular window grid on / off"),
    ("Q", "shifted window grid on / off"),
    ("X", "padding hatch on / off"),
    ("K", "next map kind (norm, channel, PCA)"),
    ("F", "fit the lens to its area"),
    ("Ctrl+S", "save figure and statistics"),
    ("Esc", "cancel the running forward pass"),
    ("Ctrl+Z / Ctrl+Y", "undo / redo a region edit"),
    ("Delete", "delete the picked region"),
    ("Enter", "close the polygon being drawn"),
    ("double-click", "close the polygon being drawn"),
    ("F1", "this help"),
];

pub fn shortcuts(bench: &mut Workbench, ui: &mut egui::Ui) {
    if ui.ctx().egui_wants_keyboard_input() {
        return;
    }
    use egui::Key;
    let pressed = |k: Key| ui.input(|i| i.key_pressed(k));
    let ctrl = ui.input(|i| i.modifiers.command);
    if pressed(Key::N) {
        bench.next_image();
    }
    if pressed(Key::B) {
        bench.previous_image();
    }
    let keys = [
        Key::Num0,
        Key::Num1,
        Key::Num2,
        Key::Num3,
        Key::Num4,
        Key::Num5,
        Key::Num6,
        Key::Num7,
        Key::Num8,
        Key::Num9,
    ];
    for (i, k) in keys.iter().enumerate() {
        if pressed(*k) && i < bench.n_stages() {
            bench.settings.focus_stage = i;
        }
    }
    if pressed(Key::W) {
        bench.settings.show_regular ^= true;
    }
    if pressed(Key::Q) {
        bench.settings.show_shifted ^= true;
    }
    if pressed(Key::X) {
        bench.settings.show_padding ^= true;
    }
    if pressed(Key::K) {
        let next = match bench.settings.map_kind.as_str() {
            "norm" => "channel",
            "channel" => "pca",
            _ => "norm",
        };
        bench.settings.map_kind = next.into();
    }
    if pressed(Key::F) {
        bench.view.zoom = 1.0;
        bench.view.pan = Vec2::ZERO;
    }
    if ctrl && pressed(Key::S) {
        bench.save_figure();
    }
    if pressed(Key::Escape) {
        bench.cancel_pending();
    }
    if ctrl && pressed(Key::Z) {
        bench.undo_regions();
    }
    if ctrl && pressed(Key::Y) {
        bench.redo_regions();
    }
    if pressed(Key::Delete) {
        if let Some(id) = bench.regions.selected.take() {
            bench.edit_regions(|sc| {
                sc.remove_region(id);
            });
        }
    }
    if pressed(Key::Enter) {
        super::regions::finish_polygon(bench);
    }
    if pressed(Key::F1) {
        bench.show_help ^= true;
    }
}

pub fn top_bar(bench: &mut Workbench, ui: &mut egui::Ui) {
    egui::Panel::top("sources").show(ui, |ui| {
        ui.horizontal_wrapped(|ui| {
            if ui.button("Open images…").clicked() {
                bench.pick_in_background(false, false);
            }
            if ui.button("Open folder…").clicked() {
                bench.pick_in_background(false, true);
            }
            if ui.button("Open checkpoint…").clicked() {
                bench.pick_in_background(true, false);
            }
            let mut reopen = None;
            ui.menu_button("Recent", |ui| {
                let lists = [
                    ("images", &bench.settings.recent_images),
                    ("checkpoints", &bench.settings.recent_weights),
                ];
                for (what, list) in lists {
                    ui.label(what);
                    if list.is_empty() {
                        ui.small("none yet");
                    }
                    for p in list.iter() {
                        if ui.button(p.display().to_string()).clicked() {
                            reopen = Some(p.clone());
                            ui.close();
                        }
                    }
                }
            });
            if let Some(p) = reopen {
                bench.open_paths(&[p]);
            }
            ui.separator();
            let label = ui.label("Path:");
            let field = ui
                .add(
                    egui::TextEdit::singleline(&mut bench.typed_path)
                        .hint_text("image, folder or checkpoint")
                        .desired_width(260.0),
                )
                .labelled_by(label.id);
            let enter = field.lost_focus() && ui.input(|i| i.key_pressed(egui::Key::Enter));
            if ui.button("Open path").clicked() || enter {
                let p = PathBuf::from(bench.typed_path.trim());
                if p.exists() {
                    bench.open_paths(&[p]);
                } else {
                    bench.error(format!("{}: no such file or folder", p.display()));
                }
            }
            ui.separator();
            let n = bench.images.len();
            if ui
                .add_enabled(n > 1, egui::Button::new("< Previous"))
                .clicked()
            {
                bench.previous_image();
            }
            if ui.add_enabled(n > 1, egui::Button::new("Next >")).clicked() {
                bench.next_image();
            }
            if let Some(img) = &bench.image {
                let name = img
                    .path
                    .file_name()
                    .map(|s| s.to_string_lossy().into_owned())
                    .unwrap_or_default();
                ui.label(format!("{name}  ({}/{n})", bench.current + 1));
            }
            ui.separator();
            match &bench.weights {
                Some(w) if w.random => {
                    ui.colored_label(
                        Color32::from_rgb(220, 80, 40),
                        "RANDOM WEIGHTS: no learned structure",
                    );
                }
                Some(w) => {
                    ui.label(format!("checkpoint: {}", w.name));
                }
                None => {
                    ui.label("no checkpoint");
                }
            }
            if ui
                .add_enabled(
                    bench.weights.as_ref().is_some_and(|w| w.report.is_some()),
                    egui::Button::new("Load report"),
                )
                .clicked()
            {
                bench.show_report = true;
            }
            ui.separator();
            if ui
                .add_enabled(bench.shown.is_some(), egui::Button::new("Save figure"))
                .clicked()
            {
                bench.save_figure();
            }
            if ui.button("Help (F1)").clicked() {
                bench.show_help ^= true;
            }
        });
        if bench.is_busy() {
            ui.horizontal(|ui| {
                let (frac, text) = match bench.progress() {
                    Some(p) => (
                        p.done as f32 / p.total as f32,
                        format!("stage {} — block {}/{}", p.stage, p.done, p.total),
                    ),
                    None => (0.0, "starting…".into()),
                };
                ui.add(egui::ProgressBar::new(frac).text(text).desired_width(360.0));
                if ui.button("Cancel").clicked() {
                    bench.cancel_pending();
                }
            });
        }
    });
}

pub fn message_area(bench: &mut Workbench, ui: &mut egui::Ui) {
    egui::Panel::bottom("messages")
        .resizable(true)
        .default_size(70.0)
        .show(ui, |ui| {
            ui.horizontal(|ui| {
                ui.strong("Messages");
                if ui.small_button("Clear").clicked() {
                    bench.messages.clear();
                }
            });
            egui::ScrollArea::vertical()
                .stick_to_bottom(true)
                .show(ui, |ui| {
                    for m in &bench.messages {
                        let colour = match m.level {
                            Level::Info => ui.visuals().text_color(),
                            Level::Error => Color32::from_rgb(230, 90, 70),
                        };
                        ui.colored_label(colour, &m.text);
                    }
                });
        });
}

pub fn side_controls(bench: &mut Workbench, ui: &mut egui::Ui) {
    egui::Panel::left("controls")
        .default_size(250.0)
        .show(ui, |ui| {
            egui::ScrollArea::vertical().show(ui, |ui| {
                let before = bench.settings.clone();
                controls(bench, ui);
                let s = &bench.settings;
                if s.policy != before.policy || s.norm != before.norm {
                    bench.request();
                }
            });
        });
}

fn controls(bench: &mut Workbench, ui: &mut egui::Ui) {
    let n_stages = bench.n_stages();
    let s = &mut bench.settings;
    ui.heading("Input");
    use crate::engine::input::InputPolicy;
    let mut kind = match s.policy {
        InputPolicy::Native => 0,
        InputPolicy::FitLongSide(_) => 1,
        InputPolicy::Square(_) => 2,
    };
    let mut size = match s.policy {
        InputPolicy::Native => 224,
        InputPolicy::FitLongSide(n) | InputPolicy::Square(n) => n,
    };
    ui.radio_value(&mut kind, 0, "Native size");
    ui.radio_value(&mut kind, 1, "Fit long side");
    ui.radio_value(&mut kind, 2, "Fixed square");
    if kind != 0 {
        ui.horizontal(|ui| {
            labelled_drag(
                ui,
                "size",
                egui::DragValue::new(&mut size)
                    .range(16..=4096)
                    .suffix(" px"),
            );
        });
    }
    s.policy = match kind {
        0 => InputPolicy::Native,
        1 => InputPolicy::FitLongSide(size),
        _ => InputPolicy::Square(size),
    };
    ui.label("Normalisation mean / std");
    ui.horizontal(|ui| {
        if ui.small_button("ImageNet").clicked() {
            s.norm = crate::engine::input::Normalisation::IMAGENET;
        }
        if ui.small_button("0.5 / 0.5").clicked() {
            s.norm = crate::engine::input::Normalisation::HALF;
        }
    });
    for c in 0..3 {
        ui.horizontal(|ui| {
            let name = ["R", "G", "B"][c];
            let mean = egui::DragValue::new(&mut s.norm.mean[c])
                .speed(0.005)
                .range(-10.0..=10.0)
                .max_decimals(3);
            labelled_drag(ui, &format!("{name} mean"), mean);
            let std = egui::DragValue::new(&mut s.norm.std[c])
                .speed(0.005)
                .range(0.001..=10.0)
                .max_decimals(3);
            labelled_drag(ui, "std", std);
        });
    }
    if let Some(shown) = &bench.shown {
        let g = &shown.outputs.geometry;
        ui.label(format!("network input {}x{} px", g.image.1, g.image.0));
        ui.label(format!(
            "patch padding +{} right, +{} bottom",
            g.input_pad().1,
            g.input_pad().0
        ));
        for st in &g.stages {
            let (pr, pc) = st.padded();
            ui.small(format!(
                "stage {}: {}x{} tokens, padded to {}x{}",
                st.index, st.grid.1, st.grid.0, pc, pr
            ));
        }
    }

    ui.separator();
    ui.heading("Map");
    egui::ComboBox::from_label("kind")
        .selected_text(match s.map_kind.as_str() {
            "channel" => "one channel",
            "pca" => "PCA to RGB",
            _ => "token L2 norm",
        })
        .show_ui(ui, |ui| {
            ui.selectable_value(&mut s.map_kind, "norm".to_string(), "token L2 norm");
            ui.selectable_value(&mut s.map_kind, "channel".to_string(), "one channel");
            ui.selectable_value(&mut s.map_kind, "pca".to_string(), "PCA to RGB");
        });
    if s.map_kind == "channel" {
        ui.horizontal(|ui| {
            labelled_drag(
                ui,
                "channel",
                egui::DragValue::new(&mut s.channel).range(0..=4095),
            );
        });
        if let Some(shown) = &bench.shown {
            let stage = s
                .focus_stage
                .min(shown.outputs.stages.len().saturating_sub(1));
            if let Ok(ranked) = analysis::rank_channels(&shown.outputs, stage) {
                ui.small(format!("strongest in stage {} (by mean):", stage));
                ui.horizontal_wrapped(|ui| {
                    for (ch, mean) in ranked.iter().take(8) {
                        if ui.small_button(format!("{ch} ({mean:.2})")).clicked() {
                            s.channel = *ch;
                        }
                    }
                });
            }
        }
    }
    egui::ComboBox::from_label("colours")
        .selected_text(s.colormap.clone())
        .show_ui(ui, |ui| {
            for c in ["viridis", "magma", "cividis"] {
                ui.selectable_value(&mut s.colormap, c.to_string(), c);
            }
        });
    ui.checkbox(&mut s.shared_scale, "One scale for all stages");
    ui.checkbox(&mut s.log_scale, "Log scale");
    ui.horizontal(|ui| {
        labelled_drag(
            ui,
            "clip low %",
            egui::DragValue::new(&mut s.clip_low)
                .range(0.0..=49.0)
                .speed(0.1),
        );
        labelled_drag(
            ui,
            "high %",
            egui::DragValue::new(&mut s.clip_high)
                .range(51.0..=100.0)
                .speed(0.1),
        );
    });

    ui.separator();
    ui.heading("Windows");
    ui.checkbox(&mut s.show_regular, "Regular window grid");
    ui.checkbox(&mut s.show_shifted, "Shifted window grid");
    ui.checkbox(&mut s.show_padding, "Hatch padding");
    let max_pair = bench.weights.as_ref().map_or(0, |w| {
        w.model
            .config
            .depths
            .iter()
            .max()
            .copied()
            .unwrap_or(2)
            .saturating_sub(1)
            / 2
    });
    ui.horizontal(|ui| {
        labelled_drag(
            ui,
            "block pair",
            egui::DragValue::new(&mut s.block_pair).range(0..=max_pair),
        );
    });
    ui.small("pair k draws block 2k (regular) and 2k+1 (shifted)");

    ui.separator();
    ui.heading("Lens");
    ui.horizontal(|ui| {
        let last = n_stages.saturating_sub(1);
        labelled_drag(
            ui,
            "lens stage",
            egui::DragValue::new(&mut s.focus_stage).range(0..=last),
        );
    });
    ui.add(egui::Slider::new(&mut s.opacity, 0.0..=1.0).text("map opacity"));
}

/// A number field with a visible name that assistive tools (and the tests) find it by.
fn labelled_drag(ui: &mut egui::Ui, name: &str, value: egui::DragValue<'_>) -> egui::Response {
    let label = ui.label(name);
    ui.add(value).labelled_by(label.id)
}

/// Where a pointer over a picture drawn in `rect` (showing `canvas` input pixels) points, in
/// input-image pixels.
fn to_image_px(rect: Rect, canvas: (f32, f32), pos: Pos2) -> (f32, f32) {
    (
        (pos.x - rect.min.x) / rect.width() * canvas.0,
        (pos.y - rect.min.y) / rect.height() * canvas.1,
    )
}

fn from_image_px(rect: Rect, canvas: (f32, f32), p: (f32, f32)) -> Pos2 {
    Pos2::new(
        rect.min.x + p.0 / canvas.0 * rect.width(),
        rect.min.y + p.1 / canvas.1 * rect.height(),
    )
}

fn crosshair(ui: &egui::Ui, rect: Rect, canvas: (f32, f32), hover: Option<(f32, f32)>) {
    if let Some(p) = hover {
        let c = from_image_px(rect, canvas, p);
        if rect.contains(c) {
            let stroke = Stroke::new(1.0, Color32::from_rgb(255, 60, 160));
            ui.painter().line_segment(
                [Pos2::new(rect.min.x, c.y), Pos2::new(rect.max.x, c.y)],
                stroke,
            );
            ui.painter().line_segment(
                [Pos2::new(c.x, rect.min.y), Pos2::new(c.x, rect.max.y)],
                stroke,
            );
        }
    }
}

pub fn central(bench: &mut Workbench, ui: &mut egui::Ui) {
    egui::CentralPanel::default().show(ui, |ui| {
        let Some(shown) = &bench.shown else {
            ui.centered_and_justified(|ui| {
                ui.label(if bench.is_busy() {
                    "running the backbone…"
                } else {
                    "Open an image (or a folder) and a checkpoint — or drop them here."
                });
            });
            return;
        };
        let geometry = shown.outputs.geometry.clone();
        let (iw, ih) = (geometry.image.1 as f32, geometry.image.0 as f32);
        let mut new_hover = None;

        // The strip: the image, then one panel per stage; reflows on narrow windows.
        ui.label(egui::RichText::new("Stage strip").strong());
        let n = bench.view.stages.len() + 1;
        let avail = ui.available_width();
        let per_row = ((avail / 190.0).floor() as usize).clamp(1, n);
        let cell_w = (avail / per_row as f32 - 8.0).max(80.0);
        let canvases: Vec<(f32, f32)> = std::iter::once((iw, ih))
            .chain(geometry.stages.iter().map(|s| {
                let (h, w) = render::canvas_size(s);
                (w as f32, h as f32)
            }))
            .collect();
        let max_h = canvases
            .iter()
            .map(|c| c.1 / c.0 * cell_w)
            .fold(0.0, f32::max)
            .min(240.0);
        egui::Grid::new("strip").spacing([8.0, 4.0]).show(ui, |ui| {
            for idx in 0..n {
                let canvas = canvases[idx];
                let scale = (cell_w / canvas.0).min(max_h / canvas.1);
                let size = Vec2::new(canvas.0 * scale, canvas.1 * scale);
                ui.vertical(|ui| {
                    let title = if idx == 0 {
                        "image".to_string()
                    } else {
                        format!("stage {}", idx - 1)
                    };
                    ui.small(title.clone());
                    let tex = if idx == 0 {
                        bench.view.image.as_ref()
                    } else {
                        bench.view.stages.get(idx - 1)
                    };
                    if let Some(tex) = tex {
                        let resp = ui
                            .add(egui::Image::new((tex.id(), size)).sense(Sense::click_and_drag()))
                            .on_hover_text_at_pointer(title.clone());
                        if let Some(p) = resp.hover_pos() {
                            new_hover = Some(to_image_px(resp.rect, canvas, p));
                        }
                        let picking = bench.regions.tool == super::regions::Tool::Pick;
                        if resp.clicked() && idx > 0 && picking {
                            bench.settings.focus_stage = idx - 1;
                        }
                        super::regions::interact(bench, &resp, resp.rect, canvas);
                        super::regions::paint(
                            bench,
                            &ui.painter_at(resp.rect),
                            resp.rect,
                            canvas,
                            None,
                        );
                        crosshair(ui, resp.rect, canvas, bench.view.hover);
                    }
                    if idx > 0 {
                        if let Some(tex) = bench.view.legends.get(idx - 1) {
                            let w = size.x.min(240.0);
                            ui.add(egui::Image::new((tex.id(), Vec2::new(w, w / 6.0))));
                        }
                        legend_text(ui, bench.view.prepared.get(idx - 1));
                    }
                });
                if (idx + 1) % per_row == 0 {
                    ui.end_row();
                }
            }
        });

        ui.separator();
        // The lens: one stage large, over the image, with zoom (scroll) and pan (drag).
        let focus = bench
            .settings
            .focus_stage
            .min(geometry.stages.len().saturating_sub(1));
        ui.horizontal(|ui| {
            ui.label(egui::RichText::new(format!("Lens — stage {focus}")).strong());
            if ui.small_button("Fit").clicked() {
                bench.view.zoom = 1.0;
                bench.view.pan = Vec2::ZERO;
            }
            hover_readout(bench, ui);
        });
        let area = ui.available_rect_before_wrap();
        let resp = ui.allocate_rect(area, Sense::click_and_drag());
        if let Some(tex) = bench.view.lens.clone() {
            let (h, w) = render::canvas_size(&geometry.stages[focus]);
            let canvas = (w as f32, h as f32);
            if bench.view.zoom <= 0.0 {
                bench.view.zoom = 1.0;
            }
            if resp.hovered() {
                let scroll = ui.input(|i| i.smooth_scroll_delta.y);
                if scroll != 0.0 {
                    bench.view.zoom = (bench.view.zoom * (1.0 + scroll * 0.002)).clamp(0.2, 40.0);
                }
            }
            let fit = (area.width() / canvas.0).min(area.height() / canvas.1);
            let size = Vec2::new(canvas.0, canvas.1) * fit * bench.view.zoom;
            let rect = Rect::from_center_size(area.center() + bench.view.pan, size);
            // Drawing tools take the drag; picking drags a region, or pans where there is none.
            super::regions::interact(bench, &resp, rect, canvas);
            let picking = bench.regions.tool == super::regions::Tool::Pick;
            if resp.dragged() && picking && !bench.regions.is_grabbing() {
                bench.view.pan += resp.drag_delta();
            }
            let painter = ui.painter_at(area);
            painter.image(
                tex.id(),
                rect,
                Rect::from_min_max(Pos2::ZERO, Pos2::new(1.0, 1.0)),
                Color32::WHITE,
            );
            super::regions::paint(bench, &painter, rect, canvas, Some(focus));
            if let Some(p) = resp.hover_pos() {
                new_hover = Some(to_image_px(rect, canvas, p));
            }
            if let Some(p) = bench.view.hover {
                let c = from_image_px(rect, canvas, p);
                let stroke = Stroke::new(1.0, Color32::from_rgb(255, 60, 160));
                painter.line_segment(
                    [Pos2::new(area.min.x, c.y), Pos2::new(area.max.x, c.y)],
                    stroke,
                );
                painter.line_segment(
                    [Pos2::new(c.x, area.min.y), Pos2::new(c.x, area.max.y)],
                    stroke,
                );
            }
        }
        bench.view.hover = new_hover;
        if !bench.view.announced && !bench.view.stages.is_empty() {
            bench.view.announced = true;
            if let Some(path) = std::env::var_os(READY_FILE_ENV) {
                // Announce after this frame is on screen.
                ui.ctx().request_repaint();
                let _ = std::fs::write(path, b"maps drawn\n");
            }
        }
    });
}

fn legend_text(ui: &mut egui::Ui, st: Option<&PreparedStage>) {
    let Some(st) = st else { return };
    match (&st.range, &st.explained) {
        (Some(r), _) => {
            ui.small(format!(
                "{:.3} … {:.3}{}",
                r.lo,
                r.hi,
                if r.log { " (log)" } else { "" }
            ));
        }
        (None, Some(e)) => {
            let pct: Vec<String> = e.iter().map(|v| format!("{:.0}%", v * 100.0)).collect();
            ui.small(format!("RGB = PC1..3 ({})", pct.join(", ")));
        }
        _ => {}
    }
}

/// What the pointer is over, per stage: token, footprint, value, window, padding.
pub fn hover_lines(bench: &Workbench, p: (f32, f32)) -> Vec<String> {
    let Some(shown) = &bench.shown else {
        return Vec::new();
    };
    let g = &shown.outputs.geometry;
    let (x, y) = (p.0.max(0.0) as usize, p.1.max(0.0) as usize);
    let mut lines = vec![format!(
        "pixel ({x}, {y}){}",
        if x >= g.image.1 || y >= g.image.0 {
            " — padding"
        } else {
            ""
        }
    )];
    for st in &g.stages {
        let (row, col) = (y / st.stride, x / st.stride);
        let (pr, pc) = st.padded();
        if row >= pr || col >= pc {
            continue;
        }
        let pad = row >= st.grid.0 || col >= st.grid.1;
        let value = if pad {
            "padding token".to_string()
        } else {
            match bench.view.raw.get(st.index) {
                Some(Map::Scalar { values, cols, .. }) => {
                    format!("value {:.4}", values[row * cols + col])
                }
                Some(Map::Rgb { values, cols, .. }) => {
                    let v = values[row * cols + col];
                    format!("rgb {:.2} {:.2} {:.2}", v[0], v[1], v[2])
                }
                None => String::new(),
            }
        };
        let pair = (2 * bench.settings.block_pair).min(st.blocks.len().saturating_sub(1));
        let window = st.blocks.get(pair).map(|b| {
            b.window_of(row.min(b.rows.padded - 1), col.min(b.cols.padded - 1))
                .0
        });
        let fp = st.footprint(row, col, g.image);
        lines.push(format!(
            "stage {}: token (row {row}, col {col}), pixels x {}..{} y {}..{}, {value}, window {}",
            st.index,
            fp[2],
            fp[3],
            fp[0],
            fp[1],
            window.map_or("-".into(), |w| w.to_string())
        ));
    }
    lines
}

fn hover_readout(bench: &Workbench, ui: &mut egui::Ui) {
    if let Some(p) = bench.view.hover {
        let lines = hover_lines(bench, p);
        ui.small(lines.join("  |  "));
    }
}

pub fn help_overlay(bench: &mut Workbench, ui: &mut egui::Ui) {
    let mut open = true;
    egui::Window::new("Keys")
        .open(&mut open)
        .collapsible(false)
        .show(ui.ctx(), |ui| {
            egui::Grid::new("keys").striped(true).show(ui, |ui| {
                for (k, what) in SHORTCUTS {
                    ui.monospace(k);
                    ui.label(what);
                    ui.end_row();
                }
            });
            ui.separator();
            ui.small("Drop image files, folders or checkpoints anywhere on the window.");
            ui.small(analysis::CAUTION);
        });
    bench.show_help &= open;
}

pub fn report_window(bench: &mut Workbench, ui: &mut egui::Ui) {
    let mut open = true;
    let text = bench
        .weights
        .as_ref()
        .and_then(|w| w.report.as_ref())
        .map(|r| r.to_string())
        .unwrap_or_default();
    egui::Window::new("Load report")
        .open(&mut open)
        .default_width(640.0)
        .show(ui.ctx(), |ui| {
            egui::ScrollArea::vertical()
                .max_height(500.0)
                .show(ui, |ui| {
                    ui.monospace(text);
                });
        });
    bench.show_report &= open;
}

/// The file names a save of the current view writes.
pub fn export_paths(bench: &Workbench) -> Option<(PathBuf, PathBuf, PathBuf)> {
    let img = bench.image.as_ref()?;
    let stem = img.path.file_stem()?.to_string_lossy().into_owned();
    let dir = if bench.export_dir.trim().is_empty() {
        img.path
            .parent()
            .map(|p| p.to_path_buf())
            .unwrap_or_default()
    } else {
        PathBuf::from(bench.export_dir.trim())
    };
    let id = map_id(bench).replace(':', "-");
    Some((
        dir.join(format!("{stem}.{id}.figure.png")),
        dir.join(format!("{stem}.{id}.stats.json")),
        dir.join(format!("{stem}.{id}.stats.csv")),
    ))
}

/// A copy of a sidecar with every coordinate scaled (for a resized network input).
fn scale_sidecar(sc: &crate::annotation::Sidecar, sx: f64, sy: f64) -> crate::annotation::Sidecar {
    let mut out = sc.clone();
    let p = |q: &mut [f64; 2]| {
        q[0] *= sx;
        q[1] *= sy;
    };
    for r in &mut out.regions {
        match &mut r.shape {
            crate::annotation::Shape::Box { x0, y0, x1, y1 } => {
                *x0 *= sx;
                *x1 *= sx;
                *y0 *= sy;
                *y1 *= sy;
            }
            crate::annotation::Shape::Polygon { points } => points.iter_mut().for_each(p),
        }
    }
    out.pins.iter_mut().for_each(|pin| p(&mut pin.at));
    out
}

/// Save the current view: the figure through the shared renderer at full resolution, and the
/// per-stage statistics as JSON and CSV (scalar maps).
pub fn save_current(bench: &mut Workbench) -> Result<PathBuf> {
    let shown = bench
        .shown
        .as_ref()
        .ok_or_else(|| Error::BadArgument("nothing to save yet".into()))?;
    let (png, json, csv) =
        export_paths(bench).ok_or_else(|| Error::BadArgument("no image open".into()))?;
    let out = &shown.outputs;
    let spec = scale_spec(bench);
    let (raw, stages) = prepare_stages(out, &map_id(bench), &spec)?;
    let ih = shown.input.height();
    let scale = if ih >= 256 {
        1.0
    } else {
        256u32.div_ceil(ih.max(1)) as f32
    };
    let checkpoint = bench
        .weights
        .as_ref()
        .map_or_else(String::new, |w| w.name.clone());
    let kind = parse_map_kind(&map_id(bench))?;
    // Regions are marked in image pixels; with a resizing input policy they are scaled along.
    let (iw, ih) = bench
        .image
        .as_ref()
        .map_or((1, 1), |i| i.pixels.dimensions());
    let (mut notes, annotated) = (
        vec![format!(
            "input policy: {}",
            bench.settings.policy.describe()
        )],
        shown.input.clone(),
    );
    let annotated = match &bench.regions.sidecar {
        Some(sc) => {
            let scaled = scale_sidecar(
                sc,
                shown.input.width() as f64 / iw as f64,
                shown.input.height() as f64 / ih as f64,
            );
            let (img, region_notes) = render::annotate_regions(&annotated, &scaled);
            notes.extend(region_notes);
            img
        }
        None => annotated,
    };
    let fig = render::compose_figure(&FigureSpec {
        image: &annotated,
        geometry: &out.geometry,
        stages: &stages,
        style: panel_style(bench, scale),
        checkpoint,
        map_label: kind.label(),
        notes: vec![format!(
            "input policy: {}",
            bench.settings.policy.describe()
        )],
        text_px: 14.0,
    })?;
    crate::io::save_png_atomic(&fig, &png)?;
    if raw.iter().all(|m| m.scalars().is_some()) {
        let stats = analysis::stage_stats(&kind.id(), &raw, &out.geometry)?;
        analysis::write_stats_json(&stats, &json)?;
        analysis::write_stats_csv(&stats, &csv)?;
    }
    Ok(png)
}
