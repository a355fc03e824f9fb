//! The `mnemon` binary: argument parsing (clap), dispatch to one function per command,
//! and the single place where outcomes become exit codes and messages.
//!
//! Exit codes: 0 ok, 2 bad input (spec, arguments, files), 1 internal failure, 130
//! interrupted (Ctrl-C) with the work saved.

use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod bench;
mod check;
mod compare;
mod explain;
mod export;
mod inspect;
mod tasks;
mod train;

/// Train reinforcement-learning agents with memory on ordinary CPUs.
#[derive(Parser)]
#[command(name = "mnemon", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

/// One variant per command; each arm in `run` calls that command's module.
#[derive(Subcommand)]
enum Command {
    /// Train an agent from a spec (or resume a run).
    Train(train::TrainArgs),
    /// Score a checkpoint over evaluation episodes.
    Eval(train::EvalArgs),
    /// Train variants of a spec over seeds and report which is better, with intervals.
    Compare(compare::CompareArgs),
    /// Validate spec files and print every problem found (exit 2 if any).
    Check(check::CheckArgs),
    /// Print the resolved spec with each value's origin and doc.
    Explain(explain::ExplainArgs),
    /// Write a checkpoint's policy as an ONNX graph of one time step.
    Export(export::ExportArgs),
    /// Show a checkpoint's spec, counters and tensors.
    Inspect(inspect::InspectArgs),
    /// Time the learner or actor step (same work as the PyTorch reference).
    Bench(bench::BenchArgs),
    /// List the built-in tasks; try or benchmark one.
    Tasks(tasks::TasksArgs),
}

/// Dispatch: one short arm per command.
fn run(command: Command) -> Result<(), Failure> {
    match command {
        Command::Train(a) => train::run_train(a),
        Command::Eval(a) => train::run_eval(a),
        Command::Compare(a) => compare::run_compare(a),
        Command::Check(a) => check::run_check(a),
        Command::Explain(a) => explain::run_explain(a),
        Command::Export(a) => export::run_export(a),
        Command::Inspect(a) => inspect::run_inspect(a),
        Command::Bench(a) => bench::run_bench(a),
        Command::Tasks(a) => tasks::run(a),
    }
}

/// How a command failed: bad input (exit 2) or an internal failure (exit 1).
#[derive(Debug)]
pub enum Failure {
    /// The user's spec, arguments or files were wrong; the message says how.
    BadInput(String),
    /// Something inside mnemon failed.
    Internal(anyhow::Error),
    /// The user interrupted (Ctrl-C) after the work was saved; the message is printed.
    Interrupted,
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure::Internal(e)
    }
}

/// Colour in error output only when stderr is a terminal and NO_COLOR is unset.
pub(crate) fn color() -> bool {
    use std::io::IsTerminal;
    std::env::var_os("NO_COLOR").is_none() && std::io::stderr().is_terminal()
}

/// Process-wide set-up before any tensor work.
///
/// Threads: actors and the learner each run on their own OS thread, single-threaded
/// inside, so the tensor libraries' own pools must not add more (measured in
/// PERFORMANCE.md: default pools made 2 threads slower than 1). Users may still set
/// `RAYON_NUM_THREADS` / `CANDLE_NUM_THREADS` themselves.
///
/// Memory: glibc returns large freed blocks to the kernel and faults them back in on the
/// next step (~12% of learner time in PERFORMANCE.md); raising the mmap and trim
/// thresholds keeps the learner's temporaries in the heap.
fn setup_process() {
    for var in ["RAYON_NUM_THREADS", "CANDLE_NUM_THREADS"] {
        if std::env::var_os(var).is_none() {
            // SAFETY: called first thing in main, before any other thread exists.
            unsafe { std::env::set_var(var, "1") };
        }
    }
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: mallopt only tunes allocator thresholds; called before other threads start.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 512 << 20);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 1 << 30);
    }
}

fn main() -> ExitCode {
    setup_process();
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
        Err(Failure::Interrupted) => ExitCode::from(130),
    }
}
