//! The window never does heavy work on the thread that draws it: while a 2000x1500 image runs
//! through the backbone, and afterwards while the user hovers, zooms and pans the lens, switches
//! to PCA, marks and selects a region and changes the lens stage, every forward pass, map
//! preparation, PCA fit, panel picture, legend and region statistic runs on another thread.
//! `mullion::probe` counts such work per thread; this test draws every frame on its own thread
//! and checks that thread's count stays where it was.

use crate::common::sample;
use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::annotation::Shape;
use mullion::app::actions::{Action, RegionEdit};
use mullion::app::settings::Settings;
use mullion::app::Window;
use mullion::probe::heavy_work_on_this_thread;
use std::time::{Duration, Instant};

#[test]
fn no_model_map_or_picture_work_runs_on_the_drawing_thread() {
    let dir = tempfile::tempdir().unwrap();
    let big = dir.path().join("big-tray.png");
    image::open(sample("tray-04-640x427.png"))
        .unwrap()
        .resize_exact(2000, 1500, image::imageops::FilterType::Triangle)
        .save(&big)
        .unwrap();
    let mut h = Harness::builder()
        .with_size(egui::vec2(1400.0, 900.0))
        .build_ui_state(
            |ui, w: &mut Window| w.ui(ui),
            Window::new(Settings::default()),
        );
    let before = heavy_work_on_this_thread();
    let open = |h: &mut Harness<'_, Window>, p: &std::path::Path| {
        h.state_mut().panels.sources.typed_path = p.display().to_string();
        h.run_steps(1);
        h.get_by_label("Open path").click();
        h.run_steps(1);
    };
    open(&mut h, &sample("demo.safetensors"));
    open(&mut h, &big);
    // Frames keep coming while the image loads and the backbone runs; the pointer moves over
    // the window all the while.
    let start = Instant::now();
    let mut frames_while_running = 0;
    let mut k = 0.0f32;
    loop {
        let b = &h.state().bench;
        let working = b.is_working();
        if !working && b.pictures.on_screen().is_some() {
            break;
        }
        if b.is_busy() {
            frames_while_running += 1;
        }
        k += 1.0;
        h.hover_at(egui::pos2(
            400.0 + (k * 37.0) % 500.0,
            150.0 + (k * 23.0) % 500.0,
        ));
        h.step();
        std::thread::sleep(Duration::from_millis(20));
        assert!(
            start.elapsed() < Duration::from_secs(300),
            "the run did not finish"
        );
    }
    assert!(
        frames_while_running >= 3,
        "only {frames_while_running} frames were drawn while the backbone ran"
    );
    let wait = |h: &mut Harness<'_, Window>| {
        for _ in 0..3 {
            assert!(h.state_mut().bench.wait_idle(Duration::from_secs(120)));
            h.run_steps(2);
        }
    };
    // Hover the strip and the lens, zoom the lens with the wheel, pan it by dragging.
    for (x, y) in [(500.0, 150.0), (640.0, 600.0), (700.0, 650.0)] {
        h.hover_at(egui::pos2(x, y));
        h.step();
    }
    h.event(egui::Event::MouseWheel {
        unit: egui::MouseWheelUnit::Point,
        delta: egui::vec2(0.0, 60.0),
        phase: egui::TouchPhase::Move,
        source: egui::MouseWheelSource::Unknown,
        modifiers: egui::Modifiers::NONE,
    });
    h.step();
    h.drag_at(egui::pos2(700.0, 650.0));
    h.step();
    h.hover_at(egui::pos2(740.0, 620.0));
    h.step();
    h.drop_at(egui::pos2(740.0, 620.0));
    h.run_steps(2);
    // PCA, a region, its selection, another lens stage.
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("PCA to RGB").click();
    h.run_steps(2);
    wait(&mut h);
    assert_eq!(
        h.state().bench.pictures.maps.as_ref().unwrap().map_id,
        "pca"
    );
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("token L2 norm").click();
    h.run_steps(2);
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
