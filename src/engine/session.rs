//! A checkpoint opened with the settings of one run, and one image run through it.
//!
//! This is the one place that opens a checkpoint for a run: the command line, the window and the
//! batch report all come through [`open_checkpoint`] or [`Session`]. Options are typed; the
//! command line turns its arguments into [`SessionOptions`] and nothing here knows about it.

use super::checkpoint::Checkpoint;
use super::config::ConfigOverride;
use super::geometry::{PadOrder, Semantics, SmallStage};
use super::input::{self, Normalisation, DEFAULT_MEMORY_LIMIT};
use super::model::{Backbone, ForwardOptions, LoadReport, RunControl, StageOutputs};
use crate::error::{Error, Result};
use std::path::{Path, PathBuf};

/// Largest configuration file Mullion reads (bytes); a real one is a few hundred.
pub const MAX_CONFIG_BYTES: u64 = 1 << 20;

/// Read an explicit configuration file (`None`: nothing overridden). A file that does not parse,
/// or that asks for a shape no model can have (a stage of depth 0, a size beyond the bounds in
/// [`crate::engine::config`]), is the user's argument at fault and names the file and field.
pub fn read_override(path: Option<&Path>) -> Result<ConfigOverride> {
    use super::config::{
        MAX_BLOCKS_PER_STAGE, MAX_CHANNELS, MAX_HEADS, MAX_MLP_RATIO, MAX_PATCH, MAX_STAGES,
        MAX_WINDOW,
    };
    let Some(path) = path else {
        return Ok(ConfigOverride::default());
    };
    let bytes = crate::io::read_regular(path, MAX_CONFIG_BYTES)
        .map_err(|e| Error::BadArgument(format!("--config: {e}")))?
        .ok_or_else(|| Error::BadArgument(format!("--config {}: no such file", path.display())))?;
    let over: ConfigOverride = serde_json::from_slice(&bytes)
        .map_err(|e| Error::BadArgument(format!("{}: not a valid config: {e}", path.display())))?;
    let bad =
        |field: &str, m: String| Error::BadArgument(format!("{}: \"{field}\" {m}", path.display()));
    let within = |field: &str, v: usize, max: usize| {
        if v == 0 || v > max {
            Err(bad(field, format!("is {v}; expected 1 to {max}")))
        } else {
            Ok(())
        }
    };
    if let Some(depths) = &over.depths {
        if depths.is_empty() {
            return Err(bad(
                "depths",
                "is empty; give one block count per stage".into(),
            ));
        }
        if depths.len() > MAX_STAGES {
            return Err(bad(
                "depths",
                format!(
                    "has {} stages; Mullion runs at most {MAX_STAGES}",
                    depths.len()
                ),
            ));
        }
        if let Some(i) = depths.iter().position(|&d| d == 0) {
            return Err(bad(
                "depths",
                format!("gives stage {i} no block; every stage needs at least one"),
            ));
        }
        for &d in depths {
            within("depths", d, MAX_BLOCKS_PER_STAGE)?;
        }
    }
    if let Some(heads) = &over.heads {
        if heads.contains(&0) {
            return Err(bad(
                "heads",
                "has a zero; every stage needs at least one head".into(),
            ));
        }
        if heads.len() > MAX_STAGES {
            return Err(bad("heads", format!("has more than {MAX_STAGES} entries")));
        }
        for &h in heads {
            within("heads", h, MAX_HEADS)?;
        }
    }
    if let Some(w) = over.window {
        let (a, b) = w.dims();
        within("window", a, MAX_WINDOW)?;
        within("window", b, MAX_WINDOW)?;
    }
    if let Some(p) = over.patch {
        within("patch", p, MAX_PATCH)?;
    }
    match &over.trained_window {
        Some(super::config::TrainedWindow::All(m)) if *m > MAX_WINDOW => {
            within("trained_window", *m, MAX_WINDOW)?
        }
        Some(super::config::TrainedWindow::PerStage(v)) => {
            if v.len() > MAX_STAGES {
                return Err(bad(
                    "trained_window",
                    format!("has more than {MAX_STAGES} entries"),
                ));
            }
            for &m in v.iter().filter(|&&m| m > 0) {
                within("trained_window", m, MAX_WINDOW)?;
            }
        }
        _ => {}
    }
    if let Some(b) = over.built_for {
        let (h, w) = b.dims();
        within("built_for", h, 1 << 20)?;
        within("built_for", w, 1 << 20)?;
    }
    if let Some(c) = over.embed_dim {
        within("embed_dim", c, MAX_CHANNELS)?;
    }
    if let Some(r) = over.mlp_ratio {
        if !(r > 0.0 && r <= MAX_MLP_RATIO) {
            return Err(bad(
                "mlp_ratio",
                format!("is {r}; expected above 0 and at most {MAX_MLP_RATIO}"),
            ));
        }
    }
    Ok(over)
}

/// A checkpoint built into a backbone, with the report of how it loaded.
pub struct LoadedCheckpoint {
    pub model: Backbone,
    pub report: LoadReport,
}

/// Open `weights` (safetensors or a PyTorch pickle), read the shape off its tensors, apply the
/// optional configuration file and build the backbone.
pub fn open_checkpoint(weights: &Path, config: Option<&Path>) -> Result<LoadedCheckpoint> {
    open_checkpoint_with(weights, &read_override(config)?)
}

/// [`open_checkpoint`] with the overrides already read (the window's: from `mullion open
/// --config`, or the window size typed in when a Swin V2 checkpoint does not state it).
pub fn open_checkpoint_with(weights: &Path, over: &ConfigOverride) -> Result<LoadedCheckpoint> {
    let ckpt = Checkpoint::open(weights)?;
    let model = Backbone::from_checkpoint(&ckpt, over)?;
    let report = LoadReport::new(&ckpt, &model);
    Ok(LoadedCheckpoint { model, report })
}

/// Everything a run needs besides the image, already typed.
#[derive(Clone, Debug)]
pub struct SessionOptions {
    /// Checkpoint file.
    pub weights: PathBuf,
    /// Optional JSON file overriding the shape read from the tensors.
    pub config: Option<PathBuf>,
    /// Padding order in shifted blocks; `None`: the checkpoint layout's default.
    pub pad_order: Option<PadOrder>,
    /// Small-stage rule; `None`: the checkpoint layout's default.
    pub small_stage: Option<SmallStage>,
    /// Normalisation; `None` for a field: ImageNet's.
    pub mean: Option<[f32; 3]>,
    pub std: Option<[f32; 3]>,
    /// Refuse inputs whose forward pass would need more bytes than this.
    pub memory_limit: u64,
}

impl SessionOptions {
    /// Defaults for `weights`: the layout's padding rules, ImageNet normalisation, the default
    /// memory limit.
    pub fn new(weights: impl Into<PathBuf>) -> Self {
        SessionOptions {
            weights: weights.into(),
            config: None,
            pad_order: None,
            small_stage: None,
            mean: None,
            std: None,
            memory_limit: DEFAULT_MEMORY_LIMIT,
        }
    }
}

impl SessionOptions {
    /// The files a run of `image` reads, named by the flag that gave them (`--weights`,
    /// `--image`, `--config`): what [`crate::io::check_outputs`] keeps outputs apart from.
    pub fn run_inputs<'a>(&'a self, image: &'a Path) -> Vec<(&'static str, &'a Path)> {
        let mut v = vec![("--weights", self.weights.as_path()), ("--image", image)];
        if let Some(c) = &self.config {
            v.push(("--config", c.as_path()));
        }
        v
    }
}

/// A loaded checkpoint with the settings of one run: the validated form of [`SessionOptions`].
pub struct Session {
    pub options: SessionOptions,
    pub model: Backbone,
    pub report: LoadReport,
    pub semantics: Semantics,
    pub norm: Normalisation,
    pub memory_limit: u64,
}

impl Session {
    pub fn open(options: &SessionOptions) -> Result<Session> {
        let d = Normalisation::IMAGENET;
        let norm = Normalisation {
            mean: options.mean.unwrap_or(d.mean),
            std: options.std.unwrap_or(d.std),
        };
        norm.validate()?;
        if options.memory_limit == 0 {
            return Err(Error::BadArgument(
                "the memory limit must be positive".into(),
            ));
        }
        let LoadedCheckpoint { model, report } =
            open_checkpoint(&options.weights, options.config.as_deref())?;
        let mut semantics = model.default_semantics;
        if let Some(p) = options.pad_order {
            semantics.pad_order = p;
        }
        if let Some(s) = options.small_stage {
            semantics.small_stage = s;
        }
        Ok(Session {
            options: options.clone(),
            model,
            report,
            semantics,
            norm,
            memory_limit: options.memory_limit,
        })
    }

    /// Peak bytes of running an image with this header: the process, the weights, and the
    /// larger of decoding (see [`input::ImageHeader::decode_peak_bytes`]) and the forward pass
    /// (see [`Backbone::forward_peak_bytes`]). `None` when too large to count.
    pub fn estimate_run_bytes(&self, header: &input::ImageHeader) -> Option<u64> {
        let dims = (header.height as usize, header.width as usize);
        let forward = self.model.forward_peak_bytes(dims, Some(self.semantics))?;
        super::model::BASE_BYTES
            .checked_add(self.model.weight_bytes())?
            .checked_add(forward.max(header.decode_peak_bytes()?))
    }

    /// Decode, check and run one image. The memory a run needs is estimated from the image's
    /// header and checked against the limit before any pixel is decoded.
    pub fn run_image(
        &self,
        path: &Path,
        stage_norms: bool,
        final_norm: bool,
    ) -> Result<StageOutputs> {
        let x = self.load_input(path)?;
        let opts = ForwardOptions {
            semantics: Some(self.semantics),
            stage_norms,
            final_norm,
            ..ForwardOptions::default()
        };
        self.forward_input(path, &x, &opts)
    }

    /// Decode and normalise one image (`[chans, H, W]`, f32), after checking from its header
    /// that a run at its size fits the memory limit.
    pub fn load_input(&self, path: &Path) -> Result<candle_core::Tensor> {
        let check = |h: &input::ImageHeader| {
            let dims = (h.height as usize, h.width as usize);
            super::model::check_budget(self.estimate_run_bytes(h), dims, self.memory_limit).map_err(
                |e| match e {
                    Error::Limit(m) => Error::Limit(format!("{}: {m}", path.display())),
                    other => other,
                },
            )
        };
        // The decoded image is dropped once normalised; only the f32 input stays.
        let img = input::load_image_within(path, check)?;
        input::normalise(&img, &self.norm)
    }

    /// Run a normalised input `x` that came from `path` (named in errors); the semantics are the
    /// session's unless `opts` sets them. Inputs larger than the image (extra padding) are
    /// checked against the memory limit here.
    pub fn forward_input(
        &self,
        path: &Path,
        x: &candle_core::Tensor,
        opts: &ForwardOptions,
    ) -> Result<StageOutputs> {
        let (_, h, w) = x.dims3()?;
        let semantics = opts.semantics.unwrap_or(self.semantics);
        self.model
            .check_memory((h, w), Some(semantics), self.memory_limit)
            .map_err(|e| match e {
                Error::Limit(m) => Error::Limit(format!("{}: {m}", path.display())),
                other => other,
            })?;
        let opts = ForwardOptions {
            semantics: Some(semantics),
            ..opts.clone()
        };
        self.model
            .forward(x, &opts, &RunControl::default())
            .map_err(|e| match e {
                Error::NonFinite(m) => Error::NonFinite(format!(
                    "{}: {m} (checkpoint {})",
                    path.display(),
                    self.options.weights.display()
                )),
                other => other,
            })
    }

    /// The checkpoint's file name, for captions and tables.
    pub fn checkpoint_name(&self) -> String {
        crate::io::file_name(&self.options.weights)
    }
}
