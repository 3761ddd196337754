//! The demo images' cell labels turned into region sidecars, so the bundled trays open with
//! their cells already marked.

use super::tray::{CellClass, SceneLabels};
use crate::annotation::{sidecar_path, validate, Shape, Sidecar};
use crate::error::{Error, Result};
use std::path::{Path, PathBuf};

/// The demo's cell labels as a sidecar: one box per visible cell, labelled with its class
/// (`empty`, `healthy`, `wilted`, `weed`), plus one `weed` box per weed growing between cells.
/// Labels are defined in that order with the first four palette colours.
pub fn from_scene_labels(cells: &SceneLabels) -> Sidecar {
    let mut sc = Sidecar::new(cells.image.clone(), cells.width, cells.height);
    for class in CellClass::ALL {
        sc.ensure_label(class.name());
    }
    // Through the shortest decimal form, so 19.18 stays 19.18 rather than the f32's binary
    // neighbour 19.18000030517578.
    let wide = |v: f32| v.to_string().parse::<f64>().unwrap_or(v as f64);
    let rect_box = |r: [f32; 4]| Shape::Box {
        x0: wide(r[0]),
        y0: wide(r[1]),
        x1: wide(r[2]),
        y1: wide(r[3]),
    };
    for c in &cells.cells {
        let note = format!("tray row {}, column {}", c.row, c.col);
        sc.add_region(rect_box(c.rect), c.class.name(), &note);
    }
    for w in cells.weeds.iter().filter(|w| w.cell.is_none()) {
        sc.add_region(
            rect_box(w.rect),
            CellClass::Weed.name(),
            "weed between cells",
        );
    }
    sc
}

/// For every `<name>.cells.json` in `dir` whose image exists, write the image's sidecar next to
/// it (see [`from_scene_labels`]). Returns the written paths, sorted.
pub fn write_sidecars_from_cells(dir: &Path) -> Result<Vec<PathBuf>> {
    let mut cells_files: Vec<PathBuf> = std::fs::read_dir(dir)
        .map_err(|e| Error::io(dir, e))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.to_string_lossy().ends_with(".cells.json"))
        .collect();
    cells_files.sort();
    let mut written = Vec::new();
    for p in cells_files {
        let text = std::fs::read_to_string(&p).map_err(|e| Error::io(&p, e))?;
        let cells: SceneLabels = serde_json::from_str(&text)
            .map_err(|e| Error::bad_file(&p, format!("not a cell label file: {e}")))?;
        let image = dir.join(&cells.image);
        if !image.is_file() {
            continue;
        }
        let mut sc = from_scene_labels(&cells);
        validate(&mut sc);
        let out = sidecar_path(&image, None);
        crate::annotation::save(&out, &sc)?;
        written.push(out);
    }
    Ok(written)
}
