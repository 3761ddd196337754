//! One frame of the window: take in what the threads finished, draw every panel from the
//! state, then apply the actions the panels returned. The eframe glue and the headless tests
//! both drive this.

use super::actions::Action;
use super::canvas::CanvasTools;
use super::panels::controls::Controls;
use super::panels::drift::DriftPanel;
use super::panels::help::Help;
use super::panels::keys::shortcuts;
use super::panels::lens::Lens;
use super::panels::load_report::LoadReportWindow;
use super::panels::messages::MessageLog;
use super::panels::pointer::Pointer;
use super::panels::profiles::ProfilesPanel;
use super::panels::readout::Readout;
use super::panels::region_panel::RegionPanel;
use super::panels::region_table::RegionTable;
use super::panels::sources::{route_drop, SourceBar};
use super::panels::strip::StageStrip;
use super::panels::window_question::WindowQuestionPanel;
use super::settings::Settings;
use super::state::Workbench;
use std::path::PathBuf;

/// The panels' own widget state.
#[derive(Default)]
pub struct Panels {
    pub sources: SourceBar,
    pub messages: MessageLog,
    pub readout: Readout,
    pub controls: Controls,
    pub regions: RegionPanel,
    pub table: RegionTable,
    pub strip: StageStrip,
    pub lens: Lens,
    pub canvas: CanvasTools,
    pub pointer: Pointer,
    pub help: Help,
    pub report: LoadReportWindow,
    pub drift: DriftPanel,
    pub profiles: ProfilesPanel,
    pub window_question: WindowQuestionPanel,
}

/// The whole window: the state and the panels.
pub struct Window {
    pub bench: Workbench,
    pub panels: Panels,
    styled: bool,
}

/// No text in the window is smaller than this (points).
pub const MIN_TEXT: f32 = 11.0;

/// Raise every text style to at least [`MIN_TEXT`].
fn readable_text(ctx: &egui::Context) {
    ctx.all_styles_mut(|style| {
        for font in style.text_styles.values_mut() {
            font.size = font.size.max(MIN_TEXT);
        }
    });
}

impl Window {
    pub fn new(settings: Settings) -> Self {
        Window {
            bench: Workbench::new(settings),
            panels: Panels::default(),
            styled: false,
        }
    }

    /// Draw one frame into `ui`.
    pub fn ui(&mut self, ui: &mut egui::Ui) {
        let ctx = ui.ctx().clone();
        if !self.styled {
            readable_text(&ctx);
            self.styled = true;
        }
        let Window {
            bench, panels: p, ..
        } = self;
        bench.attach(&ctx);
        bench.poll();
        bench.pictures.upload(&ctx);
        let mut actions: Vec<Action> = Vec::new();
        let (dropped, at): (Vec<PathBuf>, Option<egui::Pos2>) = ctx.input(|i| {
            (
                i.raw
                    .dropped_files
                    .iter()
                    .map(|f| f.path().to_path_buf())
                    .filter(|p| !p.as_os_str().is_empty())
                    .collect(),
                i.pointer.latest_pos(),
            )
        });
        // Files dropped on the base slot (as it was drawn last frame) become the base (A).
        let over_base = at
            .zip(p.sources.base_zone)
            .is_some_and(|(pos, zone)| zone.expand(6.0).contains(pos));
        actions.extend(route_drop(dropped, over_base));
        let b: &Workbench = bench;
        actions.extend(shortcuts(ui, b, &mut p.canvas, &mut p.lens));
        actions.extend(p.sources.ui(ui, b));
        actions.extend(p.messages.ui(ui, b));
        actions.extend(p.readout.ui(ui, b, &p.pointer));
        actions.extend(p.controls.ui(ui, b));
        egui::Panel::right("regions")
            .resizable(true)
            .default_size(360.0)
            .show(ui, |ui| {
                egui::ScrollArea::vertical().show(ui, |ui| {
                    actions.extend(p.regions.ui(ui, b, &mut p.canvas));
                    actions.extend(p.table.ui(ui, b));
                });
            });
        egui::CentralPanel::default().show(ui, |ui| {
            // The strip takes at most a little under half the height (scrolling when it needs
            // more); the lens takes what is left.
            // Comparing, the strip holds three rows (A, B, difference) and takes more.
            let share = match (b.comparing(), ui.available_height() < 560.0) {
                (true, true) => 0.64,
                (true, false) => 0.58,
                (false, _) => 0.45,
            };
            let strip_h = (ui.available_height() * share).clamp(120.0, 620.0);
            p.strip.max_height = strip_h;
            egui::ScrollArea::vertical()
                .id_salt("strip")
                .max_height(strip_h)
                .show(ui, |ui| {
                    actions.extend(p.strip.ui(ui, b, &mut p.canvas, &mut p.pointer));
                });
            if b.pictures.textures.is_some() {
                ui.separator();
                actions.extend(p.lens.ui(ui, b, &mut p.canvas, &mut p.pointer));
            }
        });
        if b.show_help {
            actions.extend(p.help.ui(ui, true));
        }
        if b.show_report {
            actions.extend(p.report.ui(ui, b));
        }
        actions.extend(p.window_question.ui(ui, b));
        if b.show_drift {
            actions.extend(p.drift.ui(ui, b));
        }
        if b.show_profiles {
            actions.extend(p.profiles.ui(ui, b));
        }
        p.pointer.end_frame();
        for a in actions {
            bench.apply(a);
        }
        bench.refresh();
        if bench.is_working() {
            ctx.request_repaint_after(std::time::Duration::from_millis(50));
        }
    }
}
