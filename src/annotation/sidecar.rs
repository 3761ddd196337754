//! Regions drawn on an image, their labels and free notes, and the sidecar file that stores them.
//!
//! A sidecar is a small JSON file (schema `mullion-regions`, version 1) kept next to the image as
//! `<image file name>.regions.json`, or in a project folder chosen by the user. Coordinates are
//! image pixels as f64, with the origin at the top-left corner of the top-left pixel, x to the
//! right and y down; a box `[x0, x1) x [y0, y1)` covers whole pixels when its corners are
//! integers.
//!
//! A sidecar that cannot be read is never overwritten: [`load`] moves it aside (byte for byte) and
//! says where, so the next save starts a fresh file without destroying the user's work. Two kinds
//! are left where they are instead: a sidecar of a newer schema version (a newer Mullion reads
//! it; [`save`] refuses to write over it) and anything that is not a regular file (a FIFO would
//! block the read, a device is not ours to move).

use super::palette::PALETTE;
use super::shape::{ring_crosses_itself, Rect, Shape};
use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// Schema name written into every sidecar.
pub const SCHEMA: &str = "mullion-regions";
/// Version of the sidecar schema this build reads and writes.
pub const VERSION: u32 = 1;
/// Largest sidecar Mullion reads, in bytes (one with a thousand detailed polygons is well under
/// a megabyte).
pub const MAX_SIDECAR_BYTES: u64 = 16 << 20;
/// Suffix appended to the image's file name to name its sidecar.
pub const SIDECAR_SUFFIX: &str = ".regions.json";

/// One labelled region of an image.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Region {
    /// Unique within its sidecar; kept across edits so results can be traced back.
    pub id: u64,
    pub shape: Shape,
    /// Name of one of the sidecar's [`LabelDef`]s.
    pub label: String,
    /// Free text.
    #[serde(default)]
    pub note: String,
}

/// A free note pinned to a point of the image.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Pin {
    pub id: u64,
    /// `[x, y]` in image pixels.
    pub at: [f64; 2],
    pub text: String,
}

/// A label name and the colour its regions are drawn in.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct LabelDef {
    pub name: String,
    pub colour: [u8; 3],
}

/// The contents of one sidecar file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Sidecar {
    /// Always [`SCHEMA`].
    pub schema: String,
    /// Always [`VERSION`] for files this build writes.
    pub version: u32,
    /// File name (no folder) of the image the regions belong to.
    pub image: String,
    /// Image width in pixels, as displayed (orientation applied).
    pub width: u32,
    /// Image height in pixels, as displayed.
    pub height: u32,
    #[serde(default)]
    pub labels: Vec<LabelDef>,
    #[serde(default)]
    pub regions: Vec<Region>,
    #[serde(default)]
    pub pins: Vec<Pin>,
}

impl LabelDef {
    /// The colour of the `index`-th label of a fresh sidecar.
    pub fn palette_colour(index: usize) -> [u8; 3] {
        PALETTE[index % PALETTE.len()]
    }
}

impl Sidecar {
    /// An empty sidecar for an image called `image` (file name) of `width` x `height` pixels.
    pub fn new(image: impl Into<String>, width: u32, height: u32) -> Self {
        Sidecar {
            schema: SCHEMA.to_string(),
            version: VERSION,
            image: image.into(),
            width,
            height,
            labels: Vec::new(),
            regions: Vec::new(),
            pins: Vec::new(),
        }
    }

    /// The image rectangle `[0, 0, width, height]`.
    pub fn image_rect(&self) -> Rect {
        [0.0, 0.0, self.width as f64, self.height as f64]
    }

    /// The colour of label `name`, if it is defined.
    pub fn colour_of(&self, name: &str) -> Option<[u8; 3]> {
        self.labels
            .iter()
            .find(|l| l.name == name)
            .map(|l| l.colour)
    }

    /// Define label `name` (with the next palette colour) unless it exists; its colour.
    pub fn ensure_label(&mut self, name: &str) -> [u8; 3] {
        if let Some(c) = self.colour_of(name) {
            return c;
        }
        let colour = LabelDef::palette_colour(self.labels.len());
        self.labels.push(LabelDef {
            name: name.to_string(),
            colour,
        });
        colour
    }

    /// An id no region or pin of this sidecar uses.
    pub fn next_id(&self) -> u64 {
        let r = self.regions.iter().map(|r| r.id);
        let p = self.pins.iter().map(|p| p.id);
        r.chain(p).max().map_or(1, |m| m + 1)
    }

    /// Add a region (defining its label if new) and return its id.
    pub fn add_region(&mut self, shape: Shape, label: &str, note: &str) -> u64 {
        self.ensure_label(label);
        let id = self.next_id();
        self.regions.push(Region {
            id,
            shape,
            label: label.to_string(),
            note: note.to_string(),
        });
        id
    }

    /// Add a pinned note and return its id.
    pub fn add_pin(&mut self, at: [f64; 2], text: &str) -> u64 {
        let id = self.next_id();
        self.pins.push(Pin {
            id,
            at,
            text: text.to_string(),
        });
        id
    }

    /// Remove the region with `id`; whether there was one.
    pub fn remove_region(&mut self, id: u64) -> bool {
        let before = self.regions.len();
        self.regions.retain(|r| r.id != id);
        self.regions.len() != before
    }

    /// The region with `id`.
    pub fn region(&self, id: u64) -> Option<&Region> {
        self.regions.iter().find(|r| r.id == id)
    }
}

/// Make a sidecar consistent with its image and return a warning per change:
/// boxes given corner-first the wrong way round are reordered, regions partly outside the image
/// are clipped to it, regions with nothing left inside (or polygons with fewer than three
/// vertices) are dropped, repeated ids are renumbered, labels used without a definition get a
/// palette colour, and pins outside the image are moved onto its edge. Crossing polygons are
/// kept but reported.
pub fn validate(sc: &mut Sidecar) -> Vec<String> {
    let mut warnings = Vec::new();
    let rect = sc.image_rect();
    let mut seen = std::collections::HashSet::new();
    let mut next = sc.next_id();
    let mut kept = Vec::with_capacity(sc.regions.len());
    for mut r in std::mem::take(&mut sc.regions) {
        let what = format!("region {} ({} '{}')", r.id, r.shape.kind_name(), r.label);
        if let Shape::Box { x0, y0, x1, y1 } = r.shape {
            if x0 > x1 || y0 > y1 {
                warnings.push(format!("{what}: corners given in reverse order; reordered"));
                r.shape = Shape::Box {
                    x0: x0.min(x1),
                    y0: y0.min(y1),
                    x1: x0.max(x1),
                    y1: y0.max(y1),
                };
            }
        }
        if let Shape::Polygon { points } = &r.shape {
            if points.len() < 3 {
                warnings.push(format!(
                    "{what}: a polygon needs at least 3 vertices, it has {}; dropped",
                    points.len()
                ));
                continue;
            }
            if ring_crosses_itself(points) {
                warnings.push(format!(
                    "{what}: edges cross each other; areas of loops that run the other way are subtracted"
                ));
            }
        }
        let Some(b) = r.shape.bounds() else { continue };
        let outside = b[0] < rect[0] || b[1] < rect[1] || b[2] > rect[2] || b[3] > rect[3];
        if outside {
            match r.shape.clipped(rect) {
                Some(s) => {
                    warnings.push(format!(
                        "{what}: partly outside the {}x{} image; clipped to it",
                        sc.width, sc.height
                    ));
                    r.shape = s;
                }
                None => {
                    warnings.push(format!(
                        "{what}: nothing of it lies inside the {}x{} image; dropped",
                        sc.width, sc.height
                    ));
                    continue;
                }
            }
        } else if r.shape.area() <= 0.0 {
            warnings.push(format!("{what}: has no area; dropped"));
            continue;
        }
        if !seen.insert(r.id) {
            warnings.push(format!("{what}: id used twice; renumbered to {next}"));
            r.id = next;
            seen.insert(next);
            next += 1;
        }
        kept.push(r);
    }
    sc.regions = kept;
    let used: Vec<String> = sc.regions.iter().map(|r| r.label.clone()).collect();
    for name in used {
        sc.ensure_label(&name);
    }
    for p in &mut sc.pins {
        let at = [
            p.at[0].clamp(rect[0], rect[2]),
            p.at[1].clamp(rect[1], rect[3]),
        ];
        if at != p.at {
            warnings.push(format!(
                "pin {}: outside the image; moved onto its edge",
                p.id
            ));
            p.at = at;
        }
    }
    warnings
}

/// Where the sidecar of `image` lives: `<image file name>.regions.json` in `project_dir` when
/// one is given, otherwise next to the image. The full file name (extension included) is kept so
/// `a.png` and `a.jpg` in one folder get separate sidecars.
pub fn sidecar_path(image: &Path, project_dir: Option<&Path>) -> PathBuf {
    let name = image
        .file_name()
        .map_or_else(|| "image".into(), |n| n.to_string_lossy().into_owned());
    let file = format!("{name}{SIDECAR_SUFFIX}");
    match project_dir {
        Some(d) => d.join(file),
        None => image.with_file_name(file),
    }
}

/// Move an unreadable file to `<name>.unreadable` (or `.unreadable-2`, `-3`, ... when taken) in
/// the same folder, so the next save cannot overwrite it. Returns where it went.
pub fn move_aside(path: &Path) -> Result<PathBuf> {
    let name = path
        .file_name()
        .ok_or_else(|| Error::BadArgument(format!("{}: not a file name", path.display())))?
        .to_string_lossy()
        .into_owned();
    for n in 1..10_000u32 {
        let target = if n == 1 {
            path.with_file_name(format!("{name}.unreadable"))
        } else {
            path.with_file_name(format!("{name}.unreadable-{n}"))
        };
        // symlink_metadata so a dangling link also counts as taken.
        if target.symlink_metadata().is_ok() {
            continue;
        }
        std::fs::rename(path, &target).map_err(|e| Error::io(path, e))?;
        return Ok(target);
    }
    Err(Error::bad_file(
        path,
        "cannot move the unreadable file aside: too many earlier copies",
    ))
}

/// Why the bytes of a sidecar are not a sidecar this build can use.
enum Unusable {
    /// Written by a newer Mullion: left in place, never moved or overwritten.
    Newer(String),
    /// Broken or foreign: moved aside.
    Broken(String),
}

/// The schema version a sidecar's bytes declare, when they are a JSON object of our schema.
fn declared_version(bytes: &[u8]) -> Option<u64> {
    let value: serde_json::Value = serde_json::from_slice(bytes).ok()?;
    let obj = value.as_object()?;
    (obj.get("schema")?.as_str()? == SCHEMA).then_some(())?;
    obj.get("version")?.as_u64()
}

/// The sidecar the bytes hold, or why they cannot be used.
fn parse(bytes: &[u8]) -> std::result::Result<Sidecar, Unusable> {
    use Unusable::Broken;
    let text = std::str::from_utf8(bytes).map_err(|e| Broken(format!("not UTF-8 text: {e}")))?;
    let value: serde_json::Value =
        serde_json::from_str(text).map_err(|e| Broken(format!("not valid JSON: {e}")))?;
    let obj = value
        .as_object()
        .ok_or_else(|| Broken("expected a JSON object at the top level".into()))?;
    match obj.get("schema").and_then(|v| v.as_str()) {
        Some(SCHEMA) => {}
        Some(other) => return Err(Broken(format!("schema is '{other}', expected '{SCHEMA}'"))),
        None => return Err(Broken(format!("no \"schema\": \"{SCHEMA}\" field"))),
    }
    match obj.get("version").and_then(|v| v.as_u64()) {
        Some(v) if v == VERSION as u64 => {}
        Some(v) if v > VERSION as u64 => {
            return Err(Unusable::Newer(format!(
                "schema version {v} is newer than this build reads (version {VERSION}); it was \
                 written by a newer Mullion, so it is skipped and left in place unchanged"
            )))
        }
        Some(v) => {
            return Err(Broken(format!(
                "unknown schema version {v} (expected {VERSION})"
            )))
        }
        None => return Err(Broken("no whole-number \"version\" field".into())),
    }
    let sc: Sidecar = serde_json::from_value(value).map_err(|e| Broken(format!("{e}")))?;
    if sc.width == 0 || sc.height == 0 {
        return Err(Broken(format!(
            "image size {}x{} has a zero side",
            sc.width, sc.height
        )));
    }
    Ok(sc)
}

/// The bytes of the sidecar at `path`; `None` when there is none. Anything but a regular file
/// (a folder, a FIFO, a device) or a file beyond [`MAX_SIDECAR_BYTES`] is an error naming it,
/// and is left in place.
pub fn read_bytes(path: &Path) -> Result<Option<Vec<u8>>> {
    match std::fs::metadata(path) {
        Ok(m) if m.is_dir() => {
            // Someone else's folder of that name is not ours to move.
            return Err(Error::bad_file(path, "is a folder, not a regions file"));
        }
        _ => {}
    }
    crate::io::read_regular(path, MAX_SIDECAR_BYTES)
}

/// Read a sidecar, clip it to its image and return it with the warnings [`validate`] gave;
/// `None` when there is no file. A file that cannot be read or is not a version-1 sidecar is
/// moved aside (see [`move_aside`]) and the error names the file, the problem and where the
/// original now is. A sidecar of a newer version, and anything that is not a regular file, is
/// an error that leaves the file where it is.
pub fn load_with_warnings(path: &Path) -> Result<Option<(Sidecar, Vec<String>)>> {
    let problem = match read_bytes(path) {
        Ok(None) => return Ok(None),
        Ok(Some(bytes)) => match parse(&bytes) {
            Ok(mut sc) => {
                let warnings = validate(&mut sc);
                return Ok(Some((sc, warnings)));
            }
            Err(Unusable::Newer(p)) => return Err(Error::bad_file(path, format!("not read: {p}"))),
            Err(Unusable::Broken(p)) => p,
        },
        // Not a regular file, too large, or unreadable: named, and left where it is.
        Err(e) => return Err(e),
    };
    let fate = match move_aside(path) {
        Ok(to) => format!(
            "the file was moved to {} unchanged, so a new sidecar will not overwrite it",
            to.display()
        ),
        Err(e) => format!("it could not be moved aside ({e}); it is left in place"),
    };
    Err(Error::bad_file(
        path,
        format!("not a usable regions file: {problem}; {fate}"),
    ))
}

/// [`load_with_warnings`] without the warnings (regions are still clipped to the image).
pub fn load(path: &Path) -> Result<Option<Sidecar>> {
    Ok(load_with_warnings(path)?.map(|(sc, _)| sc))
}

/// The JSON text a sidecar is saved as (pretty, ending in a newline).
pub fn to_json(sc: &Sidecar) -> Result<String> {
    let mut s = serde_json::to_string_pretty(sc).map_err(|e| Error::Internal(e.to_string()))?;
    s.push('\n');
    Ok(s)
}

/// Save a sidecar atomically: written to a temporary file in the same folder, then renamed over
/// `path`, so a crash or a full disk leaves the previous file intact. A sidecar of a newer
/// schema version at `path` is never written over (a newer Mullion's work would be lost), nor
/// is anything that is not a regular file.
pub fn save(path: &Path, sc: &Sidecar) -> Result<()> {
    crate::io::check_writable_target(path)?;
    if let Ok(Some(bytes)) = crate::io::read_regular(path, MAX_SIDECAR_BYTES) {
        if let Some(v) = declared_version(&bytes).filter(|&v| v > VERSION as u64) {
            return Err(Error::bad_file(
                path,
                format!(
                    "holds a version-{v} sidecar written by a newer Mullion; this build \
                     (version {VERSION}) does not write over it"
                ),
            ));
        }
    }
    crate::io::write_text_atomic(path, &to_json(sc)?)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_sidecar_path_rules() {
        let img = Path::new("/data/trays/a.png");
        assert_eq!(
            sidecar_path(img, None),
            PathBuf::from("/data/trays/a.png.regions.json")
        );
        assert_eq!(
            sidecar_path(img, Some(Path::new("/proj"))),
            PathBuf::from("/proj/a.png.regions.json")
        );
    }

    #[test]
    fn labels_validate_reorders_clips_and_renumbers() {
        let mut sc = Sidecar::new("a.png", 10, 10);
        sc.regions.push(Region {
            id: 1,
            shape: Shape::Box {
                x0: 8.0,
                y0: 8.0,
                x1: 12.0,
                y1: 3.0,
            },
            label: "a".into(),
            note: String::new(),
        });
        sc.regions.push(Region {
            id: 1,
            shape: Shape::Box {
                x0: 1.0,
                y0: 1.0,
                x1: 2.0,
                y1: 2.0,
            },
            label: "b".into(),
            note: String::new(),
        });
        sc.regions.push(Region {
            id: 3,
            shape: Shape::Box {
                x0: 20.0,
                y0: 1.0,
                x1: 22.0,
                y1: 2.0,
            },
            label: "a".into(),
            note: String::new(),
        });
        let w = validate(&mut sc);
        assert_eq!(w.len(), 4, "{w:?}");
        assert_eq!(sc.regions.len(), 2);
        assert_eq!(
            sc.regions[0].shape,
            Shape::Box {
                x0: 8.0,
                y0: 3.0,
                x1: 10.0,
                y1: 8.0
            }
        );
        assert_ne!(sc.regions[1].id, 1);
        assert_eq!(sc.labels.len(), 2);
    }
}
