//! `mullion merge`: join the shard folders of a split report into one `regions.csv` and
//! `summary.json`, the same as an unsplit run writes.

use crate::error::Result;
use crate::headless::merge_reports;
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct MergeArgs {
    /// The shard folders (OUT/shard-K-of-N of every K), each once.
    #[arg(required = true, value_name = "DIR")]
    pub shards: Vec<PathBuf>,
    /// Folder for the merged regions.csv and summary.json.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
}

pub fn run(args: &MergeArgs) -> Result<()> {
    let o = merge_reports(&args.shards, &args.out)?;
    eprintln!(
        "wrote {} ({} rows) and {} from {} shards: {} images, {} failed",
        o.csv.display(),
        o.rows,
        o.summary_path.display(),
        o.shards,
        o.summary.images,
        o.summary.failed.len()
    );
    Ok(())
}
