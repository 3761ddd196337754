//! `mullion open` and `mullion` without arguments: the window.

use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct OpenArgs {
    /// Image files or folders of images [default: the bundled demo].
    pub images: Vec<PathBuf>,
    /// Checkpoint file [default: the demo checkpoint with the demo images, otherwise random
    /// weights, said so on screen].
    #[arg(long, value_name = "FILE")]
    pub weights: Option<PathBuf>,
    /// A checkpoint to compare with (A: the base the checkpoint was fine-tuned from, or the
    /// previous release); the window then shows A, B and their difference per stage.
    #[arg(long, value_name = "FILE")]
    pub base: Option<PathBuf>,
    /// JSON file overriding the shape read from the checkpoint's tensors (as for `features`;
    /// e.g. a Swin V2 checkpoint's `{"window": 8}`, which its tensors do not record).
    #[arg(long, value_name = "FILE", requires = "weights")]
    pub config: Option<PathBuf>,
    /// The same for the base checkpoint (A).
    #[arg(long, value_name = "FILE", requires = "base")]
    pub base_config: Option<PathBuf>,
    /// Size of the window in points, WIDTHxHEIGHT.
    #[arg(long, value_parser = parse_window_size, value_name = "WxH")]
    pub window_size: Option<(f32, f32)>,
}

/// `WIDTHxHEIGHT` in points, each between 320 and 16384.
fn parse_window_size(s: &str) -> std::result::Result<(f32, f32), String> {
    let bad = || format!("'{s}': expected WIDTHxHEIGHT, e.g. 1280x720");
    let (w, h) = s.split_once(['x', 'X']).ok_or_else(bad)?;
    let side = |v: &str| {
        v.trim()
            .parse::<f32>()
            .ok()
            .filter(|v| (320.0..=16384.0).contains(v))
    };
    Ok((side(w).ok_or_else(bad)?, side(h).ok_or_else(bad)?))
}

/// No arguments: open the window on the bundled demo (sample images, and the demo checkpoint
/// when one is bundled; otherwise random weights, said so on screen).
pub fn demo() -> Result<()> {
    crate::app::run(crate::app::demo_inputs(), None)
}

pub fn open(args: &OpenArgs) -> Result<()> {
    // Read before the window opens, so that a broken file is a usage error on the terminal.
    let mut overrides = Vec::new();
    for (path, config) in [
        (&args.weights, &args.config),
        (&args.base, &args.base_config),
    ] {
        if let (Some(p), Some(c)) = (path, config) {
            overrides.push((p.clone(), crate::engine::read_override(Some(c))?));
        }
    }
    let opening = if args.images.is_empty() {
        let demo = crate::app::demo_inputs();
        // The demo pair comes along only with the demo checkpoint.
        let base = match &args.weights {
            Some(_) => args.base.clone(),
            None => args.base.clone().or(demo.base),
        };
        crate::app::Opening {
            images: demo.images,
            weights: args.weights.clone().or(demo.weights),
            base,
            overrides,
        }
    } else {
        crate::app::Opening {
            images: args.images.clone(),
            weights: args.weights.clone(),
            base: args.base.clone(),
            overrides,
        }
    };
    crate::app::run(opening, args.window_size)
}
