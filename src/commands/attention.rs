//! `mullion attention`: one block's attention weights of one image, per window and head, with
//! the grid position of every window token.

use super::options::RunArgs;
use crate::error::Result;
use crate::headless::attention::{run_attention, AttentionOptions};
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct AttentionArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
    /// Stage, from 0.
    #[arg(long, value_name = "S")]
    pub stage: usize,
    /// Block inside the stage, from 0 (odd blocks use shifted windows).
    #[arg(long, value_name = "B")]
    pub block: usize,
    /// Output safetensors file (`probs`, `window_tokens`).
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
}

pub fn run(args: &AttentionArgs) -> Result<()> {
    let o = run_attention(&AttentionOptions {
        session: args.run.session_options()?,
        image: args.image.clone(),
        stage: args.stage,
        block: args.block,
        out: args.out.clone(),
    })?;
    eprintln!(
        "wrote {} ({} windows, {} heads, {} tokens a window; {} windows)",
        args.out.display(),
        o.windows,
        o.heads,
        o.tokens_per_window,
        if o.shifted { "shifted" } else { "regular" }
    );
    Ok(())
}
