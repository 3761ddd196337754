//! `mullion merge`: join the shard folders of a split report (`regions.csv`, `summary.json`)
//! or of a split comparison (`stages.csv`, `drift.csv`, ...) into what an unsplit run writes.

use crate::error::Result;
use crate::headless::{merge_shards, Merged};
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct MergeArgs {
    /// The shard folders (OUT/shard-K-of-N of every K), each once.
    #[arg(required = true, value_name = "DIR")]
    pub shards: Vec<PathBuf>,
    /// Folder for the merged tables and summary.json.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
}

pub fn run(args: &MergeArgs) -> Result<()> {
    match merge_shards(&args.shards, &args.out)? {
        Merged::Report(o) => eprintln!(
            "wrote {} ({} rows) and {} from {} shards: {} images, {} failed",
            o.csv.display(),
            o.rows,
            o.summary_path.display(),
            o.shards,
            o.summary.images,
            o.summary.failed.len()
        ),
        Merged::Compare(o) => eprintln!(
            "wrote {} ({} rows) and {} from {} comparison shards: {} images, {} failed",
            o.stages_csv.display(),
            o.rows,
            o.summary_path.display(),
            o.shards,
            o.summary.images,
            o.summary.failed.len()
        ),
    }
    Ok(())
}
