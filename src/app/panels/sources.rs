//! The bar along the top: open images, folders and checkpoints (dialogs, recent files, a typed
//! path), move through the image list, the checkpoint in use, save, help, and the progress of
//! the running forward pass with its cancel button.

use crate::app::actions::{Action, Pick};
use crate::app::state::Workbench;
use egui::Color32;
use std::path::PathBuf;

#[derive(Default)]
pub struct SourceBar {
    /// The path field.
    pub typed_path: String,
    /// The last focus request of the state this bar has honoured.
    focus_seen: u64,
    /// Where the base slot is on screen: checkpoints dropped there become the base (A).
    pub base_zone: Option<egui::Rect>,
}

/// What dropping `paths` asks for: over the base slot, a checkpoint becomes the base (A);
/// anywhere else they open as usual (images, folders, the checkpoint).
pub fn route_drop(paths: Vec<PathBuf>, over_base: bool) -> Vec<Action> {
    if paths.is_empty() {
        return Vec::new();
    }
    if !over_base {
        return vec![Action::OpenPaths(paths)];
    }
    let (weights, rest): (Vec<_>, Vec<_>) = paths.into_iter().partition(|p| {
        crate::io::is_weights_path(p) || crate::engine::folder::is_checkpoint_folder(p)
    });
    let mut out: Vec<Action> = weights.into_iter().take(1).map(Action::OpenBase).collect();
    if !rest.is_empty() {
        out.push(Action::OpenPaths(rest));
    }
    out
}

impl SourceBar {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let mut out = Vec::new();
        egui::Panel::top("sources").show(ui, |ui| {
            ui.horizontal_wrapped(|ui| {
                self.open_buttons(ui, bench, &mut out);
                ui.separator();
                let n = bench.images.len();
                if ui
                    .add_enabled(n > 1, egui::Button::new("< Previous"))
                    .clicked()
                {
                    out.push(Action::PreviousImage);
                }
                if ui.add_enabled(n > 1, egui::Button::new("Next >")).clicked() {
                    out.push(Action::NextImage);
                }
                if let Some(p) = bench.images.get(bench.current) {
                    let name = crate::io::file_name(p);
                    // Whole labels move to the next row rather than break inside.
                    ui.add(
                        egui::Label::new(format!("{name}  ({}/{n})", bench.current + 1)).extend(),
                    );
                }
                ui.separator();
                let b_tag = if bench.base.is_some() { " (B)" } else { "" };
                match &bench.weights {
                    Some(w) if w.random => {
                        ui.add(
                            egui::Label::new(
                                egui::RichText::new(format!(
                                    "RANDOM WEIGHTS{b_tag}: no learned structure"
                                ))
                                .color(Color32::from_rgb(220, 80, 40)),
                            )
                            .extend(),
                        );
                    }
                    Some(w) => {
                        ui.add(egui::Label::new(format!("checkpoint{b_tag}: {}", w.name)).extend());
                    }
                    None => {
                        ui.label("no checkpoint");
                    }
                }
                let has_report = bench.weights.as_ref().is_some_and(|w| w.report.is_some());
                if ui
                    .add_enabled(has_report, egui::Button::new("Load report"))
                    .clicked()
                {
                    out.push(Action::ShowLoadReport(true));
                }
                // The base slot and what follows start a line of their own, so the slot is
                // never squeezed against the window's edge.
                ui.end_row();
                self.base_slot(ui, bench, &mut out);
                ui.separator();
                let can_save = bench.pictures.textures.is_some();
                if ui
                    .add_enabled(can_save, egui::Button::new("Save figure"))
                    .clicked()
                {
                    out.push(Action::SaveFigure);
                }
                if ui.button("Help (F1)").clicked() {
                    out.push(Action::ToggleHelp);
                }
            });
            status_line(ui, bench, &mut out);
        });
        out
    }

    /// The second checkpoint: what it is, open and close it, and its weight drift. Dropping a
    /// checkpoint on it makes that the base.
    fn base_slot(&mut self, ui: &mut egui::Ui, bench: &Workbench, out: &mut Vec<Action>) {
        // One line that never wraps: squeezed at the end of a row, a wrapping label would grow
        // a letter-wide column and push the whole bar down.
        let text = match &bench.base {
            Some(b) => format!("base (A): {}", b.name),
            None => "base (A): none — drop a checkpoint here to compare".into(),
        };
        let zone = ui.scope(|ui| {
            ui.add(egui::Label::new(text).wrap_mode(egui::TextWrapMode::Extend));
        });
        self.base_zone = Some(zone.response.rect);
        if ui.button("Open base (A)…").clicked() {
            out.push(Action::Pick(Pick::Base));
        }
        if bench.base.is_some() {
            if ui.button("Close base").clicked() {
                out.push(Action::CloseBase);
            }
            let drift_ready = bench.drift.is_some() || bench.loader.computing_drift.is_some();
            if ui
                .add_enabled(drift_ready, egui::Button::new("Weight drift"))
                .clicked()
            {
                out.push(Action::ShowDrift(true));
            }
        }
    }

    fn open_buttons(&mut self, ui: &mut egui::Ui, bench: &Workbench, out: &mut Vec<Action>) {
        if ui.button("Open images…").clicked() {
            out.push(Action::Pick(Pick::Images));
        }
        if ui.button("Open folder…").clicked() {
            out.push(Action::Pick(Pick::Folder));
        }
        if ui.button("Open checkpoint…").clicked() {
            out.push(Action::Pick(Pick::Weights));
        }
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
                    ui.horizontal(|ui| {
                        if ui.button(p.display().to_string()).clicked() {
                            out.push(Action::OpenPaths(vec![PathBuf::from(p)]));
                            ui.close();
                        }
                        if what == "checkpoints" && ui.small_button("as base (A)").clicked() {
                            out.push(Action::OpenBase(PathBuf::from(p)));
                            ui.close();
                        }
                    });
                }
            }
        });
        ui.separator();
        let label = ui.label("Path:");
        let field = ui
            .add(
                egui::TextEdit::singleline(&mut self.typed_path)
                    .hint_text("image, folder or checkpoint")
                    .desired_width(260.0),
            )
            .labelled_by(label.id);
        if bench.path_focus_requests != self.focus_seen {
            self.focus_seen = bench.path_focus_requests;
            field.request_focus();
        }
        let enter = field.lost_focus() && ui.input(|i| i.key_pressed(egui::Key::Enter));
        if ui.button("Open path").clicked() || enter {
            out.push(Action::OpenTyped(self.typed_path.clone()));
        }
        if ui.button("Open path as base (A)").clicked() {
            out.push(Action::OpenTypedBase(self.typed_path.clone()));
        }
    }
}

/// What is loading or running, with a cancel button, or why nothing is shown.
fn status_line(ui: &mut egui::Ui, bench: &Workbench, out: &mut Vec<Action>) {
    let mut loading: Vec<String> = [
        &bench.loader.loading_weights,
        &bench.loader.loading_base,
        &bench.loader.loading_image,
    ]
    .into_iter()
    .flatten()
    .map(|p| format!("loading {}…", crate::io::file_name(p)))
    .collect();
    if bench.loader.computing_drift.is_some() {
        loading.push("comparing the weights of A and B…".into());
    }
    if !loading.is_empty() {
        ui.horizontal(|ui| {
            ui.spinner();
            ui.label(loading.join("  "));
        });
    }
    if bench.is_busy() {
        let (main, base) = bench.running();
        let comparing = bench.base.is_some();
        ui.horizontal(|ui| {
            for (running, is_base) in [(main, false), (base, true)] {
                if !running {
                    continue;
                }
                let which = match (comparing, is_base) {
                    (true, false) => "B: ",
                    (_, true) => "base (A): ",
                    _ => "",
                };
                let (frac, text) = match bench.progress_of(is_base) {
                    Some(p) => (
                        p.done as f32 / p.total.max(1) as f32,
                        format!("{which}stage {} — block {}/{}", p.stage, p.done, p.total),
                    ),
                    None => (0.0, format!("{which}preparing the input…")),
                };
                ui.add(egui::ProgressBar::new(frac).text(text).desired_width(300.0));
            }
            let extra = [
                ("second pass", bench.variant_running()),
                ("attention pass", bench.attention_running()),
            ];
            for (what, running) in extra {
                let Some(p) = running else { continue };
                let (frac, text) = match p {
                    Some(p) => (
                        p.done as f32 / p.total.max(1) as f32,
                        format!("{what}: block {}/{}", p.done, p.total),
                    ),
                    None => (0.0, format!("{what}: preparing…")),
                };
                ui.add(egui::ProgressBar::new(frac).text(text).desired_width(220.0));
            }
            if ui.button("Cancel").clicked() {
                out.push(Action::CancelRun);
            }
        });
    } else if let Some(problem) = &bench.run_problem {
        ui.horizontal(|ui| {
            ui.colored_label(Color32::from_rgb(230, 90, 70), problem);
            if ui.button("Run").clicked() {
                out.push(Action::Rerun);
            }
        });
    }
}
