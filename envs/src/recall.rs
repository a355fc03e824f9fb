//! `recall`: delayed recall of a symbol. The first observation shows one of S
//! symbols (one-hot); then come D distractor steps, each showing a random symbol in
//! a separate distractor channel; then a question step, whose action is the answer:
//! reward 1 if it names the first symbol, 0 otherwise, and the episode ends
//! (terminal). Actions before the question are ignored.
//!
//! Observation (2S + 1 values): [symbol one-hot (S) | distractor one-hot (S) |
//! question flag]. At the question the observation is the same whatever the
//! symbol was, so a memoryless policy answers independently of the symbol and
//! succeeds with probability exactly 1/S.

use mnemon_spec::TaskSpec;

use crate::registry::{bad_action, count};
use crate::rng::Rng;
use crate::space::check_obs_len;
use crate::{ActionSpace, Ending, ObsSpace, Outcome, Task, TaskError};

/// The recall task.
#[derive(Debug, Clone)]
pub struct Recall {
    symbols: usize,
    distractors: usize,
    symbol: usize,
    t: usize,
    running: bool,
    rng: Rng,
}

impl Recall {
    /// S = `symbols` (>= 2), D = `distractors`.
    pub fn new(symbols: usize, distractors: usize) -> Self {
        Recall {
            symbols,
            distractors,
            symbol: 0,
            t: 0,
            running: false,
            rng: Rng::new(0),
        }
    }
    pub(crate) fn from_spec(spec: &TaskSpec) -> Result<Self, TaskError> {
        let s = count(spec, "symbols")?;
        let d = count(spec, "distractors")?;
        Ok(Self::new(s, d))
    }
    /// The symbol to recall this episode.
    pub fn symbol(&self) -> usize {
        self.symbol
    }
    fn len(&self) -> usize {
        2 * self.symbols + 1
    }
}

impl Task for Recall {
    fn obs_space(&self) -> ObsSpace {
        ObsSpace::Vector {
            low: vec![0.0; self.len()],
            high: vec![1.0; self.len()],
        }
    }
    fn action_space(&self) -> ActionSpace {
        ActionSpace {
            names: (0..self.symbols).map(|i| format!("symbol-{i}")).collect(),
        }
    }
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError> {
        check_obs_len("recall", obs, self.len())?;
        self.rng = Rng::new(seed);
        self.symbol = self.rng.below(self.symbols);
        self.t = 0;
        self.running = true;
        obs.fill(0.0);
        obs[self.symbol] = 1.0;
        Ok(())
    }
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError> {
        if !self.running {
            return Err(TaskError::NotRunning {
                kind: "recall".into(),
            });
        }
        if action >= self.symbols {
            return Err(bad_action("recall", action, self.symbols));
        }
        check_obs_len("recall", obs, self.len())?;
        // Steps 0..D-1 were the symbol and distractors; the question is shown after
        // step D and answered at step D + 1.
        let answering = self.t == self.distractors + 1;
        self.t += 1;
        obs.fill(0.0);
        if answering {
            self.running = false;
            let correct = action == self.symbol;
            return Ok(Outcome {
                reward: if correct { 1.0 } else { 0.0 },
                ending: Ending::Terminal,
                success: Some(correct),
            });
        }
        if self.t <= self.distractors {
            obs[self.symbols + self.rng.below(self.symbols)] = 1.0;
        } else {
            obs[2 * self.symbols] = 1.0;
        }
        Ok(Outcome {
            reward: 0.0,
            ending: Ending::Running,
            success: None,
        })
    }
    fn has_success(&self) -> bool {
        true
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Play one episode: `answer(first_obs)` is given at the question.
    fn play(r: &mut Recall, seed: u64, answer: impl Fn(&[f32]) -> usize) -> (bool, usize) {
        let n = r.len();
        let mut obs = vec![0.0; n];
        r.reset(seed, &mut obs).unwrap();
        let first = obs.clone();
        let mut steps = 0;
        loop {
            let question = obs[n - 1] == 1.0;
            let a = if question { answer(&first) } else { 0 };
            let out = r.step(a, &mut obs).unwrap();
            steps += 1;
            if out.ending.is_done() {
                return (out.success == Some(true), steps);
            }
        }
    }

    // Analytic fact: at the question every episode shows the same observation, so a
    // memoryless policy's answer is independent of the symbol; exactly one of the S
    // answers is right in each episode, so over all deterministic memoryless answers
    // the successes sum to the number of episodes, and with the symbol uniform each
    // answer succeeds with probability 1/S (checked within 4 standard errors).
    #[test]
    fn memoryless_answers_score_one_over_s() {
        let (s, d, episodes) = (4usize, 3usize, 20_000u64);
        let mut r = Recall::new(s, d);
        let mut wins = vec![0u64; s];
        for seed in 0..episodes {
            for (a, w) in wins.iter_mut().enumerate() {
                let (won, steps) = play(&mut r, seed, |_| a);
                assert_eq!(steps, d + 2);
                *w += won as u64;
            }
        }
        assert_eq!(wins.iter().sum::<u64>(), episodes);
        let p = 1.0 / s as f64;
        let se = (p * (1.0 - p) / episodes as f64).sqrt();
        for w in wins {
            assert!((w as f64 / episodes as f64 - p).abs() < 4.0 * se, "{w}");
        }
    }

    #[test]
    fn remembering_the_first_observation_always_succeeds() {
        let mut r = Recall::new(5, 0);
        for seed in 0..100 {
            let (won, steps) = play(&mut r, seed, |first| {
                first.iter().position(|&v| v == 1.0).unwrap()
            });
            assert!(won);
            assert_eq!(steps, 2);
        }
    }
}
