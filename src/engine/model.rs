//! The whole backbone: patch embedding, stages of shifted-window blocks with patch merging, and
//! the forward pass that returns every stage's features.
//!
//! `forward` takes one normalised image at its own size, lays out the partition with
//! [`Geometry`], reports progress after every block and stops between blocks when cancelled.

use super::checkpoint::{block_parts, ignored_reason, Checkpoint, Family, LayoutKind, Part};
use super::config::{Config, ConfigOverride};
use super::layers::{Block, LayerNorm, PatchEmbed, PatchMerging, WeightSource};
use crate::engine::geometry::{Geometry, Semantics};
use crate::error::{Error, Result};
use candle_core::{Device, Tensor};
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use std::cell::RefCell;
use std::sync::atomic::{AtomicBool, Ordering};

pub struct Stage {
    merge: Option<PatchMerging>,
    pub blocks: Vec<Block>,
    out_norm: Option<LayerNorm>,
}

pub struct Backbone {
    pub config: Config,
    /// Padding semantics of the library the weights come from (used unless a run overrides).
    pub default_semantics: Semantics,
    embed: PatchEmbed,
    pub stages: Vec<Stage>,
    final_norm: Option<LayerNorm>,
}

/// Progress of a forward pass, reported after the patch embedding and after every block.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Progress {
    pub done: usize,
    pub total: usize,
    pub stage: usize,
}

/// How a caller watches and stops a forward pass.
#[derive(Default)]
pub struct RunControl<'a> {
    pub progress: Option<&'a (dyn Fn(Progress) + Sync)>,
    pub cancel: Option<&'a AtomicBool>,
}

impl RunControl<'_> {
    fn step(&self, p: Progress) -> Result<()> {
        if let Some(f) = self.progress {
            f(p);
        }
        match self.cancel {
            Some(c) if c.load(Ordering::Relaxed) => Err(Error::Cancelled),
            _ => Ok(()),
        }
    }
}

/// What a forward pass should compute besides the stage outputs.
#[derive(Clone, Debug, Default)]
pub struct ForwardOptions {
    /// Padding semantics; `None` uses the checkpoint's.
    pub semantics: Option<Semantics>,
    /// Apply the per-stage output norms (detector backbones carry them).
    pub stage_norms: bool,
    /// Apply the final norm to the last stage.
    pub final_norm: bool,
    /// Keep the attention weights of block (stage, block).
    pub attention_of: Option<(usize, usize)>,
    /// Keep the attention weights of every block (in [`StageOutputs::attentions`]); studies of
    /// where attention goes need all of them from one pass.
    pub attention_all: bool,
}

/// Attention weights of one block: `[windows, heads, N, N]`.
pub struct AttentionTap {
    pub stage: usize,
    pub block: usize,
    pub weights: Tensor,
}

/// Everything one forward pass returns. Feature maps are `[rows, cols, C]` (one image, NHWC
/// without the batch).
pub struct StageOutputs {
    pub geometry: Geometry,
    /// Patch embedding after its norm.
    pub embed: Tensor,
    /// Output of each stage's blocks, before the next patch merging, without any norm.
    pub stages: Vec<Tensor>,
    /// Per-stage output norms applied to `stages` (when asked and present).
    pub stage_norms: Option<Vec<Tensor>>,
    /// The final norm applied to the last stage (when asked and present).
    pub final_norm: Option<Tensor>,
    pub attention: Option<AttentionTap>,
    /// Every block's attention weights, stage by stage, when [`ForwardOptions::attention_all`].
    pub attentions: Vec<AttentionTap>,
}

impl Backbone {
    /// Build from any weight source; `stage_norms` / `final_norm` also load those norms.
    pub fn build(
        config: Config,
        src: &dyn WeightSource,
        stage_norms: bool,
        final_norm: bool,
    ) -> Result<Self> {
        config.validate().map_err(Error::BadArgument)?;
        let v2 = config.v2.as_ref();
        let embed = PatchEmbed::new(src, config.in_chans, config.embed_dim, config.patch)?;
        let mut stages = Vec::with_capacity(config.n_stages());
        for i in 0..config.n_stages() {
            let dim = config.dim(i);
            let merge = if i > 0 {
                Some(PatchMerging::new(src, i, config.dim(i - 1), v2.is_some())?)
            } else {
                None
            };
            let blocks = (0..config.depths[i])
                .map(|j| {
                    Block::new(
                        src,
                        i,
                        j,
                        dim,
                        config.heads[i],
                        config.mlp_hidden(i),
                        config.window,
                        v2,
                    )
                })
                .collect::<Result<Vec<_>>>()?;
            let out_norm = if stage_norms {
                Some(LayerNorm::new(src, dim, |s| Part::StageNorm(i, s.into()))?)
            } else {
                None
            };
            stages.push(Stage {
                merge,
                blocks,
                out_norm,
            });
        }
        let last = config.dim(config.n_stages() - 1);
        let final_norm = if final_norm {
            let eps = v2.map_or(super::layers::LN_EPS, |v| v.norm_eps);
            Some(LayerNorm::with_eps(
                src,
                last,
                |s| Part::FinalNorm(s.into()),
                eps,
            )?)
        } else {
            None
        };
        let default_semantics = LayoutKind::Timm.default_semantics(false);
        Ok(Backbone {
            config,
            default_semantics,
            embed,
            stages,
            final_norm,
        })
    }

    /// Random weights of a given shape (benchmarks, tests): LayerNorm 1/0, linear and conv
    /// weights N(0, 1/fan_in), biases and bias tables N(0, 0.02^2).
    pub fn random(config: Config, seed: u64) -> Result<Self> {
        let src = RandomWeights {
            rng: RefCell::new(rand::rngs::StdRng::seed_from_u64(seed)),
            window: config.window,
        };
        Self::build(config, &src, true, true)
    }

    /// Build from an opened checkpoint; every tensor the backbone needs must be there.
    pub fn from_checkpoint(ckpt: &Checkpoint, over: &ConfigOverride) -> Result<Self> {
        let config = ckpt.infer_config(over)?;
        let parts = required_parts(&config);
        if let Some(problem) = parts.iter().find_map(|p| ckpt.stack_problem(p)) {
            return Err(Error::bad_file(&ckpt.path, problem));
        }
        let missing: Vec<&Part> = parts.iter().filter(|p| !ckpt.present(p)).collect();
        if !missing.is_empty() {
            let n: usize = missing.iter().map(|p| ckpt.file_names(p).len()).sum();
            return Err(Error::bad_file(
                &ckpt.path,
                format!(
                    "{n} tensor(s) the backbone needs are missing ({} layout, prefix '{}', \
                     depths {:?} read from the block indices in the file): {}",
                    ckpt.layout.kind.describe(),
                    ckpt.layout.prefix,
                    config.depths,
                    describe_missing(ckpt, &missing)
                ),
            ));
        }
        let n = config.n_stages();
        let stage_norms = (0..n).all(|i| ckpt.has(&Part::StageNorm(i, "weight".into())));
        let final_norm = ckpt.has(&Part::FinalNorm("weight".into()));
        let src = CheckpointWeights(ckpt);
        let mut model =
            Self::build(config, &src, stage_norms, final_norm).map_err(|e| match e {
                Error::BadArgument(m) => Error::bad_file(&ckpt.path, m),
                other => other,
            })?;
        let mut sem = ckpt.layout.kind.default_semantics(stage_norms);
        if ckpt.family == Family::V2 && ckpt.layout.kind.is_transformers() {
            // transformers' Swinv2 fixes each stage's window when the model is built.
            sem.small_stage = crate::engine::geometry::SmallStage::AsBuilt;
        }
        if let Some(p) = over.pad_order {
            sem.pad_order = p;
        }
        if let Some(s) = over.small_stage {
            sem.small_stage = s;
        }
        model.default_semantics = sem;
        Ok(model)
    }

    pub fn has_stage_norms(&self) -> bool {
        self.stages.iter().all(|s| s.out_norm.is_some())
    }

    pub fn has_final_norm(&self) -> bool {
        self.final_norm.is_some()
    }

    /// The partition a run at `image` = (height, width) uses.
    pub fn geometry(&self, image: (usize, usize), semantics: Option<Semantics>) -> Geometry {
        Geometry::new(
            image,
            &self.config.shape(),
            semantics.unwrap_or(self.default_semantics),
        )
    }

    /// Bytes the weights take while the model is loaded (see [`Config::weight_bytes`]).
    pub fn weight_bytes(&self) -> u64 {
        self.config.weight_bytes()
    }

    /// Peak bytes of the tensors of one forward pass at `image` (see
    /// [`Config::forward_peak_bytes`]); `semantics` defaults to the checkpoint's.
    pub fn forward_peak_bytes(
        &self,
        image: (usize, usize),
        semantics: Option<Semantics>,
    ) -> Option<u64> {
        self.config
            .forward_peak_bytes(image, semantics.unwrap_or(self.default_semantics))
    }

    /// The bytes a forward pass at `image` needs at its peak, the process and the weights
    /// included ([`BASE_BYTES`], [`Self::weight_bytes`], [`Self::forward_peak_bytes`]);
    /// `None` when the sizes are too large to count.
    pub fn estimate_bytes(
        &self,
        image: (usize, usize),
        semantics: Option<Semantics>,
    ) -> Option<u64> {
        BASE_BYTES
            .checked_add(self.weight_bytes())?
            .checked_add(self.forward_peak_bytes(image, semantics)?)
    }

    /// Refuse inputs whose forward pass would need more than `limit` bytes.
    pub fn check_memory(
        &self,
        image: (usize, usize),
        semantics: Option<Semantics>,
        limit: u64,
    ) -> Result<()> {
        check_budget(self.estimate_bytes(image, semantics), image, limit)
    }

    /// Run the backbone on one normalised image `[chans, H, W]` (f32) at its own size.
    pub fn forward(
        &self,
        image: &Tensor,
        opts: &ForwardOptions,
        ctl: &RunControl,
    ) -> Result<StageOutputs> {
        crate::probe::heavy_work();
        let (c, h, w) = image.dims3()?;
        if c != self.config.in_chans {
            return Err(Error::BadArgument(format!(
                "the image has {c} channels, the checkpoint expects {}",
                self.config.in_chans
            )));
        }
        let geometry = self.geometry((h, w), opts.semantics);
        // Check every block's bias table serves its window before spending any time.
        for (stage, sg) in self.stages.iter().zip(&geometry.stages) {
            for (block, bg) in stage.blocks.iter().zip(&sg.blocks) {
                block.attn.bias.check(bg.window())?;
            }
        }
        let total = self.config.total_blocks() + 1;
        let mut done = 0;

        if let Some((count, first, value)) = count_non_finite(image)? {
            return Err(Error::NonFinite(format!(
                "the normalised input holds {count} non-finite value(s) (first: {value} at \
                 element {first}); check the normalisation (--mean, --std)"
            )));
        }
        let (ph, pw) = geometry.input_pad();
        // The padded copy is dropped as soon as the patches are embedded.
        let mut x = {
            let padded = image.pad_with_zeros(1, 0, ph)?.pad_with_zeros(2, 0, pw)?;
            self.embed.forward(&padded)?
        };
        check_finite(&x, || {
            "the patch embedding (before stage 0) produced non-finite values (NaN or \
             infinite) from a finite input: its weights overflow f32 on this image, or the \
             normalisation (--std) scales the input too far"
                .to_string()
        })?;
        let (eh, ew) = geometry.embed_grid();
        let embed = x.reshape((eh, ew, self.config.embed_dim))?;
        done += 1;
        ctl.step(Progress {
            done,
            total,
            stage: 0,
        })?;

        let mut grid = (eh, ew);
        let mut outs = Vec::with_capacity(self.stages.len());
        let mut attention = None;
        let mut attentions = Vec::new();
        for (i, (stage, sg)) in self.stages.iter().zip(&geometry.stages).enumerate() {
            if let Some(m) = &stage.merge {
                let (y, g) = m.forward(&x, grid)?;
                x = y;
                grid = g;
                check_finite(&x, || {
                    format!(
                        "the patch merging into stage {i} produced non-finite values (NaN or \
                         infinite) from finite input: its weights overflow f32 on this image"
                    )
                })?;
            }
            debug_assert_eq!(grid, sg.grid);
            for (j, (block, bg)) in stage.blocks.iter().zip(&sg.blocks).enumerate() {
                let keep = opts.attention_all || opts.attention_of == Some((i, j));
                let (y, attn) = block.forward(&x, bg, keep)?;
                x = y;
                check_finite(&x, || {
                    format!(
                        "stage {i} block {j} is the first to produce non-finite values (NaN or \
                         infinite), from finite input: its weights overflow f32 on this image"
                    )
                })?;
                if let Some(weights) = attn {
                    if opts.attention_of == Some((i, j)) {
                        attention = Some(AttentionTap {
                            stage: i,
                            block: j,
                            weights: weights.clone(),
                        });
                    }
                    if opts.attention_all {
                        attentions.push(AttentionTap {
                            stage: i,
                            block: j,
                            weights,
                        });
                    }
                }
                done += 1;
                ctl.step(Progress {
                    done,
                    total,
                    stage: i,
                })?;
            }
            outs.push(x.reshape((grid.0, grid.1, self.config.dim(i)))?);
        }

        let stage_norms = if opts.stage_norms && self.has_stage_norms() {
            Some(
                self.stages
                    .iter()
                    .zip(&outs)
                    .map(|(s, o)| s.out_norm.as_ref().expect("checked").forward(o))
                    .collect::<Result<Vec<_>>>()?,
            )
        } else {
            None
        };
        let final_norm = match (&self.final_norm, opts.final_norm) {
            (Some(n), true) => Some(n.forward(outs.last().expect("one stage at least"))?),
            _ => None,
        };
        for (i, t) in stage_norms.iter().flatten().enumerate() {
            check_finite(t, || {
                format!("the output norm of stage {i} produced non-finite values")
            })?;
        }
        if let Some(t) = &final_norm {
            check_finite(t, || {
                "the final norm produced non-finite values".to_string()
            })?;
        }
        Ok(StageOutputs {
            geometry,
            embed,
            stages: outs,
            stage_norms,
            final_norm,
            attention,
            attentions,
        })
    }
}

/// The missing parts in words: a block with none of its tensors is named once
/// (`layers.2.blocks.1.*, the whole block`), other tensors one by one, at most 12 entries.
fn describe_missing(ckpt: &Checkpoint, missing: &[&Part]) -> String {
    let mut entries: Vec<String> = Vec::new();
    let mut i = 0;
    while i < missing.len() {
        if let Part::Block(s, b, _) = missing[i] {
            let same: Vec<&&Part> = missing[i..]
                .iter()
                .take_while(|p| matches!(p, Part::Block(s2, b2, _) if s2 == s && b2 == b))
                .collect();
            if same.len() == block_parts(ckpt.family).len() {
                entries.push(format!(
                    "{}{s}.blocks.{b}.* (the whole block)",
                    ckpt.layout.stages_prefix()
                ));
                i += same.len();
                continue;
            }
        }
        entries.push(ckpt.file_names(missing[i]).join(" + "));
        i += 1;
    }
    const SHOWN: usize = 12;
    let more = entries.len().saturating_sub(SHOWN);
    entries.truncate(SHOWN);
    let mut text = entries.join(", ");
    if more > 0 {
        text.push_str(&format!(", and {more} more"));
    }
    text
}

/// Bytes of a Mullion process besides its tensors (code, libraries, allocator, thread stacks),
/// measured as the peak resident memory of a run on a tiny image (see DEVELOPERS.md).
pub const BASE_BYTES: u64 = 30_000_000;

/// The error for an input of `image` = (height, width) whose run needs `need` bytes (`None`:
/// too many to count) when `limit` are allowed.
pub fn check_budget(need: Option<u64>, image: (usize, usize), limit: u64) -> Result<()> {
    match need {
        Some(n) if n <= limit => Ok(()),
        Some(n) => Err(Error::Limit(format!(
            "a {}x{} input would need about {:.1} GB for this backbone, more than the {:.1} GB \
             allowed; resize the image or raise the limit (--max-memory-gb)",
            image.1,
            image.0,
            n as f64 / 1e9,
            limit as f64 / 1e9
        ))),
        None => Err(Error::Limit(format!(
            "a {}x{} input is too large for this backbone to even count its memory; resize \
             the image",
            image.1, image.0
        ))),
    }
}

/// An [`Error::NonFinite`] with `what` when `t` holds a NaN or an infinity.
fn check_finite(t: &Tensor, what: impl FnOnce() -> String) -> Result<()> {
    match count_non_finite(t)? {
        Some((count, first, value)) => Err(Error::NonFinite(format!(
            "{} ({count} value(s); first: {value} at element {first})",
            what()
        ))),
        None => Ok(()),
    }
}

/// Every canonical tensor a backbone of this shape needs (bias tables included).
pub fn required_parts(cfg: &Config) -> Vec<Part> {
    let mut out: Vec<Part> = ["proj.weight", "proj.bias", "norm.weight", "norm.bias"]
        .iter()
        .map(|s| Part::embed(s))
        .collect();
    for (i, &depth) in cfg.depths.iter().enumerate() {
        if i > 0 {
            for s in ["norm.weight", "norm.bias", "reduction.weight"] {
                out.push(Part::merge(i, s));
            }
        }
        let family = if cfg.v2.is_some() {
            Family::V2
        } else {
            Family::V1
        };
        for j in 0..depth {
            for s in block_parts(family) {
                out.push(Part::block(i, j, s));
            }
        }
    }
    out
}

struct CheckpointWeights<'a>(&'a Checkpoint);

impl CheckpointWeights<'_> {
    /// A loaded tensor, refused when any of its values is NaN or infinite.
    fn finite(&self, part: &Part, t: Tensor) -> Result<Tensor> {
        let bad = count_non_finite(&t)?;
        if let Some((count, first, value)) = bad {
            return Err(Error::bad_file(
                &self.0.path,
                format!(
                    "tensor {} holds {count} non-finite value(s) (first: {value} at element \
                     {first}); the weights are damaged or were saved after training diverged",
                    self.0.file_names(part).join(" + ")
                ),
            ));
        }
        Ok(t)
    }
}

/// How many elements of `t` are NaN or infinite, with the first one's flat index and value;
/// `None` when all are finite. Reads the tensor in place when it is a contiguous f32 tensor.
pub fn count_non_finite(t: &Tensor) -> Result<Option<(usize, usize, f32)>> {
    fn scan(v: &[f32]) -> Option<(usize, usize, f32)> {
        let first = v.iter().position(|x| !x.is_finite())?;
        let count = v[first..].iter().filter(|x| !x.is_finite()).count();
        Some((count, first, v[first]))
    }
    if t.dtype() == candle_core::DType::F32 {
        let (storage, layout) = t.storage_and_layout();
        if let (candle_core::Storage::Cpu(cpu), Some((a, b))) =
            (&*storage, layout.contiguous_offsets())
        {
            return Ok(scan(&cpu.as_slice::<f32>()?[a..b]));
        }
    }
    let v: Vec<f32> = t
        .to_dtype(candle_core::DType::F32)?
        .flatten_all()?
        .to_vec1()?;
    Ok(scan(&v))
}

impl WeightSource for CheckpointWeights<'_> {
    fn get(&self, part: Part, shape: &[usize]) -> Result<Tensor> {
        let t = self.0.load(&part, shape)?;
        self.finite(&part, t)
    }
    fn bias_table(&self, part: Part, heads: usize) -> Result<Tensor> {
        let shape = self.0.shape(&part).unwrap_or_default();
        if shape.len() != 2 || shape[1] != heads {
            return Err(Error::bad_file(
                &self.0.path,
                format!(
                    "bias table {} has shape {shape:?}; expected [rows, {heads}]",
                    self.0.file_names(&part).join("")
                ),
            ));
        }
        let t = self.0.load(&part, &shape)?;
        self.finite(&part, t)
    }
}

struct RandomWeights {
    rng: RefCell<rand::rngs::StdRng>,
    window: (usize, usize),
}

impl RandomWeights {
    fn normal(&self, n: usize, std: f64) -> Vec<f32> {
        let dist = Normal::new(0.0, std).expect("finite std");
        let mut rng = self.rng.borrow_mut();
        (0..n).map(|_| dist.sample(&mut *rng) as f32).collect()
    }
}

impl WeightSource for RandomWeights {
    fn get(&self, part: Part, shape: &[usize]) -> Result<Tensor> {
        let n: usize = shape.iter().product();
        let name = part.canonical();
        let data = if name.contains("norm") && shape.len() == 1 {
            vec![if name.ends_with("weight") { 1.0 } else { 0.0 }; n]
        } else if shape.len() == 1 {
            self.normal(n, 0.02)
        } else {
            let fan_in: usize = shape[1..].iter().product();
            self.normal(n, (1.0 / fan_in as f64).sqrt())
        };
        Ok(Tensor::from_vec(data, shape, &Device::Cpu)?)
    }
    fn bias_table(&self, _part: Part, heads: usize) -> Result<Tensor> {
        let rows = (2 * self.window.0 - 1) * (2 * self.window.1 - 1);
        Ok(Tensor::from_vec(
            self.normal(rows * heads, 0.02),
            (rows, heads),
            &Device::Cpu,
        )?)
    }
}

/// Records every tensor a [`RandomWeights`] hands out, under timm's names.
struct Recording<'a> {
    inner: &'a RandomWeights,
    out: RefCell<std::collections::BTreeMap<String, Tensor>>,
}

impl WeightSource for Recording<'_> {
    fn get(&self, part: Part, shape: &[usize]) -> Result<Tensor> {
        let t = self.inner.get(part.clone(), shape)?;
        self.out.borrow_mut().insert(part.canonical(), t.clone());
        Ok(t)
    }
    fn bias_table(&self, part: Part, heads: usize) -> Result<Tensor> {
        let t = self.inner.bias_table(part.clone(), heads)?;
        self.out.borrow_mut().insert(part.canonical(), t.clone());
        Ok(t)
    }
}

/// Random weights of `config` as a state dict in timm's key layout (with a final norm), e.g.
/// to write a checkpoint file for tests or a placeholder model.
pub fn random_timm_state_dict(
    config: &Config,
    seed: u64,
) -> Result<std::collections::BTreeMap<String, Tensor>> {
    let inner = RandomWeights {
        rng: RefCell::new(rand::rngs::StdRng::seed_from_u64(seed)),
        window: config.window,
    };
    let rec = Recording {
        inner: &inner,
        out: RefCell::new(Default::default()),
    };
    Backbone::build(config.clone(), &rec, false, true)?;
    Ok(rec.out.into_inner())
}

/// A plain-words account of loading a checkpoint.
#[derive(Debug, serde::Serialize)]
pub struct LoadReport {
    pub file: String,
    pub format: String,
    pub layout: String,
    pub prefix: String,
    pub other_backbones: Vec<String>,
    pub config: Config,
    pub parameters: u64,
    pub stored_dtypes: Vec<String>,
    pub used: usize,
    pub ignored: Vec<(String, String)>,
    pub stage_norms: bool,
    pub final_norm: bool,
    pub semantics: Semantics,
    /// Window each stage's first bias table was made for (the first version only).
    pub table_windows: Vec<(usize, usize)>,
    /// The family: "Swin V1" or "Swin V2".
    pub family: String,
    /// The transformers `config.json` read beside the weights, and the fields taken from it.
    pub config_json: Option<String>,
    pub from_config_json: Vec<String>,
    /// Why the `config.json` beside the weights was not used.
    pub config_json_ignored: Option<String>,
}

impl LoadReport {
    pub fn new(ckpt: &Checkpoint, model: &Backbone) -> Self {
        let used = ckpt.used();
        let ignored = ckpt
            .names()
            .filter(|n| !used.contains(*n))
            .map(|n| (n.clone(), ignored_reason(n).to_string()))
            .collect();
        let format = match (
            &ckpt.nested_under,
            ckpt.path.extension().and_then(|e| e.to_str()),
        ) {
            (Some(k), _) => format!("PyTorch archive, state dict nested under '{k}'"),
            (None, Some("safetensors")) => "safetensors (memory-mapped)".to_string(),
            _ => "see layout".to_string(),
        };
        LoadReport {
            file: ckpt.path.display().to_string(),
            format,
            layout: match (ckpt.family, ckpt.layout.kind.is_transformers()) {
                (Family::V2, true) => {
                    "transformers Swinv2 (attention.self.query/key/value names)".into()
                }
                _ => ckpt.layout.kind.describe().to_string(),
            },
            prefix: ckpt.layout.prefix.clone(),
            other_backbones: ckpt.other_prefixes.clone(),
            config: model.config.clone(),
            parameters: ckpt.parameter_count(&used),
            stored_dtypes: ckpt.stored_dtypes().into_iter().collect(),
            used: used.len(),
            ignored,
            stage_norms: model.has_stage_norms(),
            final_norm: model.has_final_norm(),
            semantics: model.default_semantics,
            table_windows: model
                .stages
                .iter()
                .filter_map(|s| s.blocks[0].attn.bias.made_for())
                .collect(),
            family: ckpt.family.describe().to_string(),
            config_json: ckpt.beside.as_ref().map(|b| b.path.display().to_string()),
            from_config_json: ckpt
                .beside
                .as_ref()
                .map(|b| b.fields.clone())
                .unwrap_or_default(),
            config_json_ignored: ckpt.beside.as_ref().and_then(|b| b.ignored.clone()),
        }
    }
}

impl std::fmt::Display for LoadReport {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let c = &self.config;
        writeln!(f, "checkpoint   {}", self.file)?;
        writeln!(f, "format       {}", self.format)?;
        writeln!(
            f,
            "weights      stored as {}; computed in f32",
            self.stored_dtypes.join(", ")
        )?;
        let prefix = if self.prefix.is_empty() {
            "none".to_string()
        } else {
            format!("'{}'", self.prefix)
        };
        writeln!(f, "layout       {} (prefix {prefix})", self.layout)?;
        for other in &self.other_backbones {
            writeln!(
                f,
                "             another backbone under '{other}' was not used"
            )?;
        }
        writeln!(
            f,
            "shape        patch {p}, embed dim {e}, depths {d:?}, heads {h:?}, window {wh}x{ww}, mlp ratio {m}",
            p = c.patch,
            e = c.embed_dim,
            d = c.depths,
            h = c.heads,
            wh = c.window.0,
            ww = c.window.1,
            m = c.mlp_ratio
        )?;
        writeln!(f, "family       {}", self.family)?;
        if let Some(v2) = &c.v2 {
            let tw: Vec<String> = v2
                .trained_windows
                .iter()
                .map(|w| w.map_or("own".into(), |(a, b)| format!("{a}x{b}")))
                .collect();
            let trained = if v2.trained_windows.iter().all(Option::is_none) {
                "none: each block's own window normalises its coordinates".to_string()
            } else {
                format!(
                    "{} (stage 0..{}; 'own': the block's own window)",
                    tw.join(", "),
                    tw.len().saturating_sub(1)
                )
            };
            writeln!(
                f,
                "position     continuous bias MLP ({} hidden), made once per window",
                v2.cpb_hidden
            )?;
            writeln!(f, "pretrained   windows {trained}")?;
            if let Some((h, w)) = v2.built_for {
                writeln!(
                    f,
                    "built for    {w}x{h} pixels (W x H): windows fixed per stage from it"
                )?;
            }
        } else {
            let tw: Vec<String> = self
                .table_windows
                .iter()
                .map(|(a, b)| format!("{a}x{b}"))
                .collect();
            writeln!(
                f,
                "bias tables  made for windows {} (stage 0..{})",
                tw.join(", "),
                tw.len().saturating_sub(1)
            )?;
        }
        if let (Some(path), Some(why)) = (&self.config_json, &self.config_json_ignored) {
            writeln!(f, "config.json  {path} not used: {why}")?;
        } else if let Some(path) = &self.config_json {
            writeln!(
                f,
                "config.json  {} gave: {} (a --config file still overrides)",
                path,
                if self.from_config_json.is_empty() {
                    "nothing Mullion uses".to_string()
                } else {
                    self.from_config_json.join(", ")
                }
            )?;
        }
        writeln!(
            f,
            "parameters   {} ({:.2}M) in the tensors used",
            self.parameters,
            self.parameters as f64 / 1e6
        )?;
        writeln!(
            f,
            "norms        per-stage output norms: {}; final norm: {}",
            if self.stage_norms {
                "present"
            } else {
                "absent"
            },
            if self.final_norm { "present" } else { "absent" }
        )?;
        writeln!(
            f,
            "padding      {} and small stages '{}' (the defaults of this layout; override with \
             --pad-order / --small-stage)",
            self.semantics.pad_order.name(),
            self.semantics.small_stage.name()
        )?;
        writeln!(
            f,
            "tensors      {} used, {} ignored, 0 missing",
            self.used,
            self.ignored.len()
        )?;
        // Buffers come one per block: count them; name everything else (heads, necks ...).
        let (buffers, named): (Vec<_>, Vec<_>) = self
            .ignored
            .iter()
            .partition(|(_, why)| why.starts_with("buffer"));
        if !buffers.is_empty() {
            writeln!(
                f,
                "  ignored    {} buffers (relative_position_index, attn_mask, relative_coords_table), recomputed",
                buffers.len()
            )?;
        }
        const SHOWN: usize = 24;
        for (name, why) in named.iter().take(SHOWN) {
            writeln!(f, "  ignored    {name} ({why})")?;
        }
        if named.len() > SHOWN {
            writeln!(
                f,
                "  ignored    ... and {} more (see --json)",
                named.len() - SHOWN
            )?;
        }
        Ok(())
    }
}

// The worker thread shares one model between runs.
const _: () = {
    const fn is_send_sync<T: Send + Sync>() {}
    is_send_sync::<Backbone>()
};
