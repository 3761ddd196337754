//! Two checkpoints compared on a set of images: per image and stage, linear CKA and the mean
//! and minimum per-token cosine between checkpoint A's (the base) and checkpoint B's (the
//! tuned) stage tokens, pooled rows over every image, the drift of every weight tensor, and
//! optional figures (A / B / difference per stage).
//!
//! Output folder: `stages.csv` (`image,stage,linear_cka,mean_cosine,min_cosine,tokens`, one row
//! per image file name and stage, then the pooled rows with `image` = `all`), `drift.csv`
//! (`tensor,stage,block,relative_change,base_norm`), `unmatched.txt`, `summary.json` and
//! `pooled.safetensors` (the streaming sums behind the pooled rows, which `mullion merge` adds
//! up for split runs). Tokens are those of the unpadded stage grid, as `mullion features`
//! writes them.
//!
//! Resumable like the region report: each image leaves a record in `OUT/.done/` keyed by the
//! content hashes of both checkpoints, their configuration files, the image, every option that
//! changes a number and Mullion's version, and the pooled sums are saved in `OUT/.done/` with
//! the list of images they hold. A rerun reuses every image that is in both; when the saved
//! sums hold an image that is gone or changed (sums cannot be taken apart), every image is
//! computed again. The folder is locked for the run ([`crate::io::lock_folder`]).

use super::report::{checkpoint_hash, FailedImage, Shard, ShardInfo};
use crate::analysis::compare::{
    linear_cka, prepare_pair_view, token_cosines, weight_drift, CkaSums, CosineSums, Drift,
    DRIFT_COLUMNS,
};
use crate::analysis::{stage_tokens, Colormap, ScaleSpec, TokenNorm, CAUTION};
use crate::engine::{Checkpoint, Session, SessionOptions, StageOutputs};
use crate::error::{Error, Result};
use crate::io::{file_name, write_text_atomic, ContentHashes};
use crate::render::{self, Overlays};
use candle_core::Tensor;
use indicatif::{ProgressBar, ProgressStyle};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// File names inside the output folder.
pub const STAGES_NAME: &str = "stages.csv";
pub const DRIFT_NAME: &str = "drift.csv";
pub const UNMATCHED_NAME: &str = "unmatched.txt";
pub const SUMMARY_NAME: &str = "summary.json";
pub const POOLED_NAME: &str = "pooled.safetensors";
pub const DONE_DIR: &str = ".done";
pub const FIGURES_DIR: &str = "figures";
/// Schema name of a comparison's `summary.json`.
pub const SUMMARY_SCHEMA: &str = "mullion-compare";
/// The `image` value of the pooled rows.
pub const POOLED_IMAGE: &str = "all";
/// The columns of `stages.csv`, in order.
pub const STAGE_COLUMNS: [&str; 6] = [
    "image",
    "stage",
    "linear_cka",
    "mean_cosine",
    "min_cosine",
    "tokens",
];
/// How often the pooled sums are saved during a run (and always at its end).
const SAVE_EVERY: Duration = Duration::from_secs(15);

/// What a comparison needs, typed (the command line builds it).
#[derive(Clone, Debug)]
pub struct CompareOptions {
    /// Checkpoint A, the base, with its run settings.
    pub base: SessionOptions,
    /// Checkpoint B, the tuned one.
    pub tuned: SessionOptions,
    /// Image files or folders (only image files directly inside a folder are used).
    pub images: Vec<PathBuf>,
    pub out: PathBuf,
    /// Also save one figure per image in OUT/figures/.
    pub figures: bool,
    /// Recompute every image.
    pub force: bool,
    /// Only this shard's images, in OUT/shard-K-of-N/.
    pub shard: Option<Shard>,
}

impl CompareOptions {
    pub fn new(
        base: SessionOptions,
        tuned: SessionOptions,
        images: Vec<PathBuf>,
        out: PathBuf,
    ) -> Self {
        CompareOptions {
            base,
            tuned,
            images,
            out,
            figures: false,
            force: false,
            shard: None,
        }
    }

    /// The folder this run writes: `out`, or `out/shard-K-of-N`.
    pub fn out_dir(&self) -> PathBuf {
        match &self.shard {
            Some(s) => self.out.join(s.dir_name()),
            None => self.out.clone(),
        }
    }
}

/// One row of `stages.csv`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StageRow {
    /// Image file name, or `all` for the pooled rows.
    pub image: String,
    pub stage: usize,
    /// `None` when one side has no variance at this stage.
    pub linear_cka: Option<f64>,
    /// `None` when the stage widths differ.
    pub mean_cosine: Option<f64>,
    pub min_cosine: Option<f64>,
    pub tokens: u64,
}

/// The contents of a comparison's `summary.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CompareSummary {
    pub schema: String,
    pub version: u32,
    pub caution: String,
    /// File names of checkpoint A (base) and B (tuned).
    pub base: String,
    pub tuned: String,
    /// Padding semantics each ran with (`pad order/small stage`).
    pub base_semantics: String,
    pub tuned_semantics: String,
    pub images: usize,
    pub computed: usize,
    pub reused: usize,
    pub failed: Vec<FailedImage>,
    /// Stages whose widths differ, so no cosine is given there.
    pub widths_differ: Vec<usize>,
    pub drift_rows: usize,
    pub unmatched: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<ShardInfo>,
}

/// What a run did.
#[derive(Clone, Debug, PartialEq)]
pub struct CompareOutcome {
    pub stages_csv: PathBuf,
    pub drift_csv: PathBuf,
    pub unmatched: PathBuf,
    pub summary_path: PathBuf,
    pub summary: CompareSummary,
    pub computed: Vec<String>,
    pub reused: Vec<String>,
}

/// The pooled sums of one stage: linear CKA sums and cosine sums.
#[derive(Clone, Debug, PartialEq)]
pub struct StagePool {
    pub cka: CkaSums,
    /// `None` when the widths differ.
    pub cosine: Option<CosineSums>,
}

/// The pooled sums of every stage.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Pool(pub Vec<Option<StagePool>>);

impl Pool {
    fn add(
        &mut self,
        stage: usize,
        p: usize,
        q: usize,
        x: &[f32],
        y: &[f32],
        cos: Option<&[f64]>,
    ) -> Result<()> {
        if self.0.len() <= stage {
            self.0.resize(stage + 1, None);
        }
        let slot = self.0[stage].get_or_insert_with(|| StagePool {
            cka: CkaSums::new(p, q),
            cosine: (p == q).then(CosineSums::default),
        });
        slot.cka.push(x, y, x.len() / p.max(1))?;
        if let (Some(s), Some(c)) = (slot.cosine.as_mut(), cos) {
            s.push(c);
        }
        Ok(())
    }

    /// Add another run's pool.
    pub fn merge(&mut self, o: &Pool) -> Result<()> {
        if self.0.len() < o.0.len() {
            self.0.resize(o.0.len(), None);
        }
        for (mine, theirs) in self.0.iter_mut().zip(&o.0) {
            match (mine.as_mut(), theirs) {
                (_, None) => {}
                (None, Some(t)) => *mine = Some(t.clone()),
                (Some(m), Some(t)) => {
                    m.cka.merge(&t.cka)?;
                    match (m.cosine.as_mut(), &t.cosine) {
                        (Some(a), Some(b)) => a.merge(b),
                        (None, None) => {}
                        _ => {
                            return Err(Error::BadArgument(
                                "pooled sums disagree on whether the widths match".into(),
                            ))
                        }
                    }
                }
            }
        }
        Ok(())
    }

    /// The pooled rows (`image` = `all`), one per stage that has tokens.
    pub fn rows(&self) -> Vec<StageRow> {
        self.0
            .iter()
            .enumerate()
            .filter_map(|(s, p)| p.as_ref().map(|p| (s, p)))
            .map(|(stage, p)| {
                let c = p.cosine.as_ref().and_then(|c| c.stats());
                StageRow {
                    image: POOLED_IMAGE.into(),
                    stage,
                    linear_cka: p.cka.cka(),
                    mean_cosine: c.map(|c| c.mean),
                    min_cosine: c.map(|c| c.min),
                    tokens: p.cka.n,
                }
            })
            .collect()
    }

    /// Write the sums to a safetensors file (f64, exact).
    pub fn save(&self, path: &Path) -> Result<()> {
        let mut t: HashMap<String, Tensor> = HashMap::new();
        let dev = candle_core::Device::Cpu;
        t.insert(
            "stages".into(),
            Tensor::from_vec(vec![self.0.len() as f64], 1, &dev)?,
        );
        for (s, p) in self.0.iter().enumerate() {
            let Some(p) = p else { continue };
            t.extend(p.cka.to_tensors(&format!("stage{s}.cka"))?);
            if let Some(c) = &p.cosine {
                let v = vec![c.sum.0, c.sum.1, c.min, c.n as f64];
                t.insert(format!("stage{s}.cosine"), Tensor::from_vec(v, 4, &dev)?);
            }
        }
        crate::io::save_tensors(&t, path)
    }

    /// Read sums written by [`Pool::save`].
    pub fn load(path: &Path) -> Result<Pool> {
        let t = candle_core::safetensors::load(path, &candle_core::Device::Cpu)
            .map_err(|e| Error::bad_file(path, format!("not a file of pooled sums: {e}")))?;
        let bad = |m: String| Error::bad_file(path, m);
        let vec = |name: &str| -> Result<Vec<f64>> {
            t.get(name)
                .ok_or_else(|| bad(format!("tensor {name} is missing")))?
                .to_dtype(candle_core::DType::F64)?
                .flatten_all()?
                .to_vec1::<f64>()
                .map_err(Into::into)
        };
        let n = vec("stages")?.first().copied().unwrap_or(-1.0);
        if !(0.0..=crate::engine::config::MAX_STAGES as f64).contains(&n) || n.fract() != 0.0 {
            return Err(bad(format!("tensor stages is {n}, not a stage count")));
        }
        let mut pool = Pool(vec![None; n as usize]);
        for (s, slot) in pool.0.iter_mut().enumerate() {
            let prefix = format!("stage{s}.cka");
            if !t.contains_key(&format!("{prefix}.n")) {
                continue;
            }
            let cka = CkaSums::from_tensors(&t, &prefix).map_err(|e| bad(e.to_string()))?;
            let cosine = match t.contains_key(&format!("stage{s}.cosine")) {
                true => {
                    let v = vec(&format!("stage{s}.cosine"))?;
                    if v.len() != 4 {
                        return Err(bad(format!("tensor stage{s}.cosine must hold 4 values")));
                    }
                    Some(CosineSums {
                        sum: (v[0], v[1]),
                        min: v[2],
                        n: v[3] as u64,
                    })
                }
                false => None,
            };
            *slot = Some(StagePool { cka, cosine });
        }
        Ok(pool)
    }
}

/// The saved state of the pooled sums in `.done/`: which images they hold, under which
/// settings, and the file with the sums.
#[derive(Clone, Debug, Serialize, Deserialize)]
struct PoolState {
    settings: String,
    /// `(image file name, content hash)` of every image in the sums.
    images: BTreeSet<(String, String)>,
    file: String,
}

const POOL_STATE: &str = "pooled.json";

/// Everything one image's rows depend on.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct Inputs {
    settings: String,
    image: String,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
struct Record {
    inputs: Inputs,
    csv: String,
}

pub fn rows_to_csv(rows: &[StageRow]) -> Result<String> {
    let mut w = csv::WriterBuilder::new()
        .has_headers(false)
        .from_writer(Vec::new());
    for r in rows {
        w.serialize(r).map_err(|e| Error::Internal(e.to_string()))?;
    }
    let bytes = w.into_inner().map_err(|e| Error::Internal(e.to_string()))?;
    String::from_utf8(bytes).map_err(|e| Error::Internal(e.to_string()))
}

/// Rows from CSV text without a header (the columns of [`STAGE_COLUMNS`]).
pub fn csv_to_rows(text: &str) -> std::result::Result<Vec<StageRow>, csv::Error> {
    let headers = csv::StringRecord::from(STAGE_COLUMNS.to_vec());
    csv::ReaderBuilder::new()
        .has_headers(false)
        .from_reader(text.as_bytes())
        .records()
        .map(|r| r.and_then(|r| r.deserialize(Some(&headers))))
        .collect()
}

/// Read a `stages.csv` written by this command (header included).
pub fn read_stage_rows(path: &Path) -> Result<Vec<StageRow>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let body = text
        .strip_prefix(&format!("{}\n", STAGE_COLUMNS.join(",")))
        .ok_or_else(|| {
            Error::bad_file(
                path,
                format!(
                    "not a stage table: the header is not {}",
                    STAGE_COLUMNS.join(",")
                ),
            )
        })?;
    csv_to_rows(body).map_err(|e| Error::bad_file(path, format!("not a stage table: {e}")))
}

/// Read a comparison's `summary.json`.
pub fn read_summary(path: &Path) -> Result<CompareSummary> {
    let bytes = crate::io::read_regular(path, 1 << 30)?
        .ok_or_else(|| Error::bad_file(path, "missing: is this a finished comparison folder?"))?;
    serde_json::from_slice(&bytes)
        .map_err(|e| Error::bad_file(path, format!("not a comparison summary: {e}")))
}

/// The image files named by `paths` (files, or folders whose image files are taken), sorted by
/// file name. Two images with the same file name are refused: rows are keyed by it.
pub fn collect_images(paths: &[PathBuf]) -> Result<Vec<PathBuf>> {
    if paths.is_empty() {
        return Err(Error::BadArgument(
            "--images: give at least one image or folder".into(),
        ));
    }
    let mut by_name: BTreeMap<String, PathBuf> = BTreeMap::new();
    for p in paths {
        let found = if p.is_dir() {
            crate::io::list_images(p)?
        } else if p.is_file() {
            if !crate::io::is_image_path(p) {
                return Err(Error::BadArgument(format!(
                    "--images {}: not an image file (expected {})",
                    p.display(),
                    crate::io::IMAGE_EXTENSIONS.join(", ")
                )));
            }
            vec![p.clone()]
        } else {
            return Err(Error::BadArgument(format!(
                "--images {}: no such file or folder",
                p.display()
            )));
        };
        for f in found {
            let name = file_name(&f);
            if let Some(other) = by_name.get(&name) {
                if other != &f {
                    return Err(Error::BadArgument(format!(
                        "--images: {} and {} have the same file name; the tables key rows by \
                         it, so compare them in separate runs or rename one",
                        other.display(),
                        f.display()
                    )));
                }
            }
            by_name.insert(name, f);
        }
    }
    if by_name.is_empty() {
        return Err(Error::BadArgument(format!(
            "--images: no images found (looked for {})",
            crate::io::IMAGE_EXTENSIONS.join(", ")
        )));
    }
    Ok(by_name.into_values().collect())
}

fn semantics(s: &Session) -> String {
    format!(
        "{}/{}",
        s.semantics.pad_order.name(),
        s.semantics.small_stage.name()
    )
}

/// One image's rows and its contribution to the pool, from the two forward passes.
fn image_rows(
    name: &str,
    a: &StageOutputs,
    b: &StageOutputs,
    pool: Option<&mut Pool>,
) -> Result<Vec<StageRow>> {
    if a.stages.len() != b.stages.len() {
        return Err(Error::Internal(format!(
            "{name}: {} stages in A, {} in B",
            a.stages.len(),
            b.stages.len()
        )));
    }
    let mut rows = Vec::new();
    let mut pool = pool;
    for s in 0..a.stages.len() {
        let (ta, tb) = (stage_tokens(a, s)?, stage_tokens(b, s)?);
        if (ta.rows, ta.cols) != (tb.rows, tb.cols) {
            return Err(Error::Internal(format!(
                "{name}: stage {s} has {}x{} tokens in A but {}x{} in B",
                ta.rows, ta.cols, tb.rows, tb.cols
            )));
        }
        let n = ta.len();
        let cka = linear_cka(&ta.data, &tb.data, n, ta.channels, tb.channels)?;
        let cos = (ta.channels == tb.channels)
            .then(|| token_cosines(&ta, &tb))
            .transpose()?;
        let stats = cos.as_ref().and_then(|c| {
            let mut s = CosineSums::default();
            s.push(c);
            s.stats()
        });
        if let Some(p) = pool.as_deref_mut() {
            p.add(
                s,
                ta.channels,
                tb.channels,
                &ta.data,
                &tb.data,
                cos.as_deref(),
            )?;
        }
        rows.push(StageRow {
            image: name.to_string(),
            stage: s,
            linear_cka: cka,
            mean_cosine: stats.map(|c| c.mean),
            min_cosine: stats.map(|c| c.min),
            tokens: n as u64,
        });
    }
    Ok(rows)
}

struct Context<'a> {
    args: &'a CompareOptions,
    a: Session,
    b: Session,
    settings: String,
    hashes: ContentHashes,
    done_dir: PathBuf,
    figures_dir: Option<PathBuf>,
}

enum Done {
    Computed(Vec<StageRow>),
    Reused(Vec<StageRow>),
}

impl Context<'_> {
    fn process(&self, image: &Path, in_pool: bool, pool: &mut Pool) -> Result<Done> {
        let name = file_name(image);
        let hash = self.hashes.hash(image)?;
        let record_path = self.done_dir.join(format!("{name}.json"));
        let figure_path = self
            .figures_dir
            .as_ref()
            .map(|d| d.join(crate::io::figure_file_name(image, "compare")));
        let inputs = Inputs {
            settings: self.settings.clone(),
            image: hash,
        };
        if in_pool && !self.args.force && figure_path.as_ref().is_none_or(|p| p.is_file()) {
            let rec = std::fs::read_to_string(&record_path)
                .ok()
                .and_then(|t| serde_json::from_str::<Record>(&t).ok())
                .filter(|r| r.inputs == inputs);
            if let Some(rows) = rec.and_then(|r| csv_to_rows(&r.csv).ok()) {
                return Ok(Done::Reused(rows));
            }
        }
        let _ = std::fs::remove_file(&record_path);
        let oa = self.a.run_image(image, false, false)?;
        let ob = self.b.run_image(image, false, false)?;
        // An image already in the pooled sums must not be added twice.
        let mut scratch = Pool::default();
        let target = if in_pool { &mut scratch } else { &mut *pool };
        let rows = image_rows(&name, &oa, &ob, Some(target))?;
        if let Some(p) = &figure_path {
            self.figure(image, &oa, &ob, p)?;
        }
        let record = Record {
            inputs,
            csv: rows_to_csv(&rows)?,
        };
        let text =
            serde_json::to_string_pretty(&record).map_err(|e| Error::Internal(e.to_string()))?;
        write_text_atomic(&record_path, &text)?;
        Ok(Done::Computed(rows))
    }

    fn figure(
        &self,
        image_path: &Path,
        oa: &StageOutputs,
        ob: &StageOutputs,
        path: &Path,
    ) -> Result<()> {
        let image = crate::engine::input::load_image(image_path)?;
        let scale = render::default_figure_scale(image.height());
        let colormap = Colormap::Viridis;
        let spec = ScaleSpec::default();
        let pair = prepare_pair_view(oa, ob, &TokenNorm, &spec)?;
        let fig = render::compose_pair_figure(&render::PairFigureSpec {
            image: &image,
            geometry: &oa.geometry,
            pair: &pair,
            style: render::figure_panel_style(colormap, 0.6, Overlays::default(), scale),
            names: (self.a.checkpoint_name(), self.b.checkpoint_name()),
            notes: vec![render::scale_note(&spec, colormap)],
            text_px: render::figure_text_px(scale),
        })?;
        crate::io::save_png_atomic(&fig, path)
    }
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

/// Write `drift.csv` and `unmatched.txt`.
pub fn write_drift(drift: &Drift, csv_path: &Path, unmatched_path: &Path) -> Result<()> {
    crate::io::write_atomic(csv_path, |tmp| {
        let csv_err = |e: csv::Error| Error::bad_file(csv_path, format!("cannot write: {e}"));
        let mut w = csv::WriterBuilder::new()
            .has_headers(false)
            .from_path(tmp)
            .map_err(csv_err)?;
        w.write_record(DRIFT_COLUMNS).map_err(csv_err)?;
        for r in &drift.rows {
            w.serialize(r).map_err(csv_err)?;
        }
        w.flush().map_err(|e| Error::io(csv_path, e))
    })?;
    let mut text = String::from(
        "# Backbone tensors that could not be compared (only in one checkpoint, or of another \
         shape), by their timm >= 0.9 name and each file's own name;\n# then file tensors that \
         are no part of the backbone (heads, buffers), by their name in the file.\n",
    );
    for l in drift.unmatched.iter().chain(&drift.not_compared) {
        text.push_str(l);
        text.push('\n');
    }
    write_text_atomic(unmatched_path, &text)
}

/// Write `stages.csv`: the image rows in order, then the pooled rows.
pub fn write_stages(path: &Path, images: &[Vec<StageRow>], pooled: &[StageRow]) -> Result<usize> {
    let mut text = format!("{}\n", STAGE_COLUMNS.join(","));
    let mut n = 0;
    for rows in images {
        text.push_str(&rows_to_csv(rows)?);
        n += rows.len();
    }
    text.push_str(&rows_to_csv(pooled)?);
    write_text_atomic(path, &text)?;
    Ok(n + pooled.len())
}

fn load_pool_state(done: &Path, settings: &str) -> Option<(PoolState, Pool)> {
    let text = std::fs::read_to_string(done.join(POOL_STATE)).ok()?;
    let st: PoolState = serde_json::from_str(&text).ok()?;
    if st.settings != settings || st.file.contains('/') {
        return None;
    }
    let pool = Pool::load(&done.join(&st.file)).ok()?;
    Some((st, pool))
}

fn save_pool_state(
    done: &Path,
    settings: &str,
    images: &BTreeSet<(String, String)>,
    pool: &Pool,
    counter: &mut u64,
) -> Result<()> {
    // The sums go to a new file first; the state file that names it is the commit point.
    *counter += 1;
    let file = format!("pooled-{}-{counter}.safetensors", std::process::id());
    pool.save(&done.join(&file))?;
    let old = std::fs::read_to_string(done.join(POOL_STATE))
        .ok()
        .and_then(|t| serde_json::from_str::<PoolState>(&t).ok());
    let st = PoolState {
        settings: settings.to_string(),
        images: images.clone(),
        file,
    };
    let text = serde_json::to_string(&st).map_err(|e| Error::Internal(e.to_string()))?;
    write_text_atomic(&done.join(POOL_STATE), &text)?;
    if let Some(o) = old.filter(|o| o.file != st.file && !o.file.contains('/')) {
        let _ = std::fs::remove_file(done.join(o.file));
    }
    Ok(())
}

/// Run the comparison and return what it did. Images that fail are listed in the summary and
/// skipped; problems with the checkpoints, folders or options stop the run.
pub fn run_compare(args: &CompareOptions) -> Result<CompareOutcome> {
    let mut images = collect_images(&args.images)?;
    if let Some(shard) = &args.shard {
        images.retain(|p| shard.contains(&file_name(p)));
    }
    let out_dir = args.out_dir();
    let paths = [
        STAGES_NAME,
        DRIFT_NAME,
        UNMATCHED_NAME,
        SUMMARY_NAME,
        POOLED_NAME,
    ]
    .map(|n| out_dir.join(n));
    let mut inputs = vec![
        ("--base", args.base.weights.as_path()),
        ("--tuned", args.tuned.weights.as_path()),
    ];
    if let Some(c) = &args.base.config {
        inputs.push(("--config", c.as_path()));
    }
    if let Some(c) = &args.tuned.config {
        inputs.push(("--tuned-config", c.as_path()));
    }
    let outputs: Vec<(&str, &Path)> = paths.iter().map(|p| ("--out", p.as_path())).collect();
    crate::io::check_outputs(&inputs, &outputs)?;
    let _lock = crate::io::lock_folder(&out_dir)?;
    let done_dir = out_dir.join(DONE_DIR);
    std::fs::create_dir_all(&done_dir).map_err(|e| Error::io(&done_dir, e))?;
    let figures_dir = args.figures.then(|| out_dir.join(FIGURES_DIR));
    if let Some(d) = &figures_dir {
        std::fs::create_dir_all(d).map_err(|e| Error::io(d, e))?;
    }
    let a = Session::open(&args.base)?;
    let b = Session::open(&args.tuned)?;
    let (ca, cb) = (&a.model.config, &b.model.config);
    if ca.depths.len() != cb.depths.len() || ca.patch != cb.patch {
        return Err(Error::bad_file(
            &args.tuned.weights,
            format!(
                "has {} stages with patch {}, but the base {} has {} stages with patch {}; \
                 only backbones with the same stage grids can be compared token by token",
                cb.depths.len(),
                cb.patch,
                args.base.weights.display(),
                ca.depths.len(),
                ca.patch
            ),
        ));
    }
    let widths_differ: Vec<usize> = (0..ca.depths.len())
        .filter(|&s| (ca.embed_dim << s) != (cb.embed_dim << s))
        .collect();
    let hashes = ContentHashes::default();
    let hash_opt = |p: &Option<PathBuf>| p.as_deref().map(|c| hashes.hash(c)).transpose();
    let settings = format!(
        "mullion {} base {} config {} semantics {} tuned {} config {} semantics {} mean {:?} std {:?}",
        env!("CARGO_PKG_VERSION"),
        checkpoint_hash(&hashes, &args.base.weights)?,
        hash_opt(&args.base.config)?.as_deref().unwrap_or("none"),
        semantics(&a),
        checkpoint_hash(&hashes, &args.tuned.weights)?,
        hash_opt(&args.tuned.config)?.as_deref().unwrap_or("none"),
        semantics(&b),
        a.norm.mean,
        a.norm.std
    );
    if (a.norm.mean, a.norm.std) != (b.norm.mean, b.norm.std) {
        return Err(Error::Internal(
            "both checkpoints must see the same normalised input".into(),
        ));
    }

    // The drift needs only the two files' tensors.
    let drift = weight_drift(
        &Checkpoint::open(&args.base.weights)?,
        &Checkpoint::open(&args.tuned.weights)?,
    )?;
    write_drift(&drift, &paths[1], &paths[2])?;

    let (mut included, mut pool) = match (args.force, load_pool_state(&done_dir, &settings)) {
        (false, Some((st, pool))) => (st.images, pool),
        _ => (BTreeSet::new(), Pool::default()),
    };
    // Sums that hold an image no longer in the plan (gone or changed) cannot be taken apart.
    let mut current: BTreeMap<String, String> = BTreeMap::new();
    for p in &images {
        current.insert(file_name(p), hashes.hash(p)?);
    }
    if included.iter().any(|(n, h)| current.get(n) != Some(h)) {
        included.clear();
        pool = Pool::default();
    }
    let ctx = Context {
        args,
        a,
        b,
        settings: settings.clone(),
        hashes,
        done_dir: done_dir.clone(),
        figures_dir,
    };
    let pb = progress_bar(images.len());
    let (mut computed, mut reused, mut failed) = (Vec::new(), Vec::new(), Vec::new());
    let mut all_rows: Vec<Vec<StageRow>> = Vec::new();
    let mut last_save = Instant::now();
    let mut counter = 0u64;
    for image in &images {
        let name = file_name(image);
        pb.set_message(name.clone());
        let key = (name.clone(), current[&name].clone());
        let in_pool = included.contains(&key);
        match ctx.process(image, in_pool, &mut pool) {
            Ok(done) => {
                let rows = match done {
                    Done::Computed(r) => {
                        computed.push(name.clone());
                        r
                    }
                    Done::Reused(r) => {
                        reused.push(name.clone());
                        r
                    }
                };
                included.insert(key);
                all_rows.push(rows);
            }
            Err(e) => {
                let _ = std::fs::remove_file(done_dir.join(format!("{name}.json")));
                pb.suspend(|| eprintln!("mullion: skipped {name}: {e}"));
                failed.push(FailedImage {
                    image: name.clone(),
                    error: e.to_string(),
                });
            }
        }
        if last_save.elapsed() >= SAVE_EVERY {
            save_pool_state(&done_dir, &settings, &included, &pool, &mut counter)?;
            last_save = Instant::now();
        }
        pb.inc(1);
    }
    pb.finish_and_clear();
    save_pool_state(&done_dir, &settings, &included, &pool, &mut counter)?;
    // An image of the saved sums that fails now is still counted in them: the sums are
    // discarded so the next run computes every image again.
    if let Some(f) = failed
        .iter()
        .find(|f| included.iter().any(|(n, _)| *n == f.image))
    {
        let _ = std::fs::remove_file(done_dir.join(POOL_STATE));
        return Err(Error::bad_file(
            out_dir.join(DONE_DIR),
            format!(
                "{} is in the pooled sums of an earlier run but failed now ({}); those sums                  were discarded, run again to compute every image afresh",
                f.image, f.error
            ),
        ));
    }
    pool.save(&paths[4])?;
    write_stages(&paths[0], &all_rows, &pool.rows())?;
    let summary = CompareSummary {
        schema: SUMMARY_SCHEMA.into(),
        version: 1,
        caution: CAUTION.into(),
        base: file_name(&args.base.weights),
        tuned: file_name(&args.tuned.weights),
        base_semantics: semantics(&ctx.a),
        tuned_semantics: semantics(&ctx.b),
        images: images.len(),
        computed: computed.len(),
        reused: reused.len(),
        failed,
        widths_differ,
        drift_rows: drift.rows.len(),
        unmatched: drift.unmatched.len(),
        shard: args.shard.map(|s| ShardInfo {
            index: s.index,
            count: s.count,
            settings: settings.clone(),
        }),
    };
    let mut text =
        serde_json::to_string_pretty(&summary).map_err(|e| Error::Internal(e.to_string()))?;
    text.push('\n');
    write_text_atomic(&paths[3], &text)?;
    Ok(CompareOutcome {
        stages_csv: paths[0].clone(),
        drift_csv: paths[1].clone(),
        unmatched: paths[2].clone(),
        summary_path: paths[3].clone(),
        summary,
        computed,
        reused,
    })
}
