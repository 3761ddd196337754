//! The padding and seam studies against the reference libraries, and `mullion padding` /
//! `mullion attention` driven the way a user runs them.
//!
//! Fixture: tests/fixtures/padding/ (tests/reference/make_padding_refs.py) runs the committed
//! `timm_multiple` weights on a 237x229 image through timm 1.0.31 and transformers 5.23.0
//! (torch 2.15.0); the sweep, order and attention-share figures in `padding.json` are computed
//! with numpy 2.4.6 from those libraries' own forward passes. Each check names its source.

use crate::common::{fixtures, mullion, rel_diff_f64 as rel_diff};
use crate::common::{num, read_csv};
use candle_core::{Device, Tensor};
use serde_json::Value;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Relative tolerance of every comparison with a reference library.
const TOLERANCE: f64 = 1e-5;

fn dir() -> PathBuf {
    fixtures().join("padding")
}

fn refs() -> Value {
    serde_json::from_str(&std::fs::read_to_string(dir().join("padding.json")).unwrap()).unwrap()
}

fn weights() -> PathBuf {
    dir().join(refs()["weights"].as_str().unwrap())
}

fn image() -> PathBuf {
    dir().join("input.png")
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The semantics flags that make Mullion compute as the named library does at this size.
fn flags(source: &str) -> Vec<&'static str> {
    match source {
        "timm" => vec![
            "--pad-order",
            "shift-then-pad",
            "--small-stage",
            "clamp-per-axis",
        ],
        _ => vec!["--pad-order", "pad-then-shift", "--small-stage", "clamp"],
    }
}

fn close(got: f64, want: f64) -> bool {
    (got - want).abs() <= TOLERANCE * want.abs().max(1e-12)
}

/// Run `mullion attention` for one block under `source`'s semantics and load what it wrote.
fn attention_of(source: &str, stage: usize, block: usize, out: &Path) -> HashMap<String, Tensor> {
    let (st, bl) = (stage.to_string(), block.to_string());
    let (w, i) = (weights(), image());
    let mut args = vec![
        "attention",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--stage",
        &st,
        "--block",
        &bl,
        "--out",
        s(out),
    ];
    args.extend(flags(source));
    let run = mullion(&args);
    assert!(run.ok(), "{}", run.stderr);
    candle_core::safetensors::load(out, &Device::Cpu).unwrap()
}

/// Attention probabilities and window layouts of every block in the fixture: timm 1.0.31
/// (forward hook on the attention softmax; layout from timm's roll, pad, window_partition) and
/// transformers 5.23.0 (`output_attentions=True`; layout from the layer's maybe_pad,
/// cyclic_shift, window_partition).
#[test]
fn attention_matches_both_reference_libraries() {
    let want =
        candle_core::safetensors::load(dir().join("attention.safetensors"), &Device::Cpu).unwrap();
    let tmp = tempfile::tempdir().unwrap();
    let mut checked = 0;
    for (prefix, source) in [("timm_", "timm"), ("tf5_", "transformers")] {
        let mut keys: Vec<&String> = want
            .keys()
            .filter(|k| k.starts_with(prefix) && k.ends_with("_probs"))
            .collect();
        keys.sort();
        for key in keys {
            let parts: Vec<&str> = key.split('_').collect();
            let stage: usize = parts[1][1..].parse().unwrap();
            let block: usize = parts[2][1..].parse().unwrap();
            let out = tmp
                .path()
                .join(format!("{prefix}{stage}_{block}.safetensors"));
            let got = attention_of(source, stage, block, &out);
            let probs = &got["probs"];
            assert_eq!(probs.dims(), want[key].dims(), "{key}");
            let d = rel_diff(probs, &want[key]);
            assert!(d <= TOLERANCE, "{key} ({source}): {d:e}");
            let layout = key.replace("_probs", "_window_tokens");
            let g: Vec<i64> = got["window_tokens"]
                .flatten_all()
                .unwrap()
                .to_vec1()
                .unwrap();
            let w: Vec<i64> = want[&layout].flatten_all().unwrap().to_vec1().unwrap();
            assert_eq!(
                got["window_tokens"].dims(),
                want[&layout].dims(),
                "{layout}"
            );
            assert_eq!(g, w, "{layout} ({source})");
            checked += 1;
        }
    }
    assert!(checked >= 6, "only {checked} blocks in the fixture");
}

/// The comparison above can fail: the other pad order gives other windows in a shifted block.
#[test]
fn attention_of_the_other_pad_order_differs() {
    let want =
        candle_core::safetensors::load(dir().join("attention.safetensors"), &Device::Cpu).unwrap();
    let tmp = tempfile::tempdir().unwrap();
    let got = attention_of("transformers", 0, 1, &tmp.path().join("a.safetensors"));
    assert!(rel_diff(&got["probs"], &want["timm_s0_b1_probs"]) > 1e-2);
    let g: Vec<i64> = got["window_tokens"]
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
    let w: Vec<i64> = want["timm_s0_b1_window_tokens"]
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
    assert_ne!(g, w);
}

fn run_padding(source: &str, out: &Path, extra: &[&str]) {
    let (w, i) = (weights(), image());
    let mut args = vec![
        "padding",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--out",
        s(out),
        "--pads",
        "0,8,16",
    ];
    args.extend(flags(source));
    args.extend(extra);
    let run = mullion(&args);
    assert!(run.ok(), "{}", run.stderr);
}

/// `mullion padding` under each library's semantics: the sweep rows against that library's
/// passes (timm 1.0.31 / transformers 5.23.0, cosines in numpy 2.4.6), the pad-order figures
/// against f1 = transformers, f2 = timm, and the attention shares against the blocks both
/// libraries gave.
#[test]
fn padding_command_matches_reference_passes() {
    let r = refs();
    for source in ["timm", "transformers"] {
        let tmp = tempfile::tempdir().unwrap();
        run_padding(source, tmp.path(), &[]);
        // Sweep: pad 0 is exactly 1; every other row within 1e-5 of the library's.
        let sweep = read_csv(&tmp.path().join("sweep.csv"));
        let want = r["sweep"][source].as_array().unwrap();
        assert_eq!(sweep.len(), want.len(), "{source}");
        for (g, w) in sweep.iter().zip(want) {
            for key in ["pad_px", "stage", "tokens"] {
                assert_eq!(num(g, key), w[key].as_f64().unwrap(), "{source} {key}");
            }
            if num(g, "pad_px") == 0.0 {
                assert_eq!((num(g, "mean_cosine"), num(g, "min_cosine")), (1.0, 1.0));
            }
            for key in ["mean_cosine", "min_cosine"] {
                let (a, b) = (num(g, key), w[key].as_f64().unwrap());
                assert!(close(a, b), "{source} sweep {g:?}: {key} {a} vs {b}");
            }
        }
        // Orders: the same two passes whichever order the run defaults to.
        let orders = read_csv(&tmp.path().join("orders.csv"));
        let want = r["orders"].as_array().unwrap();
        assert_eq!(orders.len(), want.len());
        for (g, w) in orders.iter().zip(want) {
            let (a, b) = (num(g, "max_rel_diff"), w["max_rel_diff"].as_f64().unwrap());
            assert!(close(a, b), "{source} orders: {a} vs {b}");
            // A share is a count of tokens: equal counts, not merely close shares.
            let tokens = w["tokens"].as_f64().unwrap();
            let (a, b) = (
                num(g, "share_over_1e-3"),
                w["share_over_1e-3"].as_f64().unwrap(),
            );
            assert_eq!((a * tokens).round(), (b * tokens).round(), "{source} share");
        }
        // Attention shares of the blocks this library's fixture holds.
        let att = read_csv(&tmp.path().join("pad_attention.csv"));
        let mut checked = 0;
        for w in r["pad_attention"].as_array().unwrap() {
            if w["source"] != source {
                continue;
            }
            let (st, bl) = (w["stage"].as_f64().unwrap(), w["block"].as_f64().unwrap());
            let g = att
                .iter()
                .find(|g| num(g, "stage") == st && num(g, "block") == bl)
                .unwrap();
            for key in ["mean_share", "max_share"] {
                let (a, b) = (num(g, key), w[key].as_f64().unwrap());
                assert!(
                    close(a, b),
                    "{source} stage {st} block {bl} {key}: {a} vs {b}"
                );
            }
            checked += 1;
        }
        assert!(checked >= 3, "{source}: {checked}");
        // Every block of the model has a row (depths 2, 2, 4, 2).
        assert_eq!(att.len(), 10);
    }
}

/// The files a user gets: profiles for every map, size advice, figures when asked.
#[test]
fn padding_command_writes_profiles_sizes_and_figures() {
    let tmp = tempfile::tempdir().unwrap();
    run_padding("timm", tmp.path(), &["--figures"]);
    let prof = read_csv(&tmp.path().join("profile.csv"));
    for map in [
        "padding:16",
        "pad-order",
        "pad-attention:0",
        "pad-attention:1",
    ] {
        for kind in ["window-regular", "window-shifted", "border"] {
            assert!(
                prof.iter().any(|r| r["map"] == map && r["profile"] == kind),
                "{map} {kind}"
            );
        }
    }
    // Stage 0 is 58x60 tokens in 7x7 windows: 49 positions, every token counted once.
    let regular: Vec<_> = prof
        .iter()
        .filter(|r| {
            r["map"] == "pad-order" && r["stage"] == "0" && r["profile"] == "window-regular"
        })
        .collect();
    assert_eq!(regular.len(), 49);
    assert_eq!(
        regular.iter().map(|r| num(r, "tokens")).sum::<f64>(),
        58.0 * 60.0
    );
    let sizes = std::fs::read_to_string(tmp.path().join("sizes.txt")).unwrap();
    assert!(
        sizes.contains("input padding to the patch: 3 px bottom, 3 px right"),
        "{sizes}"
    );
    assert!(sizes.contains("stage 3: grid 8x8 (rows x cols), window 7x7, padded to 14x14"));
    assert!(sizes.contains("not whether a prediction is right"));
    for id in [
        "padding-8",
        "padding-16",
        "pad-order",
        "pad-attention-0",
        "pad-attention-1",
    ] {
        let f = tmp.path().join(format!("figures/input.{id}.figure.png"));
        assert!(image::open(&f).is_ok(), "{}", f.display());
    }
}

#[test]
fn bad_padding_and_attention_arguments() {
    let tmp = tempfile::tempdir().unwrap();
    let (w, i) = (weights(), image());
    let out = tmp.path().join("o");
    let base = |extra: &[&str]| {
        let mut a = vec![
            "padding",
            "--weights",
            s(&w),
            "--image",
            s(&i),
            "--out",
            s(&out),
        ];
        a.extend(extra);
        mullion(&a)
    };
    for pads in ["8,-1", "a", "8,,16", "8,8", "1.5"] {
        let r = base(&["--pads", pads]);
        assert_eq!(r.code, 2, "--pads {pads}: {}", r.stderr);
    }
    let missing = tmp.path().join("none.png");
    let r = mullion(&[
        "padding",
        "--weights",
        s(&w),
        "--image",
        s(&missing),
        "--out",
        s(&out),
    ]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.stderr.contains("none.png"), "{}", r.stderr);

    let att = |stage: &str, block: &str, o: &Path| {
        mullion(&[
            "attention",
            "--weights",
            s(&w),
            "--image",
            s(&i),
            "--stage",
            stage,
            "--block",
            block,
            "--out",
            s(o),
        ])
    };
    let o = tmp.path().join("a.safetensors");
    let r = att("4", "0", &o);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("stages 0 to 3"), "{}", r.stderr);
    let r = att("2", "4", &o);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("blocks 0 to 3"), "{}", r.stderr);
    let r = att("0", "-1", &o);
    assert_eq!(r.code, 2, "{}", r.stderr);
    // The report runs one pass per image: a padding kind is refused before any work.
    let r = mullion(&[
        "report",
        "--weights",
        s(&w),
        "--images",
        s(&dir()),
        "--out",
        s(&tmp.path().join("r")),
        "--map",
        "padding:8",
    ]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("second pass"), "{}", r.stderr);
    // The output may not be one of the inputs.
    let r = att("0", "0", &i);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(!o.exists());
}

/// The padding kinds go through the shared map preparation with the second pass they name
/// (and are refused without it); `padding:8` is `1 - cosine` of the sweep, so its stage means
/// give the sweep row timm 1.0.31 gave (see above).
#[test]
fn padding_kinds_in_the_shared_map_machinery() {
    use mullion::analysis::padding::run_variant;
    use mullion::analysis::{parse_map_kind, prepare_stage_pair, prepare_stages, ScaleSpec};
    use mullion::engine::{ForwardOptions, Session, SessionOptions};
    let session = Session::open(&SessionOptions::new(weights())).unwrap();
    let x = session.load_input(&image()).unwrap();
    let base = session
        .forward_input(&image(), &x, &ForwardOptions::default())
        .unwrap();
    let spec = ScaleSpec::default();
    let r = refs();
    for id in ["padding:8", "pad-order", "pad-attention:1"] {
        let kind = parse_map_kind(id).unwrap();
        assert!(prepare_stages(&base, kind.as_ref(), &spec).is_err(), "{id}");
        let v = kind.variant().expect("a padding kind names its pass");
        let second = run_variant(&session.model, &x, base.geometry.semantics, v).unwrap();
        let (raw, prepared) =
            prepare_stage_pair(&base, Some(&second), kind.as_ref(), &spec).unwrap();
        assert_eq!(prepared.len(), 4);
        for (s, m) in raw.iter().enumerate() {
            assert_eq!(m.dims(), base.geometry.stages[s].grid, "{id} stage {s}");
        }
        if id == "padding:8" {
            for (s, m) in raw.iter().enumerate() {
                let v = m.scalars().unwrap();
                let mean = 1.0 - v.iter().map(|&d| d as f64).sum::<f64>() / v.len() as f64;
                let want = r["sweep"]["timm"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .find(|w| w["pad_px"] == 8 && w["stage"] == s)
                    .unwrap()["mean_cosine"]
                    .as_f64()
                    .unwrap();
                assert!(close(mean, want), "stage {s}: {mean} vs {want}");
            }
        }
    }
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("f.png");
    let (w, i) = (weights(), image());
    let run = mullion(&[
        "figure",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--out",
        s(&out),
        "--map",
        "padding:8",
    ]);
    assert!(run.ok(), "{}", run.stderr);
    assert!(image::open(&out).is_ok());
}

/// The sweep comparison can fail: black pixels added *before* normalisation (not zeros after
/// it) give other cosines than timm's zero-padded passes.
#[test]
fn padding_before_normalisation_is_told_apart() {
    use mullion::analysis::padding::sweep_cosines;
    use mullion::engine::input::{load_image, normalise, Normalisation};
    use mullion::engine::{ForwardOptions, Session, SessionOptions};
    let session = Session::open(&SessionOptions::new(weights())).unwrap();
    let img = load_image(image()).unwrap();
    let mut black = image::RgbImage::new(img.width() + 8, img.height() + 8);
    image::imageops::replace(&mut black, &img, 0, 0);
    let run = |im: &image::RgbImage| {
        let x = normalise(im, &Normalisation::IMAGENET).unwrap();
        session
            .forward_input(&image(), &x, &ForwardOptions::default())
            .unwrap()
    };
    let (base, padded) = (run(&img), run(&black));
    let (_, cos) = sweep_cosines(&base, &padded, 0).unwrap();
    let mean = cos.iter().sum::<f64>() / cos.len() as f64;
    let want = refs()["sweep"]["timm"][4]["mean_cosine"].as_f64().unwrap();
    assert_eq!(refs()["sweep"]["timm"][4]["pad_px"], 8);
    assert!(!close(mean, want), "{mean} vs {want}");
}

/// A second run on a folder a run is writing to is refused at once (exit 1), and a memory
/// limit too small for the study is a runtime failure naming the image.
#[test]
fn padding_locks_its_folder_and_keeps_to_the_memory_limit() {
    let tmp = tempfile::tempdir().unwrap();
    let (w, i) = (weights(), image());
    let _lock = mullion::io::lock_folder(tmp.path()).unwrap();
    let r = mullion(&[
        "padding",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--out",
        s(tmp.path()),
    ]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.stderr.contains("another Mullion run"), "{}", r.stderr);
    assert!(!tmp.path().join("sweep.csv").exists());
    let other = tmp.path().join("o");
    let r = mullion(&[
        "padding",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--out",
        s(&other),
        "--max-memory-gb",
        "0.01",
    ]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.stderr.contains("input.png"), "{}", r.stderr);
}

/// On a demo tray whose first stage needs no window padding (333x250: 63x84 tokens, windows of
/// 7), the two pad orders agree exactly there and part at the stages that pad; the sweep keeps
/// one row per pad and stage, cosines within [-1, 1].
#[test]
fn pad_orders_agree_where_nothing_pads() {
    let tmp = tempfile::tempdir().unwrap();
    let (w, i) = (
        crate::common::sample("demo.safetensors"),
        crate::common::sample("tray-01-333x250.png"),
    );
    let run = mullion(&[
        "padding",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--out",
        s(tmp.path()),
    ]);
    assert!(run.ok(), "{}", run.stderr);
    let orders = read_csv(&tmp.path().join("orders.csv"));
    assert_eq!(
        (
            num(&orders[0], "max_rel_diff"),
            num(&orders[0], "share_over_1e-3")
        ),
        (0.0, 0.0)
    );
    assert!(orders[1..].iter().all(|r| num(r, "max_rel_diff") > 1e-3));
    let sweep = read_csv(&tmp.path().join("sweep.csv"));
    assert_eq!(sweep.len(), 4 * 4);
    for r in &sweep {
        let (m, lo) = (num(r, "mean_cosine"), num(r, "min_cosine"));
        assert!((-1.0..=1.0).contains(&lo) && lo <= m && m <= 1.0, "{r:?}");
    }
    let sizes = std::fs::read_to_string(tmp.path().join("sizes.txt")).unwrap();
    assert!(
        sizes.contains(
            "stage 0: grid 63x84 (rows x cols), window 7x7, padded to 63x84 (+0 rows, +0 cols)"
        ),
        "{sizes}"
    );
}

/// A checkpoint whose bias tables were made for a clamped window (timm_odd: 4x5 at stage 3)
/// cannot run the larger padded input: those sweep rows stay empty, the rest is written, and
/// the run fails (exit 1) naming the image, the pad and the reason.
#[test]
fn a_pad_the_checkpoint_cannot_run_is_reported() {
    let tmp = tempfile::tempdir().unwrap();
    let d = fixtures().join("timm_odd");
    let (w, i) = (d.join("weights.safetensors"), d.join("input.png"));
    let r = mullion(&[
        "padding",
        "--weights",
        s(&w),
        "--image",
        s(&i),
        "--out",
        s(tmp.path()),
        "--pads",
        "0,8,16",
    ]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(
        r.stderr.contains("input.png") && r.stderr.contains("16 px"),
        "{}",
        r.stderr
    );
    assert!(r.stderr.contains("bias table"), "{}", r.stderr);
    let sweep = read_csv(&tmp.path().join("sweep.csv"));
    assert_eq!(sweep.len(), 12);
    for row in &sweep {
        let empty = row["mean_cosine"].is_empty();
        assert_eq!(empty, row["pad_px"] == "16", "{row:?}");
    }
    for f in [
        "orders.csv",
        "pad_attention.csv",
        "profile.csv",
        "sizes.txt",
    ] {
        assert!(tmp.path().join(f).is_file(), "{f}");
    }
}
