//! The parts of a shifted-window backbone (Liu et al. 2021): patch embedding, window attention
//! with relative position bias and the shifted-window mask, MLP, block, patch merging.
//!
//! Activations are token matrices `[tokens, C]` of one image; the token order is row-major over
//! the stage grid. Padding, cyclic shift and window partition are one gather with an index from
//! [`crate::engine::geometry`], and the way back one gather with the inverse index, so that the batched
//! matmuls run over all windows and heads at once and no Rust loop touches a window.

use super::checkpoint::Part;
use crate::engine::geometry::BlockGeometry;
use crate::error::{Error, Result};
use candle_core::{DType, Device, Tensor, D};

/// LayerNorm eps of the published model and both reference libraries.
pub const LN_EPS: f32 = 1e-5;

/// Where layer weights come from: a checkpoint or random initialisation.
pub trait WeightSource {
    /// A canonical tensor as f32, checked against `shape`.
    fn get(&self, part: Part, shape: &[usize]) -> Result<Tensor>;
    /// A relative position bias table `[rows, heads]` (rows vary with the window).
    fn bias_table(&self, part: Part, heads: usize) -> Result<Tensor>;
}

pub struct LayerNorm {
    weight: Tensor,
    bias: Tensor,
}

impl LayerNorm {
    pub fn new(src: &dyn WeightSource, dim: usize, part: impl Fn(&str) -> Part) -> Result<Self> {
        Ok(LayerNorm {
            weight: src.get(part("weight"), &[dim])?,
            bias: src.get(part("bias"), &[dim])?,
        })
    }
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        // The fused kernel has no backward pass; training (tracked tensors) takes the composed one.
        if x.track_op() || self.weight.track_op() {
            return Ok(candle_nn::ops::layer_norm_slow(
                x,
                &self.weight,
                &self.bias,
                LN_EPS,
            )?);
        }
        Ok(candle_nn::ops::layer_norm(
            &x.contiguous()?,
            &self.weight,
            &self.bias,
            LN_EPS,
        )?)
    }
}

/// `y = x W^T + b`. For inference `W^T` is stored contiguous once at load; trainable weights
/// (variables) are transposed at each call so that updates to them are seen.
pub struct Linear {
    weight: Tensor,
    weight_t: Option<Tensor>,
    bias: Option<Tensor>,
}

impl Linear {
    pub fn from_weight(weight: &Tensor, bias: Option<Tensor>) -> Result<Self> {
        let weight_t = if weight.track_op() {
            None
        } else {
            Some(weight.t()?.contiguous()?)
        };
        Ok(Linear {
            weight: weight.clone(),
            weight_t,
            bias,
        })
    }

    pub fn new(
        src: &dyn WeightSource,
        input: usize,
        output: usize,
        with_bias: bool,
        part: impl Fn(&str) -> Part,
    ) -> Result<Self> {
        let w = src.get(part("weight"), &[output, input])?;
        let b = if with_bias {
            Some(src.get(part("bias"), &[output])?)
        } else {
            None
        };
        Self::from_weight(&w, b)
    }

    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let y = match &self.weight_t {
            Some(wt) => x.matmul(wt)?,
            None => x.matmul(&self.weight.t()?)?,
        };
        Ok(match &self.bias {
            Some(b) => y.broadcast_add(b)?,
            None => y,
        })
    }
}

/// Conv with kernel = stride = patch, then LayerNorm: a patch matrix times the flattened kernel.
pub struct PatchEmbed {
    patch: usize,
    proj: Linear,
    norm: LayerNorm,
}

impl PatchEmbed {
    pub fn new(src: &dyn WeightSource, in_chans: usize, dim: usize, patch: usize) -> Result<Self> {
        let w = src.get(Part::embed("proj.weight"), &[dim, in_chans, patch, patch])?;
        let b = src.get(Part::embed("proj.bias"), &[dim])?;
        let proj = Linear::from_weight(&w.reshape((dim, in_chans * patch * patch))?, Some(b))?;
        let norm = LayerNorm::new(src, dim, |s| Part::embed(&format!("norm.{s}")))?;
        Ok(PatchEmbed { patch, proj, norm })
    }

    /// `x`: normalised image `[chans, H, W]` with H, W multiples of the patch. Returns `[gh*gw, C]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (c, h, w) = x.dims3()?;
        let p = self.patch;
        let (gh, gw) = (h / p, w / p);
        let patches = x
            .reshape((c, gh, p, gw, p))?
            .permute((1, 3, 0, 2, 4))?
            .contiguous()?
            .reshape((gh * gw, c * p * p))?;
        self.norm.forward(&self.proj.forward(&patches)?)
    }
}

/// A relative position bias table with the windows it can serve.
pub struct BiasTable {
    /// `[rows, heads]`.
    table: Tensor,
    /// Every window `a x b` (no larger than the model's) whose table has this many rows.
    fits: Vec<(usize, usize)>,
    what: String,
}

impl BiasTable {
    /// `nominal` is the model's window; the table must be `(2a-1)(2b-1)` rows for a window
    /// `a x b` no larger than it (the full window, or one clamped to a small stage).
    pub fn new(table: Tensor, nominal: (usize, usize), what: &str) -> Result<Self> {
        let rows = table.dim(0)?;
        let fits: Vec<(usize, usize)> = (1..=nominal.0)
            .flat_map(|a| (1..=nominal.1).map(move |b| (a, b)))
            .filter(|&(a, b)| (2 * a - 1) * (2 * b - 1) == rows)
            .collect();
        let (mh, mw) = nominal;
        if fits.is_empty() {
            return Err(Error::BadArgument(format!(
                "{what} has {rows} rows; a {mh}x{mw} window needs (2*{mh}-1)*(2*{mw}-1) = {} \
                 (or the rows of a smaller window clamped to a small stage)",
                (2 * mh - 1) * (2 * mw - 1)
            )));
        }
        Ok(BiasTable {
            table,
            fits,
            what: what.to_string(),
        })
    }

    /// The window the table was made for, when it is unambiguous or square.
    pub fn made_for(&self) -> (usize, usize) {
        self.fits
            .iter()
            .copied()
            .find(|(a, b)| a == b)
            .unwrap_or(self.fits[0])
    }

    /// The table's window that serves a runtime window: the exact one, else the smallest that
    /// covers it (a smaller window uses the central part of a larger table).
    pub fn window_for(&self, runtime: (usize, usize)) -> Result<(usize, usize)> {
        self.fits
            .iter()
            .copied()
            .filter(|&(a, b)| a >= runtime.0 && b >= runtime.1)
            .min_by_key(|&(a, b)| (a * b, a))
            .ok_or_else(|| {
                let (a, b) = self.made_for();
                Error::BadArgument(format!(
                    "{} is made for a {a}x{b} window, but this input needs a {}x{} window \
                     there; run at the size the checkpoint was made for, or choose another \
                     --small-stage",
                    self.what, runtime.0, runtime.1
                ))
            })
    }

    /// Bias `[heads, N, N]` for a runtime window `wh x ww`: entry (a, b) is row
    /// `(ya - yb + Th - 1) * (2Tw - 1) + (xa - xb + Tw - 1)` of the table, the published
    /// relative position index.
    pub fn bias(&self, wh: usize, ww: usize) -> Result<Tensor> {
        let (th, tw) = self.window_for((wh, ww))?;
        let n = wh * ww;
        let mut idx = Vec::with_capacity(n * n);
        for a in 0..n {
            let (ya, xa) = (a / ww, a % ww);
            for b in 0..n {
                let (yb, xb) = (b / ww, b % ww);
                let dy = ya + th - 1 - yb;
                let dx = xa + tw - 1 - xb;
                idx.push((dy * (2 * tw - 1) + dx) as u32);
            }
        }
        let idx = Tensor::from_vec(idx, n * n, &Device::Cpu)?;
        let heads = self.table.dim(1)?;
        Ok(self
            .table
            .index_select(&idx, 0)?
            .reshape((n, n, heads))?
            .permute((2, 0, 1))?
            .contiguous()?)
    }
}

pub struct WindowAttention {
    heads: usize,
    qkv: Linear,
    proj: Linear,
    pub bias_table: BiasTable,
}

/// Rows of `x` (`[tokens, C]`) picked by `idx`, where index `tokens` is a zero padding row.
fn gather_rows(x: &Tensor, idx: Vec<u32>) -> Result<Tensor> {
    let c = x.dim(1)?;
    let padded = Tensor::cat(&[x, &Tensor::zeros((1, c), DType::F32, &Device::Cpu)?], 0)?;
    Ok(padded.index_select(&u32_tensor(idx)?, 0)?)
}

fn u32_tensor(v: Vec<u32>) -> Result<Tensor> {
    let n = v.len();
    Ok(Tensor::from_vec(v, n, &Device::Cpu)?)
}

impl WindowAttention {
    /// Attention over the windows of one block. `x`: `[tokens, C]` after LN1. Returns the output
    /// `[tokens, C]` and, when `keep` is set, the attention weights `[windows, heads, N, N]`.
    pub fn forward(
        &self,
        x: &Tensor,
        geo: &BlockGeometry,
        keep: bool,
    ) -> Result<(Tensor, Option<Tensor>)> {
        let (tokens, c) = x.dims2()?;
        let (wh, ww) = geo.window();
        let n = wh * ww;
        let n_windows = geo.n_windows();
        let heads = self.heads;
        let head_dim = c / heads;

        // Pad, roll and partition in one gather.
        let windows = gather_rows(x, geo.gather_index())?;

        let qkv = self
            .qkv
            .forward(&windows)?
            .reshape((n_windows, n, 3, heads, head_dim))?
            .permute((2, 0, 3, 1, 4))?
            .contiguous()?;
        let scale = (head_dim as f64).powf(-0.5);
        let q = (qkv.get(0)? * scale)?;
        let k = qkv.get(1)?;
        let v = qkv.get(2)?;

        let mut attn = q.matmul(&k.t()?)?; // [windows, heads, N, N]
        attn = attn.broadcast_add(&self.bias_table.bias(wh, ww)?.unsqueeze(0)?)?;
        if let Some(mask) = geo.shift_mask() {
            let mask = Tensor::from_vec(mask, (n_windows, 1, n, n), &Device::Cpu)?;
            attn = attn.broadcast_add(&mask)?;
        }
        let attn = if attn.track_op() {
            candle_nn::ops::softmax(&attn, D::Minus1)?
        } else {
            candle_nn::ops::softmax_last_dim(&attn)?
        };
        let out = attn
            .matmul(&v)?
            .transpose(1, 2)?
            .reshape((n_windows * n, c))?;
        let out = self.proj.forward(&out)?;
        let out = out.index_select(&u32_tensor(geo.scatter_index())?, 0)?;
        debug_assert_eq!(out.dim(0)?, tokens);
        Ok((out, keep.then_some(attn)))
    }
}

pub struct Mlp {
    fc1: Linear,
    fc2: Linear,
}

impl Mlp {
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        // Exact (erf) GELU, as the published model and both libraries use.
        self.fc2.forward(&self.fc1.forward(x)?.gelu_erf()?)
    }
}

pub struct Block {
    norm1: LayerNorm,
    pub attn: WindowAttention,
    norm2: LayerNorm,
    mlp: Mlp,
}

impl Block {
    /// Block `j` of stage `i`; `nominal` is the model's window.
    pub fn new(
        src: &dyn WeightSource,
        stage: usize,
        j: usize,
        dim: usize,
        heads: usize,
        hidden: usize,
        nominal: (usize, usize),
    ) -> Result<Self> {
        let sub =
            |prefix: &'static str| move |s: &str| Part::block(stage, j, &format!("{prefix}.{s}"));
        let table = src.bias_table(
            Part::block(stage, j, "attn.relative_position_bias_table"),
            heads,
        )?;
        let what = format!("the bias table of stage {stage} block {j}");
        let bias_table = BiasTable::new(table, nominal, &what)?;
        Ok(Block {
            norm1: LayerNorm::new(src, dim, sub("norm1"))?,
            attn: WindowAttention {
                heads,
                qkv: Linear::new(src, dim, 3 * dim, true, sub("attn.qkv"))?,
                proj: Linear::new(src, dim, dim, true, sub("attn.proj"))?,
                bias_table,
            },
            norm2: LayerNorm::new(src, dim, sub("norm2"))?,
            mlp: Mlp {
                fc1: Linear::new(src, dim, hidden, true, sub("mlp.fc1"))?,
                fc2: Linear::new(src, hidden, dim, true, sub("mlp.fc2"))?,
            },
        })
    }

    pub fn forward(
        &self,
        x: &Tensor,
        geo: &BlockGeometry,
        keep: bool,
    ) -> Result<(Tensor, Option<Tensor>)> {
        let (a, attn) = self.attn.forward(&self.norm1.forward(x)?, geo, keep)?;
        let x = (x + a)?;
        let x = (&x + self.mlp.forward(&self.norm2.forward(&x)?)?)?;
        Ok((x, attn))
    }
}

/// Patch merging at the start of stage `i`: 2x2 neighbours concatenated, LayerNorm(4C), Linear
/// 4C -> 2C without bias.
pub struct PatchMerging {
    norm: LayerNorm,
    reduction: Linear,
}

impl PatchMerging {
    pub fn new(src: &dyn WeightSource, stage: usize, dim_in: usize) -> Result<Self> {
        let norm = LayerNorm::new(src, 4 * dim_in, |s| {
            Part::merge(stage, &format!("norm.{s}"))
        })?;
        let reduction = Linear::new(src, 4 * dim_in, 2 * dim_in, false, |s| {
            Part::merge(stage, &format!("reduction.{s}"))
        })?;
        Ok(PatchMerging { norm, reduction })
    }

    pub fn forward(&self, x: &Tensor, grid: (usize, usize)) -> Result<(Tensor, (usize, usize))> {
        let (_, c) = x.dims2()?;
        let (idx, out) = crate::engine::geometry::merge_index(grid);
        let merged = gather_rows(x, idx)?.reshape((out.0 * out.1, 4 * c))?;
        let y = self.reduction.forward(&self.norm.forward(&merged)?)?;
        Ok((y, out))
    }
}
