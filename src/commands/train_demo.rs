//! `mullion train-demo`: retrain the bundled demo checkpoint and rewrite its model card.

use crate::demo::train::{model_card, train, TrainSpec};
use crate::error::{Error, Result};
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct TrainDemoArgs {
    /// Folder to write the checkpoints and the model card into.
    #[arg(long, default_value = "sample-data", value_name = "DIR")]
    pub out: PathBuf,
    /// Optimisation steps.
    #[arg(long, default_value_t = 600)]
    pub steps: usize,
    /// Images per step.
    #[arg(long, default_value_t = 4)]
    pub batch: usize,
    /// Stop after this many minutes even if steps remain.
    #[arg(long, default_value_t = 25.0)]
    pub minutes: f64,
}

pub fn run(args: &TrainDemoArgs) -> Result<()> {
    if !args.out.is_dir() {
        return Err(Error::bad_file(
            &args.out,
            "the output folder does not exist",
        ));
    }
    let spec = TrainSpec {
        steps: args.steps,
        batch: args.batch,
        max_seconds: Some(args.minutes * 60.0),
        ..Default::default()
    };
    let start = std::time::Instant::now();
    let (model, log) = train(&spec, Some(&args.out), |step, loss| {
        if step % 10 == 0 {
            eprintln!(
                "step {step:>4}  loss {loss:.4}  {:.0} s",
                start.elapsed().as_secs_f64()
            );
        }
    })?;
    let card = model_card(&spec, &model, &log, &args.out)?;
    let card_path = args.out.join("MODEL_CARD.md");
    crate::io::write_text_atomic(&card_path, &card)?;
    eprintln!("wrote {}", card_path.display());
    Ok(())
}
