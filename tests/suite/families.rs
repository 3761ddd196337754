//! Every checkpoint the loader opens works through the whole tool, not only `mullion features`:
//! for each committed reference case (every family and key layout in `tests/fixtures/cases.json`,
//! each made by timm or transformers as its case.json names), its weights go through the
//! window, `figure`, `report` over its image with a labelled region, `compare` against themselves,
//! `padding` and `attention`, the way a user runs them.
//!
//! The outside checks are the reference cases themselves (their features match the libraries in
//! `reference_outputs.rs`); here the checks are the identities every family must keep: a
//! checkpoint compared with itself has linear CKA 1 and cosine 1 at every stage (Kornblith et
//! al. 2019, eq. 2, CKA(X, X) = 1) and zero drift under names in timm >= 0.9's spelling,
//! padding by 0 pixels changes nothing, and every attention row sums to 1.

use crate::common::{mullion, num, read_csv};
use crate::kit::{harness, type_path, wait};
use crate::reference_outputs::{case, case_names};
use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::app::actions::Action;
use mullion::app::Window;
use serde_json::Value;
use std::path::{Path, PathBuf};

struct Case {
    name: String,
    weights: PathBuf,
    image: PathBuf,
    /// The pad options the case was made with (the layout's defaults unless the case says).
    flags: Vec<String>,
    /// Stages of the model.
    stages: usize,
    /// The shape the tensors do not tell (a timm Swin V2 file's window), as a `--config` file
    /// gives it.
    shape: Option<Value>,
}

fn cases() -> Vec<Case> {
    case_names()
        .into_iter()
        .map(|name| {
            let (dir, case) = case(&name);
            let mut flags = Vec::new();
            for key in ["pad_order", "small_stage"] {
                if let Some(v) = case[key].as_str() {
                    flags.push(format!("--{}", key.replace('_', "-")));
                    flags.push(v.to_string());
                }
            }
            Case {
                weights: dir.join(case["weights"].as_str().unwrap()),
                image: dir.join(case["image"].as_str().unwrap()),
                stages: case["config"]["depths"].as_array().unwrap().len(),
                shape: case.get("override").cloned(),
                name,
                flags,
            }
        })
        .collect()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Run `mullion` on a case: its pad flags, and `--config` (with `--tuned-config` for
/// `compare`) when the case has a shape file in `dir`.
fn run(case: &Case, dir: &Path, args: &[&str]) -> crate::common::Run {
    let mut all: Vec<String> = args.iter().map(|a| a.to_string()).collect();
    all.extend(case.flags.iter().cloned());
    if let Some(shape) = &case.shape {
        let file = dir.join("shape.json");
        std::fs::write(&file, shape.to_string()).unwrap();
        let flags: &[&str] = if args[0] == "compare" {
            &["--config", "--tuned-config"]
        } else {
            &["--config"]
        };
        for f in flags {
            all.push(f.to_string());
            all.push(s(&file).to_string());
        }
    }
    let all: Vec<&str> = all.iter().map(String::as_str).collect();
    let r = mullion(&all);
    assert!(
        r.ok(),
        "{}: mullion {} exited {}: {}",
        case.name,
        args[0],
        r.code,
        r.stderr
    );
    r
}

/// A canonical part name in timm >= 0.9's spelling, as `drift.csv` promises.
fn canonical(name: &str) -> bool {
    let mut it = name.split('.');
    match it.next() {
        Some("patch_embed") | Some("norm") | Some("stage_norm") => true,
        Some("layers") => {
            it.next().is_some_and(|i| i.parse::<usize>().is_ok())
                && matches!(it.next(), Some("blocks") | Some("downsample"))
        }
        _ => false,
    }
}

#[test]
fn every_family_goes_through_figure_report_compare_padding_and_attention() {
    let cases = cases();
    assert!(cases.len() >= 12, "cases.json lists {} cases", cases.len());
    for case in &cases {
        let out = tempfile::tempdir().unwrap();
        let o = out.path();

        let fig = o.join("figure.png");
        run(
            case,
            o,
            &[
                "figure",
                "--weights",
                s(&case.weights),
                "--image",
                s(&case.image),
                "--out",
                s(&fig),
            ],
        );
        let (w, h) = image::image_dimensions(&fig).unwrap();
        assert!(w > 200 && h > 100, "{}: figure {w}x{h}", case.name);

        // The case's image with one labelled box over its top-left quarter, saved as the
        // window saves regions.
        let images = o.join("images");
        std::fs::create_dir(&images).unwrap();
        std::fs::copy(&case.image, images.join("input.png")).unwrap();
        let (iw, ih) = image::image_dimensions(&case.image).unwrap();
        let sidecar = serde_json::json!({
            "schema": "mullion-regions", "version": 1, "image": "input.png",
            "width": iw, "height": ih,
            "labels": [{"name": "seedling", "colour": [40, 160, 90]}],
            "regions": [{"id": 1, "label": "seedling", "note": "",
                "shape": {"kind": "box", "x0": 0.0, "y0": 0.0,
                          "x1": iw as f64 / 2.0, "y1": ih as f64 / 2.0}}],
            "pins": [],
        });
        std::fs::write(
            images.join("input.png.regions.json"),
            serde_json::to_string_pretty(&sidecar).unwrap(),
        )
        .unwrap();
        let report = o.join("report");
        run(
            case,
            o,
            &[
                "report",
                "--weights",
                s(&case.weights),
                "--images",
                s(&images),
                "--out",
                s(&report),
            ],
        );
        let rows = read_csv(&report.join("regions.csv"));
        let stages: std::collections::BTreeSet<_> =
            rows.iter().map(|r| r["stage"].clone()).collect();
        assert_eq!(
            stages.len(),
            case.stages,
            "{}: stages in regions.csv {stages:?}",
            case.name
        );
        assert!(
            rows.iter().all(|r| num(r, "inside_mean").is_finite()),
            "{}: a region mean is not finite",
            case.name
        );

        let cmp = o.join("compare");
        run(
            case,
            o,
            &[
                "compare",
                "--base",
                s(&case.weights),
                "--tuned",
                s(&case.weights),
                "--images",
                s(&case.image),
                "--out",
                s(&cmp),
            ],
        );
        let stages = read_csv(&cmp.join("stages.csv"));
        assert_eq!(
            stages.len(),
            2 * case.stages,
            "{}: each stage for the image and for all",
            case.name
        );
        for r in &stages {
            assert!(
                (num(r, "linear_cka") - 1.0).abs() < 1e-5,
                "{}: {r:?}",
                case.name
            );
            assert!(
                (num(r, "mean_cosine") - 1.0).abs() < 1e-5,
                "{}: {r:?}",
                case.name
            );
        }
        let drift = read_csv(&cmp.join("drift.csv"));
        assert!(!drift.is_empty(), "{}: drift.csv is empty", case.name);
        for r in &drift {
            assert_eq!(num(r, "relative_change"), 0.0, "{}: {r:?}", case.name);
            assert!(
                canonical(&r["tensor"]),
                "{}: drift names {}",
                case.name,
                r["tensor"]
            );
        }

        let pad = o.join("padding");
        run(
            case,
            o,
            &[
                "padding",
                "--weights",
                s(&case.weights),
                "--image",
                s(&case.image),
                "--out",
                s(&pad),
                "--pads",
                "0",
            ],
        );
        let sweep = read_csv(&pad.join("sweep.csv"));
        assert_eq!(
            sweep.len(),
            case.stages,
            "{}: one sweep row per stage",
            case.name
        );
        for r in &sweep {
            assert!(
                (num(r, "mean_cosine") - 1.0).abs() < 1e-6,
                "{}: {r:?}",
                case.name
            );
        }

        let att = o.join("attention.safetensors");
        run(
            case,
            o,
            &[
                "attention",
                "--weights",
                s(&case.weights),
                "--image",
                s(&case.image),
                "--stage",
                "0",
                "--block",
                "1",
                "--out",
                s(&att),
            ],
        );
        let t = candle_core::safetensors::load(&att, &candle_core::Device::Cpu).unwrap();
        let sums = t["probs"]
            .sum(candle_core::D::Minus1)
            .unwrap()
            .flatten_all()
            .unwrap();
        for v in sums.to_vec1::<f32>().unwrap() {
            assert!(
                (v - 1.0).abs() < 1e-4,
                "{}: an attention row sums to {v}",
                case.name
            );
        }
    }
}

/// A timm Swin V2 file states no window: the window asks for it, the user types it (and the
/// window it was pretrained at) and presses the button; a per-stage pretrained window can only
/// come from a file, as `mullion open --config` gives it.
fn answer_the_window_question(h: &mut Harness<'_, Window>, case: &Case, shape: &Value) {
    let q = h.state().bench.window_question.clone();
    let q = q.unwrap_or_else(|| panic!("{}: the window did not ask for the window", case.name));
    assert_eq!(q.path, case.weights);
    let window = shape["window"].as_u64().unwrap() as usize;
    match &shape["trained_window"] {
        Value::Array(_) => {
            let over = serde_json::from_value(shape.clone()).unwrap();
            let b = &mut h.state_mut().bench;
            b.shape_overrides.push((case.weights.clone(), over));
            b.apply(Action::DismissWindowQuestion);
            b.open_weights(&case.weights);
        }
        trained => {
            let panel = &mut h.state_mut().panels.window_question;
            panel.window = window;
            panel.trained = trained.as_u64().unwrap_or(0) as usize;
            h.run_steps(2);
            h.get_by_label("Open with this window").click();
            h.run_steps(2);
        }
    }
    wait(h);
    assert!(h.state().bench.window_question.is_none());
    h.state_mut().bench.messages.clear();
}

#[test]
fn every_family_opens_in_the_window() {
    for case in cases() {
        let mut h = harness();
        type_path(&mut h, &case.weights, "Open path");
        if let Some(shape) = &case.shape {
            answer_the_window_question(&mut h, &case, shape);
        }
        type_path(&mut h, &case.image, "Open path");
        let b = &h.state().bench;
        let errors: Vec<_> = b
            .messages
            .iter()
            .filter(|m| m.level == mullion::app::state::Level::Error)
            .map(|m| m.text.clone())
            .collect();
        assert!(errors.is_empty(), "{}: {errors:?}", case.name);
        let (_, tex) = b
            .pictures
            .on_screen()
            .unwrap_or_else(|| panic!("{}: nothing on screen", case.name));
        assert_eq!(
            tex.strip.len(),
            case.stages,
            "{}: a panel per stage",
            case.name
        );
        let depths = &b.weights.as_ref().unwrap().model.config.depths;
        assert_eq!(depths.len(), case.stages, "{}", case.name);
    }
}

/// `mullion open --config` reads its file before any window opens: a broken one is bad usage
/// (exit 2) named on the terminal, and `--config` without `--weights` is refused the same way.
#[test]
fn open_reads_its_shape_file_before_the_window() {
    let dir = tempfile::tempdir().unwrap();
    let broken = dir.path().join("shape.json");
    std::fs::write(&broken, "{\"window\": }").unwrap();
    let weights = crate::common::fixtures().join("timmv2_odd/weights.safetensors");
    let r = mullion(&["open", "--weights", s(&weights), "--config", s(&broken)]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("shape.json"), "{}", r.stderr);
    let r = mullion(&["open", "--config", s(&broken)]);
    assert_eq!(r.code, 2, "{}", r.stderr);
}

/// A transformers checkpoint as it travels (transformers 5.23.0's `save_pretrained` folder:
/// config.json beside model.safetensors; tests/fixtures/tfv2_model_trained_window) typed into
/// the path field opens as the checkpoint, with its config.json, not as a folder of images; the
/// same folder opens as the base (A).
#[test]
fn a_checkpoint_folder_opens_as_the_checkpoint_in_the_window() {
    let folder = crate::common::fixtures().join("tfv2_model_trained_window");
    let mut h = harness();
    type_path(&mut h, &folder, "Open path");
    let b = &h.state().bench;
    let w = b
        .weights
        .as_ref()
        .expect("the folder opened as the checkpoint");
    let report = w.report.as_ref().unwrap();
    assert!(report.family.starts_with("Swin V2"), "{}", report.family);
    assert!(report.config_json.is_some(), "config.json was read");
    assert!(
        b.images.is_empty(),
        "no image list from a checkpoint folder"
    );
    type_path(&mut h, &folder, "Open path as base (A)");
    assert!(
        h.state().bench.base.is_some(),
        "the folder opened as the base"
    );
}
