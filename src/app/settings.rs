//! What the window remembers between runs: plain data only (eframe storage, `serde(default)`).

use crate::analysis::ScaleSpec;
use crate::engine::geometry::{PadOrder, Semantics, SmallStage};
use crate::engine::input::{InputPolicy, Normalisation};
use crate::render::Overlays;
use serde::{Deserialize, Serialize};
use std::path::PathBuf;

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(default)]
pub struct Settings {
    /// Not kept between runs: a large fixed size would make the next start slow before the
    /// window could show why.
    #[serde(skip)]
    pub policy: InputPolicy,
    /// Padding order and small-stage rule; `None`: the checkpoint layout's own. Not kept
    /// between runs (they belong to one checkpoint).
    #[serde(skip)]
    pub pad_order: Option<PadOrder>,
    #[serde(skip)]
    pub small_stage: Option<SmallStage>,
    pub norm: Normalisation,
    pub map_kind: String,
    pub channel: usize,
    /// Extra zero rows and columns of the padding-sensitivity map, in input pixels.
    pub pad_px: usize,
    /// The block (in every stage) of the attention-on-padding map.
    pub pad_block: usize,
    pub colormap: String,
    pub shared_scale: bool,
    pub log_scale: bool,
    pub clip_low: f32,
    pub clip_high: f32,
    pub show_regular: bool,
    pub show_shifted: bool,
    pub show_padding: bool,
    /// Draw the region outlines over the pictures.
    pub show_regions: bool,
    /// Which pair of blocks' windows to draw: block 2k (regular) and 2k+1 (shifted).
    pub block_pair: usize,
    pub focus_stage: usize,
    pub opacity: f32,
    /// Clicking a stage picture picks the token whose attention the inspector shows.
    #[serde(skip)]
    pub inspecting: bool,
    /// The block of the query's stage whose attention is shown (clamped to the stage's depth).
    pub inspect_block: usize,
    /// One head, or `None` for the mean over heads.
    pub inspect_head: Option<usize>,
    pub recent_images: Vec<PathBuf>,
    pub recent_weights: Vec<PathBuf>,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            policy: InputPolicy::Native,
            pad_order: None,
            small_stage: None,
            norm: Normalisation::IMAGENET,
            map_kind: "norm".into(),
            channel: 0,
            pad_px: 16,
            pad_block: 0,
            colormap: "viridis".into(),
            shared_scale: false,
            log_scale: false,
            clip_low: 1.0,
            clip_high: 99.0,
            show_regular: true,
            show_shifted: false,
            show_padding: true,
            show_regions: true,
            block_pair: 0,
            focus_stage: 0,
            opacity: 0.6,
            inspecting: false,
            inspect_block: 0,
            inspect_head: None,
            recent_images: Vec::new(),
            recent_weights: Vec::new(),
        }
    }
}

impl Settings {
    /// The map kind's command-line name (`norm`, `channel:N`, `pca`).
    pub fn map_id(&self) -> String {
        match self.map_kind.as_str() {
            "channel" => format!("channel:{}", self.channel),
            "padding" => format!("padding:{}", self.pad_px),
            "pad-attention" => format!("pad-attention:{}", self.pad_block),
            other => other.to_string(),
        }
    }

    /// How scalar maps become colours.
    pub fn scale_spec(&self) -> ScaleSpec {
        ScaleSpec {
            shared_across_stages: self.shared_scale,
            log: self.log_scale,
            clip_percentiles: (self.clip_low, self.clip_high),
        }
    }

    /// The grids and hatch asked for.
    pub fn overlays(&self) -> Overlays {
        Overlays {
            regular_grid: self.show_regular,
            shifted_grid: self.show_shifted,
            padding: self.show_padding,
            block: 2 * self.block_pair,
            grid_in_padding: true,
            line_width: 1,
        }
    }

    /// Whether going from `self` to `next` needs a new forward pass.
    pub fn needs_new_run(&self, next: &Settings) -> bool {
        self.policy != next.policy
            || self.norm != next.norm
            || self.pad_order != next.pad_order
            || self.small_stage != next.small_stage
    }

    /// The padding semantics a run uses with a checkpoint whose layout defaults to `layout`.
    pub fn semantics(&self, layout: Semantics) -> Semantics {
        Semantics {
            pad_order: self.pad_order.unwrap_or(layout.pad_order),
            small_stage: self.small_stage.unwrap_or(layout.small_stage),
        }
    }

    /// Remember a path, made absolute, at the front of a short most-recent-first list
    /// without repeats.
    pub fn remember(list: &mut Vec<PathBuf>, path: &std::path::Path) {
        let abs = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
        list.retain(|p| p != &abs);
        list.insert(0, abs);
        list.truncate(10);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recent_paths_are_absolute_and_not_repeated() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("a.png");
        std::fs::write(&file, b"x").unwrap();
        let mut list = Vec::new();
        Settings::remember(&mut list, &file);
        Settings::remember(&mut list, &dir.path().join(".").join("a.png"));
        assert_eq!(list.len(), 1);
        assert!(list[0].is_absolute());
    }

    #[test]
    fn settings_round_trip_and_tolerate_missing_fields() {
        let s = Settings {
            opacity: 0.3,
            ..Default::default()
        };
        let text = serde_json::to_string(&s).unwrap();
        assert_eq!(serde_json::from_str::<Settings>(&text).unwrap(), s);
        let partial: Settings = serde_json::from_str("{\"opacity\": 0.9}").unwrap();
        // A slow input size is not carried to the next start.
        let slow = Settings {
            policy: InputPolicy::Square(4096),
            pad_order: Some(PadOrder::PadThenShift),
            ..Default::default()
        };
        let back: Settings = serde_json::from_str(&serde_json::to_string(&slow).unwrap()).unwrap();
        assert_eq!(back.policy, InputPolicy::Native);
        assert_eq!(back.pad_order, None);
        assert_eq!(partial.opacity, 0.9);
        assert_eq!(partial.map_kind, "norm");
    }
}
