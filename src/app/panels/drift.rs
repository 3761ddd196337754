//! The weight drift window: how far fine-tuning moved each weight group of every block,
//! `||B - A||_F / ||A||_F`, drawn along the blocks with the stage boundaries marked, the patch
//! merging that starts a stage as its own mark, a table of every tensor that sorts by any
//! column, and the tensors that could not be compared.

use crate::analysis::compare::{Drift, DriftGroup, DriftRow, GroupDrift};
use crate::app::actions::Action;
use crate::app::state::{DriftView, Workbench};
use egui::{Color32, Pos2, Rect, Sense, Stroke, Vec2};

/// The colour of each group: the Okabe and Ito (2008) colour-blind-safe set, merging in
/// white (it is drawn as a diamond, not a line).
pub fn group_colour(g: DriftGroup) -> Color32 {
    match g {
        DriftGroup::Qkv => Color32::from_rgb(230, 159, 0),
        DriftGroup::Proj => Color32::from_rgb(86, 180, 233),
        DriftGroup::Fc1 => Color32::from_rgb(0, 158, 115),
        DriftGroup::Fc2 => Color32::from_rgb(240, 228, 66),
        DriftGroup::Norms => Color32::from_rgb(204, 121, 167),
        DriftGroup::BiasTable => Color32::from_rgb(213, 94, 0),
        DriftGroup::Merging => Color32::WHITE,
    }
}

/// The table's columns.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Column {
    Tensor,
    Stage,
    Block,
    Change,
    BaseNorm,
}

impl Column {
    pub const ALL: [Column; 5] = [
        Column::Tensor,
        Column::Stage,
        Column::Block,
        Column::Change,
        Column::BaseNorm,
    ];
    pub fn name(self) -> &'static str {
        match self {
            Column::Tensor => "tensor",
            Column::Stage => "stage",
            Column::Block => "block",
            Column::Change => "relative change",
            Column::BaseNorm => "base norm",
        }
    }
}

pub struct DriftPanel {
    pub sort: Column,
    pub descending: bool,
    /// A logarithmic vertical axis: bias tables and biases often move tens of times more than
    /// the large matrices, which would otherwise sit flat on the floor.
    pub log_y: bool,
}

impl Default for DriftPanel {
    fn default() -> Self {
        DriftPanel {
            sort: Column::Change,
            descending: true,
            log_y: true,
        }
    }
}

/// The rows in the order `sort` asks; rows without a value sort last either way.
pub fn sorted_rows(rows: &[DriftRow], sort: Column, descending: bool) -> Vec<&DriftRow> {
    let mut out: Vec<&DriftRow> = rows.iter().collect();
    let key = |r: &DriftRow| -> Option<f64> {
        match sort {
            Column::Tensor => None,
            Column::Stage => r.stage.map(|v| v as f64),
            Column::Block => r.block.map(|v| v as f64),
            Column::Change => r.relative_change,
            Column::BaseNorm => Some(r.base_norm),
        }
    };
    out.sort_by(|a, b| {
        if sort == Column::Tensor {
            let o = a.tensor.cmp(&b.tensor);
            return if descending { o.reverse() } else { o };
        }
        match (key(a), key(b)) {
            (Some(x), Some(y)) => {
                let o = x.total_cmp(&y);
                if descending {
                    o.reverse()
                } else {
                    o
                }
            }
            (Some(_), None) => std::cmp::Ordering::Less,
            (None, Some(_)) => std::cmp::Ordering::Greater,
            (None, None) => a.tensor.cmp(&b.tensor),
        }
    });
    out
}

/// (stage, block) pairs, or (stage, position along the chart).
type Places = Vec<(usize, usize)>;

/// Blocks in model order: (stage, block) -> position along the chart, and where each stage
/// starts.
fn positions(groups: &[GroupDrift]) -> (Places, Places) {
    let mut blocks: Vec<(usize, usize)> = groups
        .iter()
        .filter_map(|g| g.block.map(|b| (g.stage, b)))
        .collect();
    blocks.sort_unstable();
    blocks.dedup();
    let mut starts = Vec::new();
    for (i, &(s, _)) in blocks.iter().enumerate() {
        if starts.last().is_none_or(|&(last, _)| last != s) {
            starts.push((s, i));
        }
    }
    (blocks, starts)
}

impl DriftPanel {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let mut open = true;
        egui::Window::new("Weight drift, A to B")
            .open(&mut open)
            .default_size([760.0, 560.0])
            // Below the top bar, never over its buttons.
            .default_pos([280.0, 200.0])
            .vscroll(true)
            .show(ui.ctx(), |ui| self.contents(ui, bench));
        if open {
            Vec::new()
        } else {
            vec![Action::ShowDrift(false)]
        }
    }

    fn contents(&mut self, ui: &mut egui::Ui, bench: &Workbench) {
        let Some(view) = &bench.drift else {
            if bench.loader.computing_drift.is_some() {
                ui.horizontal(|ui| {
                    ui.spinner();
                    ui.label("comparing every weight tensor of A and B…");
                });
            } else {
                ui.label("no drift: both checkpoints must be files (random weights have no file)");
            }
            return;
        };
        let DriftView {
            pair,
            result,
            groups,
        } = view;
        ui.small(format!(
            "A: {}   B: {}",
            crate::io::file_name(&pair.0),
            crate::io::file_name(&pair.1)
        ));
        let drift = match result {
            Ok(d) => d,
            Err(e) => {
                ui.colored_label(Color32::from_rgb(230, 90, 70), e);
                return;
            }
        };
        ui.small(
            "relative change ||B - A||_F / ||A||_F per weight group (the group's tensors taken \
             together); 0 is untouched. How far weights moved says nothing of whether the \
             model is right.",
        );
        ui.checkbox(&mut self.log_y, "log scale (chart)");
        chart(ui, groups, self.log_y);
        ui.separator();
        self.table(ui, drift);
        unmatched(ui, drift);
    }

    fn table(&mut self, ui: &mut egui::Ui, drift: &Drift) {
        ui.label(format!("{} tensors compared", drift.rows.len()));
        egui::ScrollArea::vertical()
            .id_salt("drift-table")
            .max_height(260.0)
            .show(ui, |ui| {
                egui::Grid::new("drift-rows")
                    .striped(true)
                    .spacing([12.0, 2.0])
                    .show(ui, |ui| {
                        for c in Column::ALL {
                            let arrow = match (self.sort == c, self.descending) {
                                (true, true) => " (high first)",
                                (true, false) => " (low first)",
                                _ => "",
                            };
                            let b = ui
                                .button(format!("{}{arrow}", c.name()))
                                .on_hover_text(format!("sort by {}", c.name()));
                            if b.clicked() {
                                if self.sort == c {
                                    self.descending = !self.descending;
                                } else {
                                    self.sort = c;
                                    self.descending = c != Column::Tensor;
                                }
                            }
                        }
                        ui.end_row();
                        let opt = |v: Option<usize>| v.map_or(String::new(), |v| v.to_string());
                        for r in sorted_rows(&drift.rows, self.sort, self.descending) {
                            ui.monospace(&r.tensor);
                            ui.label(opt(r.stage));
                            ui.label(opt(r.block));
                            ui.label(
                                r.relative_change
                                    .map_or("— (A is zero)".into(), |v| format!("{v:.5}")),
                            );
                            ui.label(format!("{:.4}", r.base_norm));
                            ui.end_row();
                        }
                    });
            });
    }
}

fn unmatched(ui: &mut egui::Ui, drift: &Drift) {
    let n = drift.unmatched.len() + drift.not_compared.len();
    egui::CollapsingHeader::new(format!("not compared ({n})"))
        .default_open(!drift.unmatched.is_empty())
        .show(ui, |ui| {
            if n == 0 {
                ui.small("every tensor of both files was compared");
            }
            for l in &drift.unmatched {
                ui.colored_label(Color32::from_rgb(230, 159, 0), l);
            }
            for l in &drift.not_compared {
                ui.small(l);
            }
        });
}

/// The chart: one line per weight group along the blocks, merging as diamonds where a stage
/// starts, stage boundaries as vertical rules, a key, and the value under the pointer.
/// The chart's vertical axis: where a value goes (0 at the floor, 1 at the top) and the ticks.
pub struct Axis {
    log: bool,
    lo: f64,
    hi: f64,
}

impl Axis {
    /// Linear from 0 to a little above the largest value, or logarithmic over whole decades
    /// from the smallest positive value to the largest.
    pub fn new(values: &[f64], log: bool) -> Axis {
        let max = values.iter().copied().fold(0.0f64, f64::max).max(1e-12);
        let min_pos = values
            .iter()
            .copied()
            .filter(|v| *v > 0.0)
            .fold(f64::INFINITY, f64::min);
        if log && min_pos.is_finite() {
            let lo = min_pos.log10().floor();
            let hi = max.log10().ceil().max(lo + 1.0);
            Axis { log, lo, hi }
        } else {
            Axis {
                log: false,
                lo: 0.0,
                hi: max * 1.08,
            }
        }
    }

    /// Position of `v` in [0, 1]; zero (and anything below the axis) sits on the floor.
    pub fn frac(&self, v: f64) -> f32 {
        let t = if self.log {
            if v <= 0.0 {
                0.0
            } else {
                (v.log10() - self.lo) / (self.hi - self.lo)
            }
        } else {
            (v - self.lo) / (self.hi - self.lo)
        };
        t.clamp(0.0, 1.0) as f32
    }

    /// Tick values: every decade on a log axis, five even steps on a linear one.
    pub fn ticks(&self) -> Vec<f64> {
        if self.log {
            (self.lo as i32..=self.hi as i32)
                .map(|e| 10f64.powi(e))
                .collect()
        } else {
            (0..=4).map(|k| self.hi * k as f64 / 4.0).collect()
        }
    }
}

fn chart(ui: &mut egui::Ui, groups: &[GroupDrift], log_y: bool) {
    let (blocks, starts) = positions(groups);
    ui.horizontal_wrapped(|ui| {
        for g in DriftGroup::ALL {
            let (r, p) = ui.allocate_painter(Vec2::new(18.0, 10.0), Sense::hover());
            let c = group_colour(g);
            if g == DriftGroup::Merging {
                diamond(&p, r.rect.center(), 4.0, c);
            } else {
                p.line_segment(
                    [r.rect.left_center(), r.rect.right_center()],
                    Stroke::new(2.5, c),
                );
            }
            ui.small(g.name());
        }
    });
    let width = ui.available_width().max(200.0);
    let (resp, painter) = ui.allocate_painter(Vec2::new(width, 240.0), Sense::hover());
    resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, "weight drift chart"));
    let rect = resp.rect;
    painter.rect_filled(rect, 2.0, Color32::from_gray(24));
    if blocks.is_empty() {
        painter.text(
            rect.center(),
            egui::Align2::CENTER_CENTER,
            "no block tensors in common",
            egui::FontId::proportional(13.0),
            Color32::WHITE,
        );
        return;
    }
    let plot = Rect::from_min_max(
        rect.min + Vec2::new(56.0, 10.0),
        rect.max - Vec2::new(10.0, 26.0),
    );
    let values: Vec<f64> = groups.iter().filter_map(|g| g.relative_change).collect();
    let y_axis = Axis::new(&values, log_y);
    let n = blocks.len();
    let x_at = |i: f32| plot.min.x + (i + 0.5) / n as f32 * plot.width();
    let y_at = |v: f64| plot.max.y - y_axis.frac(v) * plot.height();
    let axis = Color32::from_gray(150);
    let font = egui::FontId::proportional(11.0);
    for v in y_axis.ticks() {
        let y = y_at(v);
        painter.line_segment(
            [Pos2::new(plot.min.x, y), Pos2::new(plot.max.x, y)],
            Stroke::new(0.5, Color32::from_gray(60)),
        );
        painter.text(
            Pos2::new(plot.min.x - 4.0, y),
            egui::Align2::RIGHT_CENTER,
            if y_axis.log {
                format!("{v:e}")
            } else {
                format!("{v:.3}")
            },
            font.clone(),
            axis,
        );
    }
    for &(s, i) in &starts {
        let x = plot.min.x + i as f32 / n as f32 * plot.width();
        painter.line_segment(
            [Pos2::new(x, plot.min.y), Pos2::new(x, plot.max.y)],
            Stroke::new(1.0, axis),
        );
        painter.text(
            Pos2::new(x + 3.0, plot.max.y + 4.0),
            egui::Align2::LEFT_TOP,
            format!("stage {s}"),
            font.clone(),
            axis,
        );
    }
    let index_of = |stage: usize, block: usize| blocks.iter().position(|&b| b == (stage, block));
    let mut points: Vec<(Pos2, String)> = Vec::new();
    for g in DriftGroup::ALL {
        let c = group_colour(g);
        let mut line: Vec<Pos2> = Vec::new();
        for d in groups.iter().filter(|d| d.group == g) {
            let Some(v) = d.relative_change else { continue };
            let (x, label) = match d.block {
                Some(b) => {
                    let Some(i) = index_of(d.stage, b) else {
                        continue;
                    };
                    (
                        x_at(i as f32),
                        format!("stage {} block {b} {}", d.stage, g.name()),
                    )
                }
                None => {
                    let Some(&(_, i)) = starts.iter().find(|(s, _)| *s == d.stage) else {
                        continue;
                    };
                    (
                        plot.min.x + i as f32 / n as f32 * plot.width(),
                        format!("stage {} patch merging", d.stage),
                    )
                }
            };
            let p = Pos2::new(x, y_at(v));
            points.push((p, format!("{label}: {v:.5}")));
            if g == DriftGroup::Merging {
                diamond(&painter, p, 5.0, c);
            } else {
                line.push(p);
                painter.circle_filled(p, 2.5, c);
            }
        }
        if line.len() > 1 {
            painter.add(egui::Shape::line(line, Stroke::new(1.8, c)));
        }
    }
    if let Some(h) = resp.hover_pos() {
        if let Some((p, text)) = points
            .iter()
            .min_by(|a, b| a.0.distance(h).total_cmp(&b.0.distance(h)))
        {
            if p.distance(h) < 24.0 {
                painter.circle_stroke(*p, 6.0, Stroke::new(1.5, Color32::WHITE));
                painter.text(
                    rect.left_top() + Vec2::new(60.0, 12.0),
                    egui::Align2::LEFT_TOP,
                    text,
                    egui::FontId::proportional(12.0),
                    Color32::WHITE,
                );
            }
        }
    }
}

fn diamond(p: &egui::Painter, c: Pos2, r: f32, colour: Color32) {
    p.add(egui::Shape::convex_polygon(
        vec![
            c + Vec2::new(0.0, -r),
            c + Vec2::new(r, 0.0),
            c + Vec2::new(0.0, r),
            c + Vec2::new(-r, 0.0),
        ],
        colour,
        Stroke::NONE,
    ));
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(t: &str, rc: Option<f64>, n: f64) -> DriftRow {
        DriftRow {
            tensor: t.into(),
            stage: Some(0),
            block: Some(0),
            relative_change: rc,
            base_norm: n,
        }
    }

    #[test]
    fn log_axis_spans_whole_decades_and_puts_zero_on_the_floor() {
        let a = Axis::new(&[0.0, 0.02, 3.4], true);
        assert_eq!(a.ticks(), vec![0.01, 0.1, 1.0, 10.0]);
        assert_eq!(a.frac(0.0), 0.0);
        assert!((a.frac(0.1) - 1.0 / 3.0).abs() < 1e-6);
        let l = Axis::new(&[0.0, 2.0], false);
        assert!((l.frac(1.08) - 0.5).abs() < 1e-6);
        // Nothing positive: a log axis falls back to linear.
        assert!(!Axis::new(&[0.0], true).log);
    }

    #[test]
    fn sorting_puts_missing_values_last_both_ways() {
        let rows = [
            row("b", Some(0.2), 1.0),
            row("a", None, 3.0),
            row("c", Some(0.5), 2.0),
        ];
        let names = |v: Vec<&DriftRow>| v.iter().map(|r| r.tensor.clone()).collect::<Vec<_>>();
        assert_eq!(
            names(sorted_rows(&rows, Column::Change, true)),
            ["c", "b", "a"]
        );
        assert_eq!(
            names(sorted_rows(&rows, Column::Change, false)),
            ["b", "c", "a"]
        );
        assert_eq!(
            names(sorted_rows(&rows, Column::Tensor, false)),
            ["a", "b", "c"]
        );
        assert_eq!(
            names(sorted_rows(&rows, Column::BaseNorm, true)),
            ["a", "c", "b"]
        );
    }
}
