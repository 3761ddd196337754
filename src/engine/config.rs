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
                n += 2 * 4 * cin + 4 * cin * c;
            }
            let block = 2 * c // norm1
                + 3 * c * c + 3 * c // qkv
                + table * self.heads[i] as u64
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

    /// Check the shape is one the engine can run.
    pub fn validate(&self) -> Result<(), String> {
        if self.depths.is_empty() {
            return Err("the model has no stages".into());
        }
        if let Some(i) = self.depths.iter().position(|&d| d == 0) {
            return Err(format!(
                "stage {i} has depth 0; every stage needs at least one block"
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
        for (i, &h) in self.heads.iter().enumerate() {
            if h == 0 || self.dim(i) % h != 0 {
                return Err(format!(
                    "stage {i}: {} channels do not split into {h} heads",
                    self.dim(i)
                ));
            }
        }
        if !(self.mlp_ratio > 0.0) {
            return Err("mlp ratio must be positive".into());
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
    fn validate_rejects_bad_heads() {
        let mut c = Config::tiny();
        c.heads[1] = 5;
        assert!(c.validate().unwrap_err().contains("stage 1"));
    }
}
