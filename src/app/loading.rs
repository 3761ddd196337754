//! Loading off the GUI thread: decoding an image (with its region file) and opening a
//! checkpoint each run on a thread of their own, and the native file dialogs too. A newer
//! request of the same kind makes the older one's result stale; stale results are dropped.

use super::actions::Pick;
use super::region_doc::{read_sidecar, sidecar_path_for, LoadedSidecar};
use crate::analysis::compare::{weight_drift, Drift};
use crate::engine::checkpoint::Checkpoint;
use crate::engine::input::load_image;
use crate::engine::{open_checkpoint_with, ConfigOverride, LoadedCheckpoint};
use crate::error::Result;
use crate::io::{IMAGE_EXTENSIONS, WEIGHT_EXTENSIONS};
use image::RgbImage;
use std::path::PathBuf;
use std::sync::mpsc::{channel, Receiver, Sender};
use std::time::{Duration, Instant};

/// Something a loader thread finished. One message per file load: the size of the largest
/// variant costs nothing worth a box.
#[allow(clippy::large_enum_variant)]
pub enum Loaded {
    Image {
        path: PathBuf,
        pixels: Result<RgbImage>,
        sidecar_path: PathBuf,
        sidecar: LoadedSidecar,
    },
    Weights {
        path: PathBuf,
        slot: Slot,
        result: Result<LoadedCheckpoint>,
    },
    /// The weight drift between the base (A) and the checkpoint (B), for the pair it names.
    Drift {
        pair: (PathBuf, PathBuf),
        result: Result<Drift>,
    },
    /// Paths chosen in a file dialog, and for what.
    Picked(Pick, Vec<PathBuf>),
    /// The dialog gave nothing; `at_once` when it returned before anyone could have chosen
    /// (no dialog service on this desktop).
    PickedNothing { at_once: bool },
}

/// Which checkpoint slot a load fills.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Slot {
    /// The checkpoint under review (B when a base is loaded).
    Main,
    /// The checkpoint it is compared with (A: the base it was fine-tuned from, or the previous
    /// release).
    Base,
}

/// A wake-up for the window when a thread is done.
pub type Wake = Option<Box<dyn Fn() + Send>>;

struct Envelope {
    /// Which request of its kind this answers.
    generation: u64,
    loaded: Loaded,
}

pub struct Loader {
    tx: Sender<Envelope>,
    rx: Receiver<Envelope>,
    image_generation: u64,
    weights_generation: u64,
    base_generation: u64,
    drift_generation: u64,
    /// The image and checkpoints being loaded now, for the status line.
    pub loading_image: Option<PathBuf>,
    pub loading_weights: Option<PathBuf>,
    pub loading_base: Option<PathBuf>,
    /// The checkpoint pair whose weight drift is being computed.
    pub computing_drift: Option<(PathBuf, PathBuf)>,
    picking: usize,
}

impl Default for Loader {
    fn default() -> Self {
        let (tx, rx) = channel();
        Loader {
            tx,
            rx,
            image_generation: 0,
            weights_generation: 0,
            base_generation: 0,
            drift_generation: 0,
            loading_image: None,
            loading_weights: None,
            loading_base: None,
            computing_drift: None,
            picking: 0,
        }
    }
}

fn spawn(name: &str, job: impl FnOnce() + Send + 'static) {
    // A thread that cannot start is a broken machine; the message goes nowhere better.
    if let Err(e) = std::thread::Builder::new().name(name.into()).spawn(job) {
        eprintln!("mullion: cannot start a loader thread: {e}");
    }
}

impl Loader {
    pub fn is_busy(&self) -> bool {
        self.loading_image.is_some()
            || self.loading_weights.is_some()
            || self.loading_base.is_some()
            || self.computing_drift.is_some()
    }

    /// Decode `path` and read its region file (kept in `project_dir`, or next to it).
    pub fn load_image(&mut self, path: PathBuf, project_dir: &str, wake: Wake) {
        self.image_generation += 1;
        let generation = self.image_generation;
        self.loading_image = Some(path.clone());
        let tx = self.tx.clone();
        let sidecar_path = sidecar_path_for(&path, project_dir);
        spawn("mullion-load-image", move || {
            let pixels = load_image(&path);
            let sidecar = read_sidecar(&sidecar_path);
            let _ = tx.send(Envelope {
                generation,
                loaded: Loaded::Image {
                    path,
                    pixels,
                    sidecar_path,
                    sidecar,
                },
            });
            if let Some(w) = wake {
                w();
            }
        });
    }

    /// Open the checkpoint at `path` and build its backbone, for `slot`.
    pub fn load_weights(&mut self, path: PathBuf, slot: Slot, over: ConfigOverride, wake: Wake) {
        let generation = match slot {
            Slot::Main => {
                self.weights_generation += 1;
                self.loading_weights = Some(path.clone());
                self.weights_generation
            }
            Slot::Base => {
                self.base_generation += 1;
                self.loading_base = Some(path.clone());
                self.base_generation
            }
        };
        let tx = self.tx.clone();
        spawn("mullion-load-checkpoint", move || {
            let result = open_checkpoint_with(&path, &over);
            let _ = tx.send(Envelope {
                generation,
                loaded: Loaded::Weights { path, slot, result },
            });
            if let Some(w) = wake {
                w();
            }
        });
    }

    /// Compare every weight tensor of `base` (A) with `tuned` (B) on a thread.
    pub fn compute_drift(&mut self, base: PathBuf, tuned: PathBuf, wake: Wake) {
        self.drift_generation += 1;
        let generation = self.drift_generation;
        self.computing_drift = Some((base.clone(), tuned.clone()));
        let tx = self.tx.clone();
        spawn("mullion-drift", move || {
            let result = Checkpoint::open(&base)
                .and_then(|a| Checkpoint::open(&tuned).and_then(|b| weight_drift(&a, &b)));
            let _ = tx.send(Envelope {
                generation,
                loaded: Loaded::Drift {
                    pair: (base, tuned),
                    result,
                },
            });
            if let Some(w) = wake {
                w();
            }
        });
    }

    /// Forget a drift being computed (a checkpoint of the pair changed or was closed).
    pub fn drop_drift(&mut self) {
        self.drift_generation += 1;
        self.computing_drift = None;
    }

    /// Forget the base checkpoint being loaded (the base was closed).
    pub fn drop_base(&mut self) {
        self.base_generation += 1;
        self.loading_base = None;
    }

    /// Show a native file dialog on its own thread.
    pub fn pick(&mut self, what: Pick, wake: Wake) {
        self.picking += 1;
        let tx = self.tx.clone();
        spawn("mullion-file-dialog", move || {
            let start = Instant::now();
            let dialog = rfd::FileDialog::new();
            let chosen = match what {
                Pick::Weights | Pick::Base => dialog
                    .add_filter("checkpoint", &WEIGHT_EXTENSIONS)
                    .pick_file()
                    .map(|p| vec![p]),
                Pick::Folder => dialog.pick_folder().map(|p| vec![p]),
                Pick::Images => dialog.add_filter("image", &IMAGE_EXTENSIONS).pick_files(),
            };
            let loaded = match chosen {
                Some(paths) if !paths.is_empty() => Loaded::Picked(what, paths),
                _ => Loaded::PickedNothing {
                    at_once: start.elapsed() < Duration::from_millis(150),
                },
            };
            let _ = tx.send(Envelope {
                generation: 0,
                loaded,
            });
            if let Some(w) = wake {
                w();
            }
        });
    }

    /// The next finished load that is still wanted.
    pub fn poll(&mut self) -> Option<Loaded> {
        while let Ok(env) = self.rx.try_recv() {
            match &env.loaded {
                Loaded::Image { .. } => {
                    if env.generation != self.image_generation {
                        continue;
                    }
                    self.loading_image = None;
                }
                Loaded::Weights {
                    slot: Slot::Main, ..
                } => {
                    if env.generation != self.weights_generation {
                        continue;
                    }
                    self.loading_weights = None;
                }
                Loaded::Weights {
                    slot: Slot::Base, ..
                } => {
                    if env.generation != self.base_generation {
                        continue;
                    }
                    self.loading_base = None;
                }
                Loaded::Drift { .. } => {
                    if env.generation != self.drift_generation {
                        continue;
                    }
                    self.computing_drift = None;
                }
                Loaded::Picked(..) | Loaded::PickedNothing { .. } => {
                    self.picking = self.picking.saturating_sub(1);
                }
            }
            return Some(env.loaded);
        }
        None
    }

    /// Forget the image being loaded (a newer image or none is wanted).
    pub fn drop_image(&mut self) {
        self.image_generation += 1;
        self.loading_image = None;
    }
}
