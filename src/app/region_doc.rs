//! The current image's regions as the window holds them: the sidecar, where it is saved, the
//! undo history, the selection, and the statistics and highlight derived from the maps on
//! screen. Every edit is saved at once, atomically; a failed save keeps the work in memory and
//! says so. The statistics and the highlight are computed on a thread of their own; numbers
//! that no longer belong to the maps and regions on screen are dropped at once, never shown
//! while the new ones are computed.

use super::actions::RegionEdit;
use super::pictures::PreparedMaps;
use crate::analysis::{region_stats, token_weights, RegionStats, INSIDE_WEIGHT};
use crate::annotation::{self, Edits, Shape, Sidecar};
use crate::error::Result;
use std::path::{Path, PathBuf};
use std::sync::mpsc::{channel, Receiver, TryRecvError};
use std::sync::Arc;

/// What the statistics thread gives: the rows (when asked), the highlight, and a problem.
type Derived = (Option<Vec<RegionStats>>, Vec<[f32; 4]>, Option<String>);

/// What the derived numbers depend on: maps, regions revision, lens stage, selection.
type DerivedKey = (u64, u64, usize, Option<u64>);

struct DerivedJob {
    key: DerivedKey,
    rx: Receiver<Derived>,
}

/// What a region file read on the loader thread gave.
pub type LoadedSidecar = Result<Option<(Sidecar, Vec<String>)>>;

pub struct RegionDoc {
    pub sidecar: Option<Sidecar>,
    pub path: Option<PathBuf>,
    /// Folder for region files instead of next to the images (empty: next to them).
    pub project_dir: String,
    pub edits: Edits,
    /// Label given to new regions.
    pub label: String,
    /// Whether outlines are drawn over the pictures (mirrors the setting).
    pub outlines: bool,
    pub selected: Option<u64>,
    /// One row per region and stage for the maps on screen (scalar maps only).
    pub stats: Vec<RegionStats>,
    /// Footprints (x0, y0, x1, y1 in input pixels) of the lens stage's tokens that count as
    /// inside the selected region.
    pub highlight: Vec<[f32; 4]>,
    /// Bumped by every change, so derived numbers know when to recompute.
    revision: u64,
    /// The (maps, revision) the rows on screen belong to.
    stats_for: Option<(u64, u64)>,
    /// The key the highlight on screen belongs to.
    highlight_for: Option<DerivedKey>,
    job: Option<DerivedJob>,
    /// The region whose note the last edit changed, so typing is one undo step.
    last_note: Option<u64>,
    /// The label list of the image closed last, for a new image without a region file.
    carry_labels: Vec<crate::annotation::LabelDef>,
    /// The folder of the region file the carried labels came from.
    carry_from: Option<PathBuf>,
}

impl Default for RegionDoc {
    fn default() -> Self {
        RegionDoc {
            sidecar: None,
            path: None,
            project_dir: String::new(),
            edits: Edits::new(200),
            label: "region".into(),
            outlines: true,
            selected: None,
            stats: Vec::new(),
            highlight: Vec::new(),
            revision: 0,
            stats_for: None,
            highlight_for: None,
            job: None,
            last_note: None,
            carry_labels: Vec::new(),
            carry_from: None,
        }
    }
}

/// Where the region file of `image` is, given the folder setting.
pub fn sidecar_path_for(image: &Path, project_dir: &str) -> PathBuf {
    let dir = project_dir.trim();
    let dir = (!dir.is_empty()).then(|| PathBuf::from(dir));
    annotation::sidecar_path(image, dir.as_deref())
}

/// Read the region file of an image (on the loader thread).
pub fn read_sidecar(path: &Path) -> LoadedSidecar {
    annotation::load_with_warnings(path)
}

impl RegionDoc {
    /// Take the region file of the image just opened; returns messages for the user. A new
    /// image without a file starts with the label list in use, so one list serves a project.
    pub fn open(
        &mut self,
        path: PathBuf,
        loaded: LoadedSidecar,
        image_name: String,
        size: (u32, u32),
    ) -> Vec<std::result::Result<String, String>> {
        let mut notes = Vec::new();
        self.edits.clear();
        self.selected = None;
        self.last_note = None;
        if let Some(prev) = &self.sidecar {
            self.carry_labels = prev.labels.clone();
        }
        // A label list carries over only within one folder of region files, so one project's
        // names (the demo's, say) do not turn up in another's images.
        let same_folder = self.carry_from.as_deref() == path.parent();
        let carry = if same_folder {
            std::mem::take(&mut self.carry_labels)
        } else {
            Vec::new()
        };
        self.carry_from = path.parent().map(Path::to_path_buf);
        let fresh = |labels: Vec<crate::annotation::LabelDef>| {
            let mut sc = Sidecar::new(image_name.clone(), size.0, size.1);
            sc.labels = labels;
            sc
        };
        let sidecar = match loaded {
            Ok(Some((sc, warnings))) => {
                notes.extend(
                    warnings
                        .into_iter()
                        .map(|w| Ok(format!("{}: {w}", path.display()))),
                );
                sc
            }
            Ok(None) => fresh(carry),
            Err(e) => {
                notes.push(Err(e.to_string()));
                fresh(carry)
            }
        };
        if let Some(first) = sidecar.labels.first() {
            if sidecar.colour_of(&self.label).is_none() {
                self.label = first.name.clone();
            }
        }
        self.sidecar = Some(sidecar);
        self.path = Some(path);
        self.changed();
        notes
    }

    /// Forget the regions (no image open, or another one loading); the label list is kept for
    /// the next image.
    pub fn close(&mut self) {
        if let Some(prev) = self.sidecar.take() {
            self.carry_labels = prev.labels;
        }
        self.path = None;
        self.selected = None;
        self.edits.clear();
        self.changed();
    }

    fn changed(&mut self) {
        self.revision += 1;
    }

    /// Apply one edit, recording it for undo, and save. Returns a message for the user when
    /// the edit was refused or the save failed.
    pub fn apply(&mut self, edit: RegionEdit) -> Option<String> {
        let Some(sc) = &mut self.sidecar else {
            return None;
        };
        let image = sc.image_rect();
        let label = match self.label.trim() {
            "" => "region".to_string(),
            l => l.to_string(),
        };
        let note_of = match &edit {
            RegionEdit::Note { id, .. } => Some(*id),
            _ => None,
        };
        let mut new_id = None;
        let mut refused = None;
        let before = sc.clone();
        match edit {
            RegionEdit::Add(shape) => match shape.clipped(image) {
                Some(shape) => new_id = Some(sc.add_region(shape, &label, "")),
                None => refused = Some("the region lies outside the image; not added".into()),
            },
            RegionEdit::Reshape { id, shape } => match shape.clipped(image) {
                Some(shape) => {
                    if let Some(r) = sc.regions.iter_mut().find(|r| r.id == id) {
                        r.shape = normalised(shape);
                    }
                }
                None => {
                    refused = Some(format!(
                        "region #{id} would lie outside the image; left where it was"
                    ))
                }
            },
            RegionEdit::Remove(id) => {
                sc.remove_region(id);
                if self.selected == Some(id) {
                    self.selected = None;
                }
            }
            RegionEdit::Relabel { id, label } => {
                sc.ensure_label(&label);
                if let Some(r) = sc.regions.iter_mut().find(|r| r.id == id) {
                    r.label = label;
                }
            }
            RegionEdit::Note { id, note } => {
                if let Some(r) = sc.regions.iter_mut().find(|r| r.id == id) {
                    r.note = note;
                }
            }
            RegionEdit::AddPin { at, text } => {
                let at = [at[0].clamp(0.0, image[2]), at[1].clamp(0.0, image[3])];
                sc.add_pin(at, &text);
            }
            RegionEdit::DefineLabel(name) => {
                sc.ensure_label(&name);
                self.label = name;
            }
            RegionEdit::Recolour { label, colour } => {
                if let Some(l) = sc.labels.iter_mut().find(|l| l.name == label) {
                    l.colour = colour;
                }
            }
        }
        if *sc == before {
            return refused;
        }
        // Typing in one note is one step: only its first change is recorded.
        if note_of.is_none() || note_of != self.last_note {
            self.edits.record(&before);
        } else {
            self.edits.redo.clear();
        }
        self.last_note = note_of;
        if new_id.is_some() {
            self.selected = new_id;
        }
        self.changed();
        self.save().or(refused)
    }

    pub fn undo(&mut self) -> Option<String> {
        let sc = self.sidecar.as_mut()?;
        if !self.edits.undo(sc) {
            return None;
        }
        self.last_note = None;
        self.changed();
        self.save()
    }

    pub fn redo(&mut self) -> Option<String> {
        let sc = self.sidecar.as_mut()?;
        if !self.edits.redo(sc) {
            return None;
        }
        self.last_note = None;
        self.changed();
        self.save()
    }

    /// Write the region file atomically; a message when it could not be written.
    fn save(&mut self) -> Option<String> {
        let (Some(sc), Some(path)) = (&self.sidecar, &self.path) else {
            return None;
        };
        annotation::save(path, sc)
            .err()
            .map(|e| format!("regions not saved (they are kept in the window): {e}"))
    }

    /// Whether the statistics thread is working.
    pub fn is_busy(&self) -> bool {
        self.job.is_some()
    }

    /// Bring the statistics and the lens highlight up to date with the maps, the regions, the
    /// lens stage and the selection: numbers of anything else are dropped at once and new ones
    /// computed on a thread (`wake` is called when they are ready). Returns an error message
    /// when the statistics failed.
    pub fn refresh(
        &mut self,
        maps: Option<&Arc<PreparedMaps>>,
        lens_stage: usize,
        wake: Option<Box<dyn Fn() + Send>>,
    ) -> Option<String> {
        let (Some(maps), Some(sc)) = (maps, &self.sidecar) else {
            self.stats.clear();
            self.highlight.clear();
            self.stats_for = None;
            self.highlight_for = None;
            self.job = None;
            return None;
        };
        let key = (maps.id, self.revision, lens_stage, self.selected);
        let stats_key = (maps.id, self.revision);
        if self.stats_for != Some(stats_key) {
            self.stats.clear();
        }
        if self.highlight_for != Some(key) {
            self.highlight.clear();
        }
        if self.stats_for == Some(stats_key) && self.highlight_for == Some(key) {
            self.job = None;
            return None;
        }
        if let Some(job) = self.job.as_ref().filter(|j| j.key == key) {
            return match job.rx.try_recv() {
                Ok((stats, highlight, problem)) => {
                    if let Some(rows) = stats {
                        self.stats = rows;
                        self.stats_for = Some(stats_key);
                    }
                    self.highlight = highlight;
                    self.highlight_for = Some(key);
                    self.job = None;
                    problem
                }
                Err(TryRecvError::Empty) => None,
                Err(TryRecvError::Disconnected) => {
                    self.job = None;
                    self.stats_for = Some(stats_key);
                    self.highlight_for = Some(key);
                    Some("internal: the region statistics thread stopped".into())
                }
            };
        }
        let need_stats = self.stats_for != Some(stats_key);
        let (maps, sc) = (maps.clone(), sc.clone());
        let selected = self.selected;
        let (tx, rx) = channel();
        let spawned = std::thread::Builder::new()
            .name("mullion-region-stats".into())
            .spawn(move || {
                let stats = need_stats.then(|| compute_stats(&maps, &sc));
                let (rows, problem) = match stats {
                    Some(Ok(rows)) => (Some(rows), None),
                    Some(Err(e)) => (Some(Vec::new()), Some(e.to_string())),
                    None => (None, None),
                };
                let highlight = compute_highlight(&maps, &sc, lens_stage, selected);
                let _ = tx.send((rows, highlight, problem));
                if let Some(w) = wake {
                    w();
                }
            });
        match spawned {
            Ok(_) => {
                self.job = Some(DerivedJob { key, rx });
                None
            }
            Err(e) => {
                self.stats_for = Some(stats_key);
                self.highlight_for = Some(key);
                Some(format!("cannot start the region statistics: {e}"))
            }
        }
    }
}

/// One row per region and stage for scalar maps; none for colour maps.
fn compute_stats(maps: &PreparedMaps, sc: &Sidecar) -> Result<Vec<RegionStats>> {
    if maps.raw.iter().any(|m| m.scalars().is_none()) {
        return Ok(Vec::new());
    }
    region_stats(
        &maps.outputs,
        &maps.raw,
        &maps.map_id,
        &sc.regions,
        &sc.image,
    )
}

/// Footprints (input pixels) of the lens stage's tokens inside the selected region.
fn compute_highlight(
    maps: &PreparedMaps,
    sc: &Sidecar,
    lens_stage: usize,
    selected: Option<u64>,
) -> Vec<[f32; 4]> {
    let g = &maps.outputs.geometry;
    let (Some(r), Some(sg)) = (
        selected.and_then(|id| sc.region(id)),
        g.stages.get(lens_stage),
    ) else {
        return Vec::new();
    };
    // Regions are marked in image pixels; the maps may be of a resized input.
    let (sx, sy) = maps.image_to_input();
    let shape = scale_shape(&r.shape, sx, sy);
    token_weights(sg, g.image, &shape)
        .iter()
        .enumerate()
        .filter(|(_, &w)| w >= INSIDE_WEIGHT)
        .map(|(i, _)| {
            let f = sg.footprint(i / sg.grid.1, i % sg.grid.1, g.image);
            [f[2] as f32, f[0] as f32, f[3] as f32, f[1] as f32]
        })
        .collect()
}

/// A box with its corners in order; polygons as they are.
fn normalised(shape: Shape) -> Shape {
    match shape {
        Shape::Box { x0, y0, x1, y1 } => Shape::Box {
            x0: x0.min(x1),
            y0: y0.min(y1),
            x1: x0.max(x1),
            y1: y0.max(y1),
        },
        other => other,
    }
}

/// `shape` with x scaled by `sx` and y by `sy`.
pub fn scale_shape(shape: &Shape, sx: f64, sy: f64) -> Shape {
    match shape {
        Shape::Box { x0, y0, x1, y1 } => Shape::Box {
            x0: x0 * sx,
            y0: y0 * sy,
            x1: x1 * sx,
            y1: y1 * sy,
        },
        Shape::Polygon { points } => Shape::Polygon {
            points: points.iter().map(|p| [p[0] * sx, p[1] * sy]).collect(),
        },
    }
}

/// A copy of a sidecar with every coordinate scaled (for a resized network input).
pub fn scale_sidecar(sc: &Sidecar, sx: f64, sy: f64) -> Sidecar {
    let mut out = sc.clone();
    for r in &mut out.regions {
        r.shape = scale_shape(&r.shape, sx, sy);
    }
    for pin in &mut out.pins {
        pin.at = [pin.at[0] * sx, pin.at[1] * sy];
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn doc() -> RegionDoc {
        let mut d = RegionDoc::default();
        let dir = std::env::temp_dir().join(format!("mullion-doc-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let notes = d.open(
            dir.join("a.png.regions.json"),
            Ok(None),
            "a.png".into(),
            (100, 80),
        );
        assert!(notes.is_empty());
        d
    }

    fn square(x: f64) -> Shape {
        Shape::Box {
            x0: x,
            y0: 10.0,
            x1: x + 20.0,
            y1: 30.0,
        }
    }

    #[test]
    fn labels_carry_over_within_a_folder_only() {
        let mut d = doc();
        let _ = d.apply(RegionEdit::DefineLabel("weed".into()));
        let dir = d.path.as_ref().unwrap().parent().unwrap().to_path_buf();
        d.close();
        let _ = d.open(
            dir.join("b.png.regions.json"),
            Ok(None),
            "b.png".into(),
            (10, 10),
        );
        assert_eq!(d.sidecar.as_ref().unwrap().labels.len(), 1, "same folder");
        d.close();
        let other = dir.join("elsewhere");
        let _ = d.open(
            other.join("c.png.regions.json"),
            Ok(None),
            "c.png".into(),
            (10, 10),
        );
        assert!(
            d.sidecar.as_ref().unwrap().labels.is_empty(),
            "another folder"
        );
    }

    #[test]
    fn regions_outside_the_image_are_refused_and_partial_ones_clipped() {
        let mut d = doc();
        assert!(d.apply(RegionEdit::Add(square(-180.0))).is_some());
        assert!(d.sidecar.as_ref().unwrap().regions.is_empty());
        assert!(!d.edits.can_undo(), "a refused edit is no step");
        assert!(d.apply(RegionEdit::Add(square(90.0))).is_none());
        let r = &d.sidecar.as_ref().unwrap().regions[0];
        assert_eq!(r.shape.bounds().unwrap(), [90.0, 10.0, 100.0, 30.0]);
        let id = r.id;
        let moved = d.apply(RegionEdit::Reshape {
            id,
            shape: square(-300.0),
        });
        assert!(moved.unwrap().contains("outside"));
    }

    #[test]
    fn typing_a_note_is_one_undo_step_and_is_saved() {
        let mut d = doc();
        let _ = d.apply(RegionEdit::Add(square(5.0)));
        let id = d.selected.unwrap();
        for text in ["w", "wi", "wilt"] {
            assert!(d
                .apply(RegionEdit::Note {
                    id,
                    note: text.into()
                })
                .is_none());
        }
        let on_disk = annotation::load(d.path.as_ref().unwrap()).unwrap().unwrap();
        assert_eq!(on_disk.regions[0].note, "wilt");
        assert!(d.undo().is_none());
        assert_eq!(d.sidecar.as_ref().unwrap().regions[0].note, "");
        assert!(d.undo().is_none());
        assert!(d.sidecar.as_ref().unwrap().regions.is_empty());
    }
}
