//! The regions panel on the right: the drawing tools, where region files are kept, undo and
//! redo, the label list with colours, and the selected region's label and note. Notes are saved
//! as they are typed (one undo step per note).

use crate::app::actions::{Action, RegionEdit};
use crate::app::canvas::{CanvasTools, Tool};
use crate::app::state::Workbench;

#[derive(Default)]
pub struct RegionPanel {
    pub new_label: String,
    /// The sidecar-folder field as typed.
    pub folder: Option<String>,
    /// The note being edited: (region id, text).
    note: Option<(u64, String)>,
}

impl RegionPanel {
    pub fn ui(
        &mut self,
        ui: &mut egui::Ui,
        bench: &Workbench,
        canvas: &mut CanvasTools,
    ) -> Vec<Action> {
        let mut out = Vec::new();
        ui.heading("Regions");
        let Some(sc) = &bench.regions.sidecar else {
            ui.label("Open an image to mark regions.");
            return out;
        };
        ui.horizontal_wrapped(|ui| {
            let t = &mut canvas.tool;
            ui.selectable_value(t, Tool::Pick, "Pick");
            ui.selectable_value(t, Tool::Box, "Box");
            ui.selectable_value(t, Tool::Polygon, "Polygon");
            ui.selectable_value(t, Tool::Pin, "Pin note");
        });
        if canvas.tool == Tool::Polygon {
            ui.horizontal(|ui| {
                ui.small(format!("{} vertices — double-click or", canvas.draft.len()));
                if ui.small_button("Close polygon").clicked() {
                    out.extend(canvas.finish_polygon());
                }
            });
        }
        if canvas.tool == Tool::Pin {
            ui.horizontal(|ui| {
                let l = ui.label("note text");
                ui.text_edit_singleline(&mut canvas.pin_text)
                    .labelled_by(l.id);
            });
        }
        ui.horizontal(|ui| {
            let folder = self
                .folder
                .get_or_insert_with(|| bench.regions.project_dir.clone());
            let l = ui.label("Region files in");
            let r = ui
                .add(
                    egui::TextEdit::singleline(folder)
                        .hint_text("next to each image")
                        .desired_width(150.0),
                )
                .labelled_by(l.id);
            if r.changed() {
                out.push(Action::SetSidecarFolder(folder.clone()));
            }
        });
        ui.small("(applies from the next image opened)");
        let mut show = bench.settings.show_regions;
        if ui.checkbox(&mut show, "Show region outlines").changed() {
            let mut s = bench.settings.clone();
            s.show_regions = show;
            out.push(Action::SetSettings(Box::new(s)));
        }
        ui.horizontal(|ui| {
            if ui
                .add_enabled(bench.regions.edits.can_undo(), egui::Button::new("Undo"))
                .clicked()
            {
                out.push(Action::Undo);
            }
            if ui
                .add_enabled(bench.regions.edits.can_redo(), egui::Button::new("Redo"))
                .clicked()
            {
                out.push(Action::Redo);
            }
        });

        ui.separator();
        ui.strong("Labels");
        for l in &sc.labels {
            ui.horizontal(|ui| {
                let mut rgb = l.colour;
                if ui.color_edit_button_srgb(&mut rgb).changed() {
                    out.push(Action::Region(RegionEdit::Recolour {
                        label: l.name.clone(),
                        colour: rgb,
                    }));
                }
                let current = bench.regions.label == l.name;
                if ui.selectable_label(current, &l.name).clicked() {
                    out.push(Action::ChooseLabel(l.name.clone()));
                }
            });
        }
        ui.horizontal(|ui| {
            let l = ui.label("New label");
            ui.add(egui::TextEdit::singleline(&mut self.new_label).desired_width(120.0))
                .labelled_by(l.id);
            if ui.button("Add label").clicked() {
                let name = self.new_label.trim().to_string();
                if !name.is_empty() {
                    out.push(Action::Region(RegionEdit::DefineLabel(name)));
                    self.new_label.clear();
                }
            }
        });
        ui.small(format!("new regions get: {}", bench.regions.label));

        ui.separator();
        let selected = bench.regions.selected.and_then(|id| sc.region(id));
        let Some(r) = selected else {
            self.note = None;
            ui.small("Pick a region to edit its label and note.");
            return out;
        };
        ui.strong(format!("Selected: {} #{}", r.label, r.id));
        let mut label = r.label.clone();
        egui::ComboBox::from_label("region label")
            .selected_text(label.clone())
            .show_ui(ui, |ui| {
                for l in &sc.labels {
                    ui.selectable_value(&mut label, l.name.clone(), &l.name);
                }
            });
        if label != r.label {
            out.push(Action::Region(RegionEdit::Relabel { id: r.id, label }));
        }
        if self.note.as_ref().is_none_or(|n| n.0 != r.id) {
            self.note = Some((r.id, r.note.clone()));
        }
        let note = &mut self.note.as_mut().expect("set above").1;
        let l = ui.label("region note");
        if ui.text_edit_multiline(note).labelled_by(l.id).changed() {
            out.push(Action::Region(RegionEdit::Note {
                id: r.id,
                note: note.clone(),
            }));
        }
        if ui.button("Delete region").clicked() {
            out.push(Action::Region(RegionEdit::Remove(r.id)));
        }
        out
    }
}
