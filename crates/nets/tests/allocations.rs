//! Allocation budget of the learner step: after warm-up, every learner step makes the
//! same number of heap allocations (workspaces are reused, nothing grows with the
//! step count), and that number stays under a fixed bound.
//!
//! A counting global allocator wraps the system one; the benchmark learner step
//! (`mnemon_nets::bench::learner`, the work of the PyTorch reference) runs for 4 and
//! for 8 timed steps after its 5 warm-up steps, and the difference is 4 steps' worth.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicU64, Ordering};

struct Counting;

static ALLOCS: AtomicU64 = AtomicU64::new(0);
static BYTES: AtomicU64 = AtomicU64::new(0);

// SAFETY: forwards every call to the system allocator unchanged; only counts.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        ALLOCS.fetch_add(1, Ordering::Relaxed);
        BYTES.fetch_add(layout.size() as u64, Ordering::Relaxed);
        System.alloc(layout)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        System.dealloc(ptr, layout)
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        ALLOCS.fetch_add(1, Ordering::Relaxed);
        BYTES.fetch_add(layout.size() as u64, Ordering::Relaxed);
        System.alloc_zeroed(layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        ALLOCS.fetch_add(1, Ordering::Relaxed);
        BYTES.fetch_add(new_size as u64, Ordering::Relaxed);
        System.realloc(ptr, layout, new_size)
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

fn count(iters: usize, with_target: bool) -> (u64, u64) {
    let (a0, b0) = (ALLOCS.load(Ordering::SeqCst), BYTES.load(Ordering::SeqCst));
    let size = mnemon_nets::bench::LearnerSize {
        batch: 8,
        hidden: 32,
        ..Default::default()
    };
    mnemon_nets::bench::learner(size, with_target, iters).expect("learner step runs");
    (
        ALLOCS.load(Ordering::SeqCst) - a0,
        BYTES.load(Ordering::SeqCst) - b0,
    )
}

#[test]
fn a_learner_step_allocates_a_fixed_number_of_buffers() {
    // One thread inside the tensor libraries, as the binary sets up (threads.rs): a
    // work-stealing pool may split work, and so allocate, differently on each call.
    std::env::set_var("RAYON_NUM_THREADS", "1");
    std::env::set_var("CANDLE_NUM_THREADS", "1");
    for with_target in [false, true] {
        // The first call also pays one-time set-up (lazy statics, thread locals).
        count(1, with_target);
        let (a4, b4) = count(4, with_target);
        let (a8, b8) = count(8, with_target);
        let (a12, b12) = count(12, with_target);
        let per_step = (a8 - a4) as f64 / 4.0;
        let per_step_later = (a12 - a8) as f64 / 4.0;
        let bytes_per_step = (b8 - b4) as f64 / 4.0;
        println!(
            "target network {with_target}: {per_step} allocations, {:.0} KiB per learner step",
            bytes_per_step / 1024.0
        );
        // The same count for steps 5-8 and 9-12: nothing grows with the step count.
        assert_eq!(per_step, per_step_later, "allocations per step grew");
        assert_eq!((b8 - b4), (b12 - b8), "bytes allocated per step grew");
        // A fixed bound on buffers per step (tensors of the graph and its gradients).
        assert!(
            per_step <= 1000.0,
            "{per_step} allocations per learner step"
        );
    }
}
