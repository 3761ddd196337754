//! The window driven headlessly through its accessibility labels (egui_kittest): open an image
//! and a checkpoint by typed path, wait for the threads, switch the map kind, toggle grids,
//! change the scale, draw and annotate regions, save the figure, and check state and the saved
//! files.

use crate::common::{fixtures, root};
use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::annotation::Shape;
use mullion::app::actions::{Action, RegionEdit};
use mullion::app::panels::readout::hover_lines;
use mullion::app::pictures::THREAD_NAME;
use mullion::app::settings::Settings;
use mullion::app::Window;
use mullion::render;
use std::path::Path;
use std::time::Duration;

fn harness(window: Window) -> Harness<'static, Window> {
    Harness::builder()
        .with_size(egui::vec2(1400.0, 900.0))
        .build_ui_state(|ui, w: &mut Window| w.ui(ui), window)
}

fn new_window() -> Harness<'static, Window> {
    let mut h = harness(Window::new(Settings::default()));
    h.run_steps(2);
    h
}

fn open_by_path(h: &mut Harness<'_, Window>, path: &Path) {
    h.get_by_label("Path:").focus();
    h.state_mut().panels.sources.typed_path = path.display().to_string();
    h.run_steps(2);
    h.get_by_label("Open path").click();
    h.run_steps(2);
}

/// Let every thread finish, then a few frames to show what they made.
fn wait(h: &mut Harness<'_, Window>) {
    for _ in 0..3 {
        assert!(
            h.state_mut().bench.wait_idle(Duration::from_secs(60)),
            "the threads did not finish"
        );
        h.run_steps(2);
    }
}

fn apply(h: &mut Harness<'_, Window>, a: Action) {
    h.state_mut().bench.apply(a);
    wait(h);
}

fn count_colour(img: &image::RgbaImage, c: [u8; 3]) -> usize {
    img.pixels()
        .filter(|p| p[0] == c[0] && p[1] == c[1] && p[2] == c[2])
        .count()
}

fn messages(h: &Harness<'_, Window>) -> Vec<String> {
    h.state()
        .bench
        .messages
        .iter()
        .map(|m| m.text.clone())
        .collect()
}

#[test]
fn open_run_switch_toggle_save() {
    let dir = tempfile::tempdir().unwrap();
    let img = dir.path().join("bench-tray.png");
    std::fs::copy(fixtures().join("timm_odd/input.png"), &img).unwrap();
    let weights = fixtures().join("timm_odd/weights.safetensors");

    let mut h = new_window();
    open_by_path(&mut h, &weights);
    wait(&mut h);
    assert!(h
        .state()
        .bench
        .weights
        .as_ref()
        .is_some_and(|w| !w.random && w.name == "weights.safetensors"));
    open_by_path(&mut h, &img);
    wait(&mut h);
    {
        let b = &h.state().bench;
        let shown = b.shown.as_ref().expect("a result");
        assert_eq!(shown.outputs.geometry.image, (115, 150));
        assert_eq!(shown.outputs.stages.len(), 4);
        let maps = b.pictures.maps.as_ref().expect("maps");
        assert_eq!(
            maps.made_on, THREAD_NAME,
            "maps are prepared off the GUI thread"
        );
    }
    // The strip labels each stage.
    assert!(h.query_all_by_label("stage 3").count() >= 1);

    // Map kind: PCA through the combo box, and back.
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("PCA to RGB").click();
    h.run_steps(2);
    wait(&mut h);
    assert_eq!(h.state().bench.settings.map_kind, "pca");
    assert_eq!(
        h.state().bench.pictures.maps.as_ref().unwrap().map_id,
        "pca"
    );
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("token L2 norm").click();
    h.run_steps(2);
    wait(&mut h);
    assert_eq!(h.state().bench.settings.map_kind, "norm");

    // A grid toggle is drawn on screen over the pictures: no new maps, no new pictures.
    let before = h.state().bench.pictures.work;
    assert!(!h.state().bench.settings.show_shifted);
    h.get_by_label("Shifted window grid").click();
    h.run_steps(2);
    wait(&mut h);
    assert!(h.state().bench.settings.show_shifted);
    assert_eq!(h.state().bench.pictures.work, before, "nothing made again");
    // The opacity only redraws the pictures: the maps are not prepared again.
    let mut s = h.state().bench.settings.clone();
    s.opacity = 0.3;
    apply(&mut h, Action::SetSettings(Box::new(s)));
    let after = h.state().bench.pictures.work;
    assert_eq!(after.maps_prepared, before.maps_prepared, "no new maps");
    assert_eq!(
        after.pictures_drawn,
        before.pictures_drawn + 1,
        "one redraw"
    );
    // The log scale changes the maps.
    h.get_by_label("Log scale").click();
    h.run_steps(2);
    wait(&mut h);
    assert!(h.state().bench.settings.log_scale);
    assert_eq!(
        h.state().bench.pictures.work.maps_prepared,
        after.maps_prepared + 1
    );

    // Save: the PNG is the shared renderer's figure, with both grids and a legend.
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let png = dir.path().join("bench-tray.norm.figure.png");
    assert!(png.exists(), "messages: {:?}", messages(&h));
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
    wait(&mut h);
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let fig = image::open(&png).unwrap().to_rgba8();
    assert_eq!(count_colour(&fig, render::SHIFTED_GRID), 0);
}

#[test]
fn a_newer_request_supersedes_and_bad_files_only_message() {
    let mut h = new_window();
    // A file that is not a checkpoint: a message, nothing else changes.
    let not_ckpt = fixtures().join("cases.json");
    h.state_mut().panels.sources.typed_path = not_ckpt.display().to_string();
    h.get_by_label("Open path").click();
    h.run_steps(2);
    wait(&mut h);
    assert!(h.state().bench.weights.is_none());
    assert!(messages(&h).iter().any(|m| m.contains("cases.json")));

    // Two images in a row: the second one wins.
    h.state_mut().bench.use_random_weights();
    let a = fixtures().join("timm_multiple/input.png");
    let b = fixtures().join("tf4_odd/input.png");
    h.state_mut().bench.open_paths(&[a]);
    h.state_mut().bench.open_paths(&[b]);
    wait(&mut h);
    assert_eq!(
        h.state()
            .bench
            .shown
            .as_ref()
            .unwrap()
            .outputs
            .geometry
            .image,
        (160, 97)
    );
    assert_eq!(
        h.state()
            .bench
            .pictures
            .maps
            .as_ref()
            .unwrap()
            .outputs
            .geometry
            .image,
        (160, 97),
        "the maps on screen belong to the image on screen"
    );
}

/// Draw a box on the lens, name its label, see its row in the statistics panel, undo, redo;
/// the sidecar on disk follows every step.
#[test]
fn draw_name_stats_undo_redo() {
    let dir = tempfile::tempdir().unwrap();
    let img = dir.path().join("tray.png");
    std::fs::copy(fixtures().join("tf4_odd/input.png"), &img).unwrap();
    let mut h = new_window();
    h.state_mut()
        .bench
        .open_paths(&[fixtures().join("tf4_odd/weights.safetensors")]);
    wait(&mut h);
    h.state_mut().bench.open_paths(std::slice::from_ref(&img));
    wait(&mut h);

    // A label of our own, then the box tool.
    h.get_by_label("New label").focus();
    h.get_by_label("New label").type_text("wilted leaf");
    h.run_steps(2);
    h.get_by_label("Add label").click();
    h.run_steps(2);
    assert_eq!(h.state().bench.regions.label, "wilted leaf");
    h.get_by_label("Box").click();
    h.run_steps(2);

    // Drag across the middle of the lens: it fills the central area below its title, with
    // its picture centred there.
    let title = h.get_by_label_contains("Lens — stage").rect();
    let right = h.get_by_label("Regions").rect().left();
    let cx = (title.left() + right) / 2.0;
    let (a, b) = (
        egui::pos2(cx - 40.0, title.bottom() + 60.0),
        egui::pos2(cx + 40.0, title.bottom() + 140.0),
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
    let regions = h
        .state()
        .bench
        .regions
        .sidecar
        .as_ref()
        .unwrap()
        .regions
        .clone();
    assert_eq!(regions.len(), 1, "messages: {:?}", messages(&h));
    assert_eq!(regions[0].label, "wilted leaf");

    // Its rows (one per stage) are in the statistics panel (computed on their own thread).
    wait(&mut h);
    let row = format!("wilted leaf #{}", regions[0].id);
    assert_eq!(h.query_all_by_label(&row).count(), 3, "one row per stage");
    assert_eq!(h.state().bench.regions.stats.len(), 3);
    assert!(h
        .state()
        .bench
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
    let b = &h.state().bench;
    assert!(b.regions.sidecar.as_ref().unwrap().regions.is_empty());
    assert_eq!(h.query_all_by_label(&row).count(), 0);
    assert!(mullion::annotation::load(&sidecar)
        .unwrap()
        .unwrap()
        .regions
        .is_empty());

    h.get_by_label("Redo").click();
    h.run_steps(3);
    wait(&mut h);
    assert_eq!(
        h.state()
            .bench
            .regions
            .sidecar
            .as_ref()
            .unwrap()
            .regions
            .len(),
        1
    );
    assert_eq!(h.query_all_by_label(&row).count(), 3);

    // Reopening the image restores the regions.
    let mut h2 = new_window();
    h2.state_mut().bench.open_paths(&[img]);
    wait(&mut h2);
    assert_eq!(
        h2.state()
            .bench
            .regions
            .sidecar
            .as_ref()
            .unwrap()
            .regions
            .len(),
        1
    );
}

/// A note typed into the selected region's note field is saved as it is typed, survives going
/// to the next image and back, and the saved figure's caption carries the label key, the note
/// and the pin, as the report's figures do.
#[test]
fn notes_are_saved_and_the_figure_caption_carries_them() {
    let dir = tempfile::tempdir().unwrap();
    for name in ["a.png", "b.png"] {
        std::fs::copy(fixtures().join("tf4_odd/input.png"), dir.path().join(name)).unwrap();
    }
    let mut h = new_window();
    h.state_mut().bench.use_random_weights();
    h.state_mut().bench.open_paths(&[dir.path().to_path_buf()]);
    wait(&mut h);
    apply(
        &mut h,
        Action::Region(RegionEdit::DefineLabel("weed".into())),
    );
    apply(
        &mut h,
        Action::Region(RegionEdit::Add(Shape::Box {
            x0: 10.0,
            y0: 20.0,
            x1: 60.0,
            y1: 70.0,
        })),
    );
    apply(
        &mut h,
        Action::Region(RegionEdit::AddPin {
            at: [30.0, 40.0],
            text: "check leaf tip".into(),
        }),
    );
    h.get_by_label("region note").focus();
    h.get_by_label("region note").type_text("curled edge");
    h.run_steps(3);
    let sidecar = dir.path().join("a.png.regions.json");
    let on_disk = mullion::annotation::load(&sidecar).unwrap().unwrap();
    assert_eq!(on_disk.regions[0].note, "curled edge", "saved while typing");

    // Away and back: the note is still there. While the next image loads, nothing of this
    // one (maps or regions) stays on screen.
    h.get_by_label("Next >").click();
    h.run_steps(1);
    {
        let b = &h.state().bench;
        assert!(b.pictures.maps.is_none() && b.shown.is_none());
        assert!(b
            .regions
            .sidecar
            .as_ref()
            .is_none_or(|sc| sc.image == "b.png"));
    }
    wait(&mut h);
    h.get_by_label("< Previous").click();
    h.run_steps(2);
    wait(&mut h);
    let b = &h.state().bench;
    assert_eq!(
        b.regions.sidecar.as_ref().unwrap().regions[0].note,
        "curled edge"
    );

    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let done = h.state().bench.last_export.clone().expect("a saved figure");
    let caption = done.notes.join("\n");
    assert!(
        caption.contains("outlines: 1 labelled regions; weed"),
        "{caption}"
    );
    assert!(caption.contains("curled edge"), "{caption}");
    assert!(caption.contains("check leaf tip"), "{caption}");
    assert!(done.png.exists());
}

/// A channel beyond a stage's width leaves no maps on screen and says why; the read-out
/// follows the maps on screen, so it cannot index past them; a larger image with the same
/// setting is no crash.
#[test]
fn a_failed_map_clears_the_pictures_and_says_why() {
    let mut h = new_window();
    h.state_mut().bench.use_random_weights();
    h.state_mut()
        .bench
        .open_paths(&[fixtures().join("tf4_odd/input.png")]);
    wait(&mut h);
    assert!(h.state().bench.pictures.textures.is_some());
    let mut s = h.state().bench.settings.clone();
    s.map_kind = "channel".into();
    s.channel = 4000;
    apply(&mut h, Action::SetSettings(Box::new(s.clone())));
    let b = &h.state().bench;
    assert!(b.pictures.maps.is_none() && b.pictures.textures.is_none());
    let problem = b.pictures.problem.clone().expect("a reason");
    assert!(problem.contains("4000"), "{problem}");
    assert!(
        h.query_all_by_label_contains("4000").count() >= 1,
        "said on screen"
    );
    assert!(h.query_all_by_label("pointer: no maps on screen").count() == 1);

    // A larger image with the same setting: still no maps, no panic.
    h.state_mut()
        .bench
        .open_paths(&[root().join("sample-data/tray-02-500x375.png")]);
    wait(&mut h);
    assert!(h.state().bench.pictures.maps.is_none());
    s.channel = 3;
    apply(&mut h, Action::SetSettings(Box::new(s)));
    let maps = h.state().bench.pictures.maps.clone().expect("maps again");
    assert_eq!(maps.map_id, "channel:3");
    // Read-out lines describe the maps on screen, padding included.
    let lines = hover_lines(&maps, 0, (499.0, 374.0));
    assert_eq!(lines.len(), 1 + maps.outputs.stages.len());
    assert!(lines[1].contains("value"), "{lines:?}");
    let far = hover_lines(&maps, 0, (5000.0, 5000.0));
    assert!(far[1].contains("outside"), "{far:?}");
}

/// Cancel leaves nothing of an older result under the new input, says so, and *Run* starts
/// it again.
#[test]
fn cancel_clears_and_run_restarts() {
    let dir = tempfile::tempdir().unwrap();
    let big = dir.path().join("big.png");
    image::RgbImage::from_fn(1600, 1200, |x, y| {
        image::Rgb([(x % 251) as u8, (y % 241) as u8, ((x * y) % 239) as u8])
    })
    .save(&big)
    .unwrap();
    let mut h = new_window();
    h.state_mut().bench.use_random_weights();
    h.state_mut().bench.open_paths(&[big]);
    // Wait for the image to load and the run to start, then cancel it.
    let start = std::time::Instant::now();
    while !h.state().bench.is_busy() && start.elapsed() < Duration::from_secs(30) {
        h.state_mut().bench.poll();
        std::thread::sleep(Duration::from_millis(2));
    }
    assert!(h.state().bench.is_busy(), "the run started");
    h.run_steps(1);
    h.get_by_label("Cancel").click();
    h.run_steps(2);
    wait(&mut h);
    let b = &h.state().bench;
    assert!(b.shown.is_none() && b.pictures.maps.is_none());
    assert!(b.run_problem.as_deref().unwrap_or("").contains("cancelled"));
    h.get_by_label("Run").click();
    h.run_steps(2);
    wait(&mut h);
    let b = &h.state().bench;
    assert_eq!(
        b.shown.as_ref().unwrap().outputs.geometry.image,
        (1200, 1600)
    );
    assert!(b.pictures.textures.is_some());
}

/// As a practitioner goes on: the padding rules are chosen in the window with the layout's
/// default marked; a one-token region's AUROC is marked and sorts last; the table is saved as
/// CSV with the report's columns; a folder reopened after saving lists no saved figure; with no
/// file-dialog service the window says so and the path field takes the cursor.
#[test]
fn padding_rules_few_token_rows_table_export_and_own_outputs() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::copy(
        fixtures().join("timm_odd/input.png"),
        dir.path().join("a.png"),
    )
    .unwrap();
    let mut h = new_window();
    h.state_mut()
        .bench
        .open_paths(&[fixtures().join("timm_odd/weights.safetensors")]);
    wait(&mut h);
    h.state_mut().bench.open_paths(&[dir.path().to_path_buf()]);
    wait(&mut h);
    let layout = h
        .state()
        .bench
        .weights
        .as_ref()
        .unwrap()
        .model
        .default_semantics;
    assert_eq!(
        layout.pad_order.name(),
        "shift-then-pad",
        "timm's own order"
    );
    // The combo marks the layout's default and switches the run.
    h.get_by_label("pad order").click();
    h.run_steps(2);
    assert!(
        h.query_all_by_label("shift-then-pad (layout default)")
            .count()
            >= 1,
        "the layout's default is marked"
    );
    h.get_by_label("pad-then-shift").click();
    h.run_steps(2);
    wait(&mut h);
    let sem = h
        .state()
        .bench
        .shown
        .as_ref()
        .unwrap()
        .outputs
        .geometry
        .semantics;
    assert_eq!(sem.pad_order.name(), "pad-then-shift");

    // A one-pixel box and a large one.
    for shape in [
        Shape::Box {
            x0: 40.0,
            y0: 40.0,
            x1: 41.0,
            y1: 41.0,
        },
        Shape::Box {
            x0: 0.0,
            y0: 0.0,
            x1: 100.0,
            y1: 80.0,
        },
    ] {
        apply(&mut h, Action::Region(RegionEdit::Add(shape)));
    }
    h.run_steps(2);
    let stats = h.state().bench.regions.stats.clone();
    let small: Vec<_> = stats.iter().filter(|s| s.region == 1).collect();
    assert!(small.iter().all(|s| s.tokens <= 1 && s.outside_tokens > 5));
    assert!(
        h.query_all_by_label_contains(" few").count() >= 1,
        "marked on screen"
    );
    h.state_mut().panels.table.sort = (mullion::app::panels::region_table::Column::Auroc, true);
    h.run_steps(2);
    // The large region's rows come first, the one-token region's last.
    let top = |h: &Harness<'_, Window>, label: &str| {
        h.query_all_by_label(label)
            .map(|n| n.rect().top())
            .fold(f32::INFINITY, f32::min)
    };
    assert!(
        top(&h, "region #2") < top(&h, "region #1"),
        "few-token rows sort last"
    );

    h.get_by_label("Save table as CSV").click();
    h.run_steps(2);
    let table = dir.path().join("a.norm.regions.csv");
    let mut r = csv::Reader::from_path(&table).unwrap();
    let header: Vec<String> = r.headers().unwrap().iter().map(String::from).collect();
    assert_eq!(header, mullion::analysis::region_stats::CSV_COLUMNS);
    assert_eq!(r.records().count(), stats.len());

    // Save a figure, reopen the folder: the figure is not listed as an input.
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    assert!(dir.path().join("a.norm.figure.png").exists());
    h.state_mut().bench.open_paths(&[dir.path().to_path_buf()]);
    wait(&mut h);
    assert_eq!(
        h.state().bench.images.len(),
        1,
        "{:?}",
        h.state().bench.images
    );

    // No file-dialog service here: said, and the path field is asked to take the cursor.
    h.get_by_label("Open images…").click();
    let start = std::time::Instant::now();
    while h.state().bench.path_focus_requests == 0 && start.elapsed() < Duration::from_secs(20) {
        h.run_steps(1);
        std::thread::sleep(Duration::from_millis(20));
    }
    assert_eq!(h.state().bench.path_focus_requests, 1);
    assert!(messages(&h).iter().any(|m| m.contains("no file dialog")));
}

/// The log is capped, text is never under 11 points, and region outlines can be hidden.
#[test]
fn log_cap_text_size_and_hidden_outlines() {
    let mut h = new_window();
    for i in 0..(mullion::app::state::MESSAGE_CAP + 50) {
        h.state_mut().bench.error(format!("message {i}"));
    }
    h.run_steps(1);
    let b = &h.state().bench;
    assert_eq!(b.messages.len(), mullion::app::state::MESSAGE_CAP);
    assert!(b
        .messages
        .last()
        .unwrap()
        .text
        .ends_with(&format!("{}", mullion::app::state::MESSAGE_CAP + 49)));
    let smallest = h
        .ctx
        .global_style()
        .text_styles
        .values()
        .map(|f| f.size)
        .fold(f32::INFINITY, f32::min);
    assert!(smallest >= mullion::app::window::MIN_TEXT, "{smallest}");

    h.state_mut().bench.use_random_weights();
    h.state_mut()
        .bench
        .open_paths(&[fixtures().join("tf4_odd/input.png")]);
    wait(&mut h);
    assert!(h.state().bench.settings.show_regions);
    h.get_by_label("Show region outlines").click();
    h.run_steps(2);
    assert!(!h.state().bench.settings.show_regions);
    assert!(!h.state().bench.regions.outlines);
    assert_eq!(h.query_all_by_label("region outlines hidden").count(), 1);
}
