//! Stage outputs against the reference libraries.
//!
//! Every case under tests/fixtures/ was written by tests/reference/make_fixtures.py from a
//! randomly initialised small model in timm or transformers (versions in each case.json, field
//! "reference"). We load the same weights, run the same PNG, and compare every tensor at
//! max|diff| / max|expected| <= 1e-5.

use crate::common::fixtures;
use candle_core::{Device, Tensor};
use mullion::engine::geometry::{PadOrder, Semantics, SmallStage};
use mullion::engine::input::{load_image, normalise, Normalisation};
use mullion::engine::{Backbone, Checkpoint, ConfigOverride, ForwardOptions, RunControl};
use serde_json::Value;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

const TOLERANCE: f32 = 1e-5;

pub fn case_names() -> Vec<String> {
    let list: Value =
        serde_json::from_str(&std::fs::read_to_string(fixtures().join("cases.json")).unwrap())
            .unwrap();
    let arr = list
        .as_array()
        .or_else(|| list["cases"].as_array())
        .expect("cases.json lists cases");
    arr.iter()
        .map(|v| {
            v.as_str()
                .map(String::from)
                .or_else(|| v["name"].as_str().map(String::from))
                .unwrap()
        })
        .collect()
}

pub fn case(name: &str) -> (PathBuf, Value) {
    let dir = fixtures().join(name);
    let v = serde_json::from_str(&std::fs::read_to_string(dir.join("case.json")).unwrap()).unwrap();
    (dir, v)
}

fn semantics_of(case: &Value) -> Semantics {
    let pad_order = match case["pad_order"].as_str().unwrap() {
        "pad-then-shift" => PadOrder::PadThenShift,
        "shift-then-pad" => PadOrder::ShiftThenPad,
        other => panic!("unknown pad order {other}"),
    };
    let small_stage = match case["small_stage"].as_str().unwrap() {
        "clamp" => SmallStage::Clamp,
        "pad-up" => SmallStage::PadUp,
        "clamp-per-axis" => SmallStage::ClampPerAxis,
        "as-built" => SmallStage::AsBuilt,
        other => panic!("unknown small-stage policy {other}"),
    };
    Semantics {
        pad_order,
        small_stage,
    }
}

/// The shape fields a case gives beside its weights (Swin V2 from timm: the window and the
/// trained window, which the tensors do not record), as a `--config` file would.
fn override_of(case: &Value) -> ConfigOverride {
    case.get("override")
        .map(|v| serde_json::from_value(v.clone()).expect("case override"))
        .unwrap_or_default()
}

/// Open a case's checkpoint and build it with the case's override.
fn open_case(dir: &Path, case: &Value) -> (Checkpoint, Backbone) {
    let ckpt = Checkpoint::open(dir.join(case["weights"].as_str().unwrap())).unwrap();
    let model = Backbone::from_checkpoint(&ckpt, &override_of(case)).unwrap();
    (ckpt, model)
}

/// `max |got - want| / max |want|`.
fn rel_diff(got: &Tensor, want: &Tensor) -> f32 {
    let max_abs = |t: &Tensor| {
        t.abs()
            .unwrap()
            .flatten_all()
            .unwrap()
            .max(0)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap()
    };
    max_abs(&(got - want).unwrap()) / max_abs(want).max(f32::MIN_POSITIVE)
}

struct Run {
    outputs: HashMap<String, Tensor>,
}

fn run_case(dir: &Path, case: &Value, semantics: Semantics) -> Run {
    let (_, model) = open_case(dir, case);
    let img = load_image(dir.join(case["image"].as_str().unwrap())).unwrap();
    let x = normalise(&img, &Normalisation::IMAGENET).unwrap();
    let opts = ForwardOptions {
        semantics: Some(semantics),
        stage_norms: model.has_stage_norms(),
        final_norm: model.has_final_norm(),
        ..Default::default()
    };
    let out = model.forward(&x, &opts, &RunControl::default()).unwrap();
    let mut outputs = HashMap::new();
    outputs.insert("embed".to_string(), out.embed.unsqueeze(0).unwrap());
    for (i, t) in out.stages.iter().enumerate() {
        outputs.insert(format!("stage{i}"), t.unsqueeze(0).unwrap());
    }
    for (i, t) in out.stage_norms.iter().flatten().enumerate() {
        outputs.insert(format!("stage{i}_norm"), t.unsqueeze(0).unwrap());
    }
    if let Some(t) = &out.final_norm {
        outputs.insert("final_norm".to_string(), t.unsqueeze(0).unwrap());
    }
    Run { outputs }
}

fn expected(dir: &Path, case: &Value) -> HashMap<String, Tensor> {
    candle_core::safetensors::load(dir.join(case["expected"].as_str().unwrap()), &Device::Cpu)
        .unwrap()
}

/// The stage outputs of every fixture match the library that wrote it.
#[test]
fn every_case_matches_its_reference_library() {
    let mut failures = Vec::new();
    let names = case_names();
    assert!(
        names.len() >= 8,
        "expected the full fixture set, found {names:?}"
    );
    for name in &names {
        let (dir, case) = case(name);
        let run = run_case(&dir, &case, semantics_of(&case));
        let want = expected(&dir, &case);
        assert!(
            want.contains_key("stage0") && want.contains_key("embed"),
            "{name}: expected file incomplete"
        );
        for (key, w) in &want {
            let Some(got) = run.outputs.get(key) else {
                failures.push(format!("{name}: no output {key}"));
                continue;
            };
            if got.dims() != w.dims() {
                failures.push(format!(
                    "{name}/{key}: shape {:?}, expected {:?}",
                    got.dims(),
                    w.dims()
                ));
                continue;
            }
            let d = rel_diff(got, w);
            eprintln!("{name:<24} {key:<12} {:?} rel diff {d:.2e}", w.dims());
            if d.is_nan() || d > TOLERANCE {
                failures.push(format!(
                    "{name}/{key}: relative difference {d:.3e} > {TOLERANCE:e}"
                ));
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// The layout detector names the layout each library wrote, and the default padding semantics
/// of that layout are what the library computed with (cases made with a non-default library
/// option say so with "default_semantics": false).
#[test]
fn layouts_and_default_semantics_are_detected() {
    for name in case_names() {
        let (dir, case) = case(&name);
        let (ckpt, model) = open_case(&dir, &case);
        let want_layout = match case["layout"].as_str().unwrap() {
            "timm" => "Timm",
            "original" => "Original",
            "transformers4" => "Transformers4",
            "transformers5" => "Transformers5",
            "openmmlab3" => "OpenMmlab3",
            other => panic!("{name}: unknown layout {other}"),
        };
        assert_eq!(format!("{:?}", ckpt.layout.kind), want_layout, "{name}");
        let want_family = match case["family"].as_str() {
            Some("v2") => "V2",
            _ => "V1",
        };
        assert_eq!(format!("{:?}", ckpt.family), want_family, "{name}: family");
        if want_family == "V2" {
            // The analytic count of the V2 shape (logit scales, q and v biases, the bias MLP
            // instead of tables) equals the tensors the loader used.
            let report = mullion::engine::LoadReport::new(&ckpt, &model);
            let analytic = model.config.parameter_count(model.has_final_norm(), None);
            assert_eq!(analytic, report.parameters, "{name}: parameter count");
        }
        if case["default_semantics"].as_bool() != Some(false) {
            assert_eq!(
                model.default_semantics,
                semantics_of(&case),
                "{name}: default semantics"
            );
        }
        // Shape read off the tensors equals the configuration the library was built with.
        let cfg = &case["config"];
        if let Some(d) = cfg["embed_dim"].as_u64() {
            assert_eq!(model.config.embed_dim as u64, d, "{name}: embed dim");
        }
        if let Some(depths) = cfg["depths"].as_array() {
            let depths: Vec<usize> = depths
                .iter()
                .map(|v| v.as_u64().unwrap() as usize)
                .collect();
            assert_eq!(model.config.depths, depths, "{name}: depths");
        }
        if let Some(heads) = cfg["heads"].as_array() {
            let heads: Vec<usize> = heads.iter().map(|v| v.as_u64().unwrap() as usize).collect();
            assert_eq!(model.config.heads, heads, "{name}: heads");
        }
    }
}

/// The geometry module reports the windows, shifts and padded sizes the library used.
#[test]
fn geometry_matches_what_the_library_used() {
    for name in case_names() {
        let (dir, case) = case(&name);
        let Some(stages) = case["geometry"].as_array() else {
            continue;
        };
        let (_, model) = open_case(&dir, &case);
        let size = &case["size"];
        let (w, h) = (
            size[0].as_u64().unwrap() as usize,
            size[1].as_u64().unwrap() as usize,
        );
        let g = model.geometry((h, w), Some(semantics_of(&case)));
        for (i, st) in stages.iter().enumerate() {
            let pair = |v: &Value| {
                (
                    v[0].as_u64().unwrap() as usize,
                    v[1].as_u64().unwrap() as usize,
                )
            };
            let sg = &g.stages[i];
            if let Some(grid) = st.get("grid") {
                assert_eq!(sg.grid, pair(grid), "{name} stage {i} grid");
            }
            let blocks = st.get("blocks").and_then(Value::as_array);
            for (j, b) in blocks.into_iter().flatten().enumerate() {
                let bg = &sg.blocks[j];
                if let Some(v) = b.get("window") {
                    assert_eq!(bg.window(), pair(v), "{name} stage {i} block {j} window");
                }
                if let Some(v) = b.get("shift") {
                    assert_eq!(bg.shift(), pair(v), "{name} stage {i} block {j} shift");
                }
                if let Some(v) = b.get("padded") {
                    assert_eq!(bg.padded(), pair(v), "{name} stage {i} block {j} padded");
                }
            }
        }
    }
}

/// Two layouts compute the same thing when every block gathers the same tokens into the same
/// windows with the same mask.
fn same_partition(
    a: &mullion::engine::geometry::Geometry,
    b: &mullion::engine::geometry::Geometry,
) -> bool {
    a.stages.iter().zip(&b.stages).all(|(sa, sb)| {
        sa.blocks.iter().zip(&sb.blocks).all(|(x, y)| {
            x.window() == y.window()
                && x.gather_index() == y.gather_index()
                && x.shift_mask() == y.shift_mask()
        })
    })
}

/// The fixtures tell the padding semantics apart: running an odd-size case under the other pad
/// order, or a small-stage case under another policy, must miss the reference by far more than
/// the tolerance. (So a port that ignored the distinction could not pass.)
#[test]
fn the_other_semantics_do_not_match() {
    let mut checked = 0;
    for name in case_names() {
        let (dir, case) = case(&name);
        let right = semantics_of(&case);
        let want = expected(&dir, &case);
        let last = format!(
            "stage{}",
            want.keys()
                .filter(|k| k.starts_with("stage") && !k.contains('_'))
                .count()
                - 1
        );
        for wrong in [
            Semantics {
                pad_order: match right.pad_order {
                    PadOrder::PadThenShift => PadOrder::ShiftThenPad,
                    PadOrder::ShiftThenPad => PadOrder::PadThenShift,
                },
                ..right
            },
            Semantics {
                small_stage: SmallStage::PadUp,
                ..right
            },
            Semantics {
                small_stage: SmallStage::ClampPerAxis,
                ..right
            },
        ] {
            let (_, model) = open_case(&dir, &case);
            let (w, h) = (
                case["size"][0].as_u64().unwrap() as usize,
                case["size"][1].as_u64().unwrap() as usize,
            );
            if same_partition(
                &model.geometry((h, w), Some(wrong)),
                &model.geometry((h, w), Some(right)),
            ) {
                continue; // the same computation: nothing to tell apart
            }
            let img = load_image(dir.join(case["image"].as_str().unwrap())).unwrap();
            let x = normalise(&img, &Normalisation::IMAGENET).unwrap();
            let opts = ForwardOptions {
                semantics: Some(wrong),
                ..Default::default()
            };
            let Ok(out) = model.forward(&x, &opts, &RunControl::default()) else {
                continue; // e.g. a bias table made for a clamped window cannot serve the full one
            };
            let got = out.stages.last().unwrap().unsqueeze(0).unwrap();
            let d = rel_diff(&got, &want[&last]);
            assert!(
                d > 100.0 * TOLERANCE,
                "{name}: {wrong:?} also matches ({d:.2e})"
            );
            checked += 1;
        }
    }
    assert!(
        checked >= 4,
        "only {checked} semantic swaps could be checked"
    );
}

/// The toolkit fixture catches a loader that forgets the unfold reordering: its tensors,
/// written unchanged under the original release's names (same block names, merging at the end
/// of a stage, but in timm's channel order), match the reference up to stage 0 and miss it by
/// far from stage 1 on, where patch merging comes in.
#[test]
fn toolkit_fixture_needs_the_unfold_reorder() {
    use mullion::engine::checkpoint::Layout;
    use mullion::engine::model::required_parts;
    use mullion::engine::{LayoutKind, Part};
    let (dir, case) = case("toolkit3_nested");
    let file = dir.join(case["weights"].as_str().unwrap());
    let ckpt = Checkpoint::open(&file).unwrap();
    let raw: HashMap<String, Tensor> =
        candle_core::pickle::read_all_with_key(&file, Some("state_dict"))
            .unwrap()
            .into_iter()
            .collect();
    let original = Layout {
        kind: LayoutKind::Original,
        prefix: "backbone.".into(),
    };
    let cfg = ckpt.infer_config(&ConfigOverride::default()).unwrap();
    let mut parts = required_parts(&cfg);
    for i in 0..cfg.depths.len() {
        parts.extend(["weight", "bias"].map(|s| Part::StageNorm(i, s.into())));
    }
    let mut out = HashMap::new();
    for part in &parts {
        let from = ckpt.file_names(part).concat();
        out.insert(original.file_names(part).concat(), raw[&from].clone());
    }
    let tmp = tempfile::tempdir().unwrap();
    candle_core::safetensors::save(&out, tmp.path().join("weights.safetensors")).unwrap();
    std::fs::copy(dir.join("input.png"), tmp.path().join("input.png")).unwrap();
    let mut unordered = case.clone();
    unordered["weights"] = "weights.safetensors".into();
    let run = run_case(tmp.path(), &unordered, semantics_of(&case));
    let want = expected(&dir, &case);
    assert!(rel_diff(&run.outputs["stage0"], &want["stage0"]) <= TOLERANCE);
    for key in ["stage1", "stage2", "stage1_norm"] {
        let d = rel_diff(&run.outputs[key], &want[key]);
        assert!(d > 100.0 * TOLERANCE, "{key}: {d:.2e}");
    }
}

/// The `features` command, with no options, reproduces each library's own computation: the
/// contract other checks rely on (NHWC `[1, H, W, C]` tensors `embed`, `stage0`..).
#[test]
fn features_command_defaults_reproduce_the_library() {
    let out_dir = tempfile::tempdir().unwrap();
    for name in [
        "tf4_odd",
        "timm_odd",
        "detector_prefixed",
        "pickle_nested_bf16",
        "toolkit3_nested",
    ] {
        let (dir, case) = case(name);
        let out = out_dir.path().join(format!("{name}.safetensors"));
        let status = std::process::Command::new(env!("CARGO_BIN_EXE_mullion"))
            .arg("features")
            .arg("--weights")
            .arg(dir.join(case["weights"].as_str().unwrap()))
            .arg("--image")
            .arg(dir.join(case["image"].as_str().unwrap()))
            .arg("--out")
            .arg(&out)
            .status()
            .unwrap();
        assert!(status.success(), "{name}");
        assert_features_match(name, &out, &dir, &case);
    }
}

/// The tensors `mullion features` wrote to `out` match the case's expected ones.
fn assert_features_match(name: &str, out: &Path, dir: &Path, case: &Value) {
    let got = candle_core::safetensors::load(out, &Device::Cpu).unwrap();
    let want = expected(dir, case);
    for key in std::iter::once("embed".to_string()).chain((0..4).map(|i| format!("stage{i}"))) {
        let (Some(g), Some(w)) = (got.get(&key), want.get(&key)) else {
            continue;
        };
        assert!(rel_diff(g, w) <= TOLERANCE, "{name}/{key}");
    }
}

/// The OpenMMLab converters' unfold permutation (`correct_unfold_reduction_order` /
/// `correct_unfold_norm_order`, mmdetection 3.x mmdet/models/backbones/swin.py), run by
/// tests/reference/make_fixtures.py in torch 2.15.0 on a small numeric example (case.json of
/// toolkit3_nested, "unfold_example"), is undone exactly by the loader's reordering.
#[test]
fn unfold_order_is_undone_as_the_converter_did_it() {
    let (_, case) = case("toolkit3_nested");
    let ex = &case["unfold_example"];
    let matrix = |v: &Value| -> Tensor {
        let rows: Vec<Vec<f32>> = serde_json::from_value(v.clone()).unwrap();
        let (r, c) = (rows.len(), rows[0].len());
        Tensor::from_vec(rows.concat(), (r, c), &Device::Cpu).unwrap()
    };
    let vector = |v: &Value| -> Tensor {
        let x: Vec<f32> = serde_json::from_value(v.clone()).unwrap();
        let n = x.len();
        Tensor::from_vec(x, n, &Device::Cpu).unwrap()
    };
    for (converted, timm) in [
        (matrix(&ex["converted"]), matrix(&ex["timm_order"])),
        (
            vector(&ex["norm_converted"]),
            vector(&ex["norm_timm_order"]),
        ),
    ] {
        assert_ne!(
            converted.flatten_all().unwrap().to_vec1::<f32>().unwrap(),
            timm.flatten_all().unwrap().to_vec1::<f32>().unwrap()
        );
        let back = mullion::engine::checkpoint::from_unfold_order(&converted).unwrap();
        assert_eq!(back.dims(), timm.dims());
        assert_eq!(
            back.flatten_all().unwrap().to_vec1::<f32>().unwrap(),
            timm.flatten_all().unwrap().to_vec1::<f32>().unwrap()
        );
    }
}

/// Attention weights of a chosen block come back per window and head, rows summing to one.
#[test]
fn attention_tap_of_a_shifted_block() {
    let (dir, case) = case("timm_odd");
    let (_, model) = open_case(&dir, &case);
    let img = load_image(dir.join(case["image"].as_str().unwrap())).unwrap();
    let x = normalise(&img, &Normalisation::IMAGENET).unwrap();
    let opts = ForwardOptions {
        attention_of: Some((1, 1)),
        ..Default::default()
    };
    let out = model.forward(&x, &opts, &RunControl::default()).unwrap();
    let tap = out.attention.expect("tap");
    let block = &out.geometry.stages[1].blocks[1];
    let n = block.window_area();
    assert_eq!(
        tap.weights.dims(),
        &[block.n_windows(), model.config.heads[1], n, n]
    );
    let sums: Vec<f32> = tap
        .weights
        .sum(3)
        .unwrap()
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
    assert!(sums.iter().all(|s| (s - 1.0).abs() < 1e-4));
    // The shift mask (-100) leaves almost no weight across mask regions.
    let ids = block.region_ids();
    let w: Vec<f32> = tap.weights.flatten_all().unwrap().to_vec1().unwrap();
    let heads = model.config.heads[1];
    let mut across = 0f32;
    for win in 0..block.n_windows() {
        for h in 0..heads {
            for a in 0..n {
                for b in 0..n {
                    if ids[win * n + a] != ids[win * n + b] {
                        across = across.max(w[((win * heads + h) * n + a) * n + b]);
                    }
                }
            }
        }
    }
    assert!(across < 1e-20, "{across}");
}

/// `mullion features` on Swin V2: the transformers 5.23.0 fixtures opened as folders
/// (config.json beside model.safetensors gives the window, the size the model was built for and
/// the pretrained windows), the timm 1.0.31 fixtures with their window given in a --config file.
/// Every tensor within the tolerance of the library's own values.
#[test]
fn features_command_on_swin_v2() {
    let out_dir = tempfile::tempdir().unwrap();
    for name in case_names() {
        let (dir, case) = case(&name);
        if case["family"].as_str() != Some("v2") {
            continue;
        }
        let out = out_dir.path().join(format!("{name}.safetensors"));
        let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_mullion"));
        cmd.arg("features");
        if case.get("config_json").is_some() {
            cmd.arg("--weights").arg(&dir);
        } else {
            let over = out_dir.path().join(format!("{name}.json"));
            std::fs::write(&over, case["override"].to_string()).unwrap();
            cmd.arg("--weights")
                .arg(dir.join(case["weights"].as_str().unwrap()))
                .arg("--config")
                .arg(&over);
        }
        let run = cmd
            .arg("--image")
            .arg(dir.join(case["image"].as_str().unwrap()))
            .arg("--out")
            .arg(&out)
            .output()
            .unwrap();
        assert!(
            run.status.success(),
            "{name}: {}",
            String::from_utf8_lossy(&run.stderr)
        );
        assert_features_match(&name, &out, &dir, &case);
    }
}

/// `mullion inspect` on a transformers folder names the family, the fields taken from
/// config.json (as transformers 5.23.0 wrote it) and the pretrained windows in use; a --config
/// file still wins over config.json.
/// A timm V2 export travels with the `config.json` timm 1.0.31 writes beside it
/// (`save_config_for_hf`: `architecture`, `model_args` with the window and pretrained windows;
/// made by make_v2_fixtures.py as `timm_config.json`). Beside the weights it gives the window and
/// the pretrained windows, so `mullion features` needs no --config and still matches the library.
#[test]
fn a_timm_config_json_beside_v2_weights_gives_the_window() {
    let name = "timmv2_trained_window";
    let (dir, case) = case(name);
    let folder = tempfile::tempdir().unwrap();
    let weights = folder.path().join("model.safetensors");
    std::fs::copy(dir.join("weights.safetensors"), &weights).unwrap();
    std::fs::copy(
        dir.join("timm_config.json"),
        folder.path().join("config.json"),
    )
    .unwrap();
    let out = folder.path().join("features.safetensors");
    let run = crate::common::mullion(&[
        "features",
        "--weights",
        weights.to_str().unwrap(),
        "--image",
        dir.join("input.png").to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert!(run.ok(), "{}", run.stderr);
    assert_features_match(name, &out, &dir, &case);
    let inspect = crate::common::mullion(&["inspect", weights.to_str().unwrap()]);
    assert!(
        inspect
            .stdout
            .contains("timm architecture swinv2_tiny_window8_256"),
        "{}",
        inspect.stdout
    );
}

#[test]
fn inspect_names_the_v2_family_and_config_json() {
    let dir = fixtures().join("tfv2_model_trained_window");
    let dir = dir.to_str().unwrap();
    let run = crate::common::mullion(&["inspect", dir]);
    assert!(run.ok(), "{}", run.stderr);
    for needle in [
        "Swin V2",
        "config.json",
        "image_size",
        "pretrained_window_sizes",
        "8x8, 4x4, 4x4",
        "built for    96x96",
        "as-built",
        "transformers Swinv2",
    ] {
        assert!(
            run.stdout.contains(needle),
            "missing '{needle}' in:\n{}",
            run.stdout
        );
    }
    let tmp = tempfile::tempdir().unwrap();
    let over = tmp.path().join("over.json");
    std::fs::write(&over, r#"{"trained_window": 0}"#).unwrap();
    let run = crate::common::mullion(&["inspect", dir, "--config", over.to_str().unwrap()]);
    assert!(
        run.ok() && !run.stdout.contains("8x8, 4x4"),
        "{}",
        run.stdout
    );
}

/// `mullion compare` of a Swin V2 folder (transformers 5.23.0) with its own weights file: the
/// V2 tensors (bias MLP, logit scales, q and v biases) are compared like any other, nothing is
/// left unmatched, and no weight moved.
#[test]
fn compare_covers_the_v2_tensors() {
    let dir = fixtures().join("tfv2_backbone_odd");
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("cmp");
    let run = crate::common::mullion(&[
        "compare",
        "--base",
        dir.to_str().unwrap(),
        "--tuned",
        dir.join("model.safetensors").to_str().unwrap(),
        "--images",
        dir.join("input.png").to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert!(run.ok(), "{}", run.stderr);
    let drift = crate::common::read_csv(&out.join("drift.csv"));
    for t in [
        "layers.0.blocks.1.attn.cpb_mlp.2.weight",
        "layers.3.blocks.0.attn.logit_scale",
        "layers.2.blocks.1.attn.q_bias",
        "layers.1.blocks.0.mlp.fc2.bias",
    ] {
        let row = drift.iter().find(|r| r["tensor"] == t).expect(t);
        assert_eq!(row["relative_change"], "0.0", "{t}");
    }
    let unmatched = std::fs::read_to_string(out.join("unmatched.txt")).unwrap();
    assert!(unmatched.lines().all(|l| l.starts_with('#')), "{unmatched}");
}
