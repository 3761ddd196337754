//! The region report: run a checkpoint over a folder of images and tabulate, for every labelled
//! region, how strongly each stage responds inside it compared with the rest of the image.
//!
//! Images go one at a time (one forward pass in memory). Each finished image leaves a small
//! record in `OUT/.done/`, keyed by everything its numbers depend on (the BLAKE3 content hashes
//! of the checkpoint, the configuration file, the image and the sidecar, every option that
//! changes a number, and Mullion's version), so a rerun after an interruption or after adding
//! images only computes what is new or changed, and a file replaced by another of the same
//! size and time stamp is computed again. `regions.csv` and `summary.json` are rewritten whole
//! at the end of every run, through temporary files and renames. A run holds an exclusive lock
//! on `OUT` (see [`crate::io::lock_folder`]); a second run on the same folder is refused.

use crate::analysis::compare::pair_problem;
use crate::analysis::{
    prepare_stage_pair, region_stats, Colormap, Map, MapKind, PreparedStage, RegionStats,
    ScaleSpec, CAUTION,
};
use crate::annotation::{self, Sidecar};
use crate::engine::{Session, SessionOptions};
use crate::error::{Error, Result};
use crate::io::{file_name, hash_bytes, list_images, write_text_atomic, ContentHashes};
use crate::render::{self, FigureSpec, Overlays};
use indicatif::{ProgressBar, ProgressStyle};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Schema name of `summary.json`.
pub const SUMMARY_SCHEMA: &str = "mullion-region-report";

/// File names the report writes inside the output folder.
pub const CSV_NAME: &str = "regions.csv";
pub const SUMMARY_NAME: &str = "summary.json";
pub const DONE_DIR: &str = ".done";
pub const FIGURES_DIR: &str = "figures";

/// What a report run needs, typed (the command line builds it from its arguments).
#[derive(Clone)]
pub struct ReportOptions {
    /// The checkpoint and the settings of every forward pass.
    pub session: SessionOptions,
    /// Folder of images; sub-folders are not searched.
    pub images: PathBuf,
    /// Folder holding the `<image file name>.regions.json` sidecars; `None`: next to each image.
    pub regions: Option<PathBuf>,
    /// Folder for regions.csv, summary.json, the per-image records and any figures.
    pub out: PathBuf,
    /// The scalar map to measure.
    pub map: std::sync::Arc<dyn MapKind>,
    /// A second checkpoint (A) for map kinds that compare two (the difference map): each image
    /// also runs through it, with its own layout's padding rules unless the run overrides them.
    pub base: Option<PathBuf>,
    /// Also save one figure per image, regions outlined, in OUT/figures/.
    pub figures: bool,
    /// Recompute every image, even those already done with the same inputs.
    pub force: bool,
    /// Do only this shard's images, in `OUT/shard-K-of-N/` (see [`Shard`]).
    pub shard: Option<Shard>,
}

/// Most shards a report may be split into.
pub const MAX_SHARDS: u32 = 100_000;

/// One of `count` parts of a folder of images: image `name` belongs to shard `index` (1-based)
/// when the first 64 bits of the BLAKE3 hash of its path relative to the image folder, modulo
/// `count`, are `index - 1`. The split depends on nothing but the names, so every machine of an
/// array job computes the same one.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    pub index: u32,
    pub count: u32,
}

impl Shard {
    /// Shard `index` of `count`: `1 <= index <= count <= MAX_SHARDS`.
    pub fn new(index: u32, count: u32) -> Result<Shard> {
        if count == 0 || count > MAX_SHARDS || index == 0 || index > count {
            return Err(Error::BadArgument(format!(
                "shard {index}/{count}: expected K/N with 1 <= K <= N <= {MAX_SHARDS}"
            )));
        }
        Ok(Shard { index, count })
    }

    /// The folder (inside `--out`) this shard writes: `shard-K-of-N`.
    pub fn dir_name(&self) -> String {
        format!("shard-{}-of-{}", self.index, self.count)
    }

    /// Whether the image at `relative` (its path relative to the image folder) is this shard's.
    pub fn contains(&self, relative: &str) -> bool {
        crate::io::hash_u64(relative.as_bytes()) % self.count as u64 == (self.index - 1) as u64
    }
}

/// What a shard's `summary.json` says about the split and the run's settings, so a merge can
/// check that its shards belong together.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ShardInfo {
    pub index: u32,
    pub count: u32,
    /// Everything the numbers depend on besides the images: content hashes of the checkpoint
    /// and configuration file, map, padding semantics, normalisation, Mullion's version.
    pub settings: String,
}

/// Check that `shards` (folder, shard record) are every shard of one split run, each once: the
/// same count and settings throughout, no index twice, none missing.
pub fn check_shard_set(shards: &[(&Path, ShardInfo)]) -> Result<()> {
    let Some((first_dir, first)) = shards.first() else {
        return Err(Error::BadArgument("merge: give the shard folders".into()));
    };
    let mut seen: BTreeMap<u32, &Path> = BTreeMap::new();
    for (dir, s) in shards {
        if s.count != first.count {
            return Err(Error::BadArgument(format!(
                "{} is shard {} of {}, but {} is of {}: they come from different splits",
                dir.display(),
                s.index,
                s.count,
                first_dir.display(),
                first.count
            )));
        }
        if s.settings != first.settings {
            return Err(Error::BadArgument(format!(
                "{} ran with other settings than {} ({} vs {}); merge only shards of one run",
                dir.display(),
                first_dir.display(),
                s.settings,
                first.settings
            )));
        }
        if let Some(other) = seen.insert(s.index, dir) {
            return Err(Error::BadArgument(format!(
                "shard {} of {} is given twice: {} and {}",
                s.index,
                s.count,
                other.display(),
                dir.display()
            )));
        }
    }
    let missing: Vec<String> = (1..=first.count)
        .filter(|k| !seen.contains_key(k))
        .map(|k| k.to_string())
        .collect();
    if !missing.is_empty() {
        return Err(Error::BadArgument(format!(
            "shards {} of {} are missing; a merge needs every shard",
            missing.join(", "),
            first.count
        )));
    }
    Ok(())
}

impl ReportOptions {
    /// Options with every default (token norm, no figures), for calling [`run_report`] from code.
    pub fn new(session: SessionOptions, images: PathBuf, out: PathBuf) -> Self {
        ReportOptions {
            session,
            images,
            regions: None,
            out,
            map: std::sync::Arc::new(crate::analysis::TokenNorm),
            base: None,
            figures: false,
            force: false,
            shard: None,
        }
    }

    /// The folder this run writes: `out`, or `out/shard-K-of-N` for a shard.
    pub fn out_dir(&self) -> PathBuf {
        match &self.shard {
            Some(s) => self.out.join(s.dir_name()),
            None => self.out.clone(),
        }
    }
}

/// One line of `regions.csv`: one region at one stage (the same row the window's table shows).
pub type ReportRow = RegionStats;

/// Count, mean and sample standard deviation (divisor n - 1) of one statistic; values that are
/// missing for a row are left out, so `n` may be below the group's count.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Moments {
    pub n: usize,
    pub mean: Option<f64>,
    pub std: Option<f64>,
}

/// One label at one stage, over every region of that label in every image.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GroupSummary {
    pub label: String,
    pub stage: usize,
    /// Regions (rows).
    pub count: usize,
    /// Images with at least one such region.
    pub images: usize,
    pub inside_mean: Moments,
    pub ratio: Moments,
    pub auroc: Moments,
}

/// An image that could not be used, and why.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FailedImage {
    pub image: String,
    pub error: String,
}

/// The contents of `summary.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    pub schema: String,
    pub version: u32,
    pub caution: String,
    pub map: String,
    /// Checkpoint file name.
    pub checkpoint: String,
    /// Images found in the folder.
    pub images: usize,
    /// Images computed in this run.
    pub computed: usize,
    /// Images whose results were reused from an earlier run with the same inputs.
    pub reused: usize,
    /// Per label and stage, sorted by label then stage.
    pub groups: Vec<GroupSummary>,
    pub failed: Vec<FailedImage>,
    /// Images without a sidecar, or whose sidecar has no region.
    pub without_regions: Vec<String>,
    /// Changes made to sidecars on reading (clipping and the like), prefixed by the image.
    pub warnings: Vec<String>,
    /// For a shard of a split run (`--shard K/N`): which one, and the settings it ran with.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<ShardInfo>,
}

/// What a run did, for callers and tests.
#[derive(Clone, Debug, PartialEq)]
pub struct ReportOutcome {
    pub csv: PathBuf,
    /// Where `summary.json` went.
    pub summary_path: PathBuf,
    pub summary: Summary,
    /// Image file names computed in this run, in order.
    pub computed: Vec<String>,
    /// Image file names reused from earlier runs.
    pub reused: Vec<String>,
    /// Rows written to the CSV.
    pub rows: usize,
}

/// Everything one image's numbers depend on. Files enter by their content (BLAKE3), never by
/// their time stamp or path, so a replaced file is noticed and a moved folder is not.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct Inputs {
    /// The Mullion version that computed the rows (a new one may compute them differently).
    mullion: String,
    map: String,
    weights: String,
    config: Option<String>,
    semantics: String,
    normalisation: String,
    image: String,
    sidecar: String,
    /// The base checkpoint's content hash, for maps that compare two.
    #[serde(default)]
    base: Option<String>,
}

/// The record an image leaves in `OUT/.done/` once its rows are computed.
#[derive(Clone, Debug, Serialize, Deserialize)]
struct Record {
    inputs: Inputs,
    warnings: Vec<String>,
    /// The image's rows as CSV text with a header: CSV keeps every f64 exactly (shortest
    /// round-trip digits, read back with the standard parser).
    csv: String,
}

fn rows_to_csv(rows: &[ReportRow]) -> Result<String> {
    let mut w = csv::Writer::from_writer(Vec::new());
    for r in rows {
        w.serialize(r).map_err(|e| Error::Internal(e.to_string()))?;
    }
    let bytes = w.into_inner().map_err(|e| Error::Internal(e.to_string()))?;
    String::from_utf8(bytes).map_err(|e| Error::Internal(e.to_string()))
}

fn csv_to_rows(text: &str) -> std::result::Result<Vec<ReportRow>, csv::Error> {
    csv::Reader::from_reader(text.as_bytes())
        .deserialize()
        .collect()
}

/// Read the rows of a `regions.csv` written by this command.
pub fn read_rows(path: &Path) -> Result<Vec<ReportRow>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    csv_to_rows(&text).map_err(|e| Error::bad_file(path, format!("not a region table: {e}")))
}

/// Read a `summary.json` written by this command.
pub fn read_summary(path: &Path) -> Result<Summary> {
    let bytes = crate::io::read_regular(path, 1 << 30)?
        .ok_or_else(|| Error::bad_file(path, "missing: is this a finished report folder?"))?;
    serde_json::from_slice(&bytes)
        .map_err(|e| Error::bad_file(path, format!("not a report summary: {e}")))
}

/// A record that exists, parses and has the given inputs.
fn read_record(path: &Path, inputs: &Inputs) -> Option<(Vec<ReportRow>, Vec<String>)> {
    let text = std::fs::read_to_string(path).ok()?;
    let rec: Record = serde_json::from_str(&text).ok()?;
    if rec.inputs != *inputs {
        return None;
    }
    Some((csv_to_rows(&rec.csv).ok()?, rec.warnings))
}

/// Running count, mean and sum of squared deviations (Welford), so the summary needs no rows
/// kept in memory.
#[derive(Default)]
struct Welford {
    n: usize,
    mean: f64,
    m2: f64,
}

impl Welford {
    fn push(&mut self, v: Option<f64>) {
        let Some(v) = v.filter(|v| v.is_finite()) else {
            return;
        };
        self.n += 1;
        let d = v - self.mean;
        self.mean += d / self.n as f64;
        self.m2 += d * (v - self.mean);
    }
    fn moments(&self) -> Moments {
        Moments {
            n: self.n,
            mean: (self.n > 0).then_some(self.mean),
            std: (self.n > 1).then(|| (self.m2 / (self.n - 1) as f64).sqrt()),
        }
    }
}

#[derive(Default)]
pub struct Group {
    count: usize,
    images: usize,
    last_image: Option<String>,
    inside: Welford,
    ratio: Welford,
    auroc: Welford,
}

/// Per-(label, stage) accumulators over all rows of the run, fed image by image.
#[derive(Default)]
pub struct Groups(BTreeMap<(String, usize), Group>);

impl Groups {
    pub fn push(&mut self, r: &ReportRow) {
        let g = self.0.entry((r.label.clone(), r.stage)).or_default();
        g.count += 1;
        if g.last_image.as_deref() != Some(r.image.as_str()) {
            // Rows arrive image by image, so a change of image is a new image.
            g.images += 1;
            g.last_image = Some(r.image.clone());
        }
        g.inside.push(r.inside_mean);
        g.ratio.push(r.ratio);
        g.auroc.push(r.auroc);
    }
    pub fn finish(self) -> Vec<GroupSummary> {
        self.0
            .into_iter()
            .map(|((label, stage), g)| GroupSummary {
                label,
                stage,
                count: g.count,
                images: g.images,
                inside_mean: g.inside.moments(),
                ratio: g.ratio.moments(),
                auroc: g.auroc.moments(),
            })
            .collect()
    }
}

/// What happened to one image.
enum Done {
    Computed(Vec<ReportRow>, Vec<String>),
    Reused(Vec<ReportRow>, Vec<String>),
    NoRegions(Vec<String>),
}

struct Context<'a> {
    args: &'a ReportOptions,
    session: Session,
    /// The base checkpoint's session and content hash, when the map compares two.
    base: Option<(Session, String)>,
    done_dir: PathBuf,
    figures_dir: Option<PathBuf>,
    hashes: ContentHashes,
    weights: String,
    config: Option<String>,
}

impl Context<'_> {
    fn inputs(&self, image: &Path, sidecar_bytes: &[u8]) -> Result<Inputs> {
        let s = &self.session;
        Ok(Inputs {
            mullion: env!("CARGO_PKG_VERSION").to_string(),
            map: self.args.map.id(),
            weights: self.weights.clone(),
            config: self.config.clone(),
            semantics: format!(
                "{}/{}",
                s.semantics.pad_order.name(),
                s.semantics.small_stage.name()
            ),
            normalisation: format!("mean {:?} std {:?}", s.norm.mean, s.norm.std),
            image: self.hashes.hash(image)?,
            sidecar: hash_bytes(sidecar_bytes),
            base: self.base.as_ref().map(|b| b.1.clone()),
        })
    }

    /// The settings every image's key shares, in one line (a merge compares shards by it).
    fn settings(&self) -> String {
        let s = &self.session;
        let base = self
            .base
            .as_ref()
            .map_or(String::new(), |b| format!(" base {}", b.1));
        format!(
            "mullion {} map {}{base} weights {} config {} semantics {}/{} mean {:?} std {:?}",
            env!("CARGO_PKG_VERSION"),
            self.args.map.id(),
            self.weights,
            self.config.as_deref().unwrap_or("none"),
            s.semantics.pad_order.name(),
            s.semantics.small_stage.name(),
            s.norm.mean,
            s.norm.std
        )
    }

    fn process(&self, image: &Path) -> Result<Done> {
        let name = file_name(image);
        let sidecar_path = annotation::sidecar_path(image, self.args.regions.as_deref());
        let record_path = self.done_dir.join(format!("{name}.json"));
        let figure_path = self
            .figures_dir
            .as_ref()
            .map(|d| d.join(crate::io::figure_file_name(image, &self.args.map.id())));
        // A sidecar that is there but unreadable is handled (and moved aside) by the loader;
        // one that is not a regular file (a FIFO would block the read) fails here, untouched.
        let bytes = annotation::read_bytes(&sidecar_path)?;
        if let (false, Some(b)) = (self.args.force, &bytes) {
            let inputs = self.inputs(image, b)?;
            let figure_ok = figure_path.as_ref().is_none_or(|p| p.is_file());
            if let (Some((rows, warnings)), true) = (read_record(&record_path, &inputs), figure_ok)
            {
                return Ok(Done::Reused(rows, warnings));
            }
        }
        let _ = std::fs::remove_file(&record_path);
        let Some((sc, mut warnings)) = annotation::load_with_warnings(&sidecar_path)? else {
            return Ok(Done::NoRegions(Vec::new()));
        };
        if sc.image != name {
            warnings.push(format!(
                "{}: the sidecar names the image '{}'; used for '{name}' anyway",
                sidecar_path.display(),
                sc.image
            ));
        }
        if sc.regions.is_empty() {
            return Ok(Done::NoRegions(warnings));
        }
        let out = self.session.run_image(image, false, false)?;
        let (h, w) = out.geometry.image;
        if (sc.width as usize, sc.height as usize) != (w, h) {
            return Err(Error::bad_file(
                &sidecar_path,
                format!(
                    "the regions were drawn on a {}x{} image but {} is {w}x{h}",
                    sc.width, sc.height, name
                ),
            ));
        }
        // A map that compares two checkpoints gets the base's pass of the same image.
        let other = match &self.base {
            Some((b, _)) => {
                let o = b.run_image(image, false, false)?;
                if let Some(p) = pair_problem(&o, &out) {
                    return Err(Error::BadArgument(format!("{name}: {p}")));
                }
                Some(o)
            }
            None => None,
        };
        // With figures, the shared preparation gives the raw maps and their display form at once.
        let (maps, display) = if figure_path.is_some() {
            let (raw, shown) = prepare_stage_pair(
                &out,
                other.as_ref(),
                self.args.map.as_ref(),
                &ScaleSpec::default(),
            )?;
            (raw, Some(shown))
        } else {
            let raw = (0..out.stages.len())
                .map(|s| self.args.map.compute_pair(&out, other.as_ref(), s))
                .collect::<Result<Vec<Map>>>()?;
            (raw, None)
        };
        let rows = region_stats(&out, &maps, &self.args.map.id(), &sc.regions, &name)?;
        if let (Some(p), Some(shown)) = (&figure_path, &display) {
            write_figure(self, image, &out, shown, &sc, p)?;
        }
        // Hash the bytes the numbers came from (the loader has read the same file).
        let inputs = self.inputs(image, bytes.as_deref().unwrap_or_default())?;
        let record = Record {
            inputs,
            warnings: warnings.clone(),
            csv: rows_to_csv(&rows)?,
        };
        let text =
            serde_json::to_string_pretty(&record).map_err(|e| Error::Internal(e.to_string()))?;
        write_text_atomic(&record_path, &text)?;
        Ok(Done::Computed(rows, warnings))
    }
}

fn write_figure(
    ctx: &Context,
    image_path: &Path,
    out: &crate::engine::StageOutputs,
    stages: &[PreparedStage],
    sc: &Sidecar,
    path: &Path,
) -> Result<()> {
    let image = crate::engine::input::load_image(image_path)?;
    let (annotated, region_notes) = render::annotate_regions(&image, sc);
    let scale = render::default_figure_scale(annotated.height());
    let colormap = Colormap::Viridis;
    let style = render::figure_panel_style(colormap, 0.6, Overlays::default(), scale);
    let mut notes = vec![render::scale_note(&ScaleSpec::default(), colormap)];
    notes.extend(region_notes);
    let fig = render::compose_figure(&FigureSpec {
        image: &annotated,
        geometry: &out.geometry,
        stages,
        style,
        checkpoint: ctx.session.checkpoint_name(),
        map_label: ctx.args.map.label(),
        notes,
        text_px: render::figure_text_px(scale),
    })?;
    crate::io::save_png_atomic(&fig, path)
}

fn progress_bar(n: usize) -> ProgressBar {
    let pb = ProgressBar::new(n as u64);
    let style = ProgressStyle::with_template(
        "{bar:30} {pos}/{len} images  {per_sec}  ETA {eta}  {wide_msg}",
    )
    .unwrap_or_else(|_| ProgressStyle::default_bar());
    pb.set_style(style);
    pb
}

/// Run the report and return what it did. Images that fail are listed in the summary and
/// skipped; only problems with the folders, the checkpoint or the options stop the run.
pub fn run_report(args: &ReportOptions) -> Result<ReportOutcome> {
    if args.map.id() == "pca" {
        return Err(Error::BadArgument(
            "--map pca gives colours; region statistics need a scalar map (norm or channel:N)"
                .into(),
        ));
    }
    if args.base.is_some() && !args.map.needs_pair() {
        return Err(Error::BadArgument(format!(
            "--base is used only by maps that compare two checkpoints (--map difference), not \
             by --map {}",
            args.map.id()
        )));
    }
    if args.map.needs_pair() && args.base.is_none() {
        return Err(Error::BadArgument(format!(
            "--map {} compares two checkpoints: give the second with --base FILE",
            args.map.id()
        )));
    }
    if args.map.variant().is_some() {
        return Err(Error::BadArgument(format!(
            "--map {} compares each image with a second pass of it (padding study); the report \
             runs one pass per image (use mullion padding or mullion figure)",
            args.map.id()
        )));
    }
    if let Some(d) = &args.regions {
        if !d.is_dir() {
            return Err(Error::bad_file(d, "--regions: not a folder"));
        }
    }
    let mut images = list_images(&args.images)?;
    if images.is_empty() {
        return Err(Error::bad_file(
            &args.images,
            format!(
                "no images here (looked for {})",
                crate::io::IMAGE_EXTENSIONS.join(", ")
            ),
        ));
    }
    if let Some(shard) = &args.shard {
        // An empty shard (more shards than images) is a valid, empty result.
        images.retain(|p| shard.contains(&file_name(p)));
    }
    let out_dir = args.out_dir();
    let csv_path = out_dir.join(CSV_NAME);
    let summary_path = out_dir.join(SUMMARY_NAME);
    let mut inputs = vec![("--weights", args.session.weights.as_path())];
    if let Some(b) = &args.base {
        inputs.push(("--base", b.as_path()));
    }
    if let Some(c) = &args.session.config {
        inputs.push(("--config", c.as_path()));
    }
    crate::io::check_outputs(
        &inputs,
        &[
            ("--out", csv_path.as_path()),
            ("--out", summary_path.as_path()),
        ],
    )?;
    // Held until the run returns: a second run on this folder is refused, not interleaved.
    let _lock = crate::io::lock_folder(&out_dir)?;
    let done_dir = out_dir.join(DONE_DIR);
    std::fs::create_dir_all(&done_dir).map_err(|e| Error::io(&done_dir, e))?;
    let figures_dir = args.figures.then(|| out_dir.join(FIGURES_DIR));
    if let Some(d) = &figures_dir {
        std::fs::create_dir_all(d).map_err(|e| Error::io(d, e))?;
    }
    let session = Session::open(&args.session)?;
    let hashes = ContentHashes::default();
    let weights = checkpoint_hash(&hashes, &args.session.weights)?;
    // Only a map that compares two runs the base; for the others it would change nothing.
    let base = match &args.base {
        Some(b) => {
            let mut o = args.session.clone();
            o.weights = b.clone();
            o.config = None;
            let s = Session::open(&o)?;
            Some((s, checkpoint_hash(&hashes, b)?))
        }
        None => None,
    };
    let config = args
        .session
        .config
        .as_deref()
        .map(|c| hashes.hash(c))
        .transpose()?;
    let ctx = Context {
        args,
        session,
        base,
        done_dir,
        figures_dir,
        hashes,
        weights,
        config,
    };

    let pb = progress_bar(images.len());
    let mut groups = Groups::default();
    let mut computed = Vec::new();
    let mut reused = Vec::new();
    let mut failed = Vec::new();
    let mut without_regions = Vec::new();
    let mut warnings = Vec::new();
    let mut n_rows = 0usize;
    crate::io::write_atomic(&csv_path, |tmp| {
        let csv_err = |e: csv::Error| Error::bad_file(&csv_path, format!("cannot write: {e}"));
        // The header is written by hand so it goes out even when no image gives a row.
        let mut w = csv::WriterBuilder::new()
            .has_headers(false)
            .from_path(tmp)
            .map_err(csv_err)?;
        w.write_record(crate::analysis::region_stats::CSV_COLUMNS)
            .map_err(csv_err)?;
        for image in &images {
            let name = file_name(image);
            pb.set_message(name.clone());
            let (rows, notes) = match ctx.process(image) {
                Ok(Done::Computed(rows, notes)) => {
                    computed.push(name.clone());
                    (rows, notes)
                }
                Ok(Done::Reused(rows, notes)) => {
                    reused.push(name.clone());
                    (rows, notes)
                }
                Ok(Done::NoRegions(notes)) => {
                    without_regions.push(name.clone());
                    (Vec::new(), notes)
                }
                Err(e) => {
                    let _ = std::fs::remove_file(ctx.done_dir.join(format!("{name}.json")));
                    pb.suspend(|| eprintln!("mullion: skipped {name}: {e}"));
                    failed.push(FailedImage {
                        image: name.clone(),
                        error: e.to_string(),
                    });
                    (Vec::new(), Vec::new())
                }
            };
            for note in notes {
                pb.suspend(|| eprintln!("mullion: {name}: {note}"));
                warnings.push(format!("{name}: {note}"));
            }
            for r in &rows {
                w.serialize(r).map_err(csv_err)?;
                groups.push(r);
            }
            n_rows += rows.len();
            pb.inc(1);
        }
        w.flush().map_err(|e| Error::io(&csv_path, e))
    })?;
    pb.finish_and_clear();

    let summary = Summary {
        schema: SUMMARY_SCHEMA.into(),
        version: 1,
        caution: CAUTION.into(),
        map: ctx.args.map.id(),
        checkpoint: file_name(&args.session.weights),
        images: images.len(),
        computed: computed.len(),
        reused: reused.len(),
        groups: groups.finish(),
        failed,
        without_regions,
        warnings,
        shard: args.shard.map(|s| ShardInfo {
            index: s.index,
            count: s.count,
            settings: ctx.settings(),
        }),
    };
    let mut text =
        serde_json::to_string_pretty(&summary).map_err(|e| Error::Internal(e.to_string()))?;
    text.push('\n');
    write_text_atomic(&summary_path, &text)?;
    Ok(ReportOutcome {
        csv: csv_path,
        summary_path,
        summary,
        computed,
        reused,
        rows: n_rows,
    })
}

/// The content hash of a checkpoint as a run reads it: its weights file (inside a transformers
/// folder when a folder is given) and, when there is one, the `config.json` beside it, which
/// changes what is computed. A file without `config.json` hashes as the file alone.
pub(super) fn checkpoint_hash(hashes: &ContentHashes, weights: &Path) -> Result<String> {
    let file = crate::engine::folder::weights_file(weights)?;
    let hash = hashes.hash(&file)?;
    match file.parent().map(|d| d.join("config.json")) {
        Some(c) if c.is_file() => Ok(hash_bytes(format!("{hash}{}", hashes.hash(&c)?).as_bytes())),
        _ => Ok(hash),
    }
}
