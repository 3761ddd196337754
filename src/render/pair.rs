//! The comparison figure: checkpoint A's maps, checkpoint B's maps (on one colour scale per
//! stage) and the difference map, stacked, with linear CKA and the cosine statistics per stage
//! in the caption. `mullion compare --figures` and the window's *Save figure* while comparing
//! both draw it here.

use super::figure::{compose_figure, stack_figures, text_figure, FigureSpec};
use super::panel::PanelStyle;
use crate::analysis::compare::{DifferenceStage, PairView};
use crate::analysis::PreparedStage;
use crate::engine::geometry::Geometry;
use crate::error::Result;
use image::{RgbImage, RgbaImage};

/// Everything the comparison figure shows.
pub struct PairFigureSpec<'a> {
    pub image: &'a RgbImage,
    pub geometry: &'a Geometry,
    pub pair: &'a PairView,
    pub style: PanelStyle,
    /// File names of A (base) and B.
    pub names: (String, String),
    /// Caption lines shared by every row (input policy, scaling).
    pub notes: Vec<String>,
    pub text_px: f32,
}

/// One line per stage: CKA, and the mean and minimum cosine where there is a difference map.
pub fn pair_summary_lines(pair: &PairView) -> Vec<String> {
    pair.cka
        .iter()
        .zip(&pair.difference)
        .enumerate()
        .map(|(s, (cka, d))| {
            let cka = cka.map_or("none (no variance)".into(), |c| format!("{c:.4}"));
            match d {
                DifferenceStage::Shown {
                    mean_cosine,
                    min_cosine,
                    ..
                } => format!(
                    "stage {s}: linear CKA {cka}, cosine mean {mean_cosine:.4}, min {min_cosine:.4}"
                ),
                DifferenceStage::Absent(_) => format!(
                    "stage {s}: linear CKA {cka}; widths {} vs {}: no per-token cosine",
                    pair.widths[s].0, pair.widths[s].1
                ),
            }
        })
        .collect()
}

/// A, B and the difference stacked into one picture.
pub fn compose_pair_figure(spec: &PairFigureSpec) -> Result<RgbaImage> {
    let pair = spec.pair;
    let row = |title: String, stages: &[PreparedStage], label: &str, extra: Vec<String>| {
        let mut notes = spec.notes.clone();
        notes.extend(extra);
        compose_figure(&FigureSpec {
            image: spec.image,
            geometry: spec.geometry,
            stages,
            style: spec.style,
            checkpoint: title,
            map_label: label.to_string(),
            notes,
            text_px: spec.text_px,
        })
    };
    let shared = "A and B share one colour scale per stage".to_string();
    let mut figures = vec![
        row(
            format!("A (base): {}", spec.names.0),
            &pair.a,
            &pair.kind_label,
            vec![shared.clone()],
        )?,
        row(
            format!("B: {}", spec.names.1),
            &pair.b,
            &pair.kind_label,
            vec![shared],
        )?,
    ];
    let summary = pair_summary_lines(pair);
    let shown: Vec<PreparedStage> = pair
        .difference
        .iter()
        .filter_map(|d| match d {
            DifferenceStage::Shown { prepared, .. } => Some(prepared.clone()),
            DifferenceStage::Absent(_) => None,
        })
        .collect();
    if shown.len() == pair.difference.len() {
        figures.push(row(
            format!("A vs B: {} vs {}", spec.names.0, spec.names.1),
            &shown,
            "1 - cosine(A token, B token)",
            summary,
        )?);
    } else {
        let mut lines = summary;
        lines.extend(pair.difference.iter().filter_map(|d| match d {
            DifferenceStage::Absent(why) => Some(why.clone()),
            DifferenceStage::Shown { .. } => None,
        }));
        figures.push(text_figure(&lines, spec.text_px)?);
    }
    stack_figures(&figures)
}
