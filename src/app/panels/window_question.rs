//! The question the window asks when a Swin V2 checkpoint does not state its window: its
//! tensors do not record it (the position bias is made by a small network for any window) and
//! no `config.json` sits beside it. The user types the window (and the window it was pretrained
//! at, when it was fine-tuned at another) and the checkpoint opens again with them.

use crate::app::actions::Action;
use crate::app::loading::Slot;
use crate::app::state::Workbench;

pub struct WindowQuestionPanel {
    pub window: usize,
    /// The window the checkpoint was pretrained at; 0: the same as `window`.
    pub trained: usize,
}

impl Default for WindowQuestionPanel {
    fn default() -> Self {
        // The published V2 checkpoints' smallest window (Liu et al. 2022, Table 2; from memory).
        WindowQuestionPanel {
            window: 8,
            trained: 0,
        }
    }
}

impl WindowQuestionPanel {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let Some(q) = &bench.window_question else {
            return Vec::new();
        };
        let mut out = Vec::new();
        let which = match q.slot {
            Slot::Main => "checkpoint",
            Slot::Base => "base (A)",
        };
        egui::Window::new("Window size needed")
            .collapsible(false)
            .resizable(false)
            .default_pos(ui.ctx().content_rect().center() - egui::vec2(200.0, 80.0))
            .show(ui.ctx(), |ui| {
                ui.label(format!(
                    "{which} {}: a Swin V2 checkpoint does not record its window size, and no \
                     config.json sits beside it. The model card or training config names it \
                     (for example \"window8\" or \"window12to16\").",
                    crate::io::file_name(&q.path)
                ));
                ui.horizontal(|ui| {
                    ui.label("window");
                    ui.add(egui::DragValue::new(&mut self.window).range(1..=64))
                        .on_hover_text("tokens per window side");
                    ui.label("pretrained at");
                    ui.add(egui::DragValue::new(&mut self.trained).range(0..=64))
                        .on_hover_text(
                            "the window it was pretrained with, when fine-tuned at another; \
                             0: the same",
                        );
                });
                ui.horizontal(|ui| {
                    if ui.button("Open with this window").clicked() {
                        out.push(Action::OpenWithWindow {
                            path: q.path.clone(),
                            base: q.slot == Slot::Base,
                            window: self.window,
                            trained: self.trained,
                        });
                    }
                    if ui.button("Not now").clicked() {
                        out.push(Action::DismissWindowQuestion);
                    }
                });
            });
        out
    }
}
