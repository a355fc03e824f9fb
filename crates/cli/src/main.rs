//! The `mnemon` binary: argument parsing (clap), dispatch to one function per command,
//! and the single place where outcomes become exit codes and messages.
//!
//! Exit codes: 0 ok, 2 bad input (spec, arguments, files), 1 internal failure.

use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// Train reinforcement-learning agents with memory on ordinary CPUs.
#[derive(Parser)]
#[command(name = "mnemon", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

/// One variant per command; each arm in `run` calls that command's module.
#[derive(Subcommand)]
enum Command {}

/// Dispatch: one short arm per command.
fn run(command: Command) -> Result<(), Failure> {
    match command {}
}

/// How a command failed: bad input (exit 2) or an internal failure (exit 1).
#[derive(Debug)]
pub enum Failure {
    /// The user's spec, arguments or files were wrong; the message says how.
    BadInput(String),
    /// Something inside mnemon failed.
    Internal(anyhow::Error),
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure::Internal(e)
    }
}

fn main() -> ExitCode {
    // clap exits with 2 on usage errors by itself.
    let cli = Cli::parse();
    match run(cli.command) {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::BadInput(msg)) => {
            eprintln!("{msg}");
            ExitCode::from(2)
        }
        Err(Failure::Internal(e)) => {
            eprintln!("mnemon: internal error: {e:#}");
            ExitCode::from(1)
        }
    }
}
