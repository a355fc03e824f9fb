//! `mnemon compare`: variants of a spec over seeds, trained (or found finished), then
//! scored with the same evaluation episodes and summarised with honest statistics
//! (`mnemon-report`): a table, `report.md`, `report.json` and two plots.
//!
//! Layout of a comparison folder (`--out`, default `<run.out>/compare/<name>`):
//! ```text
//! plan.json                      the variants, seeds and run folders of the comparison
//! runs/<variant>/seed<k>/        one ordinary run folder per variant and seed
//! report.md, report.json         the statistics
//! curves.svg/.png, scores.svg/.png
//! ```
//! Run folders are ordinary runs: a finished one is reused, an interrupted one is
//! resumed from its last checkpoint, so re-running the same command continues an
//! interrupted comparison. A run folder whose spec differs from the comparison's is
//! never overwritten without `--force`.

use std::collections::BTreeSet;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;

use clap::Args;
use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};
use mnemon_engine::eval::{evaluate, EvalSetup};
use mnemon_engine::rundir::{latest_checkpoint, RunState};
use mnemon_engine::schedule::{self, Job, Watch};
use mnemon_engine::train::{Observer, Progress, Silent, Summary};
use mnemon_report::compare::{build_report, Report, ReportOptions, Threshold};
use mnemon_report::runs::{read_metrics, RunRecord};
use mnemon_spec::{Spec, StopWhen};
use serde_json::json;

use crate::Failure;

/// Compare variants of a spec over seeds.
///
/// Examples:
///   mnemon compare specs/compare-memory.toml
///   mnemon compare specs/tmaze-lstm.toml --vary 'agent.memory={kind="lstm",size=64},{kind="none"}' --seeds 1..3
///   mnemon compare --from runs/compare/compare-memory
#[derive(Args)]
pub struct CompareArgs {
    /// The spec to vary (its `[vary]` axes and seeds, plus --vary and --seeds).
    #[arg(required_unless_present = "from")]
    pub spec: Option<PathBuf>,
    /// An axis: KEY=V1,V2,... with values written as for --set (repeatable; replaces a
    /// `[vary]` axis on the same key).
    #[arg(long = "vary", value_name = "KEY=V1,V2")]
    pub vary: Vec<String>,
    /// Override a spec value for every variant: --set run.budget=50k (repeatable).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
    /// Seeds: a range `1..5` (both ends included) or a list `1,2,7`; replaces `[vary]`
    /// seeds.
    #[arg(long, value_name = "SEEDS")]
    pub seeds: Option<String>,
    /// Trainings run at once (default: as many as the cores hold without
    /// oversubscription: cores / (actors + 1)).
    #[arg(long, value_name = "N")]
    pub parallel: Option<usize>,
    /// The comparison folder (default: <run.out>/compare/<spec name>; with --from, the
    /// one folder given).
    #[arg(long, value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Build the report from finished runs in these folders, without training.
    #[arg(long, value_name = "DIR", num_args = 1.., conflicts_with_all = ["spec", "vary", "seeds", "sets", "parallel"])]
    pub from: Vec<PathBuf>,
    /// The variant the others are compared with (default: the first).
    #[arg(long, value_name = "VARIANT")]
    pub baseline: Option<String>,
    /// Time-to-threshold setting: success=0.9 or return=3.5 (default: the spec's
    /// run.stop, if any).
    #[arg(long, value_name = "success=X|return=X")]
    pub threshold: Option<String>,
    /// Evaluation episodes per final checkpoint (the same episodes for every run).
    #[arg(long, default_value_t = 200)]
    pub episodes: usize,
    /// Seed of the evaluation episodes.
    #[arg(long, default_value_t = 1)]
    pub eval_seed: u64,
    /// Bootstrap resamples for the confidence intervals.
    #[arg(long, default_value_t = 2000)]
    pub resamples: usize,
    /// Retrain run folders whose spec differs, and overwrite an existing report.
    #[arg(long)]
    pub force: bool,
    /// No progress display.
    #[arg(long)]
    pub quiet: bool,
    /// Print the report as JSON on stdout instead of the table.
    #[arg(long)]
    pub json: bool,
}

/// One planned run: a variant at a seed, in its folder.
#[derive(Debug, Clone)]
struct Planned {
    variant: String,
    seed: u64,
    dir: PathBuf,
    spec: Spec,
    spec_toml: String,
}

pub fn run_compare(args: CompareArgs) -> Result<(), Failure> {
    if !args.from.is_empty() {
        return report_from(&args);
    }
    let Some(spec_path) = &args.spec else {
        return Err(Failure::BadInput(
            "mnemon compare: give a spec file, or --from DIR with finished runs".into(),
        ));
    };
    let plan = plan(spec_path, &args)?;
    // Every argument is checked before the first run starts.
    let threshold = threshold_of(&args, &plan[0].spec)?;
    let out = plan_out(&args, &plan)?;
    let stop = crate::train::install_interrupt();
    let started = Instant::now();
    let finished = train_all(&plan, &args, &stop)?;
    if stop.load(Ordering::SeqCst) {
        eprintln!(
            "interrupted: {} of {} runs finished; run the same command again to continue",
            finished,
            plan.len()
        );
        return Err(Failure::Interrupted);
    }
    let runs: Vec<(String, u64, PathBuf, Spec)> = plan
        .iter()
        .map(|p| (p.variant.clone(), p.seed, p.dir.clone(), p.spec.clone()))
        .collect();
    let records = evaluate_all(&runs, &args)?;
    let report = write_report(&records, &out, threshold, &args)?;
    print_report(&report, &out, &args, Some(started.elapsed().as_secs_f64()));
    Ok(())
}

/// Expands the spec into planned runs, one folder each under the comparison folder.
fn plan(spec_path: &Path, args: &CompareArgs) -> Result<Vec<Planned>, Failure> {
    let resolved = mnemon_spec::load(spec_path, &args.sets)
        .map_err(|e| Failure::BadInput(e.render(crate::color())))?;
    for w in &resolved.warnings {
        eprintln!("{w}");
    }
    let mut axes = Vec::new();
    for v in &args.vary {
        axes.push(parse_axis(v)?);
    }
    let seeds = args.seeds.as_deref().map(parse_seeds).transpose()?;
    let expanded = mnemon_spec::expand_with(&resolved, &axes, seeds)
        .map_err(|e| Failure::BadInput(e.render(crate::color())))?;
    let out = args.out.clone().unwrap_or_else(|| {
        Path::new(&resolved.spec.run.out)
            .join("compare")
            .join(&resolved.spec.name)
    });
    let mut used = BTreeSet::new();
    let mut slugs: Vec<(String, String)> = Vec::new();
    let mut plan = Vec::new();
    for (label, spec) in expanded {
        let variant = variant_of(&label, &spec.name);
        let slug = match slugs.iter().find(|(v, _)| *v == variant) {
            Some((_, s)) => s.clone(),
            None => {
                let base = slug(&variant);
                let mut s = base.clone();
                let mut k = 2;
                while !used.insert(s.clone()) {
                    s = format!("{base}-{k}");
                    k += 1;
                }
                slugs.push((variant.clone(), s.clone()));
                s
            }
        };
        let seed = spec.run.seed;
        let dir = out.join("runs").join(slug).join(format!("seed{seed}"));
        let spec_toml = mnemon_spec::to_toml(&spec);
        plan.push(Planned {
            variant,
            seed,
            dir,
            spec,
            spec_toml,
        });
    }
    // One table compares one task: refuse before training rather than after.
    let tasks: BTreeSet<String> = plan.iter().map(|p| task_label(&p.spec)).collect();
    if tasks.len() > 1 {
        return Err(Failure::BadInput(format!(
            "mnemon compare: the variants run different tasks ({}); one comparison table \
             needs one task, so compare each task separately",
            tasks.into_iter().collect::<Vec<_>>().join("; ")
        )));
    }
    Ok(plan)
}

/// The comparison folder: checks runs already there and writes `plan.json`.
fn plan_out(args: &CompareArgs, plan: &[Planned]) -> Result<PathBuf, Failure> {
    let out = plan[0]
        .dir
        .parent()
        .and_then(Path::parent)
        .and_then(Path::parent)
        .map(Path::to_path_buf)
        .unwrap_or_default();
    for p in plan {
        let spec_file = p.dir.join("spec.toml");
        if let Ok(text) = std::fs::read_to_string(&spec_file) {
            if text != p.spec_toml {
                if !args.force {
                    return Err(Failure::BadInput(format!(
                        "{}: this run folder holds a run of a different spec than variant \
                         \"{}\" seed {} of this comparison; use another --out, or --force to \
                         retrain it",
                        p.dir.display(),
                        p.variant,
                        p.seed
                    )));
                }
                std::fs::remove_dir_all(&p.dir).map_err(|e| {
                    Failure::BadInput(format!("{}: cannot remove: {e}", p.dir.display()))
                })?;
            }
        }
    }
    std::fs::create_dir_all(&out)
        .map_err(|e| Failure::BadInput(format!("{}: cannot create: {e}", out.display())))?;
    let entries: Vec<_> = plan
        .iter()
        .map(|p| {
            json!({
                "variant": p.variant,
                "seed": p.seed,
                "run_dir": p.dir.strip_prefix(&out).unwrap_or(&p.dir),
            })
        })
        .collect();
    let text = serde_json::to_string_pretty(&json!({ "runs": entries })).expect("plain JSON");
    let path = out.join("plan.json");
    mnemon_runs::write_atomic(&path, text.as_bytes())
        .map_err(|e| Failure::BadInput(format!("{}: cannot write: {e}", path.display())))?;
    Ok(out)
}

/// The variant part of an expansion label (`agent.memory=lstm/seed=2` ->
/// `agent.memory=lstm`); the spec's name when only seeds vary.
fn variant_of(label: &str, name: &str) -> String {
    let parts: Vec<&str> = label
        .split('/')
        .filter(|p| !p.starts_with("seed=") && *p != "base")
        .collect();
    if parts.is_empty() {
        name.to_string()
    } else {
        parts.join(" ")
    }
}

/// A folder name for a variant label.
fn slug(variant: &str) -> String {
    let s: String = variant
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '.' || c == '_' {
                c
            } else {
                '-'
            }
        })
        .collect();
    let s = s.trim_matches('-').to_string();
    if s.is_empty() {
        "variant".into()
    } else {
        s
    }
}

/// `agent.memory={kind="lstm",size=64},{kind="none"}` -> ("agent.memory", two values).
/// Commas inside braces, brackets or quotes do not split.
fn parse_axis(text: &str) -> Result<(String, Vec<String>), Failure> {
    let Some((key, values)) = text.split_once('=') else {
        return Err(Failure::BadInput(format!(
            "--vary {text}: expected KEY=V1,V2 (for example replay.burn_in=0,10)"
        )));
    };
    let key = key.trim();
    if key.is_empty() {
        return Err(Failure::BadInput(format!(
            "--vary {text}: the key is empty"
        )));
    }
    let mut out = Vec::new();
    let (mut depth, mut quote, mut cur) = (0i32, None::<char>, String::new());
    for c in values.chars() {
        match (quote, c) {
            (Some(q), c) if c == q => quote = None,
            (Some(_), _) => {}
            (None, '"' | '\'') => quote = Some(c),
            (None, '{' | '[') => depth += 1,
            (None, '}' | ']') => depth -= 1,
            (None, ',') if depth == 0 => {
                out.push(std::mem::take(&mut cur).trim().to_string());
                continue;
            }
            _ => {}
        }
        cur.push(c);
    }
    out.push(cur.trim().to_string());
    if depth != 0 || quote.is_some() {
        return Err(Failure::BadInput(format!(
            "--vary {text}: unbalanced braces, brackets or quotes"
        )));
    }
    if out.iter().any(String::is_empty) {
        return Err(Failure::BadInput(format!(
            "--vary {text}: an empty value (values are separated by commas)"
        )));
    }
    Ok((key.to_string(), out))
}

/// `1..5` (inclusive) or `1,2,7`.
fn parse_seeds(text: &str) -> Result<Vec<u64>, Failure> {
    let bad = || {
        Failure::BadInput(format!(
            "--seeds {text}: expected a range like 1..5 (both ends included) or a list like 1,2,7"
        ))
    };
    let seeds: Vec<u64> = if let Some((a, b)) = text.split_once("..") {
        let a: u64 = a.trim().parse().map_err(|_| bad())?;
        let b: u64 = b
            .trim()
            .trim_start_matches('=')
            .parse()
            .map_err(|_| bad())?;
        if b < a || b - a >= 1000 {
            return Err(bad());
        }
        (a..=b).collect()
    } else {
        text.split(',')
            .map(|s| s.trim().parse::<u64>().map_err(|_| bad()))
            .collect::<Result<_, _>>()?
    };
    let distinct: BTreeSet<_> = seeds.iter().collect();
    if seeds.is_empty() || distinct.len() != seeds.len() {
        return Err(bad());
    }
    Ok(seeds)
}

/// The time-to-threshold setting: `--threshold`, else the spec's stop target.
fn threshold_of(args: &CompareArgs, spec: &Spec) -> Result<Option<Threshold>, Failure> {
    Ok(match &args.threshold {
        Some(t) => Some(parse_threshold(t)?),
        None => spec.run.stop.map(|s| match s {
            StopWhen::Success(x) => Threshold::Success(x),
            StopWhen::Return(x) => Threshold::Return(x),
        }),
    })
}

fn parse_threshold(text: &str) -> Result<Threshold, Failure> {
    let bad = || {
        Failure::BadInput(format!(
            "--threshold {text}: expected success=X (0..1) or return=X"
        ))
    };
    let (k, v) = text.split_once('=').ok_or_else(bad)?;
    let v: f64 = v.trim().parse().map_err(|_| bad())?;
    match k.trim() {
        "success" if (0.0..=1.0).contains(&v) => Ok(Threshold::Success(v)),
        "return" if v.is_finite() => Ok(Threshold::Return(v)),
        _ => Err(bad()),
    }
}

/// Trains every planned run that is not finished (`mnemon_engine::schedule`),
/// `--parallel` at a time, with a bar per running run. Returns how many runs are
/// finished.
fn train_all(
    plan: &[Planned],
    args: &CompareArgs,
    stop: &Arc<AtomicBool>,
) -> Result<usize, Failure> {
    let jobs: Vec<Job> = plan
        .iter()
        .map(|p| Job {
            dir: p.dir.clone(),
            spec: p.spec.clone(),
            spec_toml: p.spec_toml.clone(),
        })
        .collect();
    let parallel = args
        .parallel
        .unwrap_or_else(|| schedule::default_parallel(&jobs))
        .max(1);
    let states = schedule::states(&jobs);
    let reused = states.iter().filter(|s| **s == RunState::Done).count();
    let show = !args.quiet && !args.json && std::io::stderr().is_terminal();
    let multi = MultiProgress::with_draw_target(if show {
        ProgressDrawTarget::stderr_with_hz(4)
    } else {
        ProgressDrawTarget::hidden()
    });
    if !args.quiet && !args.json {
        eprintln!(
            "comparing {} runs ({} variants x seeds): {} finished already, {} to train, {} at a time",
            plan.len(),
            plan.iter().map(|p| &p.variant).collect::<BTreeSet<_>>().len(),
            reused,
            plan.len() - reused,
            parallel
        );
    }
    let overall = multi.add(ProgressBar::new(plan.len() as u64));
    overall.set_style(
        ProgressStyle::with_template("runs {pos}/{len} {bar:30} [{elapsed_precise}] {msg}")
            .expect("static template")
            .progress_chars("=> "),
    );
    overall.set_position(reused as u64);
    let watch = Bars {
        plan,
        multi: &multi,
        overall: &overall,
        bars: Mutex::new(vec![None; plan.len()]),
        show,
        chatty: !args.quiet && !args.json,
    };
    let outcome = schedule::train_all(&jobs, &states, parallel, stop, &watch);
    overall.finish_and_clear();
    if !outcome.failures.is_empty() {
        let lines: Vec<String> = outcome
            .failures
            .iter()
            .map(|(i, e)| {
                let p = &plan[*i];
                format!("{} seed {} ({}): {e}", p.variant, p.seed, p.dir.display())
            })
            .collect();
        let text = format!(
            "mnemon compare: {} run(s) failed:\n  {}\nfix the cause and run the same command again: finished runs are kept",
            lines.len(),
            lines.join("\n  ")
        );
        // Bad input (a task that fails, a spec problem) exits 2; a failure inside a
        // run (a non-finite loss) exits 1.
        return Err(if outcome.failures.iter().all(|(_, e)| e.is_input()) {
            Failure::BadInput(text)
        } else {
            Failure::Internal(anyhow::anyhow!(text))
        });
    }
    Ok(outcome.finished)
}

/// The comparison display: a bar per running run above the overall bar.
struct Bars<'a> {
    plan: &'a [Planned],
    multi: &'a MultiProgress,
    overall: &'a ProgressBar,
    bars: Mutex<Vec<Option<ProgressBar>>>,
    /// Bars are drawn (stderr is a terminal).
    show: bool,
    /// Lines are printed when runs finish (no bars, not quiet).
    chatty: bool,
}

impl Watch for Bars<'_> {
    fn started(&self, job: usize) -> Box<dyn Observer + '_> {
        let p = &self.plan[job];
        let bar = self.multi.insert_before(self.overall, ProgressBar::new(0));
        bar.set_style(
            ProgressStyle::with_template("  {prefix:30} {bar:20} {pos}/{len} {msg}")
                .expect("static template")
                .progress_chars("=> "),
        );
        bar.set_prefix(format!("{} seed {}", p.variant, p.seed));
        self.bars.lock().expect("no panics while held")[job] = Some(bar.clone());
        if self.show {
            Box::new(RunBar { bar })
        } else {
            Box::new(Silent)
        }
    }

    fn finished(&self, job: usize, result: &mnemon_engine::Result<Summary>) {
        if let Some(bar) = self.bars.lock().expect("no panics while held")[job].take() {
            bar.finish_and_clear();
            self.multi.remove(&bar);
        }
        let Ok(s) = result else { return };
        if !s.stopped_by.is_final() {
            return;
        }
        self.overall.inc(1);
        if !self.show && self.chatty {
            let p = &self.plan[job];
            eprintln!(
                "  finished {} seed {}: {} env steps, {:.0} s, stopped by {}",
                p.variant, p.seed, s.env_steps, s.seconds, s.stopped_by
            );
        }
    }
}

/// Progress of one run inside the comparison display.
struct RunBar {
    bar: ProgressBar,
}

impl Observer for RunBar {
    fn progress(&mut self, p: &Progress) {
        crate::train::show_budget(&self.bar, p);
        let eval = match p.last_eval {
            Some((r, Some(s))) => format!("greedy {r:.2} / {:.0}%", s * 100.0),
            Some((r, None)) => format!("greedy {r:.2}"),
            None => "no evaluation yet".into(),
        };
        self.bar
            .set_message(format!("{:.0} steps/s | {eval}", p.steps_per_second));
    }
    fn message(&mut self, text: &str) {
        self.bar.println(text);
    }
}

/// Evaluates the final checkpoint of every run with the same episodes and reads its
/// learning curve. Runs without a checkpoint are skipped with a warning.
fn evaluate_all(
    runs: &[(String, u64, PathBuf, Spec)],
    args: &CompareArgs,
) -> Result<Vec<RunRecord>, Failure> {
    let cores = std::thread::available_parallelism().map_or(2, |n| n.get());
    let next = AtomicUsize::new(0);
    let results: Mutex<Vec<(usize, Result<RunRecord, String>)>> = Mutex::new(Vec::new());
    std::thread::scope(|scope| {
        for _ in 0..cores.min(runs.len()) {
            scope.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::SeqCst);
                let Some(run) = runs.get(i) else { break };
                let r = evaluate_run(run, args);
                results.lock().expect("no panics while held").push((i, r));
            });
        }
    });
    let mut results = results.into_inner().expect("no panics while held");
    results.sort_by_key(|(i, _)| *i);
    let mut records = Vec::new();
    for (_, r) in results {
        match r {
            Ok(rec) => records.push(rec),
            Err(warning) => eprintln!("warning: {warning}"),
        }
    }
    if records.is_empty() {
        return Err(Failure::BadInput(
            "mnemon compare: no run with a checkpoint to report on".into(),
        ));
    }
    Ok(records)
}

fn evaluate_run(
    (variant, seed, dir, spec): &(String, u64, PathBuf, Spec),
    args: &CompareArgs,
) -> Result<RunRecord, String> {
    let ckpt = latest_checkpoint(dir)
        .ok_or_else(|| format!("{}: no checkpoint; run skipped", dir.display()))?;
    let loaded = mnemon_engine::learner::load_params(&ckpt)
        .map_err(|e| format!("{}: {e}; run skipped", ckpt.display()))?;
    let setup = EvalSetup {
        episodes: args.episodes,
        seed: args.eval_seed,
        epsilon: 0.0,
        discount: spec.learn.discount,
        max_steps: 0,
    };
    let report = evaluate(&spec.task, &spec.agent, &loaded.params, &setup)
        .map_err(|e| format!("{}: evaluation failed: {e}; run skipped", ckpt.display()))?;
    let metrics_path = dir.join("metrics.jsonl");
    let metrics = read_metrics(&metrics_path).map_err(|e| format!("{e}; run skipped"))?;
    if !metrics.skipped_lines.is_empty() {
        eprintln!(
            "warning: {}: skipped unreadable line(s) {:?} (a run killed mid-write leaves a partial last line)",
            metrics_path.display(),
            metrics.skipped_lines
        );
    }
    let (env_steps, wall_seconds) = match &metrics.end {
        Some(end) => (end.env_steps, end.wall_seconds),
        None => metrics
            .curve
            .last()
            .map_or((0, 0.0), |c| (c.env_steps, c.wall_seconds)),
    };
    Ok(RunRecord {
        variant: variant.clone(),
        seed: *seed,
        task: task_label(spec),
        run_dir: dir.clone(),
        final_return: report.mean_return(),
        final_success: report.success_rate(),
        curve: metrics.curve,
        env_steps,
        wall_seconds,
    })
}

/// A task with its settings (`tmaze length=10 time_limit=0`): runs of one comparison
/// must share it.
fn task_label(spec: &Spec) -> String {
    let mut s = spec.task.kind.clone();
    for (k, v) in &spec.task.settings {
        s.push_str(&format!(" {k}={}", crate::tasks::show(v)));
    }
    s
}

/// Writes report.md, report.json and the plots into `out`.
fn write_report(
    records: &[RunRecord],
    out: &Path,
    threshold: Option<Threshold>,
    args: &CompareArgs,
) -> Result<Report, Failure> {
    let opts = ReportOptions {
        baseline: args.baseline.clone(),
        threshold,
        resamples: args.resamples,
        level: 0.95,
        seed: args.eval_seed,
    };
    let report = build_report(records, &opts)
        .map_err(|e| Failure::BadInput(format!("mnemon compare: {e}")))?;
    let write = |name: &str, bytes: &[u8]| -> Result<(), Failure> {
        let path = out.join(name);
        mnemon_runs::write_atomic(&path, bytes)
            .map_err(|e| Failure::BadInput(format!("{}: cannot write: {e}", path.display())))
    };
    write("report.md", report.to_markdown().as_bytes())?;
    let json = serde_json::to_string_pretty(&report.to_json()).expect("plain JSON");
    write("report.json", json.as_bytes())?;
    let plot_opts = mnemon_report::plot::PlotOptions::default();
    mnemon_report::plot::learning_curves(
        records,
        &out.join("curves.svg"),
        &out.join("curves.png"),
        &plot_opts,
    )
    .map_err(|e| Failure::Internal(anyhow::anyhow!("plotting learning curves: {e}")))?;
    mnemon_report::plot::final_scores(
        &report,
        &out.join("scores.svg"),
        &out.join("scores.png"),
        &plot_opts,
    )
    .map_err(|e| Failure::Internal(anyhow::anyhow!("plotting final scores: {e}")))?;
    Ok(report)
}

fn print_report(report: &Report, out: &Path, args: &CompareArgs, seconds: Option<f64>) {
    if args.json {
        println!("{}", report.to_json());
        return;
    }
    print!("{}", report.to_text_table());
    if !args.quiet {
        if let Some(s) = seconds {
            eprintln!("comparison took {s:.0} s");
        }
        eprintln!(
            "report: {}  plots: {}, {}",
            out.join("report.md").display(),
            out.join("curves.png").display(),
            out.join("scores.png").display()
        );
    }
}

/// `--from`: the report over runs found in the given folders.
fn report_from(args: &CompareArgs) -> Result<(), Failure> {
    let mut runs: Vec<(String, u64, PathBuf, Spec)> = Vec::new();
    for dir in &args.from {
        if !dir.is_dir() {
            return Err(Failure::BadInput(format!(
                "{}: not a folder (--from takes comparison folders, run folders or folders of runs)",
                dir.display()
            )));
        }
        let found = find_runs(dir)?;
        if found.is_empty() {
            return Err(Failure::BadInput(format!(
                "{}: no runs found (a run folder holds spec.toml and metrics.jsonl)",
                dir.display()
            )));
        }
        runs.extend(found);
    }
    let out = match (&args.out, args.from.as_slice()) {
        (Some(o), _) => o.clone(),
        (None, [one]) => one.clone(),
        (None, _) => return Err(Failure::BadInput(
            "mnemon compare --from with several folders: say where the report goes with --out DIR"
                .into(),
        )),
    };
    if out.join("report.md").exists() && !args.force && !is_comparison(&out) {
        return Err(Failure::BadInput(format!(
            "{}: a report is there already; use --force to overwrite it or --out elsewhere",
            out.join("report.md").display()
        )));
    }
    std::fs::create_dir_all(&out)
        .map_err(|e| Failure::BadInput(format!("{}: cannot create: {e}", out.display())))?;
    let threshold = threshold_of(args, &runs[0].3)?;
    let records = evaluate_all(&runs, args)?;
    let report = write_report(&records, &out, threshold, args)?;
    print_report(&report, &out, args, None);
    Ok(())
}

/// A folder made by `mnemon compare` (its report is its own to refresh).
fn is_comparison(dir: &Path) -> bool {
    dir.join("plan.json").is_file()
}

/// Runs under `dir`: a comparison folder (by its plan), a run folder, or folders of
/// runs (searched three levels deep). Runs outside a plan are named by their parent
/// folder (`runs/<name>/seed1-001` from train, `runs/<variant>/seed1` from compare).
fn find_runs(dir: &Path) -> Result<Vec<(String, u64, PathBuf, Spec)>, Failure> {
    if is_comparison(dir) {
        let path = dir.join("plan.json");
        let text = std::fs::read_to_string(&path)
            .map_err(|e| Failure::BadInput(format!("{}: {e}", path.display())))?;
        let plan: serde_json::Value = serde_json::from_str(&text).map_err(|e| {
            Failure::BadInput(format!("{}: not a comparison plan: {e}", path.display()))
        })?;
        let mut out = Vec::new();
        for entry in plan["runs"].as_array().into_iter().flatten() {
            let (Some(variant), Some(rel)) = (entry["variant"].as_str(), entry["run_dir"].as_str())
            else {
                return Err(Failure::BadInput(format!(
                    "{}: an entry lacks variant or run_dir",
                    path.display()
                )));
            };
            let run_dir = dir.join(rel);
            match read_run_spec(&run_dir) {
                Ok(spec) => out.push((variant.to_string(), spec.run.seed, run_dir, spec)),
                Err(w) => eprintln!("warning: {w}"),
            }
        }
        return Ok(out);
    }
    let mut out = Vec::new();
    collect_runs(dir, 3, &mut out);
    out.sort_by(|a, b| a.2.cmp(&b.2));
    Ok(out)
}

fn collect_runs(dir: &Path, depth: usize, out: &mut Vec<(String, u64, PathBuf, Spec)>) {
    if dir.join("spec.toml").is_file() && dir.join("metrics.jsonl").is_file() {
        match read_run_spec(dir) {
            Ok(spec) => {
                // Both `runs/<name>/seed1-001` (train) and `runs/<variant>/seed1`
                // (compare) keep one variant per parent folder.
                let variant = dir
                    .canonicalize()
                    .ok()
                    .and_then(|d| {
                        d.parent()
                            .and_then(|p| p.file_name())
                            .map(|n| n.to_string_lossy().into_owned())
                    })
                    .unwrap_or_else(|| spec.name.clone());
                out.push((variant, spec.run.seed, dir.to_path_buf(), spec))
            }
            Err(w) => eprintln!("warning: {w}"),
        }
        return;
    }
    if depth == 0 {
        return;
    }
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    let mut dirs: Vec<PathBuf> = entries
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .filter(|p| p.is_dir())
        .collect();
    dirs.sort();
    for d in dirs {
        collect_runs(&d, depth - 1, out);
    }
}

fn read_run_spec(dir: &Path) -> Result<Spec, String> {
    let path = dir.join("spec.toml");
    let text = std::fs::read_to_string(&path)
        .map_err(|e| format!("{}: {e}; run skipped", path.display()))?;
    mnemon_spec::load_str(&text, &path.display().to_string(), &[])
        .map(|r| r.spec)
        .map_err(|e| format!("{}; run skipped", e.render(false)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn axes_split_on_top_level_commas_only() {
        let (k, v) = parse_axis(r#"agent.memory={kind="lstm",size=64},{kind="none"}"#).unwrap();
        assert_eq!(k, "agent.memory");
        assert_eq!(v, vec![r#"{kind="lstm",size=64}"#, r#"{kind="none"}"#]);
        let (_, v) = parse_axis("agent.torso.layers=[32,32],[64]").unwrap();
        assert_eq!(v, vec!["[32,32]", "[64]"]);
        let (_, v) = parse_axis(r#"replay.start_state="zero","stored""#).unwrap();
        assert_eq!(v.len(), 2);
        assert!(parse_axis("replay.burn_in").is_err());
        assert!(parse_axis("agent.memory={kind=\"lstm\"").is_err());
        assert!(parse_axis("replay.burn_in=1,,2").is_err());
    }

    #[test]
    fn seeds_are_ranges_or_lists() {
        assert_eq!(parse_seeds("1..5").unwrap(), vec![1, 2, 3, 4, 5]);
        assert_eq!(parse_seeds("3,1,7").unwrap(), vec![3, 1, 7]);
        assert!(parse_seeds("5..1").is_err());
        assert!(parse_seeds("1,1").is_err());
        assert!(parse_seeds("x").is_err());
    }

    #[test]
    fn variants_drop_the_seed_and_slugs_are_folder_safe() {
        assert_eq!(
            variant_of("agent.memory=lstm/seed=2", "n"),
            "agent.memory=lstm"
        );
        assert_eq!(variant_of("seed=2", "tmaze"), "tmaze");
        assert_eq!(variant_of("base", "tmaze"), "tmaze");
        assert_eq!(
            slug("agent.memory=lstm replay.burn_in=5"),
            "agent.memory-lstm-replay.burn_in-5"
        );
        assert!(matches!(parse_threshold("success=0.9"), Ok(Threshold::Success(x)) if x == 0.9));
        assert!(parse_threshold("success=2").is_err());
        assert!(parse_threshold("speed=1").is_err());
    }
}
