//! *Save figure*: the view on screen as a reviewer's figure (through the same renderer as
//! `mullion figure` and the report), with the regions outlined, their label key, notes and pins
//! in the caption, and the per-stage statistics beside it. Runs on its own thread.

use super::pictures::{DrawKey, PreparedMaps};
use super::region_doc::scale_sidecar;
use crate::analysis::{stage_stats, write_stats_csv, write_stats_json};
use crate::annotation::Sidecar;
use crate::error::Result;
use crate::render::{self, FigureSpec};
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Everything a save needs, copied out of the window's state.
pub struct ExportRequest {
    pub maps: Arc<PreparedMaps>,
    pub draw: DrawKey,
    pub overlays: crate::render::Overlays,
    pub sidecar: Option<Sidecar>,
    /// How the image became the network input, for the caption.
    pub policy: String,
    pub checkpoint: String,
    /// The base checkpoint's name when comparing: the comparison figure is saved too.
    pub base: Option<String>,
    pub paths: ExportPaths,
    /// The region statistics of the maps on screen (written beside the figure when any).
    pub rows: Vec<crate::analysis::RegionStats>,
    /// The attention inspector's query, its attention and its lines, when one is shown: the
    /// figure then carries the spotlighted stage below the stages.
    pub inspected: Option<(usize, crate::analysis::inspect::QueryAttention, Vec<String>)>,
    /// The seams and border profiles of the lens stage are on screen: the figure carries them.
    pub profiles: bool,
}

/// The files one save writes.
#[derive(Clone, Debug, PartialEq)]
pub struct ExportPaths {
    pub png: PathBuf,
    pub stats_json: PathBuf,
    pub stats_csv: PathBuf,
    /// The region statistics table, as the report's `regions.csv` rows.
    pub regions_csv: PathBuf,
    /// The comparison figure (A, B and the difference), `<stem>.compare.figure.png`, the name
    /// `mullion compare --figures` gives it.
    pub comparison_png: PathBuf,
}

impl ExportPaths {
    /// `<stem>.<map>.figure.png` ([`crate::io::figure_file_name`]) and the statistics and
    /// the region table beside it, in `dir`.
    pub fn new(dir: &Path, image: &Path, map_id: &str) -> ExportPaths {
        let png = crate::io::figure_file_name(image, map_id);
        let base = png.trim_end_matches(crate::io::FIGURE_SUFFIX).to_string();
        ExportPaths {
            png: dir.join(png),
            stats_json: dir.join(format!("{base}.stats.json")),
            stats_csv: dir.join(format!("{base}.stats.csv")),
            regions_csv: dir.join(format!("{base}.regions.csv")),
            comparison_png: dir.join(crate::io::figure_file_name(image, "compare")),
        }
    }
}

/// What a save wrote, with the caption lines it carried.
#[derive(Clone, Debug)]
pub struct Exported {
    pub png: PathBuf,
    pub notes: Vec<String>,
    /// Whether statistics were written (scalar maps only).
    pub stats: bool,
    /// The comparison figure, when two checkpoints were on screen.
    pub comparison: Option<PathBuf>,
}

/// Compose and write the figure and the statistics.
pub fn export(req: &ExportRequest) -> Result<Exported> {
    let maps = &req.maps;
    let input = maps.input.as_ref();
    let scale = render::default_figure_scale(input.height());
    let mut notes = vec![format!("input policy: {}", req.policy)];
    let scalar = maps.raw.iter().all(|m| m.scalars().is_some());
    notes.push(if scalar {
        render::scale_note(&maps.key.spec, req.draw.colormap)
    } else {
        render::PCA_NOTE.to_string()
    });
    // Regions are marked in image pixels; with a resizing input policy they are scaled along.
    let annotated = match &req.sidecar {
        Some(sc) => {
            let (sx, sy) = maps.image_to_input();
            let (img, region_notes) = render::annotate_regions(input, &scale_sidecar(sc, sx, sy));
            notes.extend(region_notes);
            img
        }
        None => input.clone(),
    };
    let stats = if scalar {
        Some(stage_stats(
            &maps.map_id,
            &maps.raw,
            &maps.outputs.geometry,
        )?)
    } else {
        None
    };
    let main = render::compose_figure(&FigureSpec {
        image: &annotated,
        geometry: &maps.outputs.geometry,
        stages: &maps.stages,
        style: render::figure_panel_style(req.draw.colormap, req.draw.opacity, req.overlays, scale),
        checkpoint: req.checkpoint.clone(),
        map_label: maps.map_label.clone(),
        notes: notes.clone(),
        text_px: render::figure_text_px(scale),
    })?;
    let fig = match &req.inspected {
        Some((stage, q, lines)) => {
            let st = maps.stages.get(*stage).ok_or_else(|| {
                crate::error::Error::Internal(format!("no stage {stage} to inspect"))
            })?;
            let style = render::figure_panel_style(
                req.draw.colormap,
                req.draw.opacity,
                req.overlays,
                scale,
            );
            let part = render::spotlight::attention_figure(
                &annotated,
                &maps.outputs.geometry,
                st,
                &style,
                q,
                lines,
                render::figure_text_px(scale),
            )?;
            render::stack_figures(&[main, part])?
        }
        None => main,
    };
    let profiles = maps
        .profiles
        .get(req.draw.focus)
        .and_then(Option::as_ref)
        .filter(|_| req.profiles);
    let fig = match profiles {
        Some(p) => {
            let part = render::profile::profile_figure(
                req.draw.focus,
                &maps.map_label,
                p,
                req.draw.colormap,
                render::figure_text_px(scale),
            )?;
            render::stack_figures(&[fig, part])?
        }
        None => fig,
    };
    crate::io::save_png_atomic(&fig, &req.paths.png)?;
    if let Some(stats) = &stats {
        write_stats_json(stats, &req.paths.stats_json)?;
        write_stats_csv(stats, &req.paths.stats_csv)?;
    }
    if !req.rows.is_empty() {
        crate::io::write_text_atomic(
            &req.paths.regions_csv,
            &crate::analysis::rows_csv(&req.rows)?,
        )?;
    }
    let comparison = match (&maps.pair, &req.base) {
        (Some(pair), Some(base)) => {
            let mut pair_notes = vec![format!("input policy: {}", req.policy)];
            pair_notes.push(if pair.a.iter().all(|s| s.range.is_some()) {
                render::scale_note(&maps.key.spec, req.draw.colormap)
            } else {
                format!("{} (A and B fitted separately)", render::PCA_NOTE)
            });
            let fig = render::compose_pair_figure(&render::PairFigureSpec {
                image: &annotated,
                geometry: &maps.outputs.geometry,
                pair,
                style: render::figure_panel_style(
                    req.draw.colormap,
                    req.draw.opacity,
                    req.overlays,
                    scale,
                ),
                names: (base.clone(), req.checkpoint.clone()),
                notes: pair_notes,
                text_px: render::figure_text_px(scale),
            })?;
            crate::io::save_png_atomic(&fig, &req.paths.comparison_png)?;
            Some(req.paths.comparison_png.clone())
        }
        _ => None,
    };
    Ok(Exported {
        png: req.paths.png.clone(),
        notes,
        stats: stats.is_some(),
        comparison,
    })
}
