//! The fused LSTM: the whole recurrence of a sequence as one candle custom op with a
//! hand-written backward pass.
//!
//! Inputs (all f32, contiguous, time-major):
//! - `xg` `[T*B, 4H]`: the input projection `x W_ih^T + b` for every step, computed by the
//!   caller as one large matmul (so candle's autograd gives the gradients of `W_ih`, the
//!   bias and the inputs);
//! - `w_hh` `[4H, H]`: the recurrent weights, gate order i, f, g, o (as PyTorch's `nn.LSTM`);
//! - `state0` `[2, B, H]`: start hidden state then start cell state.
//!
//! Output `[2, T, B, H]`: the hidden states of every step, then the cell states.
//!
//! The per-step recurrent matmul `h_{t-1} W_hh^T` goes straight to `gemm` on contiguous
//! memory; the gate nonlinearities use [`crate::fastmath`]. The backward pass runs the
//! recurrence in reverse, then computes `dW_hh` as two large matmuls over all steps.
//! Per-step slices of graph tensors are avoided entirely (their backward would be
//! O(T^2)).
//!
//! With [`crate::threads::threads`] > 1 the recurrence runs on a team of threads
//! ([`crate::threads::run_team`]), split one of two ways (see [`Split`]): by lanes of the
//! batch (independent through the whole sequence, no synchronisation) when every thread
//! gets enough lanes, otherwise by hidden units (each thread computes the four gate
//! columns of its units for all lanes, and the team meets at a barrier once per step).
//! `dW_hh` is split by rows over the same team.

use std::ops::Range;
use std::sync::{Arc, Mutex};

use candle_core::{bail, CpuStorage, CustomOp3, Layout, Shape, Tensor};
use gemm::Parallelism;

use crate::fastmath;
pub(crate) use crate::raw::{f32_slice, with_f32};
use crate::raw::{strided_matmul, DisjointMut, SharedRead};
use crate::threads::{self, Member};

/// Activations saved by the forward pass for the backward pass.
struct Saved {
    /// `[T, B, 4H]`: i, f, g, o after their nonlinearities.
    acts: Vec<f32>,
    /// `[T, B, H]`: tanh(c_t).
    tanh_c: Vec<f32>,
    /// `[T, B, H]`: c_t.
    cs: Vec<f32>,
}

/// How the members of a team divide one recurrence.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Split {
    /// Each member runs the whole recurrence for its own lanes: no synchronisation inside
    /// the sequence, but each per-step matmul has only that member's lanes as rows.
    Lanes,
    /// Each member owns a block of hidden units (the four gate columns of each) for all
    /// lanes; the team meets at a barrier once per step, forward and backward.
    Units,
}

/// Fewest lanes worth a thread of their own in a lane split. gemm pads a per-step
/// product's rows to its microkernel height, so a thread with few lanes costs nearly
/// as much as one with all of them: measured with `mnemon bench learner --threads 2`,
/// splitting B = 32 by lanes made the step slower (14 ms vs 11.8 ms unsplit).
const MIN_LANES_PER_THREAD: usize = 32;

/// Hidden units per block of a unit split: a multiple of the matmul kernels' vector
/// width, so no member's gate columns straddle a vector.
const UNIT_ALIGN: usize = 16;

/// The team size and split for a recurrence of `batch` lanes and `hidden` units on up
/// to `threads` threads.
pub(crate) fn choose_split(batch: usize, hidden: usize, threads: usize) -> (usize, Split) {
    if threads <= 1 {
        return (1, Split::Lanes);
    }
    if batch >= MIN_LANES_PER_THREAD * threads {
        return (threads, Split::Lanes);
    }
    let blocks = hidden.div_ceil(UNIT_ALIGN);
    if blocks >= 2 {
        (threads.min(blocks), Split::Units)
    } else {
        let t = threads.min(batch / MIN_LANES_PER_THREAD).max(1);
        (t, Split::Lanes)
    }
}

/// One application of the fused LSTM to one sequence batch.
struct LstmSeq {
    steps: usize,
    batch: usize,
    hidden: usize,
    /// Threads the recurrence and the weight gradient run on.
    team: usize,
    split: Split,
    save: bool,
    /// Output h and c (`[2, T, B, H]`) rather than h only (`[T, B, H]`).
    full: bool,
    saved: Arc<Mutex<Option<Saved>>>,
}

/// The input buffers of one forward pass, as the team's members see them.
#[derive(Clone, Copy)]
struct ForwardBufs {
    /// `W_hh^T` `[H, 4H]`.
    whh_t: SharedRead,
    /// `[2, B, H]`.
    s0: SharedRead,
    /// `[T, B, H]` each.
    hs: DisjointMut,
    cs: DisjointMut,
    tanh_c: DisjointMut,
    /// `[T, B, 4H]`: the input projection in, the activations out.
    acts: DisjointMut,
}

/// The buffers of one backward pass, as the team's members see them.
#[derive(Clone, Copy)]
struct BackwardBufs {
    /// `W_hh` `[4H, H]`.
    whh: SharedRead,
    /// `[2, B, H]`.
    s0: SharedRead,
    /// `[T, B, H]`: the forward pass's hidden states, cell states, tanh of cell states.
    hs: SharedRead,
    cs: SharedRead,
    tanh_c: SharedRead,
    /// `[T, B, 4H]`.
    acts: SharedRead,
    /// Incoming gradients `[T, B, H]` of the hidden and (full mode) cell states.
    gh: SharedRead,
    gc: Option<SharedRead>,
    /// Out: `[T, B, 4H]`.
    dxg: DisjointMut,
    /// Out: `[2, B, H]`; during the recurrence it carries dh and dc from step t+1.
    ds0: DisjointMut,
    /// Out: `[4H, H]`.
    dwhh: DisjointMut,
}

impl LstmSeq {
    /// The lanes and hidden units member `index` of a team of `size` owns.
    fn block(&self, index: usize, size: usize) -> (Range<usize>, Range<usize>) {
        let (b, h) = (self.batch, self.hidden);
        match self.split {
            Split::Lanes => (
                threads::split(b, size).get(index).cloned().unwrap_or(0..0),
                0..h,
            ),
            Split::Units => (
                0..b,
                threads::split_aligned(h, size, UNIT_ALIGN)
                    .get(index)
                    .cloned()
                    .unwrap_or(0..0),
            ),
        }
    }

    /// One member's share of the forward recurrence over all steps.
    ///
    /// # Safety
    /// The buffers have the sizes of `self`'s shapes, and every member of the team runs
    /// this with the same buffers (the split gives each member disjoint output elements;
    /// the barrier orders each step's writes before the next step's reads).
    unsafe fn forward_member(&self, m: &Member<'_>, bufs: ForwardBufs) {
        let (t_len, b, h) = (self.steps, self.batch, self.hidden);
        let g4 = 4 * h;
        let (lanes, units) = self.block(m.index, m.size);
        let (r0, rows) = (lanes.start, lanes.len());
        let (u0, uw) = (units.start, units.len());
        let sync = self.split == Split::Units;
        for t in 0..t_len {
            if rows > 0 && uw > 0 {
                let (h_prev, c_prev): (*const f32, *const f32) = if t == 0 {
                    (bufs.s0.0.add(r0 * h), bufs.s0.0.add((b + r0) * h))
                } else {
                    (
                        bufs.hs.0.add(((t - 1) * b + r0) * h),
                        bufs.cs.0.add(((t - 1) * b + r0) * h),
                    )
                };
                // `acts` arrives holding the input projection; the recurrent term is added.
                let gates = bufs.acts.0.add((t * b + r0) * g4);
                if uw == h {
                    strided_matmul(
                        rows,
                        g4,
                        h,
                        gates,
                        g4,
                        true,
                        h_prev,
                        h as isize,
                        1,
                        bufs.whh_t.0,
                        g4 as isize,
                        1,
                        Parallelism::None,
                    );
                } else {
                    for q in 0..4 {
                        strided_matmul(
                            rows,
                            uw,
                            h,
                            gates.add(q * h + u0),
                            g4,
                            true,
                            h_prev,
                            h as isize,
                            1,
                            bufs.whh_t.0.add(q * h + u0),
                            g4 as isize,
                            1,
                            Parallelism::None,
                        );
                    }
                }
                for r in 0..rows {
                    let row = gates.add(r * g4 + u0);
                    let gate = |q: usize| std::slice::from_raw_parts_mut(row.add(q * h), uw);
                    let at = (t * b + r0 + r) * h + u0;
                    forward_cell_row(
                        gate(0),
                        gate(1),
                        gate(2),
                        gate(3),
                        std::slice::from_raw_parts(c_prev.add(r * h + u0), uw),
                        std::slice::from_raw_parts_mut(bufs.hs.0.add(at), uw),
                        std::slice::from_raw_parts_mut(bufs.cs.0.add(at), uw),
                        std::slice::from_raw_parts_mut(bufs.tanh_c.0.add(at), uw),
                    );
                }
            }
            if sync {
                m.sync();
            }
        }
    }

    /// One member's share of the backward recurrence, then of `dW_hh`.
    ///
    /// # Safety
    /// As [`LstmSeq::forward_member`]; `ds0` starts zeroed.
    unsafe fn backward_member(&self, m: &Member<'_>, bufs: BackwardBufs) {
        let (t_len, b, h) = (self.steps, self.batch, self.hidden);
        let g4 = 4 * h;
        let (lanes, units) = self.block(m.index, m.size);
        let (r0, rows) = (lanes.start, lanes.len());
        let (u0, uw) = (units.start, units.len());
        let sync = self.split == Split::Units;
        let (dh_next, dc_next) = (bufs.ds0.0, bufs.ds0.0.add(b * h));
        for t in (0..t_len).rev() {
            if rows > 0 && uw > 0 {
                for r in 0..rows {
                    let lane = r0 + r;
                    let arow = bufs.acts.0.add((t * b + lane) * g4 + u0);
                    let act = |q: usize| std::slice::from_raw_parts(arow.add(q * h), uw);
                    let drow = bufs.dxg.0.add((t * b + lane) * g4 + u0);
                    let dgate = |q: usize| std::slice::from_raw_parts_mut(drow.add(q * h), uw);
                    let at = (t * b + lane) * h + u0;
                    let c_prev = if t == 0 {
                        bufs.s0.0.add((b + lane) * h + u0)
                    } else {
                        bufs.cs.0.add(((t - 1) * b + lane) * h + u0)
                    };
                    backward_cell_row(
                        act(0),
                        act(1),
                        act(2),
                        act(3),
                        std::slice::from_raw_parts(bufs.tanh_c.0.add(at), uw),
                        std::slice::from_raw_parts(c_prev, uw),
                        std::slice::from_raw_parts(bufs.gh.0.add(at), uw),
                        bufs.gc.map(|g| std::slice::from_raw_parts(g.0.add(at), uw)),
                        dgate(0),
                        dgate(1),
                        dgate(2),
                        dgate(3),
                        std::slice::from_raw_parts(dh_next.add(lane * h + u0), uw),
                        std::slice::from_raw_parts_mut(dc_next.add(lane * h + u0), uw),
                    );
                }
            }
            if sync {
                // every member's gate gradients of step t are written
                m.sync();
            }
            if rows > 0 && uw > 0 {
                // dh_{t-1}[lanes, units] = da_t[lanes, :] W_hh[:, units]
                strided_matmul(
                    rows,
                    uw,
                    g4,
                    dh_next.add(r0 * h + u0),
                    h,
                    false,
                    bufs.dxg.0.add((t * b + r0) * g4),
                    g4 as isize,
                    1,
                    bufs.whh.0.add(u0),
                    h as isize,
                    1,
                    Parallelism::None,
                );
            }
        }
        // dW_hh = sum_t da_t^T h_{t-1}, split by rows of W_hh: [rows, B] x [B, H] for
        // t = 0 (h0), then [rows, (T-1)B] x [(T-1)B, H] over the stored hidden states.
        m.sync();
        let wrows = threads::split_aligned(g4, m.size, UNIT_ALIGN)
            .get(m.index)
            .cloned()
            .unwrap_or(0..0);
        if wrows.is_empty() {
            return;
        }
        let (w0, wn) = (wrows.start, wrows.len());
        let dst = bufs.dwhh.0.add(w0 * h);
        let dxg = bufs.dxg.0 as *const f32;
        strided_matmul(
            wn,
            h,
            b,
            dst,
            h,
            false,
            dxg.add(w0),
            1,
            g4 as isize,
            bufs.s0.0,
            h as isize,
            1,
            Parallelism::None,
        );
        if t_len > 1 {
            strided_matmul(
                wn,
                h,
                (t_len - 1) * b,
                dst,
                h,
                true,
                dxg.add(b * g4 + w0),
                1,
                g4 as isize,
                bufs.hs.0,
                h as isize,
                1,
                Parallelism::None,
            );
        }
    }
}

crate::multiversion! {
    /// The cell update of one lane for a block of units: the gate pre-activations `i`,
    /// `f`, `g`, `o` in, their activations out; writes h, c and tanh(c).
    fn forward_cell_row(
        i: &mut [f32],
        f: &mut [f32],
        g: &mut [f32],
        o: &mut [f32],
        c_prev: &[f32],
        h_out: &mut [f32],
        c_out: &mut [f32],
        tanh_out: &mut [f32],
    ) {
        let n = i.len();
        let (f, g, o) = (&mut f[..n], &mut g[..n], &mut o[..n]);
        let (c_prev, h_out, c_out, tanh_out) =
            (&c_prev[..n], &mut h_out[..n], &mut c_out[..n], &mut tanh_out[..n]);
        for x in i.iter_mut() {
            *x = fastmath::sigmoid(*x);
        }
        for x in f.iter_mut() {
            *x = fastmath::sigmoid(*x);
        }
        for x in g.iter_mut() {
            *x = fastmath::tanh(*x);
        }
        for x in o.iter_mut() {
            *x = fastmath::sigmoid(*x);
        }
        for j in 0..n {
            c_out[j] = f[j] * c_prev[j] + i[j] * g[j];
        }
        for j in 0..n {
            tanh_out[j] = fastmath::tanh(c_out[j]);
        }
        for j in 0..n {
            h_out[j] = o[j] * tanh_out[j];
        }
    }
}

crate::multiversion! {
    /// The backward pass of one lane's cell update for a block of units: `dh_next` and
    /// `dc` carry the recurrent gradients in (from step t+1), `dc` carries dc_{t-1} out,
    /// and `di`..`do_` receive the gate pre-activation gradients.
    fn backward_cell_row(
        i: &[f32],
        f: &[f32],
        g: &[f32],
        o: &[f32],
        tanh_c: &[f32],
        c_prev: &[f32],
        gh: &[f32],
        gc: Option<&[f32]>,
        di: &mut [f32],
        df: &mut [f32],
        dg: &mut [f32],
        do_: &mut [f32],
        dh_next: &[f32],
        dc: &mut [f32],
    ) {
        let n = i.len();
        let (f, g, o, tc, cp, gh) = (&f[..n], &g[..n], &o[..n], &tanh_c[..n], &c_prev[..n], &gh[..n]);
        let (di, df, dg, do_, dhn, dc) =
            (&mut di[..n], &mut df[..n], &mut dg[..n], &mut do_[..n], &dh_next[..n], &mut dc[..n]);
        if let Some(gc) = gc {
            for (d, g) in dc.iter_mut().zip(&gc[..n]) {
                *d += g;
            }
        }
        for j in 0..n {
            let dh = gh[j] + dhn[j];
            let dcj = dc[j] + dh * o[j] * (1.0 - tc[j] * tc[j]);
            do_[j] = dh * tc[j] * o[j] * (1.0 - o[j]);
            di[j] = dcj * g[j] * i[j] * (1.0 - i[j]);
            dg[j] = dcj * i[j] * (1.0 - g[j] * g[j]);
            df[j] = dcj * cp[j] * f[j] * (1.0 - f[j]);
            dc[j] = dcj * f[j];
        }
    }
}

/// `W_hh^T` `[H, 4H]` from `W_hh` `[4H, H]`, in tiles so both sides stay in cache.
fn transpose(whh: &[f32], g4: usize, h: usize) -> Vec<f32> {
    const TILE: usize = 32;
    let mut out = vec![0f32; g4 * h];
    for r0 in (0..g4).step_by(TILE) {
        for c0 in (0..h).step_by(TILE) {
            for r in r0..(r0 + TILE).min(g4) {
                for c in c0..(c0 + TILE).min(h) {
                    out[c * g4 + r] = whh[r * h + c];
                }
            }
        }
    }
    out
}

impl CustomOp3 for LstmSeq {
    fn name(&self) -> &'static str {
        "fused-lstm"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
        s3: &CpuStorage,
        l3: &Layout,
    ) -> candle_core::Result<(CpuStorage, Shape)> {
        let (t_len, b, h) = (self.steps, self.batch, self.hidden);
        let g4 = 4 * h;
        let xg = f32_slice(s1, l1, "fused lstm: input projection")?;
        let whh = f32_slice(s2, l2, "fused lstm: w_hh")?;
        let s0 = f32_slice(s3, l3, "fused lstm: start state")?;
        if xg.len() != t_len * b * g4 || whh.len() != g4 * h || s0.len() != 2 * b * h {
            bail!(
                "fused lstm: expected input projection [{}, {}], w_hh [{}, {}], start state [2, {}, {}]; got {:?}, {:?}, {:?}",
                t_len * b, g4, g4, h, b, h, l1.shape(), l2.shape(), l3.shape()
            );
        }
        // W_hh^T as a contiguous copy: the per-step matmul then reads rows.
        let whh_t = transpose(whh, g4, h);
        let n = t_len * b * h;
        let mut acts = xg.to_vec(); // the input projection; gates accumulate on top
                                    // In full mode h and c share the output buffer; otherwise c has its own.
        let mut out = vec![0f32; if self.full { 2 * n } else { n }];
        let mut cs_own = if self.full { Vec::new() } else { vec![0f32; n] };
        let mut tanh_c = vec![0f32; n];
        let (hs_part, cs_part) = if self.full {
            let (a, c) = out.split_at_mut(n);
            (a, c)
        } else {
            (&mut out[..], &mut cs_own[..])
        };
        let bufs = ForwardBufs {
            whh_t: SharedRead(whh_t.as_ptr()),
            s0: SharedRead(s0.as_ptr()),
            hs: DisjointMut(hs_part.as_mut_ptr()),
            cs: DisjointMut(cs_part.as_mut_ptr()),
            tanh_c: DisjointMut(tanh_c.as_mut_ptr()),
            acts: DisjointMut(acts.as_mut_ptr()),
        };
        // SAFETY: the buffers have the sizes checked above and outlive the team, which
        // `run_team` joins before returning; nothing else touches them meanwhile.
        threads::run_team(self.team, &|m| unsafe { self.forward_member(m, bufs) });
        if self.save {
            let cs = if self.full { out[n..].to_vec() } else { cs_own };
            *self.saved.lock().expect("fused lstm cache poisoned") =
                Some(Saved { acts, tanh_c, cs });
        }
        let shape = if self.full {
            Shape::from((2, t_len, b, h))
        } else {
            Shape::from((t_len, b, h))
        };
        Ok((CpuStorage::F32(out), shape))
    }

    fn bwd(
        &self,
        _xg: &Tensor,
        w_hh: &Tensor,
        state0: &Tensor,
        res: &Tensor,
        grad_res: &Tensor,
    ) -> candle_core::Result<(Option<Tensor>, Option<Tensor>, Option<Tensor>)> {
        let (t_len, b, h) = (self.steps, self.batch, self.hidden);
        let g4 = 4 * h;
        let guard = self.saved.lock().expect("fused lstm cache poisoned");
        let Some(saved) = guard.as_ref() else {
            bail!("fused lstm: backward called on a forward run without gradient")
        };
        let mut dxg = vec![0f32; t_len * b * g4];
        let mut ds0 = vec![0f32; 2 * b * h];
        let mut dwhh = vec![0f32; g4 * h];
        let full = self.full;
        with_f32(w_hh, |whh| {
            with_f32(state0, |s0| {
                with_f32(res, |out| {
                    with_f32(grad_res, |gout| {
                        let bufs = BackwardBufs {
                            whh: SharedRead(whh.as_ptr()),
                            s0: SharedRead(s0.as_ptr()),
                            // h is the first [T, B, H] block of the output in both modes
                            hs: SharedRead(out.as_ptr()),
                            cs: SharedRead(saved.cs.as_ptr()),
                            tanh_c: SharedRead(saved.tanh_c.as_ptr()),
                            acts: SharedRead(saved.acts.as_ptr()),
                            gh: SharedRead(gout.as_ptr()),
                            // in full mode the gradient holds [2, T, B, H]
                            gc: full.then(|| SharedRead(gout[t_len * b * h..].as_ptr())),
                            dxg: DisjointMut(dxg.as_mut_ptr()),
                            ds0: DisjointMut(ds0.as_mut_ptr()),
                            dwhh: DisjointMut(dwhh.as_mut_ptr()),
                        };
                        // SAFETY: shapes checked in the forward pass; the buffers outlive
                        // the team, which `run_team` joins before returning.
                        threads::run_team(self.team, &|m| unsafe { self.backward_member(m, bufs) });
                    })
                })
            })
        })????;
        let dev = w_hh.device();
        Ok((
            Some(Tensor::from_vec(dxg, (t_len * b, g4), dev)?),
            Some(Tensor::from_vec(dwhh, (g4, h), dev)?),
            Some(Tensor::from_vec(ds0, (2, b, h), dev)?),
        ))
    }
}

/// Runs the fused LSTM over `steps` steps with gradient support.
///
/// `xg` `[steps*batch, 4H]`, `w_hh` `[4H, H]`, `state0` `[2, batch, H]`; returns
/// `[2, steps, batch, H]` (hidden states, then cell states).
pub fn lstm_sequence(
    xg: &Tensor,
    w_hh: &Tensor,
    state0: &Tensor,
    steps: usize,
) -> crate::Result<Tensor> {
    Ok(run(xg, w_hh, state0, steps, true, true)?.0)
}

/// The learner's path: the fused LSTM with gradient support, returning only the hidden
/// states `[steps, batch, H]` as the graph output (so the backward pass carries no cell
/// gradient), plus the cell states `[steps, batch, H]` as a detached tensor.
pub fn lstm_hidden(
    xg: &Tensor,
    w_hh: &Tensor,
    state0: &Tensor,
    steps: usize,
) -> crate::Result<(Tensor, Tensor)> {
    let (hs, saved) = run(xg, w_hh, state0, steps, true, false)?;
    let guard = saved.lock().expect("fused lstm cache poisoned");
    let cs = guard.as_ref().map(|s| s.cs.clone()).unwrap_or_default();
    let cells = Tensor::from_vec(cs, hs.dims(), hs.device())?;
    Ok((hs, cells))
}

/// As [`lstm_sequence`], without recording the op for backward (burn-in, target network).
pub fn lstm_sequence_no_grad(
    xg: &Tensor,
    w_hh: &Tensor,
    state0: &Tensor,
    steps: usize,
) -> crate::Result<Tensor> {
    Ok(run(xg, w_hh, state0, steps, false, true)?.0)
}

fn run(
    xg: &Tensor,
    w_hh: &Tensor,
    state0: &Tensor,
    steps: usize,
    grad: bool,
    full: bool,
) -> crate::Result<(Tensor, Arc<Mutex<Option<Saved>>>)> {
    let (g4, h) = w_hh.dims2()?;
    if g4 != 4 * h {
        return Err(crate::Error::shape(
            "fused lstm w_hh",
            format!("[4H, H] with 4H = {}", 4 * h),
            format!("{:?}", w_hh.dims()),
        ));
    }
    let (two, b, h2) = state0.dims3()?;
    if two != 2 || h2 != h {
        return Err(crate::Error::shape(
            "fused lstm start state",
            format!("[2, batch, {h}]"),
            format!("{:?}", state0.dims()),
        ));
    }
    let (rows, cols) = xg.dims2()?;
    if rows != steps * b || cols != g4 {
        return Err(crate::Error::shape(
            "fused lstm input projection",
            format!("[{} (steps {steps} x batch {b}), {g4}]", steps * b),
            format!("{:?}", xg.dims()),
        ));
    }
    // Members of a team meet at a barrier every step, so a team larger than the cores
    // only makes members wait for each other's time slices.
    let (team, split) = choose_split(b, h, threads::threads().min(threads::cores()));
    let op = LstmSeq {
        steps,
        batch: b,
        hidden: h,
        team,
        split,
        save: grad,
        full,
        saved: Default::default(),
    };
    let saved = op.saved.clone();
    let (xg, w_hh, state0) = (xg.contiguous()?, w_hh.contiguous()?, state0.contiguous()?);
    let out = if grad {
        xg.apply_op3(&w_hh, &state0, op)?
    } else {
        xg.detach()
            .apply_op3_no_bwd(&w_hh.detach(), &state0.detach(), &op)?
    };
    Ok((out, saved))
}

/// The same recurrence built from plain candle ops, step by step: the slow twin the fused
/// op is tested against (its backward is candle's autograd).
pub fn lstm_sequence_reference(
    xg: &Tensor,
    w_hh: &Tensor,
    state0: &Tensor,
    steps: usize,
) -> crate::Result<Tensor> {
    let (_, b, h) = state0.dims3()?;
    let mut hp = state0.get(0)?;
    let mut cp = state0.get(1)?;
    let mut hs = Vec::with_capacity(steps);
    let mut cs = Vec::with_capacity(steps);
    for t in 0..steps {
        let gates = (xg.narrow(0, t * b, b)? + hp.matmul(&w_hh.t()?)?)?;
        let i = candle_nn::ops::sigmoid(&gates.narrow(1, 0, h)?)?;
        let f = candle_nn::ops::sigmoid(&gates.narrow(1, h, h)?)?;
        let g = gates.narrow(1, 2 * h, h)?.tanh()?;
        let o = candle_nn::ops::sigmoid(&gates.narrow(1, 3 * h, h)?)?;
        let c = ((f * &cp)? + (i * g)?)?;
        let hn = (o * c.tanh()?)?;
        hs.push(hn.clone());
        cs.push(c.clone());
        hp = hn;
        cp = c;
    }
    let hs = Tensor::stack(&hs, 0)?;
    let cs = Tensor::stack(&cs, 0)?;
    Ok(Tensor::stack(&[hs, cs], 0)?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{Device, Var};

    fn rand_tensor(shape: &[usize], scale: f32, seed: u64) -> Tensor {
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let n: usize = shape.iter().product();
        let v: Vec<f32> = (0..n).map(|_| rng.random_range(-scale..scale)).collect();
        Tensor::from_vec(v, shape, &Device::Cpu).unwrap()
    }

    /// max |a - b| / max |b|: error relative to the scale of the reference tensor.
    fn rel_err(a: &Tensor, b: &Tensor) -> f32 {
        let a = a.flatten_all().unwrap().to_vec1::<f32>().unwrap();
        let b = b.flatten_all().unwrap().to_vec1::<f32>().unwrap();
        assert_eq!(a.len(), b.len());
        let scale = b.iter().fold(0f32, |m, x| m.max(x.abs())).max(1e-30);
        a.iter()
            .zip(&b)
            .fold(0f32, |m, (x, y)| m.max((x - y).abs()))
            / scale
    }

    fn check_against_autograd(t_len: usize, b: usize, h: usize, team: usize, split: Split) {
        let _serial = threads::TEAM_TESTS
            .lock()
            .unwrap_or_else(|e| e.into_inner());
        let xg = Var::from_tensor(&rand_tensor(&[t_len * b, 4 * h], 1.5, 1)).unwrap();
        let whh = Var::from_tensor(&rand_tensor(&[4 * h, h], 0.4, 2)).unwrap();
        let s0 = Var::from_tensor(&rand_tensor(&[2, b, h], 0.5, 3)).unwrap();
        // A loss that weights every output differently, so every gradient path is used.
        let wout = rand_tensor(&[2, t_len, b, h], 1.0, 4);
        let op = LstmSeq {
            steps: t_len,
            batch: b,
            hidden: h,
            team,
            split,
            save: true,
            full: true,
            saved: Default::default(),
        };
        let fused = xg
            .as_tensor()
            .apply_op3(whh.as_tensor(), s0.as_tensor(), op)
            .unwrap();
        let refd = lstm_sequence_reference(xg.as_tensor(), whh.as_tensor(), s0.as_tensor(), t_len)
            .unwrap();
        assert!(
            rel_err(&fused, &refd) < 1e-5,
            "forward differs: {}",
            rel_err(&fused, &refd)
        );
        let gf = (fused * &wout)
            .unwrap()
            .sum_all()
            .unwrap()
            .backward()
            .unwrap();
        let gr = (refd * &wout)
            .unwrap()
            .sum_all()
            .unwrap()
            .backward()
            .unwrap();
        for (name, v) in [("xg", &xg), ("w_hh", &whh), ("state0", &s0)] {
            let e = rel_err(
                gf.get(v.as_tensor()).unwrap(),
                gr.get(v.as_tensor()).unwrap(),
            );
            assert!(
                e < 1e-5,
                "gradient of {name} differs from candle autograd: {e}"
            );
        }
    }

    // Reference: candle's autograd over the same cell built from ops (`lstm_sequence_reference`).
    #[test]
    fn fused_matches_autograd_one_thread() {
        check_against_autograd(7, 5, 8, 1, Split::Lanes);
    }

    #[test]
    fn fused_matches_autograd_split_batch() {
        check_against_autograd(6, 5, 16, 3, Split::Lanes);
    }

    // Split by hidden units: two members with 16 units each, three members over 40
    // units (16, 16, 8), and more members than unit blocks (the extra ones only meet
    // the barriers).
    #[test]
    fn fused_matches_autograd_split_units() {
        check_against_autograd(6, 5, 32, 2, Split::Units);
        check_against_autograd(5, 3, 40, 3, Split::Units);
        check_against_autograd(4, 2, 16, 3, Split::Units);
    }

    // Edge shapes where a buffer left unwritten would show: one step (only the h0 part
    // of dW_hh), one lane, one unit, and more lane-split members than lanes.
    #[test]
    fn fused_matches_autograd_on_edge_shapes() {
        check_against_autograd(1, 3, 4, 1, Split::Lanes);
        check_against_autograd(3, 1, 1, 1, Split::Lanes);
        check_against_autograd(3, 2, 5, 4, Split::Lanes);
        check_against_autograd(1, 2, 20, 2, Split::Units);
    }

    #[test]
    fn the_split_follows_lanes_per_thread() {
        assert_eq!(choose_split(32, 128, 1), (1, Split::Lanes));
        assert_eq!(choose_split(32, 128, 2), (2, Split::Units));
        assert_eq!(choose_split(128, 128, 2), (2, Split::Lanes));
        assert_eq!(choose_split(32, 8, 2), (1, Split::Lanes));
        assert_eq!(choose_split(32, 40, 8), (3, Split::Units));
    }

    // The learner's hidden-only path against candle autograd of the op-built cell.
    #[test]
    fn hidden_only_path_matches_autograd() {
        let (t_len, b, h) = (5, 4, 8);
        let xg = Var::from_tensor(&rand_tensor(&[t_len * b, 4 * h], 1.5, 11)).unwrap();
        let whh = Var::from_tensor(&rand_tensor(&[4 * h, h], 0.4, 12)).unwrap();
        let s0 = Var::from_tensor(&rand_tensor(&[2, b, h], 0.5, 13)).unwrap();
        let wout = rand_tensor(&[t_len, b, h], 1.0, 14);
        let (hs, cells) =
            lstm_hidden(xg.as_tensor(), whh.as_tensor(), s0.as_tensor(), t_len).unwrap();
        let refd = lstm_sequence_reference(xg.as_tensor(), whh.as_tensor(), s0.as_tensor(), t_len)
            .unwrap();
        assert!(rel_err(&hs, &refd.get(0).unwrap()) < 1e-5);
        assert!(rel_err(&cells, &refd.get(1).unwrap()) < 1e-5);
        let gf = (hs * &wout).unwrap().sum_all().unwrap().backward().unwrap();
        let gr = (refd.get(0).unwrap() * &wout)
            .unwrap()
            .sum_all()
            .unwrap()
            .backward()
            .unwrap();
        for (name, v) in [("xg", &xg), ("w_hh", &whh), ("state0", &s0)] {
            let e = rel_err(
                gf.get(v.as_tensor()).unwrap(),
                gr.get(v.as_tensor()).unwrap(),
            );
            assert!(
                e < 1e-5,
                "gradient of {name} differs from candle autograd: {e}"
            );
        }
    }

    #[test]
    fn fused_single_step_and_no_grad_agree() {
        let xg = rand_tensor(&[3, 16], 1.0, 5);
        let whh = rand_tensor(&[16, 4], 0.5, 6);
        let s0 = rand_tensor(&[2, 3, 4], 0.5, 7);
        let a = lstm_sequence(&xg, &whh, &s0, 1).unwrap();
        let b = lstm_sequence_no_grad(&xg, &whh, &s0, 1).unwrap();
        assert_eq!(rel_err(&a, &b), 0.0);
        assert!(
            lstm_sequence(&xg, &whh, &s0, 2).is_err(),
            "wrong step count must be refused"
        );
    }

    /// The pass without gradient (burn-in, target network) keeps nothing for a
    /// backward: its outputs must equal the reference's over many steps, on one thread
    /// and split over two.
    #[test]
    fn no_grad_pass_equals_the_reference_over_many_steps() {
        let _serial = threads::TEAM_TESTS
            .lock()
            .unwrap_or_else(|e| e.into_inner());
        for (b, threads, split) in [
            (5, 1, Split::Lanes),
            (6, 2, Split::Lanes),
            (6, 2, Split::Units),
        ] {
            let (t_len, h) = (9, 20);
            let xg = rand_tensor(&[t_len * b, 4 * h], 1.5, 11);
            let whh = rand_tensor(&[4 * h, h], 0.4, 12);
            let s0 = rand_tensor(&[2, b, h], 0.5, 13);
            let op = LstmSeq {
                steps: t_len,
                batch: b,
                hidden: h,
                team: threads,
                split,
                save: false,
                full: true,
                saved: Default::default(),
            };
            let fused = xg.apply_op3_no_bwd(&whh, &s0, &op).unwrap();
            let refd = lstm_sequence_reference(&xg, &whh, &s0, t_len).unwrap();
            let e = rel_err(&fused, &refd);
            assert!(e < 1e-5, "b {b}, threads {threads}, {split:?}: {e}");
            assert!(
                op.saved.lock().unwrap().is_none(),
                "nothing kept without gradient"
            );
        }
    }
}
