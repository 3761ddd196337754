//! Procedural demo images: top-down photographs of greenhouse seedling trays, with labels.
//!
//! The bundled sample images must be reproducible from source alone, so they are drawn here
//! from a seed rather than shipped as opaque binaries. Every labelled object (a tray cell and
//! its occupant, or a weed) carries a pixel bounding box, so the labels can be used directly as
//! regions when inspecting what the backbone responds to.
//!
//! Generation is single-threaded and uses only seeded generators and integer hashing, so the same
//! [`SceneSpec`] gives byte-identical output on the same build and platform.

use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use image::codecs::png::{CompressionType, FilterType, PngEncoder};
use image::{ExtendedColorType, ImageEncoder, RgbImage};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal};
use serde::{Deserialize, Serialize};

/// Schema name written into every `.cells.json` label file.
pub const LABELS_SCHEMA: &str = "mullion-scene-cells";
/// Version of the `.cells.json` label schema.
pub const LABELS_VERSION: u32 = 1;

/// What one tray cell holds (or, for weeds, what a weed region is).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum CellClass {
    /// Bare soil: nothing germinated.
    Empty,
    /// A green, upright seedling.
    Healthy,
    /// A seedling with small, curled, yellow-brown leaves.
    Wilted,
    /// A weed: thin serrated blades, lighter yellow-green.
    Weed,
}

impl CellClass {
    /// All classes, in label order.
    pub const ALL: [CellClass; 4] = [
        CellClass::Empty,
        CellClass::Healthy,
        CellClass::Wilted,
        CellClass::Weed,
    ];

    /// The lowercase name used in label files.
    pub fn name(self) -> &'static str {
        match self {
            CellClass::Empty => "empty",
            CellClass::Healthy => "healthy",
            CellClass::Wilted => "wilted",
            CellClass::Weed => "weed",
        }
    }
}

/// Everything that determines one generated image. Unset options take the defaults of
/// [`SceneSpec::default`], also when read from JSON.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct SceneSpec {
    /// File stem used by [`write_sample_set`].
    pub name: String,
    /// Image width in pixels (honoured exactly).
    pub width: u32,
    /// Image height in pixels (honoured exactly).
    pub height: u32,
    /// Seed for every random choice in the scene.
    pub seed: u64,
    /// Cell pitch in pixels; `None` picks one between 40 and 70 from the seed.
    pub cell_size: Option<f32>,
    /// Probability that a cell is bare soil.
    pub empty_rate: f32,
    /// Probability that a cell holds a wilted seedling.
    pub wilted_rate: f32,
    /// Probability that a cell holds a weed instead of a seedling.
    pub weed_rate: f32,
    /// Expected number of weeds growing on walls and rims, per visible cell.
    pub stray_weed_rate: f32,
    /// Strength of the directional light gradient and vignette (0 = flat).
    pub lighting: f32,
    /// Passes of a 3x3 binomial blur (0 = sharp).
    pub blur_passes: u32,
    /// Standard deviation of sensor noise before the blur, in 8-bit levels.
    pub noise: f32,
}

impl Default for SceneSpec {
    fn default() -> Self {
        SceneSpec {
            name: "scene".to_string(),
            width: 224,
            height: 224,
            seed: 0,
            cell_size: None,
            empty_rate: 0.16,
            wilted_rate: 0.16,
            weed_rate: 0.07,
            stray_weed_rate: 0.04,
            lighting: 1.0,
            blur_passes: 1,
            noise: 1.2,
        }
    }
}

impl SceneSpec {
    /// A spec with default options.
    pub fn new(name: impl Into<String>, width: u32, height: u32, seed: u64) -> Self {
        SceneSpec {
            name: name.into(),
            width,
            height,
            seed,
            ..SceneSpec::default()
        }
    }
}

/// One tray cell that is at least partly visible.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Cell {
    /// Row in the tray, counted from the top (may start outside the image for cropped trays).
    pub row: u32,
    /// Column in the tray, counted from the left.
    pub col: u32,
    /// The cell's soil opening `[x0, y0, x1, y1]` in pixels, clipped to the image.
    pub rect: [f32; 4],
    /// What the cell holds.
    pub class: CellClass,
}

/// One weed plant, inside a cell or growing between cells.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Weed {
    /// Centre of the plant in pixels.
    pub center: [f32; 2],
    /// Reach of the longest blade from the centre, in pixels.
    pub radius: f32,
    /// Bounding box of the drawn blades `[x0, y0, x1, y1]`, clipped to the image.
    pub rect: [f32; 4],
    /// `[row, col]` of the cell it grows in; `None` for weeds on walls or rims.
    pub cell: Option<[u32; 2]>,
}

/// A generated image and its labels.
#[derive(Clone, Debug, PartialEq)]
pub struct Scene {
    /// The picture.
    pub image: RgbImage,
    /// Every at least partly visible cell, row-major.
    pub cells: Vec<Cell>,
    /// Every weed whose centre is inside the image: those in cells (whose cell has class
    /// [`CellClass::Weed`]) and those between cells.
    pub weeds: Vec<Weed>,
}

/// The contents of a `<name>.cells.json` label file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SceneLabels {
    /// Always [`LABELS_SCHEMA`].
    pub schema: String,
    /// Always [`LABELS_VERSION`] for files written by this version.
    pub version: u32,
    /// File name of the image the labels belong to.
    pub image: String,
    /// Image width in pixels.
    pub width: u32,
    /// Image height in pixels.
    pub height: u32,
    /// Seed the image was generated from.
    pub seed: u64,
    /// The scene's cells.
    pub cells: Vec<Cell>,
    /// The scene's weeds.
    pub weeds: Vec<Weed>,
}

impl SceneLabels {
    /// Labels for `scene`, generated from `spec`, stored next to an image called `image`.
    pub fn new(spec: &SceneSpec, scene: &Scene, image: impl Into<String>) -> Self {
        SceneLabels {
            schema: LABELS_SCHEMA.to_string(),
            version: LABELS_VERSION,
            image: image.into(),
            width: scene.image.width(),
            height: scene.image.height(),
            seed: spec.seed,
            cells: scene.cells.clone(),
            weeds: scene.weeds.clone(),
        }
    }
}

/// Which labelled object covers the centre of pixel `(x, y)`.
///
/// Weeds between cells lie on top of everything else, so they win; otherwise the cell whose
/// opening contains the pixel gives the answer. Walls, rims and bench give `None`.
pub fn class_at(scene: &Scene, x: u32, y: u32) -> Option<CellClass> {
    let (px, py) = (x as f32 + 0.5, y as f32 + 0.5);
    for w in scene.weeds.iter().filter(|w| w.cell.is_none()) {
        let (dx, dy) = (px - w.center[0], py - w.center[1]);
        if dx * dx + dy * dy <= w.radius * w.radius {
            return Some(CellClass::Weed);
        }
    }
    scene
        .cells
        .iter()
        .find(|c| px >= c.rect[0] && px < c.rect[2] && py >= c.rect[1] && py < c.rect[3])
        .map(|c| c.class)
}

/// The eight bundled demo scenes, with fixed names and seeds.
pub fn sample_set() -> Vec<SceneSpec> {
    const SIZES: [(u32, u32, u64); 8] = [
        (333, 250, 0x3a91_c2e5),
        (500, 375, 0x1f07_4b9d),
        (97, 160, 0x6c5e_0a13),
        (640, 427, 0x24d8_f371),
        (224, 224, 0x51b3_9e0c),
        (224, 224, 0x0e6a_d458),
        (448, 320, 0x47f2_1cb6),
        (250, 333, 0x339d_6e27),
    ];
    SIZES
        .iter()
        .enumerate()
        .map(|(i, &(w, h, seed))| SceneSpec::new(format!("tray-{:02}-{w}x{h}", i + 1), w, h, seed))
        .collect()
}

/// Writes every scene of [`sample_set`] into `dir` as `<name>.png` plus `<name>.cells.json`,
/// each through a temporary file and a rename so readers never see half-written files.
/// Returns the written paths, image before labels, in sample order.
pub fn write_sample_set(dir: &Path) -> crate::Result<Vec<PathBuf>> {
    fs::create_dir_all(dir).map_err(|e| crate::Error::io(dir, e))?;
    let mut written = Vec::new();
    for spec in sample_set() {
        let scene = generate(&spec);
        let png_name = format!("{}.png", spec.name);
        let png_path = dir.join(&png_name);
        let png = encode_png(&scene.image).map_err(|e| crate::Error::io(&png_path, e))?;
        write_bytes(&png_path, &png)?;
        written.push(png_path);

        let labels = SceneLabels::new(&spec, &scene, png_name);
        let mut json = serde_json::to_vec_pretty(&labels)
            .map_err(|e| crate::Error::Internal(e.to_string()))?;
        json.push(b'\n');
        let json_path = dir.join(format!("{}.cells.json", spec.name));
        write_bytes(&json_path, &json)?;
        written.push(json_path);
    }
    Ok(written)
}

fn encode_png(image: &RgbImage) -> io::Result<Vec<u8>> {
    let mut bytes = Vec::new();
    PngEncoder::new_with_quality(&mut bytes, CompressionType::Best, FilterType::Adaptive)
        .write_image(
            image.as_raw(),
            image.width(),
            image.height(),
            ExtendedColorType::Rgb8,
        )
        .map_err(io::Error::other)?;
    Ok(bytes)
}

fn write_bytes(path: &Path, bytes: &[u8]) -> crate::Result<()> {
    crate::io::write_atomic(path, |tmp| {
        fs::write(tmp, bytes).map_err(|e| crate::Error::io(path, e))
    })
}

// ---------------------------------------------------------------------------------------------
// Generation
// ---------------------------------------------------------------------------------------------

/// Draws the scene described by `spec`. The image has exactly `spec.width` x `spec.height`
/// pixels; a zero dimension gives an empty image with no labels.
pub fn generate(spec: &SceneSpec) -> Scene {
    let (w, h) = (spec.width, spec.height);
    if w == 0 || h == 0 {
        return Scene {
            image: RgbImage::new(w, h),
            cells: Vec::new(),
            weeds: Vec::new(),
        };
    }
    // Separate streams per stage, so that changing e.g. the class rates does not reshuffle the
    // tray layout or the soil.
    let mut layout_rng = sub_rng(spec.seed, 1);
    let mut class_rng = sub_rng(spec.seed, 2);
    let mut plant_rng = sub_rng(spec.seed, 3);
    let mut look_rng = sub_rng(spec.seed, 4);

    let tray = Tray::new(spec, &mut layout_rng);
    let look = Look::new(spec, &mut look_rng);
    let mut canvas = Canvas::new(w as usize, h as usize);

    let classes = assign_classes(spec, &tray, &mut class_rng);
    let soil: Vec<CellSoil> = (0..tray.rows * tray.cols)
        .map(|_| CellSoil {
            moisture: look_rng.gen_range(0.82..1.12),
            depth: look_rng.gen_range(0.08..0.14) * tray.pitch,
        })
        .collect();

    draw_base(&mut canvas, &tray, &look, &soil);
    draw_debris(&mut canvas, &tray, &look, &mut look_rng);

    let mut weeds = Vec::new();
    for row in 0..tray.rows {
        for col in 0..tray.cols {
            let class = classes[(row * tray.cols + col) as usize];
            let (cx, cy) = tray.cell_center(row, col);
            let reach = 0.6 * tray.pitch;
            let visible = cx + reach > 0.0
                && cy + reach > 0.0
                && cx - reach < w as f32
                && cy - reach < h as f32;
            if !visible {
                continue;
            }
            let p = tray.pitch;
            let center = [
                cx + plant_rng.gen_range(-0.06..0.06) * p,
                cy + plant_rng.gen_range(-0.06..0.06) * p,
            ];
            let leaves = match class {
                CellClass::Empty => {
                    if plant_rng.gen_bool(0.5) {
                        draw_dimple(&mut canvas, center, p);
                    }
                    Vec::new()
                }
                CellClass::Healthy => healthy_plant(center, p, &mut plant_rng),
                CellClass::Wilted => wilted_plant(center, p, &mut plant_rng),
                CellClass::Weed => {
                    weed_plant(center, p * plant_rng.gen_range(0.3..0.42), &mut plant_rng)
                }
            };
            draw_plant(&mut canvas, &leaves, &look, p);
            if class == CellClass::Weed && inside(center, w, h) {
                weeds.push(weed_record(center, &leaves, w, h, Some([row, col])));
            }
        }
    }

    let cells = visible_cells(&tray, &classes, w, h);
    let expected = cells.len() as f32 * spec.stray_weed_rate.max(0.0);
    let strays = expected.floor() as u32 + u32::from(plant_rng.gen::<f32>() < expected.fract());
    for _ in 0..strays {
        let center = tray.stray_spot(&mut plant_rng);
        let leaves = weed_plant(
            center,
            tray.pitch * plant_rng.gen_range(0.3..0.5),
            &mut plant_rng,
        );
        draw_plant(&mut canvas, &leaves, &look, tray.pitch);
        if inside(center, w, h) {
            weeds.push(weed_record(center, &leaves, w, h, None));
        }
    }

    apply_lighting(&mut canvas, &look, spec.lighting);
    // Grain goes in before the blur, as in a camera, where the optics soften sensor noise too.
    canvas.add_noise(spec.noise, &mut look_rng);
    for _ in 0..spec.blur_passes {
        canvas.blur();
    }
    let image = canvas.into_image();
    Scene {
        image,
        cells,
        weeds,
    }
}

fn sub_rng(seed: u64, stream: u64) -> StdRng {
    StdRng::seed_from_u64(splitmix(seed ^ splitmix(stream)))
}

fn splitmix(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

fn inside(p: [f32; 2], w: u32, h: u32) -> bool {
    p[0] >= 0.0 && p[1] >= 0.0 && p[0] < w as f32 && p[1] < h as f32
}

fn round2(v: f32) -> f32 {
    (v * 100.0).round() / 100.0
}

fn clip_rect(r: [f32; 4], w: u32, h: u32) -> [f32; 4] {
    [
        round2(r[0].clamp(0.0, w as f32)),
        round2(r[1].clamp(0.0, h as f32)),
        round2(r[2].clamp(0.0, w as f32)),
        round2(r[3].clamp(0.0, h as f32)),
    ]
}

/// Tray geometry. The grid origin is the top-left corner of cell (0, 0)'s pitch square; the rim
/// surrounds the grid. Either axis may overflow the image, as in a close-up photo.
struct Tray {
    pitch: f32,
    origin: [f32; 2],
    cols: u32,
    rows: u32,
    rim: f32,
    wall: f32,
    corner: f32,
}

impl Tray {
    fn new(spec: &SceneSpec, rng: &mut StdRng) -> Tray {
        let (w, h) = (spec.width as f32, spec.height as f32);
        let hi = (w.min(h) / 2.0).clamp(40.0, 70.0);
        let pitch = match spec.cell_size {
            Some(p) if p.is_finite() && p >= 8.0 => p,
            _ if hi > 40.5 => rng.gen_range(40.0..hi),
            _ => 40.0,
        };
        let rim = 0.3 * pitch;
        let (ox, cols) = Self::axis(w, pitch, rim, rng);
        let (oy, rows) = Self::axis(h, pitch, rim, rng);
        Tray {
            pitch,
            origin: [ox, oy],
            cols,
            rows,
            rim,
            wall: (0.09 * pitch).max(2.5),
            corner: 0.16 * pitch,
        }
    }

    /// Places the grid along one axis of `len` pixels: returns the grid origin and cell count.
    fn axis(len: f32, pitch: f32, rim: f32, rng: &mut StdRng) -> (f32, u32) {
        let fit = ((len - 2.0 * rim - 2.0) / pitch).floor();
        if fit >= 2.0 && rng.gen_bool(0.65) {
            let n = if fit > 3.0 && rng.gen_bool(0.3) {
                fit - 1.0
            } else {
                fit
            };
            let spare = len - n * pitch - 2.0 * rim;
            (rim + rng.gen_range(0.0..spare.max(0.01)), n as u32)
        } else {
            // Cropped: the tray runs off at least one side of the picture.
            let start = if rng.gen_bool(0.35) {
                rng.gen_range(0.2 * rim..rim + 0.3 * pitch)
            } else {
                -rng.gen_range(0.1..0.9) * pitch
            };
            let n = ((len - start) / pitch).ceil().max(1.0);
            (start, n as u32)
        }
    }

    fn cell_center(&self, row: u32, col: u32) -> (f32, f32) {
        (
            self.origin[0] + (col as f32 + 0.5) * self.pitch,
            self.origin[1] + (row as f32 + 0.5) * self.pitch,
        )
    }

    fn half_opening(&self) -> f32 {
        0.5 * (self.pitch - self.wall)
    }

    fn grid_size(&self) -> [f32; 2] {
        [self.cols as f32 * self.pitch, self.rows as f32 * self.pitch]
    }

    /// The tray's outer edge as `[x0, y0, x1, y1]`.
    fn outer(&self) -> [f32; 4] {
        let [gw, gh] = self.grid_size();
        [
            self.origin[0] - self.rim,
            self.origin[1] - self.rim,
            self.origin[0] + gw + self.rim,
            self.origin[1] + gh + self.rim,
        ]
    }

    /// A spot on a wall crossing or on the rim, where stray weeds take root.
    fn stray_spot(&self, rng: &mut StdRng) -> [f32; 2] {
        let p = self.pitch;
        let jitter = |rng: &mut StdRng| rng.gen_range(-0.08..0.08) * p;
        if self.cols > 1 && self.rows > 1 && rng.gen_bool(0.75) {
            let i = rng.gen_range(1..self.cols) as f32;
            let j = rng.gen_range(1..self.rows) as f32;
            [
                self.origin[0] + i * p + jitter(rng),
                self.origin[1] + j * p + jitter(rng),
            ]
        } else {
            let [gw, gh] = self.grid_size();
            let along = rng.gen::<f32>();
            let off = -0.5 * self.rim + jitter(rng);
            match rng.gen_range(0..4) {
                0 => [self.origin[0] + along * gw, self.origin[1] + off],
                1 => [self.origin[0] + along * gw, self.origin[1] + gh - off],
                2 => [self.origin[0] + off, self.origin[1] + along * gh],
                _ => [self.origin[0] + gw - off, self.origin[1] + along * gh],
            }
        }
    }
}

/// Per-image appearance choices.
struct Look {
    noise_seed: u32,
    light: [f32; 2],
    exposure: f32,
    tint: [f32; 3],
    soil: [f32; 3],
    plastic: [f32; 3],
    bench: Bench,
}

#[derive(Clone, Copy)]
enum Bench {
    Concrete([f32; 3]),
    Wood { color: [f32; 3], slat: f32 },
}

impl Look {
    fn new(spec: &SceneSpec, rng: &mut StdRng) -> Look {
        let angle: f32 = rng.gen_range(0.0..std::f32::consts::TAU);
        let warm: f32 = rng.gen_range(-1.0..1.0) * 0.04;
        let soil = match rng.gen_range(0..3) {
            0 => [0.30, 0.21, 0.14],
            1 => [0.27, 0.20, 0.15],
            _ => [0.33, 0.22, 0.13],
        };
        let plastic = match rng.gen_range(0..10) {
            0..=6 => [0.075, 0.075, 0.085],
            7 | 8 => [0.19, 0.19, 0.2],
            _ => [0.07, 0.14, 0.09],
        };
        let bench = if rng.gen_bool(0.5) {
            Bench::Concrete([0.56, 0.55, 0.52])
        } else {
            Bench::Wood {
                color: [0.6, 0.44, 0.28],
                slat: rng.gen_range(30.0..55.0),
            }
        };
        Look {
            noise_seed: (splitmix(spec.seed ^ 0x0a11_ce55) >> 32) as u32,
            light: [angle.cos(), angle.sin()],
            exposure: rng.gen_range(0.95..1.08),
            tint: [1.0 + warm, 1.0, 1.0 - warm],
            soil,
            plastic,
            bench,
        }
    }
}

struct CellSoil {
    moisture: f32,
    depth: f32,
}

fn assign_classes(spec: &SceneSpec, tray: &Tray, rng: &mut StdRng) -> Vec<CellClass> {
    let n = (tray.rows * tray.cols) as usize;
    let mut classes: Vec<CellClass> = (0..n)
        .map(|_| {
            let r: f32 = rng.gen();
            if r < spec.empty_rate {
                CellClass::Empty
            } else if r < spec.empty_rate + spec.wilted_rate {
                CellClass::Wilted
            } else if r < spec.empty_rate + spec.wilted_rate + spec.weed_rate {
                CellClass::Weed
            } else {
                CellClass::Healthy
            }
        })
        .collect();
    // A demo tray with enough visible cells should show every class; the rates alone leave that
    // to chance on small images.
    let (w, h) = (spec.width as f32, spec.height as f32);
    let hs = tray.half_opening();
    let mostly_visible: Vec<usize> = (0..n)
        .filter(|&i| {
            let (cx, cy) = tray.cell_center(i as u32 / tray.cols, i as u32 % tray.cols);
            cx - hs >= 0.0 && cy - hs >= 0.0 && cx + hs <= w && cy + hs <= h
        })
        .collect();
    let enabled = [
        spec.empty_rate > 0.0,
        true,
        spec.wilted_rate > 0.0,
        spec.weed_rate > 0.0,
    ];
    if mostly_visible.len() >= 8 {
        for (class, on) in CellClass::ALL.into_iter().zip(enabled) {
            if !on || mostly_visible.iter().any(|&i| classes[i] == class) {
                continue;
            }
            let healthy: Vec<usize> = mostly_visible
                .iter()
                .copied()
                .filter(|&i| classes[i] == CellClass::Healthy)
                .collect();
            if !healthy.is_empty() {
                classes[healthy[rng.gen_range(0..healthy.len())]] = class;
            }
        }
    }
    classes
}

fn visible_cells(tray: &Tray, classes: &[CellClass], w: u32, h: u32) -> Vec<Cell> {
    let hs = tray.half_opening();
    let mut cells = Vec::new();
    for row in 0..tray.rows {
        for col in 0..tray.cols {
            let (cx, cy) = tray.cell_center(row, col);
            let rect = clip_rect([cx - hs, cy - hs, cx + hs, cy + hs], w, h);
            if rect[2] - rect[0] >= 1.0 && rect[3] - rect[1] >= 1.0 {
                cells.push(Cell {
                    row,
                    col,
                    rect,
                    class: classes[(row * tray.cols + col) as usize],
                });
            }
        }
    }
    cells
}

// ---------------------------------------------------------------------------------------------
// Noise
// ---------------------------------------------------------------------------------------------

fn hash2(ix: i32, iy: i32, seed: u32) -> u32 {
    let mut h = (ix as u32).wrapping_mul(0x27d4_eb2d)
        ^ (iy as u32).wrapping_mul(0x1656_67b1)
        ^ seed.wrapping_mul(0x9e37_79b9);
    h ^= h >> 15;
    h = h.wrapping_mul(0x85eb_ca6b);
    h ^= h >> 13;
    h = h.wrapping_mul(0xc2b2_ae35);
    h ^ (h >> 16)
}

fn lattice(ix: i32, iy: i32, seed: u32) -> f32 {
    (hash2(ix, iy, seed) >> 8) as f32 / (1u32 << 24) as f32
}

/// Smoothly interpolated lattice noise in [0, 1).
fn value_noise(x: f32, y: f32, seed: u32) -> f32 {
    let (x0, y0) = (x.floor(), y.floor());
    let (fx, fy) = (x - x0, y - y0);
    let (sx, sy) = (fx * fx * (3.0 - 2.0 * fx), fy * fy * (3.0 - 2.0 * fy));
    let (ix, iy) = (x0 as i32, y0 as i32);
    let a = lattice(ix, iy, seed);
    let b = lattice(ix + 1, iy, seed);
    let c = lattice(ix, iy + 1, seed);
    let d = lattice(ix + 1, iy + 1, seed);
    let top = a + (b - a) * sx;
    let bottom = c + (d - c) * sx;
    top + (bottom - top) * sy
}

/// Fractal sum of `octaves` noise layers, normalised to [0, 1).
fn fbm(x: f32, y: f32, seed: u32, octaves: u32) -> f32 {
    let (mut sum, mut amp, mut freq, mut norm) = (0.0, 0.5, 1.0, 0.0);
    for o in 0..octaves {
        sum += amp * value_noise(x * freq, y * freq, seed.wrapping_add(o * 0x51ed));
        norm += amp;
        amp *= 0.5;
        freq *= 2.03;
    }
    sum / norm
}

fn smoothstep(e0: f32, e1: f32, x: f32) -> f32 {
    let t = ((x - e0) / (e1 - e0)).clamp(0.0, 1.0);
    t * t * (3.0 - 2.0 * t)
}

fn mul(c: [f32; 3], f: f32) -> [f32; 3] {
    [c[0] * f, c[1] * f, c[2] * f]
}

fn lerp3(a: [f32; 3], b: [f32; 3], t: f32) -> [f32; 3] {
    [
        a[0] + (b[0] - a[0]) * t,
        a[1] + (b[1] - a[1]) * t,
        a[2] + (b[2] - a[2]) * t,
    ]
}

/// HSV to RGB, hue in degrees.
fn hsv(h: f32, s: f32, v: f32) -> [f32; 3] {
    let h = h.rem_euclid(360.0) / 60.0;
    let c = v * s;
    let x = c * (1.0 - ((h % 2.0) - 1.0).abs());
    let m = v - c;
    let (r, g, b) = match h as u32 {
        0 => (c, x, 0.0),
        1 => (x, c, 0.0),
        2 => (0.0, c, x),
        3 => (0.0, x, c),
        4 => (x, 0.0, c),
        _ => (c, 0.0, x),
    };
    [r + m, g + m, b + m]
}

/// Signed distance to a rounded square of half-size `hs` and corner radius `r`.
fn rounded_square_sdf(x: f32, y: f32, hs: f32, r: f32) -> f32 {
    let qx = x.abs() - hs + r;
    let qy = y.abs() - hs + r;
    let outside = (qx.max(0.0).powi(2) + qy.max(0.0).powi(2)).sqrt();
    outside + qx.max(qy).min(0.0) - r
}

fn rect_sdf(x: f32, y: f32, r: [f32; 4]) -> f32 {
    let cx = 0.5 * (r[0] + r[2]);
    let cy = 0.5 * (r[1] + r[3]);
    let qx = (x - cx).abs() - 0.5 * (r[2] - r[0]);
    let qy = (y - cy).abs() - 0.5 * (r[3] - r[1]);
    (qx.max(0.0).powi(2) + qy.max(0.0).powi(2)).sqrt() + qx.max(qy).min(0.0)
}

// ---------------------------------------------------------------------------------------------
// Canvas
// ---------------------------------------------------------------------------------------------

struct Canvas {
    w: usize,
    h: usize,
    px: Vec<[f32; 3]>,
}

impl Canvas {
    fn new(w: usize, h: usize) -> Canvas {
        Canvas {
            w,
            h,
            px: vec![[0.0; 3]; w * h],
        }
    }

    /// Pixel index range covering `[x0, x1) x [y0, y1)` in continuous coordinates, clipped.
    fn span(&self, x0: f32, y0: f32, x1: f32, y1: f32) -> Option<(usize, usize, usize, usize)> {
        let xa = x0.floor().max(0.0) as usize;
        let ya = y0.floor().max(0.0) as usize;
        let xb = (x1.ceil().max(0.0) as usize).min(self.w);
        let yb = (y1.ceil().max(0.0) as usize).min(self.h);
        (xa < xb && ya < yb).then_some((xa, ya, xb, yb))
    }

    fn blend(&mut self, x: usize, y: usize, c: [f32; 3], a: f32) {
        let p = &mut self.px[y * self.w + x];
        for k in 0..3 {
            p[k] += (c[k] - p[k]) * a;
        }
    }

    fn darken(&mut self, x: usize, y: usize, f: f32) {
        let p = &mut self.px[y * self.w + x];
        for v in p.iter_mut() {
            *v *= f;
        }
    }

    /// Soft disc, used for perlite, crumbs and dimples.
    fn disc(&mut self, c: [f32; 2], r: f32, color: [f32; 3], alpha: f32) {
        let Some((xa, ya, xb, yb)) = self.span(
            c[0] - r - 1.0,
            c[1] - r - 1.0,
            c[0] + r + 1.0,
            c[1] + r + 1.0,
        ) else {
            return;
        };
        for y in ya..yb {
            for x in xa..xb {
                let d = ((x as f32 + 0.5 - c[0]).powi(2) + (y as f32 + 0.5 - c[1]).powi(2)).sqrt();
                let a = (r - d + 0.5).clamp(0.0, 1.0) * alpha;
                if a > 0.0 {
                    self.blend(x, y, color, a);
                }
            }
        }
    }

    /// One pass of a separable [1 2 1] / 4 blur, edges clamped.
    fn blur(&mut self) {
        let (w, h) = (self.w, self.h);
        let mut tmp = vec![[0.0f32; 3]; w * h];
        for y in 0..h {
            for x in 0..w {
                let l = self.px[y * w + x.saturating_sub(1)];
                let c = self.px[y * w + x];
                let r = self.px[y * w + (x + 1).min(w - 1)];
                for k in 0..3 {
                    tmp[y * w + x][k] = 0.25 * l[k] + 0.5 * c[k] + 0.25 * r[k];
                }
            }
        }
        for y in 0..h {
            for x in 0..w {
                let u = tmp[y.saturating_sub(1) * w + x];
                let c = tmp[y * w + x];
                let d = tmp[(y + 1).min(h - 1) * w + x];
                for k in 0..3 {
                    self.px[y * w + x][k] = 0.25 * u[k] + 0.5 * c[k] + 0.25 * d[k];
                }
            }
        }
    }

    /// Adds gaussian grain with standard deviation `levels` / 255.
    fn add_noise(&mut self, levels: f32, rng: &mut StdRng) {
        if !(levels > 0.0 && levels.is_finite()) {
            return;
        }
        let normal = Normal::new(0.0f32, levels / 255.0).expect("finite noise level");
        for p in self.px.iter_mut() {
            for v in p.iter_mut() {
                *v += normal.sample(rng);
            }
        }
    }

    fn into_image(self) -> RgbImage {
        let mut raw = Vec::with_capacity(self.w * self.h * 3);
        for p in &self.px {
            for &v in p {
                raw.push((v * 255.0).round().clamp(0.0, 255.0) as u8);
            }
        }
        RgbImage::from_raw(self.w as u32, self.h as u32, raw).expect("buffer matches size")
    }
}

// ---------------------------------------------------------------------------------------------
// Tray, soil and bench
// ---------------------------------------------------------------------------------------------

fn draw_base(canvas: &mut Canvas, tray: &Tray, look: &Look, soil: &[CellSoil]) {
    let outer = tray.outer();
    let [gw, gh] = tray.grid_size();
    let p = tray.pitch;
    let hs = tray.half_opening();
    let [lx, ly] = look.light;
    for y in 0..canvas.h {
        for x in 0..canvas.w {
            let (fx, fy) = (x as f32 + 0.5, y as f32 + 0.5);
            let sd_outer = rect_sdf(fx, fy, outer);
            let tray_cov = (0.5 - sd_outer).clamp(0.0, 1.0);
            let mut color = [0.0; 3];
            if tray_cov < 1.0 {
                let bench = bench_color(look, fx, fy);
                // The tray stands on the bench, so it shades the bench on the side away from
                // the light.
                let sd_shadow = rect_sdf(fx + lx * 0.18 * p, fy + ly * 0.18 * p, outer);
                let shade = 1.0 - 0.5 * (1.0 - smoothstep(-4.0, 8.0, sd_shadow));
                color = mul(bench, shade);
            }
            if tray_cov > 0.0 {
                let gx = fx - tray.origin[0];
                let gy = fy - tray.origin[1];
                let tray_color = if gx >= 0.0 && gy >= 0.0 && gx < gw && gy < gh {
                    let col = ((gx / p) as u32).min(tray.cols - 1);
                    let row = ((gy / p) as u32).min(tray.rows - 1);
                    let ux = gx - (col as f32 + 0.5) * p;
                    let uy = gy - (row as f32 + 0.5) * p;
                    let sd = rounded_square_sdf(ux, uy, hs, tray.corner);
                    let soil_cov = (0.5 - sd).clamp(0.0, 1.0);
                    let mut c = [0.0; 3];
                    if soil_cov < 1.0 {
                        // Wall tops are thin ridges that catch the light.
                        let ridge = 1.0 - ((sd - 0.5 * tray.wall).abs() / (0.5 * tray.wall));
                        let ridge = ridge.clamp(0.0, 1.0).powi(2);
                        c = mul(plastic_color(look, fx, fy), 0.8 + 0.9 * ridge);
                    }
                    if soil_cov > 0.0 {
                        let cs = &soil[(row * tray.cols + col) as usize];
                        let s = soil_color(look, fx, fy, p);
                        // Soil sits below the wall tops: darker near the walls, and in the
                        // wall's shadow on the side facing the light.
                        let ao = 1.0 - 0.55 * (sd.min(0.0) / cs.depth).exp();
                        let sd_light = rounded_square_sdf(
                            ux + lx * 0.12 * p,
                            uy + ly * 0.12 * p,
                            hs,
                            tray.corner,
                        );
                        let shadow = 1.0 - 0.35 * smoothstep(-0.04 * p, 0.04 * p, sd_light);
                        let s = mul(s, cs.moisture * ao * shadow);
                        c = lerp3(c, s, soil_cov);
                    }
                    c
                } else {
                    rim_color(look, fx, fy, tray, sd_outer)
                };
                color = lerp3(color, tray_color, tray_cov);
            }
            canvas.px[y * canvas.w + x] = color;
        }
    }
}

fn soil_color(look: &Look, x: f32, y: f32, pitch: f32) -> [f32; 3] {
    let seed = look.noise_seed;
    let [lx, ly] = look.light;
    let crumb = fbm(x / 5.0, y / 5.0, seed, 3);
    // Sampling the height field towards the light gives the crumbs a lit and a shaded side.
    let crumb_lit = fbm((x + 1.3 * lx) / 5.0, (y + 1.3 * ly) / 5.0, seed, 3);
    let relief = 1.0 + 2.8 * (crumb_lit - crumb);
    let patch = value_noise(x / (0.6 * pitch), y / (0.6 * pitch), seed ^ 0x77);
    let fine = value_noise(x / 1.3, y / 1.3, seed ^ 0x1234);
    let f = (0.55 + 0.8 * crumb) * relief * (0.88 + 0.24 * patch) * (0.96 + 0.08 * fine);
    let base = look.soil;
    [base[0] * f, base[1] * f, base[2] * f * (0.95 + 0.1 * patch)]
}

fn plastic_color(look: &Look, x: f32, y: f32) -> [f32; 3] {
    let n = value_noise(x / 3.0, y / 3.0, look.noise_seed ^ 0x5151);
    mul(look.plastic, 0.9 + 0.2 * n)
}

fn rim_color(look: &Look, x: f32, y: f32, tray: &Tray, sd_outer: f32) -> [f32; 3] {
    // sd_outer is negative on the rim; -depth is the distance in from the outer edge.
    let depth = -sd_outer / tray.rim;
    let lip = (-((depth - 0.15) / 0.07).powi(2)).exp();
    let groove = (-((depth - 0.72) / 0.06).powi(2)).exp();
    let scuff = fbm(x / 14.0, y / 14.0, look.noise_seed ^ 0x3c3c, 2);
    mul(
        plastic_color(look, x, y),
        (0.9 + 0.25 * scuff) * (1.0 + 1.4 * lip) * (1.0 - 0.35 * groove),
    )
}

fn bench_color(look: &Look, x: f32, y: f32) -> [f32; 3] {
    let seed = look.noise_seed ^ 0xbe4c;
    match look.bench {
        Bench::Concrete(c) => {
            let big = fbm(x / 40.0, y / 40.0, seed, 3);
            let grit = value_noise(x / 1.5, y / 1.5, seed ^ 9);
            let pit = if lattice(x as i32 / 2, y as i32 / 2, seed ^ 3) > 0.985 {
                0.7
            } else {
                1.0
            };
            mul(c, (0.78 + 0.4 * big) * (0.93 + 0.14 * grit) * pit)
        }
        Bench::Wood { color, slat } => {
            let pos = y / slat;
            let within = pos.fract();
            let gap = smoothstep(0.0, 0.04, within) * smoothstep(1.0, 0.96, within);
            let board = lattice(pos.floor() as i32, 7, seed);
            let grain = fbm(x / 60.0, y / 1.8, seed ^ (pos.floor() as u32), 3);
            let tone = 0.8 + 0.25 * board;
            mul(color, tone * (0.75 + 0.45 * grain) * (0.2 + 0.8 * gap))
        }
    }
}

/// Perlite and vermiculite specks in the soil, and crumbs of spilled mix on walls and rims.
fn draw_debris(canvas: &mut Canvas, tray: &Tray, look: &Look, rng: &mut StdRng) {
    let p = tray.pitch;
    let hs = tray.half_opening() - 1.5;
    let area = (2.0 * hs) * (2.0 * hs);
    for row in 0..tray.rows {
        for col in 0..tray.cols {
            let (cx, cy) = tray.cell_center(row, col);
            if cx + p < 0.0 || cy + p < 0.0 || cx - p > canvas.w as f32 || cy - p > canvas.h as f32
            {
                continue;
            }
            let specks = (area * rng.gen_range(0.003..0.007)) as u32;
            for _ in 0..specks {
                let (ux, uy) = (rng.gen_range(-hs..hs), rng.gen_range(-hs..hs));
                if rounded_square_sdf(ux, uy, hs, tray.corner) > 0.0 {
                    continue;
                }
                let color = if rng.gen_bool(0.8) {
                    mul([0.86, 0.85, 0.8], rng.gen_range(0.75..1.0))
                } else {
                    mul([0.62, 0.5, 0.3], rng.gen_range(0.7..1.0))
                };
                let r = rng.gen_range(0.5..1.3);
                canvas.disc([cx + ux, cy + uy], r, color, rng.gen_range(0.6..0.95));
            }
        }
    }
    let outer = tray.outer();
    let tray_area = (outer[2] - outer[0]) * (outer[3] - outer[1]);
    let crumbs = (tray_area * 0.0006) as u32;
    for _ in 0..crumbs {
        let c = [
            rng.gen_range(outer[0]..outer[2]),
            rng.gen_range(outer[1]..outer[3]),
        ];
        let color = mul(look.soil, rng.gen_range(0.6..1.1));
        canvas.disc(c, rng.gen_range(0.6..1.6), color, 0.9);
    }
}

/// The dibbled sowing hole left in a cell where nothing came up.
fn draw_dimple(canvas: &mut Canvas, c: [f32; 2], pitch: f32) {
    canvas.disc(c, 0.05 * pitch + 1.0, [0.1, 0.07, 0.05], 0.45);
}

// ---------------------------------------------------------------------------------------------
// Plants
// ---------------------------------------------------------------------------------------------

#[derive(Clone, Copy)]
enum Profile {
    /// Ovate leaf, widest before the middle, rounded tip.
    Ovate,
    /// Seed leaf: blunter and more symmetric.
    Cotyledon,
    /// Narrow blade with backward-pointing teeth, sharp tip.
    Blade { teeth: f32 },
}

#[derive(Clone, Copy)]
struct Leaf {
    base: [f32; 2],
    angle: f32,
    length: f32,
    /// Maximum half-width.
    width: f32,
    /// Sideways bend of the tip, as a fraction of the length.
    bend: f32,
    profile: Profile,
    base_color: [f32; 3],
    tip_color: [f32; 3],
    vein: f32,
    /// Amount of dark necrotic spotting.
    spots: f32,
    spot_seed: u32,
}

impl Leaf {
    fn half_width(&self, t: f32) -> f32 {
        if !(0.0..=1.0).contains(&t) {
            return 0.0;
        }
        let shape = match self.profile {
            Profile::Ovate => beta_shape(t, 0.55, 0.8),
            Profile::Cotyledon => beta_shape(t, 0.6, 0.5),
            Profile::Blade { teeth } => {
                let tooth = 0.6 + 0.4 * (t * teeth).fract();
                (t * 7.0).min(1.0) * (1.0 - t).powf(0.9) * tooth
            }
        };
        shape * self.width
    }

    /// Coverage, position along the leaf and relative offset across it at point (x, y),
    /// with edges softened over `soft` pixels.
    fn sample(&self, x: f32, y: f32, soft: f32) -> Option<(f32, f32, f32)> {
        let (s, c) = self.angle.sin_cos();
        let dx = x - self.base[0];
        let dy = y - self.base[1];
        let u = dx * c + dy * s;
        let v = -dx * s + dy * c;
        let t = u / self.length;
        if !(-0.02..=1.02).contains(&t) {
            return None;
        }
        let vc = v - self.bend * self.length * t * t;
        let half = self.half_width(t.clamp(0.0, 1.0));
        let cov = ((half - vc.abs()) / soft + 0.5).clamp(0.0, 1.0);
        let across = if half > 0.0 {
            (vc / half).clamp(-1.0, 1.0)
        } else {
            0.0
        };
        (cov > 0.0).then_some((cov, t, across))
    }

    fn bounds(&self, pad: f32) -> [f32; 4] {
        let (s, c) = self.angle.sin_cos();
        let tip = [
            self.base[0] + c * self.length,
            self.base[1] + s * self.length,
        ];
        let off = self.bend * self.length;
        let bent = [tip[0] - s * off, tip[1] + c * off];
        let pad = pad + self.width;
        let xs = [self.base[0], tip[0], bent[0]];
        let ys = [self.base[1], tip[1], bent[1]];
        [
            xs.iter().cloned().fold(f32::INFINITY, f32::min) - pad,
            ys.iter().cloned().fold(f32::INFINITY, f32::min) - pad,
            xs.iter().cloned().fold(f32::NEG_INFINITY, f32::max) + pad,
            ys.iter().cloned().fold(f32::NEG_INFINITY, f32::max) + pad,
        ]
    }
}

fn beta_shape(t: f32, a: f32, b: f32) -> f32 {
    let peak = a / (a + b);
    t.powf(a) * (1.0 - t).powf(b) / (peak.powf(a) * (1.0 - peak).powf(b))
}

/// Draws each leaf's soft shadow and then the leaf, so upper leaves shade the ones below them
/// as well as the soil.
fn draw_plant(canvas: &mut Canvas, leaves: &[Leaf], look: &Look, pitch: f32) {
    let [lx, ly] = look.light;
    let shadow_off = 0.05 * pitch;
    for leaf in leaves {
        let mut shadow = *leaf;
        shadow.base = [
            leaf.base[0] - lx * shadow_off,
            leaf.base[1] - ly * shadow_off,
        ];
        let b = shadow.bounds(3.0);
        if let Some((xa, ya, xb, yb)) = canvas.span(b[0], b[1], b[2], b[3]) {
            for y in ya..yb {
                for x in xa..xb {
                    if let Some((cov, _, _)) = shadow.sample(x as f32 + 0.5, y as f32 + 0.5, 2.5) {
                        canvas.darken(x, y, 1.0 - 0.42 * cov);
                    }
                }
            }
        }
        draw_leaf(canvas, leaf, look);
    }
}

fn draw_leaf(canvas: &mut Canvas, leaf: &Leaf, look: &Look) {
    let [lx, ly] = look.light;
    let (s, c) = leaf.angle.sin_cos();
    // How much the leaf's left half (positive across-offset side) faces the light.
    let side = -s * lx + c * ly;
    let b = leaf.bounds(2.0);
    let Some((xa, ya, xb, yb)) = canvas.span(b[0], b[1], b[2], b[3]) else {
        return;
    };
    for y in ya..yb {
        for x in xa..xb {
            let (fx, fy) = (x as f32 + 0.5, y as f32 + 0.5);
            let Some((cov, t, across)) = leaf.sample(fx, fy, 1.0) else {
                continue;
            };
            let t = t.clamp(0.0, 1.0);
            let mut shade = 0.8 + 0.28 * (1.0 - across * across);
            shade += 0.14 * side * across;
            let midrib = (1.0 - (across.abs() * leaf.width * (1.0 - t) / 0.6).min(1.0)).max(0.0);
            shade += leaf.vein * 0.16 * midrib * (t < 0.92) as u32 as f32;
            let mut color = mul(lerp3(leaf.base_color, leaf.tip_color, t), shade);
            if leaf.spots > 0.0 {
                let n = value_noise(fx / 2.2, fy / 2.2, leaf.spot_seed);
                let spot = smoothstep(1.0 - leaf.spots, 1.05 - leaf.spots, n);
                color = lerp3(color, [0.22, 0.14, 0.07], 0.8 * spot);
            }
            canvas.blend(x, y, color, cov);
        }
    }
}

fn healthy_plant(center: [f32; 2], p: f32, rng: &mut StdRng) -> Vec<Leaf> {
    let vigor: f32 = rng.gen_range(0.8..1.12);
    let hue: f32 = rng.gen_range(92.0..122.0);
    let a0: f32 = rng.gen_range(0.0..std::f32::consts::TAU);
    let stage = rng.gen_range(0..10);
    let true_leaves = match stage {
        0..=2 => 0,
        3..=6 => 2,
        _ => rng.gen_range(3..6),
    };
    let mut leaves = Vec::new();
    let cot_len = p * 0.2 * vigor * if true_leaves == 0 { 1.25 } else { 1.0 };
    for k in 0..2 {
        let length = cot_len * rng.gen_range(0.9..1.1);
        let base_color = hsv(
            hue - 10.0,
            rng.gen_range(0.5..0.62),
            rng.gen_range(0.55..0.66),
        );
        leaves.push(Leaf {
            base: center,
            angle: a0 + k as f32 * std::f32::consts::PI + rng.gen_range(-0.15..0.15),
            length,
            width: length * rng.gen_range(0.32..0.4),
            bend: rng.gen_range(-0.06..0.06),
            profile: Profile::Cotyledon,
            base_color,
            tip_color: mul(base_color, 1.06),
            vein: 0.4,
            spots: 0.0,
            spot_seed: 0,
        });
    }
    for k in 0..true_leaves {
        let angle = if true_leaves == 2 {
            a0 + std::f32::consts::FRAC_PI_2 + k as f32 * std::f32::consts::PI
        } else {
            a0 + std::f32::consts::FRAC_PI_2 + k as f32 * 2.4
        } + rng.gen_range(-0.2..0.2);
        let length = p * rng.gen_range(0.26..0.38) * vigor;
        let base_color = hsv(
            hue + rng.gen_range(-4.0..4.0),
            rng.gen_range(0.62..0.8),
            rng.gen_range(0.42..0.56),
        );
        leaves.push(Leaf {
            base: center,
            angle,
            length,
            width: length * rng.gen_range(0.34..0.44),
            bend: rng.gen_range(-0.1..0.1),
            profile: Profile::Ovate,
            base_color,
            tip_color: mul(base_color, 1.1),
            vein: 1.0,
            spots: 0.0,
            spot_seed: 0,
        });
    }
    leaves
}

fn wilted_plant(center: [f32; 2], p: f32, rng: &mut StdRng) -> Vec<Leaf> {
    let count = rng.gen_range(3..6);
    let a0: f32 = rng.gen_range(0.0..std::f32::consts::TAU);
    let mut leaves = Vec::new();
    for k in 0..count {
        let droop = rng.gen_bool(0.3);
        let length = p * if droop {
            rng.gen_range(0.28..0.36)
        } else {
            rng.gen_range(0.18..0.27)
        };
        let base_color = hsv(
            rng.gen_range(40.0..54.0),
            rng.gen_range(0.55..0.7),
            rng.gen_range(0.58..0.72),
        );
        let tip_color = hsv(
            rng.gen_range(26.0..36.0),
            rng.gen_range(0.55..0.7),
            rng.gen_range(0.38..0.5),
        );
        let bend = rng.gen_range(0.25..0.5) * if rng.gen_bool(0.5) { 1.0 } else { -1.0 };
        leaves.push(Leaf {
            base: center,
            angle: a0 + k as f32 * std::f32::consts::TAU / count as f32 + rng.gen_range(-0.4..0.4),
            length,
            width: length * rng.gen_range(0.26..0.34),
            bend,
            profile: Profile::Ovate,
            base_color,
            tip_color,
            vein: 0.2,
            spots: rng.gen_range(0.15..0.35),
            spot_seed: rng.gen(),
        });
    }
    leaves
}

fn weed_plant(center: [f32; 2], radius: f32, rng: &mut StdRng) -> Vec<Leaf> {
    let count = rng.gen_range(6..12);
    let a0: f32 = rng.gen_range(0.0..std::f32::consts::TAU);
    let hue: f32 = rng.gen_range(66.0..84.0);
    let teeth = rng.gen_range(3.0..6.0);
    (0..count)
        .map(|k| {
            let length = radius * rng.gen_range(0.55..1.0);
            let base_color = hsv(hue, rng.gen_range(0.55..0.7), rng.gen_range(0.68..0.82));
            Leaf {
                base: center,
                angle: a0
                    + k as f32 * std::f32::consts::TAU / count as f32
                    + rng.gen_range(-0.3..0.3),
                length,
                width: length * rng.gen_range(0.09..0.13),
                bend: rng.gen_range(-0.15..0.15),
                profile: Profile::Blade { teeth },
                base_color,
                tip_color: hsv(hue - 4.0, 0.55, 0.9),
                vein: 0.5,
                spots: 0.0,
                spot_seed: 0,
            }
        })
        .collect()
}

fn weed_record(center: [f32; 2], leaves: &[Leaf], w: u32, h: u32, cell: Option<[u32; 2]>) -> Weed {
    let mut rect = [
        f32::INFINITY,
        f32::INFINITY,
        f32::NEG_INFINITY,
        f32::NEG_INFINITY,
    ];
    let mut radius: f32 = 0.0;
    for leaf in leaves {
        let b = leaf.bounds(0.0);
        rect = [
            rect[0].min(b[0]),
            rect[1].min(b[1]),
            rect[2].max(b[2]),
            rect[3].max(b[3]),
        ];
        radius = radius.max(leaf.length * (1.0 + leaf.bend.abs() * 0.5));
    }
    Weed {
        center: [round2(center[0]), round2(center[1])],
        radius: round2(radius),
        rect: clip_rect(rect, w, h),
        cell,
    }
}

fn apply_lighting(canvas: &mut Canvas, look: &Look, strength: f32) {
    let (cx, cy) = (0.5 * canvas.w as f32, 0.5 * canvas.h as f32);
    let half_diag = (cx * cx + cy * cy).sqrt().max(1.0);
    let [lx, ly] = look.light;
    for y in 0..canvas.h {
        for x in 0..canvas.w {
            let dx = (x as f32 + 0.5 - cx) / half_diag;
            let dy = (y as f32 + 0.5 - cy) / half_diag;
            let gradient = 0.14 * (dx * lx + dy * ly);
            let vignette = 0.22 * (dx * dx + dy * dy);
            let gain = look.exposure * (1.0 + strength * (gradient - vignette));
            let p = &mut canvas.px[y * canvas.w + x];
            for (v, t) in p.iter_mut().zip(look.tint) {
                *v *= gain * t;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scene_is_deterministic() {
        let spec = SceneSpec::new("t", 333, 250, 42);
        let a = generate(&spec);
        let b = generate(&spec);
        assert_eq!(a.image.as_raw(), b.image.as_raw());
        assert_eq!(a.cells, b.cells);
        assert_eq!(a.weeds, b.weeds);
        let c = generate(&SceneSpec::new("t", 333, 250, 43));
        assert_ne!(a.image.as_raw(), c.image.as_raw());
    }

    #[test]
    fn scene_honours_exact_sizes() {
        for spec in sample_set() {
            let scene = generate(&spec);
            assert_eq!(
                scene.image.dimensions(),
                (spec.width, spec.height),
                "{}",
                spec.name
            );
            assert!(!scene.cells.is_empty(), "{} has no cells", spec.name);
            for c in &scene.cells {
                assert!(c.rect[0] >= 0.0 && c.rect[1] >= 0.0);
                assert!(c.rect[2] <= spec.width as f32 && c.rect[3] <= spec.height as f32);
                assert!(c.rect[0] < c.rect[2] && c.rect[1] < c.rect[3]);
            }
        }
        for (w, h) in [(1, 1), (5, 300), (1000, 37)] {
            let scene = generate(&SceneSpec::new("odd", w, h, 7));
            assert_eq!(scene.image.dimensions(), (w, h));
        }
        assert_eq!(
            generate(&SceneSpec::new("none", 0, 10, 1))
                .image
                .dimensions(),
            (0, 10)
        );
    }

    #[test]
    fn scene_sample_set_has_every_class() {
        let mut seen = [false; 4];
        for spec in sample_set() {
            let scene = generate(&spec);
            for c in &scene.cells {
                seen[c.class as usize] = true;
            }
            if scene.weeds.iter().any(|w| w.cell.is_none()) {
                seen[CellClass::Weed as usize] = true;
            }
        }
        assert_eq!(seen, [true; 4]);
    }

    #[test]
    fn scene_sample_names_are_unique() {
        let mut names: Vec<String> = sample_set().into_iter().map(|s| s.name).collect();
        names.sort();
        names.dedup();
        assert_eq!(names.len(), 8);
    }

    /// Mean of G - R over the cells of one class, on the drawn image.
    fn greenness(class: CellClass) -> f64 {
        let (mut sum, mut n) = (0.0f64, 0u64);
        for spec in sample_set() {
            let scene = generate(&spec);
            for c in scene.cells.iter().filter(|c| c.class == class) {
                for y in c.rect[1].ceil() as u32..c.rect[3].floor() as u32 {
                    for x in c.rect[0].ceil() as u32..c.rect[2].floor() as u32 {
                        let p = scene.image.get_pixel(x, y);
                        sum += p[1] as f64 - p[0] as f64;
                        n += 1;
                    }
                }
            }
        }
        assert!(n > 0, "no pixels of {class:?}");
        sum / n as f64
    }

    #[test]
    fn scene_seedlings_are_greener_than_soil() {
        let healthy = greenness(CellClass::Healthy);
        let empty = greenness(CellClass::Empty);
        let wilted = greenness(CellClass::Wilted);
        assert!(healthy > empty + 5.0, "healthy {healthy} vs empty {empty}");
        assert!(healthy > wilted, "healthy {healthy} vs wilted {wilted}");
    }

    #[test]
    fn scene_class_at_matches_cells() {
        let scene = generate(&sample_set()[3]);
        for c in &scene.cells {
            let x = ((c.rect[0] + c.rect[2]) / 2.0) as u32;
            let y = ((c.rect[1] + c.rect[3]) / 2.0) as u32;
            let got = class_at(&scene, x, y).expect("cell centre is labelled");
            assert!(got == c.class || got == CellClass::Weed);
        }
        for wd in scene.weeds.iter().filter(|w| w.cell.is_none()) {
            let got = class_at(&scene, wd.center[0] as u32, wd.center[1] as u32);
            assert_eq!(got, Some(CellClass::Weed));
        }
    }

    #[test]
    fn scene_labels_json_round_trips() {
        let spec = sample_set()[0].clone();
        let scene = generate(&spec);
        let labels = SceneLabels::new(&spec, &scene, "tray.png");
        let text = serde_json::to_string_pretty(&labels).unwrap();
        assert!(text.contains("\"schema\": \"mullion-scene-cells\""));
        assert!(text.contains("\"class\": \"healthy\""));
        let back: SceneLabels = serde_json::from_str(&text).unwrap();
        assert_eq!(back, labels);

        let spec_text = serde_json::to_string(&spec).unwrap();
        assert_eq!(serde_json::from_str::<SceneSpec>(&spec_text).unwrap(), spec);
        let partial: SceneSpec = serde_json::from_str(r#"{"width": 97, "height": 160}"#).unwrap();
        assert_eq!(
            (partial.width, partial.height, partial.blur_passes),
            (97, 160, 1)
        );
    }

    #[test]
    fn scene_write_sample_set_is_complete() {
        let dir = tempfile::tempdir().unwrap();
        let paths = write_sample_set(dir.path()).unwrap();
        assert_eq!(paths.len(), 16);
        for p in &paths {
            assert!(p.exists());
        }
        let leftovers = fs::read_dir(dir.path())
            .unwrap()
            .filter(|e| {
                e.as_ref()
                    .unwrap()
                    .path()
                    .extension()
                    .is_some_and(|x| x == "partial")
            })
            .count();
        assert_eq!(leftovers, 0);
        let img = image::open(&paths[4]).unwrap();
        assert_eq!((img.width(), img.height()), (97, 160));
    }
}
