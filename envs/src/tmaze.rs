//! `tmaze`: the T-maze of Bakker (2002, "Reinforcement learning with long
//! short-term memory", NeurIPS). The agent starts at the west end of a corridor of
//! length L; the junction is at the east end, with one arm north and one south.
//! The cue on the first step says which arm holds the goal; after that every
//! corridor cell looks the same.
//!
//! Observation (3 values, after Bakker's encoding, recalled from memory of the
//! paper): start with goal north `[0,1,1]`, start with goal south `[1,1,0]`,
//! corridor `[1,0,1]`, junction `[0,1,0]`.
//! Actions: north, east, south, west.
//! Rewards (values from memory of the paper, not re-checked against its text):
//! +4 for the correct arm, -0.1 for the wrong arm (both end the episode, terminal),
//! -0.1 for a move into a wall (the agent stays), 0 otherwise.
//! Time limit: `time_limit` steps, 3 (L + 2) when 0; reaching it truncates.

use mnemon_spec::TaskSpec;

use crate::registry::{bad_action, count};
use crate::rng::Rng;
use crate::space::check_obs_len;
use crate::{ActionSpace, Ending, ObsSpace, Outcome, Task, TaskError};

/// Action indices.
pub const NORTH: usize = 0;
/// Move east (along the corridor towards the junction).
pub const EAST: usize = 1;
/// Move south.
pub const SOUTH: usize = 2;
/// Move west.
pub const WEST: usize = 3;

/// Reward for the correct arm.
pub const GOAL_REWARD: f32 = 4.0;
/// Reward for the wrong arm and for bumping into a wall.
pub const PENALTY: f32 = -0.1;

/// The T-maze task.
#[derive(Debug, Clone)]
pub struct TMaze {
    length: usize,
    time_limit: usize,
    pos: usize,
    goal_north: bool,
    t: usize,
    running: bool,
}

impl TMaze {
    /// A maze with corridor `length` (>= 1) and `time_limit` (0 = 3 (length + 2)).
    pub fn new(length: usize, time_limit: usize) -> Self {
        let time_limit = if time_limit == 0 {
            3 * (length + 2)
        } else {
            time_limit
        };
        TMaze {
            length,
            time_limit,
            pos: 0,
            goal_north: true,
            t: 0,
            running: false,
        }
    }
    pub(crate) fn from_spec(spec: &TaskSpec) -> Result<Self, TaskError> {
        let length = count(spec, "length")?;
        let limit = count(spec, "time_limit")?;
        Ok(Self::new(length, limit))
    }
    /// The effective time limit.
    pub fn time_limit(&self) -> usize {
        self.time_limit
    }
    /// Whether the goal is in the north arm this episode.
    pub fn goal_north(&self) -> bool {
        self.goal_north
    }
    fn write_obs(&self, obs: &mut [f32]) {
        let o: [f32; 3] = if self.pos == 0 && self.t == 0 {
            if self.goal_north {
                [0.0, 1.0, 1.0]
            } else {
                [1.0, 1.0, 0.0]
            }
        } else if self.pos == self.length {
            [0.0, 1.0, 0.0]
        } else {
            [1.0, 0.0, 1.0]
        };
        obs.copy_from_slice(&o);
    }
}

impl Task for TMaze {
    fn obs_space(&self) -> ObsSpace {
        ObsSpace::Vector {
            low: vec![0.0; 3],
            high: vec![1.0; 3],
        }
    }
    fn action_space(&self) -> ActionSpace {
        ActionSpace::from_names(&["north", "east", "south", "west"])
    }
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError> {
        check_obs_len("tmaze", obs, 3)?;
        self.goal_north = Rng::new(seed).chance(0.5);
        self.pos = 0;
        self.t = 0;
        self.running = true;
        self.write_obs(obs);
        Ok(())
    }
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError> {
        if !self.running {
            return Err(TaskError::NotRunning {
                kind: "tmaze".into(),
            });
        }
        if action >= 4 {
            return Err(bad_action("tmaze", action, 4));
        }
        check_obs_len("tmaze", obs, 3)?;
        self.t += 1;
        let at_junction = self.pos == self.length;
        let (mut reward, mut ending, mut success) = (0.0, Ending::Running, None);
        match action {
            NORTH | SOUTH if at_junction => {
                let correct = (action == NORTH) == self.goal_north;
                reward = if correct { GOAL_REWARD } else { PENALTY };
                ending = Ending::Terminal;
                success = Some(correct);
            }
            EAST if !at_junction => self.pos += 1,
            WEST if self.pos > 0 => self.pos -= 1,
            _ => reward = PENALTY, // into a wall: stay
        }
        if ending == Ending::Running && self.t >= self.time_limit {
            ending = Ending::Truncated;
            success = Some(false);
        }
        self.running = ending == Ending::Running;
        self.write_obs(obs);
        Ok(Outcome {
            reward,
            ending,
            success,
        })
    }
    fn has_success(&self) -> bool {
        true
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Observation classes a memoryless policy can tell apart.
    fn class(obs: &[f32]) -> usize {
        match (obs[0] as u8, obs[1] as u8, obs[2] as u8) {
            (0, 1, 1) => 0, // start, goal north
            (1, 1, 0) => 1, // start, goal south
            (1, 0, 1) => 2, // corridor
            (0, 1, 0) => 3, // junction
            _ => panic!("unexpected observation {obs:?}"),
        }
    }

    /// Find a seed giving each cue.
    fn seeds() -> [u64; 2] {
        let mut m = TMaze::new(3, 0);
        let mut obs = [0.0; 3];
        let mut found = [None, None];
        for s in 0.. {
            m.reset(s, &mut obs).unwrap();
            found[if m.goal_north() { 0 } else { 1 }].get_or_insert(s);
            if let [Some(a), Some(b)] = found {
                return [a, b];
            }
        }
        unreachable!()
    }

    /// Run one episode under `policy(obs, t) -> action`; return success.
    fn episode(m: &mut TMaze, seed: u64, mut policy: impl FnMut(&[f32]) -> usize) -> bool {
        let mut obs = [0.0; 3];
        m.reset(seed, &mut obs).unwrap();
        loop {
            let out = m.step(policy(&obs), &mut obs).unwrap();
            if out.ending.is_done() {
                return out.success == Some(true);
            }
        }
    }

    // Analytic fact (Bakker 2002, and plain reasoning): at the junction a memoryless
    // policy sees the same observation whichever the cue, so it picks the same arm in
    // both cases and succeeds in exactly one of the two equally likely cues.
    // Enumerate all 4^4 deterministic memoryless policies on the real task.
    #[test]
    fn best_memoryless_policy_succeeds_exactly_half_the_time() {
        let seeds = seeds();
        for length in [1, 2, 5, 10] {
            let mut m = TMaze::new(length, 0);
            let mut best = 0.0f64;
            for code in 0..256usize {
                let table = [code & 3, (code >> 2) & 3, (code >> 4) & 3, (code >> 6) & 3];
                let wins = seeds
                    .iter()
                    .filter(|&&s| episode(&mut m, s, |o| table[class(o)]))
                    .count();
                best = best.max(wins as f64 / 2.0);
            }
            assert_eq!(best, 0.5, "length {length}");
        }
    }

    #[test]
    fn a_policy_that_remembers_the_cue_always_succeeds() {
        let mut m = TMaze::new(10, 0);
        for seed in 0..200 {
            let mut remembered = None;
            let won = episode(&mut m, seed, |o| {
                let c = class(o);
                if c < 2 {
                    remembered = Some(c == 0);
                }
                match (c, remembered) {
                    (3, Some(true)) => NORTH,
                    (3, Some(false)) => SOUTH,
                    _ => EAST,
                }
            });
            assert!(won, "seed {seed}");
        }
    }

    #[test]
    fn rewards_walls_and_time_limit() {
        let mut m = TMaze::new(2, 4);
        let mut obs = [0.0; 3];
        m.reset(1, &mut obs).unwrap();
        let o = m.step(WEST, &mut obs).unwrap();
        assert_eq!((o.reward, o.ending), (PENALTY, Ending::Running));
        assert_eq!(class(&obs), 2, "the cue is gone after the first step");
        m.step(EAST, &mut obs).unwrap();
        m.step(EAST, &mut obs).unwrap();
        assert_eq!(class(&obs), 3);
        let o = m.step(EAST, &mut obs).unwrap(); // wall at the junction, 4th step
        assert_eq!(
            (o.reward, o.ending, o.success),
            (PENALTY, Ending::Truncated, Some(false))
        );
        assert!(m.step(EAST, &mut obs).is_err());
        let wrong = if m.goal_north() { SOUTH } else { NORTH };
        m.reset(1, &mut obs).unwrap();
        m.step(EAST, &mut obs).unwrap();
        m.step(EAST, &mut obs).unwrap();
        let o = m.step(wrong, &mut obs).unwrap();
        assert_eq!(
            (o.reward, o.ending, o.success),
            (PENALTY, Ending::Terminal, Some(false))
        );
        assert_eq!(TMaze::new(10, 0).time_limit(), 36);
    }
}
