//! [`Lanes`]: K copies of one task stepped together, as one actor does with one
//! batched network call. Each lane resets itself when its episode ends; the seed of
//! every episode is [`episode_seed`]`(run seed, lane, episode counter)`, so a run is
//! reproducible and lanes are independent of each other.
//!
//! When a lane's episode ends, [`Lanes::obs`] already holds the first observation of
//! the lane's next episode; the observation the ended episode finished on is kept
//! in [`Lanes::final_obs`] so that a learner can bootstrap through a truncation.

use mnemon_spec::TaskSpec;

use crate::rng::mix64;
use crate::{make, Ending, Task, TaskError};

/// The seed of episode `episode` (0-based) of lane `lane` in a run seeded `run_seed`.
pub fn episode_seed(run_seed: u64, lane: u64, episode: u64) -> u64 {
    mix64(mix64(mix64(run_seed) ^ lane.wrapping_mul(0xD1B5_4A32_D192_ED03)) ^ episode)
}

/// Totals of an episode that ended.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EpisodeSummary {
    /// Sum of rewards.
    pub total_reward: f64,
    /// Steps taken.
    pub length: u64,
    /// Success flag, for tasks that define one.
    pub success: Option<bool>,
    /// How it ended (`Terminal` or `Truncated`).
    pub ending: Ending,
}

/// One lane's result of one [`Lanes::step`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LaneStep {
    /// Reward of this step.
    pub reward: f32,
    /// How the step left the episode (the lane has already been reset if done).
    pub ending: Ending,
    /// Success flag on an ending step, for tasks that define one.
    pub success: Option<bool>,
    /// Totals, when the episode ended on this step.
    pub episode: Option<EpisodeSummary>,
}

/// K tasks stepped together with automatic, reproducible resets.
pub struct Lanes {
    tasks: Vec<Box<dyn Task>>,
    obs_len: usize,
    seed: u64,
    obs: Vec<f32>,
    final_obs: Vec<f32>,
    episodes: Vec<u64>,
    returns: Vec<f64>,
    lengths: Vec<u64>,
    steps: Vec<LaneStep>,
}

impl Lanes {
    /// `count` instances of the task of `spec`, each reset to its first episode.
    pub fn new(spec: &TaskSpec, count: usize, seed: u64) -> Result<Self, TaskError> {
        if count == 0 {
            return Err(TaskError::Lanes(
                "at least one lane is needed, got 0".into(),
            ));
        }
        let tasks = (0..count)
            .map(|_| make(spec))
            .collect::<Result<Vec<_>, _>>()?;
        Self::from_tasks(tasks, seed)
    }

    /// Lanes over tasks made elsewhere (e.g. a user's own Rust task). All tasks must
    /// share one observation length.
    pub fn from_tasks(mut tasks: Vec<Box<dyn Task>>, seed: u64) -> Result<Self, TaskError> {
        let Some(first) = tasks.first() else {
            return Err(TaskError::Lanes(
                "at least one lane is needed, got 0".into(),
            ));
        };
        let obs_len = first.obs_space().len();
        if let Some(i) = tasks.iter().position(|t| t.obs_space().len() != obs_len) {
            return Err(TaskError::Lanes(format!(
                "lane {i} has observations of {} values, lane 0 of {obs_len}",
                tasks[i].obs_space().len()
            )));
        }
        let count = tasks.len();
        let mut obs = vec![0.0; count * obs_len];
        for (lane, (task, o)) in tasks.iter_mut().zip(obs.chunks_mut(obs_len)).enumerate() {
            task.reset(episode_seed(seed, lane as u64, 0), o)?;
        }
        let idle = LaneStep {
            reward: 0.0,
            ending: Ending::Running,
            success: None,
            episode: None,
        };
        Ok(Lanes {
            tasks,
            obs_len,
            seed,
            obs,
            final_obs: vec![0.0; count * obs_len],
            episodes: vec![0; count],
            returns: vec![0.0; count],
            lengths: vec![0; count],
            steps: vec![idle; count],
        })
    }

    /// Number of lanes.
    pub fn count(&self) -> usize {
        self.tasks.len()
    }
    /// Values per observation.
    pub fn obs_len(&self) -> usize {
        self.obs_len
    }
    /// The first lane's task, for its spaces.
    pub fn task(&self) -> &dyn Task {
        self.tasks[0].as_ref()
    }
    /// Current observations, `[count * obs_len]`, lane-major.
    pub fn obs(&self) -> &[f32] {
        &self.obs
    }
    /// The observation lane `lane`'s last episode ended on, if that episode ended
    /// in the latest [`Lanes::step`]; `None` otherwise.
    pub fn final_obs(&self, lane: usize) -> Option<&[f32]> {
        if self.steps[lane].ending.is_done() {
            Some(&self.final_obs[lane * self.obs_len..(lane + 1) * self.obs_len])
        } else {
            None
        }
    }
    /// Episodes lane `lane` has finished.
    pub fn episodes_done(&self, lane: usize) -> u64 {
        self.episodes[lane]
    }
    /// Collect the tasks' diagnostic lines (outside programs' stderr).
    pub fn drain_messages(&mut self, out: &mut Vec<String>) {
        for t in &mut self.tasks {
            t.drain_messages(out);
        }
    }

    /// Step every lane with its action; lanes whose episode ends are reset at once.
    pub fn step(&mut self, actions: &[usize]) -> Result<&[LaneStep], TaskError> {
        if actions.len() != self.tasks.len() {
            return Err(TaskError::Lanes(format!(
                "got {} actions for {} lanes",
                actions.len(),
                self.tasks.len()
            )));
        }
        let n = self.obs_len;
        // Outside programs get their actions first and work in parallel.
        for (task, &action) in self.tasks.iter_mut().zip(actions) {
            task.send_action(action)?;
        }
        for (lane, (task, &action)) in self.tasks.iter_mut().zip(actions).enumerate() {
            let o = &mut self.obs[lane * n..(lane + 1) * n];
            let out = task.step(action, o)?;
            self.returns[lane] += out.reward as f64;
            self.lengths[lane] += 1;
            let mut episode = None;
            if out.ending.is_done() {
                self.final_obs[lane * n..(lane + 1) * n].copy_from_slice(o);
                episode = Some(EpisodeSummary {
                    total_reward: self.returns[lane],
                    length: self.lengths[lane],
                    success: out.success,
                    ending: out.ending,
                });
                self.episodes[lane] += 1;
                self.returns[lane] = 0.0;
                self.lengths[lane] = 0;
                task.reset(episode_seed(self.seed, lane as u64, self.episodes[lane]), o)?;
            }
            self.steps[lane] = LaneStep {
                reward: out.reward,
                ending: out.ending,
                success: out.success,
                episode,
            };
        }
        Ok(&self.steps)
    }
}
