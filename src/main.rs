//! The `mullion` binary: parse, dispatch, map the outcome to an exit status.

use clap::Parser;
use mullion::commands::{self, Cli};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = Cli::parse(); // usage errors exit with status 2
    match commands::run(&cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("mullion: {e}");
            ExitCode::from(commands::exit_status(&e))
        }
    }
}
