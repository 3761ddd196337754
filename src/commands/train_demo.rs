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
    /// Optimisation steps (1 to 1000000).
    #[arg(long, default_value_t = 600, value_parser = parse_steps)]
    pub steps: usize,
    /// Images per step (1 to 256).
    #[arg(long, default_value_t = 4, value_parser = parse_batch)]
    pub batch: usize,
    /// Stop after this many minutes even if steps remain (above 0, at most 10000).
    #[arg(long, default_value_t = 25.0, value_parser = parse_minutes)]
    pub minutes: f64,
}

fn whole_in(s: &str, max: usize, what: &str) -> std::result::Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(v) if (1..=max).contains(&v) => Ok(v),
        _ => Err(format!("'{s}': {what} is a whole number from 1 to {max}")),
    }
}

fn parse_steps(s: &str) -> std::result::Result<usize, String> {
    whole_in(s, 1_000_000, "the number of steps")
}

fn parse_batch(s: &str) -> std::result::Result<usize, String> {
    whole_in(s, 256, "the batch")
}

fn parse_minutes(s: &str) -> std::result::Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 && v <= 10_000.0 => Ok(v),
        _ => Err(format!(
            "'{s}': the minutes are a number above 0, at most 10000"
        )),
    }
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
