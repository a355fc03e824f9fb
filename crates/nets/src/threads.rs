//! Who uses how many cores inside `mnemon-nets`.
//!
//! The fused LSTM op splits its batch across `threads()` scoped OS threads (lanes of a
//! batch are independent through the whole recurrence, so no synchronisation is needed
//! inside the sequence). The default is 1: the caller (the learner, the benchmark) decides
//! explicitly, so actors and the learner do not oversubscribe the cores. candle's own
//! matmuls use rayon's pool (`RAYON_NUM_THREADS`) and its elementwise pool
//! (`CANDLE_NUM_THREADS`); the binary sets those before the first tensor op.

use std::sync::atomic::{AtomicUsize, Ordering};

static THREADS: AtomicUsize = AtomicUsize::new(1);

/// Threads the fused ops of this crate may use (>= 1).
pub fn threads() -> usize {
    THREADS.load(Ordering::Relaxed).max(1)
}

/// Sets the threads the fused ops of this crate may use; 0 is taken as 1.
pub fn set_threads(n: usize) {
    THREADS.store(n.max(1), Ordering::Relaxed);
}

/// Splits `0..n` into at most `parts` contiguous, nearly equal ranges (none empty).
pub(crate) fn split(n: usize, parts: usize) -> Vec<std::ops::Range<usize>> {
    let parts = parts.clamp(1, n.max(1));
    let base = n / parts;
    let extra = n % parts;
    let mut out = Vec::with_capacity(parts);
    let mut start = 0;
    for p in 0..parts {
        let len = base + usize::from(p < extra);
        out.push(start..start + len);
        start += len;
    }
    out
}
