//! Sequence replay: a fixed-capacity store of fixed-length sequences with prioritized
//! sampling through a sum tree.
//!
//! Prioritized replay follows Schaul et al. 2016: P(i) = p_i^a / sum_k p_k^a, importance
//! weights w_i = (N P(i))^-b normalised by the largest weight in the sampled batch.
//! (Normalising by the largest weight in the whole store lets one stale sequence with a
//! near-zero priority shrink every weight, and with it the step size, by orders of
//! magnitude; measured on the T-maze, it stalled learning.) Sequences enter at the largest priority now in the store,
//! so every new sequence is sampled soon without crowding out the rest. (Entering at the
//! largest priority ever seen, which early in a run is far above every current one,
//! made batches almost all new sequences and stalled the T-maze at L = 10.) The per-sequence priority mixture
//! p = eta*max|d| + (1-eta)*mean|d| is Kapturowski et al. 2019 (`mnemon_nets::loss::sequence_priority`).
//!
//! The store is a ring: the oldest sequence leaves first. Capacity is given in
//! transitions and turned into sequence slots at the stride of the actors' cutting
//! (sequence - overlap), so a full store holds about `capacity` distinct transitions.

use mnemon_nets::loss;
use rand::Rng;

use crate::sequence::Sequence;

/// A binary tree over `n` leaves keeping sums and maxima of the leaf values.
#[derive(Debug, Clone)]
pub struct SumTree {
    leaves: usize,
    sum: Vec<f64>,
    max: Vec<f64>,
}

impl SumTree {
    /// A tree over `n` leaves, all zero.
    pub fn new(n: usize) -> Self {
        let leaves = n.max(1).next_power_of_two();
        SumTree {
            leaves,
            sum: vec![0.0; 2 * leaves],
            max: vec![0.0; 2 * leaves],
        }
    }

    /// Sets leaf `i` to `value` (>= 0). `None` empties the leaf.
    pub fn set(&mut self, i: usize, value: Option<f64>) {
        let mut node = i + self.leaves;
        self.sum[node] = value.unwrap_or(0.0);
        self.max[node] = value.unwrap_or(0.0);
        while node > 1 {
            node /= 2;
            self.sum[node] = self.sum[2 * node] + self.sum[2 * node + 1];
            self.max[node] = self.max[2 * node].max(self.max[2 * node + 1]);
        }
    }

    /// Value at leaf `i`.
    pub fn get(&self, i: usize) -> f64 {
        self.sum[i + self.leaves]
    }

    /// Sum of all leaves.
    pub fn total(&self) -> f64 {
        self.sum[1]
    }

    /// Largest leaf (0 when empty).
    pub fn max(&self) -> f64 {
        self.max[1]
    }

    /// The leaf whose cumulative range holds `mass` (0 <= mass < total).
    pub fn find(&self, mut mass: f64) -> usize {
        let mut node = 1;
        while node < self.leaves {
            let left = 2 * node;
            if mass < self.sum[left] || self.sum[left + 1] <= 0.0 {
                node = left;
            } else {
                mass -= self.sum[left];
                node = left + 1;
            }
        }
        node - self.leaves
    }
}

/// One sampled sequence: its slot, and its importance weight.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Draw {
    /// Slot in the store (pass back to `update_priorities`).
    pub slot: usize,
    /// Importance weight normalised by the largest weight of its batch.
    pub weight: f32,
}

/// Fixed-capacity sequence store with prioritized sampling.
pub struct Replay {
    slots: Vec<Option<Sequence>>,
    tree: SumTree,
    next: usize,
    len: usize,
    exponent: f64,
    correction: f64,
    inserted_sequences: u64,
    inserted_transitions: u64,
    stored_transitions: u64,
}

/// Floor for priorities so that no stored sequence becomes unsampleable.
const MIN_PRIORITY: f64 = 1e-6;

impl Replay {
    /// A store of `slots` sequences with priority exponent `exponent` (alpha) and
    /// importance-weight exponent `correction` (beta).
    pub fn new(slots: usize, exponent: f64, correction: f64) -> Self {
        let slots = slots.max(1);
        Replay {
            slots: (0..slots).map(|_| None).collect(),
            tree: SumTree::new(slots),
            next: 0,
            len: 0,
            exponent,
            correction,
            inserted_sequences: 0,
            inserted_transitions: 0,
            stored_transitions: 0,
        }
    }

    /// Slots for a capacity in transitions at the given cutting stride.
    pub fn slots_for(capacity_transitions: u64, stride: usize) -> usize {
        (capacity_transitions as usize)
            .div_ceil(stride.max(1))
            .max(1)
    }

    /// Sequences stored.
    pub fn len(&self) -> usize {
        self.len
    }

    /// True when nothing is stored.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Number of slots.
    pub fn capacity(&self) -> usize {
        self.slots.len()
    }

    /// Learnable transitions ever inserted (the replay-ratio controller counts these).
    pub fn inserted_transitions(&self) -> u64 {
        self.inserted_transitions
    }

    /// Learnable transitions now stored.
    pub fn stored_transitions(&self) -> u64 {
        self.stored_transitions
    }

    /// Sequences ever inserted.
    pub fn inserted_sequences(&self) -> u64 {
        self.inserted_sequences
    }

    /// Fraction of slots filled.
    pub fn fill(&self) -> f64 {
        self.len as f64 / self.slots.len() as f64
    }

    /// Inserts a sequence at the largest priority in the store, evicting the oldest
    /// when full. Returns the slot used.
    pub fn insert(&mut self, seq: Sequence) -> usize {
        let slot = self.next;
        if let Some(old) = self.slots[slot].take() {
            self.stored_transitions -= old.learnable_count() as u64;
        } else {
            self.len += 1;
        }
        let learnable = seq.learnable_count() as u64;
        self.inserted_transitions += learnable;
        self.stored_transitions += learnable;
        self.inserted_sequences += 1;
        self.slots[slot] = Some(seq);
        let leaf = if self.tree.max() > 0.0 {
            self.tree.max()
        } else {
            1.0
        };
        self.tree.set(slot, Some(leaf));
        self.next = (self.next + 1) % self.slots.len();
        slot
    }

    /// The sequence in `slot`, if any.
    pub fn get(&self, slot: usize) -> Option<&Sequence> {
        self.slots.get(slot).and_then(|s| s.as_ref())
    }

    /// Sampling probability of `slot`.
    pub fn probability(&self, slot: usize) -> f64 {
        let total = self.tree.total();
        if total <= 0.0 {
            0.0
        } else {
            self.tree.get(slot) / total
        }
    }

    /// Importance weights of `slots`, (N P(i))^-b normalised by their largest
    /// (`mnemon_nets::loss::importance_weights`).
    pub fn weights(&self, slots: &[usize]) -> Vec<f32> {
        let total = self.tree.total();
        if total <= 0.0 || self.correction == 0.0 {
            return vec![1.0; slots.len()];
        }
        let mass: Vec<f64> = slots.iter().map(|&s| self.tree.get(s)).collect();
        loss::importance_weights(&mass, total, self.len, self.correction)
            .into_iter()
            .map(|w| w as f32)
            .collect()
    }

    /// Draws `count` sequences, stratified: the priority mass is cut into `count`
    /// equal segments and one draw is made in each (Schaul et al. 2016).
    pub fn sample<R: Rng>(&self, count: usize, rng: &mut R) -> Vec<Draw> {
        let total = self.tree.total();
        if self.len == 0 || total <= 0.0 {
            return Vec::new();
        }
        let segment = total / count as f64;
        (0..count)
            .map(|k| {
                let mass = (k as f64 + rng.random::<f64>()) * segment;
                let mut slot = self.tree.find(mass.min(total * (1.0 - 1e-12)));
                if self.slots[slot].is_none() {
                    // Only reachable through rounding at a segment edge: fall back to
                    // the nearest filled slot below.
                    slot = (0..self.slots.len())
                        .rev()
                        .find(|&s| self.slots[s].is_some())
                        .unwrap_or(0);
                }
                Draw { slot, weight: 1.0 }
            })
            .collect::<Vec<_>>()
    }

    /// Draws `count` sequences (see `sample`) with their importance weights.
    pub fn sample_weighted<R: Rng>(&self, count: usize, rng: &mut R) -> Vec<Draw> {
        let mut draws = self.sample(count, rng);
        let slots: Vec<usize> = draws.iter().map(|d| d.slot).collect();
        for (d, w) in draws.iter_mut().zip(self.weights(&slots)) {
            d.weight = w;
        }
        draws
    }

    /// Writes new raw priorities (before the exponent) for sampled slots.
    pub fn update_priorities(&mut self, updates: &[(usize, f64)]) {
        for &(slot, p) in updates {
            if self.slots.get(slot).is_some_and(|s| s.is_some()) {
                let leaf = if p.is_finite() {
                    p.max(MIN_PRIORITY).powf(self.exponent)
                } else {
                    self.tree.max()
                };
                self.tree.set(slot, Some(leaf));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn seq(tag: f32) -> Sequence {
        let mut s = Sequence::empty(3, 1, 2);
        for k in 0..3 {
            s.push_entry(&[tag], 0, 0.0, &[0.0, 0.0]);
            s.set_outcome(k, 1, 0.0, k == 2);
        }
        s
    }

    // Worked values: ../shared/REFERENCE.md, prioritized replay (Schaul et al. 2016),
    // computed with numpy from P(i) = p_i^a / sum p^a and w = (N P)^-b / max w.
    #[test]
    fn probabilities_and_weights_match_the_published_formulas() {
        let mut r = Replay::new(4, 0.9, 0.6);
        for k in 0..4 {
            r.insert(seq(k as f32));
        }
        r.update_priorities(&[(0, 1.87), (1, 0.5), (2, 1.0), (3, 0.1)]);
        let p = [0.5138603752, 0.1567691804, 0.2925416346, 0.0368288098];
        let w = [0.2056863789, 0.4193302545, 0.2884031503, 1.0];
        let weights = r.weights(&[0, 1, 2, 3]);
        for i in 0..4 {
            assert!((r.probability(i) - p[i]).abs() < 1e-9, "P({i})");
            assert!((weights[i] as f64 - w[i]).abs() < 1e-6, "w({i})");
        }
    }

    #[test]
    fn sampling_frequencies_follow_priorities() {
        // Chi-square goodness of fit with 3 degrees of freedom: the 0.999 quantile is
        // 16.27 (scipy.stats.chi2.ppf(0.999, 3)); a broken tree fails by orders of magnitude.
        let mut r = Replay::new(4, 1.0, 0.0);
        for k in 0..4 {
            r.insert(seq(k as f32));
        }
        r.update_priorities(&[(0, 4.0), (1, 1.0), (2, 2.0), (3, 3.0)]);
        let mut rng = rand::rngs::StdRng::seed_from_u64(7);
        let mut counts = [0f64; 4];
        let draws = 40_000;
        for _ in 0..draws / 8 {
            for d in r.sample(8, &mut rng) {
                counts[d.slot] += 1.0;
            }
        }
        let expected = [0.4, 0.1, 0.2, 0.3].map(|p| p * draws as f64);
        let chi2: f64 = (0..4)
            .map(|i| (counts[i] - expected[i]).powi(2) / expected[i])
            .sum();
        assert!(chi2 < 16.27, "chi2 = {chi2}, counts {counts:?}");
    }

    #[test]
    fn oldest_sequence_leaves_first() {
        let mut r = Replay::new(3, 0.9, 0.6);
        for k in 0..5 {
            r.insert(seq(k as f32));
        }
        assert_eq!(r.len(), 3);
        let mut tags: Vec<f32> = (0..3).map(|s| r.get(s).unwrap().obs[0]).collect();
        tags.sort_by(f32::total_cmp);
        assert_eq!(tags, vec![2.0, 3.0, 4.0]);
        assert_eq!(r.inserted_sequences(), 5);
        assert_eq!(r.stored_transitions(), 9);
    }

    #[test]
    fn new_sequences_enter_at_the_largest_priority() {
        let mut r = Replay::new(4, 1.0, 0.0);
        r.insert(seq(0.0));
        r.insert(seq(1.0));
        r.update_priorities(&[(0, 5.0), (1, 0.5)]);
        let slot = r.insert(seq(2.0));
        assert_eq!(r.tree.get(slot), 5.0);
        r.update_priorities(&[(0, 0.25), (2, 0.5)]);
        let slot = r.insert(seq(3.0));
        assert_eq!(
            r.tree.get(slot),
            0.5,
            "the largest current priority, not the largest ever"
        );
    }

    #[test]
    fn empty_store_samples_nothing() {
        let r = Replay::new(4, 0.9, 0.6);
        let mut rng = rand::rngs::StdRng::seed_from_u64(1);
        assert!(r.sample(4, &mut rng).is_empty());
    }
}
