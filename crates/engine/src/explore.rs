//! Exploration: the per-lane epsilon ladder and epsilon-greedy action choice.
//!
//! Horgan et al. 2018 give actor i of N the epsilon eps_i = base^(1 + spread*i/(N-1)).
//! mnemon applies the ladder over every lane of every actor (lane k of actor a is rung
//! a*lanes + k), so a single actor with eight lanes still explores at eight rates.

use rand::Rng;

/// Epsilon of rung `i` of `n` (eps = base when n == 1).
pub fn ladder(base: f64, spread: f64, i: usize, n: usize) -> f64 {
    if n <= 1 {
        return base;
    }
    base.powf(1.0 + spread * i as f64 / (n - 1) as f64)
}

/// Index of the largest value; the first on ties. NaN values are never chosen unless all are.
pub fn argmax(q: &[f32]) -> usize {
    let mut best = 0;
    let mut best_v = f32::NEG_INFINITY;
    for (i, &v) in q.iter().enumerate() {
        if v > best_v {
            best = i;
            best_v = v;
        }
    }
    best
}

/// Epsilon-greedy choice over `q`.
pub fn choose<R: Rng>(q: &[f32], epsilon: f64, rng: &mut R) -> usize {
    if epsilon > 0.0 && rng.random::<f64>() < epsilon {
        rng.random_range(0..q.len())
    } else {
        argmax(q)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Horgan et al. 2018 (formula from memory); values computed in
    // ../shared/REFERENCE.md for base 0.4, spread 7, N = 8.
    #[test]
    fn ladder_matches_worked_values() {
        let want = [
            0.4, 0.16, 0.064, 0.0256, 0.01024, 0.004096, 0.0016384, 0.00065536,
        ];
        for (i, w) in want.iter().enumerate() {
            assert!((ladder(0.4, 7.0, i, 8) - w).abs() < 1e-12, "rung {i}");
        }
        assert_eq!(ladder(0.4, 7.0, 0, 1), 0.4);
    }

    #[test]
    fn argmax_prefers_first_on_ties_and_skips_nan() {
        assert_eq!(argmax(&[1.0, 3.0, 3.0]), 1);
        assert_eq!(argmax(&[f32::NAN, 0.5, 0.2]), 1);
    }

    #[test]
    fn greedy_when_epsilon_zero() {
        let mut rng = rand::rng();
        for _ in 0..100 {
            assert_eq!(choose(&[0.0, 2.0, 1.0], 0.0, &mut rng), 1);
        }
    }
}
