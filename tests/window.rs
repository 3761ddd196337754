//! The window driven headlessly through its accessibility labels (egui_kittest): open an image
//! and a checkpoint by typed path, wait for the worker, switch the map kind, toggle grids,
//! change the scale, save the figure, and check state and the saved PNG.

use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::app::settings::Settings;
use mullion::app::Workbench;
use mullion::render;
use std::path::{Path, PathBuf};
use std::time::Duration;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).to_path_buf()
}

fn harness(bench: Workbench) -> Harness<'static, Workbench> {
    Harness::builder()
        .with_size(egui::vec2(1400.0, 900.0))
        .build_ui_state(|ui, b: &mut Workbench| b.ui(ui), bench)
}

fn open_by_path(h: &mut Harness<'_, Workbench>, path: &Path) {
    h.get_by_label("Path:").focus();
    h.state_mut().typed_path = path.display().to_string();
    h.run_steps(2);
    h.get_by_label("Open path").click();
    h.run_steps(2);
}

fn wait(h: &mut Harness<'_, Workbench>) {
    assert!(
        h.state_mut().wait_for_result(Duration::from_secs(60)),
        "the worker did not finish"
    );
    h.run_steps(3);
}

fn count_colour(img: &image::RgbaImage, c: [u8; 3]) -> usize {
    img.pixels()
        .filter(|p| p[0] == c[0] && p[1] == c[1] && p[2] == c[2])
        .count()
}

#[test]
fn open_run_switch_toggle_save() {
    let dir = tempfile::tempdir().unwrap();
    let img_src = root().join("tests/fixtures/timm_odd/input.png");
    let img = dir.path().join("bench-tray.png");
    std::fs::copy(&img_src, &img).unwrap();
    let weights = root().join("tests/fixtures/timm_odd/weights.safetensors");

    let mut h = harness(Workbench::new(Settings::default()));
    h.run_steps(2);
    open_by_path(&mut h, &weights);
    assert!(h
        .state()
        .weights
        .as_ref()
        .is_some_and(|w| !w.random && w.name == "weights.safetensors"));
    open_by_path(&mut h, &img);
    wait(&mut h);
    {
        let b = h.state();
        let shown = b.shown.as_ref().expect("a result");
        assert_eq!(shown.outputs.geometry.image, (115, 150));
        assert_eq!(shown.outputs.stages.len(), 4);
    }
    // The strip labels each stage.
    assert!(h.query_all_by_label("stage 3").count() >= 1);

    // Map kind: PCA through the combo box.
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("PCA to RGB").click();
    h.run_steps(3);
    assert_eq!(h.state().settings.map_kind, "pca");
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("token L2 norm").click();
    h.run_steps(3);
    assert_eq!(h.state().settings.map_kind, "norm");

    // Grids and scale.
    assert!(!h.state().settings.show_shifted);
    h.get_by_label("Shifted window grid").click();
    h.run_steps(2);
    assert!(h.state().settings.show_shifted);
    h.get_by_label("Log scale").click();
    h.run_steps(2);
    assert!(h.state().settings.log_scale);

    // Save: the PNG is the shared renderer's figure, with both grids and a legend.
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    let png = dir.path().join("bench-tray.norm.figure.png");
    assert!(png.exists(), "messages: {:?}", h.state().messages);
    let fig = image::open(&png).unwrap().to_rgba8();
    assert!(count_colour(&fig, render::SHIFTED_GRID) > 100);
    assert!(count_colour(&fig, render::REGULAR_GRID) > 100);
    assert!(count_colour(&fig, render::PADDING_HATCH) > 100);
    let stats: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(dir.path().join("bench-tray.norm.stats.json")).unwrap(),
    )
    .unwrap();
    assert!(stats.to_string().contains("p99"));
    assert!(dir.path().join("bench-tray.norm.stats.csv").exists());

    // Toggling the shifted grid off removes its colour from the next save.
    h.get_by_label("Shifted window grid").click();
    h.run_steps(2);
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    let fig = image::open(&png).unwrap().to_rgba8();
    assert_eq!(count_colour(&fig, render::SHIFTED_GRID), 0);
}

#[test]
fn a_newer_request_supersedes_and_bad_files_only_message() {
    let mut h = harness(Workbench::new(Settings::default()));
    h.run_steps(1);
    // A file that is not a checkpoint: a message, nothing else changes.
    let not_ckpt = root().join("tests/fixtures/cases.json");
    h.state_mut().typed_path = not_ckpt.display().to_string();
    h.get_by_label("Open path").click();
    h.run_steps(2);
    assert!(h.state().weights.is_none());
    assert!(h
        .state()
        .messages
        .iter()
        .any(|m| m.text.contains("cases.json")));

    // Two images in a row: the second one wins.
    h.state_mut().use_random_weights();
    let a = root().join("tests/fixtures/timm_multiple/input.png");
    let b = root().join("tests/fixtures/tf4_odd/input.png");
    h.state_mut().open_paths(&[a]);
    h.state_mut().open_paths(&[b]);
    wait(&mut h);
    assert_eq!(
        h.state().shown.as_ref().unwrap().outputs.geometry.image,
        (160, 97)
    );
}
