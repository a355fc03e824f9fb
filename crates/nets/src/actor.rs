//! The actors' inference path: one step of the network for a batch of lanes on plain f32
//! weights, without candle.
//!
//! Weights are held packed for the kernel (panels of 16 output columns, each `[in, 16]`
//! contiguous) and refreshed from a
//! [`Params`] snapshot when an actor pulls parameters, so a step is a few cache-friendly
//! multiply-add loops and the fused LSTM cell, with no allocation after the first call.
//! Recurrent state lives with the caller (`[lanes, 2H]`, per lane h then c), so actors can
//! reset a lane at an episode boundary by zeroing its slice.

use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};

use crate::error::{Error, Result};
use crate::fastmath;
use crate::network::{NetShape, Network, ObsShape, Params};

/// Columns per weight panel of [`Dense`].
const P: usize = 16;

/// A dense layer `y = x w^T + b` with the weight packed for the kernel: panels of `P`
/// output columns, each panel `[in, P]` contiguous (the last padded with zeros), so the
/// inner loop streams through memory in order.
#[derive(Debug, Clone, Default)]
struct Dense {
    inp: usize,
    out: usize,
    /// `[panels, in, P]`.
    wt: Vec<f32>,
    /// `[panels * P]`, zero-padded.
    b: Vec<f32>,
}

impl Dense {
    fn from(params: &Params, prefix: &str) -> Result<Self> {
        let (ws, w) = get(params, &format!("{prefix}.weight"))?;
        let (_, b) = get(params, &format!("{prefix}.bias"))?;
        let (out, inp) = (ws[0], ws[1..].iter().product::<usize>());
        Ok(Dense::pack(w, b, out, inp))
    }

    /// Packs a row-major `[out, in]` weight and its bias.
    fn pack(w: &[f32], b: &[f32], out: usize, inp: usize) -> Self {
        let panels = out.div_ceil(P);
        let mut wt = vec![0f32; panels * inp * P];
        for o in 0..out {
            let (p, c) = (o / P, o % P);
            for k in 0..inp {
                wt[(p * inp + k) * P + c] = w[o * inp + k];
            }
        }
        let mut bp = vec![0f32; panels * P];
        bp[..out].copy_from_slice(b);
        Dense {
            inp,
            out,
            wt,
            b: bp,
        }
    }

    /// `y[rows, out] = x[rows, in] wt + b`.
    fn apply(&self, x: &[f32], rows: usize, y: &mut [f32]) {
        assert!(
            x.len() >= rows * self.inp && y.len() >= rows * self.out,
            "dense: buffer sizes"
        );
        dense(rows, self.inp, self.out, x, &self.wt, &self.b, y);
    }
}

/// Multiply-add: fused (one instruction) where the CPU has FMA, plain otherwise.
trait Madd {
    fn madd(a: f32, b: f32, c: f32) -> f32;
}

struct Fused;
impl Madd for Fused {
    #[inline(always)]
    fn madd(a: f32, b: f32, c: f32) -> f32 {
        a.mul_add(b, c)
    }
}

struct Split;
impl Madd for Split {
    #[inline(always)]
    fn madd(a: f32, b: f32, c: f32) -> f32 {
        a * b + c
    }
}

/// One register block of the dense kernel: `R` rows by `NP` panels (`NP * P` columns)
/// starting at row `r` and panel `p0`, accumulators kept in registers across the whole
/// input dimension.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn block<const R: usize, const NP: usize, F: Madd>(
    r: usize,
    p0: usize,
    inp: usize,
    out: usize,
    x: &[f32],
    wt: &[f32],
    b: &[f32],
    y: &mut [f32],
) {
    let mut acc = [[[0f32; P]; NP]; R];
    for a in acc.iter_mut() {
        for (p, ap) in a.iter_mut().enumerate() {
            ap.copy_from_slice(&b[(p0 + p) * P..(p0 + p + 1) * P]);
        }
    }
    let panels: [&[f32]; NP] =
        std::array::from_fn(|p| &wt[(p0 + p) * inp * P..(p0 + p + 1) * inp * P]);
    let xs: [&[f32]; R] = std::array::from_fn(|rr| &x[(r + rr) * inp..(r + rr + 1) * inp]);
    for k in 0..inp {
        for p in 0..NP {
            let w: &[f32; P] = panels[p][k * P..(k + 1) * P]
                .try_into()
                .expect("panel width");
            for rr in 0..R {
                let xv = xs[rr][k];
                for c in 0..P {
                    acc[rr][p][c] = F::madd(xv, w[c], acc[rr][p][c]);
                }
            }
        }
    }
    for (rr, a) in acc.iter().enumerate() {
        for (p, ap) in a.iter().enumerate() {
            let j = (p0 + p) * P;
            let n = P.min(out - j);
            y[(r + rr) * out + j..(r + rr) * out + j + n].copy_from_slice(&ap[..n]);
        }
    }
}

/// `y = x w^T + b` over `rows` rows: blocks of 4 rows x 1 panel, and 1 row x 4 panels for
/// leftover rows (enough independent accumulators either way to keep the FMA units busy).
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn dense_impl<F: Madd>(
    rows: usize,
    inp: usize,
    out: usize,
    x: &[f32],
    wt: &[f32],
    b: &[f32],
    y: &mut [f32],
) {
    let panels = out.div_ceil(P);
    let mut r = 0;
    while r + 4 <= rows {
        for p in 0..panels {
            block::<4, 1, F>(r, p, inp, out, x, wt, b, y);
        }
        r += 4;
    }
    while r < rows {
        let mut p = 0;
        while p + 4 <= panels {
            block::<1, 4, F>(r, p, inp, out, x, wt, b, y);
            p += 4;
        }
        while p < panels {
            block::<1, 1, F>(r, p, inp, out, x, wt, b, y);
            p += 1;
        }
        r += 1;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[allow(clippy::too_many_arguments)]
unsafe fn dense_avx2(
    rows: usize,
    inp: usize,
    out: usize,
    x: &[f32],
    wt: &[f32],
    b: &[f32],
    y: &mut [f32],
) {
    dense_impl::<Fused>(rows, inp, out, x, wt, b, y)
}

/// `y = x wt + b`, with AVX2 + FMA code where the CPU has it.
#[allow(clippy::too_many_arguments)]
fn dense(rows: usize, inp: usize, out: usize, x: &[f32], wt: &[f32], b: &[f32], y: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    if fastmath::simd_kernels() {
        // SAFETY: `simd_kernels` checked that the CPU supports both features.
        return unsafe { dense_avx2(rows, inp, out, x, wt, b, y) };
    }
    dense_impl::<Split>(rows, inp, out, x, wt, b, y)
}

fn get<'a>(params: &'a Params, name: &str) -> Result<(&'a [usize], &'a [f32])> {
    params
        .get(name)
        .ok_or_else(|| Error::shape("actor parameters", format!("a tensor named {name}"), "none"))
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

/// One network step for a batch of lanes, on plain packed weights.
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
                let ih = Dense::pack(w_ih, b, 4 * size, ws[1]);
                let hh = Dense::pack(w_hh, &vec![0.0; 4 * size], 4 * size, size);
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

#[cfg(test)]
mod tests {
    use super::*;

    /// Steps the benchmark network (MLP torso, LSTM, value head) over a few steps for 3
    /// lanes and returns every step's Q values and the final recurrent state.
    fn run_actor(hidden: usize, steps: usize) -> (Vec<f32>, Vec<f32>) {
        use rand::{Rng, SeedableRng};
        let net = Network::new(
            &crate::bench::agent(hidden),
            crate::bench::shape_with_obs(21),
            7,
        )
        .unwrap();
        let mut actor = ActorNet::new(&net).unwrap();
        let lanes = 3;
        let mut rng = rand::rngs::StdRng::seed_from_u64(9);
        let mut state = vec![0f32; lanes * actor.state_len()];
        let mut q = vec![0f32; lanes * actor.actions()];
        let mut all_q = Vec::new();
        for _ in 0..steps {
            let obs: Vec<f32> = (0..lanes * 21)
                .map(|_| rng.random_range(-2.0..2.0))
                .collect();
            actor
                .step(&obs, &[4, 0, 2], &[0.0; 3], &mut state, &mut q)
                .unwrap();
            all_q.extend_from_slice(&q);
        }
        (all_q, state)
    }

    // The portable (no FMA) kernels against the AVX2 + FMA ones on this machine: both
    // compute the same sums, in the same order, with or without fused rounding, so they
    // agree to a few ulps of the values' scale. On a CPU without FMA both runs take the
    // portable path and must agree exactly.
    #[test]
    fn portable_kernels_agree_with_the_fma_kernels() {
        let simd = fastmath::simd_kernels();
        let (q_fast, s_fast) = run_actor(40, 6);
        let (q_port, s_port) = fastmath::with_portable_kernels(|| {
            assert!(
                !fastmath::simd_kernels(),
                "the switch must select the portable path"
            );
            run_actor(40, 6)
        });
        assert_eq!(
            fastmath::simd_kernels(),
            simd,
            "the switch is undone on return"
        );
        let worst = q_fast
            .iter()
            .chain(&s_fast)
            .zip(q_port.iter().chain(&s_port))
            .fold(0f32, |m, (a, b)| m.max((a - b).abs()));
        assert!(worst < 1e-5, "portable and FMA paths differ by {worst}");
        if simd {
            // the dense layers use fused multiply-adds only on the FMA path, so a
            // difference shows that the switch really changed the kernels
            assert!(worst > 0.0, "the portable switch did not change the path");
        } else {
            assert_eq!(worst, 0.0);
        }
        // Both ran real work: the values are not all zero.
        assert!(q_port.iter().any(|x| x.abs() > 1e-3));
    }

    // Reference: the plain triple loop y = x w^T + b.
    #[test]
    fn packed_dense_matches_naive_for_all_block_shapes() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(3);
        for (rows, inp, out) in [
            (1, 7, 3),
            (1, 9, 70),
            (4, 5, 16),
            (5, 3, 33),
            (9, 17, 100),
            (8, 128, 512),
        ] {
            let w: Vec<f32> = (0..out * inp)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let b: Vec<f32> = (0..out).map(|_| rng.random_range(-1.0..1.0)).collect();
            let x: Vec<f32> = (0..rows * inp)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let d = Dense::pack(&w, &b, out, inp);
            let mut y = vec![f32::NAN; rows * out];
            d.apply(&x, rows, &mut y);
            for r in 0..rows {
                for o in 0..out {
                    let want: f32 = b[o]
                        + (0..inp)
                            .map(|k| x[r * inp + k] * w[o * inp + k])
                            .sum::<f32>();
                    assert!(
                        (y[r * out + o] - want).abs() < 1e-4,
                        "rows {rows} in {inp} out {out} at ({r}, {o})"
                    );
                }
            }
        }
    }
}
