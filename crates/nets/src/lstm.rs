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
//! Lanes of the batch are independent, so with [`crate::threads::threads`] > 1 each thread
//! runs the whole recurrence for its own lanes. Per-step slices of graph tensors are
//! avoided entirely (their backward would be O(T^2)).

use std::sync::Mutex;

use candle_core::{bail, CpuStorage, CustomOp3, Layout, Shape, Storage, Tensor};
use gemm::Parallelism;

use crate::fastmath;
use crate::threads;

/// Activations saved by the forward pass for the backward pass.
struct Saved {
    /// `[T, B, 4H]`: i, f, g, o after their nonlinearities.
    acts: Vec<f32>,
    /// `[T, B, H]`: tanh(c_t).
    tanh_c: Vec<f32>,
    /// `[T, B, H]`: c_t.
    cs: Vec<f32>,
}

/// Fewest lanes worth a thread of their own in the recurrence. gemm pads a per-step
/// product's rows to its microkernel height, so a thread with few lanes costs nearly
/// as much as one with all of them: measured with `mnemon bench learner --threads 2`,
/// splitting B = 32 in two made the step slower (14 ms vs 11.8 ms unsplit), B = 64 was
/// even and B = 128 faster (41 ms vs 55 ms).
const MIN_LANES_PER_THREAD: usize = 32;

/// One application of the fused LSTM to one sequence batch.
struct LstmSeq {
    steps: usize,
    batch: usize,
    hidden: usize,
    /// Threads of the large matmuls (the weight gradient).
    threads: usize,
    /// Threads the batch's lanes are split over for the recurrence.
    lane_threads: usize,
    save: bool,
    /// Output h and c (`[2, T, B, H]`) rather than h only (`[T, B, H]`).
    full: bool,
    saved: std::sync::Arc<Mutex<Option<Saved>>>,
}

/// A vector of `n` floats, every one written by `fill` before it is read.
///
/// Skips the zeroing pass of `vec![0.0; n]` for buffers that are overwritten anyway.
///
/// # Safety
/// `fill` must write all `n` elements through the pointer it is given.
pub(crate) unsafe fn filled(n: usize, fill: impl FnOnce(*mut f32)) -> Vec<f32> {
    let mut v: Vec<f32> = Vec::with_capacity(n);
    fill(v.as_mut_ptr());
    v.set_len(n);
    v
}

#[derive(Clone, Copy)]
struct Ptr(*mut f32);
// SAFETY: the pointers are only used on disjoint row ranges by the threads of one scope.
unsafe impl Send for Ptr {}
unsafe impl Sync for Ptr {}

#[derive(Clone, Copy)]
struct CPtr(*const f32);
// SAFETY: read-only shared data, alive for the whole scope.
unsafe impl Send for CPtr {}
unsafe impl Sync for CPtr {}

/// The contiguous f32 data of a custom op's input; `what` names it in errors
/// (`fused lstm: w_hh must be f32`).
pub(crate) fn f32_slice<'a>(
    s: &'a CpuStorage,
    l: &Layout,
    what: &str,
) -> candle_core::Result<&'a [f32]> {
    let CpuStorage::F32(v) = s else {
        bail!("{what} must be f32")
    };
    match l.contiguous_offsets() {
        Some((a, b)) => Ok(&v[a..b]),
        None => bail!("{what} must be contiguous"),
    }
}

/// Runs `f` on the contiguous f32 data of a CPU tensor (copying only if it is strided).
pub(crate) fn with_f32<R>(t: &Tensor, f: impl FnOnce(&[f32]) -> R) -> candle_core::Result<R> {
    let t = if t.is_contiguous() {
        t.clone()
    } else {
        t.contiguous()?
    };
    let (storage, layout) = t.storage_and_layout();
    match &*storage {
        Storage::Cpu(s) => Ok(f(f32_slice(s, layout, "mnemon-nets: tensor")?)),
        _ => bail!("mnemon-nets runs on the CPU only"),
    }
}

/// `dst[m x n] (+)= lhs[m x k] * rhs[k x n]` on raw row-major pointers with given row strides
/// (column stride 1 unless transposed views are passed through the `_cs` arguments).
#[allow(clippy::too_many_arguments)]
#[inline]
unsafe fn mm(
    m: usize,
    n: usize,
    k: usize,
    dst: *mut f32,
    dst_rs: usize,
    accumulate: bool,
    lhs: *const f32,
    lhs_rs: isize,
    lhs_cs: isize,
    rhs: *const f32,
    rhs_rs: isize,
    rhs_cs: isize,
    par: Parallelism,
) {
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if !accumulate {
            for r in 0..m {
                std::ptr::write_bytes(dst.add(r * dst_rs), 0, n);
            }
        }
        return;
    }
    gemm::gemm(
        m,
        n,
        k,
        dst,
        1,
        dst_rs as isize,
        accumulate,
        lhs,
        lhs_cs,
        lhs_rs,
        rhs,
        rhs_cs,
        rhs_rs,
        1.0,
        1.0,
        false,
        false,
        false,
        par,
    );
}

impl LstmSeq {
    /// Forward over lanes `r0..r1` for all steps.
    #[allow(clippy::too_many_arguments)]
    unsafe fn forward_lanes(
        &self,
        r0: usize,
        r1: usize,
        whh_t: CPtr,
        s0: CPtr,
        hs: Ptr,
        cs: Ptr,
        acts: Ptr,
        tanh_c: Ptr,
    ) {
        let (t_len, b, h) = (self.steps, self.batch, self.hidden);
        let g4 = 4 * h;
        let m = r1 - r0;
        for t in 0..t_len {
            let (h_prev, c_prev): (*const f32, *const f32) = if t == 0 {
                (s0.0.add(r0 * h), s0.0.add(b * h + r0 * h))
            } else {
                (
                    hs.0.add(((t - 1) * b + r0) * h),
                    cs.0.add(((t - 1) * b + r0) * h),
                )
            };
            // `acts` arrives holding the input projection; the recurrent term is added.
            let gates = acts.0.add((t * b + r0) * g4);
            mm(
                m,
                g4,
                h,
                gates,
                g4,
                true,
                h_prev,
                h as isize,
                1,
                whh_t.0,
                g4 as isize,
                1,
                Parallelism::None,
            );
            let base = (t * b + r0) * h;
            forward_cells(
                h,
                std::slice::from_raw_parts_mut(gates, m * g4),
                std::slice::from_raw_parts(c_prev, m * h),
                std::slice::from_raw_parts_mut(hs.0.add(base), m * h),
                std::slice::from_raw_parts_mut(cs.0.add(base), m * h),
                std::slice::from_raw_parts_mut(tanh_c.0.add(base), m * h),
            );
        }
    }

    /// Backward recurrence over lanes `r0..r1`: writes `dxg` rows and the start-state grads.
    #[allow(clippy::too_many_arguments)]
    unsafe fn backward_lanes(
        &self,
        r0: usize,
        r1: usize,
        whh: CPtr,
        s0: CPtr,
        cs: CPtr,
        acts: CPtr,
        tanh_c: CPtr,
        gh: CPtr,
        gc: Option<CPtr>,
        dxg: Ptr,
        ds0: Ptr,
    ) {
        let (t_len, b, h) = (self.steps, self.batch, self.hidden);
        let g4 = 4 * h;
        let m = r1 - r0;
        let mut dh_next = vec![0f32; m * h];
        let mut dc_next = vec![0f32; m * h];
        for t in (0..t_len).rev() {
            let c_prev: *const f32 = if t == 0 {
                s0.0.add(b * h + r0 * h)
            } else {
                cs.0.add(((t - 1) * b + r0) * h)
            };
            let base = (t * b + r0) * h;
            backward_cells(
                h,
                std::slice::from_raw_parts(acts.0.add((t * b + r0) * g4), m * g4),
                std::slice::from_raw_parts(tanh_c.0.add(base), m * h),
                std::slice::from_raw_parts(c_prev, m * h),
                std::slice::from_raw_parts(gh.0.add(base), m * h),
                gc.map(|g| std::slice::from_raw_parts(g.0.add(base), m * h)),
                std::slice::from_raw_parts_mut(dxg.0.add((t * b + r0) * g4), m * g4),
                &mut dh_next,
                &mut dc_next,
            );
            // dh_{t-1} = da_t W_hh  ([m, 4H] x [4H, H])
            mm(
                m,
                h,
                g4,
                dh_next.as_mut_ptr(),
                h,
                false,
                dxg.0.add((t * b + r0) * g4),
                g4 as isize,
                1,
                whh.0,
                h as isize,
                1,
                Parallelism::None,
            );
        }
        std::ptr::copy_nonoverlapping(dh_next.as_ptr(), ds0.0.add(r0 * h), m * h);
        std::ptr::copy_nonoverlapping(dc_next.as_ptr(), ds0.0.add(b * h + r0 * h), m * h);
    }
}

crate::multiversion! {
    /// The cell update of one step for a block of rows: `gates` `[m, 4H]` pre-activations
    /// in, activations out (i, f, g, o); `c_prev` `[m, H]`; writes h, c and tanh(c).
    fn forward_cells(h: usize, gates: &mut [f32], c_prev: &[f32], hs: &mut [f32], cs: &mut [f32], tcs: &mut [f32]) {
        let g4 = 4 * h;
        for (r, row) in gates.chunks_exact_mut(g4).enumerate() {
            let (ifg, o) = row.split_at_mut(3 * h);
            let (if_, g) = ifg.split_at_mut(2 * h);
            for x in if_.iter_mut() {
                *x = fastmath::sigmoid(*x);
            }
            for x in g.iter_mut() {
                *x = fastmath::tanh(*x);
            }
            for x in o.iter_mut() {
                *x = fastmath::sigmoid(*x);
            }
            let (i, f) = if_.split_at(h);
            let cp = &c_prev[r * h..(r + 1) * h];
            let hc = &mut hs[r * h..(r + 1) * h];
            let cc = &mut cs[r * h..(r + 1) * h];
            let tc = &mut tcs[r * h..(r + 1) * h];
            for j in 0..h {
                let c = f[j] * cp[j] + i[j] * g[j];
                cc[j] = c;
                let t = fastmath::tanh(c);
                tc[j] = t;
                hc[j] = o[j] * t;
            }
        }
    }
}

crate::multiversion! {
    /// The backward pass of one step's cell update for a block of rows; `dhn`/`dcn` carry
    /// the recurrent gradients in (from step t+1) and `dcn` carries dc_{t-1} out; `d`
    /// receives the gate pre-activation gradients `[m, 4H]`.
    fn backward_cells(
        h: usize,
        acts: &[f32],
        tcs: &[f32],
        c_prev: &[f32],
        ghs: &[f32],
        gcs: Option<&[f32]>,
        d: &mut [f32],
        dhn: &mut [f32],
        dcn: &mut [f32],
    ) {
        let g4 = 4 * h;
        for (r, (a, drow)) in acts.chunks_exact(g4).zip(d.chunks_exact_mut(g4)).enumerate() {
            let (i, rest) = a.split_at(h);
            let (f, rest) = rest.split_at(h);
            let (g, o) = rest.split_at(h);
            let rs = r * h..(r + 1) * h;
            let (tc, cp, gh) = (&tcs[rs.clone()], &c_prev[rs.clone()], &ghs[rs.clone()]);
            let dcr = &mut dcn[rs.clone()];
            if let Some(gcs) = gcs {
                for (d, g) in dcr.iter_mut().zip(&gcs[rs.clone()]) {
                    *d += g;
                }
            }
            let dhr = &dhn[rs];
            let (di, rest) = drow.split_at_mut(h);
            let (df, rest) = rest.split_at_mut(h);
            let (dg, do_) = rest.split_at_mut(h);
            for j in 0..h {
                let dh = gh[j] + dhr[j];
                let dc = dcr[j] + dh * o[j] * (1.0 - tc[j] * tc[j]);
                do_[j] = dh * tc[j] * o[j] * (1.0 - o[j]);
                di[j] = dc * g[j] * i[j] * (1.0 - i[j]);
                dg[j] = dc * i[j] * (1.0 - g[j] * g[j]);
                df[j] = dc * cp[j] * f[j] * (1.0 - f[j]);
                dcr[j] = dc * f[j];
            }
        }
    }
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
        // W_hh^T as a contiguous [H, 4H] copy: the per-step matmul then reads rows.
        let mut whh_t = vec![0f32; g4 * h];
        for r in 0..g4 {
            for c in 0..h {
                whh_t[c * g4 + r] = whh[r * h + c];
            }
        }
        let n = t_len * b * h;
        let mut acts = xg.to_vec(); // the input projection; gates accumulate on top
                                    // SAFETY: the recurrence writes every row of every step of these three buffers.
        let (mut hs, mut cs, mut tanh_c) =
            unsafe { (filled(n, |_| ()), filled(n, |_| ()), filled(n, |_| ())) };
        let (wp, sp) = (CPtr(whh_t.as_ptr()), CPtr(s0.as_ptr()));
        let (hp, cp) = (Ptr(hs.as_mut_ptr()), Ptr(cs.as_mut_ptr()));
        let (ap, tp) = (Ptr(acts.as_mut_ptr()), Ptr(tanh_c.as_mut_ptr()));
        let ranges = threads::split(b, self.lane_threads);
        if ranges.len() <= 1 {
            // SAFETY: buffers sized above; one thread.
            unsafe { self.forward_lanes(0, b, wp, sp, hp, cp, ap, tp) };
        } else {
            std::thread::scope(|s| {
                for r in ranges {
                    // SAFETY: each thread writes only rows of its own lanes.
                    s.spawn(move || unsafe {
                        self.forward_lanes(r.start, r.end, wp, sp, hp, cp, ap, tp)
                    });
                }
            });
        }
        let (out, shape) = if self.full {
            hs.extend_from_slice(&cs);
            (hs, Shape::from((2, t_len, b, h)))
        } else {
            (hs, Shape::from((t_len, b, h)))
        };
        if self.save {
            *self.saved.lock().expect("fused lstm cache poisoned") =
                Some(Saved { acts, tanh_c, cs });
        }
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
        // SAFETY: the backward recurrence writes every row of dxg and ds0; the first dW
        // matmul overwrites all of dwhh.
        let (mut dxg, mut ds0, mut dwhh) = unsafe {
            (
                filled(t_len * b * g4, |_| ()),
                filled(2 * b * h, |_| ()),
                filled(g4 * h, |_| ()),
            )
        };
        let full = self.full;
        let nthreads = self.threads;
        let lane_threads = self.lane_threads;
        with_f32(w_hh, |whh| {
            with_f32(state0, |s0| {
                with_f32(res, |out| {
                    with_f32(grad_res, |gout| {
                        let wp = CPtr(whh.as_ptr());
                        let sp = CPtr(s0.as_ptr());
                        // h is the first [T, B, H] block of the output in both modes
                        let cp = CPtr(saved.cs.as_ptr());
                        let ap = CPtr(saved.acts.as_ptr());
                        let tp = CPtr(saved.tanh_c.as_ptr());
                        let gp = CPtr(gout.as_ptr());
                        // SAFETY: in full mode the gradient holds [2, T, B, H].
                        let gcp = full.then(|| CPtr(unsafe { gout.as_ptr().add(t_len * b * h) }));
                        let dp = Ptr(dxg.as_mut_ptr());
                        let dsp = Ptr(ds0.as_mut_ptr());
                        let ranges = threads::split(b, lane_threads);
                        if ranges.len() <= 1 {
                            // SAFETY: buffers sized above; one thread.
                            unsafe {
                                self.backward_lanes(0, b, wp, sp, cp, ap, tp, gp, gcp, dp, dsp)
                            };
                        } else {
                            std::thread::scope(|s| {
                                for r in ranges {
                                    // SAFETY: each thread writes only rows of its own lanes.
                                    s.spawn(move || unsafe {
                                        self.backward_lanes(
                                            r.start, r.end, wp, sp, cp, ap, tp, gp, gcp, dp, dsp,
                                        )
                                    });
                                }
                            });
                        }
                        // dW_hh = sum_t da_t^T h_{t-1}: [4H, B] x [B, H] for t = 0 (h0), then
                        // [4H, (T-1)B] x [(T-1)B, H] over the stored hidden states.
                        let par = if nthreads > 1 {
                            Parallelism::Rayon(nthreads)
                        } else {
                            Parallelism::None
                        };
                        // SAFETY: shapes checked in the forward pass; dxg^T is read through strides.
                        unsafe {
                            mm(
                                g4,
                                h,
                                b,
                                dwhh.as_mut_ptr(),
                                h,
                                false,
                                dxg.as_ptr(),
                                1,
                                g4 as isize,
                                s0.as_ptr(),
                                h as isize,
                                1,
                                par,
                            );
                            if t_len > 1 {
                                mm(
                                    g4,
                                    h,
                                    (t_len - 1) * b,
                                    dwhh.as_mut_ptr(),
                                    h,
                                    true,
                                    dxg.as_ptr().add(b * g4),
                                    1,
                                    g4 as isize,
                                    out.as_ptr(),
                                    h as isize,
                                    1,
                                    par,
                                );
                            }
                        }
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
) -> crate::Result<(Tensor, std::sync::Arc<Mutex<Option<Saved>>>)> {
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
    let op = LstmSeq {
        steps,
        batch: b,
        hidden: h,
        threads: threads::threads(),
        lane_threads: threads::threads().min((b / MIN_LANES_PER_THREAD).max(1)),
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

    fn check_against_autograd(t_len: usize, b: usize, h: usize, threads: usize) {
        let xg = Var::from_tensor(&rand_tensor(&[t_len * b, 4 * h], 1.5, 1)).unwrap();
        let whh = Var::from_tensor(&rand_tensor(&[4 * h, h], 0.4, 2)).unwrap();
        let s0 = Var::from_tensor(&rand_tensor(&[2, b, h], 0.5, 3)).unwrap();
        // A loss that weights every output differently, so every gradient path is used.
        let wout = rand_tensor(&[2, t_len, b, h], 1.0, 4);
        let op = LstmSeq {
            steps: t_len,
            batch: b,
            hidden: h,
            threads,
            lane_threads: threads,
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
        check_against_autograd(7, 5, 8, 1);
    }

    #[test]
    fn fused_matches_autograd_split_batch() {
        check_against_autograd(6, 5, 16, 3);
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
        for (b, threads) in [(5, 1), (6, 2)] {
            let (t_len, h) = (9, 7);
            let xg = rand_tensor(&[t_len * b, 4 * h], 1.5, 11);
            let whh = rand_tensor(&[4 * h, h], 0.4, 12);
            let s0 = rand_tensor(&[2, b, h], 0.5, 13);
            let op = LstmSeq {
                steps: t_len,
                batch: b,
                hidden: h,
                threads,
                lane_threads: threads,
                save: false,
                full: true,
                saved: Default::default(),
            };
            let fused = xg.apply_op3_no_bwd(&whh, &s0, &op).unwrap();
            let refd = lstm_sequence_reference(&xg, &whh, &s0, t_len).unwrap();
            let e = rel_err(&fused, &refd);
            assert!(e < 1e-5, "b {b}, threads {threads}: {e}");
            assert!(
                op.saved.lock().unwrap().is_none(),
                "nothing kept without gradient"
            );
        }
    }
}
