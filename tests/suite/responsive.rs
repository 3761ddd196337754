//! The window never does heavy work on the thread that draws it: while a 2000x1500 image runs
//! through the backbone, and afterwards while the user hovers, zooms and pans the lens, switches
//! to PCA, marks and selects a region and changes the lens stage, every forward pass, map
//! preparation, PCA fit, panel picture, legend and region statistic runs on another thread.
//! `mullion::probe` counts such work per thread; these tests draw every frame on their own thread
//! and check that thread's count stays where it was. The second test does the same during a
//! Swin-B pass (the published base size, random weights) on the same 2000x1500 image.

use crate::common::sample;
use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::annotation::Shape;
use mullion::app::actions::{Action, RegionEdit};
use mullion::app::settings::Settings;
use mullion::app::Window;
use mullion::engine::{random_timm_state_dict, Config};
use mullion::probe::heavy_work_on_this_thread;
use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// A tray photo scaled to 2000x1500, the size of a camera frame users bring.
fn big_image(dir: &Path) -> PathBuf {
    let big = dir.join("big-tray.png");
    image::open(sample("tray-04-640x427.png"))
        .unwrap()
        .resize_exact(2000, 1500, image::imageops::FilterType::Triangle)
        .save(&big)
        .unwrap();
    big
}

fn window() -> Harness<'static, Window> {
    Harness::builder()
        .with_size(egui::vec2(1400.0, 900.0))
        .build_ui_state(
            |ui, w: &mut Window| w.ui(ui),
            Window::new(Settings::default()),
        )
}

fn open(h: &mut Harness<'_, Window>, p: &Path) {
    h.state_mut().panels.sources.typed_path = p.display().to_string();
    h.run_steps(1);
    h.get_by_label("Open path").click();
    h.run_steps(1);
}

/// What the drawing thread saw while the image loaded and the backbone ran.
struct WhileRunning {
    frames: usize,
    /// Distinct `done` counts of the progress bar.
    progress: BTreeSet<usize>,
}

/// Draw frames until the pictures are on screen, moving the pointer over the window and
/// turning the mouse wheel over the lens all the while, as an impatient user does.
fn draw_until_shown(h: &mut Harness<'_, Window>, limit: Duration) -> WhileRunning {
    let start = Instant::now();
    let mut seen = WhileRunning {
        frames: 0,
        progress: BTreeSet::new(),
    };
    let mut k = 0.0f32;
    loop {
        let b = &h.state().bench;
        if !b.is_working() && b.pictures.on_screen().is_some() {
            return seen;
        }
        if b.is_busy() {
            seen.frames += 1;
            if let Some(p) = b.progress_of(false) {
                seen.progress.insert(p.done);
            }
        }
        k += 1.0;
        h.hover_at(egui::pos2(
            400.0 + (k * 37.0) % 500.0,
            150.0 + (k * 23.0) % 500.0,
        ));
        let n = k as usize;
        if n.is_multiple_of(10) {
            h.event(wheel(if n.is_multiple_of(20) { 60.0 } else { -60.0 }));
        }
        h.step();
        std::thread::sleep(Duration::from_millis(20));
        assert!(start.elapsed() < limit, "the run did not finish");
    }
}

fn wheel(dy: f32) -> egui::Event {
    egui::Event::MouseWheel {
        unit: egui::MouseWheelUnit::Point,
        delta: egui::vec2(0.0, dy),
        phase: egui::TouchPhase::Move,
        source: egui::MouseWheelSource::Unknown,
        modifiers: egui::Modifiers::NONE,
    }
}

fn wait(h: &mut Harness<'_, Window>) {
    for _ in 0..3 {
        assert!(h.state_mut().bench.wait_idle(Duration::from_secs(300)));
        h.run_steps(2);
    }
}

fn choose_kind(h: &mut Harness<'_, Window>, label: &str) {
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label(label).click();
    h.run_steps(2);
}

#[test]
fn no_model_map_or_picture_work_runs_on_the_drawing_thread() {
    let dir = tempfile::tempdir().unwrap();
    let big = big_image(dir.path());
    let mut h = window();
    let before = heavy_work_on_this_thread();
    open(&mut h, &sample("demo.safetensors"));
    open(&mut h, &big);
    // Frames keep coming while the image loads and the backbone runs; the pointer moves over
    // the window all the while.
    let seen = draw_until_shown(&mut h, Duration::from_secs(300));
    assert!(
        seen.frames >= 3,
        "only {} frames were drawn while the backbone ran",
        seen.frames
    );
    // Hover the strip and the lens, zoom the lens with the wheel, pan it by dragging.
    for (x, y) in [(500.0, 150.0), (640.0, 600.0), (700.0, 650.0)] {
        h.hover_at(egui::pos2(x, y));
        h.step();
    }
    h.event(wheel(60.0));
    h.step();
    h.drag_at(egui::pos2(700.0, 650.0));
    h.step();
    h.hover_at(egui::pos2(740.0, 620.0));
    h.step();
    h.drop_at(egui::pos2(740.0, 620.0));
    h.run_steps(2);
    // PCA, a region, its selection, another lens stage.
    choose_kind(&mut h, "PCA to RGB");
    wait(&mut h);
    assert_eq!(
        h.state().bench.pictures.maps.as_ref().unwrap().map_id,
        "pca"
    );
    choose_kind(&mut h, "token L2 norm");
    h.state_mut()
        .bench
        .apply(Action::Region(RegionEdit::Add(Shape::Box {
            x0: 100.0,
            y0: 100.0,
            x1: 900.0,
            y1: 700.0,
        })));
    h.state_mut().bench.apply(Action::FocusStage(2));
    wait(&mut h);
    let b = &h.state().bench;
    assert!(!b.regions.stats.is_empty(), "the statistics were computed");
    assert!(
        !b.regions.highlight.is_empty(),
        "the highlight was computed"
    );
    assert!(b.pictures.work.maps_prepared >= 3);
    assert_eq!(
        heavy_work_on_this_thread(),
        before,
        "heavy work ran on the thread that draws the window"
    );
}

/// Swin-B (embed 128, depths 2-2-18-2, heads 4-8-16-32, window 7; Liu et al. 2021, Table 1)
/// with random weights, on the 2000x1500 image: about a teraflop of work, tens of seconds on
/// two cores. The window keeps drawing, its progress bar moves block by block, and the maps,
/// the switch to PCA and the pictures all run off the drawing thread.
#[test]
fn a_swin_b_pass_on_a_large_image_leaves_the_window_drawing() {
    let _machine = crate::common::machine_to_myself();
    let dir = tempfile::tempdir().unwrap();
    let big = big_image(dir.path());
    let weights = dir.path().join("swin-b-random.safetensors");
    let sd: std::collections::HashMap<_, _> = random_timm_state_dict(&Config::base(), 11)
        .unwrap()
        .into_iter()
        .collect();
    candle_core::safetensors::save(&sd, &weights).unwrap();
    drop(sd);
    let mut h = window();
    let before = heavy_work_on_this_thread();
    open(&mut h, &weights);
    assert!(
        h.state_mut().bench.wait_idle(Duration::from_secs(60)),
        "the checkpoint loaded"
    );
    h.run_steps(2);
    assert_eq!(
        h.state()
            .bench
            .weights
            .as_ref()
            .unwrap()
            .model
            .config
            .depths,
        [2, 2, 18, 2]
    );
    open(&mut h, &big);
    h.run_steps(3);
    // Ask for PCA while the pass runs: it is fitted when the features arrive, off this thread.
    choose_kind(&mut h, "PCA to RGB");
    let seen = draw_until_shown(&mut h, Duration::from_secs(900));
    assert!(
        seen.frames >= 20,
        "only {} frames were drawn during a Swin-B pass",
        seen.frames
    );
    assert!(
        seen.progress.len() >= 10,
        "the progress bar showed only {:?} of 25 steps",
        seen.progress
    );
    wait(&mut h);
    let b = &h.state().bench;
    assert_eq!(b.pictures.maps.as_ref().unwrap().map_id, "pca");
    assert_eq!(
        heavy_work_on_this_thread(),
        before,
        "heavy work ran on the thread that draws the window"
    );
}
