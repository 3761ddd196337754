//! What the window tests share: a window of the usual size driven headlessly (egui_kittest),
//! opening files by typed path, and waiting for every thread the window started.

use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::app::settings::Settings;
use mullion::app::Window;
use std::path::Path;
use std::time::Duration;

/// A new window at 1400x900 points with default settings, two frames drawn.
pub fn harness() -> Harness<'static, Window> {
    let mut h = Harness::builder()
        .with_size(egui::vec2(1400.0, 900.0))
        .build_ui_state(
            |ui, w: &mut Window| w.ui(ui),
            Window::new(Settings::default()),
        );
    h.run_steps(2);
    h
}

/// Let every thread finish, then a few frames to show what they made.
pub fn wait(h: &mut Harness<'_, Window>) {
    for _ in 0..3 {
        assert!(
            h.state_mut().bench.wait_idle(Duration::from_secs(120)),
            "the threads did not finish"
        );
        h.run_steps(2);
    }
}

/// Type `path` into the path field and press `button` ("Open path", "Open path as base (A)"),
/// then wait.
pub fn type_path(h: &mut Harness<'_, Window>, path: &Path, button: &str) {
    h.state_mut().panels.sources.typed_path = path.display().to_string();
    h.run_steps(1);
    h.get_by_label(button).click();
    h.run_steps(2);
    wait(h);
}
