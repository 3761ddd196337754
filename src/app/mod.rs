//! The desktop window: images and a checkpoint in, every stage's response side by side with the
//! windows the model really used, a large lens on one stage, and saved figures.
//!
//! The window never runs the model: a request goes to a [`Job`] on a worker thread (a newer
//! request cancels the pending one), results are cached per (image, checkpoint, input policy),
//! and panels only read them.

pub mod regions;
pub mod settings;
mod view;

use crate::engine::input;
use crate::engine::worker::{Event, Job};
use crate::engine::{
    Backbone, Checkpoint, Config, ConfigOverride, ForwardOptions, LoadReport, Progress,
    StageOutputs,
};
use crate::error::{Error, Result};
use settings::Settings;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::mpsc::{channel, Receiver, Sender};
use std::sync::Arc;

use crate::io::{has_extension, IMAGE_EXTENSIONS, WEIGHT_EXTENSIONS};

/// A loaded checkpoint.
pub struct LoadedWeights {
    pub name: String,
    pub path: Option<PathBuf>,
    pub model: Arc<Backbone>,
    pub report: Option<LoadReport>,
    /// Random weights (no learned structure): said so on screen.
    pub random: bool,
}

/// One decoded image in the list.
pub struct LoadedImage {
    pub path: PathBuf,
    pub pixels: image::RgbImage,
}

#[derive(Clone, Debug, PartialEq)]
pub enum Level {
    Info,
    Error,
}

/// A line in the message area.
#[derive(Clone, Debug)]
pub struct Message {
    pub level: Level,
    pub text: String,
}

/// The result the panels draw: the input actually fed and the stage outputs.
pub struct Shown {
    pub key: String,
    pub input: image::RgbImage,
    pub outputs: Arc<StageOutputs>,
}

/// A running request.
struct Pending {
    key: String,
    input: image::RgbImage,
    job: Job,
    progress: Option<Progress>,
}

/// Things the file dialogs and other threads hand back.
enum Incoming {
    Images(Vec<PathBuf>),
    Weights(PathBuf),
}

/// The whole window's state.
pub struct Workbench {
    pub settings: Settings,
    pub images: Vec<PathBuf>,
    pub current: usize,
    pub image: Option<LoadedImage>,
    pub weights: Option<LoadedWeights>,
    pub shown: Option<Shown>,
    pub messages: Vec<Message>,
    pub typed_path: String,
    pub show_help: bool,
    pub show_report: bool,
    /// Where "Save figure" writes; empty = next to the image.
    pub export_dir: String,
    pending: Option<Pending>,
    cache: HashMap<String, Arc<StageOutputs>>,
    cache_order: Vec<String>,
    incoming_tx: Sender<Incoming>,
    incoming_rx: Receiver<Incoming>,
    repaint: Option<egui::Context>,
    view: view::ViewState,
    pub regions: regions::RegionsState,
}

/// How many results the cache keeps.
const CACHE_SIZE: usize = 12;

impl Workbench {
    pub fn new(settings: Settings) -> Self {
        let (incoming_tx, incoming_rx) = channel();
        Workbench {
            settings,
            images: Vec::new(),
            current: 0,
            image: None,
            weights: None,
            shown: None,
            messages: Vec::new(),
            typed_path: String::new(),
            show_help: false,
            show_report: false,
            export_dir: String::new(),
            pending: None,
            cache: HashMap::new(),
            cache_order: Vec::new(),
            incoming_tx,
            incoming_rx,
            repaint: None,
            view: view::ViewState::default(),
            regions: regions::RegionsState::default(),
        }
    }

    pub fn info(&mut self, text: impl Into<String>) {
        self.messages.push(Message {
            level: Level::Info,
            text: text.into(),
        });
    }

    pub fn error(&mut self, e: impl std::fmt::Display) {
        self.messages.push(Message {
            level: Level::Error,
            text: e.to_string(),
        });
    }

    /// Replace the image list (files, or the images inside given folders) and show the first.
    pub fn open_images(&mut self, paths: &[PathBuf]) {
        let mut list = Vec::new();
        for p in paths {
            if p.is_dir() {
                match std::fs::read_dir(p) {
                    Ok(rd) => {
                        let mut inside: Vec<PathBuf> = rd
                            .filter_map(|e| e.ok().map(|e| e.path()))
                            .filter(|q| q.is_file() && has_extension(q, &IMAGE_EXTENSIONS))
                            .collect();
                        inside.sort();
                        if inside.is_empty() {
                            self.error(format!("{}: no images in this folder", p.display()));
                        }
                        list.extend(inside);
                    }
                    Err(e) => self.error(Error::io(p, e)),
                }
            } else {
                list.push(p.clone());
            }
        }
        if list.is_empty() {
            return;
        }
        self.images = list;
        self.select(0);
    }

    /// Show image `i` of the list.
    pub fn select(&mut self, i: usize) {
        let Some(path) = self.images.get(i).cloned() else {
            return;
        };
        self.current = i;
        match input::load_image(&path) {
            Ok(pixels) => {
                Settings::remember(&mut self.settings.recent_images, &path);
                self.open_regions(&path, pixels.dimensions());
                self.image = Some(LoadedImage { path, pixels });
                self.request();
            }
            Err(e) => {
                self.image = None;
                self.shown = None;
                self.error(e);
            }
        }
    }

    pub fn next_image(&mut self) {
        if !self.images.is_empty() {
            self.select((self.current + 1) % self.images.len());
        }
    }

    pub fn previous_image(&mut self) {
        if !self.images.is_empty() {
            self.select((self.current + self.images.len() - 1) % self.images.len());
        }
    }

    /// Load a checkpoint file; on failure the previous one stays.
    pub fn open_weights(&mut self, path: &Path) {
        let loaded = Checkpoint::open(path).and_then(|ckpt| {
            let model = Backbone::from_checkpoint(&ckpt, &ConfigOverride::default())?;
            let report = LoadReport::new(&ckpt, &model);
            Ok((model, report))
        });
        match loaded {
            Ok((model, report)) => {
                Settings::remember(&mut self.settings.recent_weights, path);
                let name = path.file_name().map_or_else(
                    || path.display().to_string(),
                    |n| n.to_string_lossy().into_owned(),
                );
                self.info(format!(
                    "loaded {name}: {} layout, depths {:?}",
                    report.layout, model.config.depths
                ));
                self.weights = Some(LoadedWeights {
                    name,
                    path: Some(path.to_path_buf()),
                    model: Arc::new(model),
                    report: Some(report),
                    random: false,
                });
                self.settings.focus_stage = self
                    .settings
                    .focus_stage
                    .min(self.n_stages().saturating_sub(1));
                self.request();
            }
            Err(e) => self.error(e),
        }
    }

    /// A small randomly initialised model, for when no checkpoint is at hand.
    pub fn use_random_weights(&mut self) {
        let config = Config {
            embed_dim: 32,
            heads: vec![1, 2, 4, 8],
            ..Config::tiny()
        };
        match Backbone::random(config, 7) {
            Ok(model) => {
                self.weights = Some(LoadedWeights {
                    name: "random weights (no learned structure)".into(),
                    path: None,
                    model: Arc::new(model),
                    report: None,
                    random: true,
                });
                self.request();
            }
            Err(e) => self.error(e),
        }
    }

    /// Route dropped or typed paths by their file ending.
    pub fn open_paths(&mut self, paths: &[PathBuf]) {
        let (weights, images): (Vec<_>, Vec<_>) = paths
            .iter()
            .cloned()
            .partition(|p| has_extension(p, &WEIGHT_EXTENSIONS));
        if let Some(w) = weights.last() {
            self.open_weights(w);
        }
        let (images, unknown): (Vec<_>, Vec<_>) = images
            .into_iter()
            .partition(|p| p.is_dir() || has_extension(p, &IMAGE_EXTENSIONS));
        for u in unknown {
            self.error(format!(
                "{}: neither an image nor a checkpoint (by its file ending)",
                u.display()
            ));
        }
        if !images.is_empty() {
            self.open_images(&images);
        }
    }

    pub fn n_stages(&self) -> usize {
        self.weights
            .as_ref()
            .map_or(0, |w| w.model.config.n_stages())
    }

    fn cache_key(&self) -> Option<String> {
        let img = self.image.as_ref()?;
        let w = self.weights.as_ref()?;
        let weights_id = w
            .path
            .as_ref()
            .map_or_else(|| w.name.clone(), |p| p.display().to_string());
        Some(format!(
            "{}|{}|{:?}|{:?}",
            img.path.display(),
            weights_id,
            self.settings.policy,
            self.settings.norm
        ))
    }

    /// The network input for the current image under the current policy.
    pub fn prepared_input(&self) -> Option<image::RgbImage> {
        let img = &self.image.as_ref()?.pixels;
        let (w, h) = self.settings.policy.target(img.width(), img.height());
        Some(if (w, h) == img.dimensions() {
            img.clone()
        } else {
            image::imageops::resize(img, w, h, image::imageops::FilterType::Triangle)
        })
    }

    /// Ask for the current image and checkpoint; served from the cache or a new worker job.
    /// A newer request cancels the pending one.
    pub fn request(&mut self) {
        let Some(key) = self.cache_key() else { return };
        if self.shown.as_ref().is_some_and(|s| s.key == key) {
            return;
        }
        let Some(input) = self.prepared_input() else {
            return;
        };
        if let Some(outputs) = self.cache.get(&key).cloned() {
            self.cancel_pending();
            self.shown = Some(Shown {
                key,
                input,
                outputs,
            });
            self.view.invalidate();
            return;
        }
        if self.pending.as_ref().is_some_and(|p| p.key == key) {
            return;
        }
        self.cancel_pending();
        let model = self.weights.as_ref().expect("checked").model.clone();
        let limit = 12_000_000_000;
        let (w, h) = input.dimensions();
        if let Err(e) = model.check_memory((h as usize, w as usize), None, limit) {
            self.error(e);
            return;
        }
        let tensor = match self
            .settings
            .norm
            .validate()
            .and_then(|_| input::normalise(&input, &self.settings.norm))
        {
            Ok(t) => t,
            Err(e) => {
                self.error(e);
                return;
            }
        };
        let wake: Option<Box<dyn Fn() + Send + Sync>> = self
            .repaint
            .clone()
            .map(|ctx| Box::new(move || ctx.request_repaint()) as Box<dyn Fn() + Send + Sync>);
        let job = Job::spawn(model, tensor, ForwardOptions::default(), wake);
        self.pending = Some(Pending {
            key,
            input,
            job,
            progress: None,
        });
    }

    /// Stop the running request, if any.
    pub fn cancel_pending(&mut self) {
        if let Some(p) = self.pending.take() {
            p.job.cancel();
        }
    }

    pub fn is_busy(&self) -> bool {
        self.pending.is_some()
    }

    pub fn progress(&self) -> Option<Progress> {
        self.pending.as_ref().and_then(|p| p.progress)
    }

    /// Take in worker events and dialog results; call once per frame.
    pub fn poll(&mut self) {
        while let Ok(incoming) = self.incoming_rx.try_recv() {
            match incoming {
                Incoming::Images(paths) => self.open_images(&paths),
                Incoming::Weights(path) => self.open_weights(&path),
            }
        }
        let mut finished = None;
        if let Some(p) = &mut self.pending {
            while let Some(ev) = p.job.poll() {
                match ev {
                    Event::Progress(pr) => p.progress = Some(pr),
                    Event::Finished(r) => {
                        finished = Some(r);
                        break;
                    }
                }
            }
        }
        if let Some(result) = finished {
            let p = self.pending.take().expect("pending");
            match result {
                Ok(outputs) => {
                    self.cache.insert(p.key.clone(), outputs.clone());
                    self.cache_order.retain(|k| k != &p.key);
                    self.cache_order.push(p.key.clone());
                    while self.cache_order.len() > CACHE_SIZE {
                        let old = self.cache_order.remove(0);
                        self.cache.remove(&old);
                    }
                    self.shown = Some(Shown {
                        key: p.key,
                        input: p.input,
                        outputs,
                    });
                    self.view.invalidate();
                }
                Err(Error::Cancelled) => self.info("run cancelled"),
                Err(e) => self.error(e),
            }
        }
    }

    /// Block until the pending run has finished (tests and the headless figure path).
    pub fn wait_for_result(&mut self, timeout: std::time::Duration) -> bool {
        let start = std::time::Instant::now();
        while self.pending.is_some() && start.elapsed() < timeout {
            self.poll();
            std::thread::sleep(std::time::Duration::from_millis(5));
        }
        self.poll();
        self.pending.is_none()
    }

    /// Native dialogs run on their own thread so the window keeps drawing.
    fn pick_in_background(&self, weights: bool, folder: bool) {
        let tx = self.incoming_tx.clone();
        let ctx = self.repaint.clone();
        std::thread::spawn(move || {
            let dialog = rfd::FileDialog::new();
            let msg = if weights {
                dialog
                    .add_filter("checkpoint", &WEIGHT_EXTENSIONS)
                    .pick_file()
                    .map(Incoming::Weights)
            } else if folder {
                dialog.pick_folder().map(|p| Incoming::Images(vec![p]))
            } else {
                dialog
                    .add_filter("image", &IMAGE_EXTENSIONS)
                    .pick_files()
                    .map(Incoming::Images)
            };
            if let Some(m) = msg {
                let _ = tx.send(m);
                if let Some(c) = ctx {
                    c.request_repaint();
                }
            }
        });
    }

    /// The whole window, drawn into `ui` (eframe and the headless tests both call this).
    pub fn ui(&mut self, ui: &mut egui::Ui) {
        if self.repaint.is_none() {
            self.repaint = Some(ui.ctx().clone());
        }
        self.poll();
        let dropped: Vec<PathBuf> = ui.ctx().input(|i| {
            i.raw
                .dropped_files
                .iter()
                .map(|f| f.path().to_path_buf())
                .filter(|p| !p.as_os_str().is_empty())
                .collect()
        });
        if !dropped.is_empty() {
            self.open_paths(&dropped);
        }
        view::shortcuts(self, ui);
        view::refresh(self, ui.ctx());
        self.refresh_region_stats();
        view::top_bar(self, ui);
        view::message_area(self, ui);
        view::side_controls(self, ui);
        regions::panel(self, ui);
        view::central(self, ui);
        if self.show_help {
            view::help_overlay(self, ui);
        }
        if self.show_report {
            view::report_window(self, ui);
        }
        if self.is_busy() {
            ui.ctx()
                .request_repaint_after(std::time::Duration::from_millis(50));
        }
    }

    /// The raw (unscaled) maps of the current result, one per stage.
    pub fn view_raw_maps(&self) -> Vec<crate::analysis::Map> {
        self.view.raw_maps().to_vec()
    }

    /// Save the current view as an annotated PNG and the per-stage stats beside it.
    pub fn save_figure(&mut self) -> Option<PathBuf> {
        match view::save_current(self) {
            Ok(path) => {
                self.info(format!("saved {}", path.display()));
                Some(path)
            }
            Err(e) => {
                self.error(e);
                None
            }
        }
    }
}

/// eframe glue: settings persist through eframe storage.
struct WindowApp {
    bench: Workbench,
}

impl eframe::App for WindowApp {
    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut eframe::Frame) {
        self.bench.ui(ui);
    }

    fn save(&mut self, storage: &mut dyn eframe::Storage) {
        eframe::set_value(storage, eframe::APP_KEY, &self.bench.settings);
    }
}

/// Open the window on `images` with `weights` (or random weights, said so on screen).
pub fn run(images: Vec<PathBuf>, weights: Option<PathBuf>) -> Result<()> {
    let options = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default()
            .with_inner_size([1400.0, 900.0])
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
            let mut bench = Workbench::new(settings);
            bench.repaint = Some(cc.egui_ctx.clone());
            match &weights {
                Some(w) => bench.open_weights(w),
                None => bench.use_random_weights(),
            }
            if bench.weights.is_none() {
                bench.use_random_weights();
            }
            bench.open_paths(&images);
            Ok(Box::new(WindowApp { bench }))
        }),
    )
    .map_err(|e| Error::Internal(format!("cannot open the window: {e}")))
}

/// The bundled demo: sample images and the demo checkpoint when present.
pub fn demo_inputs() -> (Vec<PathBuf>, Option<PathBuf>) {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-data");
    let weights = root.join("demo.safetensors");
    (vec![root], weights.exists().then_some(weights))
}
