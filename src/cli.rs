//! The command line: argument definitions and the headless commands.
//!
//! Arguments are parsed here, validated into settings, and the work is done by library
//! functions; `main` only maps the outcome to an exit status (0 done, 1 runtime failure, 2 usage).

use crate::backbone::{
    Backbone, Checkpoint, Config, ConfigOverride, ForwardOptions, LoadReport, RunControl,
    StageOutputs,
};
use crate::error::{Error, Result};
use crate::geometry::{PadOrder, Semantics, SmallStage};
use crate::input::{self, Normalisation};
use candle_core::Tensor;
use clap::{Args, Parser, Subcommand, ValueEnum};
use std::collections::HashMap;
use std::path::{Path, PathBuf};

#[derive(Parser, Debug)]
#[command(
    name = "mullion",
    version,
    about = "See what each stage of a shifted-window vision transformer backbone responds to, on your own images, on the CPU."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Option<Command>,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Write the patch embedding and every stage's output of one image to a safetensors file.
    Features(FeaturesArgs),
    /// Print how a checkpoint loads: layout, shape, parameters, tensors used and ignored.
    Inspect(InspectArgs),
    /// Time forward passes of a published model size with random weights.
    Bench(BenchArgs),
    /// Run a checkpoint on one image and print a per-stage summary.
    Summary(SummaryArgs),
    /// Save the stage-by-stage figure of one image (and, if asked, per-stage statistics).
    Figure(crate::figure_cli::FigureArgs),
    /// Tabulate, per labelled region of a folder of images, how each stage responds inside it.
    Report(crate::report_cli::ReportArgs),
    /// Open the window on the given images or folders.
    Open(OpenArgs),
    /// Regenerate the synthetic demo images (seedling trays) and their cell labels.
    SampleData(SampleDataArgs),
    /// Train the bundled demo checkpoint on generated seedling-tray images (about 15 minutes
    /// on 2 cores); writes demo.safetensors, demo-early.safetensors and MODEL_CARD.md.
    TrainDemo(TrainDemoArgs),
}

#[derive(Args, Debug)]
pub struct TrainDemoArgs {
    /// Folder to write the checkpoints and the model card into.
    #[arg(long, default_value = "sample-data", value_name = "DIR")]
    pub out: PathBuf,
    /// Optimisation steps.
    #[arg(long, default_value_t = 600)]
    pub steps: usize,
    /// Images per step.
    #[arg(long, default_value_t = 4)]
    pub batch: usize,
    /// Stop after this many minutes even if steps remain.
    #[arg(long, default_value_t = 25.0)]
    pub minutes: f64,
}

pub fn train_demo(args: &TrainDemoArgs) -> Result<()> {
    if !args.out.is_dir() {
        return Err(Error::bad_file(
            &args.out,
            "the output folder does not exist",
        ));
    }
    let spec = crate::train::TrainSpec {
        steps: args.steps,
        batch: args.batch,
        max_seconds: Some(args.minutes * 60.0),
        ..Default::default()
    };
    let start = std::time::Instant::now();
    let (model, log) = crate::train::train(&spec, Some(&args.out), |step, loss| {
        if step % 10 == 0 {
            eprintln!(
                "step {step:>4}  loss {loss:.4}  {:.0} s",
                start.elapsed().as_secs_f64()
            );
        }
    })?;
    let card = crate::train::model_card(&spec, &model, &log, &args.out)?;
    let card_path = args.out.join("MODEL_CARD.md");
    crate::render::write_atomic(&card_path, |tmp| {
        std::fs::write(tmp, &card).map_err(|e| Error::io(tmp, e))
    })?;
    eprintln!("wrote {}", card_path.display());
    Ok(())
}

#[derive(Args, Debug)]
pub struct SampleDataArgs {
    /// Folder to write into.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
}

pub fn sample_data(args: &SampleDataArgs) -> Result<()> {
    std::fs::create_dir_all(&args.out).map_err(|e| Error::io(&args.out, e))?;
    let written = crate::scene::write_sample_set(&args.out).map_err(|e| Error::io(&args.out, e))?;
    for p in written {
        println!("{}", p.display());
    }
    Ok(())
}

#[derive(Args, Debug)]
pub struct OpenArgs {
    /// Image files or folders of images.
    pub images: Vec<PathBuf>,
    /// Checkpoint file [default: random weights, said so on screen].
    #[arg(long, value_name = "FILE")]
    pub weights: Option<PathBuf>,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum PadOrderArg {
    PadThenShift,
    ShiftThenPad,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum SmallStageArg {
    Clamp,
    PadUp,
    ClampPerAxis,
}

/// Options shared by every command that runs a checkpoint on an image.
#[derive(Args, Debug, Clone)]
pub struct RunArgs {
    /// Checkpoint file (.safetensors, .pth, .pt, .bin).
    #[arg(long, value_name = "FILE")]
    pub weights: PathBuf,
    /// JSON file overriding the shape read from the tensors (patch, embed_dim, depths, heads,
    /// window, mlp_ratio, pad_order, small_stage).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Padding order in shifted blocks [default: from the checkpoint's layout].
    #[arg(long, value_enum)]
    pub pad_order: Option<PadOrderArg>,
    /// What a stage not larger than the window does [default: from the checkpoint's layout].
    #[arg(long, value_enum)]
    pub small_stage: Option<SmallStageArg>,
    /// Normalisation mean, R,G,B [default: ImageNet 0.485,0.456,0.406].
    #[arg(long, value_parser = input::parse_triple, value_name = "R,G,B")]
    pub mean: Option<[f32; 3]>,
    /// Normalisation std, R,G,B [default: ImageNet 0.229,0.224,0.225].
    #[arg(long, value_parser = input::parse_triple, value_name = "R,G,B")]
    pub std: Option<[f32; 3]>,
    /// Refuse inputs whose forward pass would need more memory than this.
    #[arg(long, default_value_t = 12.0, value_name = "GB")]
    pub max_memory_gb: f64,
}

#[derive(Args, Debug)]
pub struct FeaturesArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
    /// Output safetensors file.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Also write `stage{i}_norm`, the per-stage output norms detector backbones carry.
    #[arg(long)]
    pub stage_norms: bool,
    /// Also write `final_norm`, the final norm applied to the last stage.
    #[arg(long)]
    pub final_norm: bool,
}

#[derive(Args, Debug)]
pub struct InspectArgs {
    /// Checkpoint file.
    pub checkpoint: PathBuf,
    /// JSON file overriding the inferred shape.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Print the report as JSON.
    #[arg(long)]
    pub json: bool,
}

#[derive(Args, Debug)]
pub struct BenchArgs {
    /// Published model size: tiny, small, base, large (or T, S, B, L).
    #[arg(long, default_value = "tiny")]
    pub preset: String,
    /// Square input side in pixels (or HxW).
    #[arg(long, default_value = "224")]
    pub size: String,
    /// Timed runs after one warm-up.
    #[arg(long, default_value_t = 10)]
    pub runs: usize,
}

#[derive(Args, Debug)]
pub struct SummaryArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
}

impl From<PadOrderArg> for PadOrder {
    fn from(a: PadOrderArg) -> Self {
        match a {
            PadOrderArg::PadThenShift => PadOrder::PadThenShift,
            PadOrderArg::ShiftThenPad => PadOrder::ShiftThenPad,
        }
    }
}

impl From<SmallStageArg> for SmallStage {
    fn from(a: SmallStageArg) -> Self {
        match a {
            SmallStageArg::Clamp => SmallStage::Clamp,
            SmallStageArg::PadUp => SmallStage::PadUp,
            SmallStageArg::ClampPerAxis => SmallStage::ClampPerAxis,
        }
    }
}

/// Read an explicit configuration file.
pub fn read_override(path: Option<&Path>) -> Result<ConfigOverride> {
    let Some(path) = path else {
        return Ok(ConfigOverride::default());
    };
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    serde_json::from_str(&text)
        .map_err(|e| Error::bad_file(path, format!("not a valid config: {e}")))
}

/// A loaded checkpoint with the settings of one run: the validated form of [`RunArgs`].
pub struct Session {
    pub model: Backbone,
    pub report: LoadReport,
    pub semantics: Semantics,
    pub norm: Normalisation,
    pub memory_limit: u64,
}

impl Session {
    pub fn open(args: &RunArgs) -> Result<Session> {
        let over = read_override(args.config.as_deref())?;
        let ckpt = Checkpoint::open(&args.weights)?;
        let model = Backbone::from_checkpoint(&ckpt, &over)?;
        let report = LoadReport::new(&ckpt, &model);
        let mut semantics = model.default_semantics;
        if let Some(p) = args.pad_order {
            semantics.pad_order = p.into();
        }
        if let Some(s) = args.small_stage {
            semantics.small_stage = s.into();
        }
        let d = Normalisation::IMAGENET;
        let norm = Normalisation {
            mean: args.mean.unwrap_or(d.mean),
            std: args.std.unwrap_or(d.std),
        };
        norm.validate()?;
        if !(args.max_memory_gb > 0.0) {
            return Err(Error::BadArgument(
                "--max-memory-gb must be positive".into(),
            ));
        }
        Ok(Session {
            model,
            report,
            semantics,
            norm,
            memory_limit: (args.max_memory_gb * 1e9) as u64,
        })
    }

    /// Decode, check and run one image.
    pub fn run_image(
        &self,
        path: &Path,
        stage_norms: bool,
        final_norm: bool,
    ) -> Result<StageOutputs> {
        let img = input::load_image(path)?;
        let (w, h) = img.dimensions();
        let dims = (h as usize, w as usize);
        self.model
            .check_memory(dims, Some(self.semantics), self.memory_limit)
            .map_err(|e| match e {
                Error::Limit(m) => Error::Limit(format!("{}: {m}", path.display())),
                other => other,
            })?;
        let x = input::normalise(&img, &self.norm)?;
        let opts = ForwardOptions {
            semantics: Some(self.semantics),
            stage_norms,
            final_norm,
            attention_of: None,
        };
        self.model.forward(&x, &opts, &RunControl::default())
    }
}

/// Write tensors to a safetensors file atomically (temporary file in the same folder, then rename).
pub fn save_tensors(tensors: &HashMap<String, Tensor>, out: &Path) -> Result<()> {
    let dir = out
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    if !dir.is_dir() {
        return Err(Error::bad_file(dir, "the output folder does not exist"));
    }
    let name = out
        .file_name()
        .ok_or_else(|| Error::BadArgument(format!("{}: not a file name", out.display())))?;
    let tmp = dir.join(format!(".{}.partial", name.to_string_lossy()));
    candle_core::safetensors::save(tensors, &tmp).map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        Error::bad_file(out, format!("cannot write: {e}"))
    })?;
    std::fs::rename(&tmp, out).map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        Error::io(out, e)
    })
}

pub fn features(args: &FeaturesArgs) -> Result<()> {
    let session = Session::open(&args.run)?;
    if args.stage_norms && !session.model.has_stage_norms() {
        return Err(Error::bad_file(
            &args.run.weights,
            "--stage-norms: this checkpoint has no per-stage output norms",
        ));
    }
    if args.final_norm && !session.model.has_final_norm() {
        return Err(Error::bad_file(
            &args.run.weights,
            "--final-norm: this checkpoint has no final norm",
        ));
    }
    let out = session.run_image(&args.image, args.stage_norms, args.final_norm)?;
    let mut tensors = HashMap::new();
    let nhwc = |t: &Tensor| t.unsqueeze(0);
    tensors.insert("embed".to_string(), nhwc(&out.embed)?);
    for (i, t) in out.stages.iter().enumerate() {
        tensors.insert(format!("stage{i}"), nhwc(t)?);
    }
    for (i, t) in out.stage_norms.iter().flatten().enumerate() {
        tensors.insert(format!("stage{i}_norm"), nhwc(t)?);
    }
    if let Some(t) = &out.final_norm {
        tensors.insert("final_norm".to_string(), nhwc(t)?);
    }
    save_tensors(&tensors, &args.out)?;
    eprintln!(
        "wrote {} ({} tensors; {} and small stages '{}')",
        args.out.display(),
        tensors.len(),
        session.semantics.pad_order.name(),
        session.semantics.small_stage.name()
    );
    Ok(())
}

pub fn inspect(args: &InspectArgs) -> Result<()> {
    let over = read_override(args.config.as_deref())?;
    let ckpt = Checkpoint::open(&args.checkpoint)?;
    let model = Backbone::from_checkpoint(&ckpt, &over)?;
    let report = LoadReport::new(&ckpt, &model);
    if args.json {
        println!(
            "{}",
            serde_json::to_string_pretty(&report).map_err(|e| Error::Internal(e.to_string()))?
        );
    } else {
        print!("{report}");
    }
    Ok(())
}

/// `S` or `HxW` into (height, width).
pub fn parse_size(s: &str) -> Result<(usize, usize)> {
    let bad = || {
        Error::BadArgument(format!(
            "size '{s}': expected N or HxW, e.g. 224 or 480x640"
        ))
    };
    let parse = |p: &str| p.trim().parse::<usize>().ok().filter(|&v| v > 0);
    match s.split_once(['x', 'X']) {
        Some((h, w)) => Ok((parse(h).ok_or_else(bad)?, parse(w).ok_or_else(bad)?)),
        None => parse(s).map(|v| (v, v)).ok_or_else(bad),
    }
}

/// Peak resident memory of this process in MB (Linux; 0 elsewhere).
pub fn peak_rss_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<f64>().ok())
        })
        .map_or(0.0, |kb| kb / 1024.0)
}

pub fn bench(args: &BenchArgs) -> Result<()> {
    let config = Config::preset(&args.preset).ok_or_else(|| {
        Error::BadArgument(format!(
            "unknown preset '{}'; choose one of {}",
            args.preset,
            Config::preset_names().collect::<Vec<_>>().join(", ")
        ))
    })?;
    let (h, w) = parse_size(&args.size)?;
    if args.runs == 0 {
        return Err(Error::BadArgument("--runs must be at least 1".into()));
    }
    let model = Backbone::random(config.clone(), 0)?;
    let semantics = model.default_semantics;
    model.check_memory((h, w), None, 12_000_000_000)?;
    let x = Tensor::randn(0f32, 1f32, (3, h, w), &candle_core::Device::Cpu)?;
    let opts = ForwardOptions::default();
    let ctl = RunControl::default();
    model.forward(&x, &opts, &ctl)?; // warm-up
    let mut times = Vec::with_capacity(args.runs);
    for _ in 0..args.runs {
        let t = std::time::Instant::now();
        model.forward(&x, &opts, &ctl)?;
        times.push(t.elapsed().as_secs_f64() * 1e3);
    }
    times.sort_by(f64::total_cmp);
    let median = if times.len() % 2 == 1 {
        times[times.len() / 2]
    } else {
        (times[times.len() / 2 - 1] + times[times.len() / 2]) / 2.0
    };
    let gmac = config.multiply_adds((h, w), semantics, None) as f64 / 1e9;
    println!(
        "preset {} at {h}x{w}, random weights, {} runs: min {:.1} ms, max {:.1} ms, {:.1} GMAC ({:.1} GMAC/s)",
        args.preset,
        args.runs,
        times[0],
        times[times.len() - 1],
        gmac,
        gmac / (median / 1e3)
    );
    println!("median_ms={median:.3} peak_rss_mb={:.1}", peak_rss_mb());
    Ok(())
}

/// Per-stage numbers of one forward pass, for a quick look on the terminal.
pub fn print_summary(out: &StageOutputs) -> Result<()> {
    let g = &out.geometry;
    println!(
        "input {}x{} pixels, padded to {}x{} for patch {}",
        g.image.1, g.image.0, g.input_padded.1, g.input_padded.0, g.patch
    );
    println!("stage  tokens   channels  window  shift  padded   mean |x|   max |x|");
    for (s, t) in g.stages.iter().zip(&out.stages) {
        let b = s.blocks.get(1).or(s.blocks.first()).expect("a block");
        let norms = t.sqr()?.sum_keepdim(2)?.sqrt()?;
        let mean = norms.mean_all()?.to_scalar::<f32>()?;
        let max = norms.flatten_all()?.max(0)?.to_scalar::<f32>()?;
        println!(
            "{:>5}  {:>3}x{:<3}  {:>8}  {:>2}x{:<2}   {}x{}    {:>3}x{:<3}  {:>9.3}  {:>8.3}",
            s.index,
            s.grid.1,
            s.grid.0,
            t.dim(2)?,
            b.window().1,
            b.window().0,
            b.shift().1,
            b.shift().0,
            s.padded().1,
            s.padded().0,
            mean,
            max
        );
    }
    Ok(())
}

pub fn summary(args: &SummaryArgs) -> Result<()> {
    let session = Session::open(&args.run)?;
    print!("{}", session.report);
    let out = session.run_image(&args.image, false, false)?;
    print_summary(&out)
}

/// No arguments: open the window on the bundled demo (sample images, and the demo checkpoint
/// when one is bundled; otherwise random weights, said so on screen).
pub fn demo() -> Result<()> {
    let (images, weights) = crate::app::demo_inputs();
    crate::app::run(images, weights)
}

pub fn open(args: &OpenArgs) -> Result<()> {
    crate::app::run(args.images.clone(), args.weights.clone())
}
