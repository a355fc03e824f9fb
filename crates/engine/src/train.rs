//! The training loop: rounds of acting and learning, evaluation, checkpoints, metrics,
//! stop conditions and resume.
//!
//! One round: every actor thread steps its lanes `acting.round` env steps with the
//! parameters of the previous round while the learner thread inserts the previous
//! round's sequences and trains until it has sampled `replay_ratio` transitions per
//! inserted transition. Then the coordinator (`Run`, on the calling thread) collects
//! both, publishes the new parameters, records, evaluates and checkpoints when due.
//! Actors wait for a slow learner and the learner for slow actors, so the ratio the
//! spec asks for holds on any machine and a seed reproduces a run.
//!
//! The threads and their messages live in `workers.rs`; this module holds the
//! coordinator's phases.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread;
use std::time::Instant;

use mnemon_envs::{EpisodeSummary, Lanes};
use mnemon_nets::{NetShape, Params};
use mnemon_runs::{EndRecord, EvalRecord, Record, TrainRecord};
use mnemon_spec::{Budget, Spec, StopWhen};

use crate::error::{Error, Result};
use crate::eval::{evaluate, EvalReport, EvalSetup};
use crate::learner::{CheckpointMeta, LearnStats, Learner};
use crate::rundir::{latest_checkpoint, RunDir};
use crate::seeds;
use crate::sequence::Sequence;
use crate::workers::Workers;

pub use mnemon_runs::{Phases, StopReason};

/// What the caller sees while a run goes on (the binary draws a progress bar from it).
#[derive(Debug, Clone, Default)]
pub struct Progress {
    /// Env steps so far.
    pub env_steps: u64,
    /// Budget in env steps, when the budget is steps.
    pub budget_steps: Option<u64>,
    /// Budget in seconds, when the budget is time.
    pub budget_seconds: Option<f64>,
    /// Seconds since the run (or resume) started.
    pub elapsed: f64,
    /// Learner updates so far.
    pub learner_steps: u64,
    /// Env steps per second over the last round.
    pub steps_per_second: f64,
    /// Mean return of recent training episodes.
    pub recent_return: Option<f64>,
    /// Success rate of recent training episodes.
    pub recent_success: Option<f64>,
    /// Replay fill (0..1).
    pub replay_fill: f64,
    /// The latest greedy evaluation: (mean return, success rate).
    pub last_eval: Option<(f64, Option<f64>)>,
}

/// Receives progress; the binary implements it with a progress bar.
pub trait Observer {
    /// Called after every round.
    fn progress(&mut self, p: &Progress);
    /// Called with every message worth showing (an outside task's stderr line, ...).
    fn message(&mut self, text: &str);
}

/// An observer that ignores everything (`--quiet`).
pub struct Silent;
impl Observer for Silent {
    fn progress(&mut self, _: &Progress) {}
    fn message(&mut self, _: &str) {}
}

/// Where a finished run stands.
#[derive(Debug, Clone)]
pub struct Summary {
    /// The run folder.
    pub run_dir: PathBuf,
    /// The final checkpoint.
    pub checkpoint: PathBuf,
    /// Env steps.
    pub env_steps: u64,
    /// Learner updates.
    pub learner_steps: u64,
    /// Wall seconds of this process's part of the run.
    pub seconds: f64,
    /// Why it stopped.
    pub stopped_by: StopReason,
    /// The last evaluation, if any.
    pub last_eval: Option<EvalReport>,
    /// Seconds spent per phase.
    pub phases: Phases,
    /// Env steps at which the stop target was first reached.
    pub target_reached_at: Option<u64>,
}

/// Options of one training call.
pub struct TrainOptions {
    /// Resume this run folder instead of starting a new one.
    pub resume: Option<PathBuf>,
    /// Set to true (e.g. from a Ctrl-C handler) to stop after the current round with a
    /// final checkpoint.
    pub stop: Arc<AtomicBool>,
    /// The spec's text as resolved TOML (stored in the run folder and checkpoints).
    pub spec_toml: String,
    /// Start the run in exactly this folder (which must not hold a run yet) instead of
    /// a fresh `<run.out>/<name>/seed<seed>-<n>` (`mnemon compare` names its own).
    pub run_dir: Option<PathBuf>,
}

/// Trains `spec` to its budget (or its stop target), writing a run folder under
/// `spec.run.out`. Returns where the run ended.
pub fn train(spec: &Spec, options: TrainOptions, observer: &mut dyn Observer) -> Result<Summary> {
    let started = Instant::now();
    let shape = task_shape(spec)?;
    let (dir, mut learner, counters) = open_run(spec, &options, shape)?;
    let mut run = Run::new(spec, &options, dir, counters, learner.params(), started);
    let stopped_by = thread::scope(|scope| {
        let workers = Workers::spawn(
            scope,
            spec,
            shape,
            run.counters.rounds,
            &run.params,
            &mut learner,
        )?;
        run.rounds(&workers, observer)
    })?;
    run.end(stopped_by)
}

/// The network's task-side shape, read from one copy of the task.
fn task_shape(spec: &Spec) -> Result<NetShape> {
    let one_lane = Lanes::new(&spec.task, 1, spec.run.seed)?;
    Ok(crate::learner::net_shape(one_lane.task()))
}

/// The run folder, learner and counters: fresh, or from the folder's last checkpoint.
fn open_run(
    spec: &Spec,
    options: &TrainOptions,
    shape: NetShape,
) -> Result<(RunDir, Learner, Counters)> {
    let Some(dir) = &options.resume else {
        let run = match &options.run_dir {
            Some(dir) => RunDir::create_at(dir.clone(), &options.spec_toml)?,
            None => RunDir::create(
                Path::new(&spec.run.out),
                &spec.name,
                spec.run.seed,
                &options.spec_toml,
            )?,
        };
        return Ok((run, Learner::new(spec, shape)?, Counters::default()));
    };
    let ckpt = latest_checkpoint(dir)
        .ok_or_else(|| Error::Input(format!("{}: no checkpoint to resume from", dir.display())))?;
    let (learner, meta) = Learner::resume(spec, shape, &ckpt)?;
    let used = match spec.run.budget {
        Budget::Steps(n) => {
            (meta.env_steps >= n).then(|| format!("{} of {n} env steps", meta.env_steps))
        }
        Budget::Seconds(s) => {
            (meta.wall_seconds >= s).then(|| format!("{:.1} of {s} seconds", meta.wall_seconds))
        }
    };
    if let Some(used) = used {
        return Err(Error::Input(format!(
            "{}: this run has used its budget ({used}); to go on, raise it: --set run.budget=...",
            dir.display()
        )));
    }
    Ok((
        RunDir::open(dir.clone())?,
        learner,
        Counters::from_meta(&meta),
    ))
}

/// The coordinator of one training run: counters, what is due next, and the records it
/// writes. Its loop ([`Run::rounds`]) reads as the list of a round's phases.
struct Run<'a> {
    spec: &'a Spec,
    spec_toml: &'a str,
    stop: &'a AtomicBool,
    dir: RunDir,
    counters: Counters,
    started: Instant,
    phases: Phases,
    /// The parameters the actors use in the next round.
    params: Arc<Params>,
    /// Sequences of the last round, for the learner's next round.
    pending: Vec<Sequence>,
    recent: RecentEpisodes,
    last_eval: Option<EvalReport>,
    next_eval: u64,
    next_checkpoint: u64,
    /// Batched steps each actor takes per round.
    steps_per_round: usize,
    eval_setup: EvalSetup,
}

/// What one round of acting and learning produced, as the coordinator records it.
struct RoundDone {
    stats: LearnStats,
    /// Seconds of the round (acting and learning together).
    seconds: f64,
    /// The train record of the round (its phases are filled in when it is written).
    record: TrainRecord,
}

impl<'a> Run<'a> {
    fn new(
        spec: &'a Spec,
        options: &'a TrainOptions,
        dir: RunDir,
        counters: Counters,
        params: Arc<Params>,
        started: Instant,
    ) -> Self {
        let first_multiple = |every: u64| {
            counters
                .env_steps
                .checked_div(every)
                .map_or(u64::MAX, |k| (k + 1) * every)
        };
        Run {
            spec,
            spec_toml: &options.spec_toml,
            stop: &options.stop,
            dir,
            next_eval: first_multiple(spec.run.eval_every),
            next_checkpoint: first_multiple(spec.run.checkpoint_every),
            counters,
            started,
            phases: Phases::default(),
            params,
            pending: Vec::new(),
            recent: RecentEpisodes::default(),
            last_eval: None,
            steps_per_round: (spec.acting.round as usize)
                .div_ceil(spec.acting.lanes)
                .max(1),
            eval_setup: EvalSetup {
                episodes: spec.run.eval_episodes,
                seed: mnemon_envs::episode_seed(spec.run.seed, seeds::EVALUATION, 0),
                epsilon: 0.0,
                discount: spec.learn.discount,
                max_steps: 0,
            },
        }
    }

    /// Round after round until the budget, the target or a stop request; the final
    /// checkpoint is written before it returns why it stopped.
    fn rounds(&mut self, workers: &Workers, observer: &mut dyn Observer) -> Result<StopReason> {
        loop {
            let round = self.act_and_learn(workers, observer)?;
            let stopping = self.stop_wanted(round.record.wall_seconds);
            let reached = self.evaluation_due(stopping.is_some()) && self.evaluate()?;
            self.record(&round.record)?;
            observer.progress(&self.progress(&round));
            if let Some(reason) = reached.then_some(StopReason::Target).or(stopping) {
                self.checkpoint(workers, Some(reason))?;
                return Ok(reason);
            }
            if self.counters.env_steps >= self.next_checkpoint {
                self.checkpoint(workers, None)?;
            }
        }
    }

    /// Act and learn: actors step with the last parameters while the learner trains on
    /// the last round's sequences; then the learner's new parameters are published.
    fn act_and_learn(
        &mut self,
        workers: &Workers,
        observer: &mut dyn Observer,
    ) -> Result<RoundDone> {
        let round_start = Instant::now();
        let sequences = std::mem::take(&mut self.pending);
        workers.start_round(
            self.counters.rounds,
            self.steps_per_round,
            &self.params,
            sequences,
        )?;
        let mut acting = 0f64;
        for out in workers.actor_outputs() {
            let out = out?;
            acting = acting.max(out.busy.as_secs_f64());
            self.counters.env_steps += out.env_steps;
            self.counters.episodes += out.episodes.len() as u64;
            self.recent.extend(out.episodes);
            self.pending.extend(out.sequences);
            out.messages.iter().for_each(|m| observer.message(m));
        }
        let actors_done = round_start.elapsed().as_secs_f64();
        let (params, stats) = workers.learner_result()?;
        let stats = stats.map_err(|e| self.save_last_good(workers, e))?;
        let seconds = round_start.elapsed().as_secs_f64();
        self.phases.acting += acting;
        self.phases.learning += stats.learn_seconds;
        self.phases.replay += stats.insert_seconds;
        self.phases.waiting_for_learner += (seconds - actors_done).max(0.0);
        self.phases.waiting_for_actors +=
            (actors_done - stats.learn_seconds - stats.insert_seconds).max(0.0);
        self.counters.rounds += 1;
        self.counters.learner_steps = stats.learner_steps;
        if let Some(why) = &stats.failure {
            return Err(self.save_last_good(workers, Error::NonFinite(why.clone())));
        }
        self.params = params;
        let record = self.train_record(&stats);
        Ok(RoundDone {
            stats,
            seconds,
            record,
        })
    }

    /// The failed update was not applied: the learner still holds the last good
    /// parameters. Saves them, and returns the failure (saying where they went).
    fn save_last_good(&mut self, workers: &Workers, failure: Error) -> Error {
        let path = self.dir.checkpoint_path(self.counters.env_steps);
        let meta = self.counters.meta(self.spec_toml);
        if let Err(e) = workers.save(path.clone(), meta, &mut self.phases) {
            return e;
        }
        match failure {
            Error::NonFinite(why) => Error::NonFinite(format!(
                "{why}\nthe last good parameters were saved to {}",
                path.display()
            )),
            other => other,
        }
    }

    /// The train record of the round just done (phases are added when it is written).
    fn train_record(&self, stats: &LearnStats) -> TrainRecord {
        let c = &self.counters;
        let elapsed = self.started.elapsed().as_secs_f64();
        let (episode_return, success_rate) = self.recent.summary();
        TrainRecord {
            env_steps: c.env_steps,
            learner_steps: c.learner_steps,
            episodes: c.episodes,
            wall_seconds: c.wall_before + elapsed,
            episode_return,
            success_rate,
            loss: stats.loss,
            mean_q: stats.mean_q,
            q_discrepancy_first: stats.discrepancy.map(|d| d.0),
            q_discrepancy_last: stats.discrepancy.map(|d| d.1),
            steps_per_second: (c.env_steps - c.env_steps_at_start) as f64 / elapsed.max(1e-9),
            updates_per_second: (c.learner_steps - c.learner_steps_at_start) as f64
                / elapsed.max(1e-9),
            replay_fill: stats.replay_fill,
            phases: Phases::default(),
        }
    }

    /// Stop check before evaluating: the budget is used (`wall_seconds` of the run at
    /// the round's end) or the caller asked to stop.
    fn stop_wanted(&self, wall_seconds: f64) -> Option<StopReason> {
        if self.stop.load(Ordering::Relaxed) {
            return Some(StopReason::Interrupt);
        }
        let used = match self.spec.run.budget {
            Budget::Steps(n) => self.counters.env_steps >= n,
            Budget::Seconds(s) => wall_seconds >= s,
        };
        used.then_some(StopReason::Budget)
    }

    /// Evaluate when due: every `run.eval.every` env steps, and once more at the end.
    fn evaluation_due(&self, stopping: bool) -> bool {
        self.counters.env_steps >= self.next_eval || (stopping && self.spec.run.eval_every > 0)
    }

    /// Plays the greedy evaluation, records it, and says whether it met the stop target.
    fn evaluate(&mut self) -> Result<bool> {
        let t = Instant::now();
        let report = evaluate(
            &self.spec.task,
            &self.spec.agent,
            &self.params,
            &self.eval_setup,
        )?;
        self.phases.evaluation += t.elapsed().as_secs_f64();
        let c = &self.counters;
        self.dir.log(&Record::Eval(EvalRecord {
            env_steps: c.env_steps,
            learner_steps: c.learner_steps,
            wall_seconds: c.wall_before + self.started.elapsed().as_secs_f64(),
            eval_return: report.mean_return(),
            eval_discounted_return: report.mean_discounted(),
            eval_success_rate: report.success_rate(),
            eval_length: report.mean_length(),
            eval_episodes: report.episodes,
        }))?;
        let reached = reached(self.spec.run.stop, &report);
        if reached && self.counters.target_reached_at.is_none() {
            self.counters.target_reached_at = Some(self.counters.env_steps);
        }
        self.last_eval = Some(report);
        while self.next_eval <= self.counters.env_steps {
            self.next_eval = self.next_eval.saturating_add(self.spec.run.eval_every);
        }
        Ok(reached)
    }

    /// Writes the round's train record with the phases so far.
    fn record(&mut self, record: &TrainRecord) -> Result<()> {
        let phases = self.phases.clone();
        self.dir.log(&Record::Train(TrainRecord {
            phases,
            ..record.clone()
        }))
    }

    /// What the observer is shown after a round.
    fn progress(&self, round: &RoundDone) -> Progress {
        let (budget_steps, budget_seconds) = match self.spec.run.budget {
            Budget::Steps(n) => (Some(n), None),
            Budget::Seconds(s) => (None, Some(s)),
        };
        let acting = &self.spec.acting;
        Progress {
            env_steps: self.counters.env_steps,
            budget_steps,
            budget_seconds,
            elapsed: round.record.wall_seconds - self.counters.wall_before,
            learner_steps: self.counters.learner_steps,
            steps_per_second: (self.steps_per_round * acting.lanes * acting.actors) as f64
                / round.seconds.max(1e-9),
            recent_return: round.record.episode_return,
            recent_success: round.record.success_rate,
            replay_fill: round.stats.replay_fill,
            last_eval: self
                .last_eval
                .as_ref()
                .map(|r| (r.mean_return(), r.success_rate())),
        }
    }

    /// Writes a checkpoint at the current step: a periodic one, or the final one of a
    /// run that stops for `reason`.
    fn checkpoint(&mut self, workers: &Workers, reason: Option<StopReason>) -> Result<()> {
        self.counters.wall_before_checkpoint =
            self.counters.wall_before + self.started.elapsed().as_secs_f64();
        let mut meta = self.counters.meta(self.spec_toml);
        if let Some(reason) = reason {
            meta.stopped_by = reason.as_str().to_string();
        }
        workers.save(
            self.dir.checkpoint_path(self.counters.env_steps),
            meta,
            &mut self.phases,
        )?;
        while self.next_checkpoint <= self.counters.env_steps {
            self.next_checkpoint = self
                .next_checkpoint
                .saturating_add(self.spec.run.checkpoint_every);
        }
        Ok(())
    }

    /// Writes the end record (after the threads have stopped) and sums the run up.
    fn end(mut self, stopped_by: StopReason) -> Result<Summary> {
        let seconds = self.started.elapsed().as_secs_f64();
        let c = &self.counters;
        self.dir.log(&Record::End(EndRecord {
            env_steps: c.env_steps,
            learner_steps: c.learner_steps,
            wall_seconds: c.wall_before + seconds,
            stopped_by,
            target_reached_at: c.target_reached_at,
            phases: self.phases.clone(),
        }))?;
        Ok(Summary {
            checkpoint: self.dir.checkpoint_path(c.env_steps),
            run_dir: self.dir.root().to_path_buf(),
            env_steps: c.env_steps,
            learner_steps: c.learner_steps,
            seconds,
            stopped_by,
            last_eval: self.last_eval,
            phases: self.phases,
            target_reached_at: c.target_reached_at,
        })
    }
}

fn reached(stop: Option<StopWhen>, report: &EvalReport) -> bool {
    match stop {
        Some(StopWhen::Success(t)) => report.success_rate().is_some_and(|s| s >= t),
        Some(StopWhen::Return(t)) => report.mean_return() >= t,
        None => false,
    }
}

/// The last [`RecentEpisodes::KEPT`] training episodes, for the train record's means.
#[derive(Default)]
struct RecentEpisodes(Vec<EpisodeSummary>);

impl RecentEpisodes {
    const KEPT: usize = 200;

    fn extend(&mut self, episodes: Vec<EpisodeSummary>) {
        self.0.extend(episodes);
        if self.0.len() > Self::KEPT {
            let cut = self.0.len() - Self::KEPT;
            self.0.drain(..cut);
        }
    }

    /// Mean return and success rate (over episodes of tasks that define success).
    fn summary(&self) -> (Option<f64>, Option<f64>) {
        let eps = &self.0;
        if eps.is_empty() {
            return (None, None);
        }
        let ret = eps.iter().map(|e| e.total_reward).sum::<f64>() / eps.len() as f64;
        let with: Vec<bool> = eps.iter().filter_map(|e| e.success).collect();
        let succ = (!with.is_empty())
            .then(|| with.iter().filter(|&&s| s).count() as f64 / with.len() as f64);
        (Some(ret), succ)
    }
}

/// Counters carried across checkpoints.
#[derive(Debug, Clone, Default)]
struct Counters {
    env_steps: u64,
    learner_steps: u64,
    episodes: u64,
    rounds: u64,
    /// Wall seconds of the run before this process took it up.
    wall_before: f64,
    /// Wall seconds of the run at the last checkpoint written.
    wall_before_checkpoint: f64,
    env_steps_at_start: u64,
    learner_steps_at_start: u64,
    target_reached_at: Option<u64>,
}

impl Counters {
    fn from_meta(m: &CheckpointMeta) -> Self {
        Counters {
            env_steps: m.env_steps,
            learner_steps: m.learner_steps,
            episodes: m.episodes,
            rounds: m.rounds,
            wall_before: m.wall_seconds,
            wall_before_checkpoint: m.wall_seconds,
            env_steps_at_start: m.env_steps,
            learner_steps_at_start: m.learner_steps,
            target_reached_at: m.target_reached_at,
        }
    }

    fn meta(&self, spec_toml: &str) -> CheckpointMeta {
        CheckpointMeta {
            spec_toml: spec_toml.to_string(),
            env_steps: self.env_steps,
            learner_steps: self.learner_steps,
            episodes: self.episodes,
            rounds: self.rounds,
            wall_seconds: self.wall_before_checkpoint,
            target_reached_at: self.target_reached_at,
            stopped_by: String::new(),
        }
    }
}
