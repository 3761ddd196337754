//! Regions drawn on an image, their labels and free notes, and the sidecar file that stores them.
//!
//! A sidecar is a small JSON file (schema `mullion-regions`, version 1) kept next to the image as
//! `<image file name>.regions.json`, or in a project folder chosen by the user. Coordinates are
//! image pixels as f64, with the origin at the top-left corner of the top-left pixel, x to the
//! right and y down; a box `[x0, x1) x [y0, y1)` covers whole pixels when its corners are
//! integers.
//!
//! A sidecar that cannot be read is never overwritten: [`load`] moves it aside (byte for byte) and
//! says where, so the next save starts a fresh file without destroying the user's work.

use crate::error::{Error, Result};
use crate::scene::{CellClass, SceneLabels};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// Schema name written into every sidecar.
pub const SCHEMA: &str = "mullion-regions";
/// Version of the sidecar schema this build reads and writes.
pub const VERSION: u32 = 1;
/// Suffix appended to the image's file name to name its sidecar.
pub const SIDECAR_SUFFIX: &str = ".regions.json";

/// Eight label colours, chosen to stay apart from each other and from the viridis, magma and
/// cividis maps they are drawn over (no two share a hue family; lightness alternates).
pub const PALETTE: [[u8; 3]; 8] = [
    [255, 112, 40],  // orange
    [40, 200, 255],  // sky blue
    [235, 40, 150],  // magenta
    [150, 240, 60],  // lime
    [255, 230, 40],  // yellow
    [150, 90, 255],  // violet
    [255, 255, 255], // white
    [200, 30, 30],   // red
];

/// Plain names of the [`PALETTE`] colours, for captions.
pub const PALETTE_NAMES: [&str; 8] = [
    "orange", "sky blue", "magenta", "lime", "yellow", "violet", "white", "red",
];

/// A colour's palette name, or `#rrggbb` for a colour outside the palette.
pub fn colour_name(c: [u8; 3]) -> String {
    match PALETTE.iter().position(|&p| p == c) {
        Some(i) => PALETTE_NAMES[i].to_string(),
        None => format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2]),
    }
}

/// The geometry of a region, in image pixel coordinates.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum Shape {
    /// An axis-aligned box `[x0, x1) x [y0, y1)`.
    Box { x0: f64, y0: f64, x1: f64, y1: f64 },
    /// A closed polygon, vertices in order (either orientation); the last vertex connects back
    /// to the first. Edges may touch but should not cross: a crossing polygon is measured by
    /// its winding number, so loops of opposite orientation cancel.
    Polygon { points: Vec<[f64; 2]> },
}

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

/// `[x0, y0, x1, y1]`, the rectangle convention of this module.
pub type Rect = [f64; 4];

impl Shape {
    /// Bounding rectangle `[x0, y0, x1, y1]` (`None` for a polygon without vertices).
    pub fn bounds(&self) -> Option<Rect> {
        match self {
            Shape::Box { x0, y0, x1, y1 } => {
                Some([x0.min(*x1), y0.min(*y1), x0.max(*x1), y0.max(*y1)])
            }
            Shape::Polygon { points } => {
                let first = points.first()?;
                Some(
                    points
                        .iter()
                        .fold([first[0], first[1], first[0], first[1]], |b, p| {
                            [
                                b[0].min(p[0]),
                                b[1].min(p[1]),
                                b[2].max(p[0]),
                                b[3].max(p[1]),
                            ]
                        }),
                )
            }
        }
    }

    /// Area in square pixels (the absolute shoelace area for polygons).
    pub fn area(&self) -> f64 {
        match self {
            Shape::Box { x0, y0, x1, y1 } => (x1 - x0).abs() * (y1 - y0).abs(),
            Shape::Polygon { points } => shoelace(points).abs(),
        }
    }

    /// Area of the part of the shape inside `rect`.
    ///
    /// Boxes: the product of the overlaps per axis. Polygons: the polygon is clipped against the
    /// rectangle's four half-planes one after the other (Sutherland–Hodgman) and the result
    /// measured with the shoelace formula. The clipped ring may contain zero-width bridges along
    /// the rectangle's sides, but each clip step changes the ring only by loops lying wholly
    /// outside the kept half-plane, so the winding number of every point inside the rectangle is
    /// unchanged and every point outside has winding number 0. The signed area, the integral of
    /// the winding number, is therefore exactly that of polygon ∩ rectangle, for convex, concave
    /// and self-touching polygons alike.
    pub fn intersection_area(&self, rect: Rect) -> f64 {
        match self {
            Shape::Box { .. } => {
                let b = self.bounds().expect("a box has bounds");
                let w = (b[2].min(rect[2]) - b[0].max(rect[0])).max(0.0);
                let h = (b[3].min(rect[3]) - b[1].max(rect[1])).max(0.0);
                w * h
            }
            Shape::Polygon { points } => shoelace(&clip_ring(points, rect)).abs(),
        }
    }

    /// The shape cut to `rect`: a box stays a box, a polygon is clipped as in
    /// [`Shape::intersection_area`]. `None` when nothing of positive area is left.
    pub fn clipped(&self, rect: Rect) -> Option<Shape> {
        match self {
            Shape::Box { .. } => {
                let b = self.bounds()?;
                let c = [
                    b[0].max(rect[0]),
                    b[1].max(rect[1]),
                    b[2].min(rect[2]),
                    b[3].min(rect[3]),
                ];
                (c[2] > c[0] && c[3] > c[1]).then_some(Shape::Box {
                    x0: c[0],
                    y0: c[1],
                    x1: c[2],
                    y1: c[3],
                })
            }
            Shape::Polygon { points } => {
                let ring = clip_ring(points, rect);
                (ring.len() >= 3 && shoelace(&ring).abs() > 0.0)
                    .then_some(Shape::Polygon { points: ring })
            }
        }
    }

    fn kind_name(&self) -> &'static str {
        match self {
            Shape::Box { .. } => "box",
            Shape::Polygon { .. } => "polygon",
        }
    }
}

/// Signed shoelace area of a closed ring (positive when counter-clockwise in a y-up frame).
/// Coordinates are taken relative to the first vertex so large offsets lose no precision.
pub fn shoelace(points: &[[f64; 2]]) -> f64 {
    if points.len() < 3 {
        return 0.0;
    }
    let o = points[0];
    let mut twice = 0.0;
    for i in 1..points.len() - 1 {
        let (a, b) = (points[i], points[i + 1]);
        twice += (a[0] - o[0]) * (b[1] - o[1]) - (b[0] - o[0]) * (a[1] - o[1]);
    }
    twice / 2.0
}

/// Sutherland–Hodgman clipping of a closed ring against the rectangle `[x0, y0, x1, y1]`.
/// Vertices on a side count as inside; crossing points are computed from the edge's two ends.
pub fn clip_ring(points: &[[f64; 2]], rect: Rect) -> Vec<[f64; 2]> {
    // (axis, bound, keep values >= bound?)
    let planes = [
        (0usize, rect[0], true),
        (0, rect[2], false),
        (1, rect[1], true),
        (1, rect[3], false),
    ];
    let mut ring: Vec<[f64; 2]> = points.to_vec();
    for (axis, bound, keep_above) in planes {
        if ring.is_empty() {
            break;
        }
        let inside = |p: &[f64; 2]| {
            if keep_above {
                p[axis] >= bound
            } else {
                p[axis] <= bound
            }
        };
        let cross = |a: &[f64; 2], b: &[f64; 2]| {
            let t = (bound - a[axis]) / (b[axis] - a[axis]);
            let mut p = [a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1])];
            p[axis] = bound; // exactly on the side, whatever the rounding of t
            p
        };
        let mut out = Vec::with_capacity(ring.len() + 4);
        for i in 0..ring.len() {
            let cur = ring[i];
            let prev = ring[(i + ring.len() - 1) % ring.len()];
            match (inside(&prev), inside(&cur)) {
                (true, true) => out.push(cur),
                (true, false) => out.push(cross(&prev, &cur)),
                (false, true) => {
                    out.push(cross(&prev, &cur));
                    out.push(cur);
                }
                (false, false) => {}
            }
        }
        ring = out;
    }
    ring
}

/// Whether two closed-ring edges cross properly (touching at a point or overlapping along a
/// line does not count).
fn edges_cross(a: [f64; 2], b: [f64; 2], c: [f64; 2], d: [f64; 2]) -> bool {
    let orient = |p: [f64; 2], q: [f64; 2], r: [f64; 2]| {
        ((q[0] - p[0]) * (r[1] - p[1]) - (q[1] - p[1]) * (r[0] - p[0])).signum()
    };
    let (o1, o2) = (orient(a, b, c), orient(a, b, d));
    let (o3, o4) = (orient(c, d, a), orient(c, d, b));
    o1 * o2 < 0.0 && o3 * o4 < 0.0
}

/// Whether any two non-adjacent edges of the ring cross.
pub fn ring_crosses_itself(points: &[[f64; 2]]) -> bool {
    let n = points.len();
    if n < 4 {
        return false;
    }
    for i in 0..n {
        let (a, b) = (points[i], points[(i + 1) % n]);
        for j in i + 2..n {
            if i == 0 && j == n - 1 {
                continue; // adjacent through the closing edge
            }
            if edges_cross(a, b, points[j], points[(j + 1) % n]) {
                return true;
            }
        }
    }
    false
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

/// Why the bytes of a sidecar are not a sidecar this build can use, if they are not.
fn parse(bytes: &[u8]) -> std::result::Result<Sidecar, String> {
    let text = std::str::from_utf8(bytes).map_err(|e| format!("not UTF-8 text: {e}"))?;
    let value: serde_json::Value =
        serde_json::from_str(text).map_err(|e| format!("not valid JSON: {e}"))?;
    let obj = value
        .as_object()
        .ok_or("expected a JSON object at the top level")?;
    match obj.get("schema").and_then(|v| v.as_str()) {
        Some(SCHEMA) => {}
        Some(other) => return Err(format!("schema is '{other}', expected '{SCHEMA}'")),
        None => return Err(format!("no \"schema\": \"{SCHEMA}\" field")),
    }
    match obj.get("version").and_then(|v| v.as_u64()) {
        Some(v) if v == VERSION as u64 => {}
        Some(v) if v > VERSION as u64 => {
            return Err(format!(
                "schema version {v} is newer than this build reads (version {VERSION})"
            ))
        }
        Some(v) => return Err(format!("unknown schema version {v} (expected {VERSION})")),
        None => return Err("no whole-number \"version\" field".into()),
    }
    let sc: Sidecar = serde_json::from_value(value).map_err(|e| format!("{e}"))?;
    if sc.width == 0 || sc.height == 0 {
        return Err(format!(
            "image size {}x{} has a zero side",
            sc.width, sc.height
        ));
    }
    Ok(sc)
}

/// Read a sidecar, clip it to its image and return it with the warnings [`validate`] gave;
/// `None` when there is no file. A file that cannot be read or is not a version-1 sidecar is
/// moved aside (see [`move_aside`]) and the error names the file, the problem and where the
/// original now is.
pub fn load_with_warnings(path: &Path) -> Result<Option<(Sidecar, Vec<String>)>> {
    if path.is_dir() {
        // Someone else's folder of that name is not ours to move.
        return Err(Error::bad_file(path, "is a folder, not a regions file"));
    }
    let problem = match std::fs::read(path) {
        Ok(bytes) => match parse(&bytes) {
            Ok(mut sc) => {
                let warnings = validate(&mut sc);
                return Ok(Some((sc, warnings)));
            }
            Err(p) => p,
        },
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => format!("cannot read: {e}"),
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
/// `path`, so a crash or a full disk leaves the previous file intact.
pub fn save(path: &Path, sc: &Sidecar) -> Result<()> {
    let text = to_json(sc)?;
    crate::render::write_atomic(path, |tmp| {
        std::fs::write(tmp, text.as_bytes()).map_err(|e| Error::io(path, e))
    })
}

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
        save(&out, &sc)?;
        written.push(out);
    }
    Ok(written)
}

/// Undo and redo of region edits, as whole-sidecar snapshots (sidecars are small), at most
/// `cap` steps back.
#[derive(Clone, Debug)]
pub struct Edits {
    pub undo: Vec<Sidecar>,
    pub redo: Vec<Sidecar>,
    pub cap: usize,
}

impl Default for Edits {
    fn default() -> Self {
        Edits::new(200)
    }
}

impl Edits {
    /// An empty history keeping at most `cap` undo steps (at least one).
    pub fn new(cap: usize) -> Self {
        Edits {
            undo: Vec::new(),
            redo: Vec::new(),
            cap: cap.max(1),
        }
    }

    /// Remember `before` as the state to return to; call just before changing the sidecar.
    /// A new edit discards the redo steps.
    pub fn record(&mut self, before: &Sidecar) {
        self.undo.push(before.clone());
        if self.undo.len() > self.cap {
            let extra = self.undo.len() - self.cap;
            self.undo.drain(..extra);
        }
        self.redo.clear();
    }

    /// Apply `edit` to `current`, recording the previous state when it changed anything.
    /// Returns whether it did.
    pub fn apply(&mut self, current: &mut Sidecar, edit: impl FnOnce(&mut Sidecar)) -> bool {
        let before = current.clone();
        edit(current);
        if *current == before {
            return false;
        }
        self.record(&before);
        true
    }

    /// Step back one edit; whether there was one.
    pub fn undo(&mut self, current: &mut Sidecar) -> bool {
        match self.undo.pop() {
            Some(prev) => {
                self.redo.push(std::mem::replace(current, prev));
                true
            }
            None => false,
        }
    }

    /// Redo the last undone edit; whether there was one.
    pub fn redo(&mut self, current: &mut Sidecar) -> bool {
        match self.redo.pop() {
            Some(next) => {
                self.undo.push(std::mem::replace(current, next));
                true
            }
            None => false,
        }
    }

    pub fn can_undo(&self) -> bool {
        !self.undo.is_empty()
    }

    pub fn can_redo(&self) -> bool {
        !self.redo.is_empty()
    }

    /// Forget all steps (e.g. when another image is opened).
    pub fn clear(&mut self) {
        self.undo.clear();
        self.redo.clear();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn square(x0: f64, y0: f64, s: f64) -> Vec<[f64; 2]> {
        vec![[x0, y0], [x0 + s, y0], [x0 + s, y0 + s], [x0, y0 + s]]
    }

    #[test]
    fn labels_box_and_polygon_areas_agree() {
        let b = Shape::Box {
            x0: 1.0,
            y0: 2.0,
            x1: 5.0,
            y1: 4.0,
        };
        let p = Shape::Polygon {
            points: vec![[1.0, 2.0], [5.0, 2.0], [5.0, 4.0], [1.0, 4.0]],
        };
        for rect in [
            [0.0, 0.0, 3.0, 3.0],
            [2.0, 2.5, 10.0, 3.0],
            [6.0, 0.0, 7.0, 9.0],
        ] {
            assert!((b.intersection_area(rect) - p.intersection_area(rect)).abs() < 1e-12);
        }
        assert_eq!(b.area(), 8.0);
        assert_eq!(p.area(), 8.0);
    }

    #[test]
    fn labels_clip_keeps_orientation_independent_area() {
        let mut cw = square(0.0, 0.0, 4.0);
        cw.reverse();
        let s = Shape::Polygon { points: cw };
        assert_eq!(s.intersection_area([1.0, 1.0, 2.0, 9.0]), 3.0);
    }

    #[test]
    fn labels_crossing_detected() {
        let bowtie = vec![[0.0, 0.0], [2.0, 2.0], [2.0, 0.0], [0.0, 2.0]];
        assert!(ring_crosses_itself(&bowtie));
        assert!(!ring_crosses_itself(&square(0.0, 0.0, 1.0)));
        // Two triangles meeting at one vertex touch but do not cross.
        let touch = vec![
            [0.0, 0.0],
            [2.0, 0.0],
            [1.0, 1.0],
            [2.0, 2.0],
            [0.0, 2.0],
            [1.0, 1.0],
        ];
        assert!(!ring_crosses_itself(&touch));
    }

    #[test]
    fn labels_edits_undo_redo_and_cap() {
        let mut sc = Sidecar::new("a.png", 10, 10);
        let mut h = Edits::new(2);
        for i in 0..3 {
            assert!(h.apply(&mut sc, |s| {
                s.add_region(
                    Shape::Box {
                        x0: 0.0,
                        y0: 0.0,
                        x1: 1.0 + i as f64,
                        y1: 1.0,
                    },
                    "x",
                    "",
                );
            }));
        }
        assert!(!h.apply(&mut sc, |_| {}));
        assert_eq!(sc.regions.len(), 3);
        assert!(h.undo(&mut sc));
        assert!(h.undo(&mut sc));
        assert!(!h.undo(&mut sc), "the cap keeps two steps");
        assert_eq!(sc.regions.len(), 1);
        assert!(h.redo(&mut sc));
        assert_eq!(sc.regions.len(), 2);
        h.apply(&mut sc, |s| {
            s.pins.push(Pin {
                id: 99,
                at: [1.0, 1.0],
                text: "n".into(),
            })
        });
        assert!(!h.can_redo(), "a new edit drops the redo steps");
    }

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
