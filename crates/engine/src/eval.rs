//! Evaluation: play a fixed number of episodes with the greedy (or an epsilon) policy
//! and summarise them.
//!
//! Episodes are dealt to lanes in turn (episode i to lane i mod k), and each lane plays
//! exactly its share, so short episodes are not over-represented. Seeds come from the
//! evaluation seed alone: two checkpoints evaluated with one seed face the same episodes.

use mnemon_envs::Lanes;
use mnemon_nets::{ActorNet, Params};
use mnemon_spec::{AgentSpec, TaskSpec};
use rand::rngs::StdRng;
use rand::SeedableRng;

use crate::actor::LaneMemory;
use crate::explore;

/// Summary of an evaluation.
#[derive(Debug, Clone, PartialEq)]
pub struct EvalReport {
    /// Episodes played.
    pub episodes: usize,
    /// Undiscounted return of each episode, in episode order.
    pub returns: Vec<f64>,
    /// Discounted return of each episode (with the spec's discount).
    pub discounted: Vec<f64>,
    /// Length of each episode.
    pub lengths: Vec<u64>,
    /// Success of each episode, for tasks that define one.
    pub successes: Option<Vec<bool>>,
}

impl EvalReport {
    /// Mean undiscounted return.
    pub fn mean_return(&self) -> f64 {
        mean(&self.returns)
    }
    /// Mean discounted return.
    pub fn mean_discounted(&self) -> f64 {
        mean(&self.discounted)
    }
    /// Success rate, for tasks that define success.
    pub fn success_rate(&self) -> Option<f64> {
        self.successes
            .as_ref()
            .map(|s| s.iter().filter(|&&x| x).count() as f64 / s.len().max(1) as f64)
    }
    /// Mean episode length.
    pub fn mean_length(&self) -> f64 {
        self.lengths.iter().sum::<u64>() as f64 / self.lengths.len().max(1) as f64
    }
    /// 95% confidence interval of the mean return (Student's t).
    pub fn ci95(&self) -> (f64, f64) {
        t_interval(&self.returns, 0.95)
    }
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Two-sided Student-t confidence interval of the mean.
pub fn t_interval(v: &[f64], level: f64) -> (f64, f64) {
    let n = v.len();
    let m = mean(v);
    if n < 2 {
        return (m, m);
    }
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1) as f64;
    let half = t_quantile(0.5 + level / 2.0, (n - 1) as f64) * (var / n as f64).sqrt();
    (m - half, m + half)
}

/// Quantile of Student's t with `df` degrees of freedom, by the Cornish-Fisher expansion
/// around the normal quantile (Abramowitz & Stegun 26.7.5); within 1e-3 of the exact
/// value for df >= 5 at the 0.975 level (checked against scipy in the tests).
pub fn t_quantile(p: f64, df: f64) -> f64 {
    let z = normal_quantile(p);
    let (z3, z5, z7, z9) = (z.powi(3), z.powi(5), z.powi(7), z.powi(9));
    z + (z3 + z) / (4.0 * df)
        + (5.0 * z5 + 16.0 * z3 + 3.0 * z) / (96.0 * df * df)
        + (3.0 * z7 + 19.0 * z5 + 17.0 * z3 - 15.0 * z) / (384.0 * df.powi(3))
        + (79.0 * z9 + 776.0 * z7 + 1482.0 * z5 - 1920.0 * z3 - 945.0 * z) / (92160.0 * df.powi(4))
}

/// Quantile of the standard normal (Acklam's rational approximation, relative error < 1.2e-9).
pub fn normal_quantile(p: f64) -> f64 {
    let a = [
        -3.969683028665376e1,
        2.209460984245205e2,
        -2.759285104469687e2,
        1.38357751867269e2,
        -3.066479806614716e1,
        2.506628277459239,
    ];
    let b = [
        -5.447609879822406e1,
        1.615858368580409e2,
        -1.556989798598866e2,
        6.680131188771972e1,
        -1.328068155288572e1,
    ];
    let c = [
        -7.784894002430293e-3,
        -3.223964580411365e-1,
        -2.400758277161838,
        -2.549732539343734,
        4.374664141464968,
        2.938163982698783,
    ];
    let d = [
        7.784695709041462e-3,
        3.224671290700398e-1,
        2.445134137142996,
        3.754408661907416,
    ];
    let lo = 0.02425;
    if p < lo {
        let q = (-2.0 * p.ln()).sqrt();
        (((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5])
            / ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1.0)
    } else if p <= 1.0 - lo {
        let q = p - 0.5;
        let r = q * q;
        (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]) * q
            / (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1.0)
    } else {
        -normal_quantile(1.0 - p)
    }
}

/// How to evaluate.
#[derive(Debug, Clone)]
pub struct EvalSetup {
    /// Episodes to play.
    pub episodes: usize,
    /// Seed of the episodes (and of the exploration stream when epsilon > 0).
    pub seed: u64,
    /// Exploration rate (0 = greedy).
    pub epsilon: f64,
    /// Discount for the discounted returns.
    pub discount: f64,
    /// Step limit per episode as a safety net for tasks without a time limit
    /// (0 = none).
    pub max_steps: u64,
}

/// Plays `setup.episodes` episodes of `task` with the network `params`.
pub fn evaluate(
    task: &TaskSpec,
    agent: &AgentSpec,
    params: &Params,
    setup: &EvalSetup,
) -> Result<EvalReport, String> {
    let episodes = setup.episodes.max(1);
    let k = episodes.min(32);
    let mut lanes = Lanes::new(task, k, setup.seed).map_err(|e| e.to_string())?;
    let shape = crate::learner::net_shape(lanes.task());
    let mut net = ActorNet::from_params(agent, shape, params).map_err(|e| e.to_string())?;
    let actions = lanes.task().action_space().count();
    let has_success = lanes.task().has_success();
    let mut memory = LaneMemory::new(k, net.state_len());
    let mut rng = StdRng::seed_from_u64(setup.seed ^ 0x5EED_E7A1);
    let mut q = vec![0.0f32; k * actions];
    let mut chosen = vec![0usize; k];
    // Episode i goes to lane i % k.
    let quota: Vec<usize> = (0..k).map(|l| (episodes - l).div_ceil(k)).collect();
    let mut done = vec![0usize; k];
    let mut slots: Vec<Option<(f64, f64, u64, bool)>> = vec![None; episodes];
    let mut running: Vec<(f64, f64, u64)> = vec![(0.0, 0.0, 0); k];
    let mut steps_taken = 0u64;
    while done.iter().zip(&quota).any(|(d, q)| d < q) {
        net.step(
            lanes.obs(),
            &memory.prev_action,
            &memory.prev_reward,
            &mut memory.state,
            &mut q,
        )
        .map_err(|e| e.to_string())?;
        for lane in 0..k {
            chosen[lane] = explore::choose(
                &q[lane * actions..(lane + 1) * actions],
                setup.epsilon,
                &mut rng,
            );
        }
        let results = lanes.step(&chosen).map_err(|e| e.to_string())?.to_vec();
        steps_taken += 1;
        for (lane, r) in results.iter().enumerate() {
            let (ret, disc, len) = &mut running[lane];
            *disc += setup.discount.powi(*len as i32) * r.reward as f64;
            *ret += r.reward as f64;
            *len += 1;
            let forced = setup.max_steps > 0 && *len >= setup.max_steps;
            if r.ending.is_done() || forced {
                if done[lane] < quota[lane] {
                    let i = lane + done[lane] * k;
                    slots[i] = Some((*ret, *disc, *len, r.success.unwrap_or(false)));
                    done[lane] += 1;
                }
                running[lane] = (0.0, 0.0, 0);
                memory.reset_lane(lane);
            } else {
                memory.advance(lane, chosen[lane], r.reward);
            }
        }
        if setup.max_steps > 0 && steps_taken > setup.max_steps * (quota[0] as u64 + 1) {
            break;
        }
    }
    let filled: Vec<(f64, f64, u64, bool)> = slots.into_iter().flatten().collect();
    Ok(EvalReport {
        episodes: filled.len(),
        returns: filled.iter().map(|e| e.0).collect(),
        discounted: filled.iter().map(|e| e.1).collect(),
        lengths: filled.iter().map(|e| e.2).collect(),
        successes: has_success.then(|| filled.iter().map(|e| e.3).collect()),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Values from scipy 1.x: stats.norm.ppf(0.975) = 1.959963984540054,
    // stats.t.ppf(0.975, [5, 30, 199]) = [2.57058184, 2.04227246, 1.97195654].
    #[test]
    fn quantiles_match_scipy() {
        assert!((normal_quantile(0.975) - 1.959963984540054).abs() < 1e-8);
        assert!((t_quantile(0.975, 5.0) - 2.57058184).abs() < 5e-4);
        assert!((t_quantile(0.975, 30.0) - 2.04227246).abs() < 1e-5);
        assert!((t_quantile(0.975, 199.0) - 1.97195654).abs() < 1e-6);
    }

    #[test]
    fn interval_is_symmetric_and_shrinks_with_n() {
        let small = t_interval(&[1.0, 2.0, 3.0, 4.0, 5.0, 6.0], 0.95);
        let v: Vec<f64> = (0..60).map(|i| (i % 6 + 1) as f64).collect();
        let big = t_interval(&v, 0.95);
        assert!(((small.0 + small.1) / 2.0 - 3.5).abs() < 1e-12);
        assert!(big.1 - big.0 < small.1 - small.0);
    }
}
