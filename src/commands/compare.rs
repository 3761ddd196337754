//! `mullion compare`: two checkpoints on the same images — linear CKA and per-token cosine per
//! stage (`stages.csv`), the drift of every weight tensor (`drift.csv`, `unmatched.txt`),
//! optional figures (A / B / difference per stage).

use super::options::{
    parse_mean, parse_memory_gb, parse_shard, parse_std, PadOrderArg, SmallStageArg,
};
use crate::engine::input::{memory_limit_from_gb, DEFAULT_MEMORY_GB};
use crate::engine::SessionOptions;
use crate::error::{Error, Result};
use crate::headless::compare::{run_compare, CompareOptions};
use crate::headless::Shard;
use clap::Args;
use std::path::PathBuf;

/// Options of `mullion compare`.
#[derive(Args, Debug, Clone)]
pub struct CompareArgs {
    /// Checkpoint A: the base the other was fine-tuned from, or the previous release.
    #[arg(long, value_name = "FILE")]
    pub base: PathBuf,
    /// Checkpoint B: the fine-tuned checkpoint.
    #[arg(long, value_name = "FILE")]
    pub tuned: PathBuf,
    /// Image files or folders (image files directly inside a folder; other files are ignored).
    #[arg(long, required = true, num_args = 1.., value_name = "PATH")]
    pub images: Vec<PathBuf>,
    /// Folder for stages.csv, drift.csv, unmatched.txt, summary.json and any figures.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Also save one figure per image (A / B / difference per stage) in OUT/figures/.
    #[arg(long)]
    pub figures: bool,
    /// JSON file overriding the shape read from the base checkpoint's tensors.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// JSON file overriding the shape read from the tuned checkpoint's tensors.
    #[arg(long, value_name = "FILE")]
    pub tuned_config: Option<PathBuf>,
    /// Padding order for both checkpoints [default: each from its own layout].
    #[arg(long, value_enum)]
    pub pad_order: Option<PadOrderArg>,
    /// Small-stage rule for both checkpoints [default: each from its own layout].
    #[arg(long, value_enum)]
    pub small_stage: Option<SmallStageArg>,
    /// Normalisation mean, R,G,B [default: ImageNet 0.485,0.456,0.406].
    #[arg(long, value_parser = parse_mean, value_name = "R,G,B")]
    pub mean: Option<[f32; 3]>,
    /// Normalisation std, R,G,B [default: ImageNet 0.229,0.224,0.225].
    #[arg(long, value_parser = parse_std, value_name = "R,G,B")]
    pub std: Option<[f32; 3]>,
    /// Refuse inputs whose forward pass (of either checkpoint) would need more memory.
    #[arg(long, default_value_t = DEFAULT_MEMORY_GB, value_parser = parse_memory_gb, value_name = "GB")]
    pub max_memory_gb: f64,
    /// Recompute every image, even those already done with the same inputs.
    #[arg(long)]
    pub force: bool,
    /// Do only shard K of N (1 <= K <= N), written to OUT/shard-K-of-N/; `mullion merge` joins
    /// the shards.
    #[arg(long, value_parser = parse_shard, value_name = "K/N")]
    pub shard: Option<Shard>,
}

impl CompareArgs {
    fn session(
        &self,
        weights: &std::path::Path,
        config: &Option<PathBuf>,
    ) -> Result<SessionOptions> {
        let memory_limit = memory_limit_from_gb(self.max_memory_gb).ok_or_else(|| {
            Error::BadArgument("--max-memory-gb must be a positive number".into())
        })?;
        Ok(SessionOptions {
            weights: weights.to_path_buf(),
            config: config.clone(),
            pad_order: self.pad_order.map(Into::into),
            small_stage: self.small_stage.map(Into::into),
            mean: self.mean,
            std: self.std,
            memory_limit,
        })
    }

    /// The typed options these arguments ask for.
    pub fn options(&self) -> Result<CompareOptions> {
        Ok(CompareOptions {
            base: self.session(&self.base, &self.config)?,
            tuned: self.session(&self.tuned, &self.tuned_config)?,
            images: self.images.clone(),
            out: self.out.clone(),
            figures: self.figures,
            force: self.force,
            shard: self.shard,
        })
    }
}

/// Run, say where the results are, and fail (after writing everything) when an image could not
/// be used.
pub fn run(args: &CompareArgs) -> Result<()> {
    let o = run_compare(&args.options()?)?;
    let s = &o.summary;
    eprintln!(
        "wrote {}, {} ({} tensors, {} unmatched) and {}: {} images, {} computed, {} reused, {} failed",
        o.stages_csv.display(),
        o.drift_csv.display(),
        s.drift_rows,
        s.unmatched,
        o.summary_path.display(),
        s.images,
        s.computed,
        s.reused,
        s.failed.len()
    );
    if !s.failed.is_empty() {
        return Err(Error::bad_file(
            &args.out,
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
