//! The command-line contracts on the bundled demo: `bench` reports its figure last,
//! `features` writes NHWC stage tensors, `figure` saves a PNG with statistics.

use crate::common::sample;

fn mullion(args: &[&str]) -> (bool, String, String) {
    let r = crate::common::mullion(args);
    (r.ok(), r.stdout, r.stderr)
}

#[test]
fn bench_prints_median_and_peak_memory_last() {
    let (ok, stdout, stderr) =
        mullion(&["bench", "--preset", "tiny", "--size", "224", "--runs", "1"]);
    assert!(ok, "{stderr}");
    let last = stdout.lines().last().unwrap();
    let fields: Vec<(&str, f64)> = last
        .split_whitespace()
        .map(|kv| {
            let (k, v) = kv.split_once('=').unwrap();
            (k, v.parse::<f64>().unwrap())
        })
        .collect();
    assert_eq!(
        fields.iter().map(|f| f.0).collect::<Vec<_>>(),
        ["median_ms", "peak_rss_mb"]
    );
    assert!(fields.iter().all(|f| f.1 > 0.0), "{last}");
}

#[test]
fn features_and_figure_on_the_demo() {
    let dir = tempfile::tempdir().unwrap();
    let weights = sample("demo.safetensors");
    let image = sample("tray-03-97x160.png");
    let (w, i) = (weights.to_str().unwrap(), image.to_str().unwrap());
    let feats = dir.path().join("f.safetensors");
    let (ok, _, err) = mullion(&[
        "features",
        "--weights",
        w,
        "--image",
        i,
        "--out",
        feats.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    let t = candle_core::safetensors::load(&feats, &candle_core::Device::Cpu).unwrap();
    // 97x160 (W x H), patch 4: 40x25 tokens, then 20x13, 10x7, 5x4.
    assert_eq!(t["embed"].dims(), &[1, 40, 25, 32]);
    assert_eq!(t["stage3"].dims(), &[1, 5, 4, 256]);

    let png = dir.path().join("fig.png");
    let json = dir.path().join("fig.json");
    let (ok, _, err) = mullion(&[
        "figure",
        "--weights",
        w,
        "--image",
        i,
        "--out",
        png.to_str().unwrap(),
        "--stats",
        json.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    assert!(image::open(&png).unwrap().width() > 4 * 97);
    assert!(std::fs::read_to_string(&json).unwrap().contains("p99"));
}

#[test]
fn bench_times_the_users_own_checkpoint() {
    let w = crate::common::fixtures().join("timm_odd/weights.safetensors");
    let (ok, stdout, stderr) = mullion(&[
        "bench",
        "--weights",
        w.to_str().unwrap(),
        "--size",
        "97x160",
        "--runs",
        "1",
    ]);
    assert!(ok, "{stderr}");
    assert!(
        stdout.contains("checkpoint weights.safetensors at 97x160"),
        "{stdout}"
    );
    let last = stdout.lines().last().unwrap();
    assert!(
        last.starts_with("median_ms=") && last.contains(" peak_rss_mb="),
        "{last}"
    );
    // A checkpoint that is not there is a runtime failure naming it.
    let r = crate::common::mullion(&["bench", "--weights", "missing.safetensors"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("missing.safetensors"), "{}", r.stderr);
}

#[test]
fn figures_are_png_only() {
    let dir = tempfile::tempdir().unwrap();
    let w = crate::common::fixtures().join("timm_odd/weights.safetensors");
    let i = crate::common::fixtures().join("timm_odd/input.png");
    let out = dir.path().join("fig.jpg");
    let r = crate::common::mullion(&[
        "figure",
        "--weights",
        w.to_str().unwrap(),
        "--image",
        i.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("fig.jpg") && r.stderr.contains("PNG"),
        "{}",
        r.stderr
    );
    assert!(!out.exists());
}
