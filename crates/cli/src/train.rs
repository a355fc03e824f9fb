//! `mnemon train` and `mnemon eval`: load the spec, run the engine, draw progress.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use clap::Args;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use mnemon_engine::eval::{evaluate, EvalSetup};
use mnemon_engine::train::{train, Observer, Progress, Silent, StopReason, Summary, TrainOptions};
use mnemon_spec::Spec;
use serde_json::json;

use crate::Failure;

/// Train an agent from a spec.
///
/// Examples:
///   mnemon train specs/tmaze-lstm.toml
///   mnemon train specs/tmaze-lstm.toml --set run.seed=3 --set replay.burn_in=20
///   mnemon train --resume runs/tmaze-lstm/seed1-001
#[derive(Args)]
pub struct TrainArgs {
    /// The spec file (not needed with --resume, which reads the run's own spec).
    pub spec: Option<PathBuf>,
    /// Override a spec value: --set replay.burn_in=20 (repeatable).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
    /// Continue the run in this folder from its last checkpoint.
    #[arg(long, value_name = "RUN_DIR")]
    pub resume: Option<PathBuf>,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
    /// Print the final summary as one JSON object on stdout.
    #[arg(long)]
    pub json: bool,
}

/// Score a checkpoint.
///
/// Examples:
///   mnemon eval runs/tmaze-lstm/seed1-001
///   mnemon eval runs/tmaze-lstm/seed1-001/checkpoints/step-0000020000.safetensors --episodes 500 --json
#[derive(Args)]
pub struct EvalArgs {
    /// A checkpoint file, or a run folder (its newest checkpoint is used).
    pub target: PathBuf,
    /// Episodes to play.
    #[arg(long, default_value_t = 200)]
    pub episodes: usize,
    /// Seed of the evaluation episodes.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Exploration rate during evaluation (0 = greedy).
    #[arg(long, default_value_t = 0.0)]
    pub epsilon: f64,
    /// Evaluate on another task kind with the same spaces (e.g. a longer corridor via
    /// --set task.length=20).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
    /// Print one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
}

pub(crate) fn load_spec(path: &Path, sets: &[String]) -> Result<(Spec, String), Failure> {
    match mnemon_spec::load(path, sets) {
        Ok(r) => {
            for w in &r.warnings {
                eprintln!("{w}");
            }
            let text = mnemon_spec::to_toml(&r.spec);
            Ok((r.spec, text))
        }
        Err(errors) => Err(Failure::BadInput(errors.render(crate::color()))),
    }
}

pub(crate) fn load_spec_text(
    text: &str,
    name: &str,
    sets: &[String],
) -> Result<(Spec, String), Failure> {
    match mnemon_spec::load_str(text, name, sets) {
        Ok(r) => {
            let text = mnemon_spec::to_toml(&r.spec);
            Ok((r.spec, text))
        }
        Err(errors) => Err(Failure::BadInput(errors.render(crate::color()))),
    }
}

struct Bar {
    bar: ProgressBar,
}

/// Sets a bar's length and position from the run's budget: env steps, or seconds.
pub(crate) fn show_budget(bar: &ProgressBar, p: &Progress) {
    if let Some(n) = p.budget_steps {
        bar.set_length(n);
        bar.set_position(p.env_steps.min(n));
    } else if let Some(s) = p.budget_seconds {
        bar.set_length(s as u64);
        bar.set_position((p.elapsed as u64).min(s as u64));
    }
}

impl Observer for Bar {
    fn progress(&mut self, p: &Progress) {
        show_budget(&self.bar, p);
        let recent = match (p.recent_return, p.recent_success) {
            (Some(r), Some(s)) => format!("return {r:.2} success {:.0}%", s * 100.0),
            (Some(r), None) => format!("return {r:.2}"),
            _ => "no episode yet".into(),
        };
        let eval = match p.last_eval {
            Some((r, Some(s))) => format!(" | greedy {r:.2} / {:.0}%", s * 100.0),
            Some((r, None)) => format!(" | greedy {r:.2}"),
            None => String::new(),
        };
        self.bar.set_message(format!(
            "{:.0} steps/s | {recent}{eval} | {} updates | replay {:.0}%",
            p.steps_per_second,
            p.learner_steps,
            p.replay_fill * 100.0
        ));
    }
    fn message(&mut self, text: &str) {
        self.bar.println(text);
    }
}

pub fn run_train(args: TrainArgs) -> Result<(), Failure> {
    let (spec, spec_toml) = train_spec(&args)?;
    let options = TrainOptions {
        resume: args.resume.clone(),
        stop: install_interrupt(),
        spec_toml,
        run_dir: None,
    };
    let summary = if args.quiet || args.json {
        train(&spec, options, &mut Silent)
    } else {
        train_with_bar(&spec, options)
    }
    .map_err(engine_failure)?;
    if args.json {
        println!("{}", summary_json(&summary));
    } else if !args.quiet {
        print_summary(&summary);
    }
    if summary.stopped_by == StopReason::Interrupt {
        if !args.json {
            eprintln!(
                "interrupted; the run continues with: mnemon train --resume {}",
                summary.run_dir.display()
            );
        }
        return Err(Failure::Interrupted);
    }
    Ok(())
}

/// The spec to train: the run's own (with `--set`s) for `--resume`, else the file's.
fn train_spec(args: &TrainArgs) -> Result<(Spec, String), Failure> {
    match (&args.resume, &args.spec) {
        (Some(dir), _) => {
            let path = dir.join("spec.toml");
            let text = std::fs::read_to_string(&path).map_err(|e| {
                Failure::BadInput(format!(
                    "{}: cannot read the run's spec: {e}",
                    path.display()
                ))
            })?;
            load_spec_text(&text, &path.display().to_string(), &args.sets)
        }
        (None, Some(path)) => load_spec(path, &args.sets),
        (None, None) => Err(Failure::BadInput(
            "mnemon train: give a spec file, or --resume RUN_DIR".into(),
        )),
    }
}

/// A flag that the first Ctrl-C sets (the run stops after its round with a final
/// checkpoint); a second Ctrl-C exits at once with 130.
pub(crate) fn install_interrupt() -> Arc<AtomicBool> {
    let stop = Arc::new(AtomicBool::new(false));
    let flag = stop.clone();
    let _ = ctrlc::set_handler(move || {
        if flag.swap(true, Ordering::SeqCst) {
            std::process::exit(130);
        }
    });
    stop
}

fn train_with_bar(spec: &Spec, options: TrainOptions) -> mnemon_engine::Result<Summary> {
    let bar = ProgressBar::with_draw_target(Some(0), ProgressDrawTarget::stderr_with_hz(4));
    bar.set_style(
        ProgressStyle::with_template(
            "{spinner} [{elapsed_precise}] {bar:30} {pos}/{len} {msg} (eta {eta})",
        )
        .expect("static template")
        .progress_chars("=> "),
    );
    bar.enable_steady_tick(Duration::from_millis(250));
    eprintln!("training {} on {} ...", spec.name, spec.task.kind);
    let mut observer = Bar { bar: bar.clone() };
    let r = train(spec, options, &mut observer);
    bar.finish_and_clear();
    r
}

/// `--json`: the summary as one object.
fn summary_json(summary: &Summary) -> serde_json::Value {
    let eval = summary.last_eval.as_ref();
    json!({
        "run_dir": summary.run_dir,
        "checkpoint": summary.checkpoint,
        "env_steps": summary.env_steps,
        "learner_steps": summary.learner_steps,
        "seconds": summary.seconds,
        "stopped_by": summary.stopped_by,
        "target_reached_at": summary.target_reached_at,
        "eval_return": eval.map(|e| e.mean_return()),
        "eval_success_rate": eval.and_then(|e| e.success_rate()),
        "phases": summary.phases,
    })
}

fn print_summary(summary: &Summary) {
    let ph = &summary.phases;
    eprintln!(
        "stopped by {} after {} env steps, {} updates, {:.1} s",
        summary.stopped_by, summary.env_steps, summary.learner_steps, summary.seconds
    );
    if let Some(e) = &summary.last_eval {
        match e.success_rate() {
            Some(s) => eprintln!(
                "last greedy evaluation: return {:.3}, success {:.1}%",
                e.mean_return(),
                s * 100.0
            ),
            None => eprintln!("last greedy evaluation: return {:.3}", e.mean_return()),
        }
    }
    eprintln!(
        "time by phase (s): acting {:.1}, learning {:.1}, replay {:.1}, evaluation {:.1}, checkpoints {:.1}; waiting for learner {:.1}, for actors {:.1}",
        ph.acting, ph.learning, ph.replay, ph.evaluation, ph.checkpoints, ph.waiting_for_learner, ph.waiting_for_actors
    );
    eprintln!("checkpoint: {}", summary.checkpoint.display());
}

/// Bad input (spec, task, files, checkpoints) exits 2; anything else 1.
pub(crate) fn engine_failure(e: mnemon_engine::Error) -> Failure {
    if e.is_input() {
        Failure::BadInput(format!("mnemon: {e}"))
    } else {
        Failure::Internal(anyhow::anyhow!("{e}"))
    }
}

/// The checkpoint a CHECKPOINT_OR_RUN_DIR argument names: the file itself, or the latest
/// checkpoint of a run folder (`command` prefixes the error).
pub(crate) fn checkpoint_of(target: &Path, command: &str) -> Result<PathBuf, Failure> {
    if !target.is_dir() {
        return Ok(target.to_path_buf());
    }
    mnemon_engine::rundir::latest_checkpoint(target).ok_or_else(|| {
        Failure::BadInput(format!(
            "{command}: {}: no checkpoint in this run folder (expected checkpoints/step-N.safetensors)",
            target.display()
        ))
    })
}

pub fn run_eval(args: EvalArgs) -> Result<(), Failure> {
    let ckpt = checkpoint_of(&args.target, "mnemon eval")?;
    let loaded = mnemon_engine::learner::load_params(&ckpt).map_err(engine_failure)?;
    let (spec, _) = load_spec_text(&loaded.spec_toml, &ckpt.display().to_string(), &args.sets)?;
    let setup = EvalSetup {
        episodes: args.episodes,
        seed: args.seed,
        epsilon: args.epsilon,
        discount: spec.learn.discount,
        max_steps: 0,
    };
    mnemon_engine::learner::check_task_fits(&spec, &loaded.params).map_err(engine_failure)?;
    let report =
        evaluate(&spec.task, &spec.agent, &loaded.params, &setup).map_err(engine_failure)?;
    let (lo, hi) = report.ci95();
    let optimum = report.optimum;
    if args.json {
        println!(
            "{}",
            json!({
                "checkpoint": ckpt,
                "task": spec.task.kind,
                "episodes": report.episodes,
                "mean_return": report.mean_return(),
                "ci95": [lo, hi],
                "mean_discounted_return": report.mean_discounted(),
                "success_rate": report.success_rate(),
                "mean_length": report.mean_length(),
                "optimum_discounted_return": optimum.map(|o| o.value),
                "seed": args.seed,
                "epsilon": args.epsilon,
            })
        );
    } else {
        println!("checkpoint   {}", ckpt.display());
        println!(
            "task         {} ({} episodes, seed {}, epsilon {})",
            spec.task.kind, report.episodes, args.seed, args.epsilon
        );
        println!(
            "mean return  {:.4}  (95% CI {:.4} .. {:.4})",
            report.mean_return(),
            lo,
            hi
        );
        println!(
            "discounted   {:.4}  (discount {})",
            report.mean_discounted(),
            spec.learn.discount
        );
        if let Some(opt) = optimum {
            println!(
                "optimum      {:.4}  ({}; the agent reaches {:.1}% of it)",
                opt.value,
                opt.method,
                100.0 * report.mean_discounted() / opt.value
            );
        }
        if let Some(s) = report.success_rate() {
            println!("success      {:.1}%", s * 100.0);
        }
        println!("length       {:.1} steps", report.mean_length());
    }
    Ok(())
}
