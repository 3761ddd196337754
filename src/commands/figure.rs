//! `mullion figure`: run a checkpoint on one image and save the stage-by-stage figure (and, when
//! asked, the per-stage statistics) through the shared renderer.

use super::options::{
    parse_clip, parse_map, parse_opacity, parse_scale, ColormapArg, MapArg, RunArgs,
};
use crate::analysis::ScaleSpec;
use crate::error::Result;
use crate::headless::{save_figure, FigureOptions};
use crate::render::Overlays;
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
    #[arg(long, default_value = "norm", value_parser = parse_map, value_name = "KIND")]
    pub map: MapArg,
    /// Colour map.
    #[arg(long, value_enum, default_value = "viridis")]
    pub colormap: ColormapArg,
    /// Map opacity over the image, 0 to 1.
    #[arg(long, default_value_t = 0.6, value_parser = parse_opacity)]
    pub opacity: f32,
    /// Block whose windows the grids show: the pair 2k (regular), 2k+1 (shifted) with k = B/2.
    #[arg(long, default_value_t = 0, value_name = "B",
          value_parser = clap::value_parser!(u16).range(0..crate::engine::config::MAX_BLOCKS_PER_STAGE as i64))]
    pub stage_block: u16,
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
    #[arg(long, value_parser = parse_scale)]
    pub scale: Option<f32>,
    /// One colour scale for all stages instead of one per stage.
    #[arg(long)]
    pub shared_scale: bool,
    /// Logarithmic colour scale.
    #[arg(long)]
    pub log: bool,
    /// Percentiles that set the colour range, LOW,HIGH.
    #[arg(long, default_value = "1,99", value_parser = parse_clip, value_name = "LOW,HIGH")]
    pub clip: (f32, f32),
    /// Write per-stage statistics of the map as JSON.
    #[arg(long, value_name = "FILE")]
    pub stats: Option<PathBuf>,
    /// Write per-stage statistics of the map as CSV.
    #[arg(long, value_name = "FILE")]
    pub csv: Option<PathBuf>,
}

impl FigureArgs {
    /// The typed options these arguments ask for.
    pub fn options(&self) -> Result<FigureOptions> {
        Ok(FigureOptions {
            session: self.run.session_options()?,
            image: self.image.clone(),
            out: self.out.clone(),
            map: self.map.0.clone(),
            colormap: self.colormap.into(),
            opacity: self.opacity,
            overlays: Overlays {
                regular_grid: !self.no_grid,
                shifted_grid: !self.no_grid && !self.no_shifted_grid,
                padding: !self.no_padding,
                block: self.stage_block as usize,
                ..Overlays::default()
            },
            scale: self.scale,
            spec: ScaleSpec {
                shared_across_stages: self.shared_scale,
                log: self.log,
                clip_percentiles: self.clip,
            },
            stats: self.stats.clone(),
            csv: self.csv.clone(),
        })
    }
}

pub fn run(args: &FigureArgs) -> Result<()> {
    let done = save_figure(&args.options()?)?;
    eprintln!(
        "wrote {} ({}x{} pixels, {} stages, map {})",
        args.out.display(),
        done.width,
        done.height,
        done.stages,
        args.map.0.id()
    );
    Ok(())
}
