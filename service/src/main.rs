use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    ridgeline::cli::run(ridgeline::cli::Cli::parse())
}
