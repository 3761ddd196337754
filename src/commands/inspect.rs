//! `mullion inspect`: how a checkpoint loads (layout, shape, parameters, tensors used, ignored
//! and missing, the padding semantics chosen).

use crate::engine::open_checkpoint;
use crate::error::{Error, Result};
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct InspectArgs {
    /// Checkpoint file, or a transformers folder (config.json beside model.safetensors).
    pub checkpoint: PathBuf,
    /// JSON file overriding the inferred shape (and any config.json beside the weights).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Print the report as JSON.
    #[arg(long)]
    pub json: bool,
}

pub fn run(args: &InspectArgs) -> Result<()> {
    let loaded = open_checkpoint(&args.checkpoint, args.config.as_deref())?;
    if args.json {
        println!(
            "{}",
            serde_json::to_string_pretty(&loaded.report)
                .map_err(|e| Error::Internal(e.to_string()))?
        );
    } else {
        print!("{}", loaded.report);
    }
    Ok(())
}
