//! The benchmark work shared with the PyTorch reference (`scripts/torch_peer.py`):
//! timed here, printed by `mnemon bench`. Not a test; nothing here asserts a time.
//!
//! learner: B sequences of T steps (default 60, of which 20 burn-in without gradient),
//! observation O (default 16) -> Linear 128 + ReLU -> LSTM H -> Linear 4; gather Q at the
//! taken actions of the learned steps, MSE to given targets, backward, Adam (rate 1e-4).
//! With a target network also its no-grad forward over all steps and the max over
//! actions.
//! actor: one step of the same network for a batch of lanes, Q values on the host,
//! recurrent state carried to the next call.
//! matmul: a large square matrix product, to measure the machine's matmul peak.

use std::time::Instant;

use candle_core::{Device, Tensor};
use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};
use rand::{Rng, SeedableRng};

use crate::error::Result;
use crate::{loss, ActorNet, NetShape, Network, ObsShape, Optimizer, UnrollInput};

/// Steps per sequence.
pub const STEPS: usize = 60;
/// Burn-in steps.
pub const BURN_IN: usize = 20;
/// Observation width.
pub const OBS: usize = 16;
/// Torso width.
pub const EMBED: usize = 128;
/// Actions.
pub const ACTIONS: usize = 4;

/// The benchmark network's spec.
pub fn agent(hidden: usize) -> AgentSpec {
    AgentSpec {
        torso: Torso::Mlp {
            layers: vec![EMBED],
            activation: Activation::Relu,
        },
        memory: Memory::Lstm { size: hidden },
        head: Head::Value,
        previous_action_reward: false,
    }
}

/// The benchmark task's shape.
pub fn shape() -> NetShape {
    shape_with_obs(OBS)
}

/// The benchmark task's shape with observations of `obs` values.
pub fn shape_with_obs(obs: usize) -> NetShape {
    NetShape {
        obs: ObsShape::Vector(obs),
        actions: ACTIONS,
    }
}

/// Times of the timed iterations.
#[derive(Debug, Clone)]
pub struct Timing {
    /// One entry per timed iteration, in the unit the caller asked for.
    pub times: Vec<f64>,
    /// A value from the last output, so the work cannot be optimised away.
    pub check: f32,
}

impl Timing {
    /// Median.
    pub fn median(&self) -> f64 {
        let mut v = self.times.clone();
        v.sort_by(|a, b| a.total_cmp(b));
        let n = v.len();
        if n == 0 {
            return f64::NAN;
        }
        if n % 2 == 1 {
            v[n / 2]
        } else {
            (v[n / 2 - 1] + v[n / 2]) / 2.0
        }
    }
    /// Minimum.
    pub fn min(&self) -> f64 {
        self.times.iter().cloned().fold(f64::INFINITY, f64::min)
    }
    /// Maximum.
    pub fn max(&self) -> f64 {
        self.times.iter().cloned().fold(f64::NEG_INFINITY, f64::max)
    }
}

struct Batch {
    obs: Vec<f32>,
    start: Vec<f32>,
    actions: Vec<u32>,
    y: Tensor,
}

/// The sizes of one learner benchmark.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LearnerSize {
    /// Sequences per batch (B).
    pub batch: usize,
    /// LSTM width (H).
    pub hidden: usize,
    /// Observation width.
    pub obs: usize,
    /// Steps per sequence, burn-in included (T).
    pub steps: usize,
    /// Burn-in steps (< `steps`).
    pub burn_in: usize,
}

impl Default for LearnerSize {
    fn default() -> Self {
        LearnerSize {
            batch: 32,
            hidden: 128,
            obs: OBS,
            steps: STEPS,
            burn_in: BURN_IN,
        }
    }
}

impl LearnerSize {
    /// Floating-point operations of one learner step (multiply and add counted apart),
    /// counting the matrix products only: the torso, the LSTM's input projection and
    /// recurrence over all steps and the head over the learned steps forward; for the
    /// learned steps their weight gradients and input gradients backward (no input
    /// gradient of the first layer). The elementwise work is left out, so this is the
    /// work a matmul-bound implementation cannot avoid.
    pub fn matmul_flops(&self) -> f64 {
        let (b, h, o) = (self.batch as f64, self.hidden as f64, self.obs as f64);
        let (e, a) = (EMBED as f64, ACTIONS as f64);
        let t = self.steps as f64;
        let l = (self.steps - self.burn_in) as f64;
        let fwd = 2.0 * b * (t * (o * e + e * 4.0 * h + h * 4.0 * h) + l * h * a);
        let bwd = 2.0 * b * l * (o * e + 2.0 * (e * 4.0 * h + h * 4.0 * h) + 2.0 * h * a);
        fwd + bwd
    }
}

/// Learner steps: 5 untimed, then `iters` timed (milliseconds).
pub fn learner(size: LearnerSize, with_target: bool, iters: usize) -> Result<Timing> {
    let LearnerSize {
        batch,
        hidden,
        obs: obs_len,
        steps: t_len,
        burn_in,
    } = size;
    if burn_in >= t_len {
        return Err(crate::Error::shape(
            "learner benchmark",
            format!("burn-in < steps ({t_len})"),
            format!("burn-in {burn_in}"),
        ));
    }
    let net = Network::new(&agent(hidden), shape_with_obs(obs_len), 1)?;
    let target = if with_target {
        Some(Network::new(&agent(hidden), shape_with_obs(obs_len), 2)?)
    } else {
        None
    };
    let mut opt = Optimizer::new(&net, 1e-8, 0.0);
    let (b, h, l) = (batch, hidden, t_len - burn_in);
    let mut rng = rand::rngs::StdRng::seed_from_u64(0);
    let mut normal = move || -> f32 {
        // Box-Muller: standard normals, as the reference draws
        let (u1, u2): (f32, f32) = (rng.random_range(1e-7..1.0), rng.random_range(0.0..1.0));
        (-2.0 * u1.ln()).sqrt() * (std::f32::consts::TAU * u2).cos()
    };
    let mut batches = Vec::new();
    for i in 0..4u64 {
        let obs = (0..b * t_len * obs_len).map(|_| normal()).collect();
        let start = (0..b * 2 * h).map(|_| 0.1 * normal()).collect();
        let y: Vec<f32> = (0..b * l).map(|_| normal()).collect();
        let mut arng = rand::rngs::StdRng::seed_from_u64(100 + i);
        let actions = (0..b * l)
            .map(|_| arng.random_range(0..ACTIONS as u32))
            .collect();
        batches.push(Batch {
            obs,
            start,
            actions,
            y: Tensor::from_vec(y, (b, l), &Device::Cpu)?,
        });
    }
    let no_action = vec![ACTIONS as u32; b * t_len];
    let no_reward = vec![0f32; b * t_len];
    let mut times = Vec::with_capacity(iters);
    let mut check = 0f32;
    for it in 0..5 + iters {
        let bt = &batches[it % 4];
        let input = UnrollInput {
            batch: b,
            steps: t_len,
            obs: &bt.obs,
            prev_action: &no_action,
            prev_reward: &no_reward,
            start: Some(&bt.start),
        };
        let t0 = Instant::now();
        if let Some(tg) = &target {
            let q = tg.unroll_no_grad(&input)?.q;
            std::hint::black_box(q.max(2)?);
        }
        let out = net.unroll(&input, burn_in)?;
        let q = loss::gather_actions(&out.q, &bt.actions)?;
        let mse = (q - &bt.y)?.sqr()?.mean_all()?;
        let grads = mse.backward()?;
        opt.step(&net, &grads, 1e-4)?;
        if it >= 5 {
            times.push(t0.elapsed().as_secs_f64() * 1e3);
            check = mse.to_scalar::<f32>()?;
        }
    }
    Ok(Timing { times, check })
}

/// Actor steps over `lanes` lanes: 200 untimed, then `iters` timed (microseconds).
pub fn actor(lanes: usize, hidden: usize, iters: usize) -> Result<Timing> {
    let net = Network::new(&agent(hidden), shape(), 1)?;
    let mut actor = ActorNet::new(&net)?;
    let mut rng = rand::rngs::StdRng::seed_from_u64(0);
    let obs: Vec<f32> = (0..lanes * OBS)
        .map(|_| rng.random_range(-1.0..1.0))
        .collect();
    let prev_a = vec![ACTIONS; lanes];
    let prev_r = vec![0f32; lanes];
    let mut state = vec![0f32; lanes * actor.state_len()];
    let mut q = vec![0f32; lanes * ACTIONS];
    let mut times = Vec::with_capacity(iters);
    for it in 0..200 + iters {
        let t0 = Instant::now();
        actor.step(&obs, &prev_a, &prev_r, &mut state, &mut q)?;
        std::hint::black_box(&q);
        if it >= 200 {
            times.push(t0.elapsed().as_secs_f64() * 1e6);
        }
    }
    Ok(Timing { times, check: q[0] })
}

/// The matmul peak: GFLOP/s of a `size` x `size` by `size` x `size` product of
/// contiguous f32 matrices on `threads` threads (gemm's rayon split; the rayon pool
/// must have that many threads), best of `reps` after one untimed run.
pub fn matmul_peak(size: usize, threads: usize, reps: usize) -> f64 {
    let n = size.max(1);
    let a: Vec<f32> = (0..n * n)
        .map(|i| ((i % 97) as f32 - 48.0) / 97.0)
        .collect();
    let b: Vec<f32> = (0..n * n)
        .map(|i| ((i % 89) as f32 - 44.0) / 89.0)
        .collect();
    let mut c = vec![0f32; n * n];
    let par = if threads > 1 {
        gemm::Parallelism::Rayon(threads)
    } else {
        gemm::Parallelism::None
    };
    let mut best = f64::INFINITY;
    for rep in 0..reps.max(1) + 1 {
        let t0 = Instant::now();
        // SAFETY: three n x n contiguous buffers, `c` distinct from `a` and `b`.
        unsafe {
            crate::raw::strided_matmul(
                n,
                n,
                n,
                c.as_mut_ptr(),
                n,
                false,
                a.as_ptr(),
                n as isize,
                1,
                b.as_ptr(),
                n as isize,
                1,
                par,
            )
        };
        std::hint::black_box(&c);
        if rep > 0 {
            best = best.min(t0.elapsed().as_secs_f64());
        }
    }
    2.0 * (n as f64).powi(3) / best / 1e9
}
