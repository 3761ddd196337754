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
    let (images, weights) = crate::app::demo_inputs();
    crate::app::run(images, weights, None)
}

pub fn open(args: &OpenArgs) -> Result<()> {
    let (images, weights) = if args.images.is_empty() {
        let (images, demo_weights) = crate::app::demo_inputs();
        (images, args.weights.clone().or(demo_weights))
    } else {
        (args.images.clone(), args.weights.clone())
    };
    crate::app::run(images, weights, args.window_size)
}
