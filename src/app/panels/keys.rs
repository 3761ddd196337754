//! Keyboard shortcuts (listed in the help window), turned into actions.

use super::lens::Lens;
use crate::app::actions::{Action, RegionEdit};
use crate::app::canvas::CanvasTools;
use crate::app::state::Workbench;
use egui::Key;

pub fn shortcuts(
    ui: &mut egui::Ui,
    bench: &Workbench,
    canvas: &mut CanvasTools,
    lens: &mut Lens,
) -> Vec<Action> {
    let mut out = Vec::new();
    if ui.ctx().egui_wants_keyboard_input() {
        return out;
    }
    let pressed = |k: Key| ui.input(|i| i.key_pressed(k));
    let ctrl = ui.input(|i| i.modifiers.command);
    if pressed(Key::N) {
        out.push(Action::NextImage);
    }
    if pressed(Key::B) {
        out.push(Action::PreviousImage);
    }
    let digits = [
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
    for (i, k) in digits.iter().enumerate() {
        if pressed(*k) && i < bench.n_stages() {
            out.push(Action::FocusStage(i));
        }
    }
    let mut s = bench.settings.clone();
    if pressed(Key::W) {
        s.show_regular ^= true;
    }
    if pressed(Key::Q) {
        s.show_shifted ^= true;
    }
    if pressed(Key::X) {
        s.show_padding ^= true;
    }
    if pressed(Key::K) {
        s.map_kind = match s.map_kind.as_str() {
            "norm" => "channel",
            "channel" => "pca",
            _ => "norm",
        }
        .into();
    }
    if s != bench.settings {
        out.push(Action::SetSettings(Box::new(s)));
    }
    if pressed(Key::F) {
        lens.fit();
    }
    if ctrl && pressed(Key::S) {
        out.push(Action::SaveFigure);
    }
    if pressed(Key::Escape) {
        out.push(Action::CancelRun);
    }
    if ctrl && pressed(Key::Z) {
        out.push(Action::Undo);
    }
    if ctrl && pressed(Key::Y) {
        out.push(Action::Redo);
    }
    if pressed(Key::Delete) {
        if let Some(id) = bench.regions.selected {
            out.push(Action::Region(RegionEdit::Remove(id)));
        }
    }
    if pressed(Key::Enter) {
        out.extend(canvas.finish_polygon());
    }
    if pressed(Key::F1) {
        out.push(Action::ToggleHelp);
    }
    out
}
