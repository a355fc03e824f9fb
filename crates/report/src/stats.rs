//! Statistics for comparing runs: point estimates (mean, median, interquartile mean),
//! stratified bootstrap intervals (random and exact), the probability of improvement and
//! Welch's t test. Everything here works on plain `f64` slices; `compare` feeds it the
//! final scores of runs, one stratum per task (a report covers one task, so one stratum).
//!
//! Conventions follow the published methods (Agarwal et al. 2021, "Deep Reinforcement
//! Learning at the Edge of the Statistical Precipice", for IQM, stratified bootstrap and
//! probability of improvement; Welch 1947 for the unequal-variance t test). Where a method
//! leaves a choice open (trimming when n is not a multiple of 4, the percentile rule), the
//! choice matches numpy / scipy so results can be checked against them; the committed
//! fixture `tests/reference/report_fixture.json` does exactly that.

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, StudentsT};

use crate::error::{Error, Result};

/// The largest number of resamples [`exact_bootstrap_ci`] will enumerate.
pub const EXACT_BOOTSTRAP_LIMIT: u64 = 1_000_000;

/// A confidence interval `[low, high]`.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Interval {
    /// Lower end.
    pub low: f64,
    /// Upper end.
    pub high: f64,
}

impl Interval {
    /// An interval with both ends NaN, for statistics of no data.
    pub const NAN: Interval = Interval {
        low: f64::NAN,
        high: f64::NAN,
    };
}

/// Arithmetic mean; NaN for an empty slice.
pub fn mean(x: &[f64]) -> f64 {
    if x.is_empty() {
        return f64::NAN;
    }
    x.iter().sum::<f64>() / x.len() as f64
}

/// Median (the mean of the two middle values when `x.len()` is even); NaN for an empty
/// slice.
pub fn median(x: &[f64]) -> f64 {
    let s = sorted(x);
    let n = s.len();
    match n {
        0 => f64::NAN,
        _ if n % 2 == 1 => s[n / 2],
        _ => 0.5 * (s[n / 2 - 1] + s[n / 2]),
    }
}

/// Interquartile mean: the mean of the middle half of the values.
///
/// Convention: after sorting, cut `floor(n / 4)` values from each end and average the
/// rest. This is `scipy.stats.trim_mean(x, 0.25)`, chosen because it is what a reader
/// can recompute with one standard call, it never weights a value fractionally, and for
/// the small seed counts typical of runs it degrades gracefully: with `n < 4` nothing is
/// cut (the plain mean), with `n = 5..7` one value goes from each end. When `n` is a
/// multiple of 4 it is exactly the mean of the 25th-75th percentile range. NaN for an
/// empty slice.
pub fn iqm(x: &[f64]) -> f64 {
    let s = sorted(x);
    let cut = s.len() / 4;
    mean(&s[cut..s.len() - cut])
}

/// Interquartile mean of all scores of all strata pooled together (see [`iqm`]).
pub fn iqm_pooled(strata: &[Vec<f64>]) -> f64 {
    iqm(&strata.concat())
}

/// Mean of all scores of all strata pooled together. With equal stratum sizes this is
/// also the mean of the per-stratum means.
pub fn mean_pooled(strata: &[Vec<f64>]) -> f64 {
    let n: usize = strata.iter().map(Vec::len).sum();
    if n == 0 {
        return f64::NAN;
    }
    strata.iter().flatten().sum::<f64>() / n as f64
}

/// The `q`-th percentile (`q` in `[0, 100]`) of `sorted_x`, which must be sorted
/// ascending, by linear interpolation between the two nearest ranks: the value at
/// fractional index `(n - 1) * q / 100`. This is numpy.percentile's default
/// (`method="linear"`), including its interpolation formula, so results agree with numpy
/// to the last bit or two. NaN for an empty slice.
pub fn percentile(sorted_x: &[f64], q: f64) -> f64 {
    let n = sorted_x.len();
    if n == 0 {
        return f64::NAN;
    }
    let h = (n - 1) as f64 * (q / 100.0);
    let lo = (h.floor().max(0.0) as usize).min(n - 1);
    let hi = (lo + 1).min(n - 1);
    let t = h - lo as f64;
    let (a, b) = (sorted_x[lo], sorted_x[hi]);
    // numpy's _lerp: interpolate from the nearer end, so t = 1 returns b exactly.
    if t >= 0.5 {
        b - (b - a) * (1.0 - t)
    } else {
        a + (b - a) * t
    }
}

/// The percentile interval at confidence `level` of a set of bootstrap statistics: the
/// `100 * (1 - level) / 2` and `100 * (1 + level) / 2` percentiles by [`percentile`].
/// The two percentages are rounded to 1e-10 so that `level = 0.95` asks for exactly 2.5
/// and 97.5, as one would type into numpy.
fn percentile_interval(mut stats: Vec<f64>, level: f64) -> Interval {
    stats.sort_by(f64::total_cmp);
    let round = |p: f64| (p * 1e10).round() / 1e10;
    Interval {
        low: percentile(&stats, round(50.0 * (1.0 - level))),
        high: percentile(&stats, round(50.0 * (1.0 + level))),
    }
}

/// Stratified bootstrap percentile interval (Agarwal et al. 2021).
///
/// Each of `resamples` resamples draws, within each stratum independently, `n_i` scores
/// with replacement from that stratum's `n_i` scores; `stat` is computed on the resampled
/// strata (e.g. [`mean_pooled`] or [`iqm_pooled`]); the interval is the percentile
/// interval of those statistics at confidence `level` (numpy.percentile's linear rule, see
/// [`percentile`]). Empty strata stay empty.
///
/// The generator is `StdRng::seed_from_u64(seed)`: the same inputs and seed give the same
/// interval on every machine with the same `rand` version. NaN ends when `resamples` is 0.
///
/// # Panics
/// If `level` is not strictly between 0 and 1.
pub fn bootstrap_ci(
    strata: &[Vec<f64>],
    stat: &dyn Fn(&[Vec<f64>]) -> f64,
    resamples: usize,
    level: f64,
    seed: u64,
) -> Interval {
    check_level(level);
    if resamples == 0 {
        return Interval::NAN;
    }
    let mut rng = StdRng::seed_from_u64(seed);
    let mut resample: Vec<Vec<f64>> = strata.iter().map(|s| vec![0.0; s.len()]).collect();
    let mut stats = Vec::with_capacity(resamples);
    for _ in 0..resamples {
        for (src, dst) in strata.iter().zip(resample.iter_mut()) {
            for v in dst.iter_mut() {
                *v = src[rng.random_range(0..src.len())];
            }
        }
        stats.push(stat(&resample));
    }
    percentile_interval(stats, level)
}

/// The stratified bootstrap percentile interval computed exactly, by enumerating every
/// resample: all `prod n_i^n_i` ordered draws with replacement, each equally likely. Same
/// statistic and percentile convention as [`bootstrap_ci`], no random generator. Useful
/// to check the random bootstrap and for tiny samples.
///
/// # Errors
/// [`Error::TooManyResamples`] when enumeration needs more than
/// [`EXACT_BOOTSTRAP_LIMIT`] resamples.
///
/// # Panics
/// If `level` is not strictly between 0 and 1.
pub fn exact_bootstrap_ci(
    strata: &[Vec<f64>],
    stat: &dyn Fn(&[Vec<f64>]) -> f64,
    level: f64,
) -> Result<Interval> {
    check_level(level);
    let count: f64 = strata
        .iter()
        .map(|s| (s.len() as f64).powi(s.len() as i32))
        .product();
    if count > EXACT_BOOTSTRAP_LIMIT as f64 {
        return Err(Error::TooManyResamples {
            count,
            limit: EXACT_BOOTSTRAP_LIMIT,
        });
    }
    // One odometer over every draw of every stratum: digit j of stratum i picks which of
    // stratum i's scores fills slot j of the resample.
    let slots: Vec<(usize, usize)> = strata
        .iter()
        .enumerate()
        .flat_map(|(i, s)| (0..s.len()).map(move |j| (i, j)))
        .collect();
    let mut digits = vec![0usize; slots.len()];
    let mut resample: Vec<Vec<f64>> = strata
        .iter()
        .map(|s| vec![s.first().copied().unwrap_or(0.0); s.len()])
        .collect();
    let mut stats = Vec::with_capacity(count as usize);
    loop {
        stats.push(stat(&resample));
        // Advance the odometer; the last slot turns fastest.
        let mut k = slots.len();
        loop {
            if k == 0 {
                return Ok(percentile_interval(stats, level));
            }
            k -= 1;
            let (i, j) = slots[k];
            digits[k] += 1;
            if digits[k] == strata[i].len() {
                digits[k] = 0;
                resample[i][j] = strata[i][0];
            } else {
                resample[i][j] = strata[i][digits[k]];
                break;
            }
        }
    }
}

/// Probability of improvement P(X > Y) (Agarwal et al. 2021): the fraction of all pairs
/// `(x_i, y_j)` with `x_i > y_j`, a tie counting 1/2. With `x` the final scores of a
/// variant's seeds and `y` the baseline's, it is the chance that a random run of the
/// variant beats a random run of the baseline (the Mann-Whitney U statistic divided by
/// `n * m`). NaN when either slice is empty.
pub fn probability_of_improvement(x: &[f64], y: &[f64]) -> f64 {
    if x.is_empty() || y.is_empty() {
        return f64::NAN;
    }
    let mut wins = 0.0;
    for &a in x {
        for &b in y {
            if a > b {
                wins += 1.0;
            } else if a == b {
                wins += 0.5;
            }
        }
    }
    wins / (x.len() * y.len()) as f64
}

/// The result of Welch's unequal-variance t test.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Welch {
    /// The t statistic, `(mean(x) - mean(y)) / sqrt(s_x^2 / n_x + s_y^2 / n_y)`, with
    /// sample variances (divisor `n - 1`).
    pub t: f64,
    /// Welch-Satterthwaite degrees of freedom.
    pub df: f64,
    /// Two-sided p-value from Student's t distribution with `df` degrees of freedom.
    pub p: f64,
}

/// Welch's t test (Welch 1947) of equal means without assuming equal variances: the same
/// numbers as `scipy.stats.ttest_ind(x, y, equal_var=False)`. `None` when either sample
/// has fewer than 2 values, when both variances are 0, or when any value is not finite.
pub fn welch_t(x: &[f64], y: &[f64]) -> Option<Welch> {
    if x.len() < 2 || y.len() < 2 || x.iter().chain(y).any(|v| !v.is_finite()) {
        return None;
    }
    let (nx, ny) = (x.len() as f64, y.len() as f64);
    let (mx, my) = (mean(x), mean(y));
    let var =
        |s: &[f64], m: f64| s.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (s.len() - 1) as f64;
    let (ax, ay) = (var(x, mx) / nx, var(y, my) / ny);
    if ax + ay == 0.0 {
        return None;
    }
    let t = (mx - my) / (ax + ay).sqrt();
    let df = (ax + ay).powi(2) / (ax * ax / (nx - 1.0) + ay * ay / (ny - 1.0));
    // statrs (a maintained statistics crate) provides Student's t; sf(|t|) is the upper
    // tail without the cancellation of 1 - cdf.
    let dist = StudentsT::new(0.0, 1.0, df).ok()?;
    let p = (2.0 * dist.sf(t.abs())).min(1.0);
    Some(Welch { t, df, p })
}

fn sorted(x: &[f64]) -> Vec<f64> {
    let mut s = x.to_vec();
    s.sort_by(f64::total_cmp);
    s
}

fn check_level(level: f64) {
    assert!(
        level > 0.0 && level < 1.0,
        "confidence level must be in (0, 1), got {level}"
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * b.abs().max(1e-300)
    }

    // REFERENCE.md "Statistics for comparing runs", computed with numpy/scipy
    // (Agarwal et al. 2021): scipy.stats.trim_mean(x, 0.25).
    #[test]
    fn iqm_reference() {
        let x = [0.1, 0.5, 0.7, 0.8, 0.9, 1.0, 1.2, 5.0];
        assert!(close(iqm(&x), 0.85, 1e-12), "{}", iqm(&x));
        // Order does not matter.
        let y = [5.0, 0.1, 1.2, 0.5, 0.9, 0.7, 1.0, 0.8];
        assert!(close(iqm(&y), 0.85, 1e-12));
    }

    // REFERENCE.md, computed with numpy/scipy (Agarwal et al. 2021): IQM of the pooled
    // scores of two tasks.
    #[test]
    fn iqm_pooled_reference() {
        let strata = vec![vec![0.2, 0.4, 0.6, 0.8], vec![1.0, 1.5, 2.0, 10.0]];
        assert!(close(iqm_pooled(&strata), 0.975, 1e-12));
    }

    // Convention checks worked by hand: n < 4 cuts nothing; n = 5 cuts one per end;
    // n = 6: floor(6/4) = 1 per end.
    #[test]
    fn iqm_small_n_convention() {
        assert_eq!(iqm(&[3.0]), 3.0);
        assert!(close(iqm(&[1.0, 2.0, 9.0]), 4.0, 1e-15));
        assert!(close(iqm(&[1.0, 2.0, 3.0, 4.0, 100.0]), 3.0, 1e-15));
        assert!(close(iqm(&[0.0, 1.0, 2.0, 3.0, 4.0, 50.0]), 2.5, 1e-15));
        assert!(iqm(&[]).is_nan());
    }

    #[test]
    fn mean_and_median() {
        assert_eq!(mean(&[1.0, 2.0, 6.0]), 3.0);
        assert_eq!(median(&[6.0, 1.0, 2.0]), 2.0);
        assert_eq!(median(&[4.0, 1.0, 2.0, 10.0]), 3.0);
        assert!(mean(&[]).is_nan() && median(&[]).is_nan());
    }

    // numpy.percentile(np.arange(5) ** 2, [0, 10, 50, 62.5, 100]) -> [0, 0.4, 4, 6.5, 16]
    // (worked by hand: index (n-1) q / 100 = 0.4, 2, 2.5 between ranks).
    #[test]
    fn percentile_is_numpy_linear() {
        let x = [0.0, 1.0, 4.0, 9.0, 16.0];
        for (q, want) in [
            (0.0, 0.0),
            (10.0, 0.4),
            (50.0, 4.0),
            (62.5, 6.5),
            (100.0, 16.0),
        ] {
            assert!(close(percentile(&x, q), want, 1e-15), "q={q}");
        }
    }

    // REFERENCE.md, computed with numpy (Agarwal et al. 2021): exact stratified bootstrap
    // over all 27^2 = 729 resamples of tasks [[1, 2, 6], [0, 0.5, 4]]. "Mean" and "IQM"
    // there are of the pooled scores of each resample (6 values): reproducing 0.75/3.75
    // and 0.625/4.125 confirms it.
    #[test]
    fn exact_bootstrap_reference() {
        let strata = vec![vec![1.0, 2.0, 6.0], vec![0.0, 0.5, 4.0]];
        let m = exact_bootstrap_ci(&strata, &mean_pooled, 0.95).unwrap();
        assert!(
            close(m.low, 0.75, 1e-12) && close(m.high, 3.75, 1e-12),
            "{m:?}"
        );
        let q = exact_bootstrap_ci(&strata, &iqm_pooled, 0.95).unwrap();
        assert!(
            close(q.low, 0.625, 1e-12) && close(q.high, 4.125, 1e-12),
            "{q:?}"
        );
    }

    #[test]
    fn exact_bootstrap_enumerates_every_resample_once() {
        // Count resamples with a statistic that records its calls.
        let strata = vec![vec![1.0, 2.0], vec![0.0, 1.0, 5.0]];
        let calls = std::cell::Cell::new(0usize);
        let seen = std::cell::RefCell::new(std::collections::HashSet::new());
        let stat = |s: &[Vec<f64>]| {
            calls.set(calls.get() + 1);
            seen.borrow_mut().insert(format!("{s:?}"));
            0.0
        };
        exact_bootstrap_ci(&strata, &stat, 0.9).unwrap();
        assert_eq!(calls.get(), 4 * 27); // 2^2 * 3^3
        assert_eq!(seen.borrow().len(), 4 * 27);
    }

    #[test]
    fn exact_bootstrap_refuses_huge_enumerations() {
        // 8^8 = 16.8 million resamples.
        let strata = vec![(0..8).map(f64::from).collect::<Vec<_>>()];
        match exact_bootstrap_ci(&strata, &mean_pooled, 0.95) {
            Err(Error::TooManyResamples { count, limit }) => {
                assert_eq!(count, 16_777_216.0);
                assert_eq!(limit, EXACT_BOOTSTRAP_LIMIT);
            }
            other => panic!("expected TooManyResamples, got {other:?}"),
        }
    }

    #[test]
    fn seeded_bootstrap_is_reproducible() {
        let strata = vec![vec![1.0, 2.0, 6.0, 3.5, 0.2], vec![0.0, 0.5, 4.0, 2.0]];
        let a = bootstrap_ci(&strata, &iqm_pooled, 500, 0.95, 7);
        let b = bootstrap_ci(&strata, &iqm_pooled, 500, 0.95, 7);
        assert_eq!(a, b);
        let c = bootstrap_ci(&strata, &iqm_pooled, 500, 0.95, 8);
        assert_ne!(a, c, "a different seed should give a different interval");
    }

    // The random bootstrap converges to the exact one (REFERENCE.md's 729 case): with
    // 200k resamples the percentile's sampling error is a few hundredths at most here.
    #[test]
    fn random_bootstrap_approaches_exact() {
        let strata = vec![vec![1.0, 2.0, 6.0], vec![0.0, 0.5, 4.0]];
        for stat in [&mean_pooled as &dyn Fn(&[Vec<f64>]) -> f64, &iqm_pooled] {
            let exact = exact_bootstrap_ci(&strata, stat, 0.95).unwrap();
            let random = bootstrap_ci(&strata, stat, 200_000, 0.95, 1);
            assert!(
                (random.low - exact.low).abs() < 0.05,
                "{random:?} vs {exact:?}"
            );
            assert!(
                (random.high - exact.high).abs() < 0.05,
                "{random:?} vs {exact:?}"
            );
        }
    }

    #[test]
    fn bootstrap_of_constant_is_that_constant() {
        let i = bootstrap_ci(&[vec![2.5; 4]], &mean_pooled, 100, 0.95, 0);
        assert_eq!((i.low, i.high), (2.5, 2.5));
        assert!(bootstrap_ci(&[vec![1.0]], &mean_pooled, 0, 0.95, 0)
            .low
            .is_nan());
    }

    // REFERENCE.md, computed with numpy/scipy (Agarwal et al. 2021): 7 wins + 1 tie of 9
    // pairs = 7.5 / 9.
    #[test]
    fn probability_of_improvement_reference() {
        let p = probability_of_improvement(&[3.0, 4.0, 5.0], &[1.0, 4.0, 2.0]);
        assert!(close(p, 0.8333333333, 1e-9), "{p}");
        assert!(probability_of_improvement(&[], &[1.0]).is_nan());
    }

    // REFERENCE.md, computed with scipy.stats.ttest_ind(equal_var=False) (Welch 1947).
    #[test]
    fn welch_reference() {
        let w = welch_t(
            &[1.0, 2.0, 3.0, 4.0, 5.0],
            &[2.0, 4.0, 6.0, 8.0, 10.0, 12.0],
        )
        .unwrap();
        assert!(close(w.t, -2.3763541031, 1e-9), "{w:?}");
        assert!(close(w.df, 6.9722557298, 1e-9), "{w:?}");
        assert!(close(w.p, 0.0492843382, 1e-8), "{w:?}");
    }

    #[test]
    fn welch_undefined_cases() {
        assert!(welch_t(&[1.0], &[1.0, 2.0]).is_none());
        assert!(welch_t(&[1.0, 1.0], &[2.0, 2.0]).is_none());
        assert!(welch_t(&[1.0, f64::NAN], &[2.0, 3.0]).is_none());
        // One variance 0 is fine: t uses the other.
        let w = welch_t(&[1.0, 1.0], &[2.0, 4.0]).unwrap();
        assert!(close(w.t, -2.0, 1e-12) && close(w.df, 1.0, 1e-12));
    }
}
