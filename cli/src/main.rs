//! `deeptime`: advance Life-like patterns to astronomically far generations.
//!
//! `main` parses the command line, runs the subcommand (one module each;
//! the runs of a job are the coordinator crate's) and turns its outcome
//! into an exit code.

mod bench;
mod cli;
mod failure;
mod fate;
mod inspect;
mod leap;
mod logging;
mod node;
mod snapshot;
mod timeline;
mod timeline_plot;

use std::process::ExitCode;

use clap::Parser;

use deeptime_coordinator::{cluster, memory, run};

use crate::cli::{Cli, Command};

/// The command: parses the command line, runs the subcommand and turns
/// its outcome into an exit code.
fn main() -> ExitCode {
    let cli = Cli::parse();
    // Output piped into `head` and the like: end quietly when the reader
    // goes away, as command-line tools do, rather than fail on a write.
    // Not the cluster's servers: a write to a peer that died must be an
    // error on that connection, never the end of the process.
    #[cfg(unix)]
    if !matches!(cli.command, Command::Coordinator(_) | Command::Node(_)) {
        // SAFETY: restoring the default disposition of SIGPIPE at start-up,
        // before any thread exists, is what a C program starts with.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    memory::return_large_blocks();
    // A bad DEEPTIME_KERNEL is refused before any work, not met mid-run.
    if let Err(message) = deeptime_engine::kernel_instruction_set() {
        eprintln!("deeptime: {message}");
        return ExitCode::from(failure::EXIT_BAD_INPUT);
    }
    let outcome = match cli.command {
        Command::Leap(args) => leap::run(args),
        Command::Run(args) => run::run(args),
        Command::Checkpoints(args) => inspect::list(args),
        Command::Verify(args) => inspect::verify(args),
        Command::Snapshot(args) => snapshot::run(args),
        Command::Prune(args) => inspect::prune(args),
        Command::Bench(args) => bench::run(args),
        Command::Coordinator(args) => {
            logging::init("info");
            cluster::run(args)
        }
        Command::Node(args) => node::run(args),
        Command::Status(args) => cluster::status::run(args),
        Command::Fate(args) => fate::run(args),
        Command::Timeline(args) => timeline::run(args),
    };
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(error) => {
            eprintln!("deeptime: {}", failure::describe(&error));
            ExitCode::from(failure::exit_code(&error))
        }
    }
}
