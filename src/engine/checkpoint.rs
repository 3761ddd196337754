//! Checkpoints as users have them: safetensors (memory-mapped) and PyTorch pickles, in the key
//! layouts of the common training libraries, possibly wrapped inside a detector or segmenter.
//!
//! The loader finds the layout and the wrapper prefix, maps every tensor the backbone needs to
//! one canonical part name ([`Part`]), reads the model shape off the tensor shapes, and keeps a
//! plain-words account of what it used, ignored and could not find ([`LoadReport`]).

use super::config::{Config, ConfigOverride, V2Shape, MAX_BLOCKS_PER_STAGE, MAX_STAGES};
use super::folder::{self, BesideConfig};
use crate::engine::geometry::{PadOrder, Semantics, SmallStage};
use crate::error::{Error, Result};
use candle_core::{DType, Device, Tensor};
use std::cell::RefCell;
use std::collections::{BTreeMap, BTreeSet};
use std::io::Read;
use std::path::{Path, PathBuf};

/// The key layouts Mullion reads.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
pub enum LayoutKind {
    /// timm >= 0.9: patch merging at the start of a stage (`layers.{i}.downsample`, i >= 1).
    Timm,
    /// The original release and detector/segmenter backbones: the same block names, patch
    /// merging at the end of stage i, optional per-stage output norms `norm{i}`.
    Original,
    /// transformers 4.x: `attention.self.query/key/value`, `intermediate.dense`, ...
    Transformers4,
    /// transformers 5.x: `attention.q_proj/k_proj/v_proj/o_proj`, `mlp.fc1/fc2`, ...
    Transformers5,
    /// The OpenMMLab detection and segmentation toolkits, 3.x: `patch_embed.projection`,
    /// `stages.{i}.blocks.{j}.attn.w_msa.*`, `ffn.layers.0.0` / `ffn.layers.1`, patch merging
    /// at the end of stage i (`stages.{i}.downsample`) stored in the channel order of a 2x2
    /// unfold, per-stage output norms `norm{i}`.
    OpenMmlab3,
}

impl LayoutKind {
    /// The transformers layouts (Swinv2 in 5.23 keeps the `attention.self.query` names of 4.x).
    pub fn is_transformers(self) -> bool {
        matches!(self, LayoutKind::Transformers4 | LayoutKind::Transformers5)
    }

    pub fn describe(self) -> &'static str {
        match self {
            LayoutKind::Timm => "timm >= 0.9 (patch merging at the start of each stage)",
            LayoutKind::Original => {
                "original / detector backbone (patch merging at the end of each stage)"
            }
            LayoutKind::Transformers4 => "transformers 4.x",
            LayoutKind::Transformers5 => "transformers 5.x",
            LayoutKind::OpenMmlab3 => {
                "OpenMMLab detection / segmentation toolkits 3.x (patch merging at the end of \
                 each stage, stored in unfold order, reordered at load)"
            }
        }
    }

    /// The padding semantics the library that writes this layout computes with. Backbones
    /// that carry per-stage output norms come from dense-prediction code (the detection
    /// release; transformers' backbone class), which always partitions: small stages are padded
    /// up to the window and keep their shift. The OpenMMLab toolkits pad then shift and never
    /// clamp the window, with or without output norms.
    pub fn default_semantics(self, has_stage_norms: bool) -> Semantics {
        match self {
            LayoutKind::OpenMmlab3 => Semantics {
                pad_order: PadOrder::PadThenShift,
                small_stage: SmallStage::PadUp,
            },
            LayoutKind::Timm => Semantics {
                pad_order: PadOrder::ShiftThenPad,
                small_stage: SmallStage::ClampPerAxis,
            },
            LayoutKind::Original | LayoutKind::Transformers4 | LayoutKind::Transformers5 => {
                Semantics {
                    pad_order: PadOrder::PadThenShift,
                    small_stage: if has_stage_norms {
                        SmallStage::PadUp
                    } else {
                        SmallStage::Clamp
                    },
                }
            }
        }
    }
}

/// A canonical tensor of the backbone. Names inside a part follow timm's spelling
/// (`proj.weight`, `norm1.bias`, `attn.qkv.weight`, `mlp.fc1.weight` ...).
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Part {
    /// Patch embedding: `proj.weight`, `proj.bias`, `norm.weight`, `norm.bias`.
    Embed(String),
    /// Patch merging that starts stage `i` (i >= 1): `norm.weight`, `norm.bias`, `reduction.weight`.
    Merge(usize, String),
    /// Block `j` of stage `i`.
    Block(usize, usize, String),
    /// Output norm of stage `i` (detector backbones): `weight`, `bias`.
    StageNorm(usize, String),
    /// Final norm after the last stage: `weight`, `bias`.
    FinalNorm(String),
}

impl Part {
    pub fn embed(s: &str) -> Part {
        Part::Embed(s.into())
    }
    pub fn merge(i: usize, s: &str) -> Part {
        Part::Merge(i, s.into())
    }
    pub fn block(i: usize, j: usize, s: &str) -> Part {
        Part::Block(i, j, s.into())
    }

    /// The canonical name, as the load report prints it.
    pub fn canonical(&self) -> String {
        match self {
            Part::Embed(s) => format!("patch_embed.{s}"),
            Part::Merge(i, s) => format!("layers.{i}.downsample.{s}"),
            Part::Block(i, j, s) => format!("layers.{i}.blocks.{j}.{s}"),
            Part::StageNorm(i, s) => format!("stage_norm.{i}.{s}"),
            Part::FinalNorm(s) => format!("norm.{s}"),
        }
    }
}

/// The tensors of every block, by their sub-names in timm's spelling.
pub const BLOCK_PARTS: [&str; 13] = [
    "norm1.weight",
    "norm1.bias",
    "attn.qkv.weight",
    "attn.qkv.bias",
    "attn.relative_position_bias_table",
    "attn.proj.weight",
    "attn.proj.bias",
    "norm2.weight",
    "norm2.bias",
    "mlp.fc1.weight",
    "mlp.fc1.bias",
    "mlp.fc2.weight",
    "mlp.fc2.bias",
];

/// The block tensors of a Swin V2 checkpoint, in timm's spelling: the qkv weight with separate
/// q and v biases (no k bias), the clamped logit scale per head, the position bias MLP.
pub const BLOCK_PARTS_V2: [&str; 17] = [
    "norm1.weight",
    "norm1.bias",
    "attn.qkv.weight",
    "attn.q_bias",
    "attn.v_bias",
    "attn.logit_scale",
    "attn.cpb_mlp.0.weight",
    "attn.cpb_mlp.0.bias",
    "attn.cpb_mlp.2.weight",
    "attn.proj.weight",
    "attn.proj.bias",
    "norm2.weight",
    "norm2.bias",
    "mlp.fc1.weight",
    "mlp.fc1.bias",
    "mlp.fc2.weight",
    "mlp.fc2.bias",
];

/// The first or the second version of the family, told apart by the tensors.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
pub enum Family {
    V1,
    V2,
}

impl Family {
    pub fn describe(self) -> &'static str {
        match self {
            Family::V1 => "Swin V1 (pre-norm blocks, learnt bias tables)",
            Family::V2 => {
                "Swin V2 (scaled cosine attention, continuous position bias MLP, post-norm blocks)"
            }
        }
    }

    /// The second version's markers: a logit scale, a bias MLP or a q bias beside the qkv
    /// weight, in any block under `prefix`.
    fn detect(prefix: &str, names: &mut dyn Iterator<Item = &String>) -> Family {
        const MARKERS: [&str; 4] = [
            ".logit_scale",
            ".cpb_mlp.",
            ".continuous_position_bias_mlp.",
            ".attn.q_bias",
        ];
        let v2 = names
            .filter_map(|n| n.strip_prefix(prefix))
            .any(|n| MARKERS.iter().any(|m| n.contains(m)));
        if v2 {
            Family::V2
        } else {
            Family::V1
        }
    }
}

/// The block tensors of a family.
pub fn block_parts(family: Family) -> &'static [&'static str] {
    match family {
        Family::V1 => &BLOCK_PARTS,
        Family::V2 => &BLOCK_PARTS_V2,
    }
}

/// How one canonical tensor is read from the file.
#[derive(Clone, Debug, PartialEq)]
enum Recipe {
    One(String),
    /// Concatenated along dim 0 (transformers' separate q, k, v).
    Cat(Vec<String>),
    /// One tensor whose last dimension holds a 2x2 patch merging's inputs in the channel order
    /// of an unfold (the OpenMMLab toolkits); put back in timm's order at load
    /// ([`from_unfold_order`]).
    Unfold(String),
}

impl Recipe {
    fn names(&self) -> Vec<&str> {
        match self {
            Recipe::One(n) | Recipe::Unfold(n) => vec![n.as_str()],
            Recipe::Cat(v) => v.iter().map(String::as_str).collect(),
        }
    }
}

/// A key layout and the wrapper prefix it sits under.
#[derive(Clone, Debug, PartialEq)]
pub struct Layout {
    pub kind: LayoutKind,
    pub prefix: String,
}

fn block_name_tf4(part: &str) -> Recipe {
    let one = |s: &str| Recipe::One(s.to_string());
    let qkv = |wb: &str| {
        Recipe::Cat(
            ["query", "key", "value"]
                .iter()
                .map(|q| format!("attention.self.{q}.{wb}"))
                .collect(),
        )
    };
    match part {
        "attn.qkv.weight" => qkv("weight"),
        "attn.qkv.bias" => qkv("bias"),
        "attn.relative_position_bias_table" => one("attention.self.relative_position_bias_table"),
        // Swinv2 (transformers 5.23 keeps these 4.x-style names for it)
        "attn.q_bias" => one("attention.self.query.bias"),
        "attn.v_bias" => one("attention.self.value.bias"),
        "attn.logit_scale" => one("attention.self.logit_scale"),
        _ if part.starts_with("attn.cpb_mlp.") => one(&part.replacen(
            "attn.cpb_mlp.",
            "attention.self.continuous_position_bias_mlp.",
            1,
        )),
        _ => {
            let (module, wb) = part.rsplit_once('.').unwrap_or((part, ""));
            let m = match module {
                "norm1" => "layernorm_before",
                "norm2" => "layernorm_after",
                "attn.proj" => "attention.output.dense",
                "mlp.fc1" => "intermediate.dense",
                "mlp.fc2" => "output.dense",
                other => other,
            };
            Recipe::One(format!("{m}.{wb}"))
        }
    }
}

fn block_name_tf5(part: &str) -> Recipe {
    let qkv = |wb: &str| {
        Recipe::Cat(
            ["q_proj", "k_proj", "v_proj"]
                .iter()
                .map(|q| format!("attention.{q}.{wb}"))
                .collect(),
        )
    };
    match part {
        "attn.qkv.weight" => qkv("weight"),
        "attn.qkv.bias" => qkv("bias"),
        "attn.relative_position_bias_table" => {
            Recipe::One("attention.relative_position_bias.relative_position_bias_table".into())
        }
        _ => {
            let (module, wb) = part.rsplit_once('.').unwrap_or((part, ""));
            let m = match module {
                "norm1" => "layernorm_before",
                "norm2" => "layernorm_after",
                "attn.proj" => "attention.o_proj",
                other => other, // mlp.fc1, mlp.fc2 keep their names
            };
            Recipe::One(format!("{m}.{wb}"))
        }
    }
}

/// A block tensor's name inside an OpenMMLab 3.x block (`attn.w_msa.*`, `ffn.layers.0.0.*` for
/// fc1, `ffn.layers.1.*` for fc2), from timm's sub-name.
fn block_name_openmmlab(part: &str) -> String {
    if let Some(rest) = part.strip_prefix("attn.") {
        format!("attn.w_msa.{rest}")
    } else if let Some(wb) = part.strip_prefix("mlp.fc1.") {
        format!("ffn.layers.0.0.{wb}")
    } else if let Some(wb) = part.strip_prefix("mlp.fc2.") {
        format!("ffn.layers.1.{wb}")
    } else {
        part.to_string()
    }
}

/// The inverse of the OpenMMLab converters' `correct_unfold_reduction_order` /
/// `correct_unfold_norm_order`: those view the last dimension (4C wide, timm's order: the 2x2
/// neighbours (0,0), (1,0), (0,1), (1,1), each C channels) as 4 x C, reorder the neighbours
/// [0, 2, 1, 3] and transpose to C x 4 (the unfold's channel-major order). Here the last
/// dimension is viewed as C x 4, transposed to 4 x C, and the neighbours reordered by the same
/// [0, 2, 1, 3] (a swap, so its own inverse). The caller checks that 4 divides the width.
pub fn from_unfold_order(t: &Tensor) -> candle_core::Result<Tensor> {
    let dims = t.dims().to_vec();
    let width = dims.last().copied().unwrap_or(0);
    let lead: usize = dims[..dims.len().saturating_sub(1)].iter().product();
    let order = Tensor::new(&[0u32, 2, 1, 3], t.device())?;
    t.reshape((lead, width / 4, 4))?
        .transpose(1, 2)?
        .contiguous()?
        .index_select(&order, 1)?
        .reshape(dims)
}

impl Layout {
    /// The file's name for the stages up to their index: `{prefix}layers.` (timm, original),
    /// `{prefix}encoder.layers.` (transformers) or `{prefix}stages.` (OpenMMLab 3.x); stage `i`'s
    /// blocks are `<this>{i}.blocks.{j}.`.
    pub fn stages_prefix(&self) -> String {
        match self.kind {
            LayoutKind::OpenMmlab3 => format!("{}stages.", self.prefix),
            LayoutKind::Timm | LayoutKind::Original => format!("{}layers.", self.prefix),
            LayoutKind::Transformers4 | LayoutKind::Transformers5 => {
                format!("{}encoder.layers.", self.prefix)
            }
        }
    }

    /// Where a part may be, in order of preference. transformers 5.x backbones keep the model
    /// under `swin.` but their per-stage norms beside it, so those are also looked for one
    /// prefix level up.
    fn recipes(&self, part: &Part) -> Vec<Recipe> {
        let mut out = vec![self.recipe(part)];
        if let (Part::StageNorm(..), LayoutKind::Transformers4 | LayoutKind::Transformers5) =
            (part, self.kind)
        {
            let trimmed = self.prefix.trim_end_matches('.');
            let parent = match trimmed.rsplit_once('.') {
                Some((head, _)) => format!("{head}."),
                None => String::new(),
            };
            if parent != self.prefix {
                out.push(
                    Layout {
                        kind: self.kind,
                        prefix: parent,
                    }
                    .recipe(part),
                );
            }
        }
        out
    }

    /// The file keys this layout stores `part` under: one, or several that are concatenated
    /// along dimension 0 in this order (transformers' separate q, k and v).
    pub fn file_names(&self, part: &Part) -> Vec<String> {
        self.recipe(part)
            .names()
            .into_iter()
            .map(String::from)
            .collect()
    }

    fn recipe(&self, part: &Part) -> Recipe {
        let p = &self.prefix;
        let one = |s: String| Recipe::One(s);
        match self.kind {
            LayoutKind::Timm | LayoutKind::Original => match part {
                Part::Embed(s) => one(format!("{p}patch_embed.{s}")),
                Part::Merge(i, s) if self.kind == LayoutKind::Timm => {
                    one(format!("{p}layers.{i}.downsample.{s}"))
                }
                Part::Merge(i, s) => one(format!("{p}layers.{}.downsample.{s}", i - 1)),
                Part::Block(i, j, s) => one(format!("{p}layers.{i}.blocks.{j}.{s}")),
                Part::StageNorm(i, s) => one(format!("{p}norm{i}.{s}")),
                Part::FinalNorm(s) => one(format!("{p}norm.{s}")),
            },
            LayoutKind::OpenMmlab3 => match part {
                Part::Embed(s) => {
                    let s = s.replacen("proj.", "projection.", 1);
                    one(format!("{p}patch_embed.{s}"))
                }
                Part::Merge(i, s) => Recipe::Unfold(format!("{p}stages.{}.downsample.{s}", i - 1)),
                Part::Block(i, j, s) => one(format!(
                    "{p}stages.{i}.blocks.{j}.{}",
                    block_name_openmmlab(s)
                )),
                Part::StageNorm(i, s) => one(format!("{p}norm{i}.{s}")),
                Part::FinalNorm(s) => one(format!("{p}norm.{s}")),
            },
            LayoutKind::Transformers4 | LayoutKind::Transformers5 => match part {
                Part::Embed(s) => {
                    let s = s.replacen("proj.", "patch_embeddings.projection.", 1);
                    one(format!("{p}embeddings.{s}"))
                }
                Part::Merge(i, s) => one(format!("{p}encoder.layers.{}.downsample.{s}", i - 1)),
                Part::Block(i, j, s) => {
                    let inner = if self.kind == LayoutKind::Transformers4 {
                        block_name_tf4(s)
                    } else {
                        block_name_tf5(s)
                    };
                    let at = |n: &String| format!("{p}encoder.layers.{i}.blocks.{j}.{n}");
                    match inner {
                        Recipe::One(n) => Recipe::One(at(&n)),
                        Recipe::Cat(v) => Recipe::Cat(v.iter().map(at).collect()),
                        Recipe::Unfold(n) => Recipe::Unfold(at(&n)),
                    }
                }
                Part::StageNorm(i, s) => one(format!("{p}hidden_states_norms.stage{}.{s}", i + 1)),
                Part::FinalNorm(s) => one(format!("{p}layernorm.{s}")),
            },
        }
    }
}

/// Where the tensors come from.
enum Store {
    Safetensors(candle_core::safetensors::MmapedSafetensors),
    Pickle(candle_core::pickle::PthTensors),
}

/// An opened checkpoint file: its tensors' names and shapes, and the layout found in it.
pub struct Checkpoint {
    pub path: PathBuf,
    store: Store,
    /// Shape and stored dtype of every tensor in the file.
    shapes: BTreeMap<String, (Vec<usize>, DType)>,
    /// Key under which a pickle nested its state dict, if any.
    pub nested_under: Option<String>,
    pub layout: Layout,
    /// Backbone prefixes found besides the one used.
    pub other_prefixes: Vec<String>,
    /// Swin V1 or V2.
    pub family: Family,
    /// The transformers `config.json` beside the file, when there is one.
    pub beside: Option<BesideConfig>,
    used: RefCell<BTreeSet<String>>,
}

/// What kind of file this is, from its first bytes. Anything but a regular file is refused
/// before it is opened (opening a FIFO would wait for a writer for ever).
fn sniff(path: &Path) -> Result<&'static str> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if !meta.is_file() {
        return Err(Error::bad_file(
            path,
            "not a regular file (a folder, FIFO or device); a checkpoint is a file",
        ));
    }
    let mut head = [0u8; 16];
    let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut n = 0;
    while n < head.len() {
        match f.read(&mut head[n..]).map_err(|e| Error::io(path, e))? {
            0 => break,
            k => n += k,
        }
    }
    let head = &head[..n];
    if head.len() >= 9 && head[8] == b'{' {
        return Ok("safetensors");
    }
    if head.starts_with(b"PK\x03\x04") {
        return Ok("zip");
    }
    if head.first() == Some(&0x80) {
        return Err(Error::bad_file(
            path,
            "this is a PyTorch file in the legacy (pre-1.6) pickle format, which Mullion cannot \
             read; re-save it with torch.save(state_dict, path) in a recent PyTorch, or as \
             safetensors",
        ));
    }
    if n == 0 {
        return Err(Error::bad_file(path, "the file is empty"));
    }
    Err(Error::bad_file(
        path,
        "not a checkpoint: neither a safetensors file nor a PyTorch (.pth/.pt/.bin) archive",
    ))
}

/// Which family of layouts a patch-embedding marker belongs to.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum KeyScheme {
    /// timm and the original release (`patch_embed.proj`).
    TimmLike,
    /// transformers 4.x and 5.x.
    Transformers,
    /// The OpenMMLab toolkits, 3.x (`patch_embed.projection`, with `stages.*`).
    OpenMmlab,
}

/// Markers that identify a layout: the patch embedding's projection weight.
const EMBED_MARKERS: [(&str, KeyScheme); 3] = [
    ("patch_embed.proj.weight", KeyScheme::TimmLike),
    (
        "embeddings.patch_embeddings.projection.weight",
        KeyScheme::Transformers,
    ),
    ("patch_embed.projection.weight", KeyScheme::OpenMmlab),
];

/// Find the layout and prefix from the tensor names.
fn detect_layout(
    path: &Path,
    shapes: &BTreeMap<String, (Vec<usize>, DType)>,
) -> Result<(Layout, Vec<String>)> {
    let mut found: Vec<(String, KeyScheme)> = Vec::new();
    // OpenMMLab markers without any `stages.*` block beside them (another model's embedding).
    let mut stageless: Vec<String> = Vec::new();
    for name in shapes.keys() {
        for (marker, scheme) in EMBED_MARKERS {
            if let Some(prefix) = name.strip_suffix(marker) {
                if !(prefix.is_empty() || prefix.ends_with('.')) {
                    continue;
                }
                let blocks = format!("{prefix}stages.");
                if scheme == KeyScheme::OpenMmlab
                    && !shapes
                        .keys()
                        .any(|k| k.starts_with(&blocks) && k.contains(".blocks."))
                {
                    stageless.push(name.clone());
                    continue;
                }
                found.push((prefix.to_string(), scheme));
            }
        }
    }
    if found.is_empty() {
        let sample: Vec<_> = shapes.keys().take(5).cloned().collect();
        let stageless = match stageless.first() {
            Some(n) => format!(
                "; {n} looks like an OpenMMLab patch embedding, but no `stages.*.blocks.*` \
                 tensors sit beside it"
            ),
            None => String::new(),
        };
        return Err(Error::bad_file(
            path,
            format!(
                "no shifted-window backbone found: no patch embedding tensor \
                 (`patch_embed.proj.weight`, `embeddings.patch_embeddings.projection.weight` or \
                 `patch_embed.projection.weight` with `stages.*`) among its {} tensors (first: \
                 {}){stageless}",
                shapes.len(),
                sample.join(", ")
            ),
        ));
    }
    // Several backbones (e.g. a teacher and a student): take the shortest prefix.
    found.sort_by_key(|(p, _)| (p.len(), p.clone()));
    let (prefix, scheme) = found[0].clone();
    let others = found[1..].iter().map(|(p, _)| p.clone()).collect();
    let has = |n: &str| shapes.contains_key(&format!("{prefix}{n}"));
    let kind = match scheme {
        KeyScheme::Transformers if has("encoder.layers.0.blocks.0.attention.self.query.weight") => {
            LayoutKind::Transformers4
        }
        KeyScheme::Transformers => LayoutKind::Transformers5,
        KeyScheme::OpenMmlab => LayoutKind::OpenMmlab3,
        KeyScheme::TimmLike if has("layers.0.downsample.reduction.weight") => LayoutKind::Original,
        KeyScheme::TimmLike => LayoutKind::Timm,
    };
    // An absolute position embedding is added to the patch tokens; running without it would
    // compute another function, so such a file is refused rather than half used.
    if let Some(name) = ["absolute_pos_embed", "embeddings.position_embeddings"]
        .iter()
        .map(|n| format!("{prefix}{n}"))
        .find(|n| shapes.contains_key(n))
    {
        return Err(Error::bad_file(
            path,
            format!(
                "tensor {name} is an absolute position embedding added to the patch tokens \
                 (trained with absolute position embeddings switched on); Mullion runs \
                 backbones without one, and ignoring it would compute something else"
            ),
        ));
    }
    Ok((Layout { kind, prefix }, others))
}

impl Checkpoint {
    /// Open a checkpoint, read its tensor index and detect its layout. Reads no tensor data.
    pub fn open(path: impl AsRef<Path>) -> Result<Checkpoint> {
        let path = folder::weights_file(path.as_ref())?;
        let kind = sniff(&path)?;
        let mut nested_under = None;
        let (store, shapes) = match kind {
            "safetensors" => {
                // SAFETY: the file is mapped read-only; Mullion never writes to checkpoint files,
                // and a file changed underneath by another program is outside what we promise.
                let st = unsafe { candle_core::safetensors::MmapedSafetensors::new(&path) }
                    .map_err(|e| {
                        Error::bad_file(
                            &path,
                            format!("not a readable safetensors file (truncated or corrupt?): {e}"),
                        )
                    })?;
                let mut shapes = BTreeMap::new();
                for (name, view) in st.tensors() {
                    let dtype = DType::try_from(view.dtype()).map_err(|_| {
                        Error::bad_file(
                            &path,
                            format!(
                                "tensor {name} has a dtype Mullion cannot read ({:?})",
                                view.dtype()
                            ),
                        )
                    })?;
                    shapes.insert(name, (view.shape().to_vec(), dtype));
                }
                (Store::Safetensors(st), shapes)
            }
            _ => {
                let read = |key: Option<&str>| candle_core::pickle::PthTensors::new(&path, key);
                let mut chosen = None;
                for key in [
                    "state_dict",
                    "model",
                    "module",
                    "model_state_dict",
                    "state_dict_ema",
                ] {
                    if let Ok(p) = read(Some(key)) {
                        if !p.tensor_infos().is_empty() {
                            nested_under = Some(key.to_string());
                            chosen = Some(p);
                            break;
                        }
                    }
                }
                let pth = match chosen {
                    Some(p) => p,
                    None => read(None).map_err(|e| {
                        Error::bad_file(
                            &path,
                            format!("not a readable PyTorch archive (truncated or corrupt?): {e}"),
                        )
                    })?,
                };
                let shapes = pth
                    .tensor_infos()
                    .iter()
                    .map(|(k, v)| (k.clone(), (v.layout.shape().dims().to_vec(), v.dtype)))
                    .collect();
                (Store::Pickle(pth), shapes)
            }
        };
        if shapes.is_empty() {
            return Err(Error::bad_file(&path, "the file holds no tensors"));
        }
        let (layout, other_prefixes) = detect_layout(&path, &shapes)?;
        let family = Family::detect(&layout.prefix, &mut shapes.keys());
        let beside = folder::read_beside(&path)?;
        Ok(Checkpoint {
            path,
            store,
            shapes,
            nested_under,
            layout,
            other_prefixes,
            family,
            beside,
            used: RefCell::new(BTreeSet::new()),
        })
    }

    /// The first way of reading `part` whose tensors are all in the file (else the preferred one).
    fn resolve(&self, part: &Part) -> Recipe {
        let all = self.layout.recipes(part);
        all.iter()
            .find(|r| r.names().iter().all(|n| self.shapes.contains_key(*n)))
            .unwrap_or(&all[0])
            .clone()
    }

    /// Shape of a canonical part, if every tensor it is made of is present.
    pub fn shape(&self, part: &Part) -> Option<Vec<usize>> {
        match self.resolve(part) {
            Recipe::One(n) | Recipe::Unfold(n) => self.shapes.get(&n).map(|s| s.0.clone()),
            Recipe::Cat(names) => {
                let mut out: Option<Vec<usize>> = None;
                for n in names {
                    let s = self.shapes.get(&n)?.0.clone();
                    out = Some(match out {
                        None => s,
                        Some(mut acc) => {
                            if acc.len() != s.len() || acc[1..] != s[1..] {
                                return None;
                            }
                            acc[0] += s[0];
                            acc
                        }
                    });
                }
                out
            }
        }
    }

    pub fn has(&self, part: &Part) -> bool {
        self.shape(part).is_some()
    }

    /// Whether every file tensor of `part` is present (whatever their shapes).
    pub fn present(&self, part: &Part) -> bool {
        self.resolve(part)
            .names()
            .iter()
            .all(|n| self.shapes.contains_key(*n))
    }

    /// For a part stacked from several tensors (separate q, k, v) that are all present but do
    /// not stack into one, what is wrong.
    pub fn stack_problem(&self, part: &Part) -> Option<String> {
        let Recipe::Cat(names) = self.resolve(part) else {
            return None;
        };
        if !self.present(part) || self.shape(part).is_some() {
            return None;
        }
        let shapes: Vec<String> = names
            .iter()
            .map(|n| format!("{n} {:?}", self.shapes[n].0))
            .collect();
        Some(format!(
            "the tensors {} do not stack into one {} (they must agree in every dimension but \
             the first)",
            shapes.join(", "),
            part.canonical()
        ))
    }

    /// Every (stage, block) with at least one tensor in the file, and the number of stages the
    /// file implies (blocks, and patch merging, which names the stage it leads into). Indices
    /// beyond the bounds Mullion runs are an error naming the tensor.
    fn block_indices(&self) -> Result<(BTreeMap<usize, BTreeSet<usize>>, usize)> {
        let stages = self.layout.stages_prefix();
        let merge_leads_into = match self.layout.kind {
            LayoutKind::Timm => 0,
            _ => 1,
        };
        let mut blocks: BTreeMap<usize, BTreeSet<usize>> = BTreeMap::new();
        let mut n_stages = 0usize;
        let index = |name: &str, text: &str, max: usize, what: &str| -> Result<Option<usize>> {
            if text.is_empty() || !text.bytes().all(|b| b.is_ascii_digit()) {
                return Ok(None);
            }
            match text.parse::<usize>() {
                Ok(v) if v < max => Ok(Some(v)),
                _ => Err(Error::bad_file(
                    &self.path,
                    format!(
                        "tensor {name} has {what} index {text}; Mullion runs at most {max} \
                         {what}s"
                    ),
                )),
            }
        };
        for name in self.shapes.keys() {
            let Some(rest) = name.strip_prefix(&stages) else {
                continue;
            };
            let mut it = rest.split('.');
            let (Some(i), Some(kind)) = (it.next(), it.next()) else {
                continue;
            };
            let Some(i) = index(name, i, MAX_STAGES, "stage")? else {
                continue;
            };
            match kind {
                "blocks" => {
                    let Some(j) = it.next() else { continue };
                    if let Some(j) = index(name, j, MAX_BLOCKS_PER_STAGE, "block")? {
                        blocks.entry(i).or_default().insert(j);
                        n_stages = n_stages.max(i + 1);
                    }
                }
                "downsample" => n_stages = n_stages.max(i + 1 + merge_leads_into),
                _ => {}
            }
        }
        if n_stages > MAX_STAGES {
            return Err(Error::bad_file(
                &self.path,
                format!("the tensors imply {n_stages} stages; Mullion runs at most {MAX_STAGES}"),
            ));
        }
        Ok((blocks, n_stages))
    }

    /// Blocks per stage from every block index in the file: stage `i` has as many blocks as its
    /// highest index + 1, so a block missing in the middle is a hole the loader names, never a
    /// shallower model. A stage with no block at all, below one that has blocks, is an error.
    pub fn infer_depths(&self) -> Result<Vec<usize>> {
        let (blocks, n_stages) = self.block_indices()?;
        let depths: Vec<usize> = (0..n_stages)
            .map(|i| blocks.get(&i).and_then(|b| b.last()).map_or(0, |j| j + 1))
            .collect();
        if depths.is_empty() {
            return Err(Error::bad_file(
                &self.path,
                format!(
                    "found a patch embedding but no blocks (expected e.g. {})",
                    self.file_names(&Part::block(0, 0, "norm1.weight")).join("")
                ),
            ));
        }
        if let Some(i) = depths.iter().position(|&d| d == 0) {
            let later = depths.len() - 1;
            return Err(Error::bad_file(
                &self.path,
                format!(
                    "stage {i} has no block tensors ({}{i}.blocks.*) although the file has {} \
                     stages; missing: all of stage {i}'s blocks, e.g. {}",
                    self.layout.stages_prefix(),
                    later + 1,
                    self.file_names(&Part::block(i, 0, "norm1.weight"))
                        .join(" + ")
                ),
            ));
        }
        Ok(depths)
    }

    /// The file's names for a part (for messages).
    pub fn file_names(&self, part: &Part) -> Vec<String> {
        self.layout
            .recipe(part)
            .names()
            .into_iter()
            .map(String::from)
            .collect()
    }

    fn load_raw(&self, name: &str) -> Result<Tensor> {
        let dev = Device::Cpu;
        let t = match &self.store {
            Store::Safetensors(st) => st.load(name, &dev).map_err(|e| {
                Error::bad_file(&self.path, format!("cannot read tensor {name}: {e}"))
            })?,
            Store::Pickle(p) => p
                .get(name)
                .map_err(|e| {
                    Error::bad_file(&self.path, format!("cannot read tensor {name}: {e}"))
                })?
                .ok_or_else(|| Error::bad_file(&self.path, format!("tensor {name} is missing")))?,
        };
        self.used.borrow_mut().insert(name.to_string());
        Ok(t.to_dtype(DType::F32)?)
    }

    /// Load a canonical part as f32 with the expected shape.
    pub fn load(&self, part: &Part, expected: &[usize]) -> Result<Tensor> {
        let recipe = self.resolve(part);
        let shape = self.shape(part).ok_or_else(|| {
            Error::bad_file(
                &self.path,
                format!("missing tensor {}", recipe.names().join(" + ")),
            )
        })?;
        let unfold = matches!(recipe, Recipe::Unfold(_));
        let width = shape.last().copied().unwrap_or(0);
        if shape != expected || (unfold && width % 4 != 0) {
            let hint = match expected.last() {
                Some(&w) if unfold && w % 4 == 0 && w != width => format!(
                    " (a patch merging stored in unfold order holds, in its last dimension, the \
                     2x2 neighbours of each of the stage's {c} channels: 4 x {c} = {w})",
                    c = w / 4
                ),
                _ if unfold => " (a patch merging stored in unfold order holds, in its last \
                     dimension, the 2x2 neighbours of each of the stage's C channels: 4C, a \
                     multiple of 4)"
                    .to_string(),
                _ => String::new(),
            };
            return Err(Error::bad_file(
                &self.path,
                format!(
                    "tensor {} has shape {:?}; the backbone needs {:?} there{hint}",
                    recipe.names().join(" + "),
                    shape,
                    expected
                ),
            ));
        }
        let t = match recipe {
            Recipe::One(n) => self.load_raw(&n)?,
            Recipe::Unfold(n) => from_unfold_order(&self.load_raw(&n)?)?,
            Recipe::Cat(names) => {
                let parts = names
                    .iter()
                    .map(|n| self.load_raw(n))
                    .collect::<Result<Vec<_>>>()?;
                Tensor::cat(&parts, 0)?
            }
        };
        Ok(t.contiguous()?)
    }

    /// Number of tensors in the file.
    pub fn len(&self) -> usize {
        self.shapes.len()
    }

    pub fn is_empty(&self) -> bool {
        self.shapes.is_empty()
    }

    /// Read the model shape off the tensors; `over` fields win.
    pub fn infer_config(&self, over: &ConfigOverride) -> Result<Config> {
        // A config.json beside the file sits between the tensors and the user's --config.
        let merged;
        let over = match &self.beside {
            Some(b) => {
                merged = over.over(&b.over);
                &merged
            }
            None => over,
        };
        let bad = |m: String| Error::bad_file(&self.path, m);
        let proj = self
            .shape(&Part::embed("proj.weight"))
            .ok_or_else(|| bad("missing the patch embedding weight".into()))?;
        if proj.len() != 4 || proj[2] != proj[3] {
            return Err(bad(format!(
                "patch embedding weight {} has shape {proj:?}; expected [C, 3, p, p]",
                self.file_names(&Part::embed("proj.weight")).join("")
            )));
        }
        let (embed_dim, in_chans, patch) = (proj[0], proj[1], proj[2]);
        let depths = match &over.depths {
            Some(d) => {
                if d.is_empty()
                    || d.len() > MAX_STAGES
                    || d.iter().any(|&b| b == 0 || b > MAX_BLOCKS_PER_STAGE)
                {
                    return Err(Error::BadArgument(format!(
                        "depths {d:?}: expected 1 to {MAX_STAGES} stages of 1 to \
                         {MAX_BLOCKS_PER_STAGE} blocks"
                    )));
                }
                d.clone()
            }
            None => self.infer_depths()?,
        };
        let mut heads = Vec::new();
        let mut window: Option<(usize, usize)> = None;
        // V1 reads heads (and the window) off the bias tables, V2 the heads off the logit scales.
        let (heads_part, heads_what) = match self.family {
            Family::V1 => ("attn.relative_position_bias_table", "a bias table"),
            Family::V2 => ("attn.logit_scale", "a logit scale"),
        };
        for (i, &depth) in depths.iter().enumerate() {
            // The first block of the stage whose table is in the file (a hole elsewhere is
            // named by the loader's list of missing tensors).
            let found = (0..depth)
                .map(|j| Part::block(i, j, heads_part))
                .find_map(|part| self.shape(&part).map(|t| (part, t)));
            let Some((part, t)) = found else {
                if over.heads.is_some() {
                    heads.push(0);
                    continue;
                }
                let part = Part::block(i, 0, heads_part);
                return Err(bad(format!(
                    "missing tensor {} (no block of stage {i} has {heads_what}, so its heads \
                     cannot be read)",
                    self.file_names(&part).join("")
                )));
            };
            if self.family == Family::V2 {
                if t.len() != 3 || t[1] != 1 || t[2] != 1 {
                    return Err(bad(format!(
                        "logit scale {} has shape {t:?}; expected [heads, 1, 1]",
                        self.file_names(&part).join("")
                    )));
                }
                heads.push(t[0]);
                continue;
            }
            if t.len() != 2 {
                return Err(bad(format!(
                    "bias table {} has shape {t:?}; expected [rows, heads]",
                    self.file_names(&part).join("")
                )));
            }
            heads.push(t[1]);
            if let Some(m) = square_window(t[0]) {
                window = Some(window.map_or((m, m), |w| if m > w.0 { (m, m) } else { w }));
            }
        }
        let fc1 = (0..depths.first().copied().unwrap_or(0))
            .find_map(|j| self.shape(&Part::block(0, j, "mlp.fc1.weight")))
            .ok_or_else(|| {
                bad(format!(
                    "missing tensor {}",
                    self.file_names(&Part::block(0, 0, "mlp.fc1.weight"))
                        .join("")
                ))
            })?;
        let mlp_ratio = fc1.first().copied().unwrap_or(0) as f64 / embed_dim.max(1) as f64;
        if self.family == Family::V2 {
            window = self.v2_buffer_window(&depths);
        }
        let window = match (over.window, window) {
            (Some(w), _) => w.dims(),
            (None, Some(w)) => w,
            (None, None) if self.family == Family::V2 => {
                return Err(Error::WindowUnstated {
                    path: self.path.clone(),
                    problem: "a Swin V2 checkpoint does not record its window in its tensors \
                              (the position bias is made by an MLP for any window); put the \
                              transformers config.json beside the file, or give the window in \
                              a --config file (\"window\": M)"
                        .into(),
                });
            }
            (None, None) => {
                return Err(bad(
                    "no stage has a square window ((2M-1)^2 bias table rows), so the window \
                     size cannot be read from the tensors; give it in a config file \
                     (\"window\": M)"
                        .into(),
                ))
            }
        };
        let depths_len = over.depths.as_ref().map_or(depths.len(), Vec::len);
        let cfg = Config {
            in_chans,
            patch: over.patch.unwrap_or(patch),
            embed_dim: over.embed_dim.unwrap_or(embed_dim),
            depths: over.depths.clone().unwrap_or(depths),
            heads: over.heads.clone().unwrap_or(heads),
            window,
            mlp_ratio: over.mlp_ratio.unwrap_or(mlp_ratio),
            v2: (self.family == Family::V2).then(|| self.v2_shape(over, depths_len)),
        };
        cfg.validate().map_err(|m| {
            bad(format!(
                "inconsistent model shape: {m} (the shape read from the tensors, with any \
                 --config fields applied)"
            ))
        })?;
        Ok(cfg)
    }

    /// The window of a V2 file that kept its coordinate tables (`relative_coords_table`
    /// `[1, 2wh-1, 2ww-1, 2]`, saved by older code): the largest over its blocks.
    fn v2_buffer_window(&self, depths: &[usize]) -> Option<(usize, usize)> {
        depths
            .iter()
            .enumerate()
            .flat_map(|(i, &d)| {
                (0..d).map(move |j| Part::block(i, j, "attn.relative_coords_table"))
            })
            .filter_map(|p| self.shape(&p))
            .filter(|t| t.len() == 4 && t[1] % 2 == 1 && t[2] % 2 == 1)
            .map(|t| (t[1].div_ceil(2), t[2].div_ceil(2)))
            .max()
    }

    /// What a V2 backbone adds to the shape: the bias MLP's width read off the tensors (512, the
    /// width both reference libraries build, when no block has it: the loader then names the
    /// missing tensors), the trained windows and the size it was built for from the override or
    /// config.json, and the library's mask and norm eps.
    fn v2_shape(&self, over: &ConfigOverride, stages: usize) -> V2Shape {
        let cpb_hidden = self
            .shapes
            .keys()
            .filter(|n| n.starts_with(&self.layout.prefix))
            .find_map(|n| {
                let hit = n.ends_with("cpb_mlp.0.weight")
                    || n.ends_with("continuous_position_bias_mlp.0.weight");
                let s = &self.shapes[n].0;
                (hit && s.len() == 2 && s[1] == 2).then_some(s[0])
            })
            .unwrap_or(512);
        let transformers = self.layout.kind.is_transformers();
        V2Shape {
            cpb_hidden,
            trained_windows: over
                .trained_window
                .as_ref()
                .map_or_else(|| vec![None; stages], |t| t.per_stage(stages)),
            built_for: over.built_for.map(|w| w.dims()),
            mask_fill: if transformers { -200.0 } else { -100.0 },
            norm_eps: self
                .beside
                .as_ref()
                .and_then(|b| b.layer_norm_eps)
                .unwrap_or(1e-5), // the reference libraries' default
        }
    }

    /// The tensors used so far (file names).
    pub fn used(&self) -> BTreeSet<String> {
        self.used.borrow().clone()
    }

    /// All tensor names in the file.
    pub fn names(&self) -> impl Iterator<Item = &String> {
        self.shapes.keys()
    }

    /// Elements in the named tensors.
    pub fn parameter_count(&self, names: &BTreeSet<String>) -> u64 {
        names
            .iter()
            .filter_map(|n| self.shapes.get(n))
            .map(|(s, _)| s.iter().fold(1u64, |a, &d| a.saturating_mul(d as u64)))
            .fold(0u64, u64::saturating_add)
    }

    pub fn stored_dtypes(&self) -> BTreeSet<String> {
        self.shapes
            .values()
            .map(|(_, d)| format!("{d:?}").to_lowercase())
            .collect()
    }
}

/// `M` when `rows == (2M-1)^2`.
pub fn square_window(rows: usize) -> Option<usize> {
    let r = (rows as f64).sqrt().round() as usize;
    (r.checked_mul(r) == Some(rows) && r % 2 == 1).then_some(r.div_ceil(2))
}

/// `norm{i}.weight` / `.bias` outside any block: a per-stage output norm (detection and
/// segmentation backbones keep one for each stage they output, e.g. only stages 1 to 3).
fn is_stage_norm(name: &str) -> bool {
    let mut rev = name.rsplit('.');
    let (Some(wb), Some(module)) = (rev.next(), rev.next()) else {
        return false;
    };
    matches!(wb, "weight" | "bias")
        && !name.contains(".blocks.")
        && module
            .strip_prefix("norm")
            .is_some_and(|i| !i.is_empty() && i.bytes().all(|b| b.is_ascii_digit()))
}

/// Why a tensor in the file was not used.
pub fn ignored_reason(name: &str) -> &'static str {
    let any = |parts: &[&str]| parts.iter().any(|p| name.contains(p));
    if name.ends_with("relative_position_index")
        || name.ends_with("attn_mask")
        || name.ends_with("relative_coords_table")
    {
        "buffer, recomputed"
    } else if any(&["decode_head.", "auxiliary_head."]) {
        "segmentation head"
    } else if any(&["rpn_head.", "roi_head.", "bbox_head.", "mask_head."]) {
        "detection head"
    } else if name.starts_with("data_preprocessor.") {
        "the training toolkit's input normalisation; Mullion normalises with --mean / --std \
         (default ImageNet)"
    } else if is_stage_norm(name) {
        "per-stage output norm; used only when every stage has one"
    } else if name.contains("head") || name.contains("classifier") || name.starts_with("fc.") {
        "head / classifier"
    } else if name.contains("neck") || name.contains("fpn") || name.contains("decode") {
        "neck / decoder"
    } else {
        "not part of the backbone"
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn square_windows_from_table_rows() {
        assert_eq!(square_window(169), Some(7));
        assert_eq!(square_window(529), Some(12));
        assert_eq!(square_window(1), Some(1));
        assert_eq!(square_window(168), None);
        assert_eq!(square_window(144), None); // 12^2: even side is no (2M-1)^2
    }

    #[test]
    fn ignored_tensors_of_detectors_and_segmenters_have_reasons() {
        // Module names of mmdetection / mmsegmentation 3.x models around the backbone.
        for (name, why) in [
            ("rpn_head.rpn_conv.weight", "detection head"),
            ("roi_head.bbox_head.fc_cls.weight", "detection head"),
            ("decode_head.conv_seg.weight", "segmentation head"),
            ("auxiliary_head.conv_seg.bias", "segmentation head"),
            ("neck.lateral_convs.0.conv.weight", "neck / decoder"),
            ("head.fc.weight", "head / classifier"),
            // mmdet 3.x RetinaNet configs output stages 1 to 3 only (out_indices=(1, 2, 3)).
            (
                "backbone.norm1.weight",
                "per-stage output norm; used only when every stage has one",
            ),
            ("backbone.norm.weight", "not part of the backbone"),
            (
                "data_preprocessor.mean",
                "the training toolkit's input normalisation; Mullion normalises with --mean / \
                 --std (default ImageNet)",
            ),
            (
                "backbone.stages.0.blocks.0.attn.w_msa.relative_position_index",
                "buffer, recomputed",
            ),
        ] {
            assert_eq!(ignored_reason(name), why, "{name}");
        }
    }

    #[test]
    fn recipes_per_layout() {
        let tf = Layout {
            kind: LayoutKind::Transformers4,
            prefix: "swin.".into(),
        };
        assert_eq!(
            tf.recipe(&Part::block(1, 0, "attn.qkv.bias")),
            Recipe::Cat(vec![
                "swin.encoder.layers.1.blocks.0.attention.self.query.bias".into(),
                "swin.encoder.layers.1.blocks.0.attention.self.key.bias".into(),
                "swin.encoder.layers.1.blocks.0.attention.self.value.bias".into(),
            ])
        );
        assert_eq!(
            tf.recipe(&Part::merge(2, "reduction.weight")),
            Recipe::One("swin.encoder.layers.1.downsample.reduction.weight".into())
        );
        let det = Layout {
            kind: LayoutKind::Original,
            prefix: "backbone.".into(),
        };
        assert_eq!(
            det.recipe(&Part::merge(1, "norm.weight")),
            Recipe::One("backbone.layers.0.downsample.norm.weight".into())
        );
        assert_eq!(
            det.recipe(&Part::StageNorm(3, "bias".into())),
            Recipe::One("backbone.norm3.bias".into())
        );
        // OpenMMLab 3.x, as mmdet/models/backbones/swin.py (mmdetection 3.x) names its modules.
        let mm = Layout {
            kind: LayoutKind::OpenMmlab3,
            prefix: "backbone.".into(),
        };
        let cases = [
            (Part::embed("proj.weight"), "patch_embed.projection.weight"),
            (Part::embed("norm.bias"), "patch_embed.norm.bias"),
            (
                Part::block(2, 1, "attn.qkv.weight"),
                "stages.2.blocks.1.attn.w_msa.qkv.weight",
            ),
            (
                Part::block(0, 0, "attn.relative_position_bias_table"),
                "stages.0.blocks.0.attn.w_msa.relative_position_bias_table",
            ),
            (
                Part::block(1, 0, "attn.proj.bias"),
                "stages.1.blocks.0.attn.w_msa.proj.bias",
            ),
            (
                Part::block(1, 1, "mlp.fc1.weight"),
                "stages.1.blocks.1.ffn.layers.0.0.weight",
            ),
            (
                Part::block(3, 0, "mlp.fc2.bias"),
                "stages.3.blocks.0.ffn.layers.1.bias",
            ),
            (
                Part::block(0, 1, "norm2.weight"),
                "stages.0.blocks.1.norm2.weight",
            ),
            (Part::StageNorm(2, "weight".into()), "norm2.weight"),
        ];
        for (part, name) in cases {
            assert_eq!(mm.recipe(&part), Recipe::One(format!("backbone.{name}")));
        }
        for s in ["reduction.weight", "norm.weight", "norm.bias"] {
            assert_eq!(
                mm.recipe(&Part::merge(3, s)),
                Recipe::Unfold(format!("backbone.stages.2.downsample.{s}"))
            );
        }
    }

    /// `correct_unfold_reduction_order` / `correct_unfold_norm_order` of the OpenMMLab
    /// converters (mmdetection 3.x, tools/model_converters/swin2mmdet.py via
    /// mmdet/models/backbones/swin.py `swin_converter`), written out element by element:
    /// `x.reshape(o, 4, C)[:, [0, 2, 1, 3], :].transpose(1, 2).reshape(o, 4C)`.
    fn converter_forward(x: &[f32], rows: usize, width: usize) -> Vec<f32> {
        let c = width / 4;
        let order = [0, 2, 1, 3];
        let mut out = vec![0f32; rows * width];
        for r in 0..rows {
            for ch in 0..c {
                for (k, &src) in order.iter().enumerate() {
                    // After the transpose, element (ch, k) sits at ch * 4 + k.
                    out[r * width + ch * 4 + k] = x[r * width + src * c + ch];
                }
            }
        }
        out
    }

    #[test]
    fn unfold_order_is_undone_exactly() {
        let dev = Device::Cpu;
        // A reduction weight [2C, 4C] and a norm vector [4C], C = 3, distinct values.
        for (rows, width) in [(6usize, 12usize), (1, 12)] {
            let timm: Vec<f32> = (0..rows * width).map(|v| v as f32 * 0.5 - 7.0).collect();
            let stored = converter_forward(&timm, rows, width);
            assert_ne!(stored, timm);
            let t = if rows == 1 {
                Tensor::from_vec(stored, width, &dev).unwrap()
            } else {
                Tensor::from_vec(stored, (rows, width), &dev).unwrap()
            };
            let back = from_unfold_order(&t).unwrap();
            assert_eq!(back.dims(), t.dims());
            assert_eq!(back.flatten_all().unwrap().to_vec1::<f32>().unwrap(), timm);
        }
    }
}
