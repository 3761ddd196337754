//! The desktop window: images and a checkpoint in, every stage's response side by side with the
//! windows the model really used, a large lens on one stage, labelled regions with their
//! numbers, and saved figures.
//!
//! `state` holds everything and changes only through `Workbench::apply`; `panels/` draw from it
//! and return `actions`; `window` runs a frame; `loading`, `pictures` and `export` keep the heavy
//! work (decoding, loading checkpoints, maps and pictures, saving) off the GUI thread, and the
//! engine's worker runs the model.

pub mod actions;
pub mod canvas;
pub mod export;
pub mod inspector;
pub mod loading;
pub mod overlay;
pub mod panels;
pub mod pictures;
pub mod region_doc;
pub mod settings;
pub mod state;
pub mod window;

pub use state::Workbench;
pub use window::Window;

use crate::error::{Error, Result};
use settings::Settings;
use std::path::{Path, PathBuf};

/// eframe glue: settings persist through eframe storage.
struct WindowApp {
    window: Window,
}

impl eframe::App for WindowApp {
    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut eframe::Frame) {
        self.window.ui(ui);
    }

    fn save(&mut self, storage: &mut dyn eframe::Storage) {
        eframe::set_value(storage, eframe::APP_KEY, &self.window.bench.settings);
    }
}

/// The window's size when none is asked for, in points.
pub const DEFAULT_SIZE: (f32, f32) = (1400.0, 900.0);

/// What the window opens with.
#[derive(Clone, Debug, Default)]
pub struct Opening {
    pub images: Vec<PathBuf>,
    /// The checkpoint (B when a base is given); random weights, said so on screen, when none.
    pub weights: Option<PathBuf>,
    /// A checkpoint to compare with (A).
    pub base: Option<PathBuf>,
    /// Shape overrides for those checkpoints (`--config`, `--base-config`).
    pub overrides: Vec<(PathBuf, crate::engine::ConfigOverride)>,
}

/// Open the window on `open`, at `size` points (default [`DEFAULT_SIZE`]).
pub fn run(open: Opening, size: Option<(f32, f32)>) -> Result<()> {
    let Opening {
        images,
        weights,
        base,
        overrides,
    } = open;
    let (w, h) = size.unwrap_or(DEFAULT_SIZE);
    let options = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default()
            .with_inner_size([w, h])
            .with_title("Mullion"),
        ..Default::default()
    };
    eframe::run_native(
        "Mullion",
        options,
        Box::new(move |cc| {
            let settings: Settings = cc
                .storage
                .and_then(|s| eframe::get_value(s, eframe::APP_KEY))
                .unwrap_or_default();
            let mut window = Window::new(settings);
            window.bench.attach(&cc.egui_ctx);
            window.bench.shape_overrides = overrides;
            match &weights {
                Some(w) => {
                    window.bench.random_if_weights_fail = true;
                    window.bench.open_weights(w)
                }
                None => window.bench.use_random_weights(),
            }
            if let Some(b) = &base {
                window.bench.open_base(b);
            }
            window.bench.open_paths(&images);
            Ok(Box::new(WindowApp { window }))
        }),
    )
    .map_err(|e| Error::Internal(format!("cannot open the window: {e}")))
}

/// The bundled demo: the sample images, the final demo checkpoint (B) and, to compare it
/// with, the early one it was trained from (A), when present.
pub fn demo_inputs() -> Opening {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-data");
    let weights = root.join("demo.safetensors");
    let base = root.join("demo-early.safetensors");
    let has_weights = weights.exists();
    Opening {
        images: vec![root],
        weights: has_weights.then_some(weights),
        base: (has_weights && base.exists()).then_some(base),
        overrides: Vec::new(),
    }
}
