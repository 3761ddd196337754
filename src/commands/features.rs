//! `mullion features`: the patch embedding and every stage's output of one image, NHWC f32, in
//! a safetensors file (the contract other checks compare against).

use super::options::RunArgs;
use crate::engine::Session;
use crate::error::{Error, Result};
use candle_core::Tensor;
use clap::Args;
use std::collections::HashMap;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct FeaturesArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
    /// Output safetensors file.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Also write `stage{i}_norm`, the per-stage output norms detector backbones carry.
    #[arg(long)]
    pub stage_norms: bool,
    /// Also write `final_norm`, the final norm applied to the last stage.
    #[arg(long)]
    pub final_norm: bool,
}

pub fn run(args: &FeaturesArgs) -> Result<()> {
    let mut inputs = vec![
        ("--weights", args.run.weights.as_path()),
        ("--image", args.image.as_path()),
    ];
    if let Some(c) = &args.run.config {
        inputs.push(("--config", c.as_path()));
    }
    crate::io::check_outputs(&inputs, &[("--out", args.out.as_path())])?;
    let session = Session::open(&args.run.session_options()?)?;
    if args.stage_norms && !session.model.has_stage_norms() {
        return Err(Error::bad_file(
            &args.run.weights,
            "--stage-norms: this checkpoint has no per-stage output norms",
        ));
    }
    if args.final_norm && !session.model.has_final_norm() {
        return Err(Error::bad_file(
            &args.run.weights,
            "--final-norm: this checkpoint has no final norm",
        ));
    }
    let out = session.run_image(&args.image, args.stage_norms, args.final_norm)?;
    let mut tensors = HashMap::new();
    let nhwc = |t: &Tensor| t.unsqueeze(0);
    tensors.insert("embed".to_string(), nhwc(&out.embed)?);
    for (i, t) in out.stages.iter().enumerate() {
        tensors.insert(format!("stage{i}"), nhwc(t)?);
    }
    for (i, t) in out.stage_norms.iter().flatten().enumerate() {
        tensors.insert(format!("stage{i}_norm"), nhwc(t)?);
    }
    if let Some(t) = &out.final_norm {
        tensors.insert("final_norm".to_string(), nhwc(t)?);
    }
    crate::io::save_tensors(&tensors, &args.out)?;
    eprintln!(
        "wrote {} ({} tensors; {} and small stages '{}')",
        args.out.display(),
        tensors.len(),
        session.semantics.pad_order.name(),
        session.semantics.small_stage.name()
    );
    Ok(())
}
