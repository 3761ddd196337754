//! `mullion figure`: run a checkpoint on one image and save the stage-by-stage figure (and,
//! when asked, the per-stage statistics) through the shared renderer.

use crate::analysis::{self, parse_map_kind, stage_stats, Colormap, ScaleSpec};
use crate::cli::{RunArgs, Session};
use crate::error::{Error, Result};
use crate::input;
use crate::render::{self, FigureSpec, Overlays, PanelStyle};
use clap::Args;
use std::path::PathBuf;

/// Options of `mullion figure`.
#[derive(Args, Debug, Clone)]
pub struct FigureArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
    /// Output PNG file.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// What to show per token: norm (L2 norm), channel:N (one channel) or pca (top three
    /// principal components as RGB).
    #[arg(long, default_value = "norm", value_name = "KIND")]
    pub map: String,
    /// Colour map: viridis, magma or cividis.
    #[arg(long, default_value = "viridis")]
    pub colormap: String,
    /// Map opacity over the image, 0 to 1.
    #[arg(long, default_value_t = 0.6)]
    pub opacity: f32,
    /// Block whose windows the grids show: the pair 2k (regular), 2k+1 (shifted) with k = B/2.
    #[arg(long, default_value_t = 0, value_name = "B")]
    pub stage_block: usize,
    /// Draw neither window grid.
    #[arg(long)]
    pub no_grid: bool,
    /// Leave out the shifted window grid only.
    #[arg(long)]
    pub no_shifted_grid: bool,
    /// Do not hatch the padding.
    #[arg(long)]
    pub no_padding: bool,
    /// Output pixels per input pixel [default: 1, or the whole factor that makes the image at
    /// least 256 pixels tall].
    #[arg(long)]
    pub scale: Option<f32>,
    /// One colour scale for all stages instead of one per stage.
    #[arg(long)]
    pub shared_scale: bool,
    /// Logarithmic colour scale.
    #[arg(long)]
    pub log: bool,
    /// Percentiles that set the colour range, LOW,HIGH.
    #[arg(long, default_value = "1,99", value_name = "LOW,HIGH")]
    pub clip: String,
    /// Write per-stage statistics of the map as JSON.
    #[arg(long, value_name = "FILE")]
    pub stats: Option<PathBuf>,
    /// Write per-stage statistics of the map as CSV.
    #[arg(long, value_name = "FILE")]
    pub csv: Option<PathBuf>,
}

impl FigureArgs {
    /// Arguments with every default, for calling [`figure`] from code.
    pub fn new(run: RunArgs, image: PathBuf, out: PathBuf) -> Self {
        FigureArgs {
            run,
            image,
            out,
            map: "norm".into(),
            colormap: "viridis".into(),
            opacity: 0.6,
            stage_block: 0,
            no_grid: false,
            no_shifted_grid: false,
            no_padding: false,
            scale: None,
            shared_scale: false,
            log: false,
            clip: "1,99".into(),
            stats: None,
            csv: None,
        }
    }
}

fn parse_clip(s: &str) -> Result<(f32, f32)> {
    let bad = || Error::BadArgument(format!("--clip '{s}': expected LOW,HIGH, e.g. 1,99"));
    let (a, b) = s.split_once(',').ok_or_else(bad)?;
    let a: f32 = a.trim().parse().map_err(|_| bad())?;
    let b: f32 = b.trim().parse().map_err(|_| bad())?;
    Ok((a, b))
}

/// Run the image, compute the map of every stage, save the figure and any statistics.
pub fn figure(args: &FigureArgs) -> Result<()> {
    let kind = parse_map_kind(&args.map)?;
    let colormap = Colormap::parse(&args.colormap)?;
    let spec = ScaleSpec {
        shared_across_stages: args.shared_scale,
        log: args.log,
        clip_percentiles: parse_clip(&args.clip)?,
    };
    spec.validate()?;
    let is_pca = kind.id() == "pca";
    if is_pca && (args.stats.is_some() || args.csv.is_some()) {
        return Err(Error::BadArgument(
            "--stats/--csv need a scalar map (norm or channel:N); pca gives colours".into(),
        ));
    }
    let session = Session::open(&args.run)?;
    let image = input::load_image(&args.image)?;
    let out = session.run_image(&args.image, false, false)?;
    let n = out.stages.len();
    // PCA keeps its fit (for the explained variance), so its maps come from the fit below.
    let (raw, stages) = render::figure_stages(&out, kind.as_ref(), &spec)?;
    let scale = args
        .scale
        .unwrap_or_else(|| render::default_figure_scale(image.height()));
    let style = PanelStyle {
        colormap,
        opacity: args.opacity,
        overlays: Overlays {
            regular_grid: !args.no_grid,
            shifted_grid: !args.no_grid && !args.no_shifted_grid,
            padding: !args.no_padding,
            block: args.stage_block,
            grid_in_padding: true,
            line_width: if scale >= 3.0 { 2 } else { 1 },
        },
        scale,
    };
    let checkpoint = args.run.weights.file_name().map_or_else(
        || args.run.weights.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    );
    let notes = if is_pca {
        vec!["colours: each component min-max scaled over this stage's tokens of this image".into()]
    } else {
        vec![format!(
            "colour scale: {}, {}, percentiles {}-{} ({}), values beyond clamp",
            if spec.shared_across_stages {
                "shared by all stages"
            } else {
                "per stage"
            },
            if spec.log { "log10" } else { "linear" },
            spec.clip_percentiles.0,
            spec.clip_percentiles.1,
            colormap.name()
        )]
    };
    let fig = render::compose_figure(&FigureSpec {
        image: &image,
        geometry: &out.geometry,
        stages: &stages,
        style,
        checkpoint,
        map_label: kind.label(),
        notes,
        // Text grows with the panels so it stays readable next to them.
        text_px: (11.0 + 3.0 * scale).clamp(12.0, 32.0),
    })?;
    render::save_png_atomic(&fig, &args.out)?;
    if args.stats.is_some() || args.csv.is_some() {
        let stats = stage_stats(&kind.id(), &raw, &out.geometry)?;
        if let Some(p) = &args.stats {
            analysis::write_stats_json(&stats, p)?;
        }
        if let Some(p) = &args.csv {
            analysis::write_stats_csv(&stats, p)?;
        }
    }
    eprintln!(
        "wrote {} ({}x{} pixels, {} stages, map {})",
        args.out.display(),
        fig.width(),
        fig.height(),
        n,
        kind.id()
    );
    Ok(())
}
