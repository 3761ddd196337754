//! The window's state and everything that changes it. Panels read it and return
//! [`Action`]s; [`Workbench::apply`] carries them out. Nothing here draws.
//!
//! Heavy work never runs on the GUI thread: images and checkpoints load on loader threads, the
//! forward pass on the worker (a newer request cancels the pending one), maps and panel pictures
//! on the picture thread, saved figures on an export thread. Results are cached per (image,
//! checkpoint, input policy, normalisation).

use super::actions::{Action, Pick};
use super::export::{export, ExportPaths, ExportRequest, Exported};
use super::loading::{Loaded, Loader, Slot, Wake};
use super::pictures::{DrawKey, Passes, Pictures};
use super::region_doc::RegionDoc;
use super::settings::Settings;
use crate::analysis::compare::{group_drift, Drift, GroupDrift};
use crate::analysis::inspect::{query_attention, QueryAttention};
use crate::analysis::padding::{all_attention_bytes, variant_input, variant_options, Variant};
use crate::analysis::parse_map_kind;
use crate::engine::config::{TrainedWindow, WindowSpec};
use crate::engine::folder::is_checkpoint_folder;
use crate::engine::input::{normalise, DEFAULT_MEMORY_LIMIT};
use crate::engine::model::check_budget;
use crate::engine::worker::{Event, Job};
use crate::engine::{
    Backbone, Config, ConfigOverride, ForwardOptions, LoadReport, Progress, StageOutputs,
};
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

/// Take in what an extra pass (the inspector's, a padding study's) sent; its key and result
/// once it finished.
fn poll_extra(slot: &mut Option<Pending>) -> Option<(String, Result<Arc<StageOutputs>>)> {
    let mut finished = None;
    if let Some(p) = slot.as_mut() {
        while let Some(ev) = p.job.poll() {
            match ev {
                Event::Prepared(_) => {}
                Event::Progress(pr) => p.progress = Some(pr),
                Event::Finished(r) => {
                    finished = Some(r);
                    break;
                }
            }
        }
    }
    let result = finished?;
    let p = slot.take()?;
    Some((p.key, result))
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

/// The weight drift between the base (A) and the checkpoint (B).
pub struct DriftView {
    /// The files compared: (A, B).
    pub pair: (PathBuf, PathBuf),
    /// The per-tensor rows and what could not be compared, or why the comparison failed.
    pub result: std::result::Result<Drift, String>,
    /// The rows joined into weight groups per block, for the chart.
    pub groups: Vec<GroupDrift>,
}

/// The attention inspector's query: a token of a stage grid.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct InspectQuery {
    pub stage: usize,
    pub row: usize,
    pub col: usize,
}

/// What the inspector shows: the query's attention in one block, one head or the mean.
pub struct Inspected {
    /// The pass it came from, the query and the head.
    key: (String, InspectQuery, Option<usize>),
    pub query: InspectQuery,
    pub block: usize,
    pub shifted: bool,
    pub attention: QueryAttention,
}

/// A running forward pass.
struct Pending {
    key: String,
    job: Job,
    input: Option<Arc<image::RgbImage>>,
    progress: Option<Progress>,
}

/// The question the window asks when a Swin V2 checkpoint does not state its window.
#[derive(Clone, Debug, PartialEq)]
pub struct WindowQuestion {
    pub path: PathBuf,
    pub slot: Slot,
}

pub struct Workbench {
    pub settings: Settings,
    pub images: Vec<PathBuf>,
    pub current: usize,
    pub image: Option<LoadedImage>,
    pub weights: Option<LoadedWeights>,
    pub shown: Option<Shown>,
    /// The checkpoint the one on screen is compared with (A; the one on screen is then B).
    pub base: Option<LoadedWeights>,
    /// The base checkpoint's pass of the current image.
    pub shown_base: Option<Shown>,
    /// The weight drift of the pair, once both checkpoints are files.
    pub drift: Option<DriftView>,
    pub show_drift: bool,
    /// The seams and border window is open (and saved figures carry its profiles).
    pub show_profiles: bool,
    /// The attention inspector: the query token, what is shown for it, or why nothing is.
    pub inspect: Option<InspectQuery>,
    pub inspected: Option<Inspected>,
    pub inspect_problem: Option<String>,
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
    /// Shape overrides per checkpoint path (`mullion open --config`, or a window typed in);
    /// the last one given for a path applies.
    pub shape_overrides: Vec<(PathBuf, ConfigOverride)>,
    /// A checkpoint that did not load because nothing states its window: the window asks.
    pub window_question: Option<WindowQuestion>,
    pending: Option<Pending>,
    pending_base: Option<Pending>,
    /// A pass that keeps one block's attention, for the inspector, and its result.
    pending_attention: Option<Pending>,
    attention_pass: Option<(String, Arc<StageOutputs>)>,
    /// The second pass of this checkpoint a padding study needs, its result, or why it failed.
    pending_variant: Option<Pending>,
    variant_pass: Option<(String, Arc<StageOutputs>)>,
    variant_problem: Option<(String, String)>,
    exporting: Option<Receiver<Result<Exported>>>,
    cache: HashMap<String, (Arc<image::RgbImage>, Arc<StageOutputs>)>,
    cache_order: Vec<String>,
    repaint: Option<egui::Context>,
}

impl Workbench {
    pub fn new(mut settings: Settings) -> Self {
        // The difference map needs a base, which is never open at start.
        if settings.map_kind == "difference" {
            settings.map_kind = "norm".into();
        }
        Workbench {
            settings,
            images: Vec::new(),
            current: 0,
            image: None,
            weights: None,
            shown: None,
            base: None,
            shown_base: None,
            drift: None,
            show_drift: false,
            show_profiles: false,
            inspect: None,
            inspected: None,
            inspect_problem: None,
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
            shape_overrides: Vec::new(),
            window_question: None,
            pending: None,
            pending_base: None,
            pending_attention: None,
            attention_pass: None,
            pending_variant: None,
            variant_pass: None,
            variant_problem: None,
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

    /// The wake-up a worker job calls after every event (a repaint request).
    fn job_wake(&self) -> Option<Box<dyn Fn() + Send + Sync>> {
        self.repaint
            .clone()
            .map(|ctx| Box::new(move || ctx.request_repaint()) as Box<dyn Fn() + Send + Sync>)
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
        let (weights, rest): (Vec<_>, Vec<_>) = paths
            .iter()
            .cloned()
            .partition(|p| is_weights_path(p) || is_checkpoint_folder(p));
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
        self.shown_base = None;
        self.inspect = None;
        self.inspected = None;
        self.inspect_problem = None;
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
        let over = self.shape_override(path);
        self.loader
            .load_weights(path.to_path_buf(), Slot::Main, over, wake);
    }

    /// The shape overrides given for `path` (`mullion open --config`, or the window size typed
    /// into the window's question); none by default.
    pub fn shape_override(&self, path: &Path) -> ConfigOverride {
        self.shape_overrides
            .iter()
            .rev()
            .find(|(p, _)| p == path)
            .map(|(_, o)| o.clone())
            .unwrap_or_default()
    }

    /// Open `path` into `slot` with the window the user stated for it: Swin V2 checkpoints do
    /// not record theirs. `trained` is the window it was pretrained at (0: the same).
    pub fn open_with_window(&mut self, path: &Path, slot: Slot, window: usize, trained: usize) {
        let mut over = self.shape_override(path);
        over.window = Some(WindowSpec::Square(window));
        over.trained_window = (trained > 0).then_some(TrainedWindow::All(trained));
        self.shape_overrides.push((path.to_path_buf(), over));
        self.window_question = None;
        match slot {
            Slot::Main => self.open_weights(path),
            Slot::Base => self.open_base(path),
        }
    }

    /// A failed checkpoint load: said in the log, and when only the window was missing, asked.
    fn weights_failed(&mut self, slot: Slot, e: crate::error::Error) {
        if let crate::error::Error::WindowUnstated { path, .. } = &e {
            self.window_question = Some(WindowQuestion {
                path: path.clone(),
                slot,
            });
        }
        match slot {
            Slot::Main => self.error(e),
            Slot::Base => self.error(format!("base (A) not loaded: {e}")),
        }
    }

    /// Load the checkpoint to compare with (A) on a loader thread; on failure the previous
    /// base stays.
    pub fn open_base(&mut self, path: &Path) {
        if !(is_checkpoint_folder(path) || (path.is_file() && is_weights_path(path))) {
            self.error(format!(
                "{}: not a checkpoint (by its file ending); a base needs a checkpoint file, or \
                 a folder with config.json and the weights",
                path.display()
            ));
            return;
        }
        let wake = self.wake();
        let over = self.shape_override(path);
        self.loader
            .load_weights(path.to_path_buf(), Slot::Base, over, wake);
    }

    /// Leave the comparison: the base, its runs and the drift go; the view shows one
    /// checkpoint again.
    pub fn close_base(&mut self) {
        self.loader.drop_base();
        self.loader.drop_drift();
        if let Some(p) = self.pending_base.take() {
            p.job.cancel();
        }
        self.base = None;
        self.shown_base = None;
        self.drift = None;
        self.show_drift = false;
        if self.settings.map_kind == "difference" {
            self.settings.map_kind = "norm".into();
        }
        self.pictures.clear();
    }

    /// Whether two checkpoints are loaded (the comparison view).
    pub fn comparing(&self) -> bool {
        self.base.is_some() && self.weights.is_some()
    }

    /// Start the weight drift of the pair when both checkpoints are files.
    fn start_drift(&mut self) {
        self.drift = None;
        self.loader.drop_drift();
        let (Some(a), Some(b)) = (
            self.base.as_ref().and_then(|w| w.path.clone()),
            self.weights.as_ref().and_then(|w| w.path.clone()),
        ) else {
            return;
        };
        let wake = self.wake();
        self.loader.compute_drift(a, b, wake);
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
            Loaded::Weights {
                path,
                slot: Slot::Base,
                result,
            } => match result {
                Ok(loaded) => {
                    self.shown_base = None;
                    self.base = Some(self.take_checkpoint(path, loaded, "base (A) "));
                    self.start_drift();
                    self.request();
                }
                Err(e) => self.weights_failed(Slot::Base, e),
            },
            Loaded::Drift { pair, result } => {
                let groups = result.as_ref().map(group_drift).unwrap_or_default();
                if let Err(e) = &result {
                    self.error(format!("weight drift: {e}"));
                }
                self.drift = Some(DriftView {
                    pair,
                    result: result.map_err(|e| e.to_string()),
                    groups,
                });
            }
            Loaded::Weights {
                path,
                slot: Slot::Main,
                result,
            } => match result {
                Ok(loaded) => {
                    self.weights = Some(self.take_checkpoint(path, loaded, ""));
                    self.settings.focus_stage = self
                        .settings
                        .focus_stage
                        .min(self.n_stages().saturating_sub(1));
                    if self.base.is_some() {
                        self.start_drift();
                    }
                    self.request();
                }
                Err(e) => {
                    self.weights_failed(Slot::Main, e);
                    if self.weights.is_none() && self.random_if_weights_fail {
                        self.info("using random weights instead");
                        self.use_random_weights();
                    }
                }
            },
            Loaded::Picked(Pick::Base, paths) => {
                if let Some(p) = paths.first() {
                    self.open_base(p)
                }
            }
            Loaded::Picked(_, paths) => self.open_paths(&paths),
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

    /// A checkpoint a loader opened: remembered among the recent files and said in the log.
    fn take_checkpoint(
        &mut self,
        path: PathBuf,
        loaded: crate::engine::LoadedCheckpoint,
        which: &str,
    ) -> LoadedWeights {
        Settings::remember(&mut self.settings.recent_weights, &path);
        let name = file_name(&path);
        let window = loaded.model.config.window;
        self.info(format!(
            "loaded {which}{name}: {}, {} layout, depths {:?}, window {}x{}",
            loaded.report.family.split(" (").next().unwrap_or_default(),
            loaded.report.layout,
            loaded.model.config.depths,
            window.0,
            window.1
        ));
        LoadedWeights {
            name,
            path: Some(path),
            model: Arc::new(loaded.model),
            report: Some(loaded.report),
            random: false,
        }
    }

    pub fn n_stages(&self) -> usize {
        self.weights
            .as_ref()
            .map_or(0, |w| w.model.config.n_stages())
    }

    // ---- running -------------------------------------------------------------------------

    fn cache_key(&self, w: &LoadedWeights) -> Option<String> {
        let img = self.image.as_ref()?;
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

    fn slot_weights(&self, slot: Slot) -> Option<&LoadedWeights> {
        match slot {
            Slot::Main => self.weights.as_ref(),
            Slot::Base => self.base.as_ref(),
        }
    }

    fn slot_state(&mut self, slot: Slot) -> (&mut Option<Shown>, &mut Option<Pending>) {
        match slot {
            Slot::Main => (&mut self.shown, &mut self.pending),
            Slot::Base => (&mut self.shown_base, &mut self.pending_base),
        }
    }

    /// Ask for the current image through the checkpoint and, when comparing, through the base:
    /// from the cache, or new worker jobs. What is on screen is cleared first, so the maps
    /// always belong to the image and settings named.
    pub fn request(&mut self) {
        self.request_slot(Slot::Main);
        self.request_slot(Slot::Base);
    }

    fn request_slot(&mut self, slot: Slot) {
        let key = self.slot_weights(slot).and_then(|w| self.cache_key(w));
        let Some(key) = key else {
            let (shown, pending) = self.slot_state(slot);
            if let Some(p) = pending.take() {
                p.job.cancel();
            }
            *shown = None;
            return;
        };
        {
            let (shown, pending) = self.slot_state(slot);
            if shown.as_ref().is_some_and(|s| s.key == key)
                || pending.as_ref().is_some_and(|p| p.key == key)
            {
                return;
            }
        }
        let cached = self.cache.get(&key).cloned();
        {
            let (shown, pending) = self.slot_state(slot);
            if let Some(p) = pending.take() {
                p.job.cancel();
            }
            *shown = cached.map(|(input, outputs)| Shown {
                key: key.clone(),
                input,
                outputs,
            });
        }
        self.run_problem = None;
        self.pictures.clear();
        if self.slot_state(slot).0.is_some() {
            return;
        }
        let (Some(img), Some(w)) = (&self.image, self.slot_weights(slot)) else {
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
            let which = if slot == Slot::Base { "base (A): " } else { "" };
            let msg = format!("{which}{}: {e}", img.path.display());
            self.run_problem = Some(msg.clone());
            self.error(msg);
            return;
        }
        let wake = self.job_wake();
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
        *self.slot_state(slot).1 = Some(Pending {
            key,
            job,
            input: None,
            progress: None,
        });
    }

    /// Stop the running forward passes, if any, without a message.
    fn cancel_run(&mut self) {
        for p in [
            self.pending.take(),
            self.pending_base.take(),
            self.pending_attention.take(),
            self.pending_variant.take(),
        ]
        .into_iter()
        .flatten()
        {
            p.job.cancel();
        }
    }

    /// Stop the running forward passes at the user's request: nothing is shown for this input
    /// until it is run again.
    pub fn cancel_pending(&mut self) {
        if self.is_busy() {
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
            || self.pending_base.is_some()
            || self.pending_attention.is_some()
            || self.pending_variant.is_some()
    }

    /// The padding study's second pass, when one runs: its progress.
    pub fn variant_running(&self) -> Option<Option<Progress>> {
        self.pending_variant.as_ref().map(|p| p.progress)
    }

    /// The inspector's attention pass, when one runs: its progress.
    pub fn attention_running(&self) -> Option<Option<Progress>> {
        self.pending_attention.as_ref().map(|p| p.progress)
    }

    /// Whether anything is still working: a load, a run, the pictures or a save.
    pub fn is_working(&self) -> bool {
        self.is_busy()
            || self.loader.is_busy()
            || self.pictures.is_busy()
            || self.pictures.has_upload()
            || self.regions.is_busy()
            || self.exporting.is_some()
    }

    /// The progress of the checkpoint's run, or of the base's.
    pub fn progress_of(&self, base: bool) -> Option<Progress> {
        let p = if base {
            &self.pending_base
        } else {
            &self.pending
        };
        p.as_ref().and_then(|p| p.progress)
    }

    /// Which runs are going: (checkpoint, base).
    pub fn running(&self) -> (bool, bool) {
        (self.pending.is_some(), self.pending_base.is_some())
    }

    /// Take in what one slot's forward pass sent.
    fn poll_slot(&mut self, slot: Slot) {
        let mut finished = None;
        if let Some(p) = self.slot_state(slot).1 {
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
        let Some(result) = finished else { return };
        let p = self.slot_state(slot).1.take().expect("pending");
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
                *self.slot_state(slot).0 = Some(Shown {
                    key: p.key,
                    input,
                    outputs,
                });
            }
            (Ok(_), None) => self.error("internal: a result came without its input"),
            (Err(Error::Cancelled), _) => {}
            (Err(e), _) => {
                let msg = match slot {
                    Slot::Main => e.to_string(),
                    Slot::Base => format!("base (A): {e}"),
                };
                self.run_problem = Some(msg.clone());
                self.error(msg);
            }
        }
    }

    /// Take in everything the threads finished; call once per frame.
    pub fn poll(&mut self) {
        while let Some(l) = self.loader.poll() {
            self.take_loaded(l);
        }
        self.poll_slot(Slot::Main);
        self.poll_slot(Slot::Base);
        self.poll_attention();
        self.poll_variant();
        if let Some(msg) = self.pictures.poll() {
            self.error(msg);
        }
        if let Some(rx) = &self.exporting {
            if let Ok(r) = rx.try_recv() {
                self.exporting = None;
                match r {
                    Ok(done) => {
                        self.info(format!("saved {}", done.png.display()));
                        if let Some(c) = &done.comparison {
                            self.info(format!("saved {}", c.display()));
                        }
                        self.last_export = Some(done);
                    }
                    Err(e) => self.error(format!("figure not saved: {e}")),
                }
            }
        }
    }

    /// Start whatever the current result and settings need (pictures) and bring the region
    /// numbers up to date; call once per frame after the actions. While the base's pass of
    /// the image is still running, nothing is drawn: the view shows both or waits.
    pub fn refresh(&mut self) {
        self.regions.outlines = self.settings.show_regions;
        let waiting_for_base = self.base.is_some() && self.pending_base.is_some();
        let variant = self.refresh_variant();
        match (&self.shown, waiting_for_base || variant.is_err()) {
            (Some(shown), false) => {
                let size = self
                    .image
                    .as_ref()
                    .map_or(shown.input.dimensions(), |i| i.pixels.dimensions());
                let wake = self.wake();
                let base = self
                    .base
                    .as_ref()
                    .and(self.shown_base.as_ref())
                    .map(|b| (b.key.as_str(), &b.outputs));
                let variant = variant
                    .ok()
                    .flatten()
                    .and(self.variant_pass.as_ref())
                    .map(|(k, o)| (k.as_str(), o));
                let shape = self.weights.as_ref().map(|w| w.model.config.shape());
                let passes = Passes {
                    run: &shown.key,
                    outputs: &shown.outputs,
                    base,
                    variant,
                    shape: shape.as_ref(),
                };
                self.pictures
                    .want(passes, &shown.input, size, &self.settings, wake);
            }
            _ => {
                if self.pictures.maps.is_some() || self.pictures.textures.is_some() {
                    self.pictures.clear();
                }
            }
        }
        self.refresh_inspector();
        let lens = self
            .pictures
            .lens_stage()
            .unwrap_or(self.settings.focus_stage);
        let wake = self.wake();
        if let Some(problem) = self
            .regions
            .refresh(self.pictures.maps.as_ref(), lens, wake)
        {
            self.error(problem);
        }
    }

    /// The inspector's block for the query's stage: the one asked for, clamped to the stage.
    pub fn inspect_block(&self, stage: usize) -> Option<usize> {
        let depth = *self.weights.as_ref()?.model.config.depths.get(stage)?;
        Some(self.settings.inspect_block.min(depth.checked_sub(1)?))
    }

    /// Keep the inspector in step with the query, block, head and result on screen: start the
    /// pass that keeps the block's attention when it is missing, and read the query's row out
    /// of it when it is there (a few dozen numbers, cheap enough for this thread).
    fn refresh_inspector(&mut self) {
        let (Some(q), Some(shown)) = (self.inspect, self.shown.as_ref()) else {
            self.inspected = None;
            return;
        };
        let Some(block) = self.inspect_block(q.stage) else {
            self.inspected = None;
            self.inspect_problem = Some(format!("stage {}: no such stage", q.stage));
            return;
        };
        let key = format!("{}|attention of stage {} block {block}", shown.key, q.stage);
        let head = self.settings.inspect_head;
        let pass = self
            .attention_pass
            .as_ref()
            .filter(|(k, _)| *k == key)
            .map(|(_, o)| o.clone());
        let Some(out) = pass else {
            self.inspected = None;
            if self.inspect_problem.is_none()
                && self.pending_attention.as_ref().is_none_or(|p| p.key != key)
            {
                self.start_attention_pass(key, q.stage, block);
            }
            return;
        };
        let ikey = (key, q, head);
        if self.inspected.as_ref().is_some_and(|i| i.key == ikey) {
            return;
        }
        let bg = out
            .geometry
            .stages
            .get(q.stage)
            .and_then(|s| s.blocks.get(block));
        let result = match (bg, &out.attention) {
            (Some(bg), Some(tap)) => query_attention(&tap.weights, bg, (q.row, q.col), head)
                .map(|a| (a, bg.is_shifted())),
            _ => Err(Error::Internal("the pass kept no attention".into())),
        };
        match result {
            Ok((attention, shifted)) => {
                self.inspect_problem = None;
                self.inspected = Some(Inspected {
                    key: ikey,
                    query: q,
                    block,
                    shifted,
                    attention,
                });
            }
            Err(e) => {
                self.inspected = None;
                self.inspect_problem = Some(e.to_string());
                self.inspect = None;
            }
        }
    }

    fn start_attention_pass(&mut self, key: String, stage: usize, block: usize) {
        if let Some(p) = self.pending_attention.take() {
            p.job.cancel();
        }
        let (Some(img), Some(w)) = (&self.image, &self.weights) else {
            return;
        };
        let wake = self.job_wake();
        let job = Job::spawn_image(
            w.model.clone(),
            img.pixels.clone(),
            self.settings.policy,
            self.settings.norm,
            ForwardOptions {
                semantics: Some(self.settings.semantics(w.model.default_semantics)),
                attention_of: Some((stage, block)),
                ..ForwardOptions::default()
            },
            wake,
        );
        self.pending_attention = Some(Pending {
            key,
            job,
            input: None,
            progress: None,
        });
    }

    fn poll_attention(&mut self) {
        let Some((key, result)) = poll_extra(&mut self.pending_attention) else {
            return;
        };
        match result {
            Ok(out) => self.attention_pass = Some((key, out)),
            Err(Error::Cancelled) => {}
            Err(e) => {
                let msg = format!("attention inspector: {e}");
                self.inspect_problem = Some(msg.clone());
                self.error(msg);
            }
        }
    }

    /// The second pass the chosen map kind needs (a padding study), with its cache key.
    fn wanted_variant(&self) -> Option<(String, Variant)> {
        let shown = self.shown.as_ref()?;
        let v = parse_map_kind(&self.settings.map_id()).ok()?.variant()?;
        Some((format!("{}|second pass {v:?}", shown.key), v))
    }

    /// Keep the padding study's second pass in step with the map kind: `Ok(None)` when none is
    /// needed, `Ok(Some(()))` when it is there, `Err(())` while it runs or when it failed (the
    /// maps then wait, or say why).
    fn refresh_variant(&mut self) -> std::result::Result<Option<()>, ()> {
        let Some((key, v)) = self.wanted_variant() else {
            if let Some(p) = self.pending_variant.take() {
                p.job.cancel();
            }
            return Ok(None);
        };
        if self.variant_pass.as_ref().is_some_and(|(k, _)| *k == key) {
            return Ok(Some(()));
        }
        if let Some((_, msg)) = self.variant_problem.as_ref().filter(|(k, _)| *k == key) {
            self.pictures.problem = Some(msg.clone());
            return Err(());
        }
        if self.pending_variant.as_ref().is_none_or(|p| p.key != key) {
            if let Err(e) = self.start_variant(key.clone(), v) {
                let msg = format!("no maps: the second pass this map needs cannot run: {e}");
                self.error(msg.clone());
                self.variant_problem = Some((key, msg));
            }
        }
        Err(())
    }

    fn start_variant(&mut self, key: String, v: Variant) -> Result<()> {
        if let Some(p) = self.pending_variant.take() {
            p.job.cancel();
        }
        let (Some(shown), Some(w)) = (&self.shown, &self.weights) else {
            return Ok(());
        };
        let g = &shown.outputs.geometry;
        let semantics = g.semantics;
        match v {
            Variant::PaddedInput { rows, cols } => w.model.check_memory(
                (g.image.0 + rows, g.image.1 + cols),
                Some(semantics),
                DEFAULT_MEMORY_LIMIT,
            )?,
            Variant::Attention => {
                let need = all_attention_bytes(g, &w.model.config.heads)
                    .and_then(|a| a.checked_add(w.model.estimate_bytes(g.image, Some(semantics))?));
                check_budget(need, g.image, DEFAULT_MEMORY_LIMIT)?
            }
            Variant::OtherPadOrder => {
                w.model
                    .check_memory(g.image, Some(semantics), DEFAULT_MEMORY_LIMIT)?
            }
        }
        let (input, norm) = (shown.input.clone(), self.settings.norm);
        let wake = self.job_wake();
        let job = Job::spawn_with(
            w.model.clone(),
            variant_options(v, semantics),
            wake,
            move || variant_input(v, &normalise(&input, &norm)?),
        );
        self.pending_variant = Some(Pending {
            key,
            job,
            input: None,
            progress: None,
        });
        Ok(())
    }

    fn poll_variant(&mut self) {
        let Some((key, result)) = poll_extra(&mut self.pending_variant) else {
            return;
        };
        match result {
            Ok(out) => self.variant_pass = Some((key, out)),
            Err(Error::Cancelled) => {}
            Err(e) => {
                let msg = format!("no maps: the second pass this map needs failed: {e}");
                self.error(msg.clone());
                self.variant_problem = Some((key, msg));
            }
        }
    }

    /// Block until nothing is working (tests and scripts); false on timeout.
    pub fn wait_idle(&mut self, timeout: Duration) -> bool {
        let start = Instant::now();
        loop {
            self.poll();
            self.refresh();
            // Pictures waiting for upload need a frame, not more waiting.
            let busy = self.is_busy()
                || self.loader.is_busy()
                || self.pictures.is_busy()
                || self.regions.is_busy()
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
        if self.regions.is_busy() {
            self.error("the region numbers are still being computed; save again in a moment");
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
            base: self.base.as_ref().map(|w| w.name.clone()),
            paths,
            rows: self.regions.stats.clone(),
            profiles: self.show_profiles,
            inspected: self.inspected.as_ref().map(|i| {
                let mut lines = crate::app::inspector::describe(
                    &i.attention,
                    i.query.stage,
                    i.block,
                    i.shifted,
                );
                lines.push(
                    "attention spotlight: bright where the query looks, veiled elsewhere; \
                     crossed keys are removed by the shift mask"
                        .into(),
                );
                (i.query.stage, i.attention.clone(), lines)
            }),
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
            Action::OpenBase(p) => self.open_base(&p),
            Action::OpenWithWindow {
                path,
                base,
                window,
                trained,
            } => {
                let slot = if base { Slot::Base } else { Slot::Main };
                self.open_with_window(&path, slot, window, trained)
            }
            Action::DismissWindowQuestion => self.window_question = None,
            Action::OpenTypedBase(s) => {
                let p = PathBuf::from(s.trim());
                if s.trim().is_empty() {
                    self.error("type the path of the base checkpoint (A) first");
                } else if p.exists() {
                    self.open_base(&p);
                } else {
                    self.error(format!("{}: no such checkpoint file", p.display()));
                }
            }
            Action::CloseBase => self.close_base(),
            Action::ShowDrift(on) => self.show_drift = on,
            Action::ShowProfiles(on) => self.show_profiles = on,
            Action::Pick(what) => {
                let wake = self.wake();
                self.loader.pick(what, wake);
            }
            Action::NextImage => self.next_image(),
            Action::PreviousImage => self.previous_image(),
            Action::SetSettings(mut next) => {
                if next.map_kind == "difference" && self.base.is_none() {
                    self.error("the difference map needs a base checkpoint (A): open one first");
                    next.map_kind = self.settings.map_kind.clone();
                }
                let rerun = self.settings.needs_new_run(&next);
                if (next.inspect_block, next.inspect_head)
                    != (self.settings.inspect_block, self.settings.inspect_head)
                {
                    self.inspect_problem = None;
                }
                if self.settings.inspecting && !next.inspecting {
                    self.inspect = None;
                    self.inspected = None;
                    self.inspect_problem = None;
                }
                self.settings = *next;
                self.settings.focus_stage = self
                    .settings
                    .focus_stage
                    .min(self.n_stages().saturating_sub(1));
                if rerun {
                    self.request();
                }
            }
            Action::InspectToken { stage, row, col } => {
                self.inspect = Some(InspectQuery { stage, row, col });
                self.inspect_problem = None;
            }
            Action::ClearInspect => {
                self.inspect = None;
                self.inspected = None;
                self.inspect_problem = None;
                if let Some(p) = self.pending_attention.take() {
                    p.job.cancel();
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
