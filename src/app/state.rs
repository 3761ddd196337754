//! The window's state and everything that changes it. Panels read it and return
//! [`Action`]s; [`Workbench::apply`] carries them out. Nothing here draws.
//!
//! Heavy work never runs on the GUI thread: images and checkpoints load on loader threads, the
//! forward pass on the worker (a newer request cancels the pending one), maps and panel pictures
//! on the picture thread, saved figures on an export thread. Results are cached per (image,
//! checkpoint, input policy, normalisation).

use super::actions::{Action, Pick};
use super::export::{export, ExportPaths, ExportRequest, Exported};
use super::loading::{Loaded, Loader, Wake};
use super::pictures::{DrawKey, Pictures};
use super::region_doc::RegionDoc;
use super::settings::Settings;
use crate::engine::input::DEFAULT_MEMORY_LIMIT;
use crate::engine::worker::{Event, Job};
use crate::engine::{Backbone, Config, ForwardOptions, LoadReport, Progress, StageOutputs};
use crate::error::{Error, Result};
use crate::io::{file_name, is_image_path, is_weights_path};
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::mpsc::{channel, Receiver};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// A loaded checkpoint.
pub struct LoadedWeights {
    pub name: String,
    pub path: Option<PathBuf>,
    pub model: Arc<Backbone>,
    pub report: Option<LoadReport>,
    /// Random weights (no learned structure): said so on screen.
    pub random: bool,
}

/// The image on screen, as decoded.
pub struct LoadedImage {
    pub path: PathBuf,
    pub pixels: Arc<image::RgbImage>,
}

#[derive(Clone, Debug, PartialEq)]
pub enum Level {
    Info,
    Error,
}

/// A line in the message log.
#[derive(Clone, Debug)]
pub struct Message {
    pub level: Level,
    pub text: String,
}

/// The message log keeps this many lines.
pub const MESSAGE_CAP: usize = 200;

/// How many results the cache keeps.
const CACHE_SIZE: usize = 12;

/// A forward pass's result: the input actually fed and the stage outputs.
pub struct Shown {
    pub key: String,
    pub input: Arc<image::RgbImage>,
    pub outputs: Arc<StageOutputs>,
}

/// A running forward pass.
struct Pending {
    key: String,
    job: Job,
    input: Option<Arc<image::RgbImage>>,
    progress: Option<Progress>,
}

pub struct Workbench {
    pub settings: Settings,
    pub images: Vec<PathBuf>,
    pub current: usize,
    pub image: Option<LoadedImage>,
    pub weights: Option<LoadedWeights>,
    pub shown: Option<Shown>,
    /// Why there is no result for the current image and checkpoint (a failed or cancelled run).
    pub run_problem: Option<String>,
    pub messages: Vec<Message>,
    pub show_help: bool,
    pub show_report: bool,
    /// Where *Save figure* writes; empty: next to the image.
    pub export_dir: String,
    pub regions: RegionDoc,
    pub pictures: Pictures,
    pub loader: Loader,
    /// The last figure saved from the window.
    pub last_export: Option<Exported>,
    /// Use random weights if the checkpoint being loaded fails and none is loaded (at start).
    pub random_if_weights_fail: bool,
    /// Bumped when the path field should take the keyboard (no file dialog could be shown).
    pub path_focus_requests: u64,
    pending: Option<Pending>,
    exporting: Option<Receiver<Result<Exported>>>,
    cache: HashMap<String, (Arc<image::RgbImage>, Arc<StageOutputs>)>,
    cache_order: Vec<String>,
    repaint: Option<egui::Context>,
}

impl Workbench {
    pub fn new(settings: Settings) -> Self {
        Workbench {
            settings,
            images: Vec::new(),
            current: 0,
            image: None,
            weights: None,
            shown: None,
            run_problem: None,
            messages: Vec::new(),
            show_help: false,
            show_report: false,
            export_dir: String::new(),
            regions: RegionDoc::default(),
            pictures: Pictures::default(),
            loader: Loader::default(),
            last_export: None,
            random_if_weights_fail: false,
            path_focus_requests: 0,
            pending: None,
            exporting: None,
            cache: HashMap::new(),
            cache_order: Vec::new(),
            repaint: None,
        }
    }

    /// Remember the window's context so threads can ask for a repaint when they finish.
    pub fn attach(&mut self, ctx: &egui::Context) {
        if self.repaint.is_none() {
            self.repaint = Some(ctx.clone());
        }
    }

    fn wake(&self) -> Wake {
        self.repaint
            .clone()
            .map(|ctx| Box::new(move || ctx.request_repaint()) as Box<dyn Fn() + Send>)
    }

    fn push(&mut self, level: Level, text: String) {
        self.messages.push(Message { level, text });
        if self.messages.len() > MESSAGE_CAP {
            let extra = self.messages.len() - MESSAGE_CAP;
            self.messages.drain(..extra);
        }
    }

    pub fn info(&mut self, text: impl Into<String>) {
        self.push(Level::Info, text.into());
    }

    pub fn error(&mut self, e: impl std::fmt::Display) {
        self.push(Level::Error, e.to_string());
    }

    // ---- opening -------------------------------------------------------------------------

    /// Route paths by their file ending: checkpoints, images and folders of images.
    pub fn open_paths(&mut self, paths: &[PathBuf]) {
        let (weights, rest): (Vec<_>, Vec<_>) =
            paths.iter().cloned().partition(|p| is_weights_path(p));
        if let Some(w) = weights.last() {
            self.open_weights(w);
        }
        let (images, unknown): (Vec<_>, Vec<_>) = rest
            .into_iter()
            .partition(|p| p.is_dir() || is_image_path(p));
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

    /// Replace the image list (files, or the images inside given folders) and show the first.
    pub fn open_images(&mut self, paths: &[PathBuf]) {
        let mut list = Vec::new();
        for p in paths {
            if p.is_dir() {
                match crate::io::list_images(p) {
                    Ok(inside) if inside.is_empty() => {
                        self.error(format!("{}: no images in this folder", p.display()))
                    }
                    Ok(inside) => list.extend(inside),
                    Err(e) => self.error(e),
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

    /// Show image `i` of the list: nothing of the previous image stays on screen while the new
    /// one loads.
    pub fn select(&mut self, i: usize) {
        let Some(path) = self.images.get(i).cloned() else {
            return;
        };
        self.current = i;
        self.cancel_run();
        self.image = None;
        self.shown = None;
        self.run_problem = None;
        self.pictures.clear();
        self.regions.close();
        let wake = self.wake();
        self.loader
            .load_image(path, &self.regions.project_dir.clone(), wake);
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

    /// Load a checkpoint on a loader thread; on failure the previous one stays.
    pub fn open_weights(&mut self, path: &Path) {
        let wake = self.wake();
        self.loader.load_weights(path.to_path_buf(), wake);
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

    fn take_loaded(&mut self, loaded: Loaded) {
        match loaded {
            Loaded::Image {
                path,
                pixels,
                sidecar_path,
                sidecar,
            } => match pixels {
                Ok(pixels) => {
                    Settings::remember(&mut self.settings.recent_images, &path);
                    for note in self.regions.open(
                        sidecar_path,
                        sidecar,
                        file_name(&path),
                        pixels.dimensions(),
                    ) {
                        match note {
                            Ok(info) => self.info(info),
                            Err(e) => self.error(e),
                        }
                    }
                    self.image = Some(LoadedImage {
                        path,
                        pixels: Arc::new(pixels),
                    });
                    self.request();
                }
                Err(e) => self.error(e),
            },
            Loaded::Weights { path, result } => match result {
                Ok(loaded) => {
                    Settings::remember(&mut self.settings.recent_weights, &path);
                    let name = file_name(&path);
                    self.info(format!(
                        "loaded {name}: {} layout, depths {:?}",
                        loaded.report.layout, loaded.model.config.depths
                    ));
                    self.weights = Some(LoadedWeights {
                        name,
                        path: Some(path),
                        model: Arc::new(loaded.model),
                        report: Some(loaded.report),
                        random: false,
                    });
                    self.settings.focus_stage = self
                        .settings
                        .focus_stage
                        .min(self.n_stages().saturating_sub(1));
                    self.request();
                }
                Err(e) => {
                    self.error(e);
                    if self.weights.is_none() && self.random_if_weights_fail {
                        self.info("using random weights instead");
                        self.use_random_weights();
                    }
                }
            },
            Loaded::Picked(paths) => self.open_paths(&paths),
            Loaded::PickedNothing { at_once: true } => {
                self.path_focus_requests += 1;
                self.error(
                    "no file dialog could be shown on this desktop; type a path in the Path \
                     field (the cursor is there) or drop files on the window",
                )
            }
            Loaded::PickedNothing { at_once: false } => {}
        }
    }

    pub fn n_stages(&self) -> usize {
        self.weights
            .as_ref()
            .map_or(0, |w| w.model.config.n_stages())
    }

    // ---- running -------------------------------------------------------------------------

    fn cache_key(&self) -> Option<String> {
        let img = self.image.as_ref()?;
        let w = self.weights.as_ref()?;
        let weights_id = w
            .path
            .as_ref()
            .map_or_else(|| w.name.clone(), |p| p.display().to_string());
        Some(format!(
            "{}|{}|{:?}|{:?}|{:?}",
            img.path.display(),
            weights_id,
            self.settings.policy,
            self.settings.norm,
            self.settings.semantics(w.model.default_semantics)
        ))
    }

    /// Ask for the current image and checkpoint: from the cache, or a new worker job. What is
    /// on screen is cleared first, so the maps always belong to the image and settings named.
    pub fn request(&mut self) {
        let Some(key) = self.cache_key() else { return };
        if self.shown.as_ref().is_some_and(|s| s.key == key)
            || self.pending.as_ref().is_some_and(|p| p.key == key)
        {
            return;
        }
        self.cancel_run();
        self.shown = None;
        self.run_problem = None;
        self.pictures.clear();
        if let Some((input, outputs)) = self.cache.get(&key).cloned() {
            self.shown = Some(Shown {
                key,
                input,
                outputs,
            });
            return;
        }
        let (Some(img), Some(w)) = (&self.image, &self.weights) else {
            return;
        };
        let model = w.model.clone();
        let pixels = img.pixels.clone();
        let (tw, th) = self.settings.policy.target(pixels.width(), pixels.height());
        let semantics = self.settings.semantics(model.default_semantics);
        let checked = model
            .check_memory(
                (th as usize, tw as usize),
                Some(semantics),
                DEFAULT_MEMORY_LIMIT,
            )
            .and_then(|_| self.settings.norm.validate());
        if let Err(e) = checked {
            let msg = format!("{}: {e}", img.path.display());
            self.run_problem = Some(msg.clone());
            self.error(msg);
            return;
        }
        let wake: Option<Box<dyn Fn() + Send + Sync>> = self
            .repaint
            .clone()
            .map(|ctx| Box::new(move || ctx.request_repaint()) as Box<dyn Fn() + Send + Sync>);
        let job = Job::spawn_image(
            model,
            pixels,
            self.settings.policy,
            self.settings.norm,
            ForwardOptions {
                semantics: Some(semantics),
                ..ForwardOptions::default()
            },
            wake,
        );
        self.pending = Some(Pending {
            key,
            job,
            input: None,
            progress: None,
        });
    }

    /// Stop the running forward pass, if any, without a message.
    fn cancel_run(&mut self) {
        if let Some(p) = self.pending.take() {
            p.job.cancel();
        }
    }

    /// Stop the running forward pass at the user's request: nothing is shown for this input
    /// until it is run again.
    pub fn cancel_pending(&mut self) {
        if self.pending.is_some() {
            self.cancel_run();
            let what = self
                .image
                .as_ref()
                .map_or_else(String::new, |i| file_name(&i.path));
            self.run_problem = Some(format!(
                "run cancelled: no maps for {what} at {}; Run to compute them",
                self.settings.policy.describe()
            ));
            self.info("run cancelled");
        }
    }

    pub fn is_busy(&self) -> bool {
        self.pending.is_some()
    }

    /// Whether anything is still working: a load, a run, the pictures or a save.
    pub fn is_working(&self) -> bool {
        self.pending.is_some()
            || self.loader.is_busy()
            || self.pictures.is_busy()
            || self.pictures.has_upload()
            || self.exporting.is_some()
    }

    pub fn progress(&self) -> Option<Progress> {
        self.pending.as_ref().and_then(|p| p.progress)
    }

    /// Take in everything the threads finished; call once per frame.
    pub fn poll(&mut self) {
        while let Some(l) = self.loader.poll() {
            self.take_loaded(l);
        }
        let mut finished = None;
        if let Some(p) = &mut self.pending {
            while let Some(ev) = p.job.poll() {
                match ev {
                    Event::Prepared(input) => p.input = Some(input),
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
            match (result, p.input) {
                (Ok(outputs), Some(input)) => {
                    self.cache
                        .insert(p.key.clone(), (input.clone(), outputs.clone()));
                    self.cache_order.retain(|k| k != &p.key);
                    self.cache_order.push(p.key.clone());
                    while self.cache_order.len() > CACHE_SIZE {
                        let old = self.cache_order.remove(0);
                        self.cache.remove(&old);
                    }
                    self.shown = Some(Shown {
                        key: p.key,
                        input,
                        outputs,
                    });
                }
                (Ok(_), None) => self.error("internal: a result came without its input"),
                (Err(Error::Cancelled), _) => {}
                (Err(e), _) => {
                    self.run_problem = Some(e.to_string());
                    self.error(e);
                }
            }
        }
        if let Some(msg) = self.pictures.poll() {
            self.error(msg);
        }
        if let Some(rx) = &self.exporting {
            if let Ok(r) = rx.try_recv() {
                self.exporting = None;
                match r {
                    Ok(done) => {
                        self.info(format!("saved {}", done.png.display()));
                        self.last_export = Some(done);
                    }
                    Err(e) => self.error(format!("figure not saved: {e}")),
                }
            }
        }
    }

    /// Start whatever the current result and settings need (pictures) and bring the region
    /// numbers up to date; call once per frame after the actions.
    pub fn refresh(&mut self) {
        self.regions.outlines = self.settings.show_regions;
        match &self.shown {
            Some(shown) => {
                let size = self
                    .image
                    .as_ref()
                    .map_or(shown.input.dimensions(), |i| i.pixels.dimensions());
                let wake = self.wake();
                self.pictures.want(
                    &shown.key,
                    &shown.outputs,
                    &shown.input,
                    size,
                    &self.settings,
                    wake,
                );
            }
            None => {
                if self.pictures.maps.is_some() || self.pictures.textures.is_some() {
                    self.pictures.clear();
                }
            }
        }
        let lens = self
            .pictures
            .lens_stage()
            .unwrap_or(self.settings.focus_stage);
        if let Some(problem) = self.regions.refresh(self.pictures.maps.as_deref(), lens) {
            self.error(problem);
        }
    }

    /// Block until nothing is working (tests and scripts); false on timeout.
    pub fn wait_idle(&mut self, timeout: Duration) -> bool {
        let start = Instant::now();
        loop {
            self.poll();
            self.refresh();
            // Pictures waiting for upload need a frame, not more waiting.
            let busy = self.pending.is_some()
                || self.loader.is_busy()
                || self.pictures.is_busy()
                || self.exporting.is_some();
            if !busy {
                return true;
            }
            if start.elapsed() > timeout {
                return false;
            }
            std::thread::sleep(Duration::from_millis(5));
        }
    }

    // ---- saving --------------------------------------------------------------------------

    /// The files *Save figure* writes for the current view.
    pub fn export_paths(&self) -> Option<ExportPaths> {
        let img = self.image.as_ref()?;
        let dir = if self.export_dir.trim().is_empty() {
            img.path.parent().map(Path::to_path_buf).unwrap_or_default()
        } else {
            PathBuf::from(self.export_dir.trim())
        };
        Some(ExportPaths::new(&dir, &img.path, &self.settings.map_id()))
    }

    /// Save the view on screen as a figure with its statistics, on an export thread.
    pub fn save_figure(&mut self) {
        let (Some(maps), Some(tex), Some(paths)) = (
            self.pictures.maps.clone(),
            self.pictures.textures.as_ref(),
            self.export_paths(),
        ) else {
            self.error("nothing to save yet: no maps are on screen");
            return;
        };
        if self.exporting.is_some() {
            self.error("a figure is still being saved; try again in a moment");
            return;
        }
        let req = ExportRequest {
            maps,
            draw: tex.key.clone(),
            overlays: self.settings.overlays(),
            sidecar: self.regions.sidecar.clone(),
            policy: self.settings.policy.describe(),
            checkpoint: self
                .weights
                .as_ref()
                .map_or_else(String::new, |w| w.name.clone()),
            paths,
            rows: self.regions.stats.clone(),
        };
        let (tx, rx) = channel();
        let wake = self.wake();
        let spawned = std::thread::Builder::new()
            .name("mullion-export".into())
            .spawn(move || {
                let _ = tx.send(export(&req));
                if let Some(w) = wake {
                    w();
                }
            });
        match spawned {
            Ok(_) => self.exporting = Some(rx),
            Err(e) => self.error(format!("cannot start saving: {e}")),
        }
    }

    /// Write the region table on screen as CSV (the report's `regions.csv` columns) next to
    /// where the figure goes.
    pub fn save_table(&mut self) {
        let Some(paths) = self.export_paths() else {
            self.error("no image open");
            return;
        };
        if self.regions.stats.is_empty() {
            self.error("no region statistics to save (draw a region; a scalar map is needed)");
            return;
        }
        let written = crate::analysis::rows_csv(&self.regions.stats)
            .and_then(|text| crate::io::write_text_atomic(&paths.regions_csv, &text));
        match written {
            Ok(()) => self.info(format!("saved {}", paths.regions_csv.display())),
            Err(e) => self.error(format!("table not saved: {e}")),
        }
    }

    /// The drawing settings the pictures on screen were made with.
    pub fn drawn_key(&self) -> Option<&DrawKey> {
        self.pictures.textures.as_ref().map(|t| &t.key)
    }

    // ---- actions -------------------------------------------------------------------------

    /// Carry out what a panel asked for.
    pub fn apply(&mut self, action: Action) {
        match action {
            Action::OpenPaths(p) => self.open_paths(&p),
            Action::OpenTyped(s) => {
                let p = PathBuf::from(s.trim());
                if s.trim().is_empty() {
                    self.error("type the path of an image, a folder or a checkpoint first");
                } else if p.exists() {
                    self.open_paths(&[p]);
                } else {
                    self.error(format!("{}: no such file or folder", p.display()));
                }
            }
            Action::Pick(what) => {
                let wake = self.wake();
                self.loader.pick(what, wake);
            }
            Action::NextImage => self.next_image(),
            Action::PreviousImage => self.previous_image(),
            Action::SetSettings(next) => {
                let rerun = self.settings.needs_new_run(&next);
                self.settings = *next;
                self.settings.focus_stage = self
                    .settings
                    .focus_stage
                    .min(self.n_stages().saturating_sub(1));
                if rerun {
                    self.request();
                }
            }
            Action::FocusStage(i) => {
                if i < self.n_stages() {
                    self.settings.focus_stage = i;
                }
            }
            Action::Rerun => self.request(),
            Action::CancelRun => self.cancel_pending(),
            Action::SaveFigure => self.save_figure(),
            Action::SaveTable => self.save_table(),
            Action::ToggleHelp => self.show_help ^= true,
            Action::ShowLoadReport(on) => self.show_report = on,
            Action::ClearMessages => self.messages.clear(),
            Action::Region(edit) => {
                if let Some(m) = self.regions.apply(edit) {
                    self.error(m);
                }
            }
            Action::SelectRegion(id) => self.regions.selected = id,
            Action::ChooseLabel(l) => self.regions.label = l,
            Action::SetSidecarFolder(d) => self.regions.project_dir = d,
            Action::Undo => {
                if let Some(m) = self.regions.undo() {
                    self.error(m);
                }
            }
            Action::Redo => {
                if let Some(m) = self.regions.redo() {
                    self.error(m);
                }
            }
        }
    }

    /// What a dialog button does (the file dialogs run on their own thread).
    pub fn pick(&mut self, what: Pick) {
        self.apply(Action::Pick(what));
    }
}
