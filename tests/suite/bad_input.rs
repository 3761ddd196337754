//! Bad input gets a clear message naming the file and the problem, through the library and
//! through the command line (exit status 1 for a runtime failure, 2 for bad usage).

use candle_core::Tensor;
use mullion::engine::model::random_timm_state_dict;
use mullion::engine::{Backbone, Checkpoint, Config, ConfigOverride};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

fn small_config() -> Config {
    Config {
        embed_dim: 16,
        depths: vec![2, 2],
        heads: vec![1, 2],
        ..Config::tiny()
    }
}

fn write(tensors: &BTreeMap<String, Tensor>, path: &Path) {
    let map: std::collections::HashMap<_, _> = tensors
        .iter()
        .map(|(k, v)| (k.clone(), v.clone()))
        .collect();
    candle_core::safetensors::save(&map, path).unwrap();
}

fn good_checkpoint(dir: &Path) -> (PathBuf, BTreeMap<String, Tensor>) {
    let sd = random_timm_state_dict(&small_config(), 3).unwrap();
    let path = dir.join("good.safetensors");
    write(&sd, &path);
    (path, sd)
}

fn load_error(path: &Path) -> String {
    load_error_with(path, &ConfigOverride::default())
}

fn load_error_with(path: &Path, over: &ConfigOverride) -> String {
    match Checkpoint::open(path).and_then(|c| Backbone::from_checkpoint(&c, over)) {
        Ok(_) => panic!("{} loaded", path.display()),
        Err(e) => e.to_string(),
    }
}

#[test]
fn a_good_random_checkpoint_loads_with_its_shape() {
    let dir = tempfile::tempdir().unwrap();
    let (path, _) = good_checkpoint(dir.path());
    let ckpt = Checkpoint::open(&path).unwrap();
    let model = Backbone::from_checkpoint(&ckpt, &ConfigOverride::default()).unwrap();
    assert_eq!(model.config, small_config());
}

#[test]
fn truncated_checkpoint() {
    let dir = tempfile::tempdir().unwrap();
    let (path, _) = good_checkpoint(dir.path());
    let bytes = std::fs::read(&path).unwrap();
    let cut = dir.path().join("cut.safetensors");
    std::fs::write(&cut, &bytes[..bytes.len() / 2]).unwrap();
    let msg = load_error(&cut);
    assert!(
        msg.contains("cut.safetensors") && msg.contains("truncated"),
        "{msg}"
    );
}

#[test]
fn wrong_header() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("header.safetensors");
    let mut bytes = 40u64.to_le_bytes().to_vec();
    bytes.extend_from_slice(b"{\"a\": {\"dtype\": \"F32\", \"shape\": [9]}} ");
    bytes.extend_from_slice(&[0u8; 8]);
    std::fs::write(&path, bytes).unwrap();
    let msg = load_error(&path);
    assert!(
        msg.contains("header.safetensors") && msg.contains("safetensors"),
        "{msg}"
    );
}

#[test]
fn not_a_checkpoint() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("notes.txt");
    std::fs::write(&path, "these are my notes, not weights\n").unwrap();
    let msg = load_error(&path);
    assert!(
        msg.contains("notes.txt") && msg.contains("not a checkpoint"),
        "{msg}"
    );
    let empty = dir.path().join("empty.pth");
    std::fs::write(&empty, b"").unwrap();
    assert!(load_error(&empty).contains("empty"));
}

#[test]
fn foreign_checkpoint_without_a_backbone() {
    let dir = tempfile::tempdir().unwrap();
    let mut sd = BTreeMap::new();
    sd.insert(
        "encoder.conv1.weight".to_string(),
        Tensor::zeros(
            (4, 3, 3, 3),
            candle_core::DType::F32,
            &candle_core::Device::Cpu,
        )
        .unwrap(),
    );
    let path = dir.path().join("resnet.safetensors");
    write(&sd, &path);
    let msg = load_error(&path);
    assert!(
        msg.contains("resnet.safetensors") && msg.contains("no shifted-window backbone"),
        "{msg}"
    );
}

#[test]
fn missing_block_tensor_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let (_, mut sd) = good_checkpoint(dir.path());
    sd.remove("layers.1.blocks.1.attn.qkv.weight").unwrap();
    sd.remove("layers.1.blocks.1.mlp.fc2.bias").unwrap();
    let path = dir.path().join("holes.safetensors");
    write(&sd, &path);
    let msg = load_error(&path);
    assert!(msg.contains("holes.safetensors"), "{msg}");
    assert!(msg.contains("layers.1.blocks.1.attn.qkv.weight"), "{msg}");
    assert!(msg.contains("layers.1.blocks.1.mlp.fc2.bias"), "{msg}");
    assert!(msg.contains("2 tensor(s)"), "{msg}");
}

#[test]
fn bias_table_with_wrong_rows() {
    let dir = tempfile::tempdir().unwrap();
    let (_, mut sd) = good_checkpoint(dir.path());
    let key = "layers.0.blocks.1.attn.relative_position_bias_table";
    sd.insert(
        key.to_string(),
        Tensor::zeros((170, 1), candle_core::DType::F32, &candle_core::Device::Cpu).unwrap(),
    );
    let path = dir.path().join("table.safetensors");
    write(&sd, &path);
    let msg = load_error(&path);
    assert!(
        msg.contains("table.safetensors") && msg.contains("170 rows") && msg.contains("169"),
        "{msg}"
    );
}

#[test]
fn wrong_shape_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let (_, mut sd) = good_checkpoint(dir.path());
    let key = "layers.1.blocks.0.mlp.fc1.bias";
    sd.insert(
        key.to_string(),
        Tensor::zeros(5, candle_core::DType::F32, &candle_core::Device::Cpu).unwrap(),
    );
    let path = dir.path().join("shape.safetensors");
    write(&sd, &path);
    let msg = load_error(&path);
    assert!(msg.contains(key) && msg.contains("[5]"), "{msg}");
}

#[test]
fn f16_and_bf16_weights_load_as_f32() {
    let dir = tempfile::tempdir().unwrap();
    let (_, sd) = good_checkpoint(dir.path());
    for dtype in [candle_core::DType::F16, candle_core::DType::BF16] {
        let half: BTreeMap<_, _> = sd
            .iter()
            .map(|(k, v)| (k.clone(), v.to_dtype(dtype).unwrap()))
            .collect();
        let path = dir.path().join(format!("{dtype:?}.safetensors"));
        write(&half, &path);
        let ckpt = Checkpoint::open(&path).unwrap();
        let model = Backbone::from_checkpoint(&ckpt, &ConfigOverride::default()).unwrap();
        assert_eq!(model.config, small_config());
    }
}

// ---- the command line ----

fn mullion(args: &[&str]) -> (i32, String) {
    let r = crate::common::mullion(args);
    (r.code, r.stderr)
}

fn png(dir: &Path, name: &str, w: u32, h: u32) -> PathBuf {
    let path = dir.join(name);
    image::RgbImage::from_fn(w, h, |x, y| image::Rgb([(x * 7) as u8, (y * 5) as u8, 90]))
        .save(&path)
        .unwrap();
    path
}

#[test]
fn cli_exit_statuses_and_messages() {
    let dir = tempfile::tempdir().unwrap();
    let (weights, _) = good_checkpoint(dir.path());
    let w = weights.to_str().unwrap();
    let img = png(dir.path(), "leaf.png", 61, 45);
    let i = img.to_str().unwrap();
    let out = dir.path().join("f.safetensors");
    let o = out.to_str().unwrap();

    // Usage errors: 2.
    assert_eq!(mullion(&["features", "--image", i, "--out", o]).0, 2);
    assert_eq!(
        mullion(&[
            "features",
            "--weights",
            w,
            "--image",
            i,
            "--out",
            o,
            "--pad-order",
            "sideways"
        ])
        .0,
        2
    );

    // Success: 0, and the contract's tensors are written.
    let (code, err) = mullion(&["features", "--weights", w, "--image", i, "--out", o]);
    assert_eq!(code, 0, "{err}");
    let t = candle_core::safetensors::load(&out, &candle_core::Device::Cpu).unwrap();
    assert_eq!(t["embed"].dims(), &[1, 12, 16, 16]); // ceil(45/4) x ceil(61/4)
    assert_eq!(t["stage1"].dims(), &[1, 6, 8, 32]);

    // Not an image.
    let fake = dir.path().join("fake.png");
    std::fs::write(&fake, "hello").unwrap();
    let (code, err) = mullion(&[
        "features",
        "--weights",
        w,
        "--image",
        fake.to_str().unwrap(),
        "--out",
        o,
    ]);
    assert_eq!(code, 1);
    assert!(err.contains("fake.png"), "{err}");

    // A truncated PNG.
    let bytes = std::fs::read(&img).unwrap();
    let cut = dir.path().join("cut.png");
    std::fs::write(&cut, &bytes[..bytes.len() / 2]).unwrap();
    let (code, err) = mullion(&[
        "features",
        "--weights",
        w,
        "--image",
        cut.to_str().unwrap(),
        "--out",
        o,
    ]);
    assert_eq!(code, 1);
    assert!(err.contains("cut.png"), "{err}");

    // A 20000-pixel-wide image is refused before decoding, with its size.
    let wide = png(dir.path(), "wide.png", 20000, 2);
    let (code, err) = mullion(&[
        "features",
        "--weights",
        w,
        "--image",
        wide.to_str().unwrap(),
        "--out",
        o,
    ]);
    assert_eq!(code, 1);
    assert!(err.contains("wide.png") && err.contains("20000x2"), "{err}");

    // An input whose forward pass would need more memory than allowed.
    let big = png(dir.path(), "big.png", 1000, 1000);
    let (code, err) = mullion(&[
        "features",
        "--weights",
        w,
        "--image",
        big.to_str().unwrap(),
        "--out",
        o,
        "--max-memory-gb",
        "0.01",
    ]);
    assert_eq!(code, 1);
    assert!(err.contains("big.png") && err.contains("GB"), "{err}");

    // A folder that cannot be written: the parent of the output is a file.
    let blocked = dir.path().join("leaf.png").join("x.safetensors");
    let (code, err) = mullion(&[
        "features",
        "--weights",
        w,
        "--image",
        i,
        "--out",
        blocked.to_str().unwrap(),
    ]);
    assert_eq!(code, 1);
    assert!(err.contains("leaf.png"), "{err}");

    // A configuration file asking for a stage without blocks is bad usage, named.
    let config = dir.path().join("shape.json");
    std::fs::write(&config, r#"{"depths": [2, 0]}"#).unwrap();
    let (code, err) = mullion(&[
        "summary",
        "--weights",
        w,
        "--image",
        i,
        "--config",
        config.to_str().unwrap(),
    ]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("shape.json") && err.contains("stage 1"),
        "{err}"
    );
    let (code, err) = mullion(&["inspect", w, "--config", config.to_str().unwrap()]);
    assert_eq!(code, 2, "{err}");

    // A broken checkpoint through the command line.
    let (code, err) = mullion(&["inspect", i]);
    assert_eq!(code, 1);
    assert!(
        err.contains("leaf.png") && err.contains("not a checkpoint"),
        "{err}"
    );
}

#[test]
fn inspect_reports_the_load() {
    let dir = tempfile::tempdir().unwrap();
    let (_, mut sd) = good_checkpoint(dir.path());
    sd.insert(
        "head.fc.weight".into(),
        Tensor::zeros((10, 32), candle_core::DType::F32, &candle_core::Device::Cpu).unwrap(),
    );
    let path = dir.path().join("with_head.safetensors");
    write(&sd, &path);
    let out = Command::new(env!("CARGO_BIN_EXE_mullion"))
        .args(["inspect", path.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for needle in [
        "timm >= 0.9",
        "depths [2, 2]",
        "heads [1, 2]",
        "window 7x7",
        "shift-then-pad",
        "clamp-per-axis",
        "head.fc.weight (head / classifier)",
        "1 ignored",
    ] {
        assert!(text.contains(needle), "missing '{needle}' in:\n{text}");
    }
    // Parameters counted in the file equal the analytic count of the shape (with final norm).
    let params = small_config().parameter_count(true, None);
    assert!(text.contains(&format!("parameters   {params} ")), "{text}");
}

/// An f32 tensor of zeros.
fn zeros(shape: &[usize]) -> Tensor {
    Tensor::zeros(shape, candle_core::DType::F32, &candle_core::Device::Cpu).unwrap()
}

/// The toolkit fixture's tensors (tests/fixtures/toolkit3_nested, made by
/// tests/reference/make_fixtures.py from the OpenMMLab 3.x converter's mapping), as a map.
fn toolkit_state_dict() -> BTreeMap<String, Tensor> {
    let path = crate::common::fixtures().join("toolkit3_nested/weights.pth");
    candle_core::pickle::read_all_with_key(&path, Some("state_dict"))
        .unwrap()
        .into_iter()
        .collect()
}

/// A patch merging stored in unfold order (OpenMMLab 3.x layout; mmdetection 3.x
/// mmdet/models/layers/transformer/utils.py `PatchMerging`: `reduction` is
/// `Linear(4 * C, 2 * C)` over the 2x2 unfold) whose reduction width is not 4C: the command
/// names the file, the tensor and the width it needs, exit status 1.
#[test]
fn toolkit_merging_width_not_4c() {
    let dir = tempfile::tempdir().unwrap();
    let mut sd = toolkit_state_dict();
    let key = "backbone.stages.0.downsample.reduction.weight";
    assert_eq!(sd[key].dims(), &[16, 32]); // C = 8: [2C, 4C]
    sd.insert(key.to_string(), zeros(&[16, 24]));
    let path = dir.path().join("narrow_merge.safetensors");
    write(&sd, &path);
    let img = png(dir.path(), "leaf.png", 41, 37);
    let out = dir.path().join("f.safetensors");
    for args in [
        vec!["inspect", path.to_str().unwrap()],
        vec![
            "features",
            "--weights",
            path.to_str().unwrap(),
            "--image",
            img.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
    ] {
        let (code, err) = mullion(&args);
        assert_eq!(code, 1, "{args:?}: {err}");
        for needle in ["narrow_merge.safetensors", key, "[16, 24]", "4 x 8 = 32"] {
            assert!(
                err.contains(needle),
                "{args:?}: missing '{needle}' in {err}"
            );
        }
    }
    assert!(!out.exists());

    // A width that is not even a multiple of 4, read at its own shape (as `compare` reads
    // tensors for the drift table): an error naming the tensor, never a panic.
    let mut sd = toolkit_state_dict();
    sd.insert(key.to_string(), zeros(&[16, 30]));
    let path = dir.path().join("odd_merge.safetensors");
    write(&sd, &path);
    let ckpt = Checkpoint::open(&path).unwrap();
    let part = mullion::engine::Part::merge(1, "reduction.weight");
    let msg = ckpt.load(&part, &[16, 30]).unwrap_err().to_string();
    assert!(
        msg.contains("odd_merge.safetensors") && msg.contains(key) && msg.contains("multiple of 4"),
        "{msg}"
    );
}

/// An absolute position embedding changes what the backbone computes; Mullion does not add one,
/// so the file is refused by name instead of being run without it.
#[test]
fn absolute_position_embedding_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let mut sd = toolkit_state_dict();
    // mmdet 3.x SwinTransformer(use_abs_pos_embed=True): `absolute_pos_embed` [1, L, C].
    sd.insert(
        "backbone.absolute_pos_embed".to_string(),
        zeros(&[1, 3136, 8]),
    );
    let path = dir.path().join("ape.safetensors");
    write(&sd, &path);
    let (code, err) = mullion(&["inspect", path.to_str().unwrap()]);
    assert_eq!(code, 1, "{err}");
    assert!(
        err.contains("ape.safetensors")
            && err.contains("backbone.absolute_pos_embed")
            && err.contains("absolute position embedding"),
        "{err}"
    );
}

/// `mullion inspect` on the toolkit fixture (OpenMMLab 3.x layout, tests/fixtures/toolkit3_nested)
/// names the layout, the nesting, the padding defaults of mmdet 3.x's ShiftWindowMSA (pad, then
/// shift; the window never clamped) and why each neck and head tensor is left out.
#[test]
fn inspect_names_the_toolkit_layout() {
    let path = crate::common::fixtures().join("toolkit3_nested/weights.pth");
    let run = crate::common::mullion(&["inspect", path.to_str().unwrap()]);
    assert!(run.ok(), "{}", run.stderr);
    for needle in [
        "nested under 'state_dict'",
        "OpenMMLab detection / segmentation toolkits 3.x",
        "prefix 'backbone.'",
        "depths [2, 2, 2]",
        "heads [1, 2, 4]",
        "per-stage output norms: present",
        "pad-then-shift",
        "'pad-up'",
        "1 buffers",
        "neck.lateral_convs.0.conv.weight (neck / decoder)",
        "rpn_head.rpn_conv.weight (detection head)",
        "roi_head.bbox_head.fc_cls.weight (detection head)",
        "0 missing",
    ] {
        assert!(
            run.stdout.contains(needle),
            "missing '{needle}' in:\n{}",
            run.stdout
        );
    }
}

/// An OpenMMLab patch embedding without any `stages.*` blocks (e.g. a plain vision transformer
/// of the same family of toolkits, mmpretrain 1.x `VisionTransformer`: `patch_embed.projection`,
/// blocks `layers.{i}.attn.qkv`) is no shifted-window backbone: the message names the tensor
/// and what is missing beside it.
#[test]
fn toolkit_embedding_without_stages_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let mut sd = BTreeMap::new();
    sd.insert(
        "backbone.patch_embed.projection.weight".to_string(),
        zeros(&[8, 3, 16, 16]),
    );
    sd.insert(
        "backbone.layers.0.attn.qkv.weight".to_string(),
        zeros(&[24, 8]),
    );
    let path = dir.path().join("vit.safetensors");
    write(&sd, &path);
    let msg = load_error(&path);
    assert!(
        msg.contains("vit.safetensors")
            && msg.contains("backbone.patch_embed.projection.weight")
            && msg.contains("stages.*.blocks.*"),
        "{msg}"
    );
}

/// A Swin V2 checkpoint written by timm 1.0.31 (tests/fixtures/timmv2_odd) with its position
/// bias MLP taken out, and one with a patch merging weight of the wrong width: the loader names
/// the file and what is missing or wrong; `mullion features` exits with 1.
#[test]
fn v2_without_its_bias_mlp_or_with_a_bad_merging_width() {
    let dir = tempfile::tempdir().unwrap();
    let src = crate::common::fixtures().join("timmv2_odd/weights.safetensors");
    let full = candle_core::safetensors::load(&src, &candle_core::Device::Cpu).unwrap();
    let over = dir.path().join("window.json");
    std::fs::write(&over, r#"{"window": 8}"#).unwrap();
    let image = png(dir.path(), "in.png", 40, 36);
    let window: ConfigOverride = serde_json::from_str(r#"{"window": 8}"#).unwrap();
    let load = |path: &Path| load_error_with(path, &window);
    let features = |path: &Path| {
        mullion(&[
            "features",
            "--weights",
            path.to_str().unwrap(),
            "--config",
            over.to_str().unwrap(),
            "--image",
            image.to_str().unwrap(),
            "--out",
            dir.path().join("f.safetensors").to_str().unwrap(),
        ])
    };

    let mut no_mlp = full.clone();
    no_mlp.retain(|k, _| !k.contains("cpb_mlp"));
    let path = dir.path().join("no_bias_mlp.safetensors");
    candle_core::safetensors::save(&no_mlp, &path).unwrap();
    let msg = load(&path);
    for needle in [
        "no_bias_mlp.safetensors",
        "layers.0.blocks.0.attn.cpb_mlp.0.weight",
        "layers.0.blocks.0.attn.cpb_mlp.2.weight",
        "missing",
    ] {
        assert!(msg.contains(needle), "missing '{needle}' in: {msg}");
    }
    let (code, err) = features(&path);
    assert_eq!(code, 1, "{err}");
    assert!(
        err.contains("no_bias_mlp.safetensors") && err.contains("cpb_mlp"),
        "{err}"
    );

    let mut narrow = full.clone();
    let w = narrow["layers.1.downsample.reduction.weight"].clone();
    narrow.insert(
        "layers.1.downsample.reduction.weight".into(),
        w.narrow(1, 0, 24).unwrap().contiguous().unwrap(),
    );
    let path = dir.path().join("narrow_merge.safetensors");
    candle_core::safetensors::save(&narrow, &path).unwrap();
    let msg = load(&path);
    assert!(
        msg.contains("narrow_merge.safetensors")
            && msg.contains("layers.1.downsample.reduction.weight")
            && msg.contains("[16, 24]")
            && msg.contains("[16, 32]"),
        "{msg}"
    );
    let (code, err) = features(&path);
    assert_eq!(code, 1, "{err}");
}
