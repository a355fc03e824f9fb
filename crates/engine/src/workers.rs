//! The threads of a training run: one per actor and one for the learner, each fed one
//! job at a time over a channel of capacity one, so the coordinator always knows what
//! each side is doing (see [`crate::train`]).

use std::path::PathBuf;
use std::sync::Arc;
use std::thread::Scope;
use std::time::Instant;

use crossbeam_channel::{bounded, Receiver, Sender};
use mnemon_envs::Lanes;
use mnemon_nets::{NetShape, Params};
use mnemon_runs::Phases;
use mnemon_spec::Spec;

use crate::actor::{Actor, ActorSetup, RoundOutput};
use crate::error::{Error, Result};
use crate::explore::ladder;
use crate::learner::{CheckpointMeta, LearnStats, Learner};
use crate::seeds;
use crate::sequence::Sequence;

/// An actor's job: step round `round` for `steps` batched steps with `params`.
struct ActorJob {
    round: u64,
    steps: usize,
    params: Arc<Params>,
}

enum LearnerJob {
    Round { sequences: Vec<Sequence> },
    Save { path: PathBuf, meta: CheckpointMeta },
}

enum LearnerReply {
    Round {
        params: Arc<Params>,
        stats: Result<LearnStats>,
    },
    Saved(Result<()>),
}

/// The coordinator's ends of the actor and learner channels. Dropping it ends the
/// threads (their job channels close).
pub(crate) struct Workers {
    actors: Vec<(Sender<ActorJob>, Receiver<Result<RoundOutput>>)>,
    learner: Sender<LearnerJob>,
    replies: Receiver<LearnerReply>,
}

fn gone(side: &str) -> Error {
    Error::Internal(format!("{side} thread stopped"))
}

impl Workers {
    /// Starts `spec.acting.actors` actor threads (their lanes seeded for round
    /// `rounds_done`, so a resumed run's lanes start from a fresh stream) and the
    /// learner thread, all inside `scope`.
    pub(crate) fn spawn<'scope>(
        scope: &'scope Scope<'scope, '_>,
        spec: &Spec,
        shape: NetShape,
        rounds_done: u64,
        params: &Arc<Params>,
        learner: &'scope mut Learner,
    ) -> Result<Self> {
        let mut actors = Vec::new();
        for a in 0..spec.acting.actors {
            let mut actor = new_actor(spec, shape, a, rounds_done, params)?;
            let (job_tx, job_rx) = bounded::<ActorJob>(1);
            let (out_tx, out_rx) = bounded(1);
            scope.spawn(move || {
                while let Ok(job) = job_rx.recv() {
                    let out = actor.run_round(job.round, job.steps, &job.params);
                    if out_tx.send(out).is_err() {
                        break;
                    }
                }
            });
            actors.push((job_tx, out_rx));
        }
        let (learner_tx, learner_rx) = bounded::<LearnerJob>(1);
        let (reply_tx, reply_rx) = bounded::<LearnerReply>(1);
        scope.spawn(move || {
            while let Ok(job) = learner_rx.recv() {
                let reply = match job {
                    LearnerJob::Round { sequences } => {
                        let stats = learner.round(sequences);
                        LearnerReply::Round {
                            params: learner.params(),
                            stats,
                        }
                    }
                    LearnerJob::Save { path, meta } => {
                        LearnerReply::Saved(learner.save(&path, &meta))
                    }
                };
                if reply_tx.send(reply).is_err() {
                    break;
                }
            }
        });
        Ok(Workers {
            actors,
            learner: learner_tx,
            replies: reply_rx,
        })
    }

    /// Starts a round: every actor steps with `params`, the learner takes `sequences`.
    pub(crate) fn start_round(
        &self,
        round: u64,
        steps: usize,
        params: &Arc<Params>,
        sequences: Vec<Sequence>,
    ) -> Result<()> {
        for (tx, _) in &self.actors {
            let job = ActorJob {
                round,
                steps,
                params: params.clone(),
            };
            tx.send(job).map_err(|_| gone("actor"))?;
        }
        let job = LearnerJob::Round { sequences };
        self.learner.send(job).map_err(|_| gone("learner"))
    }

    /// The actors' outputs of the round, in actor order (each waits for its actor).
    pub(crate) fn actor_outputs(&self) -> impl Iterator<Item = Result<RoundOutput>> + '_ {
        self.actors
            .iter()
            .map(|(_, rx)| rx.recv().map_err(|_| gone("actor")).and_then(|out| out))
    }

    /// The learner's parameters after the round and its statistics (or the error that
    /// ended its round; the parameters are then the last good ones).
    pub(crate) fn learner_result(&self) -> Result<(Arc<Params>, Result<LearnStats>)> {
        match self.replies.recv() {
            Ok(LearnerReply::Round { params, stats }) => Ok((params, stats)),
            _ => Err(gone("learner")),
        }
    }

    /// Has the learner write a checkpoint (weights, target network, optimizer) to
    /// `path`, timing it into `phases.checkpoints`.
    pub(crate) fn save(
        &self,
        path: PathBuf,
        meta: CheckpointMeta,
        phases: &mut Phases,
    ) -> Result<()> {
        let t = Instant::now();
        self.learner
            .send(LearnerJob::Save { path, meta })
            .map_err(|_| gone("learner"))?;
        let saved = match self.replies.recv() {
            Ok(LearnerReply::Saved(r)) => r,
            _ => Err(gone("learner")),
        };
        phases.checkpoints += t.elapsed().as_secs_f64();
        saved
    }
}

/// Actor `a` of the run, its lanes seeded for round `rounds_done`.
fn new_actor(
    spec: &Spec,
    shape: NetShape,
    a: usize,
    rounds_done: u64,
    params: &Arc<Params>,
) -> Result<Actor> {
    let seed = spec.run.seed;
    let lanes_n = spec.acting.lanes;
    let rungs = spec.acting.actors * lanes_n;
    let lane_seed = mnemon_envs::episode_seed(seed, seeds::ACTOR_LANES + a as u64, rounds_done);
    let lanes = Lanes::new(&spec.task, lanes_n, lane_seed)?;
    let acting = &spec.acting;
    let setup = ActorSetup {
        sequence: spec.replay.sequence,
        overlap: spec.replay.overlap,
        burn_in: spec.replay.burn_in,
        epsilons: (0..lanes_n)
            .map(|l| {
                ladder(
                    acting.epsilon_base,
                    acting.epsilon_spread,
                    a * lanes_n + l,
                    rungs,
                )
            })
            .collect(),
        seed: mnemon_envs::episode_seed(seed, seeds::ACTOR_EXPLORATION + a as u64, 0),
        agent: spec.agent.clone(),
        shape,
    };
    Ok(Actor::new(lanes, params, setup)?)
}
