//! Runs the backbone off the calling thread, with progress and cancel.
//!
//! The window never runs the model itself: it starts a [`Job`], polls its events each frame and
//! cancels it when a newer request supersedes it.

use super::input::{apply_policy, normalise, InputPolicy, Normalisation};
use super::model::{Backbone, ForwardOptions, Progress, RunControl, StageOutputs};
use crate::error::{Error, Result};
use candle_core::Tensor;
use image::RgbImage;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{channel, Receiver, Sender, TryRecvError};
use std::sync::Arc;

pub enum Event {
    /// The network input the run uses (sent by [`Job::spawn_image`] before any progress).
    Prepared(Arc<RgbImage>),
    Progress(Progress),
    Finished(Result<Arc<StageOutputs>>),
}

/// A forward pass running on its own thread.
pub struct Job {
    rx: Receiver<Event>,
    cancel: Arc<AtomicBool>,
}

impl Job {
    /// Start `model.forward(image)` on a new thread. `wake` is called after every event (the
    /// window passes a repaint request).
    pub fn spawn(
        model: Arc<Backbone>,
        image: Tensor,
        opts: ForwardOptions,
        wake: Option<Box<dyn Fn() + Send + Sync>>,
    ) -> Job {
        Job::spawn_task(model, opts, wake, move |_| Ok(image))
    }

    /// Like [`Job::spawn`] from a decoded image: the input policy (resize) and the
    /// normalisation run on the worker thread too, and the input it made is sent first.
    pub fn spawn_image(
        model: Arc<Backbone>,
        image: Arc<RgbImage>,
        policy: InputPolicy,
        norm: Normalisation,
        opts: ForwardOptions,
        wake: Option<Box<dyn Fn() + Send + Sync>>,
    ) -> Job {
        Job::spawn_task(model, opts, wake, move |tx| {
            let input = Arc::new(apply_policy(&image, policy));
            let _ = tx.send(Event::Prepared(input.clone()));
            normalise(&input, &norm)
        })
    }

    /// Like [`Job::spawn`], with the input made on the worker thread by `prepare` (for a
    /// second pass whose input is the first one's, changed: padded, say).
    pub fn spawn_with(
        model: Arc<Backbone>,
        opts: ForwardOptions,
        wake: Option<Box<dyn Fn() + Send + Sync>>,
        prepare: impl FnOnce() -> Result<Tensor> + Send + 'static,
    ) -> Job {
        Job::spawn_task(model, opts, wake, move |_| prepare())
    }

    fn spawn_task(
        model: Arc<Backbone>,
        opts: ForwardOptions,
        wake: Option<Box<dyn Fn() + Send + Sync>>,
        prepare: impl FnOnce(&Sender<Event>) -> Result<Tensor> + Send + 'static,
    ) -> Job {
        let (tx, rx) = channel();
        let cancel = Arc::new(AtomicBool::new(false));
        let flag = cancel.clone();
        std::thread::Builder::new()
            .name("mullion-forward".into())
            .spawn(move || {
                let wake = wake.as_deref();
                let progress_tx = std::sync::Mutex::new(tx.clone());
                let progress = |p: Progress| {
                    if let Ok(tx) = progress_tx.lock() {
                        let _ = tx.send(Event::Progress(p));
                    }
                    if let Some(w) = wake {
                        w();
                    }
                };
                let ctl = RunControl {
                    progress: Some(&progress),
                    cancel: Some(&flag),
                };
                let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    let image = prepare(&tx)?;
                    model.forward(&image, &opts, &ctl)
                }))
                .unwrap_or_else(|_| Err(Error::Internal("the forward pass panicked".into())));
                let _ = tx.send(Event::Finished(result.map(Arc::new)));
                if let Some(w) = wake {
                    w();
                }
            })
            .expect("spawn worker thread");
        Job { rx, cancel }
    }

    /// Ask the run to stop at the next block boundary.
    pub fn cancel(&self) {
        self.cancel.store(true, Ordering::Relaxed);
    }

    /// The next event, if one is waiting.
    pub fn poll(&self) -> Option<Event> {
        match self.rx.try_recv() {
            Ok(e) => Some(e),
            Err(TryRecvError::Empty) => None,
            Err(TryRecvError::Disconnected) => Some(Event::Finished(Err(Error::Internal(
                "the worker thread stopped".into(),
            )))),
        }
    }

    /// Block until the run ends; progress events go to `on_progress`.
    pub fn wait(self, mut on_progress: impl FnMut(Progress)) -> Result<Arc<StageOutputs>> {
        loop {
            match self.rx.recv() {
                Ok(Event::Progress(p)) => on_progress(p),
                Ok(Event::Prepared(_)) => {}
                Ok(Event::Finished(r)) => return r,
                Err(_) => return Err(Error::Internal("the worker thread stopped".into())),
            }
        }
    }
}
