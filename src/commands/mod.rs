//! The command line: one file per subcommand, each with its arguments and a `run` that turns
//! them into the library's typed options and calls it. The only module that knows clap.
//!
//! Exit status: 0 done, 1 runtime failure (the message names the file and the problem), 2 bad
//! usage (clap's own errors, and arguments that parse but do not fit).

pub mod attention;
pub mod bench;
pub mod compare;
pub mod features;
pub mod figure;
pub mod inspect;
pub mod merge;
pub mod options;
pub mod padding;
pub mod report;
pub mod sample_data;
pub mod summary;
pub mod train_demo;
pub mod window;

use crate::error::{Error, Result};
use clap::{Parser, Subcommand};

#[derive(Parser, Debug)]
#[command(
    name = "mullion",
    version,
    about = "See what each stage of a shifted-window vision transformer backbone responds to, on your own images, on the CPU."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Option<Command>,
    /// Threads for the forward pass [default: $MULLION_THREADS, else every core].
    #[arg(long, global = true, value_parser = options::parse_threads, value_name = "N")]
    pub threads: Option<usize>,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Write the patch embedding and every stage's output of one image to a safetensors file.
    Features(features::FeaturesArgs),
    /// Print how a checkpoint loads: layout, shape, parameters, tensors used and ignored.
    Inspect(inspect::InspectArgs),
    /// Time forward passes of a published model size with random weights.
    Bench(bench::BenchArgs),
    /// Run a checkpoint on one image and print a per-stage summary.
    Summary(summary::SummaryArgs),
    /// Save the stage-by-stage figure of one image (and, if asked, per-stage statistics).
    Figure(figure::FigureArgs),
    /// Tabulate, per labelled region of a folder of images, how each stage responds inside it.
    Report(report::ReportArgs),
    /// Compare two checkpoints on the same images: CKA and cosine per stage, weight drift.
    Compare(compare::CompareArgs),
    /// Measure how one image's features depend on padding and window seams: padding sweep,
    /// pad-order disagreement, attention on padding, profiles, size advice.
    Padding(padding::PaddingArgs),
    /// Write one block's attention weights of one image (per window and head) with the grid
    /// position of every window token.
    Attention(attention::AttentionArgs),
    /// Join the shard folders of a split report or comparison (--shard K/N) into one.
    Merge(merge::MergeArgs),
    /// Open the window on the given images or folders.
    Open(window::OpenArgs),
    /// Regenerate the synthetic demo images (seedling trays), their cell labels and region files.
    SampleData(sample_data::SampleDataArgs),
    /// Train the bundled demo checkpoint on generated seedling-tray images (about 11 minutes
    /// on 2 cores: the bundled run took 637 s); writes demo.safetensors,
    /// demo-early.safetensors and MODEL_CARD.md.
    TrainDemo(train_demo::TrainDemoArgs),
}

/// Run the parsed command line (no subcommand: the window on the bundled demo).
pub fn run(cli: &Cli) -> Result<()> {
    crate::engine::kernels::use_threads(cli.threads)?;
    match &cli.command {
        Some(Command::Features(a)) => features::run(a),
        Some(Command::Inspect(a)) => inspect::run(a),
        Some(Command::Bench(a)) => bench::run(a),
        Some(Command::Summary(a)) => summary::run(a),
        Some(Command::Figure(a)) => figure::run(a),
        Some(Command::Report(a)) => report::run(a),
        Some(Command::Compare(a)) => compare::run(a),
        Some(Command::Padding(a)) => padding::run(a),
        Some(Command::Attention(a)) => attention::run(a),
        Some(Command::Merge(a)) => merge::run(a),
        Some(Command::Open(a)) => window::open(a),
        Some(Command::SampleData(a)) => sample_data::run(a),
        Some(Command::TrainDemo(a)) => train_demo::run(a),
        None => window::demo(),
    }
}

/// The exit status of a failed run: 2 when the user's arguments are at fault, otherwise 1.
pub fn exit_status(e: &Error) -> u8 {
    match e {
        Error::BadArgument(_) => 2,
        _ => 1,
    }
}
