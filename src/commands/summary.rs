//! `mullion summary`: the load report and per-stage numbers of one forward pass, on the terminal.

use super::options::RunArgs;
use crate::engine::{Session, StageOutputs};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct SummaryArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
}

/// Per-stage numbers of one forward pass.
pub fn print_summary(out: &StageOutputs) -> Result<()> {
    let g = &out.geometry;
    println!(
        "input {}x{} pixels, padded to {}x{} for patch {}",
        g.image.1, g.image.0, g.input_padded.1, g.input_padded.0, g.patch
    );
    println!("stage  tokens   channels  window  shift  padded   mean |x|   max |x|");
    for (s, t) in g.stages.iter().zip(&out.stages) {
        // Every stage has at least one block (the configuration is checked at load), but a
        // geometry without one prints dashes rather than failing.
        let b = s.blocks.get(1).or(s.blocks.first());
        let (window, shift) = match b {
            Some(b) => (
                format!("{:>2}x{:<2}", b.window().1, b.window().0),
                format!("{}x{}", b.shift().1, b.shift().0),
            ),
            None => ("  -  ".into(), "-".into()),
        };
        let norms = t.sqr()?.sum_keepdim(2)?.sqrt()?;
        let mean = norms.mean_all()?.to_scalar::<f32>()?;
        let max = norms.flatten_all()?.max(0)?.to_scalar::<f32>()?;
        println!(
            "{:>5}  {:>3}x{:<3}  {:>8}  {window}   {shift}    {:>3}x{:<3}  {:>9.3}  {:>8.3}",
            s.index,
            s.grid.1,
            s.grid.0,
            t.dim(2)?,
            s.padded().1,
            s.padded().0,
            mean,
            max
        );
    }
    Ok(())
}

pub fn run(args: &SummaryArgs) -> Result<()> {
    let session = Session::open(&args.run.session_options()?)?;
    print!("{}", session.report);
    let header = crate::engine::input::read_header(&args.image)?;
    if let Some(bytes) = session.estimate_run_bytes(&header) {
        println!(
            "memory       about {:.3} GB at the peak for this {}x{} image (estimate)",
            bytes as f64 / 1e9,
            header.width,
            header.height
        );
    }
    let out = session.run_image(&args.image, false, false)?;
    print_summary(&out)
}
