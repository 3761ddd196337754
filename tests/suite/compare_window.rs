//! Two checkpoints in the window, driven headlessly through its accessibility labels
//! (egui_kittest): the demo pair opened by typed paths (the early demo checkpoint as the base A,
//! the final one as B), three panels per stage with CKA beside each title, the hover read-out of
//! both values and the cosine, the weight drift chart and its sortable table, the difference map
//! as a map kind (regions and saved figures work on it), saving the comparison figure, widths
//! that differ, and closing the base.
//!
//! The numbers on screen are checked against the same quantities computed here from the two
//! forward passes (linear CKA and cosine are themselves checked against numpy in `compare.rs`).

use crate::common::{fixtures, sample};
use crate::kit::{harness, type_path, wait};
use egui_kittest::kittest::{By, Queryable};
use egui_kittest::Harness;
use mullion::analysis::compare::{linear_cka, token_cosines, DifferenceStage};
use mullion::analysis::stage_tokens;
use mullion::annotation::Shape;
use mullion::app::actions::{Action, RegionEdit};
use mullion::app::panels::drift::Column;
use mullion::app::panels::readout::hover_lines;
use mullion::app::Window;
use std::path::Path;

fn messages(h: &Harness<'_, Window>) -> String {
    let m: Vec<String> = h
        .state()
        .bench
        .messages
        .iter()
        .map(|m| m.text.clone())
        .collect();
    m.join("\n")
}

/// A copy of a demo image (and its region file) in a folder of its own, so edits stay there.
fn demo_image(dir: &Path) -> std::path::PathBuf {
    let img = dir.join("tray-03-97x160.png");
    std::fs::copy(sample("tray-03-97x160.png"), &img).unwrap();
    img
}

#[test]
fn the_demo_pair_shows_a_b_and_the_difference_with_drift_and_saves() {
    let dir = tempfile::tempdir().unwrap();
    let img = demo_image(dir.path());
    let mut h = harness();
    type_path(&mut h, &sample("demo.safetensors"), "Open path");
    type_path(
        &mut h,
        &sample("demo-early.safetensors"),
        "Open path as base (A)",
    );
    type_path(&mut h, &img, "Open path");
    assert!(h.state().bench.comparing(), "{}", messages(&h));
    h.run_steps(2);

    // Three panels per stage, CKA beside each title, and the slots named.
    let n_stages = 4;
    for s in 0..n_stages {
        for row in ["A stage", "B stage", "A vs B stage"] {
            let title = format!("{row} {s}");
            assert!(
                h.query_all(By::new().label_contains(&title)).count() >= 1,
                "no panel titled '{title}…'"
            );
        }
    }
    assert!(h
        .query_by_label_contains("base (A): demo-early.safetensors")
        .is_some());
    assert!(h
        .query_by_label_contains("checkpoint (B): demo.safetensors")
        .is_some());

    // The numbers on screen are those of the two passes: CKA and cosine per stage.
    {
        let b = &h.state().bench;
        let (oa, ob) = (
            &b.shown_base.as_ref().unwrap().outputs,
            &b.shown.as_ref().unwrap().outputs,
        );
        let maps = b.pictures.maps.as_ref().unwrap();
        let pair = maps.pair.as_ref().expect("the comparison view");
        for s in 0..n_stages {
            let (ta, tb) = (stage_tokens(oa, s).unwrap(), stage_tokens(ob, s).unwrap());
            let cka = linear_cka(&ta.data, &tb.data, ta.len(), ta.channels, tb.channels)
                .unwrap()
                .unwrap();
            assert_eq!(pair.cka[s], Some(cka));
            assert!(
                h.query_all(By::new().label_contains(&format!("A stage {s} · CKA {cka:.3}")))
                    .count()
                    >= 1,
                "stage {s}: CKA {cka:.3} not on screen"
            );
            let cos = token_cosines(&ta, &tb).unwrap();
            let mean = cos.iter().sum::<f64>() / cos.len() as f64;
            match &pair.difference[s] {
                DifferenceStage::Shown { mean_cosine, .. } => {
                    assert!((mean_cosine - mean).abs() < 1e-9)
                }
                DifferenceStage::Absent(why) => panic!("stage {s}: {why}"),
            }
            // A and B rows share one range per stage.
            assert_eq!(pair.a[s].range, pair.b[s].range);
        }
        // Training moved the late stages: CKA below 1 there.
        assert!(pair.cka[3].unwrap() < 0.999, "{:?}", pair.cka);
        // The read-out gives both values and the cosine of the token under the pointer.
        let lines = hover_lines(maps, 0, (20.0, 30.0));
        assert!(
            lines[1].contains("A value")
                && lines[1].contains("B value")
                && lines[1].contains("cosine"),
            "{lines:?}"
        );
    }

    // The weight drift: chart and table; sorting by a header.
    h.get_by_label("Weight drift").click();
    h.run_steps(3);
    wait(&mut h);
    assert!(h.query_by_label("weight drift chart").is_some());
    {
        let drift = h.state().bench.drift.as_ref().expect("drift computed");
        let d = drift.result.as_ref().expect("drift ok");
        // Every backbone tensor of the demo pair is compared: 145 used tensors, minus none.
        assert_eq!(d.rows.len(), 145, "{:?}", d.unmatched);
        assert!(d.unmatched.is_empty());
        // A group per block part and one merging mark per later stage.
        let blocks: usize = [2, 2, 4, 2].iter().sum();
        assert_eq!(drift.groups.len(), blocks * 6 + 3);
    }
    assert_eq!(h.state().panels.drift.sort, Column::Change);
    h.get_by_label("base norm").click();
    h.run_steps(2);
    assert_eq!(h.state().panels.drift.sort, Column::BaseNorm);

    // The difference as the map kind: the lens, regions and statistics use it.
    h.state_mut().bench.show_drift = false;
    h.run_steps(2);
    h.get_by_label("kind").click();
    h.run_steps(2);
    h.get_by_label("1 - cosine, A vs B").click();
    h.run_steps(2);
    wait(&mut h);
    assert_eq!(
        h.state().bench.pictures.maps.as_ref().unwrap().map_id,
        "difference"
    );
    h.state_mut()
        .bench
        .apply(Action::Region(RegionEdit::Add(Shape::Box {
            x0: 10.0,
            y0: 20.0,
            x1: 60.0,
            y1: 90.0,
        })));
    wait(&mut h);
    let rows = &h.state().bench.regions.stats;
    assert!(!rows.is_empty(), "{}", messages(&h));
    assert!(rows.iter().all(|r| r.map == "difference"));

    // Save: the figure of the map on screen and the comparison figure beside it.
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let single = dir.path().join("tray-03-97x160.difference.figure.png");
    let pair = dir.path().join("tray-03-97x160.compare.figure.png");
    assert!(single.is_file(), "{}", messages(&h));
    assert!(pair.is_file(), "{}", messages(&h));
    let (fs, fp) = (image::open(&single).unwrap(), image::open(&pair).unwrap());
    assert!(
        fp.height() > 2 * fs.height(),
        "A, B and the difference stacked"
    );
    assert!(dir
        .path()
        .join("tray-03-97x160.difference.regions.csv")
        .is_file());

    // Closing the base: one checkpoint again, the difference kind gone.
    h.get_by_label("Close base").click();
    h.run_steps(2);
    wait(&mut h);
    let b = &h.state().bench;
    assert!(!b.comparing());
    assert_eq!(b.settings.map_kind, "norm");
    let maps = b.pictures.maps.as_ref().unwrap();
    assert!(maps.pair.is_none() && maps.map_id == "norm");
    assert_eq!(
        h.query_all(By::new().label_contains("A vs B stage"))
            .count(),
        0
    );
}

#[test]
fn other_widths_keep_maps_and_cka_and_say_why() {
    let dir = tempfile::tempdir().unwrap();
    let img = demo_image(dir.path());
    let mut h = harness();
    // The demo checkpoint is 32 channels wide at stage 0; the timm fixture 16.
    type_path(&mut h, &sample("demo.safetensors"), "Open path");
    type_path(
        &mut h,
        &fixtures().join("timm_odd/weights.safetensors"),
        "Open path as base (A)",
    );
    type_path(&mut h, &img, "Open path");
    h.run_steps(2);
    let b = &h.state().bench;
    let pair = b.pictures.maps.as_ref().unwrap().pair.as_ref().unwrap();
    assert!(pair.cka.iter().all(Option::is_some));
    assert!(pair
        .difference
        .iter()
        .all(|d| matches!(d, DifferenceStage::Absent(_))));
    assert!(
        h.query_all(By::new().label_contains("stage 0 has 16 channels in A and 32 in B"))
            .count()
            >= 1
    );
    // The drift lists every tensor as of another shape.
    let drift = b.drift.as_ref().unwrap().result.as_ref().unwrap();
    assert!(drift
        .unmatched
        .iter()
        .any(|l| l.starts_with("shapes differ: layers.0.blocks.0.attn.qkv.weight")));
}

#[test]
fn a_base_of_another_shape_or_file_kind_is_refused_with_a_reason() {
    let dir = tempfile::tempdir().unwrap();
    let img = demo_image(dir.path());
    let mut h = harness();
    type_path(&mut h, &sample("demo.safetensors"), "Open path");
    // Not a checkpoint: a message, no base.
    type_path(&mut h, &img, "Open path as base (A)");
    assert!(h.state().bench.base.is_none());
    assert!(
        messages(&h).contains("not a checkpoint"),
        "{}",
        messages(&h)
    );
    // A broken checkpoint file: named, no base.
    let broken = dir.path().join("broken.safetensors");
    std::fs::write(&broken, b"not a safetensors file").unwrap();
    type_path(&mut h, &broken, "Open path as base (A)");
    assert!(h.state().bench.base.is_none());
    assert!(
        messages(&h).contains("broken.safetensors"),
        "{}",
        messages(&h)
    );
    // The difference kind is refused without a base.
    let mut s = h.state().bench.settings.clone();
    s.map_kind = "difference".into();
    h.state_mut().bench.apply(Action::SetSettings(Box::new(s)));
    assert_eq!(h.state().bench.settings.map_kind, "norm");
    type_path(&mut h, &img, "Open path");
    assert!(h
        .state()
        .bench
        .pictures
        .maps
        .as_ref()
        .unwrap()
        .pair
        .is_none());
}

#[test]
fn dropping_a_checkpoint_on_the_base_slot_makes_it_the_base() {
    use mullion::app::panels::sources::route_drop;
    let ck = sample("demo-early.safetensors");
    let im = sample("tray-03-97x160.png");
    assert_eq!(
        route_drop(vec![ck.clone(), im.clone()], true),
        vec![
            Action::OpenBase(ck.clone()),
            Action::OpenPaths(vec![im.clone()])
        ]
    );
    assert_eq!(
        route_drop(vec![ck.clone()], false),
        vec![Action::OpenPaths(vec![ck])]
    );
    assert!(route_drop(Vec::new(), true).is_empty());
}
