//! The learning losses and their target arithmetic.
//!
//! - value rescaling h and h^-1 (Pohlen et al. 2018);
//! - n-step double-Q targets (van Hasselt et al. 2016) over stored sequences, with terminal
//!   transitions ending the return and time-limit truncation bootstrapping through
//!   (Pardo et al. 2018);
//! - the TD loss (squared or Huber) with masks and importance weights;
//! - the quantile Huber loss (Dabney et al. 2017) with midpoints (2i-1)/2N;
//! - sequence priorities p = eta*max|d| + (1-eta)*mean|d| (Kapturowski et al. 2019),
//!   prioritized-replay probabilities and importance weights (Schaul et al. 2016);
//! - the Q-value discrepancy between stored-state and fresh-unroll Q values
//!   (Kapturowski et al. 2019).
//!
//! Targets are computed on the host (no gradient flows through them); losses are candle
//! expressions whose backward reaches the network.

use candle_core::{Device, Tensor};
use mnemon_spec::TdLoss;

use crate::error::{Error, Result};

/// h(x) = sign(x)(sqrt(|x|+1) - 1) + eps*x (Pohlen et al. 2018).
pub fn h(x: f64, eps: f64) -> f64 {
    x.signum() * ((x.abs() + 1.0).sqrt() - 1.0) + eps * x
}

/// The inverse of [`h`]: sign(y)(((sqrt(1 + 4 eps (|y| + 1 + eps)) - 1) / (2 eps))^2 - 1);
/// for eps = 0, sign(y)((|y| + 1)^2 - 1).
pub fn h_inv(y: f64, eps: f64) -> f64 {
    if eps == 0.0 {
        return y.signum() * ((y.abs() + 1.0).powi(2) - 1.0);
    }
    let s = ((1.0 + 4.0 * eps * (y.abs() + 1.0 + eps)).sqrt() - 1.0) / (2.0 * eps);
    y.signum() * (s * s - 1.0)
}

/// Settings of the n-step target.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TargetSpec {
    /// Discount gamma.
    pub discount: f64,
    /// n of the n-step return (>= 1).
    pub n_step: usize,
    /// eps of the value rescaling; 0 turns rescaling off (identity, not h with eps 0).
    pub rescale: f64,
}

impl TargetSpec {
    fn fwd(&self, x: f64) -> f64 {
        if self.rescale == 0.0 {
            x
        } else {
            h(x, self.rescale)
        }
    }
    fn inv(&self, y: f64) -> f64 {
        if self.rescale == 0.0 {
            y
        } else {
            h_inv(y, self.rescale)
        }
    }
}

/// Per-step flags of a stored sequence for [`n_step_targets`].
pub mod step {
    /// The step has a transition: an action was taken and its reward recorded.
    pub const TRANSITION: u8 = 1;
    /// The step's transition ended the episode in a terminal state: the return stops
    /// here and nothing is bootstrapped after it.
    pub const TERMINAL: u8 = 2;
    /// The step's observation is real and its value may be bootstrapped from. Set it on
    /// every transition step, and on the observation that follows a time-limit truncation
    /// (a truncation is not a terminal: the target bootstraps through it).
    pub const OBSERVED: u8 = 4;
}

/// Targets and the mask saying which steps have one.
#[derive(Debug, Clone, PartialEq)]
pub struct Targets {
    /// `[B, S, K]` target values (K = 1, or the number of quantiles).
    pub values: Vec<f32>,
    /// `[B, S]`: 1 where a target exists.
    pub mask: Vec<f32>,
}

/// Double-Q bootstrap values: for each row, the action maximising the online network's
/// Q (mean over quantiles), and the target network's `K` values at that action.
///
/// `q_online`, `q_target`: `[rows, A, K]` (K = 1 for value heads). Returns `[rows, K]`.
pub fn double_q_bootstrap(
    q_online: &[f32],
    q_target: &[f32],
    rows: usize,
    actions: usize,
    k: usize,
) -> Result<Vec<f32>> {
    let per = actions * k;
    if q_online.len() != rows * per || q_target.len() != rows * per {
        return Err(Error::shape(
            "double_q_bootstrap",
            format!("[{rows}, {actions}, {k}] for both networks"),
            format!("{} and {} values", q_online.len(), q_target.len()),
        ));
    }
    let mut out = Vec::with_capacity(rows * k);
    for r in 0..rows {
        let on = &q_online[r * per..(r + 1) * per];
        let mut best = 0;
        let mut best_v = f32::NEG_INFINITY;
        for a in 0..actions {
            let v: f32 = on[a * k..(a + 1) * k].iter().sum::<f32>() / k as f32;
            if v > best_v {
                best_v = v;
                best = a;
            }
        }
        out.extend_from_slice(&q_target[r * per + best * k..r * per + (best + 1) * k]);
    }
    Ok(out)
}

/// n-step double-Q targets over a batch of stored sequences.
///
/// `rewards`, `flags` `[B, S]` (flags from [`step`]); `bootstrap` `[B, S, K]` from
/// [`double_q_bootstrap`] on the networks' outputs (in the rescaled space). For each
/// transition step t: y = h( sum_{k<m} g^k r_{t+k} + g^m h^-1(bootstrap(s_{t+m})) ), with
/// m = n, or shorter where the recorded transitions or the sequence end first (then m is
/// the furthest observed state in the window). The sum stops at a terminal transition,
/// with no bootstrap. A step with no observed state after it in the sequence gets no
/// target (mask 0); overlapping sequences cover it.
pub fn n_step_targets(
    spec: &TargetSpec,
    batch: usize,
    steps: usize,
    k: usize,
    rewards: &[f32],
    flags: &[u8],
    bootstrap: &[f32],
) -> Result<Targets> {
    if rewards.len() != batch * steps
        || flags.len() != batch * steps
        || bootstrap.len() != batch * steps * k
    {
        return Err(Error::shape(
            "n_step_targets",
            format!("rewards and flags [{batch}, {steps}], bootstrap [{batch}, {steps}, {k}]"),
            format!(
                "{}, {}, {} values",
                rewards.len(),
                flags.len(),
                bootstrap.len()
            ),
        ));
    }
    let g = spec.discount;
    let mut values = vec![0f32; batch * steps * k];
    let mut mask = vec![0f32; batch * steps];
    for b in 0..batch {
        let row = b * steps;
        for t in 0..steps {
            if flags[row + t] & step::TRANSITION == 0 {
                continue;
            }
            // Sum rewards greedily; remember the furthest state the return can bootstrap
            // from (an observed state inside the sequence), so windows that run off the
            // recorded transitions use a shorter n.
            let (mut ret, mut disc) = (0f64, 1f64);
            let mut boot_at: Option<(f64, f64, usize)> = None;
            let mut terminal = false;
            for k in 0..spec.n_step.max(1) {
                let j = t + k;
                ret += disc * rewards[row + j] as f64;
                disc *= g;
                if flags[row + j] & step::TERMINAL != 0 {
                    terminal = true;
                    break;
                }
                let next = j + 1;
                if next >= steps {
                    break;
                }
                if flags[row + next] & step::OBSERVED != 0 {
                    boot_at = Some((ret, disc, next));
                }
                if flags[row + next] & step::TRANSITION == 0 {
                    break;
                }
            }
            let out = &mut values[(row + t) * k..(row + t + 1) * k];
            if terminal {
                out.iter_mut().for_each(|v| *v = spec.fwd(ret) as f32);
            } else if let Some((ret, disc, j)) = boot_at {
                let boot = &bootstrap[(row + j) * k..(row + j + 1) * k];
                for (o, &bv) in out.iter_mut().zip(boot) {
                    *o = spec.fwd(ret + disc * spec.inv(bv as f64)) as f32;
                }
            } else {
                continue;
            }
            mask[row + t] = 1.0;
        }
    }
    Ok(Targets { values, mask })
}

/// Q values at the taken actions: `q` `[B, L, A]` -> `[B, L]`, or `[B, L, A, N]` ->
/// `[B, L, N]`; `actions` `[B, L]`.
pub fn gather_actions(q: &Tensor, actions: &[u32]) -> Result<Tensor> {
    let dims = q.dims().to_vec();
    if dims.len() < 3 || actions.len() != dims[0] * dims[1] {
        return Err(Error::shape(
            "gather_actions",
            "q [B, L, A(, N)] and actions [B, L]",
            format!("q {dims:?}, {} actions", actions.len()),
        ));
    }
    let a = dims[2];
    if let Some(bad) = actions.iter().find(|&&x| x as usize >= a) {
        return Err(Error::shape(
            "gather_actions",
            format!("actions < {a}"),
            format!("action {bad}"),
        ));
    }
    if dims.len() == 3 {
        let idx = Tensor::from_slice(actions, (dims[0], dims[1], 1), q.device())?;
        Ok(q.gather(&idx, 2)?.squeeze(2)?)
    } else {
        let n = dims[3];
        let idx: Vec<u32> = actions
            .iter()
            .flat_map(|&x| std::iter::repeat_n(x, n))
            .collect();
        let idx = Tensor::from_vec(idx, (dims[0], dims[1], 1, n), q.device())?;
        Ok(q.gather(&idx, 2)?.squeeze(2)?)
    }
}

/// Huber of `u` with threshold `k`, as a candle expression: u^2/2 if |u| <= k else
/// k(|u| - k/2), written as 0.5 q^2 + k(|u| - q) with q = min(|u|, k).
fn huber_t(u: &Tensor, k: f64) -> Result<Tensor> {
    let a = u.abs()?;
    let q = a.clamp(0f32, k as f32)?;
    Ok(((q.sqr()? * 0.5)? + ((a - &q)? * k)?)?)
}

/// Sum over steps of `per_step` `[B, L]` times `mask` and the per-sequence `weights` `[B]`,
/// divided by the number of masked steps (at least 1).
fn weighted_mean(per_step: &Tensor, mask: &Tensor, weights: &Tensor) -> Result<Tensor> {
    let n = mask.sum_all()?.to_scalar::<f32>()?.max(1.0);
    let w = per_step.mul(mask)?.broadcast_mul(&weights.unsqueeze(1)?)?;
    Ok((w.sum_all()? / n as f64)?)
}

fn check_bl(op: &'static str, t: &Tensor, b: usize, l: usize) -> Result<()> {
    if t.dims() != [b, l] {
        return Err(Error::shape(
            op,
            format!("[{b}, {l}]"),
            format!("{:?}", t.dims()),
        ));
    }
    Ok(())
}

/// TD loss of the value and dueling heads: mean over masked steps of w_b * l(y - q),
/// l = d^2/2 (squared) or Huber with threshold 1.
///
/// `q_taken`, `targets`, `mask` `[B, L]`; `weights` `[B]` (importance weights).
pub fn td_loss(
    q_taken: &Tensor,
    targets: &Tensor,
    mask: &Tensor,
    weights: &Tensor,
    kind: TdLoss,
) -> Result<Tensor> {
    let (b, l) = q_taken.dims2()?;
    check_bl("td_loss targets", targets, b, l)?;
    check_bl("td_loss mask", mask, b, l)?;
    if weights.dims() != [b] {
        return Err(Error::shape(
            "td_loss weights",
            format!("[{b}]"),
            format!("{:?}", weights.dims()),
        ));
    }
    let d = (targets.detach() - q_taken)?;
    let per = match kind {
        TdLoss::Squared => (d.sqr()? * 0.5)?,
        TdLoss::Huber => huber_t(&d, 1.0)?,
    };
    weighted_mean(&per, mask, weights)
}

/// Quantile midpoints tau_i = (2i - 1) / (2N), i = 1..N (Dabney et al. 2017).
pub fn quantile_midpoints(n: usize) -> Vec<f32> {
    (1..=n)
        .map(|i| (2 * i - 1) as f32 / (2 * n) as f32)
        .collect()
}

/// Quantile Huber loss (Dabney et al. 2017): per step sum_i mean_j
/// |tau_i - 1{u_ij < 0}| L_kappa(u_ij), u_ij = T_j - theta_i, then the masked,
/// importance-weighted mean over steps.
///
/// `theta` `[B, L, N]` (predicted quantiles at the taken actions), `targets` `[B, L, M]`,
/// `mask` `[B, L]`, `weights` `[B]`. Not divided by kappa (equal to the implicit-quantile
/// form only for kappa = 1).
pub fn quantile_huber_loss(
    theta: &Tensor,
    targets: &Tensor,
    mask: &Tensor,
    weights: &Tensor,
    kappa: f64,
) -> Result<Tensor> {
    let (b, l, n) = theta.dims3()?;
    let (b2, l2, m) = targets.dims3()?;
    if (b2, l2) != (b, l) {
        return Err(Error::shape(
            "quantile_huber_loss targets",
            format!("[{b}, {l}, M]"),
            format!("{:?}", targets.dims()),
        ));
    }
    check_bl("quantile_huber_loss mask", mask, b, l)?;
    if weights.dims() != [b] {
        return Err(Error::shape(
            "quantile_huber_loss weights",
            format!("[{b}]"),
            format!("{:?}", weights.dims()),
        ));
    }
    // One fused op over the [B, L, N, M] pairs: built from candle ops the loss made a
    // dozen [B, L, N, M] temporaries and their strided backward sums (10x the learner
    // step of the value head on the T-maze).
    let op = QuantileHuber {
        n,
        m,
        kappa: kappa as f32,
    };
    let per = theta
        .contiguous()?
        .apply_op2(&targets.detach().contiguous()?, op)?; // [B, L]
    weighted_mean(&per, mask, weights)
}

/// The slow twin of [`quantile_huber_loss`], built from candle ops; the tests hold the
/// fused op to it.
#[cfg(test)]
fn quantile_huber_loss_slow(
    theta: &Tensor,
    targets: &Tensor,
    mask: &Tensor,
    weights: &Tensor,
    kappa: f64,
) -> Result<Tensor> {
    let (_, _, n) = theta.dims3()?;
    let m = targets.dims3()?.2;
    let u = targets
        .detach()
        .unsqueeze(2)?
        .broadcast_sub(&theta.unsqueeze(3)?)?; // [B, L, N, M]
    let below = u.detach().lt(0f32)?.to_dtype(candle_core::DType::F32)?;
    let tau = Tensor::from_vec(quantile_midpoints(n), (1, 1, n, 1), theta.device())?;
    let weight = below.broadcast_sub(&tau)?.abs()?;
    let rho = (weight * huber_t(&u, kappa)?)?;
    let per = (rho.sum(3)? / m as f64)?.sum(2)?; // [B, L]
    weighted_mean(&per, mask, weights)
}

/// The per-step quantile Huber loss as one op: `theta` `[B, L, N]`, `targets`
/// `[B, L, M]` (no gradient) -> `[B, L]`, with the gradient
/// d/dtheta_i = -(1/M) sum_j |tau_i - 1{u_ij < 0}| L'_kappa(u_ij), where
/// L'_kappa(u) = clamp(u, -kappa, kappa).
struct QuantileHuber {
    n: usize,
    m: usize,
    kappa: f32,
}

impl QuantileHuber {
    /// Calls `f(row, i, weight, u)` for every pair of row `row` (a (b, l) step).
    fn pairs(&self, theta: &[f32], targets: &[f32], mut f: impl FnMut(usize, usize, f32, f32)) {
        let (n, m) = (self.n, self.m);
        let taus = quantile_midpoints(n);
        for row in 0..theta.len() / n {
            let th = &theta[row * n..(row + 1) * n];
            let tg = &targets[row * m..(row + 1) * m];
            for (i, (&t, &tau)) in th.iter().zip(&taus).enumerate() {
                for &y in tg {
                    let u = y - t;
                    let w = if u < 0.0 { 1.0 - tau } else { tau };
                    f(row, i, w, u);
                }
            }
        }
    }
}

impl candle_core::CustomOp2 for QuantileHuber {
    fn name(&self) -> &'static str {
        "quantile-huber"
    }

    fn cpu_fwd(
        &self,
        s1: &candle_core::CpuStorage,
        l1: &candle_core::Layout,
        s2: &candle_core::CpuStorage,
        l2: &candle_core::Layout,
    ) -> candle_core::Result<(candle_core::CpuStorage, candle_core::Shape)> {
        let theta = crate::lstm::f32_slice(s1, l1, "quantile-huber: theta")?;
        let targets = crate::lstm::f32_slice(s2, l2, "quantile-huber: targets")?;
        let rows = theta.len() / self.n;
        if targets.len() != rows * self.m {
            candle_core::bail!(
                "quantile-huber: {} target values for {rows} steps of {} targets",
                targets.len(),
                self.m
            );
        }
        let (k, inv_m) = (self.kappa, 1.0 / self.m as f32);
        let mut out = vec![0f32; rows];
        self.pairs(theta, targets, |row, _, w, u| {
            let a = u.abs();
            let huber = if a <= k {
                0.5 * u * u
            } else {
                k * (a - 0.5 * k)
            };
            out[row] += w * huber * inv_m;
        });
        let dims = l1.shape().dims();
        let shape = candle_core::Shape::from(&dims[..dims.len() - 1]);
        Ok((candle_core::CpuStorage::F32(out), shape))
    }

    fn bwd(
        &self,
        theta: &Tensor,
        targets: &Tensor,
        _res: &Tensor,
        grad_res: &Tensor,
    ) -> candle_core::Result<(Option<Tensor>, Option<Tensor>)> {
        let th = theta.flatten_all()?.to_vec1::<f32>()?;
        let tg = targets.flatten_all()?.to_vec1::<f32>()?;
        let g = grad_res.flatten_all()?.to_vec1::<f32>()?;
        let (k, inv_m, n) = (self.kappa, 1.0 / self.m as f32, self.n);
        let mut d = vec![0f32; th.len()];
        self.pairs(&th, &tg, |row, i, w, u| {
            d[row * n + i] -= g[row] * w * u.clamp(-k, k) * inv_m;
        });
        Ok((
            Some(Tensor::from_vec(d, theta.dims(), theta.device())?),
            None,
        ))
    }
}

/// |target - prediction| per step, for priorities: `pred` `[B, L]` or `[B, L, N]`
/// (quantiles are averaged), `targets` the same shape.
pub fn abs_td_errors(pred: &Tensor, targets: &Tensor) -> Result<Vec<f32>> {
    let d = (targets.detach() - pred.detach())?;
    let d = if d.rank() == 3 { d.mean(2)? } else { d };
    Ok(d.abs()?.flatten_all()?.to_vec1::<f32>()?)
}

/// Per-sequence priorities p = eta*max|d| + (1-eta)*mean|d| over the masked steps
/// (Kapturowski et al. 2019). `abs_td`, `mask` `[B, L]`. A sequence with no masked step
/// gets 0.
pub fn sequence_priorities(
    abs_td: &[f32],
    mask: &[f32],
    batch: usize,
    eta: f64,
) -> Result<Vec<f32>> {
    if batch == 0 || !abs_td.len().is_multiple_of(batch) || mask.len() != abs_td.len() {
        return Err(Error::shape(
            "sequence_priorities",
            format!("abs_td and mask [{batch}, L]"),
            format!("{} and {} values", abs_td.len(), mask.len()),
        ));
    }
    let l = abs_td.len() / batch;
    Ok((0..batch)
        .map(|b| {
            let (mut max, mut sum, mut n) = (0f64, 0f64, 0usize);
            for t in 0..l {
                if mask[b * l + t] > 0.0 {
                    let d = abs_td[b * l + t].abs() as f64;
                    max = max.max(d);
                    sum += d;
                    n += 1;
                }
            }
            if n == 0 {
                0.0
            } else {
                (eta * max + (1.0 - eta) * sum / n as f64) as f32
            }
        })
        .collect())
}

/// Prioritized-replay sampling probabilities P(i) = p_i^a / sum_k p_k^a (Schaul et al. 2016).
pub fn priority_probabilities(priorities: &[f64], exponent: f64) -> Vec<f64> {
    let pa: Vec<f64> = priorities.iter().map(|p| p.powf(exponent)).collect();
    let total: f64 = pa.iter().sum();
    pa.iter().map(|x| x / total).collect()
}

/// Importance weights w_i = (N P(i))^-b / max_k w_k (Schaul et al. 2016), for the sampled
/// probabilities `probs` out of `n` items in replay. (Normalised by the batch maximum.)
pub fn importance_weights(probs: &[f64], n: usize, correction: f64) -> Vec<f64> {
    let w: Vec<f64> = probs
        .iter()
        .map(|p| (n as f64 * p).powf(-correction))
        .collect();
    let max = w.iter().cloned().fold(f64::MIN, f64::max);
    w.iter().map(|x| x / max).collect()
}

/// Q-value discrepancy (Kapturowski et al. 2019) of one sequence at learned step `i`:
/// ||q_hat_i - q_i||_2 / |max_{a,j} q_hat_{j,a}|, where `q_fresh` `[L, A]` comes from the
/// states the current network recomputed and `q_stored` `[L, A]` from the stored actor
/// states.
pub fn q_discrepancy(q_fresh: &[f32], q_stored: &[f32], actions: usize, i: usize) -> Result<f64> {
    if actions == 0
        || q_fresh.len() != q_stored.len()
        || !q_fresh.len().is_multiple_of(actions)
        || (i + 1) * actions > q_fresh.len()
    {
        return Err(Error::shape(
            "q_discrepancy",
            format!("q_fresh and q_stored [L, {actions}] with step {i} < L"),
            format!("{} and {} values", q_fresh.len(), q_stored.len()),
        ));
    }
    let row = i * actions..(i + 1) * actions;
    let num: f64 = q_fresh[row.clone()]
        .iter()
        .zip(&q_stored[row])
        .map(|(a, b)| ((a - b) as f64).powi(2))
        .sum::<f64>()
        .sqrt();
    let den = q_fresh
        .iter()
        .cloned()
        .fold(f32::NEG_INFINITY, f32::max)
        .abs() as f64;
    Ok(if den == 0.0 { 0.0 } else { num / den })
}

/// Builds a `[B, L]` f32 tensor from host data (masks, targets).
pub fn host_tensor(values: &[f32], shape: &[usize]) -> Result<Tensor> {
    Ok(Tensor::from_slice(values, shape, &Device::Cpu)?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::DType;

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol * b.abs().max(1.0)
    }

    // Source: Pohlen et al. 2018 (value rescaling); values computed from the formula in
    // REFERENCE.md.
    #[test]
    fn rescaling_worked_values() {
        let e = 1e-3;
        for (x, y) in [
            (1.0, 0.415213562373),
            (-1.0, -0.415213562373),
            (10.0, 2.326624790355),
            (100.0, 9.149875621121),
            (1000.0, 31.638584039113),
            (-0.5, -0.225244871392),
            (1e6, 1999.000499999875),
        ] {
            assert!(close(h(x, e), y, 1e-11), "h({x}) = {} want {y}", h(x, e));
        }
        for (y, x) in [
            (1.0, 2.988056701676),
            (-2.0, -7.952349144987),
            (5.0, 34.586162255552),
        ] {
            assert!(
                close(h_inv(y, e), x, 1e-11),
                "h_inv({y}) = {} want {x}",
                h_inv(y, e)
            );
        }
        assert!(close(h(1.0, 1e-2), 0.424213562373, 1e-11));
        assert!(close(h(-10.0, 1e-2), -2.416624790355, 1e-11));
        for x in [-1e4, -3.0, -0.1, 0.0, 0.2, 7.0, 5e5] {
            assert!(close(h_inv(h(x, e), e), x, 1e-9), "round trip at {x}");
            assert!(
                close(h_inv(h(x, 0.0), 0.0), x, 1e-9),
                "round trip eps 0 at {x}"
            );
        }
    }

    // Source: van Hasselt et al. 2016 (double Q) + Pohlen et al. 2018 (rescaling); worked
    // values computed in REFERENCE.md.
    #[test]
    fn n_step_double_q_worked_values() {
        let spec = TargetSpec {
            discount: 0.997,
            n_step: 5,
            rescale: 1e-3,
        };
        let q_online = [
            [0.0f32; 3],
            [0.0; 3],
            [0.0; 3],
            [0.0; 3],
            [0.0; 3],
            [1.0, 2.0, 1.5],
        ]
        .concat();
        let q_target = [
            [0.0f32; 3],
            [0.0; 3],
            [0.0; 3],
            [0.0; 3],
            [0.0; 3],
            [0.8, 1.7, 2.2],
        ]
        .concat();
        let boot = double_q_bootstrap(&q_online, &q_target, 6, 3, 1).unwrap();
        assert_eq!(
            boot[5], 1.7,
            "double Q picks the online argmax (action 1) from the target"
        );
        let rewards = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0];
        let f = step::TRANSITION | step::OBSERVED;
        let flags = [f, f, f, f, f, step::OBSERVED];
        let t = n_step_targets(&spec, 1, 6, 1, &rewards, &flags, &boot).unwrap();
        assert!(
            close(t.values[0] as f64, 2.033217439254, 1e-6),
            "y = {}",
            t.values[0]
        );
        assert_eq!(t.mask[0], 1.0);
        assert_eq!(t.mask[5], 0.0, "the last observation has no transition");
        let plain = TargetSpec {
            rescale: 0.0,
            ..spec
        };
        let t = n_step_targets(&plain, 1, 6, 1, &rewards, &flags, &boot).unwrap();
        assert!(
            close(t.values[0] as f64, 3.662706433769, 1e-6),
            "y = {}",
            t.values[0]
        );
        // Terminal after 3 steps, rewards [1, 0, 1]: y = h(1 + g^2).
        let flags = [f, f, f | step::TERMINAL, step::OBSERVED];
        let t = n_step_targets(&spec, 1, 4, 1, &[1.0, 0.0, 1.0, 0.0], &flags, &[9.0; 4]).unwrap();
        assert!(
            close(t.values[0] as f64, 0.732314499545, 1e-6),
            "y = {}",
            t.values[0]
        );
    }

    // Pardo et al. 2018: a time-limit truncation is not terminal; the target bootstraps
    // from the observation after the last transition.
    #[test]
    fn truncation_bootstraps_terminal_does_not() {
        let spec = TargetSpec {
            discount: 0.5,
            n_step: 3,
            rescale: 0.0,
        };
        let f = step::TRANSITION | step::OBSERVED;
        let truncated = [f, f, step::OBSERVED];
        let t = n_step_targets(
            &spec,
            1,
            3,
            1,
            &[1.0, 1.0, 0.0],
            &truncated,
            &[0.0, 0.0, 8.0],
        )
        .unwrap();
        assert_eq!(t.values[0], 1.0 + 0.5 + 0.25 * 8.0);
        assert_eq!(t.values[1], 1.0 + 0.5 * 8.0);
        let terminal = [f, f | step::TERMINAL, 0];
        let t = n_step_targets(
            &spec,
            1,
            3,
            1,
            &[1.0, 1.0, 0.0],
            &terminal,
            &[0.0, 0.0, 8.0],
        )
        .unwrap();
        assert_eq!(t.values[0], 1.5);
        assert_eq!(t.values[1], 1.0);
        // a sequence that simply ends: no target for the last transition
        let t = n_step_targets(&spec, 1, 2, 1, &[1.0, 1.0], &[f, f], &[0.0, 0.0]).unwrap();
        assert_eq!(t.mask, vec![1.0, 0.0]);
        assert_eq!(t.values[0], 1.0 + 0.5 * 0.0);
    }

    // Source: Dabney et al. 2017 (quantile Huber loss); worked values in REFERENCE.md.
    #[test]
    fn quantile_huber_worked_values() {
        assert_eq!(quantile_midpoints(4), vec![0.125, 0.375, 0.625, 0.875]);
        let one = Tensor::ones((1, 1), DType::F32, &Device::Cpu).unwrap();
        let w = Tensor::ones(1, DType::F32, &Device::Cpu).unwrap();
        let th = Tensor::new(&[[[0f32, 1.0]]], &Device::Cpu).unwrap();
        let tg = Tensor::new(&[[[0.5f32, 2.0]]], &Device::Cpu).unwrap();
        let l = quantile_huber_loss(&th, &tg, &one, &w, 1.0)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap();
        assert!((l - 0.40625).abs() < 1e-6, "{l}");
        let th = Tensor::new(&[[[-1f32, 0.0, 1.0, 2.0]]], &Device::Cpu).unwrap();
        let tg = Tensor::new(&[[[0f32, 0.5, 1.5, 3.0]]], &Device::Cpu).unwrap();
        let l = quantile_huber_loss(&th, &tg, &one, &w, 1.0)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap();
        assert!((l - 1.0625).abs() < 1e-6, "{l}");
        // Huber L_1: L(0.5) = 0.125, L(2) = 1.5, L(-3) = 2.5
        let u = Tensor::new(&[0.5f32, 2.0, -3.0], &Device::Cpu).unwrap();
        assert_eq!(
            huber_t(&u, 1.0).unwrap().to_vec1::<f32>().unwrap(),
            vec![0.125, 1.5, 2.5]
        );
        // rho_tau(u) with a single quantile at tau: N = 1 gives tau = 0.5 only, so check the
        // asymmetric weight through N = 2 (tau = 0.25, 0.75) on one target: u = 2 for both.
        let th = Tensor::new(&[[[0f32, 0.0]]], &Device::Cpu).unwrap();
        let tg = Tensor::new(&[[[2f32]]], &Device::Cpu).unwrap();
        let l = quantile_huber_loss(&th, &tg, &one, &w, 1.0)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap();
        // rho_0.25(2) + rho_0.75(2) = 0.375 + 1.125
        assert!((l - 1.5).abs() < 1e-6, "{l}");
    }

    #[test]
    fn td_loss_masks_weights_and_shapes() {
        let q = Tensor::new(&[[1f32, 2.0], [0.0, 0.0]], &Device::Cpu).unwrap();
        let y = Tensor::new(&[[2f32, 5.0], [0.5, 9.0]], &Device::Cpu).unwrap();
        let m = Tensor::new(&[[1f32, 1.0], [1.0, 0.0]], &Device::Cpu).unwrap();
        let w = Tensor::new(&[1f32, 0.5], &Device::Cpu).unwrap();
        let sq = td_loss(&q, &y, &m, &w, TdLoss::Squared)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap();
        // (0.5*1 + 0.5*9 + 0.5*0.5*0.25) / 3
        assert!((sq - (0.5 + 4.5 + 0.0625) / 3.0).abs() < 1e-6, "{sq}");
        let hu = td_loss(&q, &y, &m, &w, TdLoss::Huber)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap();
        // huber(1) = 0.5, huber(3) = 2.5, 0.5 * huber(0.5) = 0.0625
        assert!((hu - (0.5 + 2.5 + 0.0625) / 3.0).abs() < 1e-6, "{hu}");
        assert!(td_loss(
            &q,
            &y,
            &m,
            &Tensor::new(&[1f32], &Device::Cpu).unwrap(),
            TdLoss::Huber
        )
        .is_err());
    }

    // Source: Kapturowski et al. 2019 (priority mixture) and Schaul et al. 2016
    // (probabilities, importance weights); worked values in REFERENCE.md.
    #[test]
    fn priorities_worked_values() {
        let p = sequence_priorities(&[0.1, -0.5, 0.2, 2.0], &[1.0; 4], 1, 0.9).unwrap();
        assert!((p[0] - 1.87).abs() < 1e-6);
        let probs = priority_probabilities(&[1.87, 0.5, 1.0, 0.1], 0.9);
        for (a, b) in probs
            .iter()
            .zip([0.5138603752, 0.1567691804, 0.2925416346, 0.0368288098])
        {
            assert!((a - b).abs() < 1e-9, "{a} vs {b}");
        }
        let w = importance_weights(&probs, 4, 0.6);
        for (a, b) in w
            .iter()
            .zip([0.2056863789, 0.4193302545, 0.2884031503, 1.0])
        {
            assert!((a - b).abs() < 1e-9, "{a} vs {b}");
        }
        let p = sequence_priorities(&[3.0, 1.0, 0.0, 0.0], &[1.0, 0.0, 0.0, 0.0], 2, 0.9).unwrap();
        assert_eq!(p, vec![3.0, 0.0]);
    }

    // Source: Kapturowski et al. 2019, the Q-value discrepancy formula in REFERENCE.md.
    #[test]
    fn q_discrepancy_formula() {
        let fresh = [1.0f32, 2.0, 4.0, -1.0];
        let stored = [1.0f32, 2.0, 1.0, 3.0];
        assert_eq!(q_discrepancy(&fresh, &stored, 2, 0).unwrap(), 0.0);
        assert!((q_discrepancy(&fresh, &stored, 2, 1).unwrap() - 5.0 / 4.0).abs() < 1e-12);
        assert!(q_discrepancy(&fresh, &stored, 2, 2).is_err());
    }

    #[test]
    fn gather_picks_taken_actions() {
        let q = Tensor::arange(0f32, 12.0, &Device::Cpu)
            .unwrap()
            .reshape((1, 2, 3, 2))
            .unwrap();
        let g = gather_actions(&q, &[2, 0]).unwrap();
        assert_eq!(
            g.to_vec3::<f32>().unwrap(),
            vec![vec![vec![4.0, 5.0], vec![6.0, 7.0]]]
        );
        let q = Tensor::arange(0f32, 6.0, &Device::Cpu)
            .unwrap()
            .reshape((1, 2, 3))
            .unwrap();
        assert_eq!(
            gather_actions(&q, &[1, 2])
                .unwrap()
                .to_vec2::<f32>()
                .unwrap(),
            vec![vec![1.0, 5.0]]
        );
        assert!(gather_actions(&q, &[3, 0]).is_err());
    }

    #[test]
    fn fused_quantile_huber_equals_its_slow_twin_with_gradients() {
        use candle_core::Var;
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(7);
        let (b, l, n, m) = (3, 5, 8, 6);
        let mut draw =
            |k: usize, s: f32| -> Vec<f32> { (0..k).map(|_| rng.random_range(-s..s)).collect() };
        let theta = Var::from_vec(draw(b * l * n, 3.0), (b, l, n), &Device::Cpu).unwrap();
        let targets = Tensor::from_vec(draw(b * l * m, 3.0), (b, l, m), &Device::Cpu).unwrap();
        let mask = Tensor::from_vec(
            (0..b * l)
                .map(|i| if i % 4 == 3 { 0f32 } else { 1.0 })
                .collect::<Vec<_>>(),
            (b, l),
            &Device::Cpu,
        )
        .unwrap();
        let weights = Tensor::from_vec(vec![1.0f32, 0.5, 0.25], b, &Device::Cpu).unwrap();
        for kappa in [1.0, 0.5, 2.0] {
            let fast =
                quantile_huber_loss(theta.as_tensor(), &targets, &mask, &weights, kappa).unwrap();
            let slow =
                quantile_huber_loss_slow(theta.as_tensor(), &targets, &mask, &weights, kappa)
                    .unwrap();
            let (f, s) = (
                fast.to_scalar::<f32>().unwrap(),
                slow.to_scalar::<f32>().unwrap(),
            );
            assert!(
                (f - s).abs() <= 1e-5 * s.abs().max(1.0),
                "kappa {kappa}: {f} vs {s}"
            );
            let gf = fast.backward().unwrap();
            let gs = slow.backward().unwrap();
            let gf = gf
                .get(theta.as_tensor())
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1::<f32>()
                .unwrap();
            let gs = gs
                .get(theta.as_tensor())
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1::<f32>()
                .unwrap();
            for (a, c) in gf.iter().zip(&gs) {
                assert!(
                    (a - c).abs() <= 1e-5 * c.abs().max(1e-2),
                    "kappa {kappa}: grad {a} vs {c}"
                );
            }
        }
    }
}
