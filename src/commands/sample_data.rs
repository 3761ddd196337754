//! `mullion sample-data`: regenerate the demo's tray images, their cell labels and the region
//! sidecars made from them (what `sample-data/` holds).

use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct SampleDataArgs {
    /// Folder to write into.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
}

pub fn run(args: &SampleDataArgs) -> Result<()> {
    for p in crate::demo::write_sample_data(&args.out)? {
        println!("{}", p.display());
    }
    Ok(())
}
