//! `tiger`: the Tiger problem of Kaelbling, Littman & Cassandra (1998, "Planning
//! and acting in partially observable stochastic domains"). A tiger is behind the
//! left or the right door. Listening costs 1 and reports the tiger's side correctly
//! with probability `listen_accuracy` (0.85 in the paper); opening the tiger's door
//! costs 100, the other door pays 10, and the tiger is then placed uniformly at
//! random again. An episode lasts `horizon` steps; its end is the end of the
//! finite-horizon problem, so it is `Terminal` (there is no value after it). With
//! `end_on_open` an opening also ends the episode.
//!
//! Observation (3 values, one-hot): heard-left, heard-right, nothing heard (the
//! first step and every step after an opening).
//! Actions: listen, open-left, open-right.
//!
//! [`optimal_value`] solves the problem exactly by belief-space dynamic
//! programming, so a trained agent can be compared with the true optimum.

use std::collections::HashMap;

use mnemon_spec::TaskSpec;

use crate::registry::{bad_action, count, real, switch};
use crate::rng::Rng;
use crate::space::check_obs_len;
use crate::{ActionSpace, Ending, ObsSpace, Outcome, Task, TaskError};

/// Listen.
pub const LISTEN: usize = 0;
/// Open the left door.
pub const OPEN_LEFT: usize = 1;
/// Open the right door.
pub const OPEN_RIGHT: usize = 2;
/// Reward of a listen.
pub const LISTEN_REWARD: f64 = -1.0;
/// Reward of opening the tiger's door.
pub const TIGER_REWARD: f64 = -100.0;
/// Reward of opening the other door.
pub const TREASURE_REWARD: f64 = 10.0;

/// The Tiger task.
#[derive(Debug, Clone)]
pub struct Tiger {
    horizon: usize,
    accuracy: f64,
    end_on_open: bool,
    tiger_left: bool,
    t: usize,
    running: bool,
    rng: Rng,
}

impl Tiger {
    /// A Tiger problem with the given horizon (>= 1), accuracy and opening rule.
    pub fn new(horizon: usize, accuracy: f64, end_on_open: bool) -> Self {
        Tiger {
            horizon,
            accuracy,
            end_on_open,
            tiger_left: true,
            t: 0,
            running: false,
            rng: Rng::new(0),
        }
    }
    pub(crate) fn from_spec(spec: &TaskSpec) -> Result<Self, TaskError> {
        let horizon = count(spec, "horizon")?;
        let accuracy = real(spec, "listen_accuracy")?;
        let end_on_open = switch(spec, "end_on_open")?;
        Ok(Self::new(horizon, accuracy, end_on_open))
    }
    /// Whether the tiger is behind the left door now.
    pub fn tiger_left(&self) -> bool {
        self.tiger_left
    }
}

fn one_hot(obs: &mut [f32], i: usize) {
    obs.fill(0.0);
    obs[i] = 1.0;
}

impl Task for Tiger {
    fn obs_space(&self) -> ObsSpace {
        ObsSpace::Vector {
            low: vec![0.0; 3],
            high: vec![1.0; 3],
        }
    }
    fn action_space(&self) -> ActionSpace {
        ActionSpace::from_names(&["listen", "open-left", "open-right"])
    }
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError> {
        check_obs_len("tiger", obs, 3)?;
        self.rng = Rng::new(seed);
        self.tiger_left = self.rng.chance(0.5);
        self.t = 0;
        self.running = true;
        one_hot(obs, 2);
        Ok(())
    }
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError> {
        if !self.running {
            return Err(TaskError::NotRunning {
                kind: "tiger".into(),
            });
        }
        if action >= 3 {
            return Err(bad_action("tiger", action, 3));
        }
        check_obs_len("tiger", obs, 3)?;
        self.t += 1;
        let mut ending = Ending::Running;
        let reward = if action == LISTEN {
            let correct = self.rng.chance(self.accuracy);
            let heard_left = self.tiger_left == correct;
            one_hot(obs, if heard_left { 0 } else { 1 });
            LISTEN_REWARD
        } else {
            let opened_left = action == OPEN_LEFT;
            let r = if opened_left == self.tiger_left {
                TIGER_REWARD
            } else {
                TREASURE_REWARD
            };
            self.tiger_left = self.rng.chance(0.5);
            one_hot(obs, 2);
            if self.end_on_open {
                ending = Ending::Terminal;
            }
            r
        };
        if self.t >= self.horizon {
            ending = Ending::Terminal;
        }
        self.running = ending == Ending::Running;
        Ok(Outcome {
            reward: reward as f32,
            ending,
            success: None,
        })
    }
    fn has_success(&self) -> bool {
        false
    }

    fn exact_optimum(&self, discount: f64) -> Option<crate::space::Optimum> {
        Some(crate::space::Optimum {
            value: optimal_value(self.horizon, discount, self.accuracy, self.end_on_open),
            method: "exact discounted optimum by belief-space dynamic programming",
        })
    }
}

/// The optimal expected (discounted) return from the start of a Tiger episode of
/// `horizon` steps: exact finite-horizon dynamic programming over beliefs.
///
/// After an opening the belief returns to 1/2, and between openings it depends
/// only on n = (left growls) - (right growls), P(tiger left | n) =
/// p^n / (p^n + q^n) with p = `listen_accuracy`, q = 1 - p. So the reachable belief
/// set is finite and V_k(n) = max over actions of (expected reward + discount *
/// expected V_{k-1}(next n)) is exact, with O(horizon^2) states.
pub fn optimal_value(
    horizon: usize,
    discount: f64,
    listen_accuracy: f64,
    end_on_open: bool,
) -> f64 {
    let mut memo = HashMap::new();
    value(
        horizon,
        0,
        discount,
        listen_accuracy,
        end_on_open,
        &mut memo,
    )
}

fn value(
    k: usize,
    n: i64,
    discount: f64,
    p: f64,
    end_on_open: bool,
    memo: &mut HashMap<(usize, i64), f64>,
) -> f64 {
    if k == 0 {
        return 0.0;
    }
    if let Some(v) = memo.get(&(k, n)) {
        return *v;
    }
    let q = 1.0 - p;
    // Belief that the tiger is left, computed stably from the likelihood ratio.
    // (q / p)^n is 0 or infinite for perfect hearing, giving b = 1 or 0 as it should.
    let b = 1.0 / (1.0 + (q / p).powi(n as i32));
    let heard_left = b * p + (1.0 - b) * q;
    let mut listen = LISTEN_REWARD;
    if heard_left > 0.0 {
        listen += discount * heard_left * value(k - 1, n + 1, discount, p, end_on_open, memo);
    }
    if heard_left < 1.0 {
        listen +=
            discount * (1.0 - heard_left) * value(k - 1, n - 1, discount, p, end_on_open, memo);
    }
    let after_open = if end_on_open {
        0.0
    } else {
        discount * value(k - 1, 0, discount, p, end_on_open, memo)
    };
    let open_left = b * TIGER_REWARD + (1.0 - b) * TREASURE_REWARD + after_open;
    let open_right = (1.0 - b) * TIGER_REWARD + b * TREASURE_REWARD + after_open;
    let v = listen.max(open_left).max(open_right);
    memo.insert((k, n), v);
    v
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hand derivation (p = 0.85, q = 0.15; rewards of Kaelbling, Littman & Cassandra
    // 1998). Write b* = max(b, 1 - b); opening the likelier-safe door pays
    // 10 b* - 100 (1 - b*) = 110 b* - 100.
    // H = 1: at b = 1/2 opening pays -45 < -1, so V1 = -1 (listen).
    // H = 2: after one growl b* = 0.85, opening pays -6.5 < -1: V1(n=+-1) = -1, and
    //   V2 = -1 + g * (-1) = -2 at g = 1 (opening first: -45 + g V1 = -46).
    // H = 3: after two agreeing growls b* = 0.7225 / 0.745 = 0.96980 and opening pays
    //   110 * 0.7225/0.745 - 100 = 6.67785 > -1. P(second growl agrees | n=1) = 0.745,
    //   so V2(n=1) = -1 + g (0.745 * 6.67785 + 0.255 * (-1)) = -1 + g (4.975 - 0.255)
    //   = -1 + 4.72 g (opening at n=1 gives -6.5 + g V1(0) = -6.5 - g, worse), and
    //   V3 = -1 + g V2(n=1) = -1 + g (-1 + 4.72 g): 2.72 at g = 1, 1.9232 at g = 0.9.
    // Openings before the last step are never optimal here, so end_on_open does not
    // change these three values.
    #[test]
    fn solver_matches_hand_derived_values_for_horizons_one_to_three() {
        for end in [false, true] {
            assert!((optimal_value(1, 1.0, 0.85, end) - -1.0).abs() < 1e-12);
            assert!((optimal_value(2, 1.0, 0.85, end) - -2.0).abs() < 1e-12);
            assert!((optimal_value(3, 1.0, 0.85, end) - 2.72).abs() < 1e-12);
            assert!((optimal_value(2, 0.9, 0.85, end) - -1.9).abs() < 1e-12);
            assert!((optimal_value(3, 0.9, 0.85, end) - 1.9232).abs() < 1e-12);
        }
        // Perfect hearing (p = 1), derived the same way: a listen reveals the side and
        // an opening re-places the tiger, so every opening needs a listen before it.
        // H = 3 without end_on_open: listen, open, listen = -1 + 10 - 1 = 8 (or
        // listen, listen, open, also 8); with end_on_open: listen, open = 9.
        assert!((optimal_value(3, 1.0, 1.0, false) - 8.0).abs() < 1e-12);
        // H = 4 without end_on_open: (listen, open) twice = 18.
        assert!((optimal_value(4, 1.0, 1.0, false) - 18.0).abs() < 1e-12);
        assert!((optimal_value(3, 1.0, 1.0, true) - 9.0).abs() < 1e-12);
    }

    // Bounds any policy obeys: always listening earns -H, and no step pays more
    // than the treasure.
    #[test]
    fn optimum_lies_between_always_listening_and_the_treasure_rate() {
        for h in 1..40 {
            for end in [false, true] {
                let v = optimal_value(h, 1.0, 0.85, end);
                assert!(
                    v >= -(h as f64) - 1e-9 && v <= 10.0 * h as f64,
                    "h {h}: {v}"
                );
            }
        }
        // Without end_on_open, a long episode allows many listen-listen-open cycles.
        assert!(optimal_value(30, 1.0, 0.85, false) > optimal_value(30, 1.0, 0.85, true));
    }

    // The simulator and the solver agree: the policy the H = 3 derivation found
    // (listen, listen, open the quiet side if both growls agreed) has expected
    // return 2.72; Monte Carlo on the task must land within 4 standard errors.
    #[test]
    fn simulator_reproduces_the_derived_optimum_at_horizon_three() {
        let mut t = Tiger::new(3, 0.85, false);
        let mut obs = [0.0f32; 3];
        let n = 200_000;
        let (mut sum, mut sum2) = (0.0, 0.0);
        for seed in 0..n {
            t.reset(seed, &mut obs).unwrap();
            let mut heard = [0i32; 2];
            let mut ret = 0.0f64;
            for step in 0..3 {
                let a = if step < 2 {
                    LISTEN
                } else if heard[0] == 2 {
                    OPEN_RIGHT
                } else if heard[1] == 2 {
                    OPEN_LEFT
                } else {
                    LISTEN
                };
                let out = t.step(a, &mut obs).unwrap();
                ret += out.reward as f64;
                if obs[0] == 1.0 {
                    heard[0] += 1;
                }
                if obs[1] == 1.0 {
                    heard[1] += 1;
                }
                assert_eq!(out.ending == Ending::Terminal, step == 2);
            }
            sum += ret;
            sum2 += ret * ret;
        }
        let mean = sum / n as f64;
        let se = ((sum2 / n as f64 - mean * mean) / n as f64).sqrt();
        assert!((mean - 2.72).abs() < 4.0 * se, "mean {mean} se {se}");
    }

    #[test]
    fn end_on_open_ends_the_episode() {
        let mut t = Tiger::new(10, 0.85, true);
        let mut obs = [0.0f32; 3];
        t.reset(3, &mut obs).unwrap();
        assert_eq!(obs, [0.0, 0.0, 1.0]);
        let out = t.step(OPEN_LEFT, &mut obs).unwrap();
        assert_eq!(out.ending, Ending::Terminal);
        assert!(out.reward == -100.0 || out.reward == 10.0);
    }
}
