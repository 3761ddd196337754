//! Two checkpoints compared: linear CKA and cosine against numpy (tests/reference/
//! compare_reference.py, numpy 2.4.6, values in tests/fixtures/compare/expected.json), the
//! invariances of linear CKA stated by Kornblith et al. (2019, "Similarity of Neural Network
//! Representations Revisited", ICML, Sec. 3: orthogonal transforms and isotropic scaling; the
//! index is symmetric), streamed pooled CKA against the direct value, weight drift against
//! numpy, the same weights in two key layouts, the difference map in the shared map machinery,
//! and `mullion compare` / `mullion merge` end to end on the bundled demo pair.

use crate::common::{fixtures, mullion, sample, Run};
use crate::common::{num, read_csv};
use candle_core::{DType, Device, Tensor};
use mullion::analysis::compare::{linear_cka, token_cosines, weight_drift, CkaSums};
use mullion::analysis::{
    prepare_stage_pair, prepare_stages, region_stats, stage_tokens, Map, ScaleSpec,
    TokenDifference, TokenNorm, Tokens,
};
use mullion::engine::checkpoint::{Layout, Part};
use mullion::engine::model::required_parts;
use mullion::engine::{
    random_timm_state_dict, Checkpoint, Config, LayoutKind, Session, SessionOptions,
};
use serde_json::Value;
use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

/// `mullion compare --base A --tuned B --images IMAGES --out OUT`, then `extra`.
fn compare(a: &Path, b: &Path, images: &Path, out: &Path, extra: &[&str]) -> Run {
    let mut args = vec![
        "compare",
        "--base",
        a.to_str().unwrap(),
        "--tuned",
        b.to_str().unwrap(),
        "--images",
        images.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend(extra);
    mullion(&args)
}

fn expected() -> Value {
    let text = std::fs::read_to_string(fixtures().join("compare/expected.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

/// A matrix of the fixture as row-major f32 with its (rows, cols).
fn matrix(v: &Value, key: &str) -> (Vec<f32>, usize, usize) {
    let rows = v[key].as_array().unwrap();
    let cols = rows[0].as_array().unwrap().len();
    let data = rows
        .iter()
        .flat_map(|r| {
            r.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
        })
        .collect();
    (data, rows.len(), cols)
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol * b.abs().max(1.0)
}

#[test]
fn cka_and_cosine_match_numpy() {
    let e = expected();
    assert_eq!(e["numpy"], "2.4.6");
    let (x, n, p) = matrix(&e, "x");
    let (y, _, q) = matrix(&e, "y");
    let (z, _, r) = matrix(&e, "z");
    let (a, _, w) = matrix(&e, "a");
    let (b, _, _) = matrix(&e, "b");
    for (got, key) in [
        (linear_cka(&x, &y, n, p, q).unwrap().unwrap(), "cka_xy"),
        (linear_cka(&y, &x, n, q, p).unwrap().unwrap(), "cka_yx"),
        (linear_cka(&x, &z, n, p, r).unwrap().unwrap(), "cka_xz"),
        (linear_cka(&a, &b, n, w, w).unwrap().unwrap(), "cka_ab"),
    ] {
        let want = e[key].as_f64().unwrap();
        assert!(close(got, want, 1e-12), "{key}: {got} vs numpy {want}");
    }
    let ta = Tokens::new(1, n, w, a).unwrap();
    let tb = Tokens::new(1, n, w, b).unwrap();
    let cos = token_cosines(&ta, &tb).unwrap();
    let want: Vec<f64> = e["cosines_ab"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    assert_eq!(cos.len(), want.len());
    for (g, w) in cos.iter().zip(&want) {
        assert!(close(*g, *w, 1e-12), "{g} vs {w}");
    }
    let mean = cos.iter().sum::<f64>() / cos.len() as f64;
    let min = cos.iter().cloned().fold(f64::INFINITY, f64::min);
    assert!(close(mean, e["mean_cosine_ab"].as_f64().unwrap(), 1e-12));
    assert!(close(min, e["min_cosine_ab"].as_f64().unwrap(), 1e-12));
}

/// A rotation of `dim` axes: a product of Givens rotations (orthogonal by construction).
fn orthogonal(dim: usize) -> Vec<f64> {
    let mut q = vec![0f64; dim * dim];
    for i in 0..dim {
        q[i * dim + i] = 1.0;
    }
    for k in 0..dim - 1 {
        let (c, s) = ((0.3 + k as f64).cos(), (0.3 + k as f64).sin());
        for row in 0..dim {
            let (u, v) = (q[row * dim + k], q[row * dim + k + 1]);
            q[row * dim + k] = c * u - s * v;
            q[row * dim + k + 1] = s * u + c * v;
        }
    }
    q
}

#[test]
fn cka_has_the_papers_invariances() {
    let e = expected();
    let (x, n, p) = matrix(&e, "x");
    let (y, _, q) = matrix(&e, "y");
    let o = orthogonal(p);
    let xq: Vec<f32> = (0..n)
        .flat_map(|i| {
            let x = &x;
            let o = &o;
            (0..p).map(move |j| {
                (0..p)
                    .map(|k| x[i * p + k] as f64 * o[k * p + j])
                    .sum::<f64>() as f32
            })
        })
        .collect();
    // X Q is rounded to f32, so it is orthogonal to about 1e-7.
    let c = linear_cka(&x, &xq, n, p, p).unwrap().unwrap();
    assert!((c - 1.0).abs() < 1e-6, "CKA(X, XQ) = {c}");
    let ax: Vec<f32> = x.iter().map(|v| v * 4.0).collect(); // a power of two: exact in f32
    let c = linear_cka(&x, &ax, n, p, p).unwrap().unwrap();
    assert!((c - 1.0).abs() < 1e-14, "CKA(X, 4X) = {c}");
    let xy = linear_cka(&x, &y, n, p, q).unwrap().unwrap();
    let yx = linear_cka(&y, &x, n, q, p).unwrap().unwrap();
    assert!((xy - yx).abs() < 1e-14, "{xy} vs {yx}");
    // CKA(X, XQ) with Y of another value also stays: CKA(XQ, Y) = CKA(X, Y).
    let c = linear_cka(&xq, &y, n, p, q).unwrap().unwrap();
    assert!((c - xy).abs() < 1e-6, "{c} vs {xy}");
}

#[test]
fn streamed_pooled_cka_equals_the_direct_one() {
    let e = expected();
    let (x, n, p) = matrix(&e, "x");
    let (z, _, r) = matrix(&e, "z"); // columns centred near 3: the sums must centre correctly
    let direct = linear_cka(&x, &z, n, p, r).unwrap().unwrap();
    let mut whole = CkaSums::new(p, r);
    let mut shard = CkaSums::new(p, r);
    for (k, (lo, hi)) in [(0, 5), (5, 17), (17, 30), (30, n)].into_iter().enumerate() {
        let target = if k % 2 == 0 { &mut whole } else { &mut shard };
        target
            .push(&x[lo * p..hi * p], &z[lo * r..hi * r], hi - lo)
            .unwrap();
    }
    whole.merge(&shard).unwrap();
    let streamed = whole.cka().unwrap();
    assert!(close(streamed, direct, 1e-12), "{streamed} vs {direct}");
    assert!(close(streamed, e["cka_xz"].as_f64().unwrap(), 1e-12));
}

#[test]
fn drift_matches_numpy_on_a_pair_where_some_tensors_moved() {
    let e = expected();
    let dir = fixtures().join("compare");
    let a = Checkpoint::open(dir.join("base.safetensors")).unwrap();
    let b = Checkpoint::open(dir.join("tuned.safetensors")).unwrap();
    let d = weight_drift(&a, &b).unwrap();
    let want: BTreeMap<String, (f64, f64)> = e["drift"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| {
            (
                r["tensor"].as_str().unwrap().to_string(),
                (
                    r["relative_change"].as_f64().unwrap(),
                    r["base_norm"].as_f64().unwrap(),
                ),
            )
        })
        .collect();
    let got: BTreeMap<String, (f64, f64)> = d
        .rows
        .iter()
        .map(|r| (r.tensor.clone(), (r.relative_change.unwrap(), r.base_norm)))
        .collect();
    assert_eq!(
        got.keys().collect::<Vec<_>>(),
        want.keys().collect::<Vec<_>>()
    );
    for (k, (rc, bn)) in &want {
        let (grc, gbn) = got[k];
        assert!(
            close(grc, *rc, 1e-12) && close(gbn, *bn, 1e-12),
            "{k}: {grc} {gbn} vs {rc} {bn}"
        );
    }
    // Only the tensors the script changed moved.
    let moved: Vec<&String> = got
        .iter()
        .filter(|(_, v)| v.0 > 0.0)
        .map(|(k, _)| k)
        .collect();
    assert_eq!(moved.len(), 4, "{moved:?}");
    for r in &d.rows {
        let block = r.tensor.contains(".blocks.");
        assert_eq!(r.stage.is_some(), block, "{}", r.tensor);
        assert_eq!(r.block.is_some(), block, "{}", r.tensor);
    }
    let qkv = d
        .rows
        .iter()
        .find(|r| r.tensor == "layers.0.blocks.0.attn.qkv.weight")
        .unwrap();
    assert_eq!((qkv.stage, qkv.block), (Some(0), Some(0)));
    for name in e["unmatched"].as_array().unwrap() {
        let name = name.as_str().unwrap();
        assert!(
            d.unmatched
                .iter()
                .any(|l| l.contains(&format!(" {name} ")) || l.contains(&format!(" {name}:"))),
            "{name} not in {:?}",
            d.unmatched
        );
    }
    assert_eq!(d.unmatched.len(), 2, "{:?}", d.unmatched);
    assert!(d
        .unmatched
        .iter()
        .any(|l| l.starts_with("only in the base checkpoint: norm.bias")));
    assert!(
        d.not_compared.iter().any(|l| l.contains("head.fc.weight")),
        "{:?}",
        d.not_compared
    );
}

fn small_config() -> Config {
    Config {
        embed_dim: 16,
        depths: vec![2, 2, 2, 2],
        heads: vec![1, 2, 2, 4],
        ..Config::tiny()
    }
}

fn save(tensors: HashMap<String, Tensor>, path: &Path) {
    candle_core::safetensors::save(&tensors, path).unwrap();
}

/// The same random weights written in timm's layout and in transformers 4.x's, through the
/// engine's own map from canonical parts to file keys.
fn same_weights_two_layouts(dir: &Path) -> (PathBuf, PathBuf) {
    let cfg = small_config();
    let sd = random_timm_state_dict(&cfg, 11).unwrap();
    let timm = dir.join("timm.safetensors");
    save(sd.clone().into_iter().collect(), &timm);
    let layout = Layout {
        kind: LayoutKind::Transformers4,
        prefix: "swin.".into(),
    };
    let mut parts = required_parts(&cfg);
    parts.extend(["weight", "bias"].map(|s| Part::FinalNorm(s.into())));
    let mut tf = HashMap::new();
    for part in &parts {
        let t = &sd[&part.canonical()];
        let names = layout.file_names(part);
        let rows = t.dims()[0] / names.len();
        for (k, n) in names.into_iter().enumerate() {
            tf.insert(
                n,
                t.narrow(0, k * rows, rows).unwrap().contiguous().unwrap(),
            );
        }
    }
    assert_eq!(
        parts.len(),
        sd.len(),
        "every tensor of the timm file is a part"
    );
    let hf = dir.join("tf4.safetensors");
    save(tf, &hf);
    (timm, hf)
}

#[test]
fn the_same_weights_in_two_layouts_have_no_drift_and_cka_one() {
    let dir = tempfile::tempdir().unwrap();
    let (timm, hf) = same_weights_two_layouts(dir.path());
    assert_eq!(
        Checkpoint::open(&hf).unwrap().layout.kind,
        LayoutKind::Transformers4
    );
    // 224x224: every stage grid is a window multiple or the window itself, where both layouts'
    // padding rules agree; 97x160 only with the rules given for both.
    for (image, extra) in [
        ("tray-05-224x224.png", vec![]),
        (
            "tray-03-97x160.png",
            vec![
                "--pad-order",
                "shift-then-pad",
                "--small-stage",
                "clamp-per-axis",
            ],
        ),
    ] {
        let out = dir.path().join(format!("out-{image}"));
        let img = sample(image);
        let run = compare(&timm, &hf, &img, &out, &extra);
        assert!(run.ok(), "{}", run.stderr);
        let drift = read_csv(&out.join("drift.csv"));
        assert_eq!(drift.len(), small_config_parts());
        for r in &drift {
            // Tensors that are all zeros in A (some initial biases) have no relative change.
            if r["relative_change"].is_empty() {
                assert_eq!(num(r, "base_norm"), 0.0, "{}", r["tensor"]);
            } else {
                assert_eq!(num(r, "relative_change"), 0.0, "{}", r["tensor"]);
            }
        }
        assert!(
            drift
                .iter()
                .filter(|r| !r["relative_change"].is_empty())
                .count()
                > drift.len() / 2
        );
        assert!(drift
            .iter()
            .any(|r| r["tensor"] == "layers.2.blocks.1.attn.qkv.weight"
                && r["stage"] == "2"
                && r["block"] == "1"));
        assert!(drift
            .iter()
            .any(|r| r["tensor"] == "layers.1.downsample.reduction.weight"
                && r["stage"].is_empty()
                && r["block"].is_empty()));
        let unmatched = std::fs::read_to_string(out.join("unmatched.txt")).unwrap();
        let listed: Vec<&str> = unmatched.lines().filter(|l| !l.starts_with('#')).collect();
        assert!(listed.is_empty(), "{unmatched}");
        let stages = read_csv(&out.join("stages.csv"));
        assert_eq!(stages.len(), 8);
        for r in &stages {
            assert!((num(r, "linear_cka") - 1.0).abs() < 1e-9, "{image}: {r:?}");
            assert!((num(r, "mean_cosine") - 1.0).abs() < 1e-9, "{image}: {r:?}");
            assert!((num(r, "min_cosine") - 1.0).abs() < 1e-9, "{image}: {r:?}");
        }
    }
}

/// The OpenMMLab 3.x fixture (tests/fixtures/toolkit3_nested: timm 1.0.31 weights re-laid by
/// the mapping of mmdetection 3.x's swin_converter, see tests/reference/make_fixtures.py)
/// against its own tensors written in timm's layout: `compare` names every tensor as
/// timm >= 0.9 does (patch merging `layers.{i}.downsample.*` at the start of stage i, read back
/// from unfold order), finds no drift, and lists the per-stage output norms, which timm's
/// layout has no place for, as unmatched.
#[test]
fn toolkit_layout_drift_uses_timm_names() {
    let dir = tempfile::tempdir().unwrap();
    let case = fixtures().join("toolkit3_nested");
    let mm = case.join("weights.pth");
    let ckpt = Checkpoint::open(&mm).unwrap();
    assert_eq!(ckpt.layout.kind, LayoutKind::OpenMmlab3);
    let cfg = ckpt.infer_config(&Default::default()).unwrap();
    let parts = required_parts(&cfg);
    let mut timm = HashMap::new();
    for part in &parts {
        let shape = ckpt.shape(part).unwrap();
        timm.insert(part.canonical(), ckpt.load(part, &shape).unwrap());
    }
    let timm_path = dir.path().join("timm.safetensors");
    save(timm, &timm_path);
    assert_eq!(
        Checkpoint::open(&timm_path).unwrap().layout.kind,
        LayoutKind::Timm
    );
    let out = dir.path().join("out");
    let img = case.join("input.png");
    let run = compare(
        &mm,
        &timm_path,
        &img,
        &out,
        &["--pad-order", "pad-then-shift", "--small-stage", "pad-up"],
    );
    assert!(run.ok(), "{}", run.stderr);
    let drift = read_csv(&out.join("drift.csv"));
    assert_eq!(drift.len(), parts.len());
    for r in &drift {
        assert_eq!(num(r, "relative_change"), 0.0, "{}", r["tensor"]);
    }
    for name in [
        "patch_embed.proj.weight",
        "layers.1.downsample.reduction.weight",
        "layers.2.downsample.norm.bias",
        "layers.0.blocks.1.attn.qkv.weight",
        "layers.2.blocks.1.mlp.fc2.weight",
    ] {
        assert!(drift.iter().any(|r| r["tensor"] == name), "no row {name}");
    }
    let unmatched = std::fs::read_to_string(out.join("unmatched.txt")).unwrap();
    let (only, rest): (Vec<&str>, Vec<&str>) = unmatched
        .lines()
        .filter(|l| !l.starts_with('#'))
        .partition(|l| l.starts_with("only in"));
    assert_eq!(only.len(), 6, "{unmatched}");
    assert!(
        only.iter()
            .all(|l| l.starts_with("only in the base checkpoint: stage_norm.")),
        "{unmatched}"
    );
    // Not compared: the toolkit file's buffer, neck and head tensors, nothing of the backbone.
    assert_eq!(rest.len(), 10, "{unmatched}");
    assert!(
        rest.iter().all(|l| l.starts_with("base checkpoint: ")
            && (!l.contains("backbone.") || l.contains("relative_position_index"))),
        "{unmatched}"
    );
    let stages = read_csv(&out.join("stages.csv"));
    for r in &stages {
        assert!((num(r, "linear_cka") - 1.0).abs() < 1e-9, "{r:?}");
    }
}

fn small_config_parts() -> usize {
    required_parts(&small_config()).len() + 2
}

/// `features` output of one stage as tokens.
fn features(weights: &Path, image: &Path, dir: &Path) -> Vec<Tokens> {
    let out = dir.join(format!(
        "{}-{}.safetensors",
        mullion::io::file_name(weights),
        mullion::io::file_name(image)
    ));
    let run = mullion(&[
        "features",
        "--weights",
        weights.to_str().unwrap(),
        "--image",
        image.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert!(run.ok(), "{}", run.stderr);
    let t = candle_core::safetensors::load(&out, &Device::Cpu).unwrap();
    (0..4)
        .map(|s| {
            let v = &t[&format!("stage{s}")];
            let (_, h, w, c) = v.dims4().unwrap();
            let data = v
                .to_dtype(DType::F32)
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1()
                .unwrap();
            Tokens::new(h, w, c, data).unwrap()
        })
        .collect()
}

#[test]
fn compare_on_the_demo_pair_end_to_end() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (sample("demo-early.safetensors"), sample("demo.safetensors"));
    let names = [
        "tray-03-97x160.png",
        "tray-05-224x224.png",
        "tray-01-333x250.png",
    ];
    let imgs = dir.path().join("imgs");
    std::fs::create_dir(&imgs).unwrap();
    for n in names {
        std::fs::copy(sample(n), imgs.join(n)).unwrap();
    }
    std::fs::write(imgs.join("notes.txt"), "not an image").unwrap();
    let out = dir.path().join("out");
    let run = compare(&a, &b, &imgs, &out, &["--figures"]);
    assert!(run.ok(), "{}", run.stderr);
    let text = std::fs::read_to_string(out.join("stages.csv")).unwrap();
    assert!(text.starts_with("image,stage,linear_cka,mean_cosine,min_cosine,tokens\n"));
    let rows = read_csv(&out.join("stages.csv"));
    assert_eq!(rows.len(), 4 * 4);
    let mut sorted = names.to_vec();
    sorted.sort();
    for (i, n) in sorted.iter().chain(["all"].iter()).enumerate() {
        for s in 0..4 {
            assert_eq!(rows[i * 4 + s]["image"], *n);
            assert_eq!(rows[i * 4 + s]["stage"], s.to_string());
        }
    }
    // Each image's row against its own computation from `features` (the unpadded stage grid).
    let mut pooled_x: Vec<Vec<f32>> = vec![Vec::new(); 4];
    let mut pooled_y: Vec<Vec<f32>> = vec![Vec::new(); 4];
    let mut pooled_cos: Vec<Vec<f64>> = vec![Vec::new(); 4];
    for (i, n) in sorted.iter().enumerate() {
        let fa = features(&a, &imgs.join(n), dir.path());
        let fb = features(&b, &imgs.join(n), dir.path());
        for s in 0..4 {
            let r = &rows[i * 4 + s];
            let (x, y) = (&fa[s], &fb[s]);
            assert_eq!(num(r, "tokens") as usize, x.len());
            let cos: Vec<f64> = (0..x.len())
                .map(|t| {
                    let (u, v) = (x.token(t), y.token(t));
                    let dot: f64 = u.iter().zip(v).map(|(p, q)| *p as f64 * *q as f64).sum();
                    let nu: f64 = u.iter().map(|p| (*p as f64).powi(2)).sum::<f64>().sqrt();
                    let nv: f64 = v.iter().map(|p| (*p as f64).powi(2)).sum::<f64>().sqrt();
                    dot / (nu * nv)
                })
                .collect();
            let mean = cos.iter().sum::<f64>() / cos.len() as f64;
            let min = cos.iter().cloned().fold(f64::INFINITY, f64::min);
            assert!((num(r, "mean_cosine") - mean).abs() < 1e-9, "{n} stage {s}");
            assert!((num(r, "min_cosine") - min).abs() < 1e-9, "{n} stage {s}");
            let cka = linear_cka(&x.data, &y.data, x.len(), x.channels, y.channels)
                .unwrap()
                .unwrap();
            assert!((num(r, "linear_cka") - cka).abs() < 1e-9, "{n} stage {s}");
            assert!((0.0..=1.0 + 1e-12).contains(&cka));
            pooled_x[s].extend(&x.data);
            pooled_y[s].extend(&y.data);
            pooled_cos[s].extend(cos);
        }
    }
    // The pooled rows: tokens concatenated, then centred.
    for s in 0..4 {
        let r = &rows[12 + s];
        let (p, q) = (
            fa_width(&pooled_x[s], &pooled_cos[s]),
            fa_width(&pooled_y[s], &pooled_cos[s]),
        );
        let n = pooled_cos[s].len();
        assert_eq!(num(r, "tokens") as usize, n);
        let cka = linear_cka(&pooled_x[s], &pooled_y[s], n, p, q)
            .unwrap()
            .unwrap();
        assert!(
            (num(r, "linear_cka") - cka).abs() < 1e-9,
            "pooled stage {s}: {} vs {cka}",
            r["linear_cka"]
        );
        let mean = pooled_cos[s].iter().sum::<f64>() / n as f64;
        assert!((num(r, "mean_cosine") - mean).abs() < 1e-9);
    }
    let drift = read_csv(&out.join("drift.csv"));
    assert!(drift.len() > 100);
    assert!(
        drift.iter().all(|r| num(r, "relative_change") > 0.0),
        "training moved every tensor"
    );
    assert!(drift
        .iter()
        .any(|r| r["tensor"] == "layers.3.blocks.1.mlp.fc2.weight"));
    assert!(out.join("unmatched.txt").is_file());
    for n in names {
        let fig = out.join("figures").join(mullion::io::figure_file_name(
            std::path::Path::new(n),
            "compare",
        ));
        let img = image::open(&fig).unwrap();
        assert!(
            img.height() > 3 * 200,
            "{}: A, B and difference stacked",
            fig.display()
        );
    }
    // A rerun reuses every image and writes the same table.
    let again = compare(&a, &b, &imgs, &out, &["--figures"]);
    assert!(
        again.ok() && again.stderr.contains("0 computed, 3 reused"),
        "{}",
        again.stderr
    );
    assert_eq!(
        std::fs::read_to_string(out.join("stages.csv")).unwrap(),
        text
    );
    // Bad usage exits 2 and names the argument.
    let missing = dir.path().join("nope.png");
    let bad = compare(&a, &b, &missing, &out, &[]);
    assert_eq!(bad.code, 2, "{}", bad.stderr);
    assert!(
        bad.stderr.contains("--images") && bad.stderr.contains("nope.png"),
        "{}",
        bad.stderr
    );
    let no_images = mullion(&[
        "compare",
        "--base",
        a.to_str().unwrap(),
        "--tuned",
        b.to_str().unwrap(),
        "--out",
        "x",
    ]);
    assert_eq!(no_images.code, 2);
}

/// The width of a pooled token matrix: values over tokens.
fn fa_width(data: &[f32], tokens: &[f64]) -> usize {
    data.len() / tokens.len()
}

#[test]
fn sharded_compare_merged_equals_one_run() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (sample("demo-early.safetensors"), sample("demo.safetensors"));
    let images = crate::common::sample_data();
    let one = dir.path().join("one");
    let run = compare(&a, &b, &images, &one, &[]);
    assert!(run.ok(), "{}", run.stderr);
    let split = dir.path().join("split");
    let mut shard_dirs = Vec::new();
    for k in 1..=3 {
        let shard = format!("{k}/3");
        let run = compare(&a, &b, &images, &split, &["--shard", shard.as_str()]);
        assert!(run.ok(), "{}", run.stderr);
        shard_dirs.push(split.join(format!("shard-{k}-of-3")));
    }
    // A shard holds fewer than all images.
    let first = read_csv(&shard_dirs[0].join("stages.csv"));
    assert!(first.len() < read_csv(&one.join("stages.csv")).len());
    let merged = dir.path().join("merged");
    let mut margs = vec!["merge"];
    // Given out of order: the merge orders them.
    for d in shard_dirs.iter().rev() {
        margs.push(d.to_str().unwrap());
    }
    margs.extend(["--out", merged.to_str().unwrap()]);
    let m = mullion(&margs);
    assert!(m.ok(), "{}", m.stderr);
    for f in ["stages.csv", "drift.csv", "unmatched.txt"] {
        assert_eq!(
            std::fs::read_to_string(merged.join(f)).unwrap(),
            std::fs::read_to_string(one.join(f)).unwrap(),
            "{f}"
        );
    }
    // Missing shards are named.
    let part = mullion(&[
        "merge",
        shard_dirs[0].to_str().unwrap(),
        "--out",
        dir.path().join("m2").to_str().unwrap(),
    ]);
    assert_eq!(part.code, 2);
    assert!(
        part.stderr.contains("2, 3 of 3 are missing"),
        "{}",
        part.stderr
    );
}

#[test]
fn the_difference_map_works_with_the_shared_map_machinery() {
    let img = sample("tray-03-97x160.png");
    let sa = Session::open(&SessionOptions::new(sample("demo-early.safetensors"))).unwrap();
    let sb = Session::open(&SessionOptions::new(sample("demo.safetensors"))).unwrap();
    let (oa, ob) = (
        sa.run_image(&img, false, false).unwrap(),
        sb.run_image(&img, false, false).unwrap(),
    );
    let spec = ScaleSpec::default();
    // One pass is not enough for it; the existing kinds are unchanged by a second one.
    assert!(prepare_stages(&oa, &TokenDifference, &spec).is_err());
    let (norm1, _) = prepare_stages(&oa, &TokenNorm, &spec).unwrap();
    let (norm2, _) = prepare_stage_pair(&oa, Some(&ob), &TokenNorm, &spec).unwrap();
    assert_eq!(norm1, norm2);
    let (raw, shown) = prepare_stage_pair(&oa, Some(&ob), &TokenDifference, &spec).unwrap();
    assert_eq!(shown.len(), 4);
    for (s, m) in raw.iter().enumerate() {
        let cos = token_cosines(
            &stage_tokens(&oa, s).unwrap(),
            &stage_tokens(&ob, s).unwrap(),
        )
        .unwrap();
        let Map::Scalar { values, .. } = m else {
            panic!("scalar")
        };
        for (v, c) in values.iter().zip(&cos) {
            assert!((*v as f64 - (1.0 - c)).abs() < 1e-6);
        }
    }
    // Region statistics run on it unchanged.
    let sc = mullion::annotation::load(&sample("tray-03-97x160.png.regions.json"))
        .unwrap()
        .unwrap();
    let rows = region_stats(&oa, &raw, "difference", &sc.regions, "tray-03-97x160.png").unwrap();
    assert_eq!(rows.len(), sc.regions.len() * 4);
    assert!(rows.iter().all(|r| r.map == "difference"));
    assert!(rows
        .iter()
        .filter_map(|r| r.inside_mean)
        .all(|v| (0.0..=2.0).contains(&v)));
}

#[test]
fn a_rerun_with_more_images_adds_them_to_the_saved_sums() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (sample("demo-early.safetensors"), sample("demo.safetensors"));
    let grow = dir.path().join("grow");
    std::fs::create_dir(&grow).unwrap();
    for n in ["tray-03-97x160.png", "tray-05-224x224.png"] {
        std::fs::copy(sample(n), grow.join(n)).unwrap();
    }
    let run = |images: &Path, out: &Path| {
        let r = compare(&a, &b, &images, &out, &[]);
        assert!(r.ok(), "{}", r.stderr);
        r.stderr
    };
    let out = dir.path().join("out");
    run(&grow, &out);
    std::fs::copy(
        sample("tray-01-333x250.png"),
        grow.join("tray-01-333x250.png"),
    )
    .unwrap();
    let said = run(&grow, &out);
    assert!(said.contains("1 computed, 2 reused"), "{said}");
    // The same table as a fresh run over the three images, pooled rows included.
    let fresh = dir.path().join("fresh");
    run(&grow, &fresh);
    let table = |d: &Path| std::fs::read_to_string(d.join("stages.csv")).unwrap();
    assert_eq!(table(&out), table(&fresh));
    // An image replaced by another: its old tokens are in the sums, so everything is redone.
    std::fs::copy(
        sample("tray-06-224x224.png"),
        grow.join("tray-05-224x224.png"),
    )
    .unwrap();
    let said = run(&grow, &out);
    assert!(said.contains("3 computed, 0 reused"), "{said}");
    let fresh2 = dir.path().join("fresh2");
    run(&grow, &fresh2);
    assert_eq!(table(&out), table(&fresh2));
}

#[test]
fn other_widths_give_cka_without_cosine_and_other_depths_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let write = |name: &str, cfg: &Config| {
        let path = dir.path().join(name);
        save(
            random_timm_state_dict(cfg, 5)
                .unwrap()
                .into_iter()
                .collect(),
            &path,
        );
        path
    };
    let narrow = write("narrow.safetensors", &small_config());
    let wide = write(
        "wide.safetensors",
        &Config {
            embed_dim: 24,
            heads: vec![2, 2, 4, 4],
            ..small_config()
        },
    );
    let shallow = write(
        "shallow.safetensors",
        &Config {
            depths: vec![2, 2, 2],
            heads: vec![1, 2, 2],
            ..small_config()
        },
    );
    let img = sample("tray-03-97x160.png");
    let out = dir.path().join("out");
    let r = compare(&narrow, &wide, &img, &out, &["--figures"]);
    assert!(r.ok(), "{}", r.stderr);
    let rows = read_csv(&out.join("stages.csv"));
    assert_eq!(rows.len(), 8);
    for r in &rows {
        let c = num(r, "linear_cka");
        assert!((0.0..=1.0 + 1e-12).contains(&c), "{r:?}");
        assert!(
            r["mean_cosine"].is_empty() && r["min_cosine"].is_empty(),
            "{r:?}"
        );
    }
    // Only the bias tables of stages 1 and 3 (the same heads in both) keep their shape; every
    // other tensor is listed instead.
    let drift = read_csv(&out.join("drift.csv"));
    assert_eq!(drift.len(), 4, "{drift:?}");
    assert!(drift.iter().all(
        |r| r["tensor"].ends_with("attn.relative_position_bias_table")
            && (r["stage"] == "1" || r["stage"] == "3")
    ));
    let unmatched = std::fs::read_to_string(out.join("unmatched.txt")).unwrap();
    assert!(
        unmatched.contains("shapes differ: layers.0.blocks.0.attn.qkv.weight"),
        "{unmatched}"
    );
    assert!(out
        .join("figures/tray-03-97x160.compare.figure.png")
        .is_file());
    let r = compare(&narrow, &shallow, &img, &dir.path().join("o2"), &[]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(
        r.stderr.contains("shallow.safetensors") && r.stderr.contains("3 stages"),
        "{}",
        r.stderr
    );
}

#[test]
fn a_broken_image_is_listed_and_the_run_fails_after_writing() {
    let dir = tempfile::tempdir().unwrap();
    let imgs = dir.path().join("imgs");
    std::fs::create_dir(&imgs).unwrap();
    std::fs::copy(
        sample("tray-03-97x160.png"),
        imgs.join("tray-03-97x160.png"),
    )
    .unwrap();
    std::fs::write(imgs.join("broken.png"), b"not a png").unwrap();
    let out = dir.path().join("out");
    let (a, b) = (sample("demo-early.safetensors"), sample("demo.safetensors"));
    let r = compare(&a, &b, &imgs, &out, &[]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.stderr.contains("broken.png"), "{}", r.stderr);
    let rows = read_csv(&out.join("stages.csv"));
    assert_eq!(rows.len(), 8, "the good image and the pooled rows");
    assert!(rows.iter().all(|r| r["image"] != "broken.png"));
    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["failed"][0]["image"], "broken.png");
}

/// The report measures the difference map with `--base`: a box over the whole image has
/// `inside_mean` = 1 - the mean cosine that `compare` writes for the image (two separate code
/// paths: the report's region weights and the comparison's per-token cosines).
#[test]
fn report_with_a_base_measures_the_difference_map() {
    let dir = tempfile::tempdir().unwrap();
    let images = dir.path().join("images");
    std::fs::create_dir(&images).unwrap();
    let name = "tray-03-97x160.png";
    std::fs::copy(sample(name), images.join(name)).unwrap();
    let mut sc = mullion::annotation::Sidecar::new(name, 97, 160);
    sc.add_region(
        mullion::annotation::Shape::Box {
            x0: 0.0,
            y0: 0.0,
            x1: 97.0,
            y1: 160.0,
        },
        "whole tray",
        "",
    );
    mullion::annotation::save(&images.join(format!("{name}.regions.json")), &sc).unwrap();
    let (a, b) = (sample("demo-early.safetensors"), sample("demo.safetensors"));
    let rep = dir.path().join("rep");
    let r = mullion(&[
        "report",
        "--weights",
        b.to_str().unwrap(),
        "--base",
        a.to_str().unwrap(),
        "--map",
        "difference",
        "--images",
        images.to_str().unwrap(),
        "--out",
        rep.to_str().unwrap(),
        "--figures",
    ]);
    assert!(r.ok(), "{}", r.stderr);
    let cmp = dir.path().join("cmp");
    let c = compare(&a, &b, &images, &cmp, &[]);
    assert!(c.ok(), "{}", c.stderr);
    let rows = read_csv(&rep.join("regions.csv"));
    let stages = read_csv(&cmp.join("stages.csv"));
    assert_eq!(rows.len(), 4);
    for row in &rows {
        assert_eq!(row["map"], "difference");
        let s = &row["stage"];
        let st = stages
            .iter()
            .find(|x| x["image"] == name && &x["stage"] == s)
            .unwrap();
        let (inside, mean_cos) = (num(row, "inside_mean"), num(st, "mean_cosine"));
        assert!(
            (inside - (1.0 - mean_cos)).abs() < 1e-6,
            "stage {s}: inside {inside} vs 1 - {mean_cos}"
        );
    }
    assert!(rep
        .join("figures")
        .join(mullion::io::figure_file_name(Path::new(name), "difference"))
        .is_file());
    // The base is part of the rerun key: another base recomputes.
    let again = mullion(&[
        "report",
        "--weights",
        b.to_str().unwrap(),
        "--base",
        b.to_str().unwrap(),
        "--map",
        "difference",
        "--images",
        images.to_str().unwrap(),
        "--out",
        rep.to_str().unwrap(),
    ]);
    assert!(
        again.stderr.contains("1 computed, 0 reused"),
        "{}",
        again.stderr
    );
    // Against itself the difference is zero everywhere.
    for row in read_csv(&rep.join("regions.csv")) {
        assert!(num(&row, "inside_mean").abs() < 1e-6, "{row:?}");
    }
    // Usage: the difference without a base, and a base with a map of one checkpoint.
    let no_base = mullion(&[
        "report",
        "--weights",
        b.to_str().unwrap(),
        "--map",
        "difference",
        "--images",
        images.to_str().unwrap(),
        "--out",
        dir.path().join("x").to_str().unwrap(),
    ]);
    assert_eq!(no_base.code, 2, "{}", no_base.stderr);
    assert!(no_base.stderr.contains("--base"), "{}", no_base.stderr);
    let base_unused = mullion(&[
        "report",
        "--weights",
        b.to_str().unwrap(),
        "--base",
        a.to_str().unwrap(),
        "--images",
        images.to_str().unwrap(),
        "--out",
        dir.path().join("y").to_str().unwrap(),
    ]);
    assert_eq!(base_unused.code, 2, "{}", base_unused.stderr);
}
