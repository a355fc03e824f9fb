//! The actors' inference path: one step of the network for a batch of lanes on plain f32
//! weights, without candle.
//!
//! Weights are held pre-transposed (`[in, out]`, contiguous) and refreshed from a
//! [`Params`] snapshot when an actor pulls parameters, so a step is a few cache-friendly
//! multiply-add loops and the fused LSTM cell, with no allocation after the first call.
//! Recurrent state lives with the caller (`[lanes, 2H]`, per lane h then c), so actors can
//! reset a lane at an episode boundary by zeroing its slice.

use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};

use crate::error::{Error, Result};
use crate::fastmath;
use crate::network::{NetShape, Network, ObsShape, Params};

/// A dense layer with transposed weights: `y = x wt + b`, `wt` `[in, out]`.
#[derive(Debug, Clone, Default)]
struct Dense {
    inp: usize,
    out: usize,
    wt: Vec<f32>,
    b: Vec<f32>,
}

impl Dense {
    fn from(params: &Params, prefix: &str) -> Result<Self> {
        let (ws, w) = get(params, &format!("{prefix}.weight"))?;
        let (_, b) = get(params, &format!("{prefix}.bias"))?;
        let (out, inp) = (ws[0], ws[1..].iter().product::<usize>());
        Ok(Dense {
            inp,
            out,
            wt: transpose(w, out, inp),
            b: b.to_vec(),
        })
    }

    /// `y[rows, out] = x[rows, in] wt + b`, four rows at a time so each weight row is loaded
    /// once per block.
    fn apply(&self, x: &[f32], rows: usize, y: &mut [f32]) {
        let (inp, out) = (self.inp, self.out);
        for r in 0..rows {
            y[r * out..(r + 1) * out].copy_from_slice(&self.b);
        }
        let mut r = 0;
        while r + 4 <= rows {
            let (y0, rest) = y[r * out..(r + 4) * out].split_at_mut(out);
            let (y1, rest) = rest.split_at_mut(out);
            let (y2, y3) = rest.split_at_mut(out);
            for k in 0..inp {
                let (a0, a1, a2, a3) = (
                    x[r * inp + k],
                    x[(r + 1) * inp + k],
                    x[(r + 2) * inp + k],
                    x[(r + 3) * inp + k],
                );
                let w = &self.wt[k * out..(k + 1) * out];
                for j in 0..out {
                    y0[j] += a0 * w[j];
                    y1[j] += a1 * w[j];
                    y2[j] += a2 * w[j];
                    y3[j] += a3 * w[j];
                }
            }
            r += 4;
        }
        while r < rows {
            let yr = &mut y[r * out..(r + 1) * out];
            for k in 0..inp {
                let a = x[r * inp + k];
                if a == 0.0 {
                    continue;
                }
                let w = &self.wt[k * out..(k + 1) * out];
                for j in 0..out {
                    yr[j] += a * w[j];
                }
            }
            r += 1;
        }
    }
}

fn get<'a>(params: &'a Params, name: &str) -> Result<(&'a [usize], &'a [f32])> {
    params
        .get(name)
        .ok_or_else(|| Error::shape("actor parameters", format!("a tensor named {name}"), "none"))
}

fn transpose(w: &[f32], rows: usize, cols: usize) -> Vec<f32> {
    let mut t = vec![0f32; rows * cols];
    for r in 0..rows {
        for c in 0..cols {
            t[c * rows + r] = w[r * cols + c];
        }
    }
    t
}

#[derive(Debug, Clone)]
struct ConvStep {
    w: Vec<f32>, // [out, c, k, k]
    b: Vec<f32>,
    c: usize,
    h: usize,
    wd: usize,
    out: usize,
    k: usize,
    stride: usize,
}

impl ConvStep {
    fn oh(&self) -> usize {
        (self.h - self.k) / self.stride + 1
    }
    fn ow(&self) -> usize {
        (self.wd - self.k) / self.stride + 1
    }
    /// Channels-last in `[h, w, c]`, channels-last out `[oh, ow, out]`, ReLU applied.
    fn apply(&self, x: &[f32], y: &mut [f32]) {
        let (oh, ow, kk) = (self.oh(), self.ow(), self.k * self.k);
        for oy in 0..oh {
            for ox in 0..ow {
                for o in 0..self.out {
                    let mut acc = self.b[o];
                    for ky in 0..self.k {
                        for kx in 0..self.k {
                            let src = ((oy * self.stride + ky) * self.wd + ox * self.stride + kx)
                                * self.c;
                            for ch in 0..self.c {
                                acc += x[src + ch]
                                    * self.w[o * self.c * kk + ch * kk + ky * self.k + kx];
                            }
                        }
                    }
                    y[(oy * ow + ox) * self.out + o] = acc.max(0.0);
                }
            }
        }
    }
}

#[derive(Debug, Clone)]
enum TorsoStep {
    Mlp(Vec<Dense>, Activation),
    Conv {
        convs: Vec<ConvStep>,
        out: Dense,
        channels: usize,
        height: usize,
        width: usize,
    },
}

#[derive(Debug, Clone)]
enum HeadStep {
    Value(Dense),
    Dueling(Dense, Dense),
    Quantile(Dense, usize),
}

/// One network step for a batch of lanes, on plain pre-transposed weights.
#[derive(Debug, Clone)]
pub struct ActorNet {
    agent: AgentSpec,
    shape: NetShape,
    torso: TorsoStep,
    lstm: Option<(Dense, Dense, usize)>, // (ih, hh, hidden), gate order i, f, g, o
    head: HeadStep,
    extras: bool,
    scratch: Scratch,
}

/// Reused buffers of [`ActorNet::step`] (no allocation after the first call).
#[derive(Debug, Clone, Default)]
struct Scratch {
    feat: Vec<f32>,
    tmp: Vec<f32>,
    x: Vec<f32>,
    gates: Vec<f32>,
    hprev: Vec<f32>,
    rec: Vec<f32>,
    out: Vec<f32>,
}

impl ActorNet {
    /// Builds the inference path of `agent` with values from `params` (a
    /// [`Network::snapshot`]); names and shapes are checked.
    pub fn from_params(agent: &AgentSpec, shape: NetShape, params: &Params) -> Result<Self> {
        // Building a Network checks the spec and gives the expected shapes.
        let reference = Network::new(agent, shape, 0)?;
        crate::network::check_params(reference.vars(), params)?;
        let torso = match (&agent.torso, shape.obs) {
            (Torso::Mlp { layers, activation }, _) => {
                let d = (0..layers.len())
                    .map(|i| Dense::from(params, &format!("torso.{i}")))
                    .collect::<Result<_>>()?;
                TorsoStep::Mlp(d, *activation)
            }
            (
                Torso::Conv {
                    channels,
                    kernels,
                    strides,
                    ..
                },
                ObsShape::Image {
                    channels: c0,
                    height,
                    width,
                },
            ) => {
                let (mut c, mut h, mut w) = (c0, height, width);
                let mut convs = Vec::new();
                for i in 0..channels.len() {
                    let (_, wv) = get(params, &format!("torso.conv{i}.weight"))?;
                    let (_, bv) = get(params, &format!("torso.conv{i}.bias"))?;
                    let cs = ConvStep {
                        w: wv.to_vec(),
                        b: bv.to_vec(),
                        c,
                        h,
                        wd: w,
                        out: channels[i],
                        k: kernels[i],
                        stride: strides[i],
                    };
                    (h, w, c) = (cs.oh(), cs.ow(), channels[i]);
                    convs.push(cs);
                }
                TorsoStep::Conv {
                    convs,
                    out: Dense::from(params, "torso.out")?,
                    channels: c0,
                    height,
                    width,
                }
            }
            _ => return Err(Error::Spec("a conv torso needs image observations".into())),
        };
        let lstm = match agent.memory {
            Memory::Lstm { size } => {
                let (ws, w_ih) = get(params, "memory.w_ih")?;
                let (_, w_hh) = get(params, "memory.w_hh")?;
                let (_, b) = get(params, "memory.bias")?;
                let ih = Dense {
                    inp: ws[1],
                    out: 4 * size,
                    wt: transpose(w_ih, 4 * size, ws[1]),
                    b: b.to_vec(),
                };
                let hh = Dense {
                    inp: size,
                    out: 4 * size,
                    wt: transpose(w_hh, 4 * size, size),
                    b: vec![0.0; 4 * size],
                };
                Some((ih, hh, size))
            }
            Memory::None => None,
        };
        let head = match agent.head {
            Head::Value => HeadStep::Value(Dense::from(params, "head")?),
            Head::Dueling => HeadStep::Dueling(
                Dense::from(params, "head.value")?,
                Dense::from(params, "head.advantage")?,
            ),
            Head::Quantile { quantiles, .. } => {
                HeadStep::Quantile(Dense::from(params, "head")?, quantiles)
            }
        };
        Ok(ActorNet {
            agent: agent.clone(),
            shape,
            torso,
            extras: agent.previous_action_reward && lstm.is_some(),
            lstm,
            head,
            scratch: Scratch::default(),
        })
    }

    /// The inference path of a live network.
    pub fn new(net: &Network) -> Result<Self> {
        Self::from_params(net.agent(), net.shape(), &net.snapshot()?)
    }

    /// Replaces the weights with a newer snapshot of the same network.
    pub fn refresh(&mut self, params: &Params) -> Result<()> {
        *self = Self::from_params(&self.agent, self.shape, params)?;
        Ok(())
    }

    /// Floats of recurrent state per lane (`2H`; 0 without memory).
    pub fn state_len(&self) -> usize {
        self.lstm.as_ref().map_or(0, |(_, _, h)| 2 * h)
    }

    /// Number of actions (Q values per lane).
    pub fn actions(&self) -> usize {
        self.shape.actions
    }

    /// One step for `lanes = prev_action.len()` lanes.
    ///
    /// `obs` `[lanes, obs_len]`; `prev_action` and `prev_reward` `[lanes]` (a previous
    /// action `>= actions` means none); `state` `[lanes, 2H]` in and out; `q` `[lanes, A]`
    /// out (the mean over quantiles for the quantile head).
    pub fn step(
        &mut self,
        obs: &[f32],
        prev_action: &[usize],
        prev_reward: &[f32],
        state: &mut [f32],
        q: &mut [f32],
    ) -> Result<()> {
        let lanes = prev_action.len();
        let (ol, a, sl) = (self.shape.obs.len(), self.shape.actions, self.state_len());
        if obs.len() != lanes * ol
            || prev_reward.len() != lanes
            || state.len() != lanes * sl
            || q.len() != lanes * a
        {
            return Err(Error::shape(
                "actor step",
                format!("obs [{lanes}, {ol}], prev_reward [{lanes}], state [{lanes}, {sl}], q [{lanes}, {a}]"),
                format!("obs {}, prev_reward {}, state {}, q {} floats", obs.len(), prev_reward.len(), state.len(), q.len()),
            ));
        }
        let mut s = std::mem::take(&mut self.scratch);
        let feat_w = self.torso_step(obs, lanes, &mut s);
        // s.feat holds the torso features [lanes, feat_w]
        if let Some((ih, hh, h)) = &self.lstm {
            let h = *h;
            if self.extras {
                let w = feat_w + a + 1;
                s.x.clear();
                s.x.resize(lanes * w, 0.0);
                for l in 0..lanes {
                    s.x[l * w..l * w + feat_w]
                        .copy_from_slice(&s.feat[l * feat_w..(l + 1) * feat_w]);
                    if prev_action[l] < a {
                        s.x[l * w + feat_w + prev_action[l]] = 1.0;
                    }
                    s.x[l * w + feat_w + a] = prev_reward[l];
                }
            } else {
                std::mem::swap(&mut s.x, &mut s.feat);
            }
            s.gates.resize(lanes * 4 * h, 0.0);
            ih.apply(&s.x, lanes, &mut s.gates);
            s.hprev.resize(lanes * h, 0.0);
            for l in 0..lanes {
                s.hprev[l * h..(l + 1) * h].copy_from_slice(&state[l * 2 * h..l * 2 * h + h]);
            }
            s.rec.resize(lanes * 4 * h, 0.0);
            hh.apply(&s.hprev, lanes, &mut s.rec);
            s.feat.clear();
            s.feat.resize(lanes * h, 0.0);
            for l in 0..lanes {
                let g = &mut s.gates[l * 4 * h..(l + 1) * 4 * h];
                for (gj, rj) in g.iter_mut().zip(&s.rec[l * 4 * h..(l + 1) * 4 * h]) {
                    *gj += rj;
                }
                let (ifg, o) = g.split_at_mut(3 * h);
                let (if_, gg) = ifg.split_at_mut(2 * h);
                fastmath::sigmoid_slice(if_);
                fastmath::tanh_slice(gg);
                fastmath::sigmoid_slice(o);
                let (hs, cs) = state[l * 2 * h..(l + 1) * 2 * h].split_at_mut(h);
                for j in 0..h {
                    cs[j] = if_[h + j] * cs[j] + if_[j] * gg[j];
                    hs[j] = cs[j];
                }
                fastmath::tanh_slice(hs);
                for j in 0..h {
                    hs[j] *= o[j];
                }
                s.feat[l * h..(l + 1) * h].copy_from_slice(hs);
            }
        }
        match &self.head {
            HeadStep::Value(d) => d.apply(&s.feat, lanes, q),
            HeadStep::Dueling(v, adv) => {
                s.out.resize(lanes, 0.0);
                v.apply(&s.feat, lanes, &mut s.out);
                adv.apply(&s.feat, lanes, q);
                for l in 0..lanes {
                    let row = &mut q[l * a..(l + 1) * a];
                    let mean = row.iter().sum::<f32>() / a as f32;
                    for x in row.iter_mut() {
                        *x += s.out[l] - mean;
                    }
                }
            }
            HeadStep::Quantile(d, n) => {
                s.out.resize(lanes * a * n, 0.0);
                d.apply(&s.feat, lanes, &mut s.out);
                for (qi, chunk) in q.iter_mut().zip(s.out.chunks_exact(*n)) {
                    *qi = chunk.iter().sum::<f32>() / *n as f32;
                }
            }
        }
        self.scratch = s;
        Ok(())
    }

    /// Torso into `s.feat`; returns the feature width.
    fn torso_step(&self, obs: &[f32], lanes: usize, s: &mut Scratch) -> usize {
        match &self.torso {
            TorsoStep::Mlp(layers, act) => {
                s.feat.clear();
                s.feat.extend_from_slice(obs);
                let mut w = self.shape.obs.len();
                for d in layers {
                    s.tmp.resize(lanes * d.out, 0.0);
                    d.apply(&s.feat, lanes, &mut s.tmp);
                    match act {
                        Activation::Relu => s.tmp.iter_mut().for_each(|x| *x = x.max(0.0)),
                        Activation::Tanh => fastmath::tanh_slice(&mut s.tmp),
                    }
                    std::mem::swap(&mut s.feat, &mut s.tmp);
                    w = d.out;
                }
                s.feat.truncate(lanes * w);
                w
            }
            TorsoStep::Conv {
                convs,
                out,
                channels,
                height,
                width,
            } => {
                let (c, h, w) = (*channels, *height, *width);
                let per = c * h * w;
                let last = convs.last().map_or(per, |l| l.oh() * l.ow() * l.out);
                s.x.resize(lanes * last, 0.0);
                for lane in 0..lanes {
                    // CHW -> HWC
                    s.feat.clear();
                    s.feat.resize(per, 0.0);
                    let o = &obs[lane * per..(lane + 1) * per];
                    for ch in 0..c {
                        for y in 0..h {
                            for x in 0..w {
                                s.feat[(y * w + x) * c + ch] = o[(ch * h + y) * w + x];
                            }
                        }
                    }
                    for cv in convs {
                        s.tmp.resize(cv.oh() * cv.ow() * cv.out, 0.0);
                        cv.apply(&s.feat, &mut s.tmp);
                        std::mem::swap(&mut s.feat, &mut s.tmp);
                    }
                    s.x[lane * last..(lane + 1) * last].copy_from_slice(&s.feat[..last]);
                }
                s.feat.resize(lanes * out.out, 0.0);
                out.apply(&s.x, lanes, &mut s.feat);
                s.feat.iter_mut().for_each(|x| *x = x.max(0.0));
                out.out
            }
        }
    }
}
