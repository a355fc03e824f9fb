//! Actors: each owns its lanes of tasks and an inference copy of the network, steps
//! them epsilon-greedily for one round, and hands back finished sequences.
//!
//! Rounds keep training reproducible on any machine: in round r every actor steps its
//! lanes a fixed number of times with the parameters published at the end of round
//! r-1, while the learner trains on the data of rounds before r. Nothing depends on
//! which thread happens to run faster.

use std::sync::Arc;
use std::time::{Duration, Instant};

use mnemon_envs::{Ending, EpisodeSummary, Lanes};
use mnemon_nets::{ActorNet, Params};
use rand::rngs::StdRng;
use rand::SeedableRng;

use crate::error::Result;
use crate::explore;
use crate::seeds;
use crate::sequence::{Cutter, Sequence, StepEnd, NO_ACTION};

/// The recurrent inputs and state of a batch of lanes between steps.
pub struct LaneMemory {
    /// Recurrent state per lane, `[lanes * state_len]`.
    pub state: Vec<f32>,
    /// Previous action per lane (`usize::MAX`, i.e. none, at an episode's start).
    pub prev_action: Vec<usize>,
    /// Previous reward per lane.
    pub prev_reward: Vec<f32>,
    state_len: usize,
}

impl LaneMemory {
    /// Fresh memory for `lanes` lanes.
    pub fn new(lanes: usize, state_len: usize) -> Self {
        LaneMemory {
            state: vec![0.0; lanes * state_len],
            prev_action: vec![usize::MAX; lanes],
            prev_reward: vec![0.0; lanes],
            state_len,
        }
    }

    /// Lane `lane`'s state.
    pub fn lane_state(&self, lane: usize) -> &[f32] {
        &self.state[lane * self.state_len..(lane + 1) * self.state_len]
    }

    /// Starts lane `lane` over (a new episode).
    pub fn reset_lane(&mut self, lane: usize) {
        self.state[lane * self.state_len..(lane + 1) * self.state_len].fill(0.0);
        self.prev_action[lane] = usize::MAX;
        self.prev_reward[lane] = 0.0;
    }

    /// Records lane `lane`'s step (action and reward become the next inputs).
    pub fn advance(&mut self, lane: usize, action: usize, reward: f32) {
        self.prev_action[lane] = action;
        self.prev_reward[lane] = reward;
    }
}

/// What an actor hands back after a round.
#[derive(Default)]
pub struct RoundOutput {
    /// Finished sequences, in lane order of completion.
    pub sequences: Vec<Sequence>,
    /// Episodes that ended.
    pub episodes: Vec<EpisodeSummary>,
    /// Env steps taken (lanes x steps).
    pub env_steps: u64,
    /// Lines the tasks wrote (an outside process's stderr).
    pub messages: Vec<String>,
    /// Time spent stepping tasks and the network.
    pub busy: Duration,
}

/// One actor: lanes, network copy, exploration rates and sequence cutters.
pub struct Actor {
    lanes: Lanes,
    net: ActorNet,
    memory: LaneMemory,
    cutters: Vec<Cutter>,
    epsilons: Vec<f64>,
    actions_count: usize,
    seed: u64,
    q: Vec<f32>,
    actions: Vec<usize>,
    obs_before: Vec<f32>,
    state_before: Vec<f32>,
}

/// How an actor cuts and explores.
pub struct ActorSetup {
    /// Steps per sequence.
    pub sequence: usize,
    /// Overlap of adjacent sequences.
    pub overlap: usize,
    /// Burn-in of sequences that start mid-episode.
    pub burn_in: usize,
    /// Epsilon per lane.
    pub epsilons: Vec<f64>,
    /// Seed of this actor's exploration stream.
    pub seed: u64,
    /// The network's spec.
    pub agent: mnemon_spec::AgentSpec,
    /// The network's task-side shape.
    pub shape: mnemon_nets::NetShape,
}

impl Actor {
    /// An actor over `lanes` with network parameters `params`.
    pub fn new(
        lanes: Lanes,
        params: &Params,
        setup: ActorSetup,
    ) -> std::result::Result<Self, mnemon_nets::Error> {
        let net = ActorNet::from_params(&setup.agent, setup.shape, params)?;
        let count = lanes.count();
        let obs_len = lanes.obs_len();
        let state_len = net.state_len();
        let actions_count = lanes.task().action_space().count();
        Ok(Actor {
            memory: LaneMemory::new(count, state_len),
            cutters: (0..count)
                .map(|_| {
                    Cutter::new(
                        setup.sequence,
                        setup.overlap,
                        setup.burn_in,
                        obs_len,
                        state_len,
                    )
                })
                .collect(),
            epsilons: setup.epsilons,
            actions_count,
            seed: setup.seed,
            q: vec![0.0; count * actions_count],
            actions: vec![0; count],
            obs_before: vec![0.0; count * obs_len],
            state_before: vec![0.0; count * state_len],
            lanes,
            net,
        })
    }

    /// Runs round `round`: `steps` batched steps with `params`.
    pub fn run_round(
        &mut self,
        round: u64,
        steps: usize,
        params: &Arc<Params>,
    ) -> Result<RoundOutput> {
        let started = Instant::now();
        self.net.refresh(params)?;
        // A fresh stream per round, so a resumed run explores as the original did.
        let mut rng = StdRng::seed_from_u64(mnemon_envs::episode_seed(
            self.seed,
            seeds::ACTOR_ROUND,
            round,
        ));
        let mut out = RoundOutput::default();
        let count = self.lanes.count();
        let obs_len = self.lanes.obs_len();
        let state_len = self.net.state_len();
        for _ in 0..steps {
            self.obs_before.copy_from_slice(self.lanes.obs());
            self.state_before.copy_from_slice(&self.memory.state);
            self.net.step(
                &self.obs_before,
                &self.memory.prev_action,
                &self.memory.prev_reward,
                &mut self.memory.state,
                &mut self.q,
            )?;
            for lane in 0..count {
                let q = &self.q[lane * self.actions_count..(lane + 1) * self.actions_count];
                self.actions[lane] = explore::choose(q, self.epsilons[lane], &mut rng);
            }
            let results = self.lanes.step(&self.actions)?.to_vec();
            for (lane, r) in results.iter().enumerate() {
                let obs = &self.obs_before[lane * obs_len..(lane + 1) * obs_len];
                let state = &self.state_before[lane * state_len..(lane + 1) * state_len];
                let action = self.actions[lane];
                let prev = match self.memory.prev_action[lane] {
                    p if p < self.actions_count => p as u32,
                    _ => NO_ACTION,
                };
                let end = match r.ending {
                    Ending::Running => StepEnd::Running,
                    Ending::Terminal => StepEnd::Terminal,
                    Ending::Truncated => StepEnd::Truncated {
                        final_obs: self.lanes.final_obs(lane).unwrap_or(obs),
                        state_after: self.memory.lane_state(lane),
                    },
                };
                self.cutters[lane].record(
                    obs,
                    prev,
                    self.memory.prev_reward[lane],
                    state,
                    action as u32,
                    r.reward,
                    end,
                    &mut out.sequences,
                );
                if r.ending.is_done() {
                    self.memory.reset_lane(lane);
                } else {
                    self.memory.advance(lane, action, r.reward);
                }
                if let Some(ep) = r.episode {
                    out.episodes.push(ep);
                }
            }
            out.env_steps += count as u64;
        }
        self.lanes.drain_messages(&mut out.messages);
        out.busy = started.elapsed();
        Ok(out)
    }
}
