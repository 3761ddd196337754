//! The parts of a shifted-window backbone (Liu et al. 2021): patch embedding, window attention
//! with relative position bias and the shifted-window mask, MLP, block, patch merging.
//!
//! Activations are token matrices `[tokens, C]` of one image; the token order is row-major over
//! the stage grid. Padding, cyclic shift and window partition are one gather with an index from
//! [`crate::engine::geometry`], and the way back one gather with the inverse index, so that the batched
//! matmuls run over all windows and heads at once and no Rust loop touches a window.

use super::checkpoint::Part;
use super::config::V2Shape;
use super::kernels::{self, AttentionShape};
use crate::engine::geometry::BlockGeometry;
use crate::error::{Error, Result};
use candle_core::{DType, Device, Tensor, D};
use std::sync::{Arc, Mutex};

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
    eps: f32,
}

impl LayerNorm {
    pub fn new(src: &dyn WeightSource, dim: usize, part: impl Fn(&str) -> Part) -> Result<Self> {
        Self::with_eps(src, dim, part, LN_EPS)
    }

    pub fn with_eps(
        src: &dyn WeightSource,
        dim: usize,
        part: impl Fn(&str) -> Part,
        eps: f32,
    ) -> Result<Self> {
        Ok(LayerNorm {
            weight: src.get(part("weight"), &[dim])?,
            bias: src.get(part("bias"), &[dim])?,
            eps,
        })
    }
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        // The fused kernel has no backward pass; training (tracked tensors) takes the composed one.
        if x.track_op() || self.weight.track_op() {
            return Ok(candle_nn::ops::layer_norm_slow(
                x,
                &self.weight,
                &self.bias,
                self.eps,
            )?);
        }
        Ok(candle_nn::ops::layer_norm(
            &x.contiguous()?,
            &self.weight,
            &self.bias,
            self.eps,
        )?)
    }
}

impl LayerNorm {
    fn frozen(&self) -> bool {
        !self.weight.track_op() && !self.bias.track_op()
    }

    /// The norm of rows `index` of `x` (`[tokens, C]`) into `out`; index `tokens` is a zero
    /// row of `out` (see [`kernels::gather_layer_norm`]).
    fn gather_rows(&self, x: &[f32], c: usize, index: &[u32], out: &mut [f32]) -> Result<()> {
        with_f32(&self.weight, |w| {
            with_f32(&self.bias, |b| {
                kernels::gather_layer_norm(x, c, index, w, b, self.eps, out);
                Ok(())
            })
        })
    }

    fn rows(&self, x: &[f32], c: usize, out: &mut [f32]) -> Result<()> {
        with_f32(&self.weight, |w| {
            with_f32(&self.bias, |b| {
                kernels::layer_norm(x, c, w, b, self.eps, out);
                Ok(())
            })
        })
    }
}

/// `y = x W^T + b`. For inference only `W^T` is kept (contiguous, made once at load, the one
/// copy of the weight in memory); trainable weights (variables) are kept as they are and
/// transposed at each call so that updates to them are seen.
pub struct Linear {
    /// `W^T` `[input, output]` when `transposed`, else the trainable `W` `[output, input]`.
    weight: Tensor,
    transposed: bool,
    bias: Option<Tensor>,
}

impl Linear {
    pub fn from_weight(weight: &Tensor, bias: Option<Tensor>) -> Result<Self> {
        let transposed = !weight.track_op();
        let weight = if transposed {
            weight.t()?.contiguous()?
        } else {
            weight.clone()
        };
        Ok(Linear {
            weight,
            transposed,
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
        let y = if self.transposed {
            x.matmul(&self.weight)?
        } else {
            x.matmul(&self.weight.t()?)?
        };
        Ok(match &self.bias {
            Some(b) => y.broadcast_add(b)?,
            None => y,
        })
    }

    /// Whether the fast kernels may run this layer (inference weights).
    fn frozen(&self) -> bool {
        self.transposed && !self.bias.as_ref().is_some_and(|b| b.track_op())
    }

    /// `out = x W^T + b` (or `out += x W^T + b` when `accumulate`) on rows of `input` values,
    /// with the kernels.
    fn forward_rows(&self, x: &[f32], out: &mut [f32], accumulate: bool) -> Result<()> {
        let input = self.weight.dim(0)?;
        with_f32(&self.weight, |wt| match &self.bias {
            Some(b) => with_f32(b, |b| {
                kernels::linear(x, input, wt, Some(b), out, accumulate);
                Ok(())
            }),
            None => {
                kernels::linear(x, input, wt, None, out, accumulate);
                Ok(())
            }
        })
    }

    fn output_dim(&self) -> Result<usize> {
        Ok(if self.transposed {
            self.weight.dim(1)?
        } else {
            self.weight.dim(0)?
        })
    }
}

/// Call `f` with the values of an f32 tensor as one slice (no copy when it is contiguous).
fn with_f32<R>(t: &Tensor, f: impl FnOnce(&[f32]) -> Result<R>) -> Result<R> {
    let t = t.contiguous()?;
    let (storage, layout) = t.storage_and_layout();
    let (a, b) = layout
        .contiguous_offsets()
        .ok_or_else(|| Error::Internal("a contiguous tensor without offsets".into()))?;
    match &*storage {
        candle_core::Storage::Cpu(cpu) => f(&cpu.as_slice::<f32>()?[a..b]),
        _ => Err(Error::Internal("the engine runs on the CPU only".into())),
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
        let idx = Tensor::from_vec(relative_index(wh, ww, (th, tw)), n * n, &Device::Cpu)?;
        let heads = self.table.dim(1)?;
        Ok(self
            .table
            .index_select(&idx, 0)?
            .reshape((n, n, heads))?
            .permute((2, 0, 1))?
            .contiguous()?)
    }
}

/// For every pair (a, b) of positions in a `wh x ww` window (row-major), the row of a relative
/// position table made for a `th x tw` window: `(ya - yb + th - 1) * (2tw - 1) + (xa - xb + tw
/// - 1)`, the published relative position index.
fn relative_index(wh: usize, ww: usize, (th, tw): (usize, usize)) -> Vec<u32> {
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
    idx
}

/// Swin V2's continuous position bias: an MLP (`Linear(2, hidden)`, ReLU, `Linear(hidden,
/// heads)` without bias) over log-spaced relative coordinates, then `16 sigmoid`. It serves any
/// window; the coordinates are divided by (window - 1) of the trained window when the
/// checkpoint names one, else of the block's own window.
pub struct ContinuousBias {
    /// `[hidden, 2]`, `[hidden]` and `[heads, hidden]`, row-major.
    w1: Vec<f32>,
    b1: Vec<f32>,
    w2: Vec<f32>,
    hidden: usize,
    heads: usize,
    trained: Option<(usize, usize)>,
}

impl ContinuousBias {
    fn new(
        src: &dyn WeightSource,
        heads: usize,
        hidden: usize,
        trained: Option<(usize, usize)>,
        part: impl Fn(&str) -> Part,
    ) -> Result<Self> {
        let flat = |t: Tensor| -> Result<Vec<f32>> { Ok(t.flatten_all()?.to_vec1()?) };
        Ok(ContinuousBias {
            w1: flat(src.get(part("0.weight"), &[hidden, 2])?)?,
            b1: flat(src.get(part("0.bias"), &[hidden])?)?,
            w2: flat(src.get(part("2.weight"), &[heads, hidden])?)?,
            hidden,
            heads,
            trained,
        })
    }

    /// The window the coordinates are normalised by, for a block running `window`.
    pub fn normalised_by(&self, window: (usize, usize)) -> (usize, usize) {
        self.trained.unwrap_or(window)
    }

    /// `16 sigmoid(mlp(coords))` for every relative offset of a `wh x ww` window:
    /// `[(2wh-1)(2ww-1), heads]`, rows ordered like a bias table. The coordinate formula is the
    /// reference libraries': `t = 8 d / max(M - 1, 1)`, `sign(t) log2(|t| + 1) / log2(8)`.
    fn table(&self, wh: usize, ww: usize) -> Vec<f32> {
        let (mh, mw) = self.normalised_by((wh, ww));
        let coord = |d: isize, m: usize| -> f32 {
            let t = d as f32 / m.saturating_sub(1).max(1) as f32 * 8.0;
            t.signum() * (t.abs() + 1.0).log2() / 3.0
        };
        let (rh, rw) = (2 * wh - 1, 2 * ww - 1);
        let mut out = Vec::with_capacity(rh * rw * self.heads);
        let mut hidden = vec![0f32; self.hidden];
        for dy in 0..rh {
            let y = coord(dy as isize - (wh as isize - 1), mh);
            for dx in 0..rw {
                let x = coord(dx as isize - (ww as isize - 1), mw);
                for (j, h) in hidden.iter_mut().enumerate() {
                    let v = self.w1[2 * j] * y + self.w1[2 * j + 1] * x + self.b1[j];
                    *h = v.max(0.0);
                }
                for head in 0..self.heads {
                    let row = &self.w2[head * self.hidden..(head + 1) * self.hidden];
                    let z: f64 = row
                        .iter()
                        .zip(&hidden)
                        .map(|(&w, &h)| w as f64 * h as f64)
                        .sum();
                    out.push(16.0 / (1.0 + (-(z as f32)).exp()));
                }
            }
        }
        out
    }
}

/// Where a block's relative position bias comes from.
pub enum PositionBias {
    /// A learnt table (the first version).
    Table(BiasTable),
    /// Made by an MLP for any window (V2).
    Continuous(ContinuousBias),
}

impl PositionBias {
    /// Whether the bias can serve a runtime window (a table only serves windows it covers).
    pub fn check(&self, window: (usize, usize)) -> Result<()> {
        match self {
            PositionBias::Table(t) => t.window_for(window).map(|_| ()),
            PositionBias::Continuous(_) => Ok(()),
        }
    }

    /// The window a table was made for; `None` for the continuous bias.
    pub fn made_for(&self) -> Option<(usize, usize)> {
        match self {
            PositionBias::Table(t) => Some(t.made_for()),
            PositionBias::Continuous(_) => None,
        }
    }

    /// Bias `[heads, N, N]` for a runtime window `wh x ww`.
    pub fn bias(&self, wh: usize, ww: usize) -> Result<Tensor> {
        match self {
            PositionBias::Table(t) => t.bias(wh, ww),
            PositionBias::Continuous(c) => {
                let rows = (2 * wh - 1) * (2 * ww - 1);
                let table = Tensor::from_vec(c.table(wh, ww), (rows, c.heads), &Device::Cpu)?;
                BiasTable::new(table, (wh, ww), "the continuous position bias")?.bias(wh, ww)
            }
        }
    }
}

pub struct WindowAttention {
    heads: usize,
    qkv: Linear,
    /// The q rows of `qkv` carry the `head_dim^-1/2` scale (folded in at load for inference;
    /// always true for cosine attention, which has no such scale).
    q_scaled: bool,
    proj: Linear,
    pub bias: PositionBias,
    /// Cosine attention (V2): per head, `exp(min(logit_scale, ln 100))`, which multiplies the
    /// cosine of the angle between q and k.
    cosine: Option<Vec<f32>>,
    /// The shift mask's value across regions.
    mask_fill: f32,
    /// The last geometry this block ran with, and what the kernels need for it.
    plan: Mutex<Option<Arc<Plan>>>,
}

/// Everything a block's attention needs for one geometry, made once and reused while the
/// geometry stays: the gather into windows and its inverse, the shift mask `[windows, N, N]`
/// and the bias `[heads, N, N]` gathered from the table.
struct Plan {
    geometry: BlockGeometry,
    gather: Vec<u32>,
    scatter: Vec<u32>,
    mask: Option<Vec<f32>>,
    bias: Vec<f32>,
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
    /// The qkv projection and its q scale: folded into the q rows of the weight and bias for
    /// inference, kept apart for trainable weights. Cosine attention (V2) has no q scale; its
    /// bias is the q bias, zeros for k and the v bias.
    fn qkv_projection(
        src: &dyn WeightSource,
        dim: usize,
        heads: usize,
        cosine: bool,
        part: impl Fn(&str) -> Part,
    ) -> Result<(Linear, bool)> {
        let w = src.get(part("qkv.weight"), &[3 * dim, dim])?;
        if cosine {
            let q = src.get(part("q_bias"), &[dim])?;
            let v = src.get(part("v_bias"), &[dim])?;
            let b = Tensor::cat(&[&q, &q.zeros_like()?, &v], 0)?;
            let frozen = !(w.track_op() || b.track_op());
            return Ok((Linear::from_weight(&w, Some(b))?, frozen));
        }
        let b = src.get(part("qkv.bias"), &[3 * dim])?;
        if w.track_op() || b.track_op() {
            return Ok((Linear::from_weight(&w, Some(b))?, false));
        }
        let scale = ((dim / heads) as f64).powf(-0.5);
        let fold = |t: &Tensor| -> Result<Tensor> {
            Ok(Tensor::cat(
                &[(t.narrow(0, 0, dim)? * scale)?, t.narrow(0, dim, 2 * dim)?],
                0,
            )?)
        };
        Ok((Linear::from_weight(&fold(&w)?, Some(fold(&b)?))?, true))
    }

    fn frozen(&self) -> bool {
        self.q_scaled && self.qkv.frozen() && self.proj.frozen()
    }

    /// The plan for `geo`, from the cache when the geometry is the one of the last run.
    fn plan(&self, geo: &BlockGeometry) -> Result<Arc<Plan>> {
        let mut cached = self.plan.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(p) = cached.as_ref().filter(|p| p.geometry == *geo) {
            return Ok(p.clone());
        }
        let (wh, ww) = geo.window();
        let plan = Arc::new(Plan {
            geometry: *geo,
            gather: geo.gather_index(),
            scatter: geo.scatter_index(),
            mask: geo.shift_mask_with(self.mask_fill),
            bias: self.bias.bias(wh, ww)?.flatten_all()?.to_vec1()?,
        });
        *cached = Some(plan.clone());
        Ok(plan)
    }

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
        let k = qkv.get(1)?;
        let v = qkv.get(2)?;
        let mut attn = match &self.cosine {
            Some(scales) => {
                let unit = |t: Tensor| -> Result<Tensor> {
                    let norm = t
                        .sqr()?
                        .sum_keepdim(D::Minus1)?
                        .sqrt()?
                        .clamp(1e-12, f32::MAX)?;
                    Ok(t.broadcast_div(&norm)?)
                };
                let scales = Tensor::from_vec(scales.clone(), (1, heads, 1, 1), &Device::Cpu)?;
                unit(qkv.get(0)?)?
                    .matmul(&unit(k)?.t()?)?
                    .broadcast_mul(&scales)?
            }
            None if self.q_scaled => qkv.get(0)?.matmul(&k.t()?)?,
            None => (qkv.get(0)? * (head_dim as f64).powf(-0.5))?.matmul(&k.t()?)?,
        }; // [windows, heads, N, N]
        attn = attn.broadcast_add(&self.bias.bias(wh, ww)?.unsqueeze(0)?)?;
        if let Some(mask) = geo.shift_mask_with(self.mask_fill) {
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
    /// V2's residual post-norm: `x + norm1(attn(x))`, `x + norm2(mlp(x))` instead of
    /// `x + attn(norm1(x))`, `x + mlp(norm2(x))`.
    post_norm: bool,
}

/// The V2 weights of one block's attention: the logit scales, clamped at ln 100 and
/// exponentiated, and the bias MLP.
fn v2_attention(
    src: &dyn WeightSource,
    heads: usize,
    v2: &V2Shape,
    stage: usize,
    part: impl Fn(&str) -> Part,
) -> Result<(Vec<f32>, ContinuousBias)> {
    let max = 100f64.ln() as f32;
    let scales: Vec<f32> = src
        .get(part("logit_scale"), &[heads, 1, 1])?
        .flatten_all()?
        .to_vec1::<f32>()?
        .into_iter()
        .map(|s| s.min(max).exp())
        .collect();
    let cpb = ContinuousBias::new(src, heads, v2.cpb_hidden, v2.trained_window(stage), |s| {
        part(&format!("cpb_mlp.{s}"))
    })?;
    Ok((scales, cpb))
}

impl Block {
    /// Block `j` of stage `i`; `nominal` is the model's window; `v2` for the second version.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        src: &dyn WeightSource,
        stage: usize,
        j: usize,
        dim: usize,
        heads: usize,
        hidden: usize,
        nominal: (usize, usize),
        v2: Option<&V2Shape>,
    ) -> Result<Self> {
        let sub =
            |prefix: &'static str| move |s: &str| Part::block(stage, j, &format!("{prefix}.{s}"));
        let (bias, cosine, mask_fill, eps) = match v2 {
            Some(v2) => {
                let (scales, cpb) = v2_attention(src, heads, v2, stage, sub("attn"))?;
                let bias = PositionBias::Continuous(cpb);
                (bias, Some(scales), v2.mask_fill, v2.norm_eps)
            }
            None => {
                let table = src.bias_table(
                    Part::block(stage, j, "attn.relative_position_bias_table"),
                    heads,
                )?;
                let what = format!("the bias table of stage {stage} block {j}");
                let bias = PositionBias::Table(BiasTable::new(table, nominal, &what)?);
                (bias, None, -100.0, LN_EPS)
            }
        };
        let (qkv, q_scaled) =
            WindowAttention::qkv_projection(src, dim, heads, cosine.is_some(), sub("attn"))?;
        Ok(Block {
            norm1: LayerNorm::with_eps(src, dim, sub("norm1"), eps)?,
            attn: WindowAttention {
                heads,
                qkv,
                q_scaled,
                proj: Linear::new(src, dim, dim, true, sub("attn.proj"))?,
                bias,
                cosine,
                mask_fill,
                plan: Mutex::new(None),
            },
            norm2: LayerNorm::with_eps(src, dim, sub("norm2"), eps)?,
            mlp: Mlp {
                fc1: Linear::new(src, dim, hidden, true, sub("mlp.fc1"))?,
                fc2: Linear::new(src, hidden, dim, true, sub("mlp.fc2"))?,
            },
            post_norm: v2.is_some(),
        })
    }

    pub fn forward(
        &self,
        x: &Tensor,
        geo: &BlockGeometry,
        keep: bool,
    ) -> Result<(Tensor, Option<Tensor>)> {
        if self.frozen() && !x.track_op() {
            return self.forward_frozen(x, geo, keep);
        }
        if self.post_norm {
            let (a, attn) = self.attn.forward(x, geo, keep)?;
            let x = (x + self.norm1.forward(&a)?)?;
            let x = (&x + self.norm2.forward(&self.mlp.forward(&x)?)?)?;
            return Ok((x, attn));
        }
        let (a, attn) = self.attn.forward(&self.norm1.forward(x)?, geo, keep)?;
        let x = (x + a)?;
        let x = (&x + self.mlp.forward(&self.norm2.forward(&x)?)?)?;
        Ok((x, attn))
    }
}

impl Block {
    fn frozen(&self) -> bool {
        self.norm1.frozen()
            && self.attn.frozen()
            && self.norm2.frozen()
            && self.mlp.fc1.frozen()
            && self.mlp.fc2.frozen()
    }

    /// The inference block on the kernels: norm and gather into windows in one pass, qkv,
    /// attention per window and head, the projection, back to the grid onto the residual in
    /// one pass; then norm, fc1 with GELU in place, fc2 accumulated onto the residual.
    fn forward_frozen(
        &self,
        x: &Tensor,
        geo: &BlockGeometry,
        keep: bool,
    ) -> Result<(Tensor, Option<Tensor>)> {
        let (tokens, c) = x.dims2()?;
        let plan = self.attn.plan(geo)?;
        let heads = self.attn.heads;
        let shape = AttentionShape {
            windows: geo.n_windows(),
            n: geo.window_area(),
            heads,
            head_dim: c / heads,
        };
        let rows = shape.windows * shape.n;
        let (mut y, probs) = with_f32(x, |xs| {
            let mut win = vec![0f32; rows * c];
            if self.post_norm {
                kernels::gather_rows(xs, c, &plan.gather, &mut win);
            } else {
                self.norm1.gather_rows(xs, c, &plan.gather, &mut win)?;
            }
            let mut qkv = vec![0f32; rows * 3 * c];
            self.attn.qkv.forward_rows(&win, &mut qkv, false)?;
            if let Some(scales) = &self.attn.cosine {
                kernels::cosine_qk(&mut qkv, shape, scales);
            }
            let mut probs = keep.then(|| vec![0f32; shape.windows * heads * shape.n * shape.n]);
            kernels::window_attention(
                &qkv,
                shape,
                &plan.bias,
                plan.mask.as_deref(),
                &mut win,
                probs.as_deref_mut(),
            );
            drop(qkv);
            let mut proj = vec![0f32; rows * c];
            self.attn.proj.forward_rows(&win, &mut proj, false)?;
            drop(win);
            let mut y = xs.to_vec();
            if self.post_norm {
                // norm1 of the attention output, gathered back to the grid in one pass.
                let mut back = vec![0f32; tokens * c];
                self.norm1.gather_rows(&proj, c, &plan.scatter, &mut back)?;
                kernels::add_assign(&mut y, &back);
            } else {
                kernels::scatter_add(&mut y, c, &proj, &plan.scatter);
            }
            Ok((y, probs))
        })?;
        let mut hidden = vec![0f32; tokens * self.mlp.fc1.output_dim()?];
        if self.post_norm {
            self.mlp.fc1.forward_rows(&y, &mut hidden, false)?;
            kernels::gelu_in_place(&mut hidden);
            let mut out = vec![0f32; tokens * c];
            self.mlp.fc2.forward_rows(&hidden, &mut out, false)?;
            drop(hidden);
            let mut normed = vec![0f32; tokens * c];
            self.norm2.rows(&out, c, &mut normed)?;
            kernels::add_assign(&mut y, &normed);
        } else {
            let mut normed = vec![0f32; tokens * c];
            self.norm2.rows(&y, c, &mut normed)?;
            self.mlp.fc1.forward_rows(&normed, &mut hidden, false)?;
            drop(normed);
            kernels::gelu_in_place(&mut hidden);
            self.mlp.fc2.forward_rows(&hidden, &mut y, true)?;
        }
        let probs = probs
            .map(|p| Tensor::from_vec(p, (shape.windows, heads, shape.n, shape.n), &Device::Cpu))
            .transpose()?;
        Ok((Tensor::from_vec(y, (tokens, c), &Device::Cpu)?, probs))
    }
}

/// Patch merging at the start of stage `i`: 2x2 neighbours concatenated, LayerNorm(4C), Linear
/// 4C -> 2C without bias; V2 reduces first and then normalises (LayerNorm(2C)).
pub struct PatchMerging {
    norm: LayerNorm,
    reduction: Linear,
    norm_after: bool,
}

impl PatchMerging {
    pub fn new(src: &dyn WeightSource, stage: usize, dim_in: usize, v2: bool) -> Result<Self> {
        let width = if v2 { 2 * dim_in } else { 4 * dim_in };
        let norm = LayerNorm::new(src, width, |s| Part::merge(stage, &format!("norm.{s}")))?;
        let reduction = Linear::new(src, 4 * dim_in, 2 * dim_in, false, |s| {
            Part::merge(stage, &format!("reduction.{s}"))
        })?;
        Ok(PatchMerging {
            norm,
            reduction,
            norm_after: v2,
        })
    }

    pub fn forward(&self, x: &Tensor, grid: (usize, usize)) -> Result<(Tensor, (usize, usize))> {
        let (_, c) = x.dims2()?;
        let (idx, out) = crate::engine::geometry::merge_index(grid);
        let frozen = self.norm.frozen() && self.reduction.frozen() && !x.track_op();
        if self.norm_after {
            let rows = out.0 * out.1;
            let dim = self.reduction.output_dim()?;
            if frozen {
                let mut merged = vec![0f32; rows * 4 * c];
                with_f32(x, |xs| {
                    kernels::gather_rows(xs, c, &idx, &mut merged);
                    Ok(())
                })?;
                let mut y = vec![0f32; rows * dim];
                self.reduction.forward_rows(&merged, &mut y, false)?;
                drop(merged);
                let mut normed = vec![0f32; rows * dim];
                self.norm.rows(&y, dim, &mut normed)?;
                return Ok((Tensor::from_vec(normed, (rows, dim), &Device::Cpu)?, out));
            }
            let merged = gather_rows(x, idx)?.reshape((rows, 4 * c))?;
            return Ok((self.norm.forward(&self.reduction.forward(&merged)?)?, out));
        }
        if frozen {
            // Gather the 2x2 neighbours and normalise in one pass, then the reduction.
            let rows = out.0 * out.1;
            let mut merged = vec![0f32; rows * 4 * c];
            with_f32(x, |xs| {
                with_f32(&self.norm.weight, |w| {
                    with_f32(&self.norm.bias, |b| {
                        kernels::concat_layer_norm(
                            xs,
                            c,
                            &idx,
                            4,
                            w,
                            b,
                            self.norm.eps,
                            &mut merged,
                        );
                        Ok(())
                    })
                })
            })?;
            let dim = self.reduction.output_dim()?;
            let mut y = vec![0f32; rows * dim];
            self.reduction.forward_rows(&merged, &mut y, false)?;
            return Ok((Tensor::from_vec(y, (rows, dim), &Device::Cpu)?, out));
        }
        let merged = gather_rows(x, idx)?.reshape((out.0 * out.1, 4 * c))?;
        let y = self.reduction.forward(&self.norm.forward(&merged)?)?;
        Ok((y, out))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{AxisPlan, PadOrder};
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};
    use std::cell::RefCell;

    /// Any tensor by its shape: norms near 1 / 0, everything else N(0, 1/fan_in) (a logit scale
    /// above the clamp in head 0).
    struct Source(RefCell<rand::rngs::StdRng>);

    impl WeightSource for Source {
        fn get(&self, part: Part, shape: &[usize]) -> Result<Tensor> {
            let n: usize = shape.iter().product();
            let name = part.canonical();
            let fan_in = if shape.len() > 1 {
                shape[1..].iter().product()
            } else {
                1
            };
            let std = if name.contains("norm") {
                0.1
            } else {
                (1.0 / fan_in as f64).sqrt()
            };
            let d = Normal::new(0.0, std).unwrap();
            let mut rng = self.0.borrow_mut();
            let mut v: Vec<f32> = (0..n).map(|_| d.sample(&mut *rng) as f32).collect();
            if name.ends_with("norm1.weight") || name.ends_with("norm2.weight") {
                v.iter_mut().for_each(|x| *x += 1.0);
            }
            if name.ends_with("logit_scale") {
                v.iter_mut().for_each(|x| *x += 2.3);
                v[0] = 5.0;
            }
            Ok(Tensor::from_vec(v, shape, &Device::Cpu)?)
        }
        fn bias_table(&self, _: Part, _: usize) -> Result<Tensor> {
            unreachable!("V2 blocks have no table")
        }
    }

    fn v2_shape() -> V2Shape {
        V2Shape {
            cpb_hidden: 16,
            trained_windows: vec![Some((6, 6))],
            built_for: None,
            mask_fill: -200.0,
            norm_eps: 1e-5,
        }
    }

    /// The logit scale is clamped at ln 100 before exp (timm 1.0.31 and transformers 5.23.0:
    /// `torch.clamp(logit_scale, max=math.log(1 / 0.01)).exp()`).
    #[test]
    fn logit_scale_is_clamped_at_ln_100() {
        let src = Source(RefCell::new(rand::rngs::StdRng::seed_from_u64(5)));
        let (scales, _) = v2_attention(&src, 3, &v2_shape(), 0, |s| {
            Part::block(0, 0, &format!("attn.{s}"))
        })
        .unwrap();
        assert!((scales[0] - 100.0).abs() < 1e-4, "{scales:?}");
        assert!(scales[1] < 100.0 && scales[1] > 1.0);
    }

    /// The bias MLP runs once per block and geometry: a second image of the same size reuses
    /// the plan (and the bias in it); another size makes a new one.
    #[test]
    fn v2_bias_is_made_once_per_geometry() {
        let src = Source(RefCell::new(rand::rngs::StdRng::seed_from_u64(3)));
        let block = Block::new(&src, 0, 0, 8, 2, 16, (4, 4), Some(&v2_shape())).unwrap();
        let geo = |n| BlockGeometry {
            rows: AxisPlan::new(n, 4, 0, PadOrder::ShiftThenPad),
            cols: AxisPlan::new(6, 4, 0, PadOrder::ShiftThenPad),
        };
        let first = block.attn.plan(&geo(5)).unwrap();
        assert!(Arc::ptr_eq(&first, &block.attn.plan(&geo(5)).unwrap()));
        let other = block.attn.plan(&geo(9)).unwrap();
        assert!(!Arc::ptr_eq(&first, &other));
        assert_eq!(first.bias, other.bias); // same 4x4 window, same bias
    }

    /// A V2 block on the kernels equals the same block on the composed tensor operations
    /// (tracked input), on a shifted, padded window layout; so does V2 patch merging.
    #[test]
    fn v2_block_and_merging_kernels_match_the_composed_path() {
        let src = Source(RefCell::new(rand::rngs::StdRng::seed_from_u64(9)));
        let (dim, heads) = (12, 3);
        let block = Block::new(&src, 0, 1, dim, heads, 24, (4, 4), Some(&v2_shape())).unwrap();
        let geo = BlockGeometry {
            rows: AxisPlan::new(7, 4, 2, PadOrder::PadThenShift),
            cols: AxisPlan::new(6, 4, 2, PadOrder::PadThenShift),
        };
        let x = Tensor::randn(0f32, 2.0, (42, dim), &Device::Cpu).unwrap();
        let (fast, probs) = block.forward(&x, &geo, true).unwrap();
        let tracked = candle_core::Var::from_tensor(&x).unwrap();
        let (slow, probs_slow) = block.forward(tracked.as_tensor(), &geo, true).unwrap();
        let diff = |a: &Tensor, b: &Tensor| -> f32 {
            let d: f32 = (a - b)
                .unwrap()
                .abs()
                .unwrap()
                .max_all()
                .unwrap()
                .to_scalar()
                .unwrap();
            let m: f32 = b.abs().unwrap().max_all().unwrap().to_scalar().unwrap();
            d / m
        };
        assert!(
            diff(&fast, &slow.detach()) < 2e-6,
            "{}",
            diff(&fast, &slow.detach())
        );
        // Head 0 runs at the clamped scale of 100, where a rounding of the cosine moves a
        // logit by about 1e-5: the weights agree to that, not to the last bit.
        let p = diff(&probs.unwrap(), &probs_slow.unwrap().detach());
        assert!(p < 1e-4, "{p}");

        let merge = PatchMerging::new(&src, 1, dim, true).unwrap();
        let (fast, grid) = merge.forward(&x, (7, 6)).unwrap();
        let (slow, _) = merge.forward(tracked.as_tensor(), (7, 6)).unwrap();
        assert_eq!(grid, (4, 3));
        assert!(diff(&fast, &slow.detach()) < 2e-6);
    }
}
