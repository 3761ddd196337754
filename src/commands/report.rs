//! `mullion report`: per labelled region of a folder of images, how each stage responds inside
//! it (`regions.csv`, `summary.json`, optional figures).

use super::options::{parse_map, parse_shard, MapArg, RunArgs};
use crate::error::{Error, Result};
use crate::headless::report::{run_report, ReportOptions, Shard};
use clap::Args;
use std::path::PathBuf;

/// Options of `mullion report`.
#[derive(Args, Debug, Clone)]
pub struct ReportArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Folder of images (png, jpg, jpeg, webp, tif, tiff, bmp); sub-folders are not searched.
    #[arg(long, value_name = "DIR")]
    pub images: PathBuf,
    /// Folder holding the `<image file name>.regions.json` sidecars [default: next to each image].
    #[arg(long, value_name = "DIR")]
    pub regions: Option<PathBuf>,
    /// Folder for regions.csv, summary.json, the per-image records and any figures.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Scalar map to measure: norm (token L2 norm), channel:N, or difference (1 - cosine per
    /// token between --base and --weights; needs --base).
    #[arg(long, default_value = "norm", value_parser = parse_map, value_name = "KIND")]
    pub map: MapArg,
    /// The checkpoint to compare with (A) for --map difference; it keeps its own layout's
    /// padding rules unless --pad-order / --small-stage are given.
    #[arg(long, value_name = "FILE")]
    pub base: Option<PathBuf>,
    /// Also save one figure per image, regions outlined, in OUT/figures/.
    #[arg(long)]
    pub figures: bool,
    /// Recompute every image, even those already done with the same inputs.
    #[arg(long)]
    pub force: bool,
    /// Do only shard K of N (1 <= K <= N): the images whose name hashes to it, written to
    /// OUT/shard-K-of-N/; `mullion merge` joins the shards.
    #[arg(long, value_parser = parse_shard, value_name = "K/N")]
    pub shard: Option<Shard>,
}

impl ReportArgs {
    /// The typed options these arguments ask for.
    pub fn options(&self) -> Result<ReportOptions> {
        Ok(ReportOptions {
            session: self.run.session_options()?,
            images: self.images.clone(),
            regions: self.regions.clone(),
            out: self.out.clone(),
            map: self.map.0.clone(),
            base: self.base.clone(),
            figures: self.figures,
            force: self.force,
            shard: self.shard,
        })
    }
}

/// Run, print where the results are, and fail (after writing everything) when any image could
/// not be used, so scripts notice.
pub fn run(args: &ReportArgs) -> Result<()> {
    let o = run_report(&args.options()?)?;
    let s = &o.summary;
    eprintln!(
        "wrote {} ({} rows) and {}: {} images, {} computed, {} reused, {} without regions, {} failed",
        o.csv.display(),
        o.rows,
        o.summary_path.display(),
        s.images,
        s.computed,
        s.reused,
        s.without_regions.len(),
        s.failed.len()
    );
    if !s.failed.is_empty() {
        return Err(Error::bad_file(
            &args.images,
            format!(
                "{} of {} images could not be used; each is listed with its error in {}",
                s.failed.len(),
                s.images,
                o.summary_path.display()
            ),
        ));
    }
    Ok(())
}
