//! The learner: owns the replay, the online and target networks and the optimizer;
//! turns sampled sequences into n-step double-Q (or quantile) updates. The learning math
//! (targets, rescaling, priorities, importance weights, discrepancy, losses) lives in
//! `mnemon_nets::loss`; this module arranges the batch around it.
//!
//! One update (`Learner::update`), top to bottom, one function per step:
//! 1. `sample`: a batch of sequences by priority, with importance weights (`replay`);
//! 2. `target_q`: the target network over every step from the start state (no gradient);
//! 3. `burn_in_groups`, `unroll_online`: the online network, per burn-in group:
//!    sequences that start mid-episode burn in first (no gradient, Kapturowski et al.
//!    2019), sequences that start at their episode's first step are learned from step 0
//!    (their zero start state is exact);
//! 4. `group_targets`: n-step double-Q targets with value rescaling h (van Hasselt et
//!    al. 2016; Pohlen et al. 2018), bootstrapping through time-limit truncation;
//! 5. `group_loss`: importance-weighted TD loss (or quantile Huber loss, Dabney et al.
//!    2017); every 50 updates `group_discrepancy` measures the Q-value discrepancy;
//! 6. `optimizer_step`: backward, global-norm clip, Adam;
//! 7. `write_priorities`: new sequence priorities;
//! 8. `copy_target_when_due`: target copy every `learn.target_every` updates.

use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use candle_core::{Device, Tensor};
use mnemon_envs::{ObsSpace, Task};
use mnemon_nets::{loss, ActorNet, NetShape, Network, ObsShape, Optimizer, Params, UnrollInput};
use mnemon_spec::{Head, Spec, StartState};
use rand::rngs::StdRng;
use rand::SeedableRng;

use crate::error::{Error, Result};
use crate::replay::{Draw, Replay};
use crate::sequence::Sequence;

/// The network shape a task needs.
pub fn net_shape(task: &dyn Task) -> NetShape {
    let obs = match task.obs_space() {
        ObsSpace::Image {
            channels,
            height,
            width,
        } => ObsShape::Image {
            channels,
            height,
            width,
        },
        other => ObsShape::Vector(other.len()),
    };
    NetShape {
        obs,
        actions: task.action_space().count(),
    }
}

/// Counters and diagnostics of one learner round.
#[derive(Debug, Clone, Default)]
pub struct LearnStats {
    /// Learner updates so far (whole run).
    pub learner_steps: u64,
    /// Mean loss over this round's updates.
    pub loss: Option<f64>,
    /// Mean Q of the taken actions over this round's updates.
    pub mean_q: Option<f64>,
    /// Q-value discrepancy at the first and last learned steps (latest measurement).
    pub discrepancy: Option<(f64, f64)>,
    /// Replay fill (0..1).
    pub replay_fill: f64,
    /// Seconds spent in updates.
    pub learn_seconds: f64,
    /// Seconds spent inserting sequences.
    pub insert_seconds: f64,
    /// Why the round stopped early (a non-finite loss), if it did.
    pub failure: Option<String>,
}

impl LearnStats {
    /// Stats of a round that failed.
    pub fn failed(why: String) -> Self {
        LearnStats {
            failure: Some(why),
            ..Default::default()
        }
    }
}

/// Counters and text stored with a checkpoint.
#[derive(Debug, Clone, Default)]
pub struct CheckpointMeta {
    /// The resolved spec as TOML.
    pub spec_toml: String,
    /// Env steps.
    pub env_steps: u64,
    /// Learner updates.
    pub learner_steps: u64,
    /// Episodes finished by actors.
    pub episodes: u64,
    /// Rounds completed.
    pub rounds: u64,
    /// Wall seconds of the run up to this checkpoint.
    pub wall_seconds: f64,
    /// Env steps at which the stop target was first reached.
    pub target_reached_at: Option<u64>,
    /// Why the run stopped (final checkpoints only).
    pub stopped_by: String,
}

/// The learner's state.
pub struct Learner {
    spec: Spec,
    shape: NetShape,
    online: Network,
    target: Network,
    opt: Optimizer,
    replay: Replay,
    rng: StdRng,
    learner_steps: u64,
    sampled: u64,
    params: Arc<Params>,
    /// Computes Q from the actors' stored states, for the Q-value discrepancy.
    stored_state_net: ActorNet,
}

/// Weights and spec read from a checkpoint, for evaluation.
pub struct LoadedParams {
    /// The network's parameters.
    pub params: Params,
    /// The resolved spec stored with them.
    pub spec_toml: String,
}

/// Reads a checkpoint's weights and spec.
pub fn load_params(path: &Path) -> Result<LoadedParams> {
    let loaded = mnemon_nets::checkpoint::load(path)?;
    Ok(LoadedParams {
        params: loaded.online,
        spec_toml: loaded.meta.spec_toml,
    })
}

/// Checks that a checkpoint's network fits the (possibly overridden) spec's task.
pub fn check_task_fits(spec: &Spec, params: &Params) -> Result<()> {
    let lanes = mnemon_envs::Lanes::new(&spec.task, 1, 0)?;
    let shape = net_shape(lanes.task());
    let net = Network::new(&spec.agent, shape, 0)?;
    let fresh = net.snapshot()?;
    for (name, want, _) in &fresh.tensors {
        match params.get(name) {
            Some((got, _)) if got == want.as_slice() => {}
            Some((got, _)) => {
                return Err(Error::Input(format!(
                    "the checkpoint's {name} has shape {got:?}, but task {} needs {want:?}",
                    spec.task.kind
                )))
            }
            None => return Err(Error::Input(format!("the checkpoint has no tensor {name}"))),
        }
    }
    if fresh.tensors.len() != params.tensors.len() {
        return Err(Error::Input(format!(
            "the checkpoint holds {} tensors, the spec's network {}",
            params.tensors.len(),
            fresh.tensors.len()
        )));
    }
    Ok(())
}

fn nets(e: mnemon_nets::Error) -> Error {
    Error::from(e)
}

impl Learner {
    /// A fresh learner for `spec`.
    pub fn new(spec: &Spec, shape: NetShape) -> Result<Self> {
        let online = Network::new(&spec.agent, shape, spec.run.seed).map_err(nets)?;
        let target = online.try_clone().map_err(nets)?;
        let opt = Optimizer::new(&online, spec.learn.adam_epsilon, spec.learn.clip);
        Self::assemble(spec, shape, online, target, opt, 0)
    }

    fn assemble(
        spec: &Spec,
        shape: NetShape,
        online: Network,
        target: Network,
        opt: Optimizer,
        learner_steps: u64,
    ) -> Result<Self> {
        let stride = spec.replay.sequence - spec.replay.overlap.max(1);
        let replay = Replay::new(
            Replay::slots_for(spec.replay.capacity, stride),
            spec.replay.priority_exponent,
            spec.replay.priority_correction,
        );
        let params = Arc::new(online.snapshot().map_err(nets)?);
        let stored_state_net = ActorNet::from_params(&spec.agent, shape, &params).map_err(nets)?;
        Ok(Learner {
            spec: spec.clone(),
            shape,
            online,
            target,
            opt,
            replay,
            rng: StdRng::seed_from_u64(mnemon_envs::episode_seed(
                spec.run.seed,
                crate::seeds::LEARNER_SAMPLING,
                learner_steps,
            )),
            learner_steps,
            sampled: 0,
            params,
            stored_state_net,
        })
    }

    /// A learner restored from a checkpoint (weights, target, optimizer, counters); the
    /// replay starts empty and refills.
    pub fn resume(spec: &Spec, shape: NetShape, path: &Path) -> Result<(Self, CheckpointMeta)> {
        let loaded = mnemon_nets::checkpoint::load(path)?;
        let mut online = Network::new(&spec.agent, shape, spec.run.seed).map_err(nets)?;
        let mut target = online.try_clone().map_err(nets)?;
        let mut opt = Optimizer::new(&online, spec.learn.adam_epsilon, spec.learn.clip);
        loaded
            .restore(&mut online, Some(&mut target), Some(&mut opt))
            .map_err(|e| Error::Input(format!("{}: {e}", path.display())))?;
        let m = &loaded.meta;
        let meta = CheckpointMeta {
            spec_toml: m.spec_toml.clone(),
            env_steps: m.env_steps,
            learner_steps: m.learner_steps,
            episodes: extra_u64(&m.extra, "episodes"),
            rounds: extra_u64(&m.extra, "rounds"),
            wall_seconds: m
                .extra
                .get("wall_seconds")
                .and_then(|v| v.parse().ok())
                .unwrap_or(0.0),
            target_reached_at: m
                .extra
                .get("target_reached_at")
                .and_then(|v| v.parse().ok()),
            stopped_by: m.extra.get("stopped_by").cloned().unwrap_or_default(),
        };
        let learner = Self::assemble(spec, shape, online, target, opt, m.learner_steps)?;
        Ok((learner, meta))
    }

    /// The latest published parameters.
    pub fn params(&self) -> Arc<Params> {
        self.params.clone()
    }

    /// Writes a checkpoint (weights, target network, optimizer moments, counters).
    pub fn save(&self, path: &Path, meta: &CheckpointMeta) -> Result<()> {
        let mut extra = std::collections::BTreeMap::new();
        extra.insert("episodes".to_string(), meta.episodes.to_string());
        extra.insert("rounds".to_string(), meta.rounds.to_string());
        extra.insert("wall_seconds".to_string(), format!("{}", meta.wall_seconds));
        if let Some(t) = meta.target_reached_at {
            extra.insert("target_reached_at".to_string(), t.to_string());
        }
        if !meta.stopped_by.is_empty() {
            extra.insert("stopped_by".to_string(), meta.stopped_by.clone());
        }
        let m = mnemon_nets::checkpoint::Meta {
            spec_toml: meta.spec_toml.clone(),
            env_steps: meta.env_steps,
            learner_steps: self.learner_steps,
            extra,
        };
        mnemon_nets::checkpoint::save(path, &self.online, Some(&self.target), Some(&self.opt), &m)
            .map_err(Error::from)
    }

    /// One round: insert the new sequences, then update until the replay ratio is met.
    pub fn round(&mut self, sequences: Vec<Sequence>) -> Result<LearnStats> {
        let t0 = Instant::now();
        // Image observations (values in [0, 1]) are kept as bytes: a quarter of the
        // memory, exact for the 0/1 planes of the built-in image task.
        let compact = matches!(self.shape.obs, ObsShape::Image { .. });
        for mut s in sequences {
            if compact {
                s.compact_obs();
            }
            self.replay.insert(s);
        }
        let insert_seconds = t0.elapsed().as_secs_f64();
        let t1 = Instant::now();
        let mut stats = LearnStats {
            insert_seconds,
            ..Default::default()
        };
        let (mut loss_sum, mut q_sum, mut n) = (0.0, 0.0, 0usize);
        if self.replay.stored_transitions() >= self.spec.learn.warmup && !self.replay.is_empty() {
            let owed = self.spec.learn.replay_ratio * self.replay.inserted_transitions() as f64;
            while (self.sampled as f64) < owed {
                match self.update() {
                    Ok(u) => {
                        loss_sum += u.loss;
                        q_sum += u.mean_q;
                        n += 1;
                        if u.discrepancy.is_some() {
                            stats.discrepancy = u.discrepancy;
                        }
                    }
                    Err(Error::NonFinite(why)) => {
                        stats.failure = Some(why);
                        break;
                    }
                    Err(e) => return Err(e),
                }
            }
            if n > 0 {
                self.params = Arc::new(self.online.snapshot().map_err(nets)?);
            }
        }
        if n > 0 {
            stats.loss = Some(loss_sum / n as f64);
            stats.mean_q = Some(q_sum / n as f64);
        }
        stats.learner_steps = self.learner_steps;
        stats.replay_fill = self.replay.fill();
        stats.learn_seconds = t1.elapsed().as_secs_f64();
        Ok(stats)
    }

    /// One learner update: sample, unroll, targets, loss, backward, optimizer step,
    /// priorities, target copy when due.
    fn update(&mut self) -> Result<UpdateStats> {
        let draws = self.sample()?;
        let pass = self.forward(&draws)?;
        let Some(total) = pass.total_loss()? else {
            // Nothing learnable in this batch (all burn-in): count it as sampled so the
            // ratio controller still advances.
            self.sampled += draws.len() as u64;
            return Ok(UpdateStats {
                loss: 0.0,
                mean_q: 0.0,
                discrepancy: pass.discrepancy,
            });
        };
        let loss_v = total.to_scalar::<f32>().map_err(cerr)? as f64;
        let mean_q = pass.q_taken_sum / pass.count as f64;
        if !loss_v.is_finite() || !mean_q.is_finite() {
            return Err(Error::NonFinite(format!(
                "learner step {}: the loss became {loss_v} (mean Q {mean_q}); the update was not applied. \
                 Lower learn.rate, set learn.clip, or keep learn.rescale on.",
                self.learner_steps
            )));
        }
        self.optimizer_step(&total)?;
        self.sampled += pass.count as u64;
        self.write_priorities(&draws, &pass.abs_td);
        self.copy_target_when_due()?;
        Ok(UpdateStats {
            loss: loss_v,
            mean_q,
            discrepancy: pass.discrepancy,
        })
    }

    /// Step 1: a batch of sequences drawn by priority, with importance weights.
    fn sample(&mut self) -> Result<Vec<Draw>> {
        let draws = self
            .replay
            .sample_weighted(self.spec.learn.batch, &mut self.rng);
        if draws.is_empty() {
            return Err(Error::Internal("replay is empty".into()));
        }
        Ok(draws)
    }

    /// Steps 2-5 over the sampled batch: the target unroll, then per burn-in group the
    /// online unroll, the targets, the loss (and the discrepancy when due).
    fn forward(&mut self, draws: &[Draw]) -> Result<ForwardPass> {
        let seqs: Vec<&Sequence> = draws
            .iter()
            .map(|d| {
                self.replay
                    .get(d.slot)
                    .expect("sampled slots hold sequences")
            })
            .collect();
        let dims = Dims {
            steps: self.spec.replay.sequence,
            actions: self.shape.actions,
            quantiles: self.online.quantiles(),
            state_len: self.online.state_len(),
            zero_start: self.spec.replay.start_state == StartState::Zero,
        };
        let all: Vec<usize> = (0..seqs.len()).collect();
        let q_target = target_q(&self.target, &batch_inputs(&seqs, &all, &dims), &dims)?;
        let measure = self.learner_steps.is_multiple_of(DISCREPANCY_EVERY) && dims.state_len > 0;
        let mut pass = ForwardPass::new(seqs.len());
        for (burn, rows) in burn_in_groups(&seqs, dims.steps) {
            let group = Group {
                burn,
                rows: &rows,
                seqs: &seqs,
                draws,
            };
            let q = unroll_online(&self.online, &group, &dims)?;
            let q_online = host(&q.detach())?;
            let targets = group_targets(&self.spec, &group, &dims, &q_online, &q_target, &mut pass);
            if measure && pass.discrepancy.is_none() {
                let net = &mut self.stored_state_net;
                pass.discrepancy = group_discrepancy(net, &self.params, &group, &q_online, &dims);
            }
            if targets.count > 0 {
                let shape = (rows.len(), dims.steps - burn, dims.quantiles);
                pass.add_loss(group_loss(&self.spec, &q, targets, shape)?)?;
            }
        }
        Ok(pass)
    }

    /// Step 6: backward, global-norm clip and Adam at the scheduled rate.
    fn optimizer_step(&mut self, total: &Tensor) -> Result<()> {
        let rate = self.spec.learn.rate.at(self.learner_steps);
        let grads = total.backward().map_err(cerr)?;
        self.opt.step(&self.online, &grads, rate).map_err(nets)?;
        self.learner_steps += 1;
        Ok(())
    }

    /// Step 7: new priorities of the sampled sequences from their TD errors.
    fn write_priorities(&mut self, draws: &[Draw], abs_td: &[Vec<f32>]) {
        let eta = self.spec.replay.priority_mix;
        let updates: Vec<(usize, f64)> = draws
            .iter()
            .zip(abs_td)
            .filter(|(_, td)| !td.is_empty())
            .map(|(d, td)| (d.slot, loss::sequence_priority(td, eta)))
            .collect();
        self.replay.update_priorities(&updates);
    }

    /// Step 8: the target network takes the online weights every `learn.target_every`
    /// updates.
    fn copy_target_when_due(&mut self) -> Result<()> {
        if self
            .learner_steps
            .is_multiple_of(self.spec.learn.target_every.max(1))
        {
            self.target.copy_from(&self.online).map_err(nets)?;
        }
        Ok(())
    }
}

/// Learner updates between two measurements of the Q-value discrepancy.
const DISCREPANCY_EVERY: u64 = 50;

/// Sizes of one batch's arrays.
struct Dims {
    /// Entries per sequence (T).
    steps: usize,
    /// Actions (A).
    actions: usize,
    /// Quantiles per action (K; 1 for the value and dueling heads).
    quantiles: usize,
    /// Floats of recurrent state (0 without memory).
    state_len: usize,
    /// Sequences that start mid-episode start from a zero state.
    zero_start: bool,
}

impl Dims {
    /// Floats per sequence of the online Q after `burn` burn-in entries: `[T - burn, A, K]`.
    fn online_row(&self, burn: usize) -> usize {
        (self.steps - burn) * self.actions * self.quantiles
    }

    /// Floats per entry of Q: `[A, K]`.
    fn entry(&self) -> usize {
        self.actions * self.quantiles
    }
}

/// The sequences of one burn-in group: rows of the sampled batch that share a burn-in.
struct Group<'a> {
    burn: usize,
    rows: &'a [usize],
    seqs: &'a [&'a Sequence],
    draws: &'a [Draw],
}

/// What the forward pass over a batch gathered.
struct ForwardPass {
    /// Sum over groups of each group's mean loss times its learned steps.
    loss_sum: Option<Tensor>,
    /// Learned steps.
    count: usize,
    /// Sum of the mean Q of the taken actions over learned steps.
    q_taken_sum: f64,
    /// |TD error| of each sampled sequence's learned steps.
    abs_td: Vec<Vec<f32>>,
    /// Q-value discrepancy at the first and last learned steps, when measured.
    discrepancy: Option<(f64, f64)>,
}

impl ForwardPass {
    fn new(batch: usize) -> Self {
        ForwardPass {
            loss_sum: None,
            count: 0,
            q_taken_sum: 0.0,
            abs_td: vec![Vec::new(); batch],
            discrepancy: None,
        }
    }

    fn add_loss(&mut self, loss: Tensor) -> Result<()> {
        self.loss_sum = Some(match self.loss_sum.take() {
            None => loss,
            Some(sum) => (sum + loss).map_err(cerr)?,
        });
        Ok(())
    }

    /// The mean loss over all learned steps, or `None` when nothing was learnable.
    fn total_loss(&self) -> Result<Option<Tensor>> {
        match &self.loss_sum {
            Some(sum) if self.count > 0 => Ok(Some((sum / self.count as f64).map_err(cerr)?)),
            _ => Ok(None),
        }
    }
}

/// Host arrays of one group's targets.
struct GroupTargets {
    /// `[G, L]` taken actions.
    actions: Vec<u32>,
    /// `[G, L, K]` targets.
    values: Vec<f32>,
    /// `[G, L]`: 1 where the step is learned.
    mask: Vec<f32>,
    /// `[G]` importance weights.
    weights: Vec<f32>,
    /// Learned steps.
    count: usize,
}

/// Rows of the batch grouped by burn-in, groups in order of first appearance.
fn burn_in_groups(seqs: &[&Sequence], steps: usize) -> Vec<(usize, Vec<usize>)> {
    let mut groups: Vec<(usize, Vec<usize>)> = Vec::new();
    for (r, s) in seqs.iter().enumerate() {
        let burn = s.burn_in.min(steps - 1);
        match groups.iter_mut().find(|(g, _)| *g == burn) {
            Some((_, rows)) => rows.push(r),
            None => groups.push((burn, vec![r])),
        }
    }
    groups
}

/// The network inputs of the sequences `rows`: observations, previous actions and
/// rewards, start states (zero for mid-episode starts when the spec says so).
fn batch_inputs(seqs: &[&Sequence], rows: &[usize], dims: &Dims) -> BatchArrays {
    let mut arr = BatchArrays {
        rows: rows.len(),
        ..Default::default()
    };
    for &r in rows {
        let s = seqs[r];
        s.extend_obs(&mut arr.obs);
        arr.prev_action.extend_from_slice(&s.prev_action);
        arr.prev_reward.extend_from_slice(&s.prev_reward);
        if dims.zero_start && !s.episode_start {
            arr.start.extend(std::iter::repeat_n(0.0, dims.state_len));
        } else {
            arr.start.extend_from_slice(&s.start_state);
        }
    }
    arr
}

/// Step 2: the target network's Q over every entry of the batch, from the start states,
/// without gradient: `[B, T, A, K]` on the host.
fn target_q(target: &Network, arr: &BatchArrays, dims: &Dims) -> Result<Vec<f32>> {
    let out = target
        .unroll_no_grad(&arr.input(arr.rows, dims.steps, dims.state_len))
        .map_err(nets)?;
    host(&out.q)
}

/// A tensor's values on the host, flattened.
fn host(t: &Tensor) -> Result<Vec<f32>> {
    t.flatten_all().and_then(|x| x.to_vec1()).map_err(cerr)
}

/// Step 3: the online network over one group's sequences from their start states:
/// the burn-in entries without gradient (Kapturowski et al. 2019), then the learned
/// entries with it. Returns Q `[G, T - burn, A, K]`.
fn unroll_online(online: &Network, group: &Group<'_>, dims: &Dims) -> Result<Tensor> {
    let input = batch_inputs(group.seqs, group.rows, dims);
    let out = online
        .unroll(
            &input.input(input.rows, dims.steps, dims.state_len),
            group.burn,
        )
        .map_err(nets)?;
    Ok(out.q)
}

/// The view of a sequence's outcomes that the n-step return reads.
fn outcomes(s: &Sequence) -> loss::Outcomes<'_> {
    loss::Outcomes {
        len: s.len,
        reward: &s.reward,
        terminal: &s.terminal,
        has_outcome: &s.has_outcome,
    }
}

/// Step 4: n-step double-Q targets of one group's learned steps. `q_online` `[G, T -
/// burn, A, K]`, `q_target` `[B, T, A, K]`. Adds each step's |TD error| (targets and Q
/// averaged over quantiles) and taken-action Q to `pass`.
fn group_targets(
    spec: &Spec,
    group: &Group<'_>,
    dims: &Dims,
    q_online: &[f32],
    q_target: &[f32],
    pass: &mut ForwardPass,
) -> GroupTargets {
    let (burn, nq, entry) = (group.burn, dims.quantiles, dims.entry());
    let (l, bg) = (dims.steps - burn, group.rows.len());
    let (gamma, eps) = (spec.learn.discount, spec.learn.rescale);
    let mut out = GroupTargets {
        actions: vec![0u32; bg * l],
        values: vec![0f32; bg * l * nq],
        mask: vec![0f32; bg * l],
        weights: vec![0f32; bg],
        count: 0,
    };
    for (gi, &r) in group.rows.iter().enumerate() {
        let s = group.seqs[r];
        out.weights[gi] = group.draws[r].weight;
        let online_at = |j: usize| &q_online[(gi * l + j - burn) * entry..][..entry];
        let target_at = |j: usize| &q_target[(r * dims.steps + j) * entry..][..entry];
        for step in burn..s.len {
            if !s.learnable(step) {
                continue;
            }
            let ret = loss::n_step_return(&outcomes(s), step, spec.learn.n_step, gamma);
            let act = s.action[step] as usize;
            let at = gi * l + (step - burn);
            out.actions[at] = act as u32;
            out.mask[at] = 1.0;
            out.count += 1;
            let taken = &online_at(step)[act * nq..(act + 1) * nq];
            let q_mean = taken.iter().map(|&q| q as f64).sum::<f64>() / nq as f64;
            // Double Q: the online network picks the action, the target network values it.
            let boot = ret.bootstrap.map(|j| {
                let best = loss::double_q_action(online_at(j), nq);
                &target_at(j)[best * nq..(best + 1) * nq]
            });
            let mut y_mean = 0.0f64;
            for i in 0..nq {
                let y = loss::n_step_target(&ret, boot.map(|b| b[i] as f64), gamma, eps);
                out.values[at * nq + i] = y as f32;
                y_mean += y / nq as f64;
            }
            pass.abs_td[r].push((y_mean - q_mean).abs() as f32);
            pass.q_taken_sum += q_mean;
        }
    }
    pass.count += out.count;
    out
}

/// Step 5: one group's loss (importance-weighted TD or quantile Huber) times its learned
/// steps, so that the sum over groups divided by all learned steps is the batch mean.
fn group_loss(
    spec: &Spec,
    q: &Tensor,
    targets: GroupTargets,
    (bg, l, nq): (usize, usize, usize),
) -> Result<Tensor> {
    let dev = Device::Cpu;
    let taken = loss::gather_actions(q, &targets.actions).map_err(nets)?;
    let mask = Tensor::from_vec(targets.mask, (bg, l), &dev).map_err(cerr)?;
    let w = Tensor::from_vec(targets.weights, bg, &dev).map_err(cerr)?;
    let loss = match spec.agent.head {
        Head::Quantile { kappa, .. } => {
            let y = Tensor::from_vec(targets.values, (bg, l, nq), &dev).map_err(cerr)?;
            loss::quantile_huber_loss(&taken, &y, &mask, &w, kappa).map_err(nets)?
        }
        _ => {
            let y = Tensor::from_vec(targets.values, (bg, l), &dev).map_err(cerr)?;
            loss::td_loss(&taken, &y, &mask, &w, spec.learn.loss).map_err(nets)?
        }
    };
    (loss * targets.count as f64).map_err(cerr)
}

/// The Q-value discrepancy of the first sequence of the group that can be measured.
fn group_discrepancy(
    net: &mut ActorNet,
    params: &Params,
    group: &Group<'_>,
    q_online: &[f32],
    dims: &Dims,
) -> Option<(f64, f64)> {
    let row = dims.online_row(group.burn);
    group.rows.iter().enumerate().find_map(|(gi, &r)| {
        let q_row = &q_online[gi * row..(gi + 1) * row];
        stored_state_discrepancy(net, params, group.seqs[r], q_row, group.burn, dims)
    })
}

/// The Q-value discrepancy of `s` at its first and last learned entries: the learner's
/// Q there (`q_row`, the online unroll's `[T - burn, A, K]` of `s`) against the Q that
/// `net`, refreshed to the published parameters, computes from the actor's stored state
/// (Kapturowski et al. 2019). `None` when a measured entry lies in the burn-in.
fn stored_state_discrepancy(
    net: &mut ActorNet,
    params: &Params,
    s: &Sequence,
    q_row: &[f32],
    burn: usize,
    dims: &Dims,
) -> Option<(f64, f64)> {
    if s.discrepancy_states.len() != 2 {
        return None;
    }
    net.refresh(params).ok()?;
    let (a, entry) = (dims.actions, dims.entry());
    let mut out = [0.0f64; 2];
    let mut q_fresh = Vec::with_capacity(a);
    for (k, (idx, state)) in s.discrepancy_states.iter().enumerate() {
        if *idx < burn {
            return None;
        }
        let mut st = state.clone();
        let mut q_stored = vec![0f32; a];
        let prev = [s.prev_action[*idx] as usize];
        net.step(
            &s.obs_at(*idx),
            &prev,
            &s.prev_reward[*idx..idx + 1],
            &mut st,
            &mut q_stored,
        )
        .ok()?;
        let at = (idx - burn) * entry;
        loss::action_means(&q_row[at..at + entry], dims.quantiles, &mut q_fresh);
        out[k] = loss::q_discrepancy(&q_fresh, &q_stored).ok()?;
    }
    Some((out[0], out[1]))
}

struct UpdateStats {
    loss: f64,
    mean_q: f64,
    discrepancy: Option<(f64, f64)>,
}

/// Network inputs of a batch's rows.
#[derive(Default)]
struct BatchArrays {
    rows: usize,
    obs: Vec<f32>,
    prev_action: Vec<u32>,
    prev_reward: Vec<f32>,
    start: Vec<f32>,
}

impl BatchArrays {
    fn input(&self, batch: usize, steps: usize, state_len: usize) -> UnrollInput<'_> {
        UnrollInput {
            batch,
            steps,
            obs: &self.obs,
            prev_action: &self.prev_action,
            prev_reward: &self.prev_reward,
            start: (state_len > 0).then_some(self.start.as_slice()),
        }
    }
}

fn cerr(e: candle_core::Error) -> Error {
    Error::from(mnemon_nets::Error::from(e))
}

fn extra_u64(extra: &std::collections::BTreeMap<String, String>, key: &str) -> u64 {
    extra.get(key).and_then(|v| v.parse().ok()).unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn seq_with(rewards: &[f32], terminal_at: Option<usize>, len: usize) -> Sequence {
        let mut s = Sequence::empty(len.max(1), 1, 0);
        for i in 0..len {
            s.push_entry(&[i as f32], 0, 0.0, &[]);
            if i < rewards.len() {
                s.set_outcome(i, 0, rewards[i], terminal_at == Some(i));
            }
        }
        s
    }

    // n-step double-Q target with rescaling, read from a stored sequence: worked example
    // in ../shared/REFERENCE.md (van Hasselt et al. 2016; Pohlen et al. 2018), g = 0.997,
    // n = 5, rewards [1,0,0,0,1], Q_online(s5) = [1, 2, 1.5], Q_target(s5) = [0.8, 1.7, 2.2]
    // -> y = 2.033217439254.
    #[test]
    fn n_step_double_q_target_matches_worked_value() {
        let s = seq_with(&[1.0, 0.0, 0.0, 0.0, 1.0, 0.0], None, 7);
        let ret = loss::n_step_return(&outcomes(&s), 0, 5, 0.997);
        assert_eq!((ret.steps, ret.bootstrap), (5, Some(5)));
        assert!((ret.rewards - 1.988053892081).abs() < 1e-9);
        let best = loss::double_q_action(&[1.0, 2.0, 1.5], 1);
        let target = [0.8f64, 1.7, 2.2];
        let y = loss::n_step_target(&ret, Some(target[best]), 0.997, 1e-3);
        assert!((y - 2.033217439254).abs() < 1e-9, "{y}");
        let plain = loss::n_step_target(&ret, Some(target[best]), 0.997, 0.0);
        assert!((plain - 3.662706433769).abs() < 1e-9);
    }

    // Terminal after 3 steps with rewards [1, 0, 1]: y = h(1 + g^2) = 0.732314499545
    // (../shared/REFERENCE.md).
    #[test]
    fn terminal_stops_the_bootstrap() {
        let s = seq_with(&[1.0, 0.0, 1.0], Some(2), 3);
        let ret = loss::n_step_return(&outcomes(&s), 0, 5, 0.997);
        assert_eq!(ret.bootstrap, None);
        let y = loss::n_step_target(&ret, None, 0.997, 1e-3);
        assert!((y - 0.732314499545).abs() < 1e-9);
    }

    // Pardo et al. 2018: a truncated episode bootstraps from its final observation.
    #[test]
    fn truncation_bootstraps_from_the_final_observation() {
        // Three steps with outcomes, then the final observation of a truncated episode.
        let s = seq_with(&[1.0, 1.0, 1.0], None, 4);
        let ret = loss::n_step_return(&outcomes(&s), 1, 5, 0.5);
        assert_eq!((ret.steps, ret.bootstrap), (2, Some(3)));
        assert!((ret.rewards - 1.5).abs() < 1e-12);
    }

    // The learner's batch layout around the worked example of ../shared/REFERENCE.md
    // (van Hasselt et al. 2016; Pohlen et al. 2018): rewards [1, 0, 0, 0, 1] from the
    // first learned step of a sequence with burn-in 1, Q_online = [1, 2, 1.5] and
    // Q_target = [0.8, 1.7, 2.2] five steps on, g = 0.997, n = 5 -> y = 2.033217439254.
    #[test]
    fn group_targets_read_the_worked_example_from_the_batch_layout() {
        let text = "[task]\nkind = \"tmaze\"\n[replay]\nsequence = 8\noverlap = 2\nburn_in = 1\n\
                    [learn]\ndiscount = 0.997\nn_step = 5\nrescale = 0.001\n";
        let spec = mnemon_spec::load_str(text, "test.toml", &[]).unwrap().spec;
        let dims = Dims {
            steps: 8,
            actions: 3,
            quantiles: 1,
            state_len: 0,
            zero_start: false,
        };
        let other = seq_with(&[0.0; 7], None, 8);
        let mut s = seq_with(&[9.0, 1.0, 0.0, 0.0, 0.0, 1.0, 0.0], None, 8);
        s.burn_in = 1;
        s.action[1] = 2;
        let seqs = [&other, &s];
        let draws = [
            Draw {
                slot: 0,
                weight: 0.5,
            },
            Draw {
                slot: 1,
                weight: 0.25,
            },
        ];
        let group = Group {
            burn: 1,
            rows: &[1],
            seqs: &seqs,
            draws: &draws,
        };
        // Online Q of the group, [1, T - burn, A]: entry j at (j - 1) * A.
        let mut q_online = vec![0f32; 7 * 3];
        q_online[0..3].copy_from_slice(&[0.0, 0.0, 0.25]);
        q_online[5 * 3..6 * 3].copy_from_slice(&[1.0, 2.0, 1.5]);
        // Target Q of the batch, [B, T, A]: the other row holds values that must not be read.
        let mut q_target = vec![5f32; 2 * 8 * 3];
        q_target[(8 + 6) * 3..(8 + 7) * 3].copy_from_slice(&[0.8, 1.7, 2.2]);
        let mut pass = ForwardPass::new(2);
        let out = group_targets(&spec, &group, &dims, &q_online, &q_target, &mut pass);
        let y = out.values[0] as f64;
        assert!((y - 2.033217439254).abs() < 1e-6, "y = {y}");
        assert_eq!((out.actions[0], out.mask[0]), (2, 1.0));
        assert_eq!(out.weights, vec![0.25]);
        assert_eq!(
            out.count, 6,
            "steps 1..=6 are learned; entry 7 only bootstraps"
        );
        assert_eq!(out.mask[6], 0.0);
        assert!((pass.abs_td[1][0] as f64 - (y - 0.25)).abs() < 1e-6);
        assert!(pass.abs_td[0].is_empty());
        assert_eq!(pass.count, 6);
    }
}
