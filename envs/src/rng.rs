//! The random streams of the tasks: a small, fast, portable generator
//! (xoshiro256++, Blackman & Vigna 2018, seeded through SplitMix64) so that a seed
//! gives the same episode on every platform and every version of mnemon's
//! dependencies.

/// SplitMix64 finaliser: a bijective 64-bit mix (Steele, Lea & Flood 2014).
pub fn mix64(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// xoshiro256++ generator.
#[derive(Debug, Clone)]
pub struct Rng {
    s: [u64; 4],
}

impl Rng {
    /// A generator whose whole stream is determined by `seed`.
    pub fn new(seed: u64) -> Self {
        let mut z = seed;
        let mut s = [0u64; 4];
        for slot in &mut s {
            z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
            *slot = mix64(z.wrapping_sub(0x9E37_79B9_7F4A_7C15));
        }
        if s == [0; 4] {
            s[0] = 1;
        }
        Rng { s }
    }
    /// Next 64 random bits.
    #[inline]
    pub fn next_u64(&mut self) -> u64 {
        let s = &mut self.s;
        let result = s[0].wrapping_add(s[3]).rotate_left(23).wrapping_add(s[0]);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }
    /// Uniform in [0, 1) with 53 bits of resolution.
    #[inline]
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }
    /// Uniform in [lo, hi).
    #[inline]
    pub fn range(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.uniform()
    }
    /// Uniform integer in 0..n (n > 0), by Lemire's multiply-shift (bias below 2^-32
    /// for the small n used here).
    #[inline]
    pub fn below(&mut self, n: usize) -> usize {
        (((self.next_u64() >> 32) * n as u64) >> 32) as usize
    }
    /// True with probability `p`.
    #[inline]
    pub fn chance(&mut self, p: f64) -> bool {
        self.uniform() < p
    }
    /// Standard normal by Box-Muller. The uniform is taken in (0, 1] at 2^-53
    /// resolution, so |z| <= sqrt(2 * 53 * ln 2) < 8.6: a hard bound that lets noisy
    /// observations keep declared bounds.
    #[inline]
    pub fn normal(&mut self) -> f64 {
        let u1 = ((self.next_u64() >> 11) + 1) as f64 * (1.0 / (1u64 << 53) as f64);
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }
}

/// The hard bound on |[`Rng::normal`]|.
pub const NORMAL_BOUND: f64 = 8.6;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_stream_and_different_seeds_differ() {
        let a: Vec<u64> = (0..5)
            .map({
                let mut r = Rng::new(3);
                move |_| r.next_u64()
            })
            .collect();
        let b: Vec<u64> = (0..5)
            .map({
                let mut r = Rng::new(3);
                move |_| r.next_u64()
            })
            .collect();
        let c: Vec<u64> = (0..5)
            .map({
                let mut r = Rng::new(4);
                move |_| r.next_u64()
            })
            .collect();
        assert_eq!(a, b);
        assert_ne!(a, c);
    }

    #[test]
    fn uniform_and_normal_moments() {
        // Analytic facts: U[0,1) has mean 1/2, variance 1/12; N(0,1) has mean 0, variance 1.
        let mut r = Rng::new(11);
        let n = 200_000;
        let (mut su, mut su2, mut sn, mut sn2) = (0.0, 0.0, 0.0, 0.0);
        for _ in 0..n {
            let u = r.uniform();
            assert!((0.0..1.0).contains(&u));
            su += u;
            su2 += u * u;
            let z = r.normal();
            assert!(z.abs() < NORMAL_BOUND);
            sn += z;
            sn2 += z * z;
        }
        let n = n as f64;
        assert!((su / n - 0.5).abs() < 0.005);
        assert!((su2 / n - (su / n).powi(2) - 1.0 / 12.0).abs() < 0.002);
        assert!((sn / n).abs() < 0.01);
        assert!((sn2 / n - 1.0).abs() < 0.02);
    }

    #[test]
    fn below_covers_range_evenly() {
        let mut r = Rng::new(5);
        let mut counts = [0usize; 5];
        for _ in 0..50_000 {
            counts[r.below(5)] += 1;
        }
        for c in counts {
            assert!((c as f64 - 10_000.0).abs() < 500.0, "{counts:?}");
        }
    }
}
