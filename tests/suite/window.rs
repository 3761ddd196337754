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

/// Draw a box on the lens, name its label, see its row in the statistics panel, undo, redo;
/// the sidecar on disk follows every step.
#[test]
fn draw_name_stats_undo_redo() {
    let dir = tempfile::tempdir().unwrap();
    let img = dir.path().join("tray.png");
    std::fs::copy(root().join("tests/fixtures/tf4_odd/input.png"), &img).unwrap();
    let mut h = harness(Workbench::new(Settings::default()));
    h.run_steps(1);
    h.state_mut()
        .open_paths(&[root().join("tests/fixtures/tf4_odd/weights.safetensors")]);
    h.state_mut().open_paths(&[img.clone()]);
    wait(&mut h);

    // A label of our own, then the box tool.
    h.get_by_label("New label").focus();
    h.get_by_label("New label").type_text("wilted leaf");
    h.run_steps(2);
    h.get_by_label("Add label").click();
    h.run_steps(2);
    assert_eq!(h.state().regions.label, "wilted leaf");
    h.get_by_label("Box").click();
    h.run_steps(2);

    // Drag across the middle of the lens.
    // The lens fills the central area below its title; its picture is centred there.
    let title = h.get_by_label_contains("Lens — stage").rect();
    let right = h.get_by_label("Regions").rect().left();
    let cx = (title.left() + right) / 2.0;
    let (a, b) = (
        egui::pos2(cx - 40.0, title.bottom() + 100.0),
        egui::pos2(cx + 40.0, title.bottom() + 220.0),
    );
    h.hover_at(a);
    h.run_steps(1);
    h.drag_at(a);
    h.run_steps(1);
    for k in 1..=5 {
        h.hover_at(a + (b - a) * (k as f32 / 5.0));
        h.run_steps(1);
    }
    h.drop_at(b);
    h.run_steps(3);
    let regions = h.state().regions.sidecar.as_ref().unwrap().regions.clone();
    assert_eq!(regions.len(), 1, "messages: {:?}", h.state().messages);
    assert_eq!(regions[0].label, "wilted leaf");

    // Its rows (one per stage) are in the statistics panel.
    h.run_steps(3);
    let row = format!("wilted leaf #{}", regions[0].id);
    assert_eq!(h.query_all_by_label(&row).count(), 3, "one row per stage");
    assert_eq!(h.state().regions.stats.len(), 3);
    assert!(h
        .state()
        .regions
        .stats
        .iter()
        .all(|s| s.auroc.is_some_and(|a| (0.0..=1.0).contains(&a))));

    // Saved next to the image, atomically, as the user works.
    let sidecar = dir.path().join("tray.png.regions.json");
    let on_disk = mullion::annotation::load(&sidecar).unwrap().unwrap();
    assert_eq!(on_disk.regions.len(), 1);

    h.get_by_label("Undo").click();
    h.run_steps(3);
    assert!(h
        .state()
        .regions
        .sidecar
        .as_ref()
        .unwrap()
        .regions
        .is_empty());
    assert_eq!(h.query_all_by_label(&row).count(), 0);
    assert!(mullion::annotation::load(&sidecar)
        .unwrap()
        .unwrap()
        .regions
        .is_empty());

    h.get_by_label("Redo").click();
    h.run_steps(3);
    assert_eq!(h.state().regions.sidecar.as_ref().unwrap().regions.len(), 1);
    assert_eq!(h.query_all_by_label(&row).count(), 3);

    // Reopening the image restores the regions.
    let mut h2 = harness(Workbench::new(Settings::default()));
    h2.run_steps(1);
    h2.state_mut().open_paths(&[img]);
    assert_eq!(
        h2.state().regions.sidecar.as_ref().unwrap().regions.len(),
        1
    );
}
