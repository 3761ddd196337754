//! The statistics table: how strongly each stage responds inside every region of the current
//! image, sortable by any column; clicking a row selects the region and puts its stage in the
//! lens. Definitions of the numbers are in `analysis::region_stats` and the README.

use crate::analysis::{RegionStats, INSIDE_WEIGHT};
use crate::app::actions::Action;
use crate::app::state::Workbench;

/// Columns of the statistics table.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Column {
    Region,
    Stage,
    Inside,
    Outside,
    Ratio,
    Auroc,
    Tokens,
    Coverage,
}

pub struct RegionTable {
    pub sort: (Column, bool),
    /// Rows with fewer tokens than this on either side of the AUROC are marked "few".
    pub min_tokens: usize,
}

/// The default of [`RegionTable::min_tokens`] (common practice: a rank statistic over a handful
/// of tokens is mostly noise).
pub const MIN_TOKENS: usize = 5;

impl Default for RegionTable {
    fn default() -> Self {
        RegionTable {
            sort: (Column::Region, false),
            min_tokens: MIN_TOKENS,
        }
    }
}

/// Whether a row's AUROC rests on too few tokens on one side.
pub fn too_few(s: &RegionStats, min: usize) -> bool {
    s.tokens < min || s.outside_tokens < min
}

fn fmt(v: Option<f64>) -> String {
    v.map_or("–".into(), |v| format!("{v:.3}"))
}

fn sort_key(s: &RegionStats, c: Column) -> f64 {
    let f = |v: Option<f64>| v.unwrap_or(f64::NEG_INFINITY);
    match c {
        Column::Region => s.region as f64,
        Column::Stage => s.stage as f64,
        Column::Inside => f(s.inside_mean),
        Column::Outside => f(s.outside_mean),
        Column::Ratio => f(s.ratio),
        Column::Auroc => f(s.auroc),
        Column::Tokens => s.tokens as f64,
        Column::Coverage => s.coverage,
    }
}

impl RegionTable {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let mut out = Vec::new();
        if bench.regions.sidecar.is_none() {
            return out;
        }
        ui.separator();
        ui.strong("Response inside regions");
        let map = bench.settings.map_id();
        if bench.regions.stats.is_empty() {
            ui.small(if map == "pca" {
                "statistics need a scalar map (norm or one channel)"
            } else {
                "no regions yet"
            });
            return out;
        }
        ui.small(format!(
            "map {map}; inside = token weight >= {INSIDE_WEIGHT} for AUROC and tokens"
        ));
        ui.horizontal(|ui| {
            let l = ui.label("min tokens");
            ui.add(egui::DragValue::new(&mut self.min_tokens).range(1..=1000))
                .labelled_by(l.id);
            if ui.small_button("Save table as CSV").clicked() {
                out.push(Action::SaveTable);
            }
        });
        ui.small("fewer tokens inside or outside: AUROC marked few, sorted last");
        let min = self.min_tokens;
        // Sorted by reference: the rows themselves are not copied every frame.
        let mut rows: Vec<&RegionStats> = bench.regions.stats.iter().collect();
        let (col, desc) = self.sort;
        rows.sort_by(|a, b| {
            let o = sort_key(a, col).total_cmp(&sort_key(b, col));
            let o = if desc { o.reverse() } else { o };
            // An AUROC over a handful of tokens never tops the table.
            let few = if col == Column::Auroc {
                too_few(a, min).cmp(&too_few(b, min))
            } else {
                std::cmp::Ordering::Equal
            };
            few.then(o).then(a.stage.cmp(&b.stage))
        });
        let mut clicked = None;
        // The table scrolls sideways inside the panel rather than widen it.
        egui::ScrollArea::horizontal().show(ui, |ui| {
            egui::Grid::new("region-stats")
                .striped(true)
                .show(ui, |ui| {
                    for (c, name) in [
                        (Column::Region, "region"),
                        (Column::Stage, "stage"),
                        (Column::Inside, "inside"),
                        (Column::Outside, "outside"),
                        (Column::Ratio, "ratio"),
                        (Column::Auroc, "AUROC"),
                        (Column::Tokens, "in/out"),
                        (Column::Coverage, "cover"),
                    ] {
                        let arrow = if self.sort.0 == c {
                            if desc {
                                " (desc)"
                            } else {
                                " (asc)"
                            }
                        } else {
                            ""
                        };
                        if ui.small_button(format!("{name}{arrow}")).clicked() {
                            self.sort = (c, if self.sort.0 == c { !desc } else { false });
                        }
                    }
                    ui.end_row();
                    for &s in &rows {
                        let sel = bench.regions.selected == Some(s.region);
                        if ui
                            .selectable_label(sel, format!("{} #{}", s.label, s.region))
                            .clicked()
                        {
                            clicked = Some((s.region, s.stage));
                        }
                        ui.label(s.stage.to_string());
                        ui.label(fmt(s.inside_mean));
                        ui.label(fmt(s.outside_mean));
                        ui.label(fmt(s.ratio));
                        if too_few(s, min) {
                            ui.weak(format!("{} few", fmt(s.auroc)));
                        } else {
                            ui.label(fmt(s.auroc));
                        }
                        ui.label(format!("{}/{}", s.tokens, s.outside_tokens));
                        ui.label(format!("{:.1}%", 100.0 * s.coverage));
                        ui.end_row();
                    }
                })
        });
        if let Some((id, stage)) = clicked {
            out.push(Action::SelectRegion(Some(id)));
            out.push(Action::FocusStage(stage));
        }
        out
    }
}
