//! The learner: owns the replay, the online and target networks and the optimizer;
//! turns sampled sequences into n-step double-Q (or quantile) updates.
//!
//! One update, top to bottom:
//! 1. sample a batch of sequences by priority (`replay`);
//! 2. unroll the target network over every step from the start state (no gradient);
//! 3. unroll the online network: sequences that start mid-episode burn in first
//!    (no gradient, Kapturowski et al. 2019), sequences that start at their episode's
//!    first step are learned from step 0 (their zero start state is exact);
//! 4. n-step double-Q targets with value rescaling h (van Hasselt et al. 2016;
//!    Pohlen et al. 2018), bootstrapping through time-limit truncation;
//! 5. importance-weighted TD loss (or quantile Huber loss, Dabney et al. 2017);
//! 6. backward, global-norm clip, Adam; new sequence priorities; target copy when due.

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
use crate::explore::argmax;
use crate::replay::{sequence_priority, Replay};
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

/// h(x) when rescaling is on (eps > 0), else x.
fn rescale(x: f64, eps: f64) -> f64 {
    if eps > 0.0 {
        loss::h(x, eps)
    } else {
        x
    }
}

/// h^-1(y) when rescaling is on (eps > 0), else y.
fn unscale(y: f64, eps: f64) -> f64 {
    if eps > 0.0 {
        loss::h_inv(y, eps)
    } else {
        y
    }
}

/// Where an n-step target bootstraps from: `(reward sum, discount power k, bootstrap
/// index or None)` for entry `t` of `seq`.
pub fn n_step(seq: &Sequence, t: usize, n: usize, gamma: f64) -> (f64, usize, Option<usize>) {
    let mut g = 0.0;
    for k in 0..n {
        let idx = t + k;
        let last = idx + 1 >= seq.len;
        if k > 0 && last && !(seq.has_outcome[idx] && seq.terminal[idx]) {
            return (g, k, Some(idx));
        }
        g += gamma.powi(k as i32) * seq.reward[idx] as f64;
        if seq.terminal[idx] {
            return (g, k + 1, None);
        }
    }
    (g, n, Some(t + n))
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
    probe: ActorNet,
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
    let loaded = mnemon_nets::checkpoint::load(path).map_err(|e| Error::Input(e.to_string()))?;
    Ok(LoadedParams {
        params: loaded.online,
        spec_toml: loaded.meta.spec_toml,
    })
}

/// Checks that a checkpoint's network fits the (possibly overridden) spec's task.
pub fn check_task_fits(spec: &Spec, params: &Params) -> Result<()> {
    let lanes =
        mnemon_envs::Lanes::new(&spec.task, 1, 0).map_err(|e| Error::Task(e.to_string()))?;
    let shape = net_shape(lanes.task());
    let net = Network::new(&spec.agent, shape, 0).map_err(|e| Error::Internal(e.to_string()))?;
    let fresh = net.snapshot().map_err(|e| Error::Internal(e.to_string()))?;
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
    Error::Internal(e.to_string())
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
        let probe = ActorNet::from_params(&spec.agent, shape, &params).map_err(nets)?;
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
            probe,
        })
    }

    /// A learner restored from a checkpoint (weights, target, optimizer, counters); the
    /// replay starts empty and refills.
    pub fn resume(spec: &Spec, shape: NetShape, path: &Path) -> Result<(Self, CheckpointMeta)> {
        let loaded =
            mnemon_nets::checkpoint::load(path).map_err(|e| Error::Input(e.to_string()))?;
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
            .map_err(|e| Error::io(path, std::io::Error::other(e.to_string())))
    }

    /// One round: insert the new sequences, then update until the replay ratio is met.
    pub fn round(&mut self, sequences: Vec<Sequence>, _env_steps: u64) -> Result<LearnStats> {
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

    fn update(&mut self) -> Result<UpdateStats> {
        let spec = &self.spec;
        let b = spec.learn.batch;
        let draws = self.replay.sample_weighted(b, &mut self.rng);
        if draws.is_empty() {
            return Err(Error::Internal("replay is empty".into()));
        }
        let seqs: Vec<&Sequence> = draws
            .iter()
            .map(|d| {
                self.replay
                    .get(d.slot)
                    .expect("sampled slots hold sequences")
            })
            .collect();
        let t = spec.replay.sequence;
        let a = self.shape.actions;
        let nq = self.online.quantiles();
        let sl = self.online.state_len();
        let zero_start = spec.replay.start_state == StartState::Zero;

        // Batch arrays over all rows.
        let gather = |rows: &[usize]| -> BatchArrays {
            let mut arr = BatchArrays::default();
            for &r in rows {
                let s = seqs[r];
                s.extend_obs(&mut arr.obs);
                arr.prev_action.extend_from_slice(&s.prev_action);
                arr.prev_reward.extend_from_slice(&s.prev_reward);
                if zero_start && !s.episode_start {
                    arr.start.extend(std::iter::repeat_n(0.0, sl));
                } else {
                    arr.start.extend_from_slice(&s.start_state);
                }
            }
            arr
        };
        let all: Vec<usize> = (0..seqs.len()).collect();
        let full = gather(&all);
        let full_in = full.input(seqs.len(), t, sl);
        let q_target = self.target.unroll_no_grad(&full_in).map_err(nets)?;
        let q_target: Vec<f32> = q_target
            .q
            .flatten_all()
            .and_then(|x| x.to_vec1())
            .map_err(|e| Error::Internal(e.to_string()))?;
        let row_t = t * a * nq; // floats per row of q_target

        // Online unrolls, one per burn-in group.
        let burns: Vec<usize> = seqs.iter().map(|s| s.burn_in.min(t - 1)).collect();
        let mut groups: Vec<(usize, Vec<usize>)> = Vec::new();
        for (r, &bi) in burns.iter().enumerate() {
            match groups.iter_mut().find(|(g, _)| *g == bi) {
                Some((_, rows)) => rows.push(r),
                None => groups.push((bi, vec![r])),
            }
        }
        let gamma = spec.learn.discount;
        let eps = spec.learn.rescale;
        let mut losses: Vec<Tensor> = Vec::new();
        let mut abs_td: Vec<Vec<f32>> = vec![Vec::new(); seqs.len()];
        let mut count = 0usize;
        let mut q_taken_sum = 0.0f64;
        let mut discrepancy: Option<(f64, f64)> = None;
        let measure = self.learner_steps.is_multiple_of(50) && sl > 0;
        for (burn, rows) in &groups {
            let arr = gather(rows);
            let input = arr.input(rows.len(), t, sl);
            let out = self.online.unroll(&input, *burn).map_err(nets)?;
            let l = t - burn;
            let q_host: Vec<f32> = out
                .q
                .detach()
                .flatten_all()
                .and_then(|x| x.to_vec1())
                .map_err(|e| Error::Internal(e.to_string()))?;
            let row_o = l * a * nq;
            let bg = rows.len();
            let mut actions = vec![0u32; bg * l];
            let mut targets = vec![0f32; bg * l * nq];
            let mut mask = vec![0f32; bg * l];
            let mut weights = vec![0f32; bg];
            let mut group_count = 0usize;
            for (gi, &r) in rows.iter().enumerate() {
                let s = seqs[r];
                weights[gi] = draws[r].weight;
                for step in *burn..s.len {
                    if !s.learnable(step) {
                        continue;
                    }
                    let (g, k, boot) = n_step(s, step, spec.learn.n_step, gamma);
                    let qo = |j: usize, act: usize, i: usize| {
                        q_host[gi * row_o + ((j - burn) * a + act) * nq + i]
                    };
                    let qt = |j: usize, act: usize, i: usize| {
                        q_target[r * row_t + (j * a + act) * nq + i]
                    };
                    let act = s.action[step] as usize;
                    let at = gi * l + (step - burn);
                    actions[at] = act as u32;
                    mask[at] = 1.0;
                    group_count += 1;
                    let disc = gamma.powi(k as i32);
                    let q_mean = (0..nq).map(|i| qo(step, act, i) as f64).sum::<f64>() / nq as f64;
                    let mut y_mean = 0.0f64;
                    for i in 0..nq {
                        let y = match boot {
                            None => rescale(g, eps),
                            Some(j) => {
                                // Double Q: the online network picks the action (mean over
                                // quantiles), the target network values it.
                                let means: Vec<f32> = (0..a)
                                    .map(|x| (0..nq).map(|q| qo(j, x, q)).sum::<f32>() / nq as f32)
                                    .collect();
                                let best = argmax(&means);
                                rescale(g + disc * unscale(qt(j, best, i) as f64, eps), eps)
                            }
                        };
                        targets[at * nq + i] = y as f32;
                        y_mean += y / nq as f64;
                    }
                    abs_td[r].push((y_mean - q_mean).abs() as f32);
                    q_taken_sum += q_mean;
                }
                if measure && discrepancy.is_none() {
                    discrepancy = q_discrepancy(
                        &mut self.probe,
                        &self.params,
                        s,
                        &q_host[gi * row_o..(gi + 1) * row_o],
                        *burn,
                        a,
                        nq,
                    );
                }
            }
            if group_count == 0 {
                continue;
            }
            count += group_count;
            let dev = Device::Cpu;
            let taken = loss::gather_actions(&out.q, &actions).map_err(nets)?;
            let mask_t = Tensor::from_vec(mask, (bg, l), &dev).map_err(cerr)?;
            let w = Tensor::from_vec(weights, bg, &dev).map_err(cerr)?;
            let group_loss = match spec.agent.head {
                Head::Quantile { kappa, .. } => {
                    let y = Tensor::from_vec(targets, (bg, l, nq), &dev).map_err(cerr)?;
                    loss::quantile_huber_loss(&taken, &y, &mask_t, &w, kappa).map_err(nets)?
                }
                _ => {
                    let y = Tensor::from_vec(targets, (bg, l), &dev).map_err(cerr)?;
                    loss::td_loss(&taken, &y, &mask_t, &w, spec.learn.loss).map_err(nets)?
                }
            };
            // Each group's loss is a mean over its steps; weigh by its share of steps.
            losses.push((group_loss * group_count as f64).map_err(cerr)?);
        }
        if count == 0 {
            // Nothing learnable in this batch (all burn-in): count it as sampled so the
            // ratio controller still advances.
            self.sampled += seqs.len() as u64;
            return Ok(UpdateStats {
                loss: 0.0,
                mean_q: 0.0,
                discrepancy,
            });
        }
        let mut total = losses[0].clone();
        for l in &losses[1..] {
            total = (total + l).map_err(cerr)?;
        }
        let total = (total / count as f64).map_err(cerr)?;
        let loss_v = total.to_scalar::<f32>().map_err(cerr)? as f64;
        let mean_q = q_taken_sum / count as f64;
        if !loss_v.is_finite() || !mean_q.is_finite() {
            return Err(Error::NonFinite(format!(
                "learner step {}: the loss became {loss_v} (mean Q {mean_q}); the update was not applied. \
                 Lower learn.rate, set learn.clip, or keep learn.rescale on.",
                self.learner_steps
            )));
        }
        let rate = spec.learn.rate.at(self.learner_steps);
        let grads = total.backward().map_err(cerr)?;
        self.opt.step(&self.online, &grads, rate).map_err(nets)?;
        self.learner_steps += 1;
        self.sampled += count as u64;
        let eta = spec.replay.priority_mix;
        let updates: Vec<(usize, f64)> = draws
            .iter()
            .zip(&abs_td)
            .filter(|(_, td)| !td.is_empty())
            .map(|(d, td)| (d.slot, sequence_priority(td, eta)))
            .collect();
        self.replay.update_priorities(&updates);
        if self
            .learner_steps
            .is_multiple_of(spec.learn.target_every.max(1))
        {
            self.target.copy_from(&self.online).map_err(nets)?;
        }
        Ok(UpdateStats {
            loss: loss_v,
            mean_q,
            discrepancy,
        })
    }
}

/// Q-value discrepancy (Kapturowski et al. 2019) at the first and last learned
/// entries of `s`: ||q(h_hat) - q(h)||_2 / |max q(h_hat)|, h the actor's stored state,
/// h_hat the state the learner recomputed (`q_row`, the online unroll's Q of `s`).
fn q_discrepancy(
    probe: &mut ActorNet,
    params: &Params,
    s: &Sequence,
    q_row: &[f32],
    burn: usize,
    a: usize,
    nq: usize,
) -> Option<(f64, f64)> {
    {
        if s.probes.len() != 2 {
            return None;
        }
        probe.refresh(params).ok()?;
        let mut out = [0.0f64; 2];
        for (k, (idx, state)) in s.probes.iter().enumerate() {
            if *idx < burn {
                return None;
            }
            let mut st = state.clone();
            let mut q_stored = vec![0f32; a];
            let prev = [s.prev_action[*idx] as usize];
            probe
                .step(
                    &s.obs_at(*idx),
                    &prev,
                    &s.prev_reward[*idx..idx + 1],
                    &mut st,
                    &mut q_stored,
                )
                .ok()?;
            let q_hat: Vec<f32> = (0..a)
                .map(|x| {
                    (0..nq)
                        .map(|i| q_row[((idx - burn) * a + x) * nq + i])
                        .sum::<f32>()
                        / nq as f32
                })
                .collect();
            let diff: f64 = q_hat
                .iter()
                .zip(&q_stored)
                .map(|(x, y)| ((x - y) as f64).powi(2))
                .sum::<f64>()
                .sqrt();
            let scale = q_hat.iter().fold(0f32, |m, v| m.max(v.abs())).max(1e-6) as f64;
            out[k] = diff / scale;
        }
        Some((out[0], out[1]))
    }
}

struct UpdateStats {
    loss: f64,
    mean_q: f64,
    discrepancy: Option<(f64, f64)>,
}

#[derive(Default)]
struct BatchArrays {
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
    Error::Internal(e.to_string())
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

    // n-step double-Q target with rescaling: worked example in ../shared/REFERENCE.md
    // (van Hasselt et al. 2016; Pohlen et al. 2018), g = 0.997, n = 5, rewards [1,0,0,0,1],
    // Q_online(s5) = [1, 2, 1.5], Q_target(s5) = [0.8, 1.7, 2.2] -> y = 2.033217439254.
    #[test]
    fn n_step_double_q_target_matches_worked_value() {
        let s = seq_with(&[1.0, 0.0, 0.0, 0.0, 1.0, 0.0], None, 7);
        let (g, k, boot) = n_step(&s, 0, 5, 0.997);
        assert_eq!((k, boot), (5, Some(5)));
        assert!((g - 1.988053892081).abs() < 1e-9);
        let online = [1.0f32, 2.0, 1.5];
        let target = [0.8f64, 1.7, 2.2];
        let best = argmax(&online);
        let y = rescale(g + 0.997f64.powi(5) * unscale(target[best], 1e-3), 1e-3);
        assert!((y - 2.033217439254).abs() < 1e-9, "{y}");
        let plain = g + 0.997f64.powi(5) * target[best];
        assert!((plain - 3.662706433769).abs() < 1e-9);
    }

    // Terminal after 3 steps with rewards [1, 0, 1]: y = h(1 + g^2) = 0.732314499545
    // (../shared/REFERENCE.md).
    #[test]
    fn terminal_stops_the_bootstrap() {
        let s = seq_with(&[1.0, 0.0, 1.0], Some(2), 3);
        let (g, _, boot) = n_step(&s, 0, 5, 0.997);
        assert_eq!(boot, None);
        assert!((rescale(g, 1e-3) - 0.732314499545).abs() < 1e-9);
    }

    #[test]
    fn truncation_bootstraps_from_the_final_observation() {
        // Three steps with outcomes, then the final observation of a truncated episode.
        let s = seq_with(&[1.0, 1.0, 1.0], None, 4);
        let (g, k, boot) = n_step(&s, 1, 5, 0.5);
        assert_eq!((k, boot), (2, Some(3)));
        assert!((g - 1.5).abs() < 1e-12);
    }
}
