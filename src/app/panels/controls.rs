//! The controls on the left: how the image becomes the network input, which map and how it is
//! coloured, which windows are drawn, and the lens. Widgets edit a copy of the settings; a
//! changed copy goes back as one action, and the state decides whether that needs a new
//! forward pass, new maps or only new pictures.

use crate::app::actions::Action;
use crate::app::settings::Settings;
use crate::app::state::Workbench;
use crate::engine::geometry::{PadOrder, SmallStage};
use crate::engine::input::{InputPolicy, Normalisation};

/// The difference map kind as the menu names it.
pub const DIFFERENCE_LABEL: &str = "1 - cosine, A vs B";

#[derive(Default)]
pub struct Controls;

impl Controls {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let mut next = bench.settings.clone();
        egui::Panel::left("controls")
            .resizable(true)
            .default_size(250.0)
            .show(ui, |ui| {
                egui::ScrollArea::vertical().show(ui, |ui| controls(bench, &mut next, ui));
            });
        if next != bench.settings {
            vec![Action::SetSettings(Box::new(next))]
        } else {
            Vec::new()
        }
    }
}

fn controls(bench: &Workbench, s: &mut Settings, ui: &mut egui::Ui) {
    let n_stages = bench.n_stages();
    ui.heading("Input");
    let mut kind = match s.policy {
        InputPolicy::Native => 0,
        InputPolicy::FitLongSide(_) => 1,
        InputPolicy::Square(_) => 2,
    };
    let mut size = match s.policy {
        InputPolicy::Native => 224,
        InputPolicy::FitLongSide(n) | InputPolicy::Square(n) => n,
    };
    ui.radio_value(&mut kind, 0, "Native size");
    ui.radio_value(&mut kind, 1, "Fit long side");
    ui.radio_value(&mut kind, 2, "Fixed square");
    if kind != 0 {
        ui.horizontal(|ui| {
            labelled_drag(
                ui,
                "size",
                egui::DragValue::new(&mut size)
                    .range(16..=4096)
                    .suffix(" px"),
            );
        });
    }
    s.policy = match kind {
        0 => InputPolicy::Native,
        1 => InputPolicy::FitLongSide(size),
        _ => InputPolicy::Square(size),
    };
    ui.label("Normalisation mean / std");
    ui.horizontal(|ui| {
        if ui.small_button("ImageNet").clicked() {
            s.norm = Normalisation::IMAGENET;
        }
        if ui.small_button("0.5 / 0.5").clicked() {
            s.norm = Normalisation::HALF;
        }
    });
    for c in 0..3 {
        ui.horizontal(|ui| {
            let name = ["R", "G", "B"][c];
            let mean = egui::DragValue::new(&mut s.norm.mean[c])
                .speed(0.005)
                .range(-10.0..=10.0)
                .max_decimals(3);
            labelled_drag(ui, &format!("{name} mean"), mean);
            let std = egui::DragValue::new(&mut s.norm.std[c])
                .speed(0.005)
                .range(0.001..=10.0)
                .max_decimals(3);
            labelled_drag(ui, "std", std);
        });
    }
    if let Some(shown) = &bench.shown {
        let g = &shown.outputs.geometry;
        ui.label(format!("network input {}x{} px", g.image.1, g.image.0));
        ui.label(format!(
            "patch padding +{} right, +{} bottom",
            g.input_pad().1,
            g.input_pad().0
        ));
        for st in &g.stages {
            let (pr, pc) = st.padded();
            ui.small(format!(
                "stage {}: {}x{} tokens, padded to {}x{}",
                st.index, st.grid.1, st.grid.0, pc, pr
            ));
        }
        if let Some(advice) = bench
            .pictures
            .maps
            .as_ref()
            .and_then(|m| m.size_advice.as_ref())
        {
            egui::CollapsingHeader::new("Sizes without padding")
                .default_open(false)
                .show(ui, |ui| {
                    for line in advice.lines() {
                        ui.small(line);
                    }
                });
        }
    }

    padding_rules(bench, s, ui);

    ui.separator();
    ui.heading("Map");
    egui::ComboBox::from_label("kind")
        .selected_text(match s.map_kind.as_str() {
            "channel" => "one channel",
            "pca" => "PCA to RGB",
            "difference" => DIFFERENCE_LABEL,
            "padding" => "padding sensitivity",
            "pad-order" => "pad-order disagreement",
            "pad-attention" => "attention on padding",
            _ => "token L2 norm",
        })
        .show_ui(ui, |ui| {
            ui.selectable_value(&mut s.map_kind, "norm".to_string(), "token L2 norm");
            ui.selectable_value(&mut s.map_kind, "channel".to_string(), "one channel");
            ui.selectable_value(&mut s.map_kind, "pca".to_string(), "PCA to RGB");
            if bench.base.is_some() {
                ui.selectable_value(&mut s.map_kind, "difference".to_string(), DIFFERENCE_LABEL);
            }
            ui.separator();
            ui.selectable_value(
                &mut s.map_kind,
                "padding".to_string(),
                "padding sensitivity",
            );
            ui.selectable_value(
                &mut s.map_kind,
                "pad-order".to_string(),
                "pad-order disagreement",
            );
            ui.selectable_value(
                &mut s.map_kind,
                "pad-attention".to_string(),
                "attention on padding",
            );
        });
    padding_kind_options(bench, s, ui);
    if bench.base.is_some() {
        ui.small(if s.map_kind == "difference" {
            "the lens, regions and Save figure use the difference; the A and B rows show token norms"
        } else {
            "the strip shows A, B and 1 - cosine per stage; the lens and regions use B"
        });
    }
    if s.map_kind == "channel" {
        ui.horizontal(|ui| {
            labelled_drag(
                ui,
                "channel",
                egui::DragValue::new(&mut s.channel).range(0..=4095),
            );
        });
        if let Some(maps) = bench.pictures.maps.as_deref() {
            let stage = s.focus_stage.min(maps.ranking.len().saturating_sub(1));
            if let Some(ranked) = maps.ranking.get(stage) {
                ui.small(format!("strongest in stage {stage} (by mean):"));
                ui.horizontal_wrapped(|ui| {
                    for (ch, mean) in ranked {
                        if ui.small_button(format!("{ch} ({mean:.2})")).clicked() {
                            s.channel = *ch;
                        }
                    }
                });
            }
            if let Some(w) = maps.outputs.stages.get(stage).and_then(|t| t.dim(2).ok()) {
                ui.small(format!(
                    "stage {stage} has channels 0 to {}",
                    w.saturating_sub(1)
                ));
            }
        }
    }
    egui::ComboBox::from_label("colours")
        .selected_text(s.colormap.clone())
        .show_ui(ui, |ui| {
            for c in ["viridis", "magma", "cividis"] {
                ui.selectable_value(&mut s.colormap, c.to_string(), c);
            }
        });
    ui.checkbox(&mut s.shared_scale, "One scale for all stages");
    ui.checkbox(&mut s.log_scale, "Log scale");
    ui.horizontal(|ui| {
        labelled_drag(
            ui,
            "clip low %",
            egui::DragValue::new(&mut s.clip_low)
                .range(0.0..=49.0)
                .speed(0.1),
        );
        labelled_drag(
            ui,
            "high %",
            egui::DragValue::new(&mut s.clip_high)
                .range(51.0..=100.0)
                .speed(0.1),
        );
    });

    ui.separator();
    ui.heading("Windows");
    ui.checkbox(&mut s.show_regular, "Regular window grid");
    ui.checkbox(&mut s.show_shifted, "Shifted window grid");
    ui.checkbox(&mut s.show_padding, "Hatch padding");
    let max_pair = bench.weights.as_ref().map_or(0, |w| {
        w.model
            .config
            .depths
            .iter()
            .max()
            .copied()
            .unwrap_or(2)
            .saturating_sub(1)
            / 2
    });
    ui.horizontal(|ui| {
        labelled_drag(
            ui,
            "block pair",
            egui::DragValue::new(&mut s.block_pair).range(0..=max_pair),
        );
    });
    ui.small("pair k draws block 2k (regular) and 2k+1 (shifted)");
    // Say which blocks each stage really draws: stages with fewer blocks fall back.
    if let Some(shown) = &bench.shown {
        let overlays = s.overlays();
        for st in &shown.outputs.geometry.stages {
            let (regular, shifted) = overlays.blocks(st);
            let first = (overlays.block.min(st.blocks.len().saturating_sub(1)) / 2) * 2;
            let text = match (regular, shifted) {
                (Some(_), Some(_)) => {
                    format!("stage {}: blocks {first} and {}", st.index, first + 1)
                }
                (Some(_), None) => format!(
                    "stage {}: block {first} only (no shifted block: windows clamped or one block)",
                    st.index
                ),
                _ => format!("stage {}: no block", st.index),
            };
            let fell_back = first != overlays.block;
            ui.small(if fell_back {
                format!("{text} (has {} blocks)", st.blocks.len())
            } else {
                text
            });
        }
    }

    ui.separator();
    ui.heading("Lens");
    ui.horizontal(|ui| {
        let last = n_stages.saturating_sub(1);
        labelled_drag(
            ui,
            "lens stage",
            egui::DragValue::new(&mut s.focus_stage).range(0..=last),
        );
    });
    ui.add(egui::Slider::new(&mut s.opacity, 0.0..=1.0).text("map opacity"));

    ui.separator();
    inspector(bench, s, ui);
}

/// The attention inspector: on or off, which block and head, and what it shows.
fn inspector(bench: &Workbench, s: &mut Settings, ui: &mut egui::Ui) {
    ui.heading("Attention");
    ui.checkbox(&mut s.inspecting, "Inspect attention (click a token)");
    if !s.inspecting && bench.inspect.is_none() {
        return;
    }
    let stage = bench.inspect.map(|q| q.stage);
    let depth = stage
        .and_then(|st| bench.weights.as_ref()?.model.config.depths.get(st).copied())
        .unwrap_or(1);
    let heads = stage
        .and_then(|st| bench.weights.as_ref()?.model.config.heads.get(st).copied())
        .unwrap_or(1);
    ui.horizontal(|ui| {
        labelled_drag(
            ui,
            "inspect block",
            egui::DragValue::new(&mut s.inspect_block).range(0..=depth.saturating_sub(1)),
        );
    });
    let l = ui.label("head");
    egui::ComboBox::from_id_salt("inspect head")
        .selected_text(
            s.inspect_head
                .map_or("mean over heads".into(), |h| format!("head {h}")),
        )
        .show_ui(ui, |ui| {
            ui.selectable_value(&mut s.inspect_head, None, "mean over heads");
            for h in 0..heads {
                ui.selectable_value(&mut s.inspect_head, Some(h), format!("head {h}"));
            }
        })
        .response
        .labelled_by(l.id);
    if let Some(h) = s.inspect_head.filter(|&h| h >= heads) {
        ui.small(format!(
            "head {h} is not in this stage (heads 0 to {})",
            heads - 1
        ));
        s.inspect_head = None;
    }
    match (&bench.inspected, &bench.inspect_problem, bench.inspect) {
        (Some(ins), _, _) => {
            for line in crate::app::inspector::describe(
                &ins.attention,
                ins.query.stage,
                ins.block,
                ins.shifted,
            ) {
                ui.small(line);
            }
            ui.small(
                "bright: where the query looks; veiled: little or no attention; crossed: \
                 removed by the shift mask; hatched: padding",
            );
        }
        (None, Some(p), _) => {
            ui.colored_label(egui::Color32::from_rgb(230, 90, 70), p);
        }
        (None, None, Some(_)) => {
            ui.small("computing the block's attention…");
        }
        (None, None, None) => {
            ui.small("click a token in a stage picture or the lens");
        }
    }
}

/// The settings of the padding studies' map kinds, and what each one shows.
fn padding_kind_options(bench: &Workbench, s: &mut Settings, ui: &mut egui::Ui) {
    match s.map_kind.as_str() {
        "padding" => {
            ui.horizontal(|ui| {
                labelled_drag(
                    ui,
                    "extra padding",
                    egui::DragValue::new(&mut s.pad_px)
                        .range(1..=crate::analysis::padding::MAX_PAD_PX)
                        .suffix(" px"),
                );
            });
            ui.small(format!(
                "1 - cosine of each token with the same token when {} zero rows and columns are \
                 added at the bottom and right: which tokens move when only the padding grows",
                s.pad_px
            ));
        }
        "pad-order" => {
            ui.small(
                "||f1 - f2|| / ||f1|| per token: pad-then-shift (f1) against shift-then-pad \
                 (f2), the small-stage rule kept: where two libraries' features part",
            );
        }
        "pad-attention" => {
            let min_depth = bench
                .weights
                .as_ref()
                .and_then(|w| w.model.config.depths.iter().min().copied())
                .unwrap_or(1);
            ui.horizontal(|ui| {
                labelled_drag(
                    ui,
                    "block (every stage)",
                    egui::DragValue::new(&mut s.pad_block).range(0..=min_depth.saturating_sub(1)),
                );
            });
            ui.small(
                "the share of each token's attention (mean over heads) that falls on padding keys",
            );
        }
        _ => return,
    }
    ui.small(crate::analysis::padding::PADDING_CAUTION);
}

/// A number field with a visible name that assistive tools (and the tests) find it by.
fn labelled_drag(ui: &mut egui::Ui, name: &str, value: egui::DragValue<'_>) -> egui::Response {
    let label = ui.label(name);
    ui.add(value).labelled_by(label.id)
}

/// The padding order and the small-stage rule, the checkpoint layout's default marked.
fn padding_rules(bench: &Workbench, s: &mut Settings, ui: &mut egui::Ui) {
    let Some(w) = &bench.weights else { return };
    let layout = w.model.default_semantics;
    let current = s.semantics(layout);
    ui.label("Padding rules");
    rule_combo(
        ui,
        "pad order",
        &mut s.pad_order,
        (current.pad_order, layout.pad_order),
        &[PadOrder::PadThenShift, PadOrder::ShiftThenPad],
        PadOrder::name,
    );
    rule_combo(
        ui,
        "small stages",
        &mut s.small_stage,
        (current.small_stage, layout.small_stage),
        &[
            SmallStage::Clamp,
            SmallStage::PadUp,
            SmallStage::ClampPerAxis,
            SmallStage::AsBuilt,
        ],
        SmallStage::name,
    );
}

/// A choice among `options` stored as `None` for the layout's default, labelled `name` for
/// assistive tools; `(current, default)` are the rule in use and the layout's own.
fn rule_combo<T: Copy + PartialEq>(
    ui: &mut egui::Ui,
    name: &str,
    value: &mut Option<T>,
    (current, default): (T, T),
    options: &[T],
    text: fn(T) -> &'static str,
) {
    let mark = |v: T| {
        if v == default {
            format!("{} (layout default)", text(v))
        } else {
            text(v).to_string()
        }
    };
    let l = ui.label(name);
    egui::ComboBox::from_id_salt(name)
        .width(ui.available_width().min(220.0))
        .selected_text(mark(current))
        .show_ui(ui, |ui| {
            for &v in options {
                ui.selectable_value(value, (v != default).then_some(v), mark(v));
            }
        })
        .response
        .labelled_by(l.id);
}
