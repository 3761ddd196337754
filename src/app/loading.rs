//! Loading off the GUI thread: decoding an image (with its region file) and opening a
//! checkpoint each run on a thread of their own, and the native file dialogs too. A newer
//! request of the same kind makes the older one's result stale; stale results are dropped.

use super::actions::Pick;
use super::region_doc::{read_sidecar, sidecar_path_for, LoadedSidecar};
use crate::engine::input::load_image;
use crate::engine::{open_checkpoint, LoadedCheckpoint};
use crate::error::Result;
use crate::io::{IMAGE_EXTENSIONS, WEIGHT_EXTENSIONS};
use image::RgbImage;
use std::path::PathBuf;
use std::sync::mpsc::{channel, Receiver, Sender};
use std::time::{Duration, Instant};

/// Something a loader thread finished.
pub enum Loaded {
    Image {
        path: PathBuf,
        pixels: Result<RgbImage>,
        sidecar_path: PathBuf,
        sidecar: LoadedSidecar,
    },
    Weights {
        path: PathBuf,
        result: Result<LoadedCheckpoint>,
    },
    /// Paths chosen in a file dialog.
    Picked(Vec<PathBuf>),
    /// The dialog gave nothing; `at_once` when it returned before anyone could have chosen
    /// (no dialog service on this desktop).
    PickedNothing { at_once: bool },
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
    /// The image and checkpoint being loaded now, for the status line.
    pub loading_image: Option<PathBuf>,
    pub loading_weights: Option<PathBuf>,
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
            loading_image: None,
            loading_weights: None,
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
        self.loading_image.is_some() || self.loading_weights.is_some()
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

    /// Open the checkpoint at `path` and build its backbone.
    pub fn load_weights(&mut self, path: PathBuf, wake: Wake) {
        self.weights_generation += 1;
        let generation = self.weights_generation;
        self.loading_weights = Some(path.clone());
        let tx = self.tx.clone();
        spawn("mullion-load-checkpoint", move || {
            let result = open_checkpoint(&path, None);
            let _ = tx.send(Envelope {
                generation,
                loaded: Loaded::Weights { path, result },
            });
            if let Some(w) = wake {
                w();
            }
        });
    }

    /// Show a native file dialog on its own thread.
    pub fn pick(&mut self, what: Pick, wake: Wake) {
        self.picking += 1;
        let tx = self.tx.clone();
        spawn("mullion-file-dialog", move || {
            let start = Instant::now();
            let dialog = rfd::FileDialog::new();
            let chosen = match what {
                Pick::Weights => dialog
                    .add_filter("checkpoint", &WEIGHT_EXTENSIONS)
                    .pick_file()
                    .map(|p| vec![p]),
                Pick::Folder => dialog.pick_folder().map(|p| vec![p]),
                Pick::Images => dialog.add_filter("image", &IMAGE_EXTENSIONS).pick_files(),
            };
            let loaded = match chosen {
                Some(paths) if !paths.is_empty() => Loaded::Picked(paths),
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
                Loaded::Weights { .. } => {
                    if env.generation != self.weights_generation {
                        continue;
                    }
                    self.loading_weights = None;
                }
                Loaded::Picked(_) | Loaded::PickedNothing { .. } => {
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
