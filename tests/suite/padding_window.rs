//! The padding and seam lab in the window, driven through its accessibility labels: the three
//! padding map kinds from the map menu (each needs a second pass of the checkpoint, run off the
//! drawing thread), the seams-and-border profiles of the lens stage and the size advice; the
//! saved figure carries the profiles. The numbers the window shows are checked against what
//! `mullion padding` writes for the same image, whose numbers the padding suite checks against
//! timm 1.0.31 and transformers 5.23.0.

use crate::common::{mullion, sample};
use crate::common::{num, read_csv};
use crate::kit::{harness, type_path, wait};
use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;
use mullion::app::Window;

fn choose_kind(h: &mut Harness<'_, Window>, label: &str) {
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label(label).click();
    h.run_steps(2);
    wait(h);
}

/// Per stage, the mean of the raw map on screen.
fn stage_means(h: &Harness<'_, Window>) -> Vec<f64> {
    let maps = h
        .state()
        .bench
        .pictures
        .maps
        .clone()
        .expect("maps on screen");
    maps.raw
        .iter()
        .map(|m| {
            let v = m.scalars().unwrap();
            v.iter().map(|&x| x as f64).sum::<f64>() / v.len() as f64
        })
        .collect()
}

#[test]
fn padding_kinds_profiles_and_size_advice_agree_with_the_command() {
    let dir = tempfile::tempdir().unwrap();
    let name = "tray-03-97x160.png";
    let img = dir.path().join(name);
    std::fs::copy(sample(name), &img).unwrap();
    let weights = sample("demo.safetensors");
    let out = dir.path().join("lab");
    let r = mullion(&[
        "padding",
        "--weights",
        weights.to_str().unwrap(),
        "--image",
        img.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--pads",
        "0,16",
    ]);
    assert!(r.ok(), "{}", r.stderr);
    let sweep = read_csv(&out.join("sweep.csv"));
    let orders = read_csv(&out.join("orders.csv"));
    let shares = read_csv(&out.join("pad_attention.csv"));

    let mut h = harness();
    for p in [weights.clone(), img.clone()] {
        type_path(&mut h, &p, "Open path");
    }

    // Padding sensitivity (16 px, the default): 1 - mean cosine of sweep.csv.
    choose_kind(&mut h, "padding sensitivity");
    assert_eq!(
        h.state().bench.pictures.maps.as_ref().unwrap().map_id,
        "padding:16"
    );
    for (s, mean) in stage_means(&h).iter().enumerate() {
        let row = sweep
            .iter()
            .find(|r| r["pad_px"] == "16" && r["stage"] == s.to_string())
            .unwrap();
        let want = 1.0 - num(row, "mean_cosine");
        assert!((mean - want).abs() < 1e-5, "stage {s}: {mean} vs {want}");
    }

    // Pad-order disagreement: the share of tokens over 1e-3 of orders.csv.
    choose_kind(&mut h, "pad-order disagreement");
    let maps = h.state().bench.pictures.maps.clone().unwrap();
    assert_eq!(maps.map_id, "pad-order");
    for (s, m) in maps.raw.iter().enumerate() {
        let v = m.scalars().unwrap();
        let share = v.iter().filter(|&&x| x > 1e-3).count() as f64 / v.len() as f64;
        let row = orders.iter().find(|r| r["stage"] == s.to_string()).unwrap();
        assert!(
            (share - num(row, "share_over_1e-3")).abs() < 1e-9,
            "stage {s}"
        );
    }

    // Attention on padding, block 0: mean_share of pad_attention.csv.
    choose_kind(&mut h, "attention on padding");
    assert_eq!(
        h.state().bench.pictures.maps.as_ref().unwrap().map_id,
        "pad-attention:0"
    );
    for (s, mean) in stage_means(&h).iter().enumerate() {
        let row = shares
            .iter()
            .find(|r| r["stage"] == s.to_string() && r["block"] == "0")
            .unwrap();
        assert!((mean - num(row, "mean_share")).abs() < 1e-5, "stage {s}");
    }

    // Back to the norm; the seams and border window for the lens stage.
    choose_kind(&mut h, "token L2 norm");
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let png = dir.path().join("tray-03-97x160.norm.figure.png");
    let plain = image::open(&png).unwrap();
    h.get_by_label("Seams and border").click();
    h.run_steps(3);
    assert!(h.state().bench.show_profiles);
    assert!(h.query_by_label("border profile").is_some());
    assert!(h.query_all_by_label("regular windows").count() >= 1);
    {
        let maps = h.state().bench.pictures.maps.clone().unwrap();
        let p = maps.profiles[0].as_ref().expect("profiles of a scalar map");
        // Every token is in exactly one window position and one border distance.
        let n: usize = p.regular.as_ref().unwrap().1.iter().map(|b| b.tokens).sum();
        let m: usize = p.border.iter().map(|b| b.tokens).sum();
        assert_eq!((n, m), (1000, 1000));
        // The size advice names a size that needs no padding.
        let advice = maps.size_advice.as_ref().unwrap();
        assert!(advice.contains("97"), "{advice}");
    }
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let with = image::open(&png).unwrap();
    assert!(
        with.height() > plain.height() + 50,
        "the figure carries the profiles"
    );
}
