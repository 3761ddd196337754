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

/// Read an explicit configuration file (`None`: nothing overridden). A file that does not parse,
/// or that asks for a shape no model can have (a stage of depth 0), is the user's argument at
/// fault and names the file.
pub fn read_override(path: Option<&Path>) -> Result<ConfigOverride> {
    let Some(path) = path else {
        return Ok(ConfigOverride::default());
    };
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let over: ConfigOverride = serde_json::from_str(&text)
        .map_err(|e| Error::BadArgument(format!("{}: not a valid config: {e}", path.display())))?;
    if let Some(depths) = &over.depths {
        if depths.is_empty() {
            return Err(Error::BadArgument(format!(
                "{}: \"depths\" is empty; give one block count per stage",
                path.display()
            )));
        }
        if let Some(i) = depths.iter().position(|&d| d == 0) {
            return Err(Error::BadArgument(format!(
                "{}: \"depths\" gives stage {i} no block; every stage needs at least one",
                path.display()
            )));
        }
    }
    if over.heads.as_ref().is_some_and(|h| h.contains(&0)) {
        return Err(Error::BadArgument(format!(
            "{}: \"heads\" has a zero; every stage needs at least one head",
            path.display()
        )));
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
    let over = read_override(config)?;
    let ckpt = Checkpoint::open(weights)?;
    let model = Backbone::from_checkpoint(&ckpt, &over)?;
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

    /// The checkpoint's file name, for captions and tables.
    pub fn checkpoint_name(&self) -> String {
        crate::io::file_name(&self.options.weights)
    }
}
