//! Arguments shared by several subcommands, and the typed values they parse into. Clap stops
//! here: every command turns its arguments into the library's own typed options.

use crate::analysis::{parse_map_kind, Colormap, MapKind};
use crate::engine::geometry::{PadOrder, SmallStage};
use crate::engine::input::{memory_limit_from_gb, parse_triple, DEFAULT_MEMORY_GB, MAX_SIDE};
use crate::engine::{Config, SessionOptions};
use crate::error::{Error, Result};
use clap::{Args, ValueEnum};
use std::path::PathBuf;
use std::sync::Arc;

#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum PadOrderArg {
    PadThenShift,
    ShiftThenPad,
}

impl From<PadOrderArg> for PadOrder {
    fn from(a: PadOrderArg) -> Self {
        match a {
            PadOrderArg::PadThenShift => PadOrder::PadThenShift,
            PadOrderArg::ShiftThenPad => PadOrder::ShiftThenPad,
        }
    }
}

#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum SmallStageArg {
    Clamp,
    PadUp,
    ClampPerAxis,
    /// Windows fixed from the image size the model was built for (transformers' Swinv2).
    AsBuilt,
}

impl From<SmallStageArg> for SmallStage {
    fn from(a: SmallStageArg) -> Self {
        match a {
            SmallStageArg::Clamp => SmallStage::Clamp,
            SmallStageArg::PadUp => SmallStage::PadUp,
            SmallStageArg::ClampPerAxis => SmallStage::ClampPerAxis,
            SmallStageArg::AsBuilt => SmallStage::AsBuilt,
        }
    }
}

/// A colour map, as the command line spells it.
#[derive(Clone, Copy, Debug, Default, ValueEnum)]
pub enum ColormapArg {
    #[default]
    Viridis,
    Magma,
    Cividis,
}

impl From<ColormapArg> for Colormap {
    fn from(a: ColormapArg) -> Self {
        match a {
            ColormapArg::Viridis => Colormap::Viridis,
            ColormapArg::Magma => Colormap::Magma,
            ColormapArg::Cividis => Colormap::Cividis,
        }
    }
}

/// One of the published model sizes (Liu et al. 2021, Sec. 3.3).
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum PresetArg {
    #[value(alias = "T", alias = "t")]
    Tiny,
    #[value(alias = "S", alias = "s")]
    Small,
    #[value(alias = "B", alias = "b")]
    Base,
    #[value(alias = "L", alias = "l")]
    Large,
}

impl PresetArg {
    pub fn name(self) -> &'static str {
        match self {
            PresetArg::Tiny => "tiny",
            PresetArg::Small => "small",
            PresetArg::Base => "base",
            PresetArg::Large => "large",
        }
    }

    pub fn config(self) -> Config {
        Config::preset(self.name()).expect("every preset argument names a published size")
    }
}

/// A map kind parsed from `norm`, `channel:N` or `pca`.
#[derive(Clone)]
pub struct MapArg(pub Arc<dyn MapKind>);

impl std::fmt::Debug for MapArg {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "MapArg({})", self.0.id())
    }
}

impl MapArg {
    pub fn is_scalar(&self) -> bool {
        self.0.id() != "pca"
    }
}

/// Clap's parser for [`MapArg`].
pub fn parse_map(s: &str) -> std::result::Result<MapArg, String> {
    parse_map_kind(s)
        .map(|k| MapArg(Arc::from(k)))
        .map_err(|e| e.to_string())
}

/// Percentiles `LOW,HIGH` that set a colour range: `0 <= LOW < HIGH <= 100`.
pub fn parse_clip(s: &str) -> std::result::Result<(f32, f32), String> {
    let bad = || format!("'{s}': expected LOW,HIGH, e.g. 1,99");
    let (a, b) = s.split_once(',').ok_or_else(bad)?;
    let a: f32 = a.trim().parse().map_err(|_| bad())?;
    let b: f32 = b.trim().parse().map_err(|_| bad())?;
    if !(0.0..=100.0).contains(&a) || !(0.0..=100.0).contains(&b) || a >= b {
        return Err(format!("'{s}': percentiles need 0 <= LOW < HIGH <= 100"));
    }
    Ok((a, b))
}

/// `S` or `HxW` into (height, width), each side from 1 to [`MAX_SIDE`].
pub fn parse_size(s: &str) -> std::result::Result<(usize, usize), String> {
    let bad =
        || format!("'{s}': expected N or HxW with sides from 1 to {MAX_SIDE}, e.g. 224 or 480x640");
    let parse = |p: &str| {
        p.trim()
            .parse::<usize>()
            .ok()
            .filter(|&v| v > 0 && v <= MAX_SIDE as usize)
    };
    match s.split_once(['x', 'X']) {
        Some((h, w)) => Ok((parse(h).ok_or_else(bad)?, parse(w).ok_or_else(bad)?)),
        None => parse(s).map(|v| (v, v)).ok_or_else(bad),
    }
}

/// A normalisation mean `R,G,B`: three finite numbers.
pub fn parse_mean(s: &str) -> std::result::Result<[f32; 3], String> {
    let v = parse_triple(s)?;
    if v.iter().any(|m| !m.is_finite()) {
        return Err(format!("'{s}': the mean must be three finite numbers"));
    }
    Ok(v)
}

/// A normalisation std `R,G,B`: three positive finite numbers.
pub fn parse_std(s: &str) -> std::result::Result<[f32; 3], String> {
    let v = parse_triple(s)?;
    if v.iter().any(|d| !(d.is_finite() && *d > 0.0)) {
        return Err(format!(
            "'{s}': the std must be three positive finite numbers"
        ));
    }
    Ok(v)
}

/// A map opacity from 0 to 1.
pub fn parse_opacity(s: &str) -> std::result::Result<f32, String> {
    match s.trim().parse::<f32>() {
        Ok(v) if (0.0..=1.0).contains(&v) => Ok(v),
        _ => Err(format!("'{s}': the opacity is a number from 0 to 1")),
    }
}

/// Largest figure scale (output pixels per input pixel).
pub const MAX_SCALE: f32 = 64.0;

/// A figure scale: a positive number up to [`MAX_SCALE`].
pub fn parse_scale(s: &str) -> std::result::Result<f32, String> {
    match s.trim().parse::<f32>() {
        Ok(v) if v.is_finite() && v > 0.0 && v <= MAX_SCALE => Ok(v),
        _ => Err(format!(
            "'{s}': the scale is a positive number of output pixels per input pixel, at most \
             {MAX_SCALE}"
        )),
    }
}

/// A shard `K/N` of a split report: `1 <= K <= N`.
pub fn parse_shard(s: &str) -> std::result::Result<crate::headless::Shard, String> {
    let bad = || format!("'{s}': expected K/N with 1 <= K <= N, e.g. 2/8");
    let (k, n) = s.split_once('/').ok_or_else(bad)?;
    let k: u32 = k.trim().parse().map_err(|_| bad())?;
    let n: u32 = n.trim().parse().map_err(|_| bad())?;
    crate::headless::Shard::new(k, n).map_err(|e| format!("'{s}': {e}"))
}

/// The pads of a padding sweep, in pixels.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Pads(pub Vec<usize>);

/// `P,P,...`: distinct non-negative whole numbers of pixels, each at most
/// [`crate::analysis::padding::MAX_PAD_PX`].
pub fn parse_pads(s: &str) -> std::result::Result<Pads, String> {
    use crate::analysis::padding::MAX_PAD_PX;
    let mut out: Vec<usize> = Vec::new();
    for part in s.split(',') {
        let p: usize = part.trim().parse().map_err(|_| {
            format!(
                "'{s}': expected a comma-separated list of non-negative whole numbers of \
                 pixels, e.g. 0,8,16,32"
            )
        })?;
        if p > MAX_PAD_PX {
            return Err(format!(
                "'{s}': {p} pixels is more than the {MAX_PAD_PX} allowed"
            ));
        }
        if out.contains(&p) {
            return Err(format!("'{s}': {p} is given twice"));
        }
        out.push(p);
    }
    Ok(Pads(out))
}

/// A thread count for `--threads`: a whole number from 1 up.
pub fn parse_threads(s: &str) -> std::result::Result<usize, String> {
    crate::engine::kernels::parse_threads(s)
}

/// Largest memory limit accepted, in GB.
pub const MAX_MEMORY_GB: f64 = 1e6;

/// A memory limit in GB: a positive number up to [`MAX_MEMORY_GB`].
pub fn parse_memory_gb(s: &str) -> std::result::Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 && v <= MAX_MEMORY_GB => Ok(v),
        _ => Err(format!(
            "'{s}': the memory limit is a positive number of GB, at most {MAX_MEMORY_GB}"
        )),
    }
}

/// Options shared by every command that runs a checkpoint on an image.
#[derive(Args, Debug, Clone)]
pub struct RunArgs {
    /// Checkpoint file (.safetensors, .pth, .pt, .bin), or a transformers folder (config.json
    /// beside model.safetensors).
    #[arg(long, value_name = "FILE")]
    pub weights: PathBuf,
    /// JSON file overriding the shape read from the tensors and any config.json beside them
    /// (patch, embed_dim, depths, heads, window, mlp_ratio, pad_order, small_stage; Swin V2:
    /// trained_window, one number or one per stage, and built_for, the image size).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Padding order in shifted blocks [default: from the checkpoint's layout].
    #[arg(long, value_enum)]
    pub pad_order: Option<PadOrderArg>,
    /// What a stage not larger than the window does [default: from the checkpoint's layout].
    #[arg(long, value_enum)]
    pub small_stage: Option<SmallStageArg>,
    /// Normalisation mean, R,G,B [default: ImageNet 0.485,0.456,0.406].
    #[arg(long, value_parser = parse_mean, value_name = "R,G,B")]
    pub mean: Option<[f32; 3]>,
    /// Normalisation std, R,G,B [default: ImageNet 0.229,0.224,0.225].
    #[arg(long, value_parser = parse_std, value_name = "R,G,B")]
    pub std: Option<[f32; 3]>,
    /// Refuse inputs whose forward pass would need more memory than this.
    #[arg(long, default_value_t = DEFAULT_MEMORY_GB, value_parser = parse_memory_gb, value_name = "GB")]
    pub max_memory_gb: f64,
}

impl RunArgs {
    /// The typed session options these arguments ask for.
    pub fn session_options(&self) -> Result<SessionOptions> {
        let memory_limit = memory_limit_from_gb(self.max_memory_gb).ok_or_else(|| {
            Error::BadArgument("--max-memory-gb must be a positive number".into())
        })?;
        Ok(SessionOptions {
            weights: self.weights.clone(),
            config: self.config.clone(),
            pad_order: self.pad_order.map(Into::into),
            small_stage: self.small_stage.map(Into::into),
            mean: self.mean,
            std: self.std,
            memory_limit,
        })
    }
}
