//! The forward pass off the calling thread: progress after every block, cancel between blocks.

use mullion::engine::worker::{Event, Job};
use mullion::engine::{Backbone, Config, ForwardOptions};
use mullion::error::Error;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;

fn small() -> Arc<Backbone> {
    let cfg = Config {
        embed_dim: 16,
        depths: vec![2, 2, 2],
        heads: vec![1, 2, 4],
        ..Config::tiny()
    };
    Arc::new(Backbone::random(cfg, 1).unwrap())
}

fn image(h: usize, w: usize) -> candle_core::Tensor {
    candle_core::Tensor::randn(0f32, 1f32, (3, h, w), &candle_core::Device::Cpu).unwrap()
}

#[test]
fn progress_reaches_every_block_and_wakes_the_caller() {
    let model = small();
    let wakes = Arc::new(AtomicUsize::new(0));
    let counter = wakes.clone();
    let job = Job::spawn(
        model.clone(),
        image(61, 83),
        ForwardOptions::default(),
        Some(Box::new(move || {
            counter.fetch_add(1, Ordering::Relaxed);
        })),
    );
    let mut seen = Vec::new();
    let out = job.wait(|p| seen.push(p.done)).unwrap();
    let total = model.config.total_blocks() + 1;
    assert_eq!(seen, (1..=total).collect::<Vec<_>>());
    assert_eq!(out.stages.len(), 3);
    assert_eq!(out.stages[0].dims(), &[16, 21, 16]);
    // One wake-up per progress event and one after the result; the last may come just after
    // `wait` has returned, since the worker sends the result before it wakes the caller.
    let start = std::time::Instant::now();
    while wakes.load(Ordering::Relaxed) < total + 1 && start.elapsed().as_secs() < 5 {
        std::thread::sleep(std::time::Duration::from_millis(5));
    }
    assert_eq!(wakes.load(Ordering::Relaxed), total + 1);
}

#[test]
fn cancel_stops_between_blocks() {
    let model = small();
    let job = Job::spawn(model, image(900, 900), ForwardOptions::default(), None);
    job.cancel();
    let result = loop {
        match job.poll() {
            Some(Event::Finished(r)) => break r,
            Some(Event::Progress(_) | Event::Prepared(_)) | None => std::thread::yield_now(),
        }
    };
    assert!(matches!(result, Err(Error::Cancelled)));
}
