//! The training loop: rounds of acting and learning, evaluation, checkpoints, metrics,
//! stop conditions and resume.
//!
//! One round: every actor thread steps its lanes `acting.round` env steps with the
//! parameters of the previous round while the learner thread inserts the previous
//! round's sequences and trains until it has sampled `replay_ratio` transitions per
//! inserted transition. Then the coordinator (this thread) collects both, publishes the
//! new parameters, logs, evaluates and checkpoints when due. Actors wait for a slow
//! learner and the learner for slow actors, so the ratio the spec asks for holds on
//! any machine and a seed reproduces a run.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread;
use std::time::Instant;

use crossbeam_channel::{bounded, Receiver, Sender};
use mnemon_envs::{EpisodeSummary, Lanes};
use mnemon_nets::Params;
use mnemon_spec::{Budget, Spec, StopWhen};
use serde_json::json;

use crate::actor::{Actor, ActorSetup, RoundOutput};
use crate::error::{Error, Result};
use crate::eval::{evaluate, EvalReport, EvalSetup};
use crate::explore::ladder;
use crate::learner::{CheckpointMeta, LearnStats, Learner};
use crate::rundir::{latest_checkpoint, RunDir};

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
    pub stopped_by: String,
    /// The last evaluation, if any.
    pub last_eval: Option<EvalReport>,
    /// Seconds spent per phase.
    pub phases: Phases,
    /// Env steps at which the stop target was first reached.
    pub target_reached_at: Option<u64>,
}

/// Wall-clock seconds by phase. Acting and learning overlap (they run on their own
/// threads); `waiting_*` is the time each side idled for the other.
#[derive(Debug, Clone, Default)]
pub struct Phases {
    /// Actor threads stepping tasks and the network (max over actors per round).
    pub acting: f64,
    /// Learner thread training.
    pub learning: f64,
    /// Learner thread inserting into replay.
    pub replay: f64,
    /// Greedy evaluations (nothing else runs meanwhile).
    pub evaluation: f64,
    /// Checkpoint writes.
    pub checkpoints: f64,
    /// Coordinator time spent waiting on the slower side.
    pub waiting_for_learner: f64,
    /// Coordinator time spent waiting for actors.
    pub waiting_for_actors: f64,
}

impl Phases {
    fn json(&self) -> serde_json::Value {
        json!({
            "acting": self.acting, "learning": self.learning, "replay": self.replay,
            "evaluation": self.evaluation, "checkpoints": self.checkpoints,
            "waiting_for_learner": self.waiting_for_learner,
            "waiting_for_actors": self.waiting_for_actors,
        })
    }
}

enum ActorMsg {
    Round {
        round: u64,
        steps: usize,
        params: Arc<Params>,
    },
}

enum LearnerMsg {
    Round {
        sequences: Vec<crate::sequence::Sequence>,
    },
    Save {
        path: PathBuf,
        meta: CheckpointMeta,
    },
}

enum LearnerReply {
    Round {
        params: Arc<Params>,
        stats: LearnStats,
    },
    Saved(Result<()>),
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

fn recent(eps: &[EpisodeSummary]) -> (Option<f64>, Option<f64>) {
    if eps.is_empty() {
        return (None, None);
    }
    let ret = eps.iter().map(|e| e.total_reward).sum::<f64>() / eps.len() as f64;
    let with: Vec<bool> = eps.iter().filter_map(|e| e.success).collect();
    let succ =
        (!with.is_empty()).then(|| with.iter().filter(|&&s| s).count() as f64 / with.len() as f64);
    (Some(ret), succ)
}

fn reached(stop: Option<StopWhen>, report: &EvalReport) -> bool {
    match stop {
        Some(StopWhen::Success(t)) => report.success_rate().is_some_and(|s| s >= t),
        Some(StopWhen::Return(t)) => report.mean_return() >= t,
        None => false,
    }
}

/// Trains `spec` to its budget (or its stop target), writing a run folder under
/// `spec.run.out`. Returns where the run ended.
pub fn train(spec: &Spec, options: TrainOptions, observer: &mut dyn Observer) -> Result<Summary> {
    let started = Instant::now();
    let seed = spec.run.seed;
    let probe = Lanes::new(&spec.task, 1, seed).map_err(task_err)?;
    let shape = crate::learner::net_shape(probe.task());
    drop(probe);

    // Run folder and learner: fresh, or from the last checkpoint.
    let (mut run, mut learner, mut counters) = match &options.resume {
        None => {
            let run = match &options.run_dir {
                Some(dir) => RunDir::create_at(dir.clone(), &options.spec_toml)?,
                None => RunDir::create(
                    Path::new(&spec.run.out),
                    &spec.name,
                    seed,
                    &options.spec_toml,
                )?,
            };
            let learner = Learner::new(spec, shape)?;
            (run, learner, Counters::default())
        }
        Some(dir) => {
            let ckpt = latest_checkpoint(dir).ok_or_else(|| {
                Error::Input(format!("{}: no checkpoint to resume from", dir.display()))
            })?;
            let (learner, meta) = Learner::resume(spec, shape, &ckpt)?;
            if let Budget::Steps(n) = spec.run.budget {
                if meta.env_steps >= n {
                    return Err(Error::Input(format!(
                        "{}: this run has used its budget ({} of {n} env steps); to go on, \
                         raise it: --set run.budget=...",
                        dir.display(),
                        meta.env_steps
                    )));
                }
            }
            let run = RunDir::open(dir.clone())?;
            (run, learner, Counters::from_meta(&meta))
        }
    };

    let actors_n = spec.acting.actors;
    let lanes_n = spec.acting.lanes;
    let rungs = actors_n * lanes_n;
    let steps_per_round = (spec.acting.round as usize).div_ceil(lanes_n).max(1);

    // Threads.
    let (learner_tx, learner_rx) = bounded::<LearnerMsg>(1);
    let (learner_reply_tx, learner_reply_rx) = bounded::<LearnerReply>(1);
    let mut actor_txs: Vec<Sender<ActorMsg>> = Vec::new();
    let mut actor_rxs: Vec<Receiver<std::result::Result<RoundOutput, String>>> = Vec::new();
    let mut params = learner.params();
    let mut report_last: Option<EvalReport> = None;
    let mut phases = Phases::default();
    let mut stopped_by = String::from("budget");
    let mut target_reached_at = counters.target_reached_at;

    let result = thread::scope(|scope| -> Result<()> {
        for a in 0..actors_n {
            let (tx, rx) = bounded::<ActorMsg>(1);
            let (otx, orx) = bounded(1);
            actor_txs.push(tx);
            actor_rxs.push(orx);
            // Lanes of a resumed run start from a fresh seed stream.
            let lane_seed = mnemon_envs::episode_seed(seed, 1000 + a as u64, counters.rounds);
            let lanes = Lanes::new(&spec.task, lanes_n, lane_seed).map_err(task_err)?;
            let setup = ActorSetup {
                sequence: spec.replay.sequence,
                overlap: spec.replay.overlap,
                burn_in: spec.replay.burn_in,
                epsilons: (0..lanes_n)
                    .map(|l| {
                        ladder(
                            spec.acting.epsilon_base,
                            spec.acting.epsilon_spread,
                            a * lanes_n + l,
                            rungs,
                        )
                    })
                    .collect(),
                seed: mnemon_envs::episode_seed(seed, 2000 + a as u64, 0),
                agent: spec.agent.clone(),
                shape,
            };
            let mut actor =
                Actor::new(lanes, &params, setup).map_err(|e| Error::Internal(e.to_string()))?;
            scope.spawn(move || {
                while let Ok(ActorMsg::Round {
                    round,
                    steps,
                    params,
                }) = rx.recv()
                {
                    let out = actor.run_round(round, steps, &params);
                    if otx.send(out).is_err() {
                        break;
                    }
                }
            });
        }
        let learner_ref = &mut learner;
        scope.spawn(move || {
            while let Ok(msg) = learner_rx.recv() {
                let reply = match msg {
                    LearnerMsg::Round { sequences } => match learner_ref.round(sequences) {
                        Ok(stats) => LearnerReply::Round {
                            params: learner_ref.params(),
                            stats,
                        },
                        Err(e) => LearnerReply::Round {
                            params: learner_ref.params(),
                            stats: LearnStats::failed(e.to_string()),
                        },
                    },
                    LearnerMsg::Save { path, meta } => {
                        LearnerReply::Saved(learner_ref.save(&path, &meta))
                    }
                };
                if learner_reply_tx.send(reply).is_err() {
                    break;
                }
            }
        });

        let save = |path: PathBuf, meta: CheckpointMeta, phases: &mut Phases| -> Result<()> {
            let t = Instant::now();
            learner_tx
                .send(LearnerMsg::Save { path, meta })
                .map_err(|_| Error::Internal("learner thread stopped".into()))?;
            let r = match learner_reply_rx.recv() {
                Ok(LearnerReply::Saved(r)) => r,
                _ => Err(Error::Internal("learner thread stopped".into())),
            };
            phases.checkpoints += t.elapsed().as_secs_f64();
            r
        };

        let mut pending: Vec<crate::sequence::Sequence> = Vec::new();
        let mut recent_eps: Vec<EpisodeSummary> = Vec::new();
        let eval_setup = EvalSetup {
            episodes: spec.run.eval_episodes,
            seed: mnemon_envs::episode_seed(seed, 0xE7A1, 0),
            epsilon: 0.0,
            discount: spec.learn.discount,
            max_steps: 0,
        };
        // The first multiple of `every` after the current step (never, for 0).
        let next_multiple = |every: u64| {
            counters
                .env_steps
                .checked_div(every)
                .map_or(u64::MAX, |k| (k + 1) * every)
        };
        let mut next_eval = next_multiple(spec.run.eval_every);
        let mut next_ckpt = next_multiple(spec.run.checkpoint_every);
        loop {
            let round_start = Instant::now();
            for tx in &actor_txs {
                tx.send(ActorMsg::Round {
                    round: counters.rounds,
                    steps: steps_per_round,
                    params: params.clone(),
                })
                .map_err(|_| Error::Internal("actor thread stopped".into()))?;
            }
            learner_tx
                .send(LearnerMsg::Round {
                    sequences: std::mem::take(&mut pending),
                })
                .map_err(|_| Error::Internal("learner thread stopped".into()))?;
            let mut acting = 0f64;
            for rx in &actor_rxs {
                let out = rx
                    .recv()
                    .map_err(|_| Error::Internal("actor thread stopped".into()))?
                    .map_err(Error::Task)?;
                acting = acting.max(out.busy.as_secs_f64());
                counters.env_steps += out.env_steps;
                counters.episodes += out.episodes.len() as u64;
                recent_eps.extend(out.episodes);
                pending.extend(out.sequences);
                for m in &out.messages {
                    observer.message(m);
                }
            }
            let actors_done = round_start.elapsed().as_secs_f64();
            let (new_params, stats) = match learner_reply_rx.recv() {
                Ok(LearnerReply::Round { params, stats }) => (params, stats),
                _ => return Err(Error::Internal("learner thread stopped".into())),
            };
            let round_secs = round_start.elapsed().as_secs_f64();
            phases.acting += acting;
            phases.learning += stats.learn_seconds;
            phases.replay += stats.insert_seconds;
            phases.waiting_for_learner += (round_secs - actors_done).max(0.0);
            phases.waiting_for_actors +=
                (actors_done - stats.learn_seconds - stats.insert_seconds).max(0.0);
            counters.rounds += 1;
            counters.learner_steps = stats.learner_steps;
            if let Some(why) = &stats.failure {
                // The failed update was not applied: the learner still holds the last good
                // parameters. Save them, then stop.
                let path = run.checkpoint_path(counters.env_steps);
                save(
                    path.clone(),
                    counters.meta(&options.spec_toml, target_reached_at),
                    &mut phases,
                )?;
                return Err(Error::NonFinite(format!(
                    "{why}\nthe last good parameters were saved to {}",
                    path.display()
                )));
            }
            params = new_params;
            if recent_eps.len() > 200 {
                let cut = recent_eps.len() - 200;
                recent_eps.drain(..cut);
            }
            let (ret, succ) = recent(&recent_eps);
            let elapsed = started.elapsed().as_secs_f64();
            let mut record = json!({
                "kind": "train",
                "env_steps": counters.env_steps,
                "learner_steps": counters.learner_steps,
                "episodes": counters.episodes,
                "wall_seconds": counters.wall_before + elapsed,
                "episode_return": ret,
                "success_rate": succ,
                "loss": stats.loss,
                "mean_q": stats.mean_q,
                "q_discrepancy_first": stats.discrepancy.map(|d| d.0),
                "q_discrepancy_last": stats.discrepancy.map(|d| d.1),
                "steps_per_second": (counters.env_steps - counters.env_steps_at_start) as f64 / elapsed.max(1e-9),
                "updates_per_second": (counters.learner_steps - counters.learner_steps_at_start) as f64 / elapsed.max(1e-9),
                "replay_fill": stats.replay_fill,
            });
            let mut eval_now = counters.env_steps >= next_eval;
            let budget_done = match spec.run.budget {
                Budget::Steps(n) => counters.env_steps >= n,
                Budget::Seconds(s) => counters.wall_before + elapsed >= s,
            };
            let stop_asked = options.stop.load(Ordering::Relaxed);
            if (budget_done || stop_asked) && spec.run.eval_every > 0 {
                eval_now = true;
            }
            let mut solved = false;
            if eval_now {
                let t = Instant::now();
                let report =
                    evaluate(&spec.task, &spec.agent, &params, &eval_setup).map_err(Error::Task)?;
                phases.evaluation += t.elapsed().as_secs_f64();
                let rec = json!({
                    "kind": "eval",
                    "env_steps": counters.env_steps,
                    "learner_steps": counters.learner_steps,
                    "wall_seconds": counters.wall_before + started.elapsed().as_secs_f64(),
                    "eval_return": report.mean_return(),
                    "eval_discounted_return": report.mean_discounted(),
                    "eval_success_rate": report.success_rate(),
                    "eval_length": report.mean_length(),
                    "eval_episodes": report.episodes,
                });
                run.log(&rec)?;
                solved = reached(spec.run.stop, &report);
                if solved && target_reached_at.is_none() {
                    target_reached_at = Some(counters.env_steps);
                }
                report_last = Some(report);
                while next_eval <= counters.env_steps {
                    next_eval = next_eval.saturating_add(spec.run.eval_every);
                }
            }
            record["phases"] = phases.json();
            run.log(&record)?;
            observer.progress(&Progress {
                env_steps: counters.env_steps,
                budget_steps: match spec.run.budget {
                    Budget::Steps(n) => Some(n),
                    _ => None,
                },
                budget_seconds: match spec.run.budget {
                    Budget::Seconds(s) => Some(s),
                    _ => None,
                },
                elapsed,
                learner_steps: counters.learner_steps,
                steps_per_second: (steps_per_round * lanes_n * actors_n) as f64
                    / round_secs.max(1e-9),
                recent_return: ret,
                recent_success: succ,
                replay_fill: stats.replay_fill,
                last_eval: report_last
                    .as_ref()
                    .map(|r| (r.mean_return(), r.success_rate())),
            });
            let finished = budget_done || stop_asked || solved;
            if finished {
                stopped_by = if solved {
                    "target".into()
                } else if stop_asked {
                    "interrupt".into()
                } else {
                    "budget".into()
                };
                break;
            }
            if counters.env_steps >= next_ckpt {
                counters.wall_before_ckpt = counters.wall_before + started.elapsed().as_secs_f64();
                save(
                    run.checkpoint_path(counters.env_steps),
                    counters.meta(&options.spec_toml, target_reached_at),
                    &mut phases,
                )?;
                while next_ckpt <= counters.env_steps {
                    next_ckpt = next_ckpt.saturating_add(spec.run.checkpoint_every);
                }
            }
        }
        counters.wall_before_ckpt = counters.wall_before + started.elapsed().as_secs_f64();
        let mut meta = counters.meta(&options.spec_toml, target_reached_at);
        meta.stopped_by = stopped_by.clone();
        save(run.checkpoint_path(counters.env_steps), meta, &mut phases)?;
        drop(actor_txs);
        drop(learner_tx);
        Ok(())
    });
    result?;
    let seconds = started.elapsed().as_secs_f64();
    run.log(&json!({
        "kind": "end",
        "env_steps": counters.env_steps,
        "learner_steps": counters.learner_steps,
        "wall_seconds": counters.wall_before + seconds,
        "stopped_by": stopped_by,
        "target_reached_at": target_reached_at,
        "phases": phases.json(),
    }))?;
    Ok(Summary {
        checkpoint: run.checkpoint_path(counters.env_steps),
        run_dir: run.root().to_path_buf(),
        env_steps: counters.env_steps,
        learner_steps: counters.learner_steps,
        seconds,
        stopped_by,
        last_eval: report_last,
        phases,
        target_reached_at,
    })
}

fn task_err(e: mnemon_envs::TaskError) -> Error {
    Error::Task(e.to_string())
}

/// Counters carried across checkpoints.
#[derive(Debug, Clone, Default)]
struct Counters {
    env_steps: u64,
    learner_steps: u64,
    episodes: u64,
    rounds: u64,
    wall_before: f64,
    wall_before_ckpt: f64,
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
            wall_before_ckpt: m.wall_seconds,
            env_steps_at_start: m.env_steps,
            learner_steps_at_start: m.learner_steps,
            target_reached_at: m.target_reached_at,
        }
    }

    fn meta(&self, spec_toml: &str, target_reached_at: Option<u64>) -> CheckpointMeta {
        CheckpointMeta {
            spec_toml: spec_toml.to_string(),
            env_steps: self.env_steps,
            learner_steps: self.learner_steps,
            episodes: self.episodes,
            rounds: self.rounds,
            wall_seconds: self.wall_before_ckpt,
            target_reached_at,
            stopped_by: String::new(),
        }
    }
}
