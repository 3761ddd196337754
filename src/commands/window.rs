//! `mullion open` and `mullion` without arguments: the window.

use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct OpenArgs {
    /// Image files or folders of images.
    pub images: Vec<PathBuf>,
    /// Checkpoint file [default: random weights, said so on screen].
    #[arg(long, value_name = "FILE")]
    pub weights: Option<PathBuf>,
}

/// No arguments: open the window on the bundled demo (sample images, and the demo checkpoint
/// when one is bundled; otherwise random weights, said so on screen).
pub fn demo() -> Result<()> {
    let (images, weights) = crate::app::demo_inputs();
    crate::app::run(images, weights)
}

pub fn open(args: &OpenArgs) -> Result<()> {
    crate::app::run(args.images.clone(), args.weights.clone())
}
