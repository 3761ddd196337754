//! CPU kernels of the inference forward pass, on plain `f32` rows.
//!
//! The generic tensor operations pay a thread barrier and a fresh tensor per operation; these
//! kernels touch each row once where several operations meet: LayerNorm with the gather into
//! windows, the projection bias with the matrix product, the exact GELU in place on the first
//! MLP product, bias + shift mask + softmax per window and head between the two attention
//! products, and the way back from windows with the residual add. They run on rayon's pool (the
//! same pool the matrix products use), and their inner loops are compiled for the widest vector
//! instructions the CPU has (`pulp` picks them at run time).
//!
//! The layers use them only for inference; trainable (tracked) tensors keep the composed tensor
//! operations, which are also the reference the tests below compare against.

use rayon::prelude::*;

/// The environment variable that sets the number of threads when `--threads` is not given.
pub const THREADS_ENV: &str = "MULLION_THREADS";

/// Largest thread count accepted.
pub const MAX_THREADS: usize = 1024;

/// A thread count `1..=MAX_THREADS` as the command line or the environment spells it.
pub fn parse_threads(s: &str) -> std::result::Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(n) if (1..=MAX_THREADS).contains(&n) => Ok(n),
        _ => Err(format!(
            "'{s}': the number of threads is a whole number from 1 to {MAX_THREADS}"
        )),
    }
}

/// The threads a run uses: `requested`, else [`THREADS_ENV`], else the cores this process may
/// run on.
pub fn resolve_threads(requested: Option<usize>) -> Result<usize, crate::error::Error> {
    if let Some(n) = requested {
        return Ok(n);
    }
    match std::env::var(THREADS_ENV) {
        Ok(v) => parse_threads(&v)
            .map_err(|e| crate::error::Error::BadArgument(format!("{THREADS_ENV}={e}"))),
        Err(_) => Ok(std::thread::available_parallelism().map_or(1, |n| n.get())),
    }
}

/// Size the one thread pool of the process (rayon's global pool: the kernels, the matrix
/// products and the tensor library's own operations all run on it) and return its size. Call
/// once, before any computation starts: the pool cannot be resized once built, and the tensor
/// library reads `RAYON_NUM_THREADS` for the width of its matrix products.
pub fn use_threads(requested: Option<usize>) -> Result<usize, crate::error::Error> {
    let n = resolve_threads(requested)?;
    std::env::set_var("RAYON_NUM_THREADS", n.to_string());
    // An error means the pool already exists (a second call in one process); it keeps its size.
    let _ = rayon::ThreadPoolBuilder::new()
        .num_threads(n)
        .build_global();
    Ok(rayon::current_num_threads())
}

/// Rows handed to one rayon task by the row-wise kernels (small rows are cheap; fewer tasks
/// keep the scheduling cost low).
const ROWS_PER_TASK: usize = 64;

/// Run `f` compiled for the best instruction set of this CPU (AVX-512, AVX2+FMA, or the
/// baseline), so that its loops auto-vectorise to the widest registers.
#[inline(always)]
fn simd<R>(f: impl FnOnce() -> R) -> R {
    pulp::Arch::new().dispatch(f)
}

/// Coefficients of the rational approximation `erf(x) ~ x P(x^2) / Q(x^2)` on [-4, 4] used for
/// single precision by the Eigen library's `generic_fast_erf_float` (and by XLA's f32 erf);
/// outside [-4, 4] the clamp gives +-0.99999994, one ulp from erf's +-1. Max error against the C library's f64 `erf`, measured by the
/// test below at 202 001 points: 7.4 ulp (about 4e-7 relative). The digits are kept as
/// published, although f32 rounds the last one away.
#[allow(clippy::excessive_precision)]
const ERF_P: [f32; 7] = [
    -2.726_142_3e-10,
    2.770_681_4e-8,
    -2.101_024e-6,
    -5.692_506_4e-5,
    -7.349_906_3e-4,
    -2.954_599_8e-3,
    -1.609_603_3e-2,
];
const ERF_Q: [f32; 5] = [
    -1.456_607_2e-5,
    -2.133_740_6e-4,
    -1.682_827e-3,
    -7.373_329_2e-3,
    -1.426_474e-2,
];

/// The error function in f32, branch-free so that a loop over it vectorises.
#[inline(always)]
pub fn erf(x: f32) -> f32 {
    let x = x.clamp(-4.0, 4.0);
    let x2 = x * x;
    let mut p = ERF_P[0];
    for c in &ERF_P[1..] {
        p = p * x2 + c;
    }
    let mut q = ERF_Q[0];
    for c in &ERF_Q[1..] {
        q = q * x2 + c;
    }
    x * p / q
}

/// `exp(x)` in f32, branch-free: Cody-Waite range reduction `x = n ln2 + r` and the degree-5
/// polynomial of the Cephes library's `expf` (S. Moshier), then `2^n` from the exponent bits.
/// Inputs below -87.3 return about 1e-38 instead of a subnormal (softmax terms that small add
/// nothing next to the row's largest term, which is 1).
#[inline(always)]
#[allow(clippy::excessive_precision)] // the polynomial's digits as published
pub fn exp(x: f32) -> f32 {
    let x = x.clamp(-87.3, 88.3);
    // floor() by truncation and a correction: `f32::floor` is a library call on the baseline
    // target, which stops the loop from vectorising.
    let t = x * std::f32::consts::LOG2_E + 0.5;
    let tr = t as i32 as f32;
    let n = if tr > t { tr - 1.0 } else { tr };
    let r = x - n * 0.693_359_4 + n * 2.121_944_4e-4;
    let z = r * r;
    let y = ((((1.987_569_1e-4 * r + 1.398_199_9e-3) * r + 8.333_452e-3) * r + 4.166_579_6e-2) * r
        + 1.666_666_5e-1)
        * r
        + 5.000_000_1e-1;
    let y = y * z + r + 1.0;
    y * f32::from_bits(((n as i32 + 127) as u32) << 23)
}

/// Exact (erf) GELU, `x/2 (1 + erf(x/sqrt 2))`, in place.
pub fn gelu_in_place(xs: &mut [f32]) {
    xs.par_chunks_mut(16 * 1024).for_each(|chunk| {
        simd(|| {
            for v in chunk.iter_mut() {
                let x = *v;
                *v = 0.5 * x * (1.0 + erf(x * std::f32::consts::FRAC_1_SQRT_2));
            }
        })
    });
}

/// LayerNorm of one row into `out` (mean, then the variance of the deviations, both over the
/// row while it sits in the first-level cache).
#[inline(always)]
fn norm_row(row: &[f32], weight: &[f32], bias: &[f32], eps: f32, out: &mut [f32]) {
    let c = row.len() as f32;
    let mean = sum_lanes(row.iter().copied()) / c;
    let var = sum_lanes(row.iter().map(|&v| (v - mean) * (v - mean))) / c;
    let inv = 1.0 / (var + eps).sqrt();
    for (((o, &v), &w), &b) in out.iter_mut().zip(row).zip(weight).zip(bias) {
        *o = (v - mean) * inv * w + b;
    }
}

/// A sum in 16 independent lanes, so that it vectorises (and rounds like a pairwise sum).
#[inline(always)]
fn sum_lanes(it: impl Iterator<Item = f32>) -> f32 {
    let mut acc = [0f32; 16];
    for (i, v) in it.enumerate() {
        acc[i % 16] += v;
    }
    acc.iter().sum()
}

/// Rows of `x` (`[tokens, c]`) picked by `index` and layer-normalised into `out`
/// (`[index.len(), c]`). An index equal to `tokens` is the zero padding token: its row of `out`
/// is zero (the model pads after the norm).
pub fn gather_layer_norm(
    x: &[f32],
    c: usize,
    index: &[u32],
    weight: &[f32],
    bias: &[f32],
    eps: f32,
    out: &mut [f32],
) {
    let tokens = x.len() / c;
    assert_eq!(out.len(), index.len() * c, "output rows");
    assert!(weight.len() == c && bias.len() == c, "norm parameters");
    out.par_chunks_mut(ROWS_PER_TASK * c)
        .zip(index.par_chunks(ROWS_PER_TASK))
        .for_each(|(o, idx)| {
            simd(|| {
                for (orow, &i) in o.chunks_exact_mut(c).zip(idx) {
                    let i = i as usize;
                    if i >= tokens {
                        orow.fill(0.0);
                    } else {
                        norm_row(&x[i * c..(i + 1) * c], weight, bias, eps, orow);
                    }
                }
            })
        });
}

/// Patch merging's gather and norm in one pass: output row `r` is the concatenation of the
/// `group` rows `index[r*group..(r+1)*group]` of `x` (`[tokens, c]`; index `tokens` is a zero
/// row, padding before the norm as the published model pads), layer-normalised over its
/// `group * c` values.
#[allow(clippy::too_many_arguments)]
pub fn concat_layer_norm(
    x: &[f32],
    c: usize,
    index: &[u32],
    group: usize,
    weight: &[f32],
    bias: &[f32],
    eps: f32,
    out: &mut [f32],
) {
    let tokens = x.len() / c;
    let width = group * c;
    assert_eq!(out.len(), index.len() * c, "output rows");
    assert!(
        weight.len() == width && bias.len() == width,
        "norm parameters"
    );
    out.par_chunks_mut(ROWS_PER_TASK * width)
        .zip(index.par_chunks(ROWS_PER_TASK * group))
        .for_each(|(o, idx)| {
            let mut row = vec![0f32; width];
            simd(|| {
                for (orow, idx) in o.chunks_exact_mut(width).zip(idx.chunks_exact(group)) {
                    for (part, &i) in row.chunks_exact_mut(c).zip(idx) {
                        let i = i as usize;
                        if i >= tokens {
                            part.fill(0.0);
                        } else {
                            part.copy_from_slice(&x[i * c..(i + 1) * c]);
                        }
                    }
                    norm_row(&row, weight, bias, eps, orow);
                }
            })
        });
}

/// Rows of `x` (`[tokens, c]`) picked by `index` into `out` (`[index.len(), c]`); an index
/// equal to `tokens` is the zero padding token (V2 blocks attend on the raw rows, and V2 patch
/// merging normalises after its reduction).
pub fn gather_rows(x: &[f32], c: usize, index: &[u32], out: &mut [f32]) {
    let tokens = x.len() / c;
    assert_eq!(out.len(), index.len() * c, "output rows");
    out.par_chunks_mut(ROWS_PER_TASK * c)
        .zip(index.par_chunks(ROWS_PER_TASK))
        .for_each(|(o, idx)| {
            for (orow, &i) in o.chunks_exact_mut(c).zip(idx) {
                let i = i as usize;
                if i >= tokens {
                    orow.fill(0.0);
                } else {
                    orow.copy_from_slice(&x[i * c..(i + 1) * c]);
                }
            }
        });
}

/// `x += y`, element by element.
pub fn add_assign(x: &mut [f32], y: &[f32]) {
    assert_eq!(x.len(), y.len(), "rows");
    x.par_chunks_mut(16 * 1024)
        .zip(y.par_chunks(16 * 1024))
        .for_each(|(a, b)| {
            simd(|| {
                for (a, &b) in a.iter_mut().zip(b) {
                    *a += b;
                }
            })
        });
}

/// Scaled cosine attention on the qkv rows (`[windows * n, 3C]`): every head's q and k are
/// divided by their L2 norm (at least 1e-12, as the reference libraries' `normalize`) and the
/// q rows multiplied by the head's scale, so that [`window_attention`]'s `q k^T` is
/// `scale * cos(q, k)`.
pub fn cosine_qk(qkv: &mut [f32], s: AttentionShape, scales: &[f32]) {
    let c = s.heads * s.head_dim;
    assert_eq!(qkv.len(), s.windows * s.n * 3 * c, "qkv rows");
    assert_eq!(scales.len(), s.heads, "scales");
    let d = s.head_dim;
    qkv.par_chunks_mut(ROWS_PER_TASK * 3 * c).for_each(|rows| {
        simd(|| {
            for row in rows.chunks_exact_mut(3 * c) {
                for (h, &scale) in scales.iter().enumerate() {
                    for (part, factor) in [(0, scale), (1, 1.0)] {
                        let v = &mut row[part * c + h * d..part * c + (h + 1) * d];
                        let norm = sum_lanes(v.iter().map(|&a| a * a)).sqrt().max(1e-12);
                        for a in v.iter_mut() {
                            *a = *a / norm * factor;
                        }
                    }
                }
            }
        })
    });
}

/// LayerNorm of every row of `x` (`[rows, c]`) into `out`.
pub fn layer_norm(x: &[f32], c: usize, weight: &[f32], bias: &[f32], eps: f32, out: &mut [f32]) {
    assert_eq!(x.len(), out.len(), "output rows");
    assert!(weight.len() == c && bias.len() == c, "norm parameters");
    out.par_chunks_mut(ROWS_PER_TASK * c)
        .zip(x.par_chunks(ROWS_PER_TASK * c))
        .for_each(|(o, xs)| {
            simd(|| {
                for (orow, row) in o.chunks_exact_mut(c).zip(xs.chunks_exact(c)) {
                    norm_row(row, weight, bias, eps, orow);
                }
            })
        });
}

/// `x[t] += y[index[t]]` for every row `t` of `x` (`[tokens, c]`): the attention output goes back
/// from window order to the grid and onto the residual in one pass.
pub fn scatter_add(x: &mut [f32], c: usize, y: &[f32], index: &[u32]) {
    assert_eq!(x.len(), index.len() * c, "residual rows");
    let rows = y.len() / c;
    x.par_chunks_mut(ROWS_PER_TASK * c)
        .zip(index.par_chunks(ROWS_PER_TASK))
        .for_each(|(xs, idx)| {
            simd(|| {
                for (xrow, &i) in xs.chunks_exact_mut(c).zip(idx) {
                    let i = i as usize;
                    assert!(i < rows, "scatter index {i} out of {rows} rows");
                    for (a, &b) in xrow.iter_mut().zip(&y[i * c..(i + 1) * c]) {
                        *a += b;
                    }
                }
            })
        });
}

/// A strided matrix view over a slice: element (i, j) is `data[offset + i*rs + j*cs]`.
#[derive(Clone, Copy)]
pub struct View<'a> {
    pub data: &'a [f32],
    pub offset: usize,
    pub rs: usize,
    pub cs: usize,
}

impl View<'_> {
    /// Panics unless every element of an `m x n` view lies inside the slice.
    fn check(&self, m: usize, n: usize, what: &str) {
        if m == 0 || n == 0 {
            return;
        }
        let last = self.offset + (m - 1) * self.rs + (n - 1) * self.cs;
        assert!(
            last < self.data.len(),
            "{what}: a {m}x{n} view reaches element {last} of {}",
            self.data.len()
        );
    }
}

/// `dst = (accumulate ? dst : 0) + lhs rhs` with `lhs` `m x k`, `rhs` `k x n`, `dst` `m x n` at
/// row stride `dst_rs` (column stride 1) from `dst_offset`; the `gemm` crate's kernels on
/// strided views, so transposed operands are never copied. `threads > 1` splits the product
/// over rayon's pool; 1 runs it on the calling thread (inside a parallel loop).
#[allow(clippy::too_many_arguments)]
pub fn matmul(
    m: usize,
    n: usize,
    k: usize,
    dst: &mut [f32],
    dst_offset: usize,
    dst_rs: usize,
    accumulate: bool,
    lhs: View,
    rhs: View,
    threads: usize,
) {
    if m == 0 || n == 0 {
        return;
    }
    lhs.check(m, k, "left operand");
    rhs.check(k, n, "right operand");
    let last = dst_offset + (m - 1) * dst_rs + (n - 1);
    assert!(
        last < dst.len(),
        "destination: a {m}x{n} view reaches element {last} of {}",
        dst.len()
    );
    assert!(dst_rs >= n, "destination rows overlap");
    let parallelism = if threads > 1 {
        gemm::Parallelism::Rayon(threads)
    } else {
        gemm::Parallelism::None
    };
    // SAFETY: the three views were checked above to lie inside their slices for every
    // (i, j) the product touches (offset + (rows-1)*rs + (cols-1)*cs < len, all strides
    // non-negative), the destination rows do not overlap (dst_rs >= n, column stride 1), and
    // `dst` is borrowed mutably, so it aliases neither operand. With `accumulate` false gemm
    // does not read `dst` (alpha is ignored), so its prior contents need no initialisation
    // guarantee beyond being f32, which a slice gives.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            dst.as_mut_ptr().add(dst_offset),
            1,
            dst_rs as isize,
            accumulate,
            lhs.data.as_ptr().add(lhs.offset),
            lhs.cs as isize,
            lhs.rs as isize,
            rhs.data.as_ptr().add(rhs.offset),
            rhs.cs as isize,
            rhs.rs as isize,
            1.0,
            1.0,
            false,
            false,
            false,
            parallelism,
        );
    }
}

/// `out = x W^T + b` (`out += x W^T + b` when `accumulate`, e.g. onto the residual) for `x`
/// `[rows, input]` and `wt = W^T` `[input, output]` (contiguous): the bias goes into `out` first
/// and the product is accumulated onto it, on the whole pool.
pub fn linear(
    x: &[f32],
    input: usize,
    wt: &[f32],
    bias: Option<&[f32]>,
    out: &mut [f32],
    accumulate: bool,
) {
    let output = wt.len() / input;
    let rows = x.len() / input;
    assert_eq!(out.len(), rows * output, "output rows");
    if let Some(b) = bias {
        out.par_chunks_mut(ROWS_PER_TASK * output).for_each(|o| {
            simd(|| {
                for row in o.chunks_exact_mut(output) {
                    if accumulate {
                        for (r, &v) in row.iter_mut().zip(b) {
                            *r += v;
                        }
                    } else {
                        row.copy_from_slice(b);
                    }
                }
            })
        });
    }
    matmul(
        rows,
        output,
        input,
        out,
        0,
        output,
        accumulate || bias.is_some(),
        View {
            data: x,
            offset: 0,
            rs: input,
            cs: 1,
        },
        View {
            data: wt,
            offset: 0,
            rs: output,
            cs: 1,
        },
        rayon::current_num_threads(),
    );
}

/// Sizes of one block's window attention.
#[derive(Clone, Copy, Debug)]
pub struct AttentionShape {
    pub windows: usize,
    /// Tokens per window.
    pub n: usize,
    pub heads: usize,
    pub head_dim: usize,
}

/// Window attention from the qkv projection `[windows * n, 3C]` (q already scaled) into `out`
/// `[windows * n, C]` (heads side by side, the layout the output projection reads): for every
/// window and head, `softmax(q k^T + bias[head] + mask[window]) v`. `bias` is `[heads, n, n]`,
/// `mask` `[windows, n, n]`; `probs`, when given, receives the softmax `[windows, heads, n, n]`.
pub fn window_attention(
    qkv: &[f32],
    s: AttentionShape,
    bias: &[f32],
    mask: Option<&[f32]>,
    out: &mut [f32],
    probs: Option<&mut [f32]>,
) {
    let AttentionShape {
        windows,
        n,
        heads,
        head_dim,
    } = s;
    let c = heads * head_dim;
    let nn = n * n;
    assert_eq!(qkv.len(), windows * n * 3 * c, "qkv rows");
    assert_eq!(out.len(), windows * n * c, "output rows");
    assert_eq!(bias.len(), heads * nn, "bias");
    if let Some(m) = mask {
        assert_eq!(m.len(), windows * nn, "mask");
    }
    let one_window = |w: usize, out_w: &mut [f32], probs_w: Option<&mut [f32]>| {
        let mut scratch;
        let p_all: &mut [f32] = match probs_w {
            Some(p) => p,
            None => {
                scratch = vec![0f32; heads * nn];
                &mut scratch
            }
        };
        let base = w * n * 3 * c;
        for h in 0..heads {
            let p = &mut p_all[h * nn..(h + 1) * nn];
            // q k^T: k read transposed through its strides.
            matmul(
                n,
                n,
                head_dim,
                p,
                0,
                n,
                false,
                View {
                    data: qkv,
                    offset: base + h * head_dim,
                    rs: 3 * c,
                    cs: 1,
                },
                View {
                    data: qkv,
                    offset: base + c + h * head_dim,
                    rs: 1,
                    cs: 3 * c,
                },
                1,
            );
            let bias_h = &bias[h * nn..(h + 1) * nn];
            let mask_w = mask.map(|m| &m[w * nn..(w + 1) * nn]);
            simd(|| {
                for (i, row) in p.chunks_exact_mut(n).enumerate() {
                    let b = &bias_h[i * n..(i + 1) * n];
                    match mask_w {
                        Some(m) => {
                            for ((v, &bv), &mv) in row.iter_mut().zip(b).zip(&m[i * n..(i + 1) * n])
                            {
                                *v = *v + bv + mv;
                            }
                        }
                        None => {
                            for (v, &bv) in row.iter_mut().zip(b) {
                                *v += bv;
                            }
                        }
                    }
                    softmax_row(row);
                }
            });
            // attn v, written straight into this head's columns of the output rows.
            matmul(
                n,
                head_dim,
                n,
                out_w,
                h * head_dim,
                c,
                false,
                View {
                    data: p,
                    offset: 0,
                    rs: n,
                    cs: 1,
                },
                View {
                    data: qkv,
                    offset: base + 2 * c + h * head_dim,
                    rs: 3 * c,
                    cs: 1,
                },
                1,
            );
        }
    };
    match probs {
        Some(probs) => {
            assert_eq!(probs.len(), windows * heads * nn, "probs");
            out.par_chunks_mut(n * c)
                .zip(probs.par_chunks_mut(heads * nn))
                .enumerate()
                .for_each(|(w, (o, p))| one_window(w, o, Some(p)));
        }
        None => out
            .par_chunks_mut(n * c)
            .enumerate()
            .for_each(|(w, o)| one_window(w, o, None)),
    }
}

/// Softmax of one row in place (max subtracted first, as every reference does).
#[inline(always)]
fn softmax_row(row: &mut [f32]) {
    let max = row.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    for v in row.iter_mut() {
        *v = exp(*v - max);
    }
    let inv = 1.0 / sum_lanes(row.iter().copied());
    for v in row.iter_mut() {
        *v *= inv;
    }
}

/// A short single-precision matrix-multiply probe: GFLOP/s of a `size`³ product on the whole
/// pool, best of `reps` (the ceiling the benchmark compares the forward pass with).
pub fn sgemm_probe(size: usize, reps: usize) -> f64 {
    let a: Vec<f32> = (0..size * size).map(|i| (i % 7) as f32 * 0.1).collect();
    let b: Vec<f32> = (0..size * size).map(|i| (i % 5) as f32 * 0.1).collect();
    let mut c = vec![0f32; size * size];
    fn view(d: &[f32], size: usize) -> View<'_> {
        View {
            data: d,
            offset: 0,
            rs: size,
            cs: 1,
        }
    }
    let threads = rayon::current_num_threads();
    let mut best = f64::INFINITY;
    for _ in 0..reps.max(1) {
        let t = std::time::Instant::now();
        matmul(
            size,
            size,
            size,
            &mut c,
            0,
            size,
            false,
            view(&a, size),
            view(&b, size),
            threads,
        );
        best = best.min(t.elapsed().as_secs_f64());
    }
    std::hint::black_box(&c);
    2.0 * (size as f64).powi(3) / best / 1e9
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{Device, Tensor, D};

    fn randn(n: usize, seed: u64) -> Vec<f32> {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let d = Normal::new(0.0f32, 1.0).unwrap();
        (0..n).map(|_| d.sample(&mut rng)).collect()
    }

    fn max_rel(a: &[f32], b: &[f32]) -> f32 {
        assert_eq!(a.len(), b.len());
        let scale = b.iter().fold(0f32, |m, v| m.max(v.abs())).max(1e-30);
        a.iter().zip(b).fold(0f32, |m, (x, y)| m.max((x - y).abs())) / scale
    }

    fn ulp(v: f64) -> f64 {
        let v = (v as f32).abs();
        if v == 0.0 {
            return f32::from_bits(1) as f64;
        }
        (f32::from_bits(v.to_bits() + 1) - v) as f64
    }

    /// The cosine step against the composed tensor operations (`x / max(||x||, 1e-12)` per
    /// head, q times its scale), with a zero k row (a padding token: no k bias) kept at zero.
    #[test]
    fn cosine_qk_matches_composed_normalisation() {
        let s = AttentionShape {
            windows: 3,
            n: 4,
            heads: 2,
            head_dim: 5,
        };
        let c = 10;
        let mut qkv = randn(s.windows * s.n * 3 * c, 41);
        qkv[c..2 * c].fill(0.0); // row 0's k
        let scales = [3.5f32, 100.0];
        let t = Tensor::from_vec(qkv.clone(), (s.windows * s.n, 3, 2, 5), &Device::Cpu).unwrap();
        let unit = |x: Tensor| {
            let n = x
                .sqr()
                .unwrap()
                .sum_keepdim(D::Minus1)
                .unwrap()
                .sqrt()
                .unwrap()
                .clamp(1e-12, f32::MAX)
                .unwrap();
            x.broadcast_div(&n).unwrap()
        };
        let sc = Tensor::from_vec(scales.to_vec(), (1, 2, 1), &Device::Cpu).unwrap();
        let q = unit(t.narrow(1, 0, 1).unwrap().squeeze(1).unwrap())
            .broadcast_mul(&sc)
            .unwrap();
        let k = unit(t.narrow(1, 1, 1).unwrap().squeeze(1).unwrap());
        let v = t.narrow(1, 2, 1).unwrap().squeeze(1).unwrap();
        let want: Vec<f32> = Tensor::stack(&[q, k, v], 1)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        cosine_qk(&mut qkv, s, &scales);
        assert!(max_rel(&qkv, &want) < 1e-6);
        assert!(qkv[c..2 * c].iter().all(|&v| v == 0.0));
    }

    /// erf against f64 `erf` of the C library at 200 001 points over [-6, 6] and near zero.
    #[test]
    fn erf_within_eight_ulp_of_libm() {
        extern "C" {
            fn erf(x: f64) -> f64;
        }
        let mut worst = 0f64;
        let points = (-100_000..=100_000)
            .map(|i| i as f32 * 6e-5)
            .chain((-1000..=1000).map(|i| i as f32 * 1e-7));
        for x in points {
            // SAFETY: `erf` from the C math library is a pure function of one double.
            let want = unsafe { erf(x as f64) };
            let got = super::erf(x) as f64;
            worst = worst.max((got - want).abs() / ulp(want));
        }
        assert!(worst <= 8.0, "erf is {worst} ulp off");
        // Past the clamp the value stays within one ulp below 1 (0.99999994).
        assert!((super::erf(10.0) - 1.0).abs() <= f32::EPSILON);
        assert!((super::erf(-10.0) + 1.0).abs() <= f32::EPSILON);
    }

    #[test]
    fn exp_within_two_ulp() {
        let mut worst = 0f64;
        for i in -87_000..=88_000 {
            let x = i as f32 * 1e-3;
            let want = (x as f64).exp();
            worst = worst.max((exp(x) as f64 - want).abs() / ulp(want));
        }
        assert!(worst <= 2.0, "exp is {worst} ulp off");
        assert!(exp(-200.0) < 1e-37 && exp(-200.0) >= 0.0);
    }

    #[test]
    fn gelu_matches_candle() {
        let xs = randn(50_000, 1)
            .into_iter()
            .map(|v| v * 4.0)
            .collect::<Vec<_>>();
        let want: Vec<f32> = Tensor::new(xs.as_slice(), &Device::Cpu)
            .unwrap()
            .gelu_erf()
            .unwrap()
            .to_vec1()
            .unwrap();
        let mut got = xs.clone();
        gelu_in_place(&mut got);
        for ((g, w), x) in got.iter().zip(&want).zip(&xs) {
            assert!(
                (g - w).abs() <= 4e-7 * x.abs().max(1.0),
                "gelu({x}) = {g}, want {w}"
            );
        }
    }

    #[test]
    fn gather_layer_norm_matches_candle() {
        let (tokens, c) = (50, 96);
        let x = randn(tokens * c, 2);
        let w = randn(c, 3);
        let b = randn(c, 4);
        let index: Vec<u32> = (0..70).map(|i| (i * 13 % 51) as u32).collect(); // 50 = padding
        let xt = Tensor::from_vec(x.clone(), (tokens, c), &Device::Cpu).unwrap();
        let wt = Tensor::new(w.as_slice(), &Device::Cpu).unwrap();
        let bt = Tensor::new(b.as_slice(), &Device::Cpu).unwrap();
        let normed = candle_nn::ops::layer_norm(&xt, &wt, &bt, 1e-5).unwrap();
        let padded = Tensor::cat(
            &[
                &normed,
                &Tensor::zeros((1, c), candle_core::DType::F32, &Device::Cpu).unwrap(),
            ],
            0,
        )
        .unwrap();
        let idx = Tensor::new(index.as_slice(), &Device::Cpu).unwrap();
        let want: Vec<f32> = padded
            .index_select(&idx, 0)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        let mut got = vec![f32::NAN; index.len() * c];
        gather_layer_norm(&x, c, &index, &w, &b, 1e-5, &mut got);
        assert!(max_rel(&got, &want) < 1e-6, "{}", max_rel(&got, &want));
        // Patch merging's form: groups of 2 rows concatenated (padding included), then the norm.
        let w2 = randn(2 * c, 15);
        let b2 = randn(2 * c, 16);
        let raw = Tensor::cat(
            &[
                &xt,
                &Tensor::zeros((1, c), candle_core::DType::F32, &Device::Cpu).unwrap(),
            ],
            0,
        )
        .unwrap()
        .index_select(&idx, 0)
        .unwrap()
        .reshape((35, 2 * c))
        .unwrap();
        let want2: Vec<f32> = candle_nn::ops::layer_norm(
            &raw,
            &Tensor::new(w2.as_slice(), &Device::Cpu).unwrap(),
            &Tensor::new(b2.as_slice(), &Device::Cpu).unwrap(),
            1e-5,
        )
        .unwrap()
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
        let mut got2 = vec![f32::NAN; index.len() * c];
        concat_layer_norm(&x, c, &index, 2, &w2, &b2, 1e-5, &mut got2);
        assert!(max_rel(&got2, &want2) < 1e-6, "{}", max_rel(&got2, &want2));
        let mut all = vec![f32::NAN; tokens * c];
        layer_norm(&x, c, &w, &b, 1e-5, &mut all);
        let want_all: Vec<f32> = normed.flatten_all().unwrap().to_vec1().unwrap();
        assert!(max_rel(&all, &want_all) < 1e-6);
    }

    #[test]
    fn scatter_add_is_residual_plus_gather() {
        let c = 8;
        let mut x = randn(5 * c, 5);
        let y = randn(7 * c, 6);
        let index = [6u32, 0, 3, 2, 5];
        let mut want = x.clone();
        for (t, &i) in index.iter().enumerate() {
            for j in 0..c {
                want[t * c + j] += y[i as usize * c + j];
            }
        }
        scatter_add(&mut x, c, &y, &index);
        assert_eq!(x, want);
    }

    /// The gemm call on strided views (the `unsafe` block): transposed operands, an offset
    /// destination with a wider row stride, accumulation and both parallelism settings.
    #[test]
    fn strided_matmul_matches_naive() {
        let (m, n, k) = (13, 11, 7);
        let a = randn(m * k * 3, 7); // a[i][p] at 5 + i*3k + p
        let b = randn(k * n * 2, 8); // b[p][j] stored transposed: at p + j*2k
        for threads in [1, 2] {
            for accumulate in [false, true] {
                let mut dst = randn(m * 20 + 30, 9);
                let mut want = dst.clone();
                for i in 0..m {
                    for j in 0..n {
                        let s: f32 = (0..k)
                            .map(|p| a[5 + i * 3 * k + p] * b[p + j * 2 * k])
                            .sum();
                        let d = &mut want[4 + i * 20 + j];
                        *d = if accumulate { *d + s } else { s };
                    }
                }
                let lhs = View {
                    data: &a,
                    offset: 5,
                    rs: 3 * k,
                    cs: 1,
                };
                let rhs = View {
                    data: &b,
                    offset: 0,
                    rs: 1,
                    cs: 2 * k,
                };
                matmul(m, n, k, &mut dst, 4, 20, accumulate, lhs, rhs, threads);
                assert!(max_rel(&dst, &want) < 1e-6);
            }
        }
    }

    #[test]
    #[should_panic(expected = "left operand")]
    fn matmul_refuses_a_view_past_the_slice() {
        let a = vec![0f32; 4];
        let mut d = vec![0f32; 4];
        let v = View {
            data: &a,
            offset: 1,
            rs: 2,
            cs: 1,
        };
        matmul(2, 2, 2, &mut d, 0, 2, false, v, v, 1);
    }

    #[test]
    fn window_attention_matches_candle() {
        let s = AttentionShape {
            windows: 3,
            n: 12,
            heads: 2,
            head_dim: 5,
        };
        let c = s.heads * s.head_dim;
        let qkv = randn(s.windows * s.n * 3 * c, 10);
        let bias = randn(s.heads * s.n * s.n, 11);
        let mask: Vec<f32> = (0..s.windows * s.n * s.n)
            .map(|i| if i % 7 == 0 { -100.0 } else { 0.0 })
            .collect();
        let t = Tensor::from_vec(
            qkv.clone(),
            (s.windows, s.n, 3, s.heads, s.head_dim),
            &Device::Cpu,
        )
        .unwrap()
        .permute((2, 0, 3, 1, 4))
        .unwrap()
        .contiguous()
        .unwrap();
        let (q, k, v) = (t.get(0).unwrap(), t.get(1).unwrap(), t.get(2).unwrap());
        let bt = Tensor::from_vec(bias.clone(), (1, s.heads, s.n, s.n), &Device::Cpu).unwrap();
        let mt = Tensor::from_vec(mask.clone(), (s.windows, 1, s.n, s.n), &Device::Cpu).unwrap();
        let attn = q
            .matmul(&k.t().unwrap())
            .unwrap()
            .broadcast_add(&bt)
            .unwrap()
            .broadcast_add(&mt)
            .unwrap();
        let attn = candle_nn::ops::softmax(&attn, D::Minus1).unwrap();
        let want_out: Vec<f32> = attn
            .matmul(&v)
            .unwrap()
            .transpose(1, 2)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        let want_p: Vec<f32> = attn.flatten_all().unwrap().to_vec1().unwrap();
        let mut out = vec![f32::NAN; s.windows * s.n * c];
        let mut probs = vec![f32::NAN; s.windows * s.heads * s.n * s.n];
        window_attention(&qkv, s, &bias, Some(&mask), &mut out, Some(&mut probs));
        assert!(
            max_rel(&out, &want_out) < 1e-6,
            "{}",
            max_rel(&out, &want_out)
        );
        assert!(max_rel(&probs, &want_p) < 1e-6);
        let mut out2 = vec![f32::NAN; out.len()];
        window_attention(&qkv, s, &bias, Some(&mask), &mut out2, None);
        assert_eq!(out, out2);
    }

    #[test]
    fn thread_counts_parse_and_resolve() {
        assert_eq!(parse_threads("3"), Ok(3));
        assert!(parse_threads("0").is_err());
        assert!(parse_threads("two").is_err());
        assert_eq!(resolve_threads(Some(5)).unwrap(), 5);
        assert!(resolve_threads(None).unwrap() >= 1);
    }

    #[test]
    fn linear_adds_bias() {
        let (rows, input, output) = (9, 6, 4);
        let x = randn(rows * input, 12);
        let wt = randn(input * output, 13);
        let b = randn(output, 14);
        let mut got = vec![f32::NAN; rows * output];
        linear(&x, input, &wt, Some(&b), &mut got, false);
        let want: Vec<f32> = Tensor::from_vec(x.clone(), (rows, input), &Device::Cpu)
            .unwrap()
            .matmul(&Tensor::from_vec(wt.clone(), (input, output), &Device::Cpu).unwrap())
            .unwrap()
            .broadcast_add(&Tensor::new(b.as_slice(), &Device::Cpu).unwrap())
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        assert!(max_rel(&got, &want) < 1e-6);
        // Accumulating adds the same again.
        linear(&x, input, &wt, Some(&b), &mut got, true);
        let twice: Vec<f32> = want.iter().map(|v| 2.0 * v).collect();
        assert!(max_rel(&got, &twice) < 1e-6);
    }
}
