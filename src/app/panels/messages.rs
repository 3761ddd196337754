//! The message log along the bottom: collapsible, capped, newest last.

use crate::app::actions::Action;
use crate::app::state::{Level, Workbench};
use egui::Color32;

pub struct MessageLog {
    pub open: bool,
}

impl Default for MessageLog {
    fn default() -> Self {
        MessageLog { open: true }
    }
}

impl MessageLog {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let mut out = Vec::new();
        egui::Panel::bottom("messages")
            .resizable(self.open)
            .default_size(70.0)
            .max_size(220.0)
            .show(ui, |ui| {
                ui.horizontal(|ui| {
                    let what = if self.open { "Hide" } else { "Show" };
                    if ui
                        .small_button(format!("{what} messages ({})", bench.messages.len()))
                        .clicked()
                    {
                        self.open ^= true;
                    }
                    if ui.small_button("Clear").clicked() {
                        out.push(Action::ClearMessages);
                    }
                    if !self.open {
                        if let Some(last) = bench.messages.last() {
                            ui.small(&last.text);
                        }
                    }
                });
                if self.open {
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
                }
            });
        out
    }
}
