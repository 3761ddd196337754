//! Model shape of a shifted-window hierarchical vision transformer (Liu et al. 2021, "Swin
//! Transformer: Hierarchical Vision Transformer using Shifted Windows").
//!
//! A [`Config`] is either one of the four published sizes (for random weights: benchmarks and
//! tests) or read off a checkpoint's tensor shapes by the loader; an explicit JSON file may
//! override any field.

use crate::engine::geometry::{Geometry, ModelShape, Semantics};
use serde::{Deserialize, Serialize};

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Config {
    /// Input channels (3 for RGB).
    pub in_chans: usize,
    /// Patch size of the patch embedding (pixels per side).
    pub patch: usize,
    /// Channels of stage 0; stage i has `embed_dim * 2^i`.
    pub embed_dim: usize,
    /// Blocks per stage.
    pub depths: Vec<usize>,
    /// Attention heads per stage.
    pub heads: Vec<usize>,
    /// Nominal window (rows, cols).
    pub window: (usize, usize),
    /// MLP hidden width over the block width.
    pub mlp_ratio: f64,
    /// What a Swin V2 backbone adds; `None` for the first version.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub v2: Option<V2Shape>,
}

/// The second version of the family (Liu et al. 2022, "Swin Transformer V2"): scaled cosine
/// attention, a continuous position bias made by a small MLP, q and v biases without a k bias,
/// norms after attention and MLP instead of before, patch merging that reduces, then normalises.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct V2Shape {
    /// Hidden width of the position bias MLP (`Linear(2, hidden)`, ReLU, `Linear(hidden, heads)`).
    pub cpb_hidden: usize,
    /// Per stage, the window the checkpoint was trained with, when the bias coordinates are
    /// normalised by it rather than by the block's own window; `None`: the block's own window.
    pub trained_windows: Vec<Option<(usize, usize)>>,
    /// The image size (height, width) the model was built for; transformers fixes each
    /// stage's window from it ([`crate::engine::geometry::SmallStage::AsBuilt`]).
    pub built_for: Option<(usize, usize)>,
    /// The shift mask across regions: -100, or -200 where the library adds its mask twice
    /// (transformers' Swinv2).
    pub mask_fill: f32,
    /// LayerNorm eps of the blocks and the final norm (transformers' `layer_norm_eps`; the
    /// patch embedding and merging norms keep 1e-5).
    pub norm_eps: f32,
}

impl V2Shape {
    /// The trained window of stage `i`, if the checkpoint names one.
    pub fn trained_window(&self, i: usize) -> Option<(usize, usize)> {
        self.trained_windows.get(i).copied().flatten()
    }
}

/// Fields of an explicit configuration file; any field left out is read from the tensors.
#[derive(Clone, Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ConfigOverride {
    pub patch: Option<usize>,
    pub embed_dim: Option<usize>,
    pub depths: Option<Vec<usize>>,
    pub heads: Option<Vec<usize>>,
    /// One number for a square window or `[rows, cols]`.
    pub window: Option<WindowSpec>,
    pub mlp_ratio: Option<f64>,
    pub pad_order: Option<crate::engine::geometry::PadOrder>,
    pub small_stage: Option<crate::engine::geometry::SmallStage>,
    /// Swin V2: the window the checkpoint was trained with (one number for every stage, or one
    /// per stage, 0 for none), which normalises the position bias coordinates.
    pub trained_window: Option<TrainedWindow>,
    /// Swin V2 from transformers: the image size the model was built for (`N` or `[H, W]`).
    pub built_for: Option<WindowSpec>,
}

impl ConfigOverride {
    /// Every field of `self`, and where `self` leaves one out, `beneath`'s.
    pub fn over(&self, beneath: &ConfigOverride) -> ConfigOverride {
        ConfigOverride {
            patch: self.patch.or(beneath.patch),
            embed_dim: self.embed_dim.or(beneath.embed_dim),
            depths: self.depths.clone().or_else(|| beneath.depths.clone()),
            heads: self.heads.clone().or_else(|| beneath.heads.clone()),
            window: self.window.or(beneath.window),
            mlp_ratio: self.mlp_ratio.or(beneath.mlp_ratio),
            pad_order: self.pad_order.or(beneath.pad_order),
            small_stage: self.small_stage.or(beneath.small_stage),
            trained_window: self
                .trained_window
                .clone()
                .or_else(|| beneath.trained_window.clone()),
            built_for: self.built_for.or(beneath.built_for),
        }
    }
}

/// One trained window for every stage, or one per stage (0: the block's own window).
#[derive(Clone, Debug, Deserialize)]
#[serde(untagged)]
pub enum TrainedWindow {
    All(usize),
    PerStage(Vec<usize>),
}

impl TrainedWindow {
    /// Per stage, for `stages` stages; `None` where the entry is 0 (a list shorter than the
    /// stages leaves the rest at 0).
    pub fn per_stage(&self, stages: usize) -> Vec<Option<(usize, usize)>> {
        let at = |i: usize| match self {
            TrainedWindow::All(m) => *m,
            TrainedWindow::PerStage(v) => v.get(i).copied().unwrap_or(0),
        };
        (0..stages)
            .map(|i| Some(at(i)).filter(|&m| m > 0).map(|m| (m, m)))
            .collect()
    }
}

#[derive(Clone, Copy, Debug, Deserialize)]
#[serde(untagged)]
pub enum WindowSpec {
    Square(usize),
    Rect([usize; 2]),
}

impl WindowSpec {
    pub fn dims(self) -> (usize, usize) {
        match self {
            WindowSpec::Square(m) => (m, m),
            WindowSpec::Rect([h, w]) => (h, w),
        }
    }
}

/// Bounds on every size read from a checkpoint, a configuration file or a flag. They are far
/// above the largest published models (Swin-L: C = 192, 18 blocks in a stage, 48 heads,
/// window 12; the largest V2 model has C = 512 and 42 blocks in a stage) and low enough that
/// no loop, table or allocation they size can hang or exhaust the machine before the memory
/// estimate runs. (Headroom of this kind is common practice; the numbers are Mullion's own.)
pub const MAX_STAGES: usize = 8;
/// Blocks in one stage.
pub const MAX_BLOCKS_PER_STAGE: usize = 256;
/// Channels of the widest stage (`embed_dim * 2^(stages-1)`).
pub const MAX_CHANNELS: usize = 16384;
/// Attention heads of one stage.
pub const MAX_HEADS: usize = 1024;
/// Window side (tokens).
pub const MAX_WINDOW: usize = 128;
/// Patch side (pixels).
pub const MAX_PATCH: usize = 256;
/// Input channels.
pub const MAX_IN_CHANS: usize = 64;
/// MLP hidden width over the block width.
pub const MAX_MLP_RATIO: f64 = 64.0;

/// The published sizes (Liu et al. 2021, Sec. 3.3): name, C, depths, heads.
const PRESETS: [(&str, usize, [usize; 4], [usize; 4]); 4] = [
    ("tiny", 96, [2, 2, 6, 2], [3, 6, 12, 24]),
    ("small", 96, [2, 2, 18, 2], [3, 6, 12, 24]),
    ("base", 128, [2, 2, 18, 2], [4, 8, 16, 32]),
    ("large", 192, [2, 2, 18, 2], [6, 12, 24, 48]),
];

impl Config {
    /// A published size by name (`tiny`, `small`, `base`, `large`, or `T`/`S`/`B`/`L`), window 7.
    pub fn preset(name: &str) -> Option<Config> {
        let lower = name.to_ascii_lowercase();
        let (_, c, depths, heads) = PRESETS
            .iter()
            .find(|p| p.0 == lower || p.0[..1] == lower)
            .copied()?;
        Some(Config {
            in_chans: 3,
            patch: 4,
            embed_dim: c,
            depths: depths.to_vec(),
            heads: heads.to_vec(),
            window: (7, 7),
            mlp_ratio: 4.0,
            v2: None,
        })
    }

    pub fn tiny() -> Config {
        Self::preset("tiny").expect("preset")
    }
    pub fn small() -> Config {
        Self::preset("small").expect("preset")
    }
    pub fn base() -> Config {
        Self::preset("base").expect("preset")
    }
    pub fn large() -> Config {
        Self::preset("large").expect("preset")
    }

    pub fn preset_names() -> impl Iterator<Item = &'static str> {
        PRESETS.iter().map(|p| p.0)
    }

    pub fn n_stages(&self) -> usize {
        self.depths.len()
    }

    /// Channels of stage `i`.
    pub fn dim(&self, stage: usize) -> usize {
        self.embed_dim << stage
    }

    /// MLP hidden width of stage `i`.
    pub fn mlp_hidden(&self, stage: usize) -> usize {
        (self.dim(stage) as f64 * self.mlp_ratio).round() as usize
    }

    pub fn total_blocks(&self) -> usize {
        self.depths.iter().sum()
    }

    pub fn shape(&self) -> ModelShape {
        ModelShape {
            patch: self.patch,
            depths: self.depths.clone(),
            window: self.window,
            built_for: self.v2.as_ref().and_then(|v| v.built_for),
        }
    }

    /// Parameters of the backbone: patch embedding, blocks (with one relative position bias table
    /// per block of the nominal window), patch merging. `final_norm` adds the final LayerNorm,
    /// `classes` a linear classifier on pooled features.
    pub fn parameter_count(&self, final_norm: bool, classes: Option<usize>) -> u64 {
        let (mh, mw) = self.window;
        let table = ((2 * mh - 1) * (2 * mw - 1)) as u64;
        let p = self.patch as u64;
        let c0 = self.embed_dim as u64;
        let mut n = c0 * self.in_chans as u64 * p * p + c0 + 2 * c0;
        for (i, &depth) in self.depths.iter().enumerate() {
            let c = self.dim(i) as u64;
            let h = self.mlp_hidden(i) as u64;
            if i > 0 {
                let cin = self.dim(i - 1) as u64;
                // The norm is over 4C before the reduction, over 2C after it in V2.
                let norm = if self.v2.is_some() {
                    2 * c
                } else {
                    2 * 4 * cin
                };
                n += norm + 4 * cin * c;
            }
            let heads = self.heads[i] as u64;
            let position = match &self.v2 {
                // logit scales, q and v biases (no k bias), the bias MLP
                Some(v) => {
                    let hid = v.cpb_hidden as u64;
                    heads + 2 * c + 3 * hid + hid * heads
                }
                None => 3 * c + table * heads,
            };
            let block = 2 * c // norm1
                + 3 * c * c + position // qkv, its biases and the position bias
                + c * c + c // proj
                + 2 * c // norm2
                + c * h + h + h * c + c; // mlp
            n += depth as u64 * block;
        }
        let last = self.dim(self.n_stages() - 1) as u64;
        if final_norm {
            n += 2 * last;
        }
        if let Some(k) = classes {
            n += last * k as u64 + k as u64;
        }
        n
    }

    /// Multiply-adds of one forward pass at `image` = (height, width) as the engine computes it:
    /// patch embedding, every window-attention block on its padded windows, MLPs, patch merging,
    /// and a classifier of `classes` outputs when given. Norms and softmax are not counted.
    pub fn multiply_adds(
        &self,
        image: (usize, usize),
        semantics: Semantics,
        classes: Option<usize>,
    ) -> u64 {
        let g = Geometry::new(image, &self.shape(), semantics);
        let (eh, ew) = g.embed_grid();
        let p = self.patch as u64;
        let mut n = (eh * ew) as u64 * self.embed_dim as u64 * self.in_chans as u64 * p * p;
        for (i, stage) in g.stages.iter().enumerate() {
            let c = self.dim(i) as u64;
            let tokens = (stage.grid.0 * stage.grid.1) as u64;
            if i > 0 {
                n += tokens * 4 * self.dim(i - 1) as u64 * c;
            }
            for b in &stage.blocks {
                let batch = (b.n_windows() * b.window_area()) as u64;
                let area = b.window_area() as u64;
                n += batch * c * 3 * c; // qkv
                n += 2 * batch * area * c; // q k^T and attn v over all heads
                n += batch * c * c; // proj
                n += 2 * tokens * c * self.mlp_hidden(i) as u64; // mlp
            }
        }
        if let Some(k) = classes {
            n += self.dim(self.n_stages() - 1) as u64 * k as u64;
        }
        n
    }

    /// Bytes the weights take while the model is loaded: every parameter once, as f32 (linear
    /// weights are kept only in the transposed form the matrix products read, whatever the
    /// file's type).
    pub fn weight_bytes(&self) -> u64 {
        4 * self.parameter_count(true, None)
    }

    /// Peak bytes of the tensors alive during one forward pass at `image` = (height, width),
    /// the normalised input `[3, H, W]` included, from the engine's own sequence of buffers:
    /// the patch embedding (input, padded copy, patch matrix, projection), each patch merging
    /// (its input, the gathered and normalised rows, the reduction), then for every block the
    /// larger of its attention moments (block input with either the window rows and the qkv
    /// rows, or the window rows, the projection and the new residual) and its MLP moment (block
    /// input, residual, normalised rows, hidden rows), on top of every stage output already
    /// kept. Per-task scratch (one window's scores) and an attention tap are left out. Checked
    /// arithmetic: `None` when it overflows.
    pub fn forward_peak_bytes(&self, image: (usize, usize), semantics: Semantics) -> Option<u64> {
        if image.0 == 0 || image.1 == 0 || self.validate().is_err() {
            return None;
        }
        let g = Geometry::new(image, &self.shape(), semantics);
        let m = |a: u64, b: u64| a.checked_mul(b);
        let u = |v: usize| v as u64;
        let c0 = u(self.embed_dim);
        let input = m(3, m(u(image.0), u(image.1))?)?;
        let padded_px = m(u(g.input_padded.0), u(g.input_padded.1))?;
        let padded = if g.input_padded == image {
            0
        } else {
            m(3, padded_px)?
        };
        let t0 = m(u(g.embed_grid().0), u(g.embed_grid().1))?;
        let embed_moment = m(3, padded_px)?
            .checked_add(padded)?
            .checked_add(m(2, m(t0, c0)?)?)?;
        // Kept from here on: the input and the embedding; stage outputs join as they finish.
        let mut kept = input.checked_add(m(t0, c0)?)?;
        let mut peak = input.checked_add(embed_moment)?;
        let mut prev: Option<(u64, u64)> = None; // tokens and channels of the previous stage
        for (i, s) in g.stages.iter().enumerate() {
            let c = u(self.dim(i));
            let hidden = u(self.mlp_hidden(i));
            let t = m(u(s.grid.0), u(s.grid.1))?;
            let tc = m(t, c)?;
            if let Some((tp, cp)) = prev {
                // The previous stage's output, the 2x2 neighbours gathered and normalised in
                // one pass, the reduction.
                let merged = m(4, m(t, cp)?)?;
                let moment = m(tp, cp)?.checked_add(merged)?.checked_add(tc)?;
                peak = peak.max(kept.checked_add(moment)?);
            }
            for b in &s.blocks {
                let n = u(b.window_area());
                let batch = m(u(b.n_windows()), n)?;
                let bc = m(batch, c)?;
                // The block input stays alive throughout. Attention: the windows and the qkv
                // rows, then the windows, the projection and the new residual.
                let attention = tc
                    .checked_add(m(4, bc)?)?
                    .max(m(2, tc)?.checked_add(m(2, bc)?)?);
                // MLP: the residual, the normalised rows and the hidden rows, plus two token
                // matrices that the peaks measured at 3000 and 10000 pixels a side show and this
                // sequence does not name (DEVELOPERS.md, "Memory estimate").
                let mlp = m(5, tc)?.checked_add(m(t, hidden)?)?;
                peak = peak.max(kept.checked_add(attention.max(mlp))?);
            }
            kept = kept.checked_add(tc)?;
            prev = Some((t, c));
        }
        m(4, peak)
    }

    /// Check the shape is one the engine can run, within the bounds above.
    pub fn validate(&self) -> Result<(), String> {
        if self.depths.is_empty() {
            return Err("the model has no stages".into());
        }
        if self.depths.len() > MAX_STAGES {
            return Err(format!(
                "{} stages; Mullion runs at most {MAX_STAGES}",
                self.depths.len()
            ));
        }
        if let Some(i) = self.depths.iter().position(|&d| d == 0) {
            return Err(format!(
                "stage {i} has depth 0; every stage needs at least one block"
            ));
        }
        if let Some(i) = self.depths.iter().position(|&d| d > MAX_BLOCKS_PER_STAGE) {
            return Err(format!(
                "stage {i} has {} blocks; Mullion runs at most {MAX_BLOCKS_PER_STAGE} per stage",
                self.depths[i]
            ));
        }
        if self.heads.len() != self.depths.len() {
            return Err(format!(
                "{} stages but {} head counts",
                self.depths.len(),
                self.heads.len()
            ));
        }
        if self.patch == 0 || self.embed_dim == 0 || self.window.0 == 0 || self.window.1 == 0 {
            return Err("patch size, embed dim and window must be positive".into());
        }
        if self.in_chans == 0 || self.in_chans > MAX_IN_CHANS {
            return Err(format!(
                "{} input channels; expected 1 to {MAX_IN_CHANS}",
                self.in_chans
            ));
        }
        if self.patch > MAX_PATCH {
            return Err(format!(
                "patch {}; Mullion runs patches up to {MAX_PATCH}",
                self.patch
            ));
        }
        if self.window.0 > MAX_WINDOW || self.window.1 > MAX_WINDOW {
            return Err(format!(
                "window {}x{}; Mullion runs windows up to {MAX_WINDOW}x{MAX_WINDOW}",
                self.window.0, self.window.1
            ));
        }
        // With at most MAX_STAGES stages the shift below cannot overflow.
        let widest = self
            .embed_dim
            .checked_mul(1 << (self.depths.len() - 1))
            .filter(|&c| c <= MAX_CHANNELS);
        if widest.is_none() {
            return Err(format!(
                "embed dim {} over {} stages gives more than {MAX_CHANNELS} channels in the last \
                 stage",
                self.embed_dim,
                self.depths.len()
            ));
        }
        for (i, &h) in self.heads.iter().enumerate() {
            if h == 0 || h > MAX_HEADS || !self.dim(i).is_multiple_of(h) {
                return Err(format!(
                    "stage {i}: {} channels do not split into {h} heads",
                    self.dim(i)
                ));
            }
        }
        if !(self.mlp_ratio > 0.0 && self.mlp_ratio <= MAX_MLP_RATIO) {
            return Err(format!(
                "mlp ratio {}: must be above 0 and at most {MAX_MLP_RATIO}",
                self.mlp_ratio
            ));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{PadOrder, SmallStage};

    // Liu et al. 2021, Table 1 (ImageNet-1K, 224x224, 1000-class head): Swin-T 28M params /
    // 4.5G FLOPs, Swin-S 50M / 8.7G, Swin-B 88M / 15.4G; Swin-L 197M / 34.5G (Table 1, the
    // ImageNet-22K pre-trained row at 224^2). FLOPs there are multiply-adds.
    #[test]
    fn published_parameter_and_flop_counts() {
        let table = [
            ("tiny", 28.0, 4.5),
            ("small", 50.0, 8.7),
            ("base", 88.0, 15.4),
            ("large", 197.0, 34.5),
        ];
        let original = Semantics {
            pad_order: PadOrder::PadThenShift,
            small_stage: SmallStage::Clamp,
        };
        for (name, params_m, gflops) in table {
            let cfg = Config::preset(name).unwrap();
            let params = cfg.parameter_count(true, Some(1000)) as f64 / 1e6;
            assert_eq!(params.round(), params_m, "{name}: {params}M parameters");
            let macs = cfg.multiply_adds((224, 224), original, Some(1000)) as f64 / 1e9;
            assert_eq!(
                (macs * 10.0).round() / 10.0,
                gflops,
                "{name}: {macs}G multiply-adds"
            );
        }
    }

    #[test]
    fn presets_by_letter() {
        assert_eq!(Config::preset("T"), Some(Config::tiny()));
        assert_eq!(Config::preset("L").unwrap().embed_dim, 192);
        assert!(Config::preset("huge").is_none());
    }

    #[test]
    fn validate_bounds_every_size() {
        let ok = Config::tiny();
        assert!(ok.validate().is_ok());
        let cases: Vec<(Config, &str)> = vec![
            (
                Config {
                    depths: vec![1_000_000_000],
                    heads: vec![3],
                    ..ok.clone()
                },
                "blocks",
            ),
            (
                Config {
                    window: (1_000_000, 1_000_000),
                    ..ok.clone()
                },
                "window",
            ),
            (
                Config {
                    embed_dim: usize::MAX,
                    ..ok.clone()
                },
                "channels",
            ),
            (
                Config {
                    depths: vec![1; 40],
                    heads: vec![1; 40],
                    ..ok.clone()
                },
                "stages",
            ),
            (
                Config {
                    patch: 100_000,
                    ..ok.clone()
                },
                "patch",
            ),
            (
                Config {
                    mlp_ratio: f64::INFINITY,
                    ..ok.clone()
                },
                "mlp ratio",
            ),
            (
                Config {
                    mlp_ratio: f64::NAN,
                    ..ok.clone()
                },
                "mlp ratio",
            ),
            (
                Config {
                    in_chans: 0,
                    ..ok.clone()
                },
                "input channels",
            ),
        ];
        for (c, word) in cases {
            let e = c.validate().unwrap_err();
            assert!(e.contains(word), "{e}");
        }
    }

    #[test]
    fn validate_rejects_bad_heads() {
        let mut c = Config::tiny();
        c.heads[1] = 5;
        assert!(c.validate().unwrap_err().contains("stage 1"));
    }
}
