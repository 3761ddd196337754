//! The attention inspector in the window, driven through its accessibility labels: turn it
//! on, click a token in a stage picture, see which window it sits in and where its attention
//! goes, switch the block (regular to shifted) and the head, and save the figure with the
//! spotlight. The weights shown are checked against the block's attention as the model kept
//! it (`ForwardOptions::attention_of`; the model's attention itself is checked against the
//! reference libraries in the padding suite).

use crate::common::sample;
use crate::kit::{harness, type_path, wait};
use egui_kittest::kittest::{By, Queryable};
use egui_kittest::Harness;
use mullion::app::Window;
use mullion::engine::{ForwardOptions, RunControl};

fn click_at(h: &mut Harness<'_, Window>, p: egui::Pos2) {
    h.hover_at(p);
    h.step();
    for pressed in [true, false] {
        h.event(egui::Event::PointerButton {
            pos: p,
            button: egui::PointerButton::Primary,
            pressed,
            modifiers: egui::Modifiers::default(),
        });
    }
    h.run_steps(2);
}

#[test]
fn pick_a_token_see_its_window_switch_block_and_head_and_save() {
    let dir = tempfile::tempdir().unwrap();
    let img = dir.path().join("tray-01-333x250.png");
    std::fs::copy(sample("tray-01-333x250.png"), &img).unwrap();
    let mut h = harness();
    for p in [sample("demo.safetensors"), img.clone()] {
        type_path(&mut h, &p, "Open path");
    }
    h.get_by_label("Inspect attention (click a token)")
        .scroll_to_me();
    h.run_steps(30);
    h.get_by_label("Inspect attention (click a token)").click();
    h.run_steps(2);
    assert!(h.state().bench.settings.inspecting);
    // Click inside the stage 1 picture, a little below its title.
    // (The strip's title; the controls list stage sizes with other words.)
    let title = h
        .query_all(By::new().label("stage 1"))
        .map(|n| n.rect())
        .min_by(|a, b| a.min.y.total_cmp(&b.min.y))
        .expect("the strip titles stage 1");
    click_at(&mut h, egui::pos2(title.center().x, title.max.y + 25.0));
    wait(&mut h);
    let (q, stage_grid) = {
        let b = &h.state().bench;
        let q = b.inspect.expect("a query token was picked");
        let grid = b.shown.as_ref().unwrap().outputs.geometry.stages[1].grid;
        (q, grid)
    };
    assert_eq!(q.stage, 1);
    assert!(q.row < stage_grid.0 && q.col < stage_grid.1);
    assert!(
        h.query_all(By::new().label_contains("query: stage 1, token"))
            .count()
            >= 1,
        "the inspector names the query"
    );

    // The weights are the block's attention row of this token, mean over heads.
    let check = |h: &Harness<'_, Window>, block: usize, head: Option<usize>| {
        let b = &h.state().bench;
        let ins = b.inspected.as_ref().expect("the inspector shows the query");
        assert_eq!((ins.block, ins.attention.head), (block, head));
        let w = b.weights.as_ref().unwrap();
        let shown = b.shown.as_ref().unwrap();
        let x = mullion::engine::input::normalise(&shown.input, &b.settings.norm).unwrap();
        let out = w
            .model
            .forward(
                &x,
                &ForwardOptions {
                    semantics: Some(shown.outputs.geometry.semantics),
                    attention_of: Some((1, block)),
                    ..ForwardOptions::default()
                },
                &RunControl::default(),
            )
            .unwrap();
        let probs = &out.attention.as_ref().unwrap().weights;
        let bg = &out.geometry.stages[1].blocks[block];
        let (win, pos) = bg.window_of(q.row, q.col);
        let row = probs
            .get(win)
            .unwrap()
            .narrow(1, pos, 1)
            .unwrap()
            .squeeze(1)
            .unwrap();
        let want: Vec<f32> = match head {
            Some(hd) => row.get(hd).unwrap().to_vec1().unwrap(),
            None => row.mean(0).unwrap().to_vec1().unwrap(),
        };
        let got: Vec<f32> = ins.attention.keys.iter().map(|k| k.weight).collect();
        assert_eq!(got, want);
        let sum: f32 = got.iter().sum();
        assert!((sum - 1.0).abs() < 1e-4, "a softmax row sums to 1: {sum}");
        ins.shifted
    };
    assert!(!check(&h, 0, None), "block 0 has regular windows");

    // Head 1 through its menu, then block 1 (shifted windows).
    h.get_by_label("head").scroll_to_me();
    h.run_steps(30);
    h.get_by_label("head").click();
    h.run_steps(2);
    h.get_by_label("head 1").click();
    h.run_steps(2);
    assert_eq!(h.state().bench.settings.inspect_head, Some(1));
    let mut s = h.state().bench.settings.clone();
    s.inspect_block = 1;
    h.state_mut()
        .bench
        .apply(mullion::app::actions::Action::SetSettings(Box::new(s)));
    wait(&mut h);
    assert!(check(&h, 1, Some(1)), "block 1 has shifted windows");

    // The saved figure carries the spotlight: it is taller than without it.
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let png = dir.path().join("tray-01-333x250.norm.figure.png");
    let with = image::open(&png).unwrap();
    h.get_by_label("Inspect attention (click a token)")
        .scroll_to_me();
    h.run_steps(30);
    h.get_by_label("Inspect attention (click a token)").click();
    h.run_steps(2);
    assert!(
        h.state().bench.inspect.is_none(),
        "turning it off clears the query"
    );
    h.get_by_label("Save figure").click();
    h.run_steps(2);
    wait(&mut h);
    let without = image::open(&png).unwrap();
    assert!(with.height() > without.height() + 100);
}
