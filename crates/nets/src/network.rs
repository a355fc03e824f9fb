//! The assembled network: torso -> memory -> head, built from an [`AgentSpec`].
//!
//! [`Network`] owns candle `Var`s with stable names (`torso.0.weight`, `memory.w_ih`,
//! `head.weight`, ...). The learner calls [`Network::unroll`] over a batch of sequences:
//! the first `burn_in` steps run without gradient from detached parameters and the state
//! is detached at the boundary (Kapturowski et al. 2019); the rest is recorded for
//! backward. Inside, everything is time-major (`[T*B, ...]` rows) so the LSTM's input
//! projection is one matmul and the fused op ([`crate::lstm`]) reads contiguous steps.
//! Actors do not use this type: they step an [`crate::ActorNet`] built from a
//! [`Params`] snapshot.

use candle_core::{Device, Tensor, Var};
use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};
use rand::{Rng, SeedableRng};

use crate::conv;
use crate::error::{Error, Result};
use crate::lstm;

/// What one observation looks like.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ObsShape {
    /// A flat vector of this length.
    Vector(usize),
    /// An image, stored channel-major (`[channels, height, width]`) per observation.
    Image {
        /// Channels.
        channels: usize,
        /// Rows.
        height: usize,
        /// Columns.
        width: usize,
    },
}

impl ObsShape {
    /// Floats per observation.
    pub fn len(&self) -> usize {
        match *self {
            ObsShape::Vector(n) => n,
            ObsShape::Image {
                channels,
                height,
                width,
            } => channels * height * width,
        }
    }
    /// True for a zero-length observation.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// The task-side sizes a network needs besides its spec.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct NetShape {
    /// Observation shape.
    pub obs: ObsShape,
    /// Number of discrete actions.
    pub actions: usize,
}

/// A named parameter set detached from candle: shareable across threads (`Send + Sync`),
/// published by the learner to actors and written to checkpoints.
#[derive(Debug, Clone, PartialEq)]
pub struct Params {
    /// `(name, shape, row-major values)` in the network's parameter order.
    pub tensors: Vec<(String, Vec<usize>, Vec<f32>)>,
}

impl Params {
    /// The tensor called `name`.
    pub fn get(&self, name: &str) -> Option<(&[usize], &[f32])> {
        self.tensors
            .iter()
            .find(|(n, _, _)| n == name)
            .map(|(_, s, v)| (s.as_slice(), v.as_slice()))
    }
    /// Total number of scalars.
    pub fn count(&self) -> usize {
        self.tensors.iter().map(|(_, _, v)| v.len()).sum()
    }
}

/// One batch of sequences for [`Network::unroll`], batch-major as replay stores them.
#[derive(Debug, Clone, Copy)]
pub struct UnrollInput<'a> {
    /// Sequences in the batch (B).
    pub batch: usize,
    /// Steps per sequence (T), burn-in included.
    pub steps: usize,
    /// Observations `[B, T, obs_len]`.
    pub obs: &'a [f32],
    /// Action taken before each step `[B, T]`; a value `>= actions` means none (all-zero
    /// one-hot). Read only when the spec feeds the previous action and reward.
    pub prev_action: &'a [u32],
    /// Reward received before each step `[B, T]` (same condition).
    pub prev_reward: &'a [f32],
    /// Recurrent start state `[B, 2H]` (per lane: h then c); `None` = zero state.
    pub start: Option<&'a [f32]>,
}

/// What [`Network::unroll`] returns.
#[derive(Debug, Clone)]
pub struct UnrollOutput {
    /// Q values of the learned steps: `[B, L, A]` (value, dueling) or `[B, L, A, N]`
    /// (quantile), L = T - burn_in. Recorded for backward unless unrolled without gradient.
    pub q: Tensor,
    /// Recurrent states after each learned step, detached: `[2, L, B, H]` (h block, then c
    /// block); `None` without memory.
    pub states: Option<Tensor>,
    /// The state at the burn-in boundary, detached, `[B, 2H]` per lane h then c (the start
    /// state if there was no burn-in); empty without memory.
    pub boundary_state: Vec<f32>,
}

/// A linear layer: `y = x w^T + b`, `w` `[out, in]`.
#[derive(Debug, Clone)]
struct Linear {
    w: Var,
    b: Var,
}

#[derive(Debug, Clone)]
struct ConvLayer {
    w: Var,
    b: Var,
    stride: usize,
}

#[derive(Debug, Clone)]
enum TorsoNet {
    Mlp {
        layers: Vec<Linear>,
        activation: Activation,
    },
    Conv {
        convs: Vec<ConvLayer>,
        out: Linear,
        channels: usize,
        height: usize,
        width: usize,
    },
}

#[derive(Debug, Clone)]
struct LstmNet {
    w_ih: Var,
    w_hh: Var,
    b: Var,
    hidden: usize,
}

#[derive(Debug, Clone)]
enum HeadNet {
    Value(Linear),
    Dueling { value: Linear, advantage: Linear },
    Quantile { lin: Linear, quantiles: usize },
}

/// The learner's network: parameters as candle `Var`s, forward for unrolls.
#[derive(Debug)]
pub struct Network {
    agent: AgentSpec,
    shape: NetShape,
    torso: TorsoNet,
    memory: Option<LstmNet>,
    head: HeadNet,
    /// All parameters in a fixed order, with their names.
    params: Vec<(String, Var)>,
}

/// `x w^T + b` for `x` `[rows, in]`, `w` `[out, in]`, `b` `[out]` (one fused op).
pub(crate) fn affine(x: &Tensor, w: &Tensor, b: &Tensor) -> candle_core::Result<Tensor> {
    crate::affine::affine(x, w, b)
}

fn param(v: &Var, grad: bool) -> Tensor {
    if grad {
        v.as_tensor().clone()
    } else {
        v.as_detached_tensor()
    }
}

impl Linear {
    fn forward(&self, x: &Tensor, grad: bool) -> candle_core::Result<Tensor> {
        affine(x, &param(&self.w, grad), &param(&self.b, grad))
    }
}

struct Init {
    rng: rand::rngs::StdRng,
    params: Vec<(String, Var)>,
}

impl Init {
    /// Uniform(-1/sqrt(fan_in), 1/sqrt(fan_in)), the usual default for linear and LSTM layers.
    fn uniform(&mut self, name: &str, shape: &[usize], fan_in: usize) -> Result<Var> {
        let bound = 1.0 / (fan_in.max(1) as f32).sqrt();
        let n: usize = shape.iter().product();
        let v: Vec<f32> = (0..n)
            .map(|_| self.rng.random_range(-bound..=bound))
            .collect();
        let var = Var::from_vec(v, shape, &Device::Cpu)?;
        self.params.push((name.to_string(), var.clone()));
        Ok(var)
    }
    fn linear(&mut self, prefix: &str, inp: usize, out: usize) -> Result<Linear> {
        Ok(Linear {
            w: self.uniform(&format!("{prefix}.weight"), &[out, inp], inp)?,
            b: self.uniform(&format!("{prefix}.bias"), &[out], inp)?,
        })
    }
}

impl Network {
    /// Builds a network for `agent` with parameters drawn from `seed`.
    pub fn new(agent: &AgentSpec, shape: NetShape, seed: u64) -> Result<Self> {
        if shape.actions == 0 {
            return Err(Error::Spec("a task must have at least one action".into()));
        }
        let mut init = Init {
            rng: rand::rngs::StdRng::seed_from_u64(seed),
            params: Vec::new(),
        };
        let (torso, torso_out) = match (&agent.torso, shape.obs) {
            (Torso::Mlp { layers, activation }, obs) => {
                let mut width = obs.len();
                let mut lins = Vec::new();
                for (i, &l) in layers.iter().enumerate() {
                    lins.push(init.linear(&format!("torso.{i}"), width, l)?);
                    width = l;
                }
                (
                    TorsoNet::Mlp {
                        layers: lins,
                        activation: *activation,
                    },
                    width,
                )
            }
            (
                Torso::Conv {
                    channels,
                    kernels,
                    strides,
                    out,
                },
                ObsShape::Image {
                    channels: c0,
                    height,
                    width,
                },
            ) => {
                if channels.len() != kernels.len() || channels.len() != strides.len() {
                    return Err(Error::Spec(format!(
                        "conv torso: channels ({}), kernels ({}) and strides ({}) must have the same length",
                        channels.len(),
                        kernels.len(),
                        strides.len()
                    )));
                }
                let (mut c, mut h, mut w) = (c0, height, width);
                let mut convs = Vec::new();
                for (i, ((&co, &k), &s)) in channels.iter().zip(kernels).zip(strides).enumerate() {
                    if k == 0 || s == 0 || k > h || k > w {
                        return Err(Error::Spec(format!(
                            "conv torso layer {i}: kernel {k} stride {s} does not fit a {h}x{w} input"
                        )));
                    }
                    convs.push(ConvLayer {
                        w: init.uniform(
                            &format!("torso.conv{i}.weight"),
                            &[co, c, k, k],
                            c * k * k,
                        )?,
                        b: init.uniform(&format!("torso.conv{i}.bias"), &[co], c * k * k)?,
                        stride: s,
                    });
                    h = (h - k) / s + 1;
                    w = (w - k) / s + 1;
                    c = co;
                }
                let outl = init.linear("torso.out", c * h * w, *out)?;
                (
                    TorsoNet::Conv {
                        convs,
                        out: outl,
                        channels: c0,
                        height,
                        width,
                    },
                    *out,
                )
            }
            (Torso::Conv { .. }, ObsShape::Vector(n)) => {
                return Err(Error::Spec(format!(
                    "a conv torso needs image observations, but the task gives a vector of {n}"
                )))
            }
        };
        let extras = if agent.previous_action_reward {
            shape.actions + 1
        } else {
            0
        };
        let (memory, head_in) = match agent.memory {
            Memory::Lstm { size } => {
                let inp = torso_out + extras;
                let m = LstmNet {
                    w_ih: init.uniform("memory.w_ih", &[4 * size, inp], size)?,
                    w_hh: init.uniform("memory.w_hh", &[4 * size, size], size)?,
                    b: init.uniform("memory.bias", &[4 * size], size)?,
                    hidden: size,
                };
                (Some(m), size)
            }
            Memory::None => (None, torso_out),
        };
        if head_in == 0 {
            return Err(Error::Spec("the head's input has zero width".into()));
        }
        let head = match agent.head {
            Head::Value => HeadNet::Value(init.linear("head", head_in, shape.actions)?),
            Head::Dueling => HeadNet::Dueling {
                value: init.linear("head.value", head_in, 1)?,
                advantage: init.linear("head.advantage", head_in, shape.actions)?,
            },
            Head::Quantile { quantiles, .. } => {
                if quantiles < 2 {
                    return Err(Error::Spec(format!(
                        "a quantile head needs quantiles >= 2, got {quantiles}"
                    )));
                }
                HeadNet::Quantile {
                    lin: init.linear("head", head_in, shape.actions * quantiles)?,
                    quantiles,
                }
            }
        };
        Ok(Network {
            agent: agent.clone(),
            shape,
            torso,
            memory,
            head,
            params: init.params,
        })
    }

    /// The spec this network was built from.
    pub fn agent(&self) -> &AgentSpec {
        &self.agent
    }

    /// The task-side shape.
    pub fn shape(&self) -> NetShape {
        self.shape
    }

    /// Hidden width of the memory (0 without memory).
    pub fn hidden(&self) -> usize {
        self.memory.as_ref().map_or(0, |m| m.hidden)
    }

    /// Floats of recurrent state per lane (`2 * hidden`, 0 without memory).
    pub fn state_len(&self) -> usize {
        2 * self.hidden()
    }

    /// Quantiles per action (1 for the value and dueling heads).
    pub fn quantiles(&self) -> usize {
        match self.head {
            HeadNet::Quantile { quantiles, .. } => quantiles,
            _ => 1,
        }
    }

    /// The parameters with their names, in a fixed order (the optimizer's and
    /// checkpoint's order).
    pub fn vars(&self) -> &[(String, Var)] {
        &self.params
    }

    /// A copy of every parameter's values, for actors and checkpoints.
    pub fn snapshot(&self) -> Result<Params> {
        let mut tensors = Vec::with_capacity(self.params.len());
        for (name, v) in &self.params {
            let t = v.as_tensor();
            tensors.push((
                name.clone(),
                t.dims().to_vec(),
                t.flatten_all()?.to_vec1::<f32>()?,
            ));
        }
        Ok(Params { tensors })
    }

    /// Overwrites every parameter from `params`; names and shapes must match exactly.
    pub fn load_params(&mut self, params: &Params) -> Result<()> {
        check_params(&self.params, params)?;
        for (name, var) in &self.params {
            let (shape, values) = params.get(name).expect("checked above");
            var.set(&Tensor::from_slice(values, shape, &Device::Cpu)?)?;
        }
        Ok(())
    }

    /// Copies `other`'s parameter values into this network (target-network update).
    pub fn copy_from(&mut self, other: &Network) -> Result<()> {
        if self.params.len() != other.params.len() {
            return Err(Error::shape(
                "copy_from",
                format!("{} parameters", self.params.len()),
                format!("{}", other.params.len()),
            ));
        }
        for ((na, a), (nb, b)) in self.params.iter().zip(&other.params) {
            if na != nb || a.dims() != b.dims() {
                return Err(Error::shape(
                    "copy_from",
                    format!("{na} {:?}", a.dims()),
                    format!("{nb} {:?}", b.dims()),
                ));
            }
            a.set(&b.as_tensor().copy()?)?;
        }
        Ok(())
    }

    /// A new network with the same spec and a copy of this one's parameter values.
    pub fn try_clone(&self) -> Result<Network> {
        let mut n = Network::new(&self.agent, self.shape, 0)?;
        n.copy_from(self)?;
        Ok(n)
    }

    /// Runs the learner's unroll: `burn_in` steps without gradient, the rest recorded.
    pub fn unroll(&self, input: &UnrollInput<'_>, burn_in: usize) -> Result<UnrollOutput> {
        self.unroll_impl(input, burn_in, true)
    }

    /// Unrolls all steps without recording anything for backward (target network,
    /// diagnostics). `q` covers all T steps.
    pub fn unroll_no_grad(&self, input: &UnrollInput<'_>) -> Result<UnrollOutput> {
        self.unroll_impl(input, 0, false)
    }

    fn check_input(&self, input: &UnrollInput<'_>, burn_in: usize) -> Result<()> {
        let (b, t) = (input.batch, input.steps);
        let ol = self.shape.obs.len();
        if b == 0 || t == 0 {
            return Err(Error::shape(
                "unroll",
                "at least one sequence of at least one step",
                format!("batch {b}, steps {t}"),
            ));
        }
        if burn_in >= t {
            return Err(Error::shape(
                "unroll",
                format!("burn_in < steps ({t})"),
                format!("burn_in {burn_in}"),
            ));
        }
        if input.obs.len() != b * t * ol {
            return Err(Error::shape(
                "unroll obs",
                format!("[{b}, {t}, {ol}] = {} floats", b * t * ol),
                format!("{} floats", input.obs.len()),
            ));
        }
        if self.agent.previous_action_reward && self.memory.is_some() {
            if input.prev_action.len() != b * t {
                return Err(Error::shape(
                    "unroll prev_action",
                    format!("[{b}, {t}]"),
                    format!("{} values", input.prev_action.len()),
                ));
            }
            if input.prev_reward.len() != b * t {
                return Err(Error::shape(
                    "unroll prev_reward",
                    format!("[{b}, {t}]"),
                    format!("{} values", input.prev_reward.len()),
                ));
            }
        }
        if let Some(s) = input.start {
            let sl = self.state_len();
            if s.len() != b * sl {
                return Err(Error::shape(
                    "unroll start state",
                    format!("[{b}, {sl}]"),
                    format!("{} floats", s.len()),
                ));
            }
        }
        Ok(())
    }

    /// Observations of steps `t0..t1`, time-major `[(t1-t0)*B, obs_len]`.
    fn obs_rows(&self, input: &UnrollInput<'_>, t0: usize, t1: usize) -> Result<Tensor> {
        let (b, t) = (input.batch, input.steps);
        let ol = self.shape.obs.len();
        let mut v = Vec::with_capacity((t1 - t0) * b * ol);
        for s in t0..t1 {
            for lane in 0..b {
                let at = (lane * t + s) * ol;
                v.extend_from_slice(&input.obs[at..at + ol]);
            }
        }
        Ok(Tensor::from_vec(v, ((t1 - t0) * b, ol), &Device::Cpu)?)
    }

    /// One-hot previous action and previous reward rows, time-major `[(t1-t0)*B, A+1]`.
    fn extra_rows(&self, input: &UnrollInput<'_>, t0: usize, t1: usize) -> Result<Tensor> {
        let (b, t, a) = (input.batch, input.steps, self.shape.actions);
        let mut v = vec![0f32; (t1 - t0) * b * (a + 1)];
        for s in t0..t1 {
            for lane in 0..b {
                let row = ((s - t0) * b + lane) * (a + 1);
                let act = input.prev_action[lane * t + s] as usize;
                if act < a {
                    v[row + act] = 1.0;
                }
                v[row + a] = input.prev_reward[lane * t + s];
            }
        }
        Ok(Tensor::from_vec(v, ((t1 - t0) * b, a + 1), &Device::Cpu)?)
    }

    fn torso_forward(&self, x: &Tensor, grad: bool) -> Result<Tensor> {
        match &self.torso {
            TorsoNet::Mlp { layers, activation } => {
                let mut x = x.clone();
                for l in layers {
                    x = l.forward(&x, grad)?;
                    x = match activation {
                        Activation::Relu => x.relu()?,
                        Activation::Tanh => x.tanh()?,
                    };
                }
                Ok(x)
            }
            TorsoNet::Conv {
                convs,
                out,
                channels,
                height,
                width,
            } => {
                let rows = x.dim(0)?;
                let mut x = x
                    .reshape((rows, *channels, *height, *width))?
                    .permute((0, 2, 3, 1))?
                    .contiguous()?;
                for c in convs {
                    x = conv::conv2d_nhwc(&x, &param(&c.w, grad), &param(&c.b, grad), c.stride)?
                        .relu()?;
                }
                let x = x.reshape((rows, ()))?;
                Ok(out.forward(&x, grad)?.relu()?)
            }
        }
    }

    /// Memory input rows: torso output, plus previous action and reward if the spec says so.
    fn memory_input(
        &self,
        input: &UnrollInput<'_>,
        t0: usize,
        t1: usize,
        grad: bool,
    ) -> Result<Tensor> {
        let x = self.torso_forward(&self.obs_rows(input, t0, t1)?, grad)?;
        if self.agent.previous_action_reward && self.memory.is_some() {
            Ok(Tensor::cat(&[x, self.extra_rows(input, t0, t1)?], 1)?)
        } else {
            Ok(x)
        }
    }

    /// Head over rows `[rows, in]` -> `[rows, A]` or `[rows, A, N]`.
    fn head_forward(&self, x: &Tensor, grad: bool) -> Result<Tensor> {
        Ok(match &self.head {
            HeadNet::Value(l) => l.forward(x, grad)?,
            HeadNet::Dueling { value, advantage } => {
                // Wang et al. 2016: Q = V + (A - mean A)
                let v = value.forward(x, grad)?;
                let a = advantage.forward(x, grad)?;
                let mean = a.mean_keepdim(1)?;
                a.broadcast_sub(&mean)?.broadcast_add(&v)?
            }
            HeadNet::Quantile { lin, quantiles } => {
                let rows = x.dim(0)?;
                lin.forward(x, grad)?
                    .reshape((rows, self.shape.actions, *quantiles))?
            }
        })
    }

    fn unroll_impl(
        &self,
        input: &UnrollInput<'_>,
        burn_in: usize,
        grad: bool,
    ) -> Result<UnrollOutput> {
        self.check_input(input, burn_in)?;
        let (b, t) = (input.batch, input.steps);
        let learned = t - burn_in;
        let (features, states, boundary_state) = match &self.memory {
            None => (
                self.torso_forward(&self.obs_rows(input, burn_in, t)?, grad)?,
                None,
                Vec::new(),
            ),
            Some(m) => {
                let h = m.hidden;
                let mut s0 = vec![0f32; 2 * b * h];
                if let Some(start) = input.start {
                    for lane in 0..b {
                        s0[lane * h..(lane + 1) * h]
                            .copy_from_slice(&start[lane * 2 * h..lane * 2 * h + h]);
                        s0[(b + lane) * h..(b + lane + 1) * h]
                            .copy_from_slice(&start[lane * 2 * h + h..(lane + 1) * 2 * h]);
                    }
                }
                let mut state = Tensor::from_vec(s0, (2, b, h), &Device::Cpu)?;
                if burn_in > 0 {
                    let x = self.memory_input(input, 0, burn_in, false)?;
                    let xg = affine(&x, &m.w_ih.as_detached_tensor(), &m.b.as_detached_tensor())?;
                    let out = lstm::lstm_sequence_no_grad(
                        &xg,
                        &m.w_hh.as_detached_tensor(),
                        &state,
                        burn_in,
                    )?;
                    state = out.narrow(1, burn_in - 1, 1)?.squeeze(1)?.contiguous()?;
                }
                let boundary = to_lane_major(&state)?;
                let x = self.memory_input(input, burn_in, t, grad)?;
                let xg = affine(&x, &param(&m.w_ih, grad), &param(&m.b, grad))?;
                let (hs, cells) = if grad {
                    lstm::lstm_hidden(&xg, m.w_hh.as_tensor(), &state, learned)?
                } else {
                    let out = lstm::lstm_sequence_no_grad(
                        &xg,
                        &m.w_hh.as_detached_tensor(),
                        &state,
                        learned,
                    )?;
                    (out.get(0)?, out.get(1)?)
                };
                let states = Tensor::stack(&[hs.detach(), cells], 0)?;
                let hs = hs.reshape((learned * b, h))?;
                (hs, Some(states), boundary)
            }
        };
        let q = self.head_forward(&features, grad)?; // [L*B, A(, N)]
        let q = match q.rank() {
            2 => q.reshape((learned, b, self.shape.actions))?,
            _ => q.reshape((learned, b, self.shape.actions, self.quantiles()))?,
        };
        let q = q.transpose(0, 1)?.contiguous()?;
        Ok(UnrollOutput {
            q,
            states,
            boundary_state,
        })
    }
}

/// `[2, B, H]` -> per-lane `[B, 2H]` (h then c).
fn to_lane_major(state: &Tensor) -> Result<Vec<f32>> {
    let (_, b, h) = state.dims3()?;
    let v = state.flatten_all()?.to_vec1::<f32>()?;
    let mut out = vec![0f32; 2 * b * h];
    for lane in 0..b {
        out[lane * 2 * h..lane * 2 * h + h].copy_from_slice(&v[lane * h..(lane + 1) * h]);
        out[lane * 2 * h + h..(lane + 1) * 2 * h]
            .copy_from_slice(&v[(b + lane) * h..(b + lane + 1) * h]);
    }
    Ok(out)
}

/// Checks that `params` has exactly the names and shapes of `vars`, naming the first
/// difference.
pub(crate) fn check_params(vars: &[(String, Var)], params: &Params) -> Result<()> {
    for (name, var) in vars {
        match params.get(name) {
            None => {
                return Err(Error::shape(
                    "parameters",
                    format!("a tensor named {name}"),
                    "none".to_string(),
                ))
            }
            Some((shape, values)) => {
                if shape != var.dims() || values.len() != var.elem_count() {
                    return Err(Error::shape(
                        "parameters",
                        format!("{name} of shape {:?} (from the spec)", var.dims()),
                        format!("shape {shape:?}"),
                    ));
                }
            }
        }
    }
    if let Some((extra, _, _)) = params
        .tensors
        .iter()
        .find(|(n, _, _)| !vars.iter().any(|(v, _)| v == n))
    {
        return Err(Error::shape(
            "parameters",
            "only the tensors the spec defines",
            format!("an extra tensor {extra}"),
        ));
    }
    if params.tensors.len() != vars.len() {
        return Err(Error::shape(
            "parameters",
            format!("{} tensors", vars.len()),
            format!("{}", params.tensors.len()),
        ));
    }
    Ok(())
}
