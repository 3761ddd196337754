//! The help window: the keys, dropping files, and the caution about what maps show.

use crate::analysis::CAUTION;
use crate::app::actions::Action;

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

#[derive(Default)]
pub struct Help;

impl Help {
    pub fn ui(&mut self, ui: &mut egui::Ui, open: bool) -> Vec<Action> {
        let mut still_open = open;
        egui::Window::new("Keys")
            .open(&mut still_open)
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
                ui.small(CAUTION);
            });
        if open && !still_open {
            vec![Action::ToggleHelp]
        } else {
            Vec::new()
        }
    }
}
