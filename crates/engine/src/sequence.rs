//! Fixed-length sequences and the per-lane cutter that makes them.
//!
//! An actor's lane produces a stream of entries, one per env step: the observation, the
//! previous action and reward (memory inputs), the recurrent state before the step, and
//! the step's action, reward and ending. `Cutter` slices the stream into sequences of
//! `length` entries that overlap by `overlap` and never cross an episode boundary
//! (Kapturowski et al. 2019). The recurrent state at a sequence's first entry is stored
//! with it. The last entry of a sequence cut mid-episode only serves as the bootstrap
//! observation of the entries before it; it is learned in the next sequence, so the
//! stride between sequence starts is `length - max(overlap, 1)`. An episode cut by its
//! time limit gets one extra entry holding its final observation, so the learner can
//! bootstrap through truncation (Pardo et al. 2018).
//!
//! Burn-in only matters where the stored state may be stale. A sequence that starts at
//! its episode's first step starts from the exact (zero) state, so it gets no burn-in and
//! every step is learned: on the T-maze the cue is seen only at the first step, and
//! burning it in without gradient would hide it from learning.

/// Marker for "no previous action" (the first step of an episode).
pub const NO_ACTION: u32 = u32::MAX;

/// One stored sequence, padded to its fixed length.
#[derive(Debug, Clone, PartialEq)]
pub struct Sequence {
    /// Valid entries (the rest is padding).
    pub len: usize,
    /// Fixed length.
    pub length: usize,
    /// Observation width.
    pub obs_len: usize,
    /// Observations, `[length * obs_len]` (empty once [`Sequence::compact_obs`] moved
    /// them to `obs_bytes`).
    pub obs: Vec<f32>,
    /// Image observations stored as one byte per value (see [`Sequence::compact_obs`]).
    pub obs_bytes: Vec<u8>,
    /// Previous action per entry (`NO_ACTION` at an episode's start).
    pub prev_action: Vec<u32>,
    /// Previous reward per entry.
    pub prev_reward: Vec<f32>,
    /// Action taken at each entry (0 where there is none).
    pub action: Vec<u32>,
    /// Reward received after each entry's action.
    pub reward: Vec<f32>,
    /// The episode terminated (not truncated) after this entry's action.
    pub terminal: Vec<bool>,
    /// The entry has an action and a reward (false for a final bootstrap-only entry).
    pub has_outcome: Vec<bool>,
    /// Recurrent state before the first entry, `[state_len]`.
    pub start_state: Vec<f32>,
    /// The first entry is its episode's first step.
    pub episode_start: bool,
    /// Actor states before the first and last learned entries (index, state), for the
    /// Q-value discrepancy diagnostic.
    pub discrepancy_states: Vec<(usize, Vec<f32>)>,
    /// Leading entries used only to warm the state.
    pub burn_in: usize,
}

impl Sequence {
    /// An empty sequence of fixed `length`.
    pub fn empty(length: usize, obs_len: usize, state_len: usize) -> Self {
        Sequence {
            len: 0,
            length,
            obs_len,
            obs: vec![0.0; length * obs_len],
            obs_bytes: Vec::new(),
            prev_action: vec![NO_ACTION; length],
            prev_reward: vec![0.0; length],
            action: vec![0; length],
            reward: vec![0.0; length],
            terminal: vec![false; length],
            has_outcome: vec![false; length],
            start_state: vec![0.0; state_len],
            episode_start: false,
            discrepancy_states: Vec::new(),
            burn_in: 0,
        }
    }

    /// Appends an entry's inputs; the outcome is set with `set_outcome`.
    pub fn push_entry(&mut self, obs: &[f32], prev_action: u32, prev_reward: f32, _state: &[f32]) {
        let i = self.len;
        self.obs[i * self.obs_len..(i + 1) * self.obs_len].copy_from_slice(obs);
        self.prev_action[i] = prev_action;
        self.prev_reward[i] = prev_reward;
        self.len += 1;
    }

    /// Sets entry `i`'s action, reward and whether the episode terminated after it.
    pub fn set_outcome(&mut self, i: usize, action: u32, reward: f32, terminal: bool) {
        self.action[i] = action;
        self.reward[i] = reward;
        self.terminal[i] = terminal;
        self.has_outcome[i] = true;
    }

    /// Entry `i` has a TD target: it has an outcome and either terminates or has a next
    /// entry to bootstrap from, and it lies after the burn-in.
    pub fn learnable(&self, i: usize) -> bool {
        i >= self.burn_in
            && i < self.len
            && self.has_outcome[i]
            && (self.terminal[i] || i + 1 < self.len)
    }

    /// Number of learnable entries.
    pub fn learnable_count(&self) -> usize {
        (0..self.len).filter(|&i| self.learnable(i)).count()
    }

    /// Stores the observations as one byte per value, round(x * 255): a quarter of
    /// the memory. For image observations, whose values lie in [0, 1]; planes of 0 and
    /// 1 (the built-in image task) come back exactly, other values within 1/510.
    pub fn compact_obs(&mut self) {
        if self.obs.is_empty() {
            return;
        }
        self.obs_bytes = self
            .obs
            .iter()
            .map(|&x| (x.clamp(0.0, 1.0) * 255.0).round() as u8)
            .collect();
        self.obs = Vec::new();
    }

    /// Appends the observations of all `length` entries to `out` as f32.
    pub fn extend_obs(&self, out: &mut Vec<f32>) {
        if self.obs_bytes.is_empty() {
            out.extend_from_slice(&self.obs);
        } else {
            out.extend(self.obs_bytes.iter().map(|&b| b as f32 / 255.0));
        }
    }

    /// The observation of entry `i` as f32.
    pub fn obs_at(&self, i: usize) -> std::borrow::Cow<'_, [f32]> {
        let span = i * self.obs_len..(i + 1) * self.obs_len;
        if self.obs_bytes.is_empty() {
            std::borrow::Cow::Borrowed(&self.obs[span])
        } else {
            std::borrow::Cow::Owned(
                self.obs_bytes[span]
                    .iter()
                    .map(|&b| b as f32 / 255.0)
                    .collect(),
            )
        }
    }
}

struct Entry {
    obs: Vec<f32>,
    prev_action: u32,
    prev_reward: f32,
    state: Vec<f32>,
    outcome: Option<(u32, f32, bool)>,
}

/// Cuts one lane's stream of entries into sequences.
pub struct Cutter {
    length: usize,
    stride: usize,
    burn_in: usize,
    obs_len: usize,
    state_len: usize,
    entries: Vec<Entry>,
    /// Index within the episode of `entries[0]`.
    offset: usize,
}

impl Cutter {
    /// A cutter for sequences of `length` entries overlapping by `overlap`, with
    /// `burn_in` warm-up entries for sequences that start mid-episode.
    pub fn new(
        length: usize,
        overlap: usize,
        burn_in: usize,
        obs_len: usize,
        state_len: usize,
    ) -> Self {
        let overlap = overlap.clamp(1, length.saturating_sub(1).max(1));
        Cutter {
            length,
            stride: (length - overlap).max(1),
            burn_in,
            obs_len,
            state_len,
            entries: Vec::with_capacity(length + 1),
            offset: 0,
        }
    }

    /// Records a step: the inputs the actor saw (`obs`, previous action and reward, the
    /// recurrent state before the step), the action it took and what followed. For an
    /// episode cut by its time limit, `final_obs` is the observation after the step and
    /// `state_after` the state after it. Finished sequences are pushed to `out`.
    #[allow(clippy::too_many_arguments)]
    pub fn record(
        &mut self,
        obs: &[f32],
        prev_action: u32,
        prev_reward: f32,
        state: &[f32],
        action: u32,
        reward: f32,
        ending: StepEnd<'_>,
        out: &mut Vec<Sequence>,
    ) {
        self.entries.push(Entry {
            obs: obs.to_vec(),
            prev_action,
            prev_reward,
            state: state.to_vec(),
            outcome: Some((action, reward, matches!(ending, StepEnd::Terminal))),
        });
        match ending {
            StepEnd::Terminal => {
                self.emit(out);
                self.clear();
            }
            StepEnd::Running => {
                if self.entries.len() == self.length {
                    self.emit(out);
                    self.entries.drain(..self.stride);
                    self.offset += self.stride;
                }
            }
            StepEnd::Truncated {
                final_obs,
                state_after,
            } => {
                if self.entries.len() == self.length {
                    self.emit(out);
                    self.entries.drain(..self.stride);
                    self.offset += self.stride;
                }
                self.entries.push(Entry {
                    obs: final_obs.to_vec(),
                    prev_action: action,
                    prev_reward: reward,
                    state: state_after.to_vec(),
                    outcome: None,
                });
                self.emit(out);
                self.clear();
            }
        }
    }

    /// Forgets the current episode's entries (e.g. when a lane is reset from outside).
    pub fn clear(&mut self) {
        self.entries.clear();
        self.offset = 0;
    }

    fn emit(&self, out: &mut Vec<Sequence>) {
        let mut seq = Sequence::empty(self.length, self.obs_len, self.state_len);
        seq.episode_start = self.offset == 0;
        seq.burn_in = if seq.episode_start { 0 } else { self.burn_in };
        if let Some(first) = self.entries.first() {
            seq.start_state.copy_from_slice(&first.state);
        }
        for (i, e) in self.entries.iter().enumerate() {
            seq.push_entry(&e.obs, e.prev_action, e.prev_reward, &e.state);
            if let Some((a, r, t)) = e.outcome {
                seq.set_outcome(i, a, r, t);
            }
        }
        let learned: Vec<usize> = (0..seq.len).filter(|&i| seq.learnable(i)).collect();
        let (Some(&first), Some(&last)) = (learned.first(), learned.last()) else {
            return;
        };
        seq.discrepancy_states = vec![
            (first, self.entries[first].state.clone()),
            (last, self.entries[last].state.clone()),
        ];
        out.push(seq);
    }
}

/// How a recorded step ended.
#[derive(Debug, Clone, Copy)]
pub enum StepEnd<'a> {
    /// The episode goes on.
    Running,
    /// The episode ended by failure or success: no bootstrap.
    Terminal,
    /// The episode hit its time limit: bootstrap from `final_obs`.
    Truncated {
        /// Observation after the step.
        final_obs: &'a [f32],
        /// Recurrent state after the step.
        state_after: &'a [f32],
    },
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Feeds an episode of `steps` entries (obs = step index) ending as `end`.
    fn feed(c: &mut Cutter, steps: usize, truncate: bool, out: &mut Vec<Sequence>) {
        for t in 0..steps {
            let last = t + 1 == steps;
            let final_obs = [(t + 1) as f32];
            let state_after = [(t + 1) as f32 * 10.0];
            let end = match (last, truncate) {
                (false, _) => StepEnd::Running,
                (true, false) => StepEnd::Terminal,
                (true, true) => StepEnd::Truncated {
                    final_obs: &final_obs,
                    state_after: &state_after,
                },
            };
            let prev = if t == 0 { NO_ACTION } else { 1 };
            c.record(
                &[t as f32],
                prev,
                0.5,
                &[t as f32 * 10.0],
                1,
                t as f32,
                end,
                out,
            );
        }
    }

    #[test]
    fn short_episode_is_one_padded_sequence_learned_from_its_first_step() {
        let mut c = Cutter::new(8, 4, 3, 1, 1);
        let mut out = Vec::new();
        feed(&mut c, 5, false, &mut out);
        assert_eq!(out.len(), 1);
        let s = &out[0];
        assert_eq!(s.len, 5);
        assert!(s.episode_start);
        assert_eq!(s.burn_in, 0);
        assert_eq!(s.learnable_count(), 5, "terminal last entry is learnable");
        assert_eq!(&s.obs[5..], &[0.0, 0.0, 0.0], "padding is zero");
        assert!(!s.has_outcome[5]);
        assert_eq!(s.prev_action[0], NO_ACTION);
    }

    #[test]
    fn long_episode_is_cut_with_overlap_and_stored_states() {
        let mut c = Cutter::new(8, 4, 3, 1, 1);
        let mut out = Vec::new();
        feed(&mut c, 20, false, &mut out);
        // Starts at 0, 4, 8, 12; the last one ends on the terminal step 19.
        let starts: Vec<f32> = out.iter().map(|s| s.obs[0]).collect();
        assert_eq!(starts, vec![0.0, 4.0, 8.0, 12.0]);
        assert!(out[3].learnable(7), "terminal last entry is learned");
        for s in &out {
            assert_eq!(
                s.start_state[0],
                s.obs[0] * 10.0,
                "state stored at the first entry"
            );
        }
        assert_eq!(out[1].burn_in, 3);
        // A full mid-episode sequence: entries 3..=6 learnable (burn-in 0..3, last is bootstrap).
        assert_eq!(out[1].learnable_count(), 4);
        assert_eq!(out[1].discrepancy_states[0], (3, vec![70.0]));
        assert_eq!(out[1].discrepancy_states[1], (6, vec![100.0]));
        // Every step of the episode is learnable in at least one sequence.
        let mut covered = [false; 20];
        for s in &out {
            for i in 0..s.len {
                if s.learnable(i) {
                    covered[s.obs[i] as usize] = true;
                }
            }
        }
        assert!(covered.iter().all(|&c| c), "{covered:?}");
    }

    #[test]
    fn truncated_episode_keeps_its_final_observation_for_bootstrap() {
        let mut c = Cutter::new(8, 4, 3, 1, 1);
        let mut out = Vec::new();
        feed(&mut c, 3, true, &mut out);
        assert_eq!(out.len(), 1);
        let s = &out[0];
        assert_eq!(s.len, 4);
        assert_eq!(s.obs[3], 3.0, "final observation appended");
        assert!(!s.has_outcome[3]);
        assert!(
            !s.terminal.iter().any(|&t| t),
            "truncation is not a terminal"
        );
        assert_eq!(s.learnable_count(), 3);
        assert_eq!(s.prev_action[3], 1);
    }

    #[test]
    fn truncation_exactly_at_a_full_sequence() {
        let mut c = Cutter::new(4, 2, 1, 1, 1);
        let mut out = Vec::new();
        feed(&mut c, 4, true, &mut out);
        // One full sequence [0..4), then [2, 3, final].
        assert_eq!(out.len(), 2);
        assert_eq!(out[1].len, 3);
        assert_eq!(out[1].obs[2], 4.0);
        assert!(out[1].learnable(2 - 1));
    }

    #[test]
    fn zero_overlap_still_learns_every_step() {
        let mut c = Cutter::new(4, 0, 0, 1, 1);
        let mut out = Vec::new();
        feed(&mut c, 9, false, &mut out);
        let mut covered = [false; 9];
        for s in &out {
            for i in 0..s.len {
                if s.learnable(i) {
                    covered[s.obs[i] as usize] = true;
                }
            }
        }
        assert!(covered.iter().all(|&c| c), "{covered:?}");
    }

    #[test]
    fn compact_observations_read_back_exactly_for_planes_and_closely_otherwise() {
        let mut s = Sequence::empty(3, 4, 2);
        s.push_entry(&[0.0, 1.0, 1.0, 0.0], NO_ACTION, 0.0, &[0.0, 0.0]);
        s.push_entry(&[0.3, 0.5, 0.999, 0.001], 1, 0.5, &[0.0, 0.0]);
        let mut before = Vec::new();
        s.extend_obs(&mut before);
        s.compact_obs();
        assert!(s.obs.is_empty());
        assert_eq!(s.obs_bytes.len(), 12, "one byte per value");
        let mut after = Vec::new();
        s.extend_obs(&mut after);
        assert_eq!(&after[..4], &before[..4], "0/1 planes are exact");
        for (a, b) in after.iter().zip(&before) {
            assert!((a - b).abs() <= 1.0 / 510.0 + 1e-7, "{a} vs {b}");
        }
        assert_eq!(&s.obs_at(1)[..], &after[4..8]);
    }
}
