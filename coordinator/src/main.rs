//! `deeptime`: evolve Life-like patterns to astronomically far generations.
//!
//! `main` turns the outcome into an exit code; each subcommand lives in a
//! module of its own and returns a `Result`.

mod bench;
mod cli;
mod evolve;
mod failure;
mod input;
mod memory;
mod progress;
mod report;

use std::process::ExitCode;

use clap::Parser;

use crate::cli::{Cli, Command};

fn main() -> ExitCode {
    let cli = Cli::parse();
    let outcome = match cli.command {
        Command::Evolve(args) => evolve::run(args),
        Command::Bench(args) => bench::run(args),
    };
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(error) => {
            eprintln!("deeptime: {}", failure::describe(&error));
            ExitCode::from(failure::exit_code(&error))
        }
    }
}
