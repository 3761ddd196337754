//! The `mullion` binary: parse, dispatch, map the outcome to an exit status.

use clap::Parser;
use mullion::cli::{self, Cli, Command};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = Cli::parse(); // usage errors exit with status 2
    let result = match &cli.command {
        Some(Command::Features(a)) => cli::features(a),
        Some(Command::Inspect(a)) => cli::inspect(a),
        Some(Command::Bench(a)) => cli::bench(a),
        Some(Command::Summary(a)) => cli::summary(a),
        Some(Command::Figure(a)) => mullion::figure_cli::figure(a),
        Some(Command::Report(a)) => mullion::report_cli::report(a),
        Some(Command::Open(a)) => cli::open(a),
        Some(Command::SampleData(a)) => cli::sample_data(a),
        Some(Command::TrainDemo(a)) => cli::train_demo(a),
        None => cli::demo(),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("mullion: {e}");
            ExitCode::from(1)
        }
    }
}
