//! The read-out of what the pointer is over, in a fixed place below the pictures: the pixel,
//! then for every stage the token, its pixel footprint, the map value and the window; when two
//! checkpoints are compared, A's and B's values and the token's cosine.

use super::pointer::Pointer;
use crate::app::actions::Action;
use crate::app::pictures::PreparedMaps;
use crate::app::state::Workbench;

#[derive(Default)]
pub struct Readout;

/// What input pixel `p` is, per stage: token, footprint, value, window of block `block`.
/// Everything comes from the maps on screen, so the lines always describe those maps.
pub fn hover_lines(maps: &PreparedMaps, block: usize, p: (f32, f32)) -> Vec<String> {
    let g = &maps.outputs.geometry;
    let (x, y) = (p.0.max(0.0) as usize, p.1.max(0.0) as usize);
    let outside = x >= g.image.1 || y >= g.image.0;
    let mut lines = vec![format!(
        "pixel ({x}, {y}){}",
        if outside { " — padding" } else { "" }
    )];
    for st in &g.stages {
        let (row, col) = (y / st.stride, x / st.stride);
        let (pr, pc) = st.padded();
        if row >= pr || col >= pc {
            lines.push(format!("stage {}: outside the padded grid", st.index));
            continue;
        }
        let value = if row >= st.grid.0 || col >= st.grid.1 {
            "padding token".to_string()
        } else {
            maps.value_at(st.index, row, col)
                .unwrap_or_else(|| "no value".into())
        };
        let pair = block.min(st.blocks.len().saturating_sub(1));
        let window = st.blocks.get(pair).map(|b| {
            b.window_of(row.min(b.rows.padded - 1), col.min(b.cols.padded - 1))
                .0
        });
        let fp = st.footprint(row, col, g.image);
        // When comparing, A's and B's values and the cosine of this token come along.
        let value = match maps.pair_at(st.index, row, col) {
            Some(pair) if row < st.grid.0 && col < st.grid.1 => format!("{value}; {pair}"),
            _ => value,
        };
        lines.push(format!(
            "stage {}: token (row {row}, col {col}), pixels x {}..{} y {}..{}, {value}, window {}",
            st.index,
            fp[2],
            fp[3],
            fp[0],
            fp[1],
            window.map_or("-".into(), |w| w.to_string())
        ));
    }
    lines
}

impl Readout {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench, pointer: &Pointer) -> Vec<Action> {
        let maps = bench.pictures.maps.as_deref();
        let rows = maps.map_or(1, |m| m.outputs.geometry.stages.len() + 1);
        let line_h = ui.text_style_height(&egui::TextStyle::Small) + 2.0;
        egui::Panel::bottom("readout")
            .resizable(false)
            .exact_size(rows as f32 * line_h + 8.0)
            .show(ui, |ui| {
                let block = bench.settings.overlays().block;
                match (maps, pointer.hover) {
                    (Some(m), Some(p)) => {
                        for line in hover_lines(m, block, p) {
                            ui.small(line);
                        }
                    }
                    (Some(_), None) => {
                        ui.small("pointer: move it over a picture to read every stage here");
                    }
                    (None, _) => {
                        ui.small("pointer: no maps on screen");
                    }
                }
            });
        Vec::new()
    }
}
