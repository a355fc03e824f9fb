//! Branch-free, vectorisable `exp`, `sigmoid` and `tanh` for f32 slices.
//!
//! candle's `tanh` goes through the system math library (~15 ns per element); these
//! loops compile to SIMD code. `exp` uses Cody-Waite range reduction with a degree-6
//! polynomial (relative error about 2e-7 on [-87, 88]); `tanh` switches to its Taylor
//! series below |x| < 0.1 so small arguments keep full relative precision.

const LOG2E: f32 = std::f32::consts::LOG2_E;
const LN2_HI: f32 = 0.693_145_75;
const LN2_LO: f32 = 1.428_606_8e-6;

/// e^x, clamped to the normal f32 range.
#[inline(always)]
pub fn exp(x: f32) -> f32 {
    let x = x.clamp(-87.0, 88.0);
    // Round x*log2(e) to the nearest integer with the 1.5 * 2^23 trick: after the add, the
    // low mantissa bits of `t` hold the integer. Reading it from the bits (instead of a
    // saturating `as i32`, which does not vectorise) keeps the loop branch-free SIMD.
    const MAGIC: f32 = 12_582_912.0;
    let t = x * LOG2E + MAGIC;
    let n = t - MAGIC;
    let ni = (t.to_bits() as i32).wrapping_sub(MAGIC.to_bits() as i32);
    let r = x - n * LN2_HI - n * LN2_LO;
    let p = 1.0
        + r * (1.0
            + r * (0.5
                + r * (1.0 / 6.0 + r * (1.0 / 24.0 + r * (1.0 / 120.0 + r * (1.0 / 720.0))))));
    let bits = (ni.wrapping_add(127) as u32) << 23;
    f32::from_bits(bits) * p
}

/// 1 / (1 + e^-x).
#[inline(always)]
pub fn sigmoid(x: f32) -> f32 {
    1.0 / (1.0 + exp(-x))
}

/// tanh(x).
#[inline(always)]
pub fn tanh(x: f32) -> f32 {
    let e = exp(-2.0 * x.abs());
    let big = (1.0 - e) / (1.0 + e);
    let x2 = x * x;
    let small = x.abs() * (1.0 + x2 * (-1.0 / 3.0 + x2 * (2.0 / 15.0 + x2 * (-17.0 / 315.0))));
    let a = if x.abs() < 0.1 { small } else { big };
    a.copysign(x)
}

thread_local! {
    /// Set while [`with_portable_kernels`] runs on this thread.
    static PORTABLE_ONLY: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

/// True when this thread should take the AVX2 + FMA versions of the kernels: the CPU has
/// both features and the thread is not inside [`with_portable_kernels`].
#[inline]
pub fn simd_kernels() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        !PORTABLE_ONLY.with(|p| p.get())
            && std::is_x86_feature_detected!("avx2")
            && std::is_x86_feature_detected!("fma")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// Runs `f` with every kernel of this crate that has an AVX2 + FMA version (the
/// [`multiversion!`](crate::multiversion) functions, the actor's dense layers) taking its
/// portable baseline version instead, on the calling thread only. For tests and for
/// diagnosing a numerical difference between machines with and without FMA.
pub fn with_portable_kernels<R>(f: impl FnOnce() -> R) -> R {
    struct Restore(bool);
    impl Drop for Restore {
        fn drop(&mut self) {
            PORTABLE_ONLY.with(|p| p.set(self.0));
        }
    }
    let _restore = Restore(PORTABLE_ONLY.with(|p| p.replace(true)));
    f()
}

/// Defines a function whose body is compiled twice: for the baseline target and with
/// AVX2 + FMA enabled, chosen at run time by [`simd_kernels`]. Rust's default x86-64 target is SSE2 only, so
/// without this the hot loops would run at a quarter of the vector width.
#[macro_export]
#[doc(hidden)]
macro_rules! multiversion {
    ($(#[$m:meta])* $vis:vis fn $name:ident($($arg:ident : $ty:ty),* $(,)?) $body:block) => {
        $(#[$m])*
        #[allow(clippy::too_many_arguments)]
        $vis fn $name($($arg: $ty),*) {
            #[inline(always)]
            #[allow(clippy::too_many_arguments)]
            fn inner($($arg: $ty),*) $body
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2,fma")]
                #[allow(clippy::too_many_arguments)]
                unsafe fn avx2($($arg: $ty),*) {
                    inner($($arg),*)
                }
                if $crate::fastmath::simd_kernels() {
                    // SAFETY: `simd_kernels` checked that the CPU supports both features.
                    return unsafe { avx2($($arg),*) };
                }
            }
            inner($($arg),*)
        }
    };
}

crate::multiversion! {
    /// Applies [`sigmoid`] in place.
    pub fn sigmoid_slice(xs: &mut [f32]) {
        for x in xs.iter_mut() {
            *x = sigmoid(*x);
        }
    }
}

crate::multiversion! {
    /// Applies [`tanh`] in place.
    pub fn tanh_slice(xs: &mut [f32]) {
        for x in xs.iter_mut() {
            *x = tanh(*x);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference: the standard library's exp/tanh (correctly rounded to within 1 ulp).
    #[test]
    fn exp_matches_std_within_relative_3e_7() {
        let mut worst = 0f64;
        let mut x = -87.0f32;
        while x < 88.0 {
            let got = exp(x) as f64;
            let want = (x as f64).exp();
            worst = worst.max(((got - want) / want).abs());
            x += 0.0137;
        }
        assert!(worst < 3e-7, "worst relative error {worst}");
    }

    #[test]
    fn tanh_and_sigmoid_match_std() {
        let mut worst_t = 0f64;
        let mut worst_s = 0f64;
        let mut x = -20.0f32;
        while x < 20.0 {
            let t = (x as f64).tanh();
            worst_t = worst_t.max(((tanh(x) as f64 - t) / t.abs().max(1e-30)).abs());
            let s = 1.0 / (1.0 + (-(x as f64)).exp());
            worst_s = worst_s.max(((sigmoid(x) as f64 - s) / s).abs());
            x += 0.00731;
        }
        assert!(worst_t < 1e-6, "tanh worst relative error {worst_t}");
        assert!(worst_s < 1e-6, "sigmoid worst relative error {worst_s}");
        assert_eq!(tanh(0.0), 0.0);
        assert_eq!(tanh(100.0), 1.0);
        assert_eq!(tanh(-100.0), -1.0);
    }
}
