//! The learning math, in one place: the learner calls these functions and the tests
//! check them against worked values.
//!
//! - value rescaling h and h^-1 (Pohlen et al. 2018);
//! - n-step double-Q targets (van Hasselt et al. 2016) over a stored sequence, with
//!   terminal transitions ending the return and time-limit truncation bootstrapping
//!   through (Pardo et al. 2018);
//! - the TD loss (squared or Huber) with masks and importance weights;
//! - the quantile Huber loss (Dabney et al. 2017) with midpoints (2i-1)/2N;
//! - sequence priorities p = eta*max|d| + (1-eta)*mean|d| (Kapturowski et al. 2019) and
//!   importance weights (Schaul et al. 2016);
//! - the Q-value discrepancy between fresh-unroll and stored-state Q values
//!   (Kapturowski et al. 2019).
//!
//! Targets are computed on the host (no gradient flows through them); losses are candle
//! expressions whose backward reaches the network.

use candle_core::Tensor;
use mnemon_spec::TdLoss;

use crate::error::{Error, Result};

/// Value rescaling h(x) = sign(x)(sqrt(|x|+1) - 1) + eps*x (Pohlen et al. 2018), applied
/// to targets when `eps > 0`; `eps = 0` turns rescaling off (the identity).
pub fn rescale_value(x: f64, eps: f64) -> f64 {
    if eps > 0.0 {
        x.signum() * ((x.abs() + 1.0).sqrt() - 1.0) + eps * x
    } else {
        x
    }
}

/// The inverse of [`rescale_value`]:
/// h^-1(y) = sign(y)(((sqrt(1 + 4 eps (|y| + 1 + eps)) - 1) / (2 eps))^2 - 1) when
/// `eps > 0`, else the identity.
pub fn unscale_value(y: f64, eps: f64) -> f64 {
    if eps > 0.0 {
        let s = ((1.0 + 4.0 * eps * (y.abs() + 1.0 + eps)).sqrt() - 1.0) / (2.0 * eps);
        y.signum() * (s * s - 1.0)
    } else {
        y
    }
}

/// The recorded outcomes of one stored sequence, as the n-step return reads them. All
/// slices have at least `len` entries; entries from `len` on are padding.
#[derive(Debug, Clone, Copy)]
pub struct Outcomes<'a> {
    /// Valid entries.
    pub len: usize,
    /// Reward after each entry's action.
    pub reward: &'a [f32],
    /// The episode terminated (not truncated) after the entry's action.
    pub terminal: &'a [bool],
    /// The entry has an action and a reward (false for a final bootstrap-only entry).
    pub has_outcome: &'a [bool],
}

/// Where an n-step target of one entry bootstraps from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NStepReturn {
    /// sum_{i<k} gamma^i r_{t+i}.
    pub rewards: f64,
    /// k: the number of rewards summed (the bootstrap is discounted by gamma^k).
    pub steps: usize,
    /// The entry whose value is bootstrapped, or `None` after a terminal transition.
    pub bootstrap: Option<usize>,
}

/// The n-step return of entry `t` (which must have a target: an outcome, and a terminal
/// or a next entry). The sum runs over up to `n` rewards; it stops at a terminal
/// transition (no bootstrap), and where the window reaches the sequence's last entry,
/// that entry is bootstrapped from (a final observation after a time-limit truncation,
/// or the first entry of the next, overlapping sequence).
pub fn n_step_return(seq: &Outcomes<'_>, t: usize, n: usize, gamma: f64) -> NStepReturn {
    let mut rewards = 0.0;
    for k in 0..n {
        let idx = t + k;
        let last = idx + 1 >= seq.len;
        if k > 0 && last && !(seq.has_outcome[idx] && seq.terminal[idx]) {
            return NStepReturn {
                rewards,
                steps: k,
                bootstrap: Some(idx),
            };
        }
        rewards += gamma.powi(k as i32) * seq.reward[idx] as f64;
        if seq.terminal[idx] {
            return NStepReturn {
                rewards,
                steps: k + 1,
                bootstrap: None,
            };
        }
    }
    NStepReturn {
        rewards,
        steps: n,
        bootstrap: Some(t + n),
    }
}

/// The n-step target y = h(R + gamma^k h^-1(q)) (van Hasselt et al. 2016; Pohlen et al.
/// 2018), q the bootstrap value in the rescaled space (`None` after a terminal: y = h(R)).
pub fn n_step_target(ret: &NStepReturn, bootstrap: Option<f64>, gamma: f64, eps: f64) -> f64 {
    match bootstrap {
        None => rescale_value(ret.rewards, eps),
        Some(q) => {
            let discount = gamma.powi(ret.steps as i32);
            rescale_value(ret.rewards + discount * unscale_value(q, eps), eps)
        }
    }
}

/// Mean over the `k` quantiles of each action: `q` `[A, K]` -> `out` `[A]` (k = 1 for the
/// value and dueling heads gives the values themselves).
pub fn action_means(q: &[f32], k: usize, out: &mut Vec<f32>) {
    out.clear();
    out.extend(q.chunks_exact(k).map(|c| c.iter().sum::<f32>() / k as f32));
}

/// The double-Q action (van Hasselt et al. 2016): the one whose online Q (mean over the
/// `k` quantiles) is largest, the first on ties; NaN never wins. `q_online` `[A, K]`.
pub fn double_q_action(q_online: &[f32], k: usize) -> usize {
    let mut best = 0;
    let mut best_v = f32::NEG_INFINITY;
    for (a, c) in q_online.chunks_exact(k).enumerate() {
        let v = c.iter().sum::<f32>() / k as f32;
        if v > best_v {
            best = a;
            best_v = v;
        }
    }
    best
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

/// Priority of a sequence from the absolute TD errors of its learned steps:
/// p = eta*max|d| + (1-eta)*mean|d| (Kapturowski et al. 2019). An empty slice gives 0.
pub fn sequence_priority(abs_td: &[f32], eta: f64) -> f64 {
    if abs_td.is_empty() {
        return 0.0;
    }
    let max = abs_td.iter().fold(0f32, |m, &d| m.max(d.abs())) as f64;
    let mean = abs_td.iter().map(|d| d.abs() as f64).sum::<f64>() / abs_td.len() as f64;
    eta * max + (1.0 - eta) * mean
}

/// Importance weights w_i = (N P(i))^-b / max_k w_k (Schaul et al. 2016) of a sampled
/// batch, normalised by the largest weight in the batch (not in the whole store: one
/// stale sequence with a near-zero priority would shrink every weight). `mass` holds the
/// sampled sequences' priority masses p_i^a, `total` the store's sum of them, so that
/// P(i) = mass_i / total; `stored` is N, `correction` is b.
pub fn importance_weights(mass: &[f64], total: f64, stored: usize, correction: f64) -> Vec<f64> {
    let n = stored as f64;
    let raw: Vec<f64> = mass
        .iter()
        .map(|&m| (n * m / total).powf(-correction))
        .collect();
    let max = raw.iter().cloned().fold(0.0, f64::max);
    raw.iter().map(|w| w / max).collect()
}

/// Q-value discrepancy (Kapturowski et al. 2019) at one step: ||q_fresh - q_stored||_2
/// divided by the largest |q_fresh| over the actions at that step (at least 1e-6), where
/// `q_fresh` `[A]` comes from the state the current network recomputed and `q_stored`
/// `[A]` from the actor's stored state. (The paper divides by |max q_fresh| over the
/// actions and all steps of the sequence; this normalises per step.)
pub fn q_discrepancy(q_fresh: &[f32], q_stored: &[f32]) -> Result<f64> {
    if q_fresh.is_empty() || q_fresh.len() != q_stored.len() {
        return Err(Error::shape(
            "q_discrepancy",
            "q_fresh and q_stored of the same length A > 0",
            format!("{} and {} values", q_fresh.len(), q_stored.len()),
        ));
    }
    let diff: f64 = q_fresh
        .iter()
        .zip(q_stored)
        .map(|(x, y)| ((x - y) as f64).powi(2))
        .sum::<f64>()
        .sqrt();
    let scale = q_fresh.iter().fold(0f32, |m, v| m.max(v.abs())).max(1e-6) as f64;
    Ok(diff / scale)
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{DType, Device};

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
            assert!(
                close(rescale_value(x, e), y, 1e-11),
                "h({x}) = {} want {y}",
                rescale_value(x, e)
            );
        }
        for (y, x) in [
            (1.0, 2.988056701676),
            (-2.0, -7.952349144987),
            (5.0, 34.586162255552),
        ] {
            assert!(
                close(unscale_value(y, e), x, 1e-11),
                "h_inv({y}) = {} want {x}",
                unscale_value(y, e)
            );
        }
        assert!(close(rescale_value(1.0, 1e-2), 0.424213562373, 1e-11));
        assert!(close(rescale_value(-10.0, 1e-2), -2.416624790355, 1e-11));
        for x in [-1e4, -3.0, -0.1, 0.0, 0.2, 7.0, 5e5] {
            assert!(
                close(unscale_value(rescale_value(x, e), e), x, 1e-9),
                "round trip at {x}"
            );
            // eps = 0 turns rescaling off.
            assert_eq!(rescale_value(x, 0.0), x);
            assert_eq!(unscale_value(x, 0.0), x);
        }
    }

    /// Outcomes of `len` entries with `rewards` (the rest 0), an outcome on the first
    /// `outcomes` entries and a terminal transition at `terminal_at`.
    fn outcomes<'a>(
        rewards: &'a [f32],
        terminal: &'a mut Vec<bool>,
        has_outcome: &'a mut Vec<bool>,
        outcomes: usize,
        terminal_at: Option<usize>,
    ) -> Outcomes<'a> {
        let len = rewards.len();
        *terminal = (0..len).map(|i| Some(i) == terminal_at).collect();
        *has_outcome = (0..len).map(|i| i < outcomes).collect();
        Outcomes {
            len,
            reward: rewards,
            terminal,
            has_outcome,
        }
    }

    // Source: van Hasselt et al. 2016 (double Q) + Pohlen et al. 2018 (rescaling); worked
    // values computed in REFERENCE.md: g = 0.997, n = 5, rewards [1, 0, 0, 0, 1],
    // Q_online(s5) = [1, 2, 1.5], Q_target(s5) = [0.8, 1.7, 2.2] -> y = 2.033217439254.
    #[test]
    fn n_step_double_q_worked_values() {
        let (mut term, mut out) = (Vec::new(), Vec::new());
        let rewards = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0];
        let seq = outcomes(&rewards, &mut term, &mut out, 6, None);
        let ret = n_step_return(&seq, 0, 5, 0.997);
        assert_eq!((ret.steps, ret.bootstrap), (5, Some(5)));
        assert!((ret.rewards - 1.988053892081).abs() < 1e-9);
        let best = double_q_action(&[1.0, 2.0, 1.5], 1);
        assert_eq!(best, 1, "double Q picks the online argmax");
        let q_target = [0.8f64, 1.7, 2.2];
        let y = n_step_target(&ret, Some(q_target[best]), 0.997, 1e-3);
        assert!((y - 2.033217439254).abs() < 1e-9, "y = {y}");
        let plain = n_step_target(&ret, Some(q_target[best]), 0.997, 0.0);
        assert!((plain - 3.662706433769).abs() < 1e-9, "y = {plain}");
        // Quantile heads choose by the mean over quantiles: means [1, 1.5, 1.25].
        assert_eq!(double_q_action(&[0.0, 2.0, 1.0, 2.0, 3.0, -0.5], 2), 1);
        // Ties go to the first action, NaN never wins (analytic).
        assert_eq!(double_q_action(&[f32::NAN, 3.0, 3.0], 1), 1);
        // Terminal after 3 steps, rewards [1, 0, 1]: y = h(1 + g^2) = 0.732314499545.
        let rewards = [1.0, 0.0, 1.0];
        let seq = outcomes(&rewards, &mut term, &mut out, 3, Some(2));
        let ret = n_step_return(&seq, 0, 5, 0.997);
        assert_eq!((ret.steps, ret.bootstrap), (3, None));
        let y = n_step_target(&ret, None, 0.997, 1e-3);
        assert!((y - 0.732314499545).abs() < 1e-9, "y = {y}");
    }

    // Pardo et al. 2018: a time-limit truncation is not terminal; the target bootstraps
    // from the observation after the last transition. Values by hand (g = 0.5).
    #[test]
    fn truncation_bootstraps_terminal_does_not() {
        let (mut term, mut out) = (Vec::new(), Vec::new());
        // Two transitions, then the final observation of a truncated episode (value 8).
        let rewards = [1.0, 1.0, 0.0];
        let truncated = outcomes(&rewards, &mut term, &mut out, 2, None);
        let y = |t: usize, seq: &Outcomes<'_>| {
            let ret = n_step_return(seq, t, 3, 0.5);
            n_step_target(&ret, ret.bootstrap.map(|_| 8.0), 0.5, 0.0)
        };
        assert_eq!(n_step_return(&truncated, 0, 3, 0.5).bootstrap, Some(2));
        assert_eq!(y(0, &truncated), 1.0 + 0.5 + 0.25 * 8.0);
        assert_eq!(y(1, &truncated), 1.0 + 0.5 * 8.0);
        let rewards = [1.0, 1.0];
        let terminal = outcomes(&rewards, &mut term, &mut out, 2, Some(1));
        assert_eq!(n_step_return(&terminal, 0, 3, 0.5).bootstrap, None);
        assert_eq!(y(0, &terminal), 1.5);
        assert_eq!(y(1, &terminal), 1.0);
        // A window that fits in the sequence bootstraps n steps ahead.
        let rewards = [1.0; 6];
        let long = outcomes(&rewards, &mut term, &mut out, 6, None);
        let ret = n_step_return(&long, 1, 3, 0.5);
        assert_eq!((ret.rewards, ret.steps, ret.bootstrap), (1.75, 3, Some(4)));
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
        let p = sequence_priority(&[0.1, -0.5, 0.2, 2.0], 0.9);
        assert!((p - 1.87).abs() < 1e-6, "{p}");
        assert_eq!(sequence_priority(&[3.0], 0.9), 3.0);
        assert_eq!(sequence_priority(&[], 0.9), 0.0);
        let mass: Vec<f64> = [1.87f64, 0.5, 1.0, 0.1]
            .iter()
            .map(|p| p.powf(0.9))
            .collect();
        let total: f64 = mass.iter().sum();
        for (m, want) in mass
            .iter()
            .zip([0.5138603752, 0.1567691804, 0.2925416346, 0.0368288098])
        {
            assert!((m / total - want).abs() < 1e-9, "{} vs {want}", m / total);
        }
        let w = importance_weights(&mass, total, 4, 0.6);
        for (a, b) in w
            .iter()
            .zip([0.2056863789, 0.4193302545, 0.2884031503, 1.0])
        {
            assert!((a - b).abs() < 1e-9, "{a} vs {b}");
        }
        // Normalised by the batch's largest weight: a batch of the first two only.
        let w = importance_weights(&mass[..2], total, 4, 0.6);
        assert!((w[0] - 0.2056863789 / 0.4193302545).abs() < 1e-9);
        assert_eq!(w[1], 1.0);
    }

    // Source: Kapturowski et al. 2019, the Q-value discrepancy formula in REFERENCE.md,
    // normalised per step; values by hand.
    #[test]
    fn q_discrepancy_formula() {
        let fresh = [1.0f32, 2.0, 4.0, -1.0];
        let stored = [1.0f32, 2.0, 1.0, 3.0];
        assert_eq!(q_discrepancy(&fresh[..2], &stored[..2]).unwrap(), 0.0);
        // ||(3, -4)|| / max(|4|, |-1|) = 5 / 4
        assert!((q_discrepancy(&fresh[2..], &stored[2..]).unwrap() - 5.0 / 4.0).abs() < 1e-12);
        // This normalisation divides by the largest |Q|; when every Q is negative that is
        // not |max Q|: ||(-3, -4)|| / |-4| = 5 / 4.
        assert!((q_discrepancy(&[-4.0, -1.0], &[-1.0, 3.0]).unwrap() - 5.0 / 4.0).abs() < 1e-12);
        assert!(q_discrepancy(&fresh, &stored[..2]).is_err());
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
