//! `cartpole` and `cartpole-positions`: the cart-pole of Barto, Sutton & Anderson
//! (1983) with the sign of g corrected as in Florian (2007, "Correct equations for
//! the dynamics of the cart-pole system"), frictionless, explicit Euler with
//! tau = 0.02 s. Constants (cart 1.0 kg, pole 0.1 kg, half-length 0.5 m, force
//! +-10 N, failure beyond 12 degrees or 2.4 m) are recalled values corroborated in
//! `shared/REFERENCE.md`.
//!
//! Reward 1 for every step after which the pole is still up, 0 on the failing step
//! (terminal), so an episode's return is the number of balanced steps. Reaching
//! `time_limit` truncates. The initial state is uniform in [-0.05, 0.05] per
//! component.
//!
//! `cartpole` observes (x, x_dot, theta, theta_dot). `cartpole-positions` observes
//! (x, theta) only, plus optional Gaussian noise of std `noise`: under explicit
//! Euler x_{t+1} = x_t + tau * x_dot_t exactly, so the hidden velocity is the finite
//! difference of consecutive noiseless observations, recoverable by memory.

use mnemon_spec::TaskSpec;

use crate::registry::{bad_action, count, real};
use crate::rng::{Rng, NORMAL_BOUND};
use crate::space::check_obs_len;
use crate::{ActionSpace, Ending, ObsSpace, Outcome, Task, TaskError};

/// Gravity, m/s^2 (positive in Florian's corrected convention).
pub const GRAVITY: f64 = 9.8;
/// Cart mass, kg.
pub const CART_MASS: f64 = 1.0;
/// Pole mass, kg.
pub const POLE_MASS: f64 = 0.1;
/// Half the pole's length, m.
pub const HALF_LENGTH: f64 = 0.5;
/// Magnitude of the push, N.
pub const FORCE: f64 = 10.0;
/// Euler time step, s.
pub const TAU: f64 = 0.02;
/// Failure angle, rad (12 degrees).
pub const ANGLE_LIMIT: f64 = 12.0 * std::f64::consts::PI / 180.0;
/// Failure position, m.
pub const POSITION_LIMIT: f64 = 2.4;

/// Declared observation bounds (x, x_dot, theta, theta_dot). The dynamics cannot
/// reach them before failure: |x_dot| stays below about 10 m/s and |theta_dot|
/// below about 4 rad/s while |x| < 2.4 and |theta| < 12 degrees, and one Euler step
/// past the limits moves x by under 0.3 m and theta by under 0.1 rad.
pub const BOUNDS: [f32; 4] = [4.8, 20.0, 0.8, 20.0];

/// Accelerations (x_dd, theta_dd) for `state` = (x, x_dot, theta, theta_dot) under
/// `force` (Florian 2007, eqs. 21 and 22 without friction).
pub fn accelerations(state: [f64; 4], force: f64) -> (f64, f64) {
    // Constant quotients are multiplications by precomputed reciprocals; this leaves
    // one division per step (the results differ from plain division only in the
    // last bits: the worked steps hold to 1e-12).
    const TOTAL: f64 = CART_MASS + POLE_MASS;
    const INV_TOTAL: f64 = 1.0 / TOTAL;
    const POLE_MOMENT: f64 = POLE_MASS * HALF_LENGTH;
    let [_, _, th, th_d] = state;
    let (sin, cos) = th.sin_cos();
    let temp = (-force - POLE_MOMENT * th_d * th_d * sin) * INV_TOTAL;
    let th_dd = (GRAVITY * sin + cos * temp)
        / (HALF_LENGTH * (4.0 / 3.0 - POLE_MASS * cos * cos * INV_TOTAL));
    let x_dd = (force + POLE_MOMENT * (th_d * th_d * sin - th_dd * cos)) * INV_TOTAL;
    (x_dd, th_dd)
}

/// One explicit Euler step: positions move with the old velocities.
pub fn euler_step(state: [f64; 4], force: f64) -> [f64; 4] {
    let (x_dd, th_dd) = accelerations(state, force);
    let [x, x_d, th, th_d] = state;
    [
        x + TAU * x_d,
        x_d + TAU * x_dd,
        th + TAU * th_d,
        th_d + TAU * th_dd,
    ]
}

/// The cart-pole task (both observation variants).
#[derive(Debug, Clone)]
pub struct CartPole {
    positions_only: bool,
    noise: f64,
    time_limit: usize,
    state: [f64; 4],
    t: usize,
    running: bool,
    rng: Rng,
}

impl CartPole {
    /// Full observation (`positions_only = false`) or positions with `noise`.
    pub fn new(positions_only: bool, time_limit: usize, noise: f64) -> Self {
        CartPole {
            positions_only,
            noise,
            time_limit,
            state: [0.0; 4],
            t: 0,
            running: false,
            rng: Rng::new(0),
        }
    }
    pub(crate) fn from_spec(spec: &TaskSpec, positions_only: bool) -> Result<Self, TaskError> {
        let limit = count(spec, "time_limit")?;
        let noise = if positions_only {
            real(spec, "noise")?
        } else {
            0.0
        };
        Ok(Self::new(positions_only, limit, noise))
    }
    /// The physical state (x, x_dot, theta, theta_dot).
    pub fn state(&self) -> [f64; 4] {
        self.state
    }
    /// Start an episode from a given state (for tests and demos).
    pub fn set_state(&mut self, state: [f64; 4], obs: &mut [f32]) {
        self.state = state;
        self.t = 0;
        self.running = true;
        self.write_obs(obs);
    }
    fn kind(&self) -> &'static str {
        if self.positions_only {
            "cartpole-positions"
        } else {
            "cartpole"
        }
    }
    fn obs_len(&self) -> usize {
        if self.positions_only {
            2
        } else {
            4
        }
    }
    fn write_obs(&mut self, obs: &mut [f32]) {
        let s = self.state;
        if self.positions_only {
            let (mut x, mut th) = (s[0], s[2]);
            if self.noise > 0.0 {
                x += self.noise * self.rng.normal();
                th += self.noise * self.rng.normal();
            }
            obs[0] = x as f32;
            obs[1] = th as f32;
        } else {
            for (o, v) in obs.iter_mut().zip(s) {
                *o = v as f32;
            }
        }
    }
}

impl Task for CartPole {
    fn obs_space(&self) -> ObsSpace {
        if self.positions_only {
            let pad = (self.noise * NORMAL_BOUND) as f32;
            let high = vec![BOUNDS[0] + pad, BOUNDS[2] + pad];
            ObsSpace::Vector {
                low: high.iter().map(|h| -h).collect(),
                high,
            }
        } else {
            ObsSpace::Vector {
                low: BOUNDS.iter().map(|h| -h).collect(),
                high: BOUNDS.to_vec(),
            }
        }
    }
    fn action_space(&self) -> ActionSpace {
        ActionSpace::from_names(&["push-left", "push-right"])
    }
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError> {
        check_obs_len(self.kind(), obs, self.obs_len())?;
        self.rng = Rng::new(seed);
        let mut s = [0.0; 4];
        for v in &mut s {
            *v = self.rng.range(-0.05, 0.05);
        }
        self.set_state(s, obs);
        Ok(())
    }
    #[inline]
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError> {
        if !self.running {
            return Err(TaskError::NotRunning {
                kind: self.kind().into(),
            });
        }
        if action >= 2 {
            return Err(bad_action(self.kind(), action, 2));
        }
        check_obs_len(self.kind(), obs, self.obs_len())?;
        let force = if action == 1 { FORCE } else { -FORCE };
        self.state = euler_step(self.state, force);
        self.t += 1;
        let failed = self.state[0].abs() > POSITION_LIMIT || self.state[2].abs() > ANGLE_LIMIT;
        let ending = if failed {
            Ending::Terminal
        } else if self.t >= self.time_limit {
            Ending::Truncated
        } else {
            Ending::Running
        };
        self.running = ending == Ending::Running;
        self.write_obs(obs);
        Ok(Outcome {
            reward: if failed { 0.0 } else { 1.0 },
            ending,
            success: None,
        })
    }
    fn has_success(&self) -> bool {
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) {
        // The reference gives 12 decimals: agree to 1e-11.
        assert!((a - b).abs() < 1e-11, "{a} vs {b}");
    }

    // Worked steps from shared/REFERENCE.md ("Cart-pole", [computed] from the
    // frictionless equations of Florian 2007 with the 1983 constants).
    #[test]
    fn worked_steps_match_the_reference() {
        let (x_dd, th_dd) = accelerations([0.0; 4], 10.0);
        close(x_dd, 9.756097560976);
        close(th_dd, -14.634146341463);
        let s = euler_step([0.0; 4], 10.0);
        for (a, b) in s.iter().zip([0.0, 0.195121951220, 0.0, -0.292682926829]) {
            close(*a, b);
        }
        let start = [0.1, 0.2, 0.05, -0.3];
        let (x_dd, th_dd) = accelerations(start, -10.0);
        close(x_dd, -9.789882732198);
        close(th_dd, 15.401165680308);
        let s = euler_step(start, -10.0);
        for (a, b) in s.iter().zip([0.104, 0.004202345356, 0.044, 0.008023313606]) {
            close(*a, b);
        }
    }

    // REFERENCE.md: a constant +10 N push from rest fails after 9 steps.
    #[test]
    fn constant_push_from_rest_fails_after_nine_steps() {
        let mut c = CartPole::new(false, 500, 0.0);
        let mut obs = [0.0; 4];
        c.set_state([0.0; 4], &mut obs);
        for step in 1..=9 {
            let out = c.step(1, &mut obs).unwrap();
            let expect = if step < 9 {
                Ending::Running
            } else {
                Ending::Terminal
            };
            assert_eq!(out.ending, expect, "step {step}");
            assert_eq!(out.reward, if step < 9 { 1.0 } else { 0.0 });
        }
    }

    // Explicit Euler: x_{t+1} - x_t = tau * x_dot_t exactly, the same for theta.
    #[test]
    fn hidden_velocity_is_the_finite_difference_of_positions() {
        let mut full = CartPole::new(false, 500, 0.0);
        let mut part = CartPole::new(true, 500, 0.0);
        let (mut of, mut op) = ([0.0f32; 4], [0.0f32; 2]);
        full.reset(9, &mut of).unwrap();
        part.reset(9, &mut op).unwrap();
        let mut rng = Rng::new(1);
        for _ in 0..60 {
            let before_state = part.state();
            let before = op;
            let a = rng.below(2);
            let out = part.step(a, &mut op).unwrap();
            full.step(a, &mut of).unwrap();
            let after_state = part.state();
            // exact in f64
            assert!(((after_state[0] - before_state[0]) / TAU - before_state[1]).abs() < 1e-12);
            assert!(((after_state[2] - before_state[2]) / TAU - before_state[3]).abs() < 1e-12);
            // and from the f32 observations, to f32 rounding
            let vx = (op[0] - before[0]) as f64 / TAU;
            let vth = (op[1] - before[1]) as f64 / TAU;
            assert!(
                (vx - before_state[1]).abs() < 1e-4,
                "{vx} {}",
                before_state[1]
            );
            assert!((vth - before_state[3]).abs() < 1e-4);
            // the positions variant sees exactly the full variant's positions
            assert_eq!((op[0], op[1]), (of[0], of[2]));
            if out.ending.is_done() {
                break;
            }
        }
    }

    #[test]
    fn noise_perturbs_only_the_observation() {
        let mut clean = CartPole::new(true, 500, 0.0);
        let mut noisy = CartPole::new(true, 500, 0.1);
        let (mut a, mut b) = ([0.0f32; 2], [0.0f32; 2]);
        clean.reset(4, &mut a).unwrap();
        noisy.reset(4, &mut b).unwrap();
        let mut diff = 0.0;
        for _ in 0..5 {
            clean.step(0, &mut a).unwrap();
            noisy.step(0, &mut b).unwrap();
            assert_eq!(clean.state(), noisy.state());
            diff += (a[0] - b[0]).abs();
        }
        assert!(diff > 0.01);
    }

    #[test]
    fn time_limit_truncates() {
        let mut c = CartPole::new(false, 3, 0.0);
        let mut obs = [0.0; 4];
        c.set_state([0.0; 4], &mut obs);
        let endings: Vec<Ending> = [1, 0, 1]
            .iter()
            .map(|&a| c.step(a, &mut obs).unwrap().ending)
            .collect();
        assert_eq!(
            endings,
            [Ending::Running, Ending::Running, Ending::Truncated]
        );
    }
}
