//! What the window remembers between runs: plain data only (eframe storage, `serde(default)`).

use crate::input::Normalisation;
use serde::{Deserialize, Serialize};
use std::path::PathBuf;

/// How an image becomes the network input.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum InputPolicy {
    /// The image at its own size (the default: what the user really feeds).
    Native,
    /// Resize so the long side is N pixels, keeping the aspect ratio.
    FitLongSide(u32),
    /// Resize to N x N.
    Square(u32),
}

impl InputPolicy {
    /// Target (width, height) for an image of (w, h).
    pub fn target(self, w: u32, h: u32) -> (u32, u32) {
        match self {
            InputPolicy::Native => (w, h),
            InputPolicy::FitLongSide(n) => {
                let s = n as f64 / w.max(h) as f64;
                (
                    ((w as f64 * s).round() as u32).max(1),
                    ((h as f64 * s).round() as u32).max(1),
                )
            }
            InputPolicy::Square(n) => (n, n),
        }
    }

    pub fn describe(self) -> String {
        match self {
            InputPolicy::Native => "native size".into(),
            InputPolicy::FitLongSide(n) => format!("long side {n}"),
            InputPolicy::Square(n) => format!("{n}x{n}"),
        }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(default)]
pub struct Settings {
    pub policy: InputPolicy,
    pub norm: Normalisation,
    pub map_kind: String,
    pub channel: usize,
    pub colormap: String,
    pub shared_scale: bool,
    pub log_scale: bool,
    pub clip_low: f32,
    pub clip_high: f32,
    pub show_regular: bool,
    pub show_shifted: bool,
    pub show_padding: bool,
    /// Which pair of blocks' windows to draw: block 2k (regular) and 2k+1 (shifted).
    pub block_pair: usize,
    pub focus_stage: usize,
    pub opacity: f32,
    pub recent_images: Vec<PathBuf>,
    pub recent_weights: Vec<PathBuf>,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            policy: InputPolicy::Native,
            norm: Normalisation::IMAGENET,
            map_kind: "norm".into(),
            channel: 0,
            colormap: "viridis".into(),
            shared_scale: false,
            log_scale: false,
            clip_low: 1.0,
            clip_high: 99.0,
            show_regular: true,
            show_shifted: false,
            show_padding: true,
            block_pair: 0,
            focus_stage: 0,
            opacity: 0.6,
            recent_images: Vec::new(),
            recent_weights: Vec::new(),
        }
    }
}

impl Settings {
    /// Remember a path at the front of a short most-recent-first list.
    pub fn remember(list: &mut Vec<PathBuf>, path: &std::path::Path) {
        list.retain(|p| p != path);
        list.insert(0, path.to_path_buf());
        list.truncate(10);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn policies_keep_aspect() {
        assert_eq!(InputPolicy::Native.target(333, 250), (333, 250));
        assert_eq!(InputPolicy::FitLongSide(224).target(333, 250), (224, 168));
        assert_eq!(InputPolicy::Square(224).target(333, 250), (224, 224));
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
        assert_eq!(partial.opacity, 0.9);
        assert_eq!(partial.map_kind, "norm");
    }
}
