//! One image's stage-by-stage figure through the shared renderer, and, when asked, the
//! per-stage statistics of its scalar map.

use crate::analysis::padding::{variant_input, variant_options};
use crate::analysis::{
    prepare_stage_pair, stage_stats, stats_csv, stats_json, Colormap, MapKind, ScaleSpec, TokenNorm,
};
use crate::engine::input::load_image;
use crate::engine::{ForwardOptions, Session, SessionOptions};
use crate::error::{Error, Result};
use crate::render::{self, FigureSpec, Overlays};
use std::path::PathBuf;
use std::sync::Arc;

/// Everything `mullion figure` needs, typed.
#[derive(Clone)]
pub struct FigureOptions {
    pub session: SessionOptions,
    pub image: PathBuf,
    /// Output PNG.
    pub out: PathBuf,
    pub map: Arc<dyn MapKind>,
    pub colormap: Colormap,
    /// Map opacity over the image, 0 to 1.
    pub opacity: f32,
    /// Which grids and which block pair; the line width follows the scale.
    pub overlays: Overlays,
    /// Output pixels per input pixel; `None`: [`render::default_figure_scale`].
    pub scale: Option<f32>,
    pub spec: ScaleSpec,
    /// Per-stage statistics as JSON and as CSV (scalar maps only).
    pub stats: Option<PathBuf>,
    pub csv: Option<PathBuf>,
}

impl FigureOptions {
    /// Defaults: token norm, viridis, opacity 0.6, both grids and the padding hatch, the
    /// default scale and scaling.
    pub fn new(session: SessionOptions, image: PathBuf, out: PathBuf) -> Self {
        FigureOptions {
            session,
            image,
            out,
            map: Arc::new(TokenNorm),
            colormap: Colormap::Viridis,
            opacity: 0.6,
            overlays: Overlays::default(),
            scale: None,
            spec: ScaleSpec::default(),
            stats: None,
            csv: None,
        }
    }
}

/// What a figure run wrote.
#[derive(Clone, Debug)]
pub struct FigureOutcome {
    pub width: u32,
    pub height: u32,
    pub stages: usize,
}

/// Run the image, prepare every stage's map, save the figure and any statistics. Arguments are
/// checked before the checkpoint is opened (no output may be an input or another output, or
/// anything but a new or regular file), and every output is made in memory before the first is
/// written, so a failure leaves none of them behind.
pub fn save_figure(opts: &FigureOptions) -> Result<FigureOutcome> {
    let kind = opts.map.as_ref();
    crate::io::check_png_path(&opts.out)?;
    opts.spec.validate()?;
    let is_pca = kind.id() == "pca";
    if is_pca && (opts.stats.is_some() || opts.csv.is_some()) {
        return Err(Error::BadArgument(
            "--stats/--csv need a scalar map (norm or channel:N); pca gives colours".into(),
        ));
    }
    let inputs = opts.session.run_inputs(&opts.image);
    let mut outputs = vec![("--out", opts.out.as_path())];
    if let Some(p) = &opts.stats {
        outputs.push(("--stats", p.as_path()));
    }
    if let Some(p) = &opts.csv {
        outputs.push(("--csv", p.as_path()));
    }
    crate::io::check_outputs(&inputs, &outputs)?;
    let session = Session::open(&opts.session)?;
    let depths = &session.model.config.depths;
    let deepest = depths.iter().copied().max().unwrap_or(0);
    if opts.overlays.block >= deepest {
        return Err(Error::BadArgument(format!(
            "--stage-block {}: this checkpoint's stages have {depths:?} blocks, so the block \
             is 0 to {}",
            opts.overlays.block,
            deepest.saturating_sub(1)
        )));
    }
    let (out, second) = match kind.variant() {
        None => (session.run_image(&opts.image, false, false)?, None),
        // Padding kinds compare the image's pass with a changed pass of the same checkpoint.
        Some(v) => {
            let x = session.load_input(&opts.image)?;
            let base = session.forward_input(&opts.image, &x, &ForwardOptions::default())?;
            let sem = base.geometry.semantics;
            let second = session.forward_input(
                &opts.image,
                &variant_input(v, &x)?,
                &variant_options(v, sem),
            )?;
            (base, Some(second))
        }
    };
    let image = load_image(&opts.image)?;
    let (raw, stages) = prepare_stage_pair(&out, second.as_ref(), kind, &opts.spec)?;
    let stats = if opts.stats.is_some() || opts.csv.is_some() {
        Some(stage_stats(&kind.id(), &raw, &out.geometry)?)
    } else {
        None
    };
    let scale = opts
        .scale
        .unwrap_or_else(|| render::default_figure_scale(image.height()));
    let style = render::figure_panel_style(opts.colormap, opts.opacity, opts.overlays, scale);
    let notes = if is_pca {
        vec![render::PCA_NOTE.to_string()]
    } else {
        vec![render::scale_note(&opts.spec, opts.colormap)]
    };
    let fig = render::compose_figure(&FigureSpec {
        image: &image,
        geometry: &out.geometry,
        stages: &stages,
        style,
        checkpoint: session.checkpoint_name(),
        map_label: kind.label(),
        notes,
        text_px: render::figure_text_px(scale),
    })?;
    let json = match (&stats, &opts.stats) {
        (Some(st), Some(_)) => Some(stats_json(st)?),
        _ => None,
    };
    let csv = match (&stats, &opts.csv) {
        (Some(st), Some(_)) => Some(stats_csv(st)?),
        _ => None,
    };
    crate::io::save_png_atomic(&fig, &opts.out)?;
    if let (Some(text), Some(p)) = (&json, &opts.stats) {
        crate::io::write_text_atomic(p, text)?;
    }
    if let (Some(text), Some(p)) = (&csv, &opts.csv) {
        crate::io::write_text_atomic(p, text)?;
    }
    Ok(FigureOutcome {
        width: fig.width(),
        height: fig.height(),
        stages: out.stages.len(),
    })
}
