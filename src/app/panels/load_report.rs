//! The load report window: how the checkpoint loaded (layout, shape, tensors used, ignored and
//! missing, padding semantics).

use crate::app::actions::Action;
use crate::app::state::Workbench;

#[derive(Default)]
pub struct LoadReportWindow {
    /// The report as text, made once per checkpoint.
    text: Option<(String, String)>,
}

impl LoadReportWindow {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let Some(w) = &bench.weights else {
            return Vec::new();
        };
        let Some(report) = &w.report else {
            return Vec::new();
        };
        if self.text.as_ref().is_none_or(|t| t.0 != w.name) {
            self.text = Some((w.name.clone(), report.to_string()));
        }
        let text = &self.text.as_ref().expect("set above").1;
        let mut open = true;
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
        if open {
            Vec::new()
        } else {
            vec![Action::ShowLoadReport(false)]
        }
    }
}
