//! `mnemon bench learner|actor|matmul`: times exactly the work of the PyTorch reference
//! (`scripts/torch_peer.py`, defined in `mnemon_nets::bench`) and prints the same JSON
//! fields (`median_ms` / `median_us`, `gflop_per_s`), so the two can be run side by side
//! (`scripts/bench-vs-torch.sh`) and reported as a ratio.

use anyhow::Context;
use clap::{Args, Subcommand};

use crate::Failure;

/// Arguments of `mnemon bench`.
#[derive(Args)]
pub struct BenchArgs {
    #[command(subcommand)]
    work: BenchWork,
}

#[derive(Subcommand)]
enum BenchWork {
    /// Time one learner step (unroll with burn-in, loss, backward, Adam).
    Learner(LearnerArgs),
    /// Time one actor step over a batch of lanes.
    Actor(ActorArgs),
    /// Measure the matmul peak: a large square product of f32 matrices.
    Matmul(MatmulArgs),
}

/// Options of `mnemon bench matmul`.
#[derive(Args)]
struct MatmulArgs {
    /// Rows = columns = inner size of the product.
    #[arg(long, default_value_t = 1024)]
    size: usize,
    /// Threads of the product.
    #[arg(long, default_value_t = 1)]
    threads: usize,
    /// Timed repetitions (best one reported).
    #[arg(long, default_value_t = 10)]
    reps: usize,
}

/// Options of `mnemon bench learner`.
#[derive(Args)]
struct LearnerArgs {
    /// Sequences per batch.
    #[arg(long, default_value_t = 32)]
    batch: usize,
    /// LSTM width.
    #[arg(long, default_value_t = 128)]
    hidden: usize,
    /// Observation width.
    #[arg(long, default_value_t = mnemon_nets::bench::OBS)]
    obs: usize,
    /// Steps per sequence, burn-in included.
    #[arg(long, default_value_t = mnemon_nets::bench::STEPS)]
    seq: usize,
    /// Burn-in steps (fewer than --seq).
    #[arg(long, default_value_t = mnemon_nets::bench::BURN_IN)]
    burn_in: usize,
    /// Also run the target network's no-grad forward over all steps.
    #[arg(long)]
    target: bool,
    /// Threads for the fused LSTM and the matmuls.
    #[arg(long, default_value_t = 1)]
    threads: usize,
    /// Timed iterations (after 5 untimed).
    #[arg(long, default_value_t = 25)]
    iters: usize,
}

/// Options of `mnemon bench actor`.
#[derive(Args)]
struct ActorArgs {
    /// Lanes stepped together.
    #[arg(long, default_value_t = 1)]
    batch: usize,
    /// LSTM width.
    #[arg(long, default_value_t = 128)]
    hidden: usize,
    /// Threads (the actor path is single-threaded; the value is recorded in the output).
    #[arg(long, default_value_t = 1)]
    threads: usize,
    /// Timed iterations (after 200 untimed).
    #[arg(long, default_value_t = 2000)]
    iters: usize,
}

/// Gives the fused ops (`mnemon_nets::threads`) and gemm's rayon pool `n` threads, and
/// keeps candle's elementwise pool at one. Runs before the first tensor op: the pools
/// read these once.
///
/// candle's pool spin-waits for its helpers: measured with `perf record` on
/// `mnemon bench learner --threads 2` (B = 32, H = 128), 36% of the samples were that
/// wait and its helper thread, for elementwise work that one thread does in a few
/// percent of the step.
fn set_threads(n: usize) {
    let n = n.max(1);
    for (var, value) in [("RAYON_NUM_THREADS", n), ("CANDLE_NUM_THREADS", 1)] {
        // SAFETY: runs on the main thread before any other thread has been started.
        unsafe { std::env::set_var(var, value.to_string()) };
    }
    mnemon_nets::threads::set_threads(n);
}

fn positive(what: &str, v: usize) -> Result<(), Failure> {
    if v == 0 {
        return Err(Failure::BadInput(format!(
            "mnemon bench: --{what} must be at least 1"
        )));
    }
    Ok(())
}

/// Runs `mnemon bench`.
pub fn run_bench(args: BenchArgs) -> Result<(), Failure> {
    let out = match args.work {
        BenchWork::Learner(a) => {
            for (w, v) in [
                ("batch", a.batch),
                ("hidden", a.hidden),
                ("obs", a.obs),
                ("seq", a.seq),
                ("threads", a.threads),
                ("iters", a.iters),
            ] {
                positive(w, v)?;
            }
            if a.burn_in >= a.seq {
                return Err(Failure::BadInput(format!(
                    "mnemon bench: --burn-in ({}) must be less than --seq ({})",
                    a.burn_in, a.seq
                )));
            }
            set_threads(a.threads);
            let size = mnemon_nets::bench::LearnerSize {
                batch: a.batch,
                hidden: a.hidden,
                obs: a.obs,
                steps: a.seq,
                burn_in: a.burn_in,
            };
            let t = mnemon_nets::bench::learner(size, a.target, a.iters)
                .context("learner benchmark")?;
            let gflop = size.matmul_flops() / 1e9;
            serde_json::json!({
                "work": "learner", "impl": "mnemon-fused-lstm", "batch": a.batch, "hidden": a.hidden,
                "obs": a.obs, "seq": a.seq, "burn_in": a.burn_in,
                "target": a.target, "threads": a.threads, "iters": a.iters,
                "median_ms": t.median(), "min_ms": t.min(), "max_ms": t.max(),
                "matmul_gflop": gflop, "gflop_per_s": gflop / (t.median() / 1e3),
            })
        }
        BenchWork::Actor(a) => {
            for (w, v) in [("batch", a.batch), ("hidden", a.hidden), ("iters", a.iters)] {
                positive(w, v)?;
            }
            set_threads(1);
            let t =
                mnemon_nets::bench::actor(a.batch, a.hidden, a.iters).context("actor benchmark")?;
            serde_json::json!({
                "work": "actor", "impl": "mnemon-actor-net", "batch": a.batch, "hidden": a.hidden,
                "threads": a.threads, "iters": a.iters,
                "median_us": t.median(), "min_us": t.min(), "max_us": t.max(), "check": t.check,
            })
        }
        BenchWork::Matmul(a) => {
            for (w, v) in [("size", a.size), ("threads", a.threads), ("reps", a.reps)] {
                positive(w, v)?;
            }
            set_threads(a.threads);
            let g = mnemon_nets::bench::matmul_peak(a.size, a.threads, a.reps);
            serde_json::json!({
                "work": "matmul", "impl": "mnemon-gemm", "size": a.size, "threads": a.threads,
                "reps": a.reps, "gflop_per_s": g,
            })
        }
    };
    println!("{out}");
    Ok(())
}
