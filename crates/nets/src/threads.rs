//! Who uses how many cores inside `mnemon-nets`.
//!
//! The fused LSTM op runs its recurrence on a team of `threads()` threads
//! ([`run_team`]: the calling thread plus parked pool workers, started on first use),
//! split by lanes or by hidden units (see `lstm.rs`). The default is 1: the caller (the
//! learner, the benchmark) decides explicitly, so actors and the learner do not
//! oversubscribe the cores. candle's own matmuls and the large products of the affine
//! op use rayon's pool (`RAYON_NUM_THREADS`) and candle's elementwise pool
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

/// Cores this process may run on (at least 1), read once.
pub(crate) fn cores() -> usize {
    static CORES: std::sync::OnceLock<usize> = std::sync::OnceLock::new();
    *CORES.get_or_init(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
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

/// Splits `0..n` into at most `parts` contiguous ranges whose boundaries are multiples of
/// `align` (except the end), as even as that allows (none empty).
pub(crate) fn split_aligned(n: usize, parts: usize, align: usize) -> Vec<std::ops::Range<usize>> {
    let align = align.max(1);
    let blocks = n.div_ceil(align);
    split(blocks, parts)
        .into_iter()
        .map(|r| (r.start * align).min(n)..(r.end * align).min(n))
        .filter(|r| !r.is_empty())
        .collect()
}

/// A barrier for the members of one [`run_team`] call: every member's writes before
/// [`SpinBarrier::wait`] are visible to every member after it. Waiters spin briefly, then
/// yield the core (the machine may have fewer free cores than members).
pub(crate) struct SpinBarrier {
    members: usize,
    arrived: AtomicUsize,
    phase: AtomicUsize,
}

impl SpinBarrier {
    /// A barrier for `members` threads.
    pub(crate) fn new(members: usize) -> Self {
        SpinBarrier {
            members: members.max(1),
            arrived: AtomicUsize::new(0),
            phase: AtomicUsize::new(0),
        }
    }

    /// Waits until all members have called `wait` for the current phase.
    pub(crate) fn wait(&self) {
        if self.members == 1 {
            return;
        }
        let phase = self.phase.load(Ordering::Acquire);
        if self.arrived.fetch_add(1, Ordering::AcqRel) + 1 == self.members {
            // last to arrive: reset for the next phase, then release the others
            self.arrived.store(0, Ordering::Relaxed);
            self.phase.fetch_add(1, Ordering::Release);
        } else {
            let mut spins = 0u32;
            while self.phase.load(Ordering::Acquire) == phase {
                if spins < 2000 {
                    std::hint::spin_loop();
                    spins += 1;
                } else {
                    std::thread::yield_now();
                }
            }
        }
    }
}

/// One member of a [`run_team`] call, as its job sees it.
pub(crate) struct Member<'a> {
    /// 0 for the calling thread, then 1, 2, ...
    pub(crate) index: usize,
    /// Members in the team (>= 1).
    pub(crate) size: usize,
    barrier: &'a SpinBarrier,
}

impl Member<'_> {
    /// Waits until every member of the team has reached this point (see [`SpinBarrier`]).
    pub(crate) fn sync(&self) {
        self.barrier.wait();
    }
}

/// The job a team member runs.
type Job = dyn Fn(&Member<'_>) + Sync;

/// A raw pointer to the current job; only dereferenced between the job's publication
/// and the caller's wait for all members, while the job is alive on the caller's stack.
#[derive(Clone, Copy)]
struct JobPtr(*const Job);
// SAFETY: the job is `Sync`, and `run_team` keeps it alive until every member is done.
unsafe impl Send for JobPtr {}

struct Board {
    /// Bumped for every new job.
    generation: u64,
    job: Option<JobPtr>,
    size: usize,
    /// The current team's barrier, on the caller's stack (same lifetime rule as `job`).
    barrier: *const SpinBarrier,
}

// SAFETY: `barrier` follows the same rule as `JobPtr`, and `SpinBarrier` is `Sync`.
unsafe impl Send for Board {}

struct Pool {
    board: std::sync::Mutex<Board>,
    posted: std::sync::Condvar,
    /// Members still running the current job (the caller not counted).
    running: AtomicUsize,
    /// Workers started so far.
    workers: std::sync::Mutex<usize>,
}

static POOL: std::sync::OnceLock<Pool> = std::sync::OnceLock::new();
/// Held by the thread whose job the pool is running.
static TEAM_BUSY: std::sync::Mutex<()> = std::sync::Mutex::new(());

fn pool() -> &'static Pool {
    POOL.get_or_init(|| Pool {
        board: std::sync::Mutex::new(Board {
            generation: 0,
            job: None,
            size: 0,
            barrier: std::ptr::null(),
        }),
        posted: std::sync::Condvar::new(),
        running: AtomicUsize::new(0),
        workers: std::sync::Mutex::new(0),
    })
}

fn worker_loop(index: usize) {
    let pool = pool();
    let mut seen = 0u64;
    loop {
        let (job, size, barrier) = {
            let mut b = pool.board.lock().unwrap_or_else(|e| e.into_inner());
            while b.generation == seen {
                b = pool.posted.wait(b).unwrap_or_else(|e| e.into_inner());
            }
            seen = b.generation;
            (b.job, b.size, b.barrier)
        };
        if let Some(JobPtr(job)) = job {
            if index < size {
                // SAFETY: the caller of `run_team` waits for `running` to reach zero
                // before its job goes out of scope, and this member has not counted down.
                let (f, barrier) = unsafe { (&*job, &*barrier) };
                let member = Member {
                    index,
                    size,
                    barrier,
                };
                if std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| f(&member))).is_err() {
                    // the other members may be waiting for this one at a barrier
                    eprintln!("mnemon-nets: a worker thread panicked inside a fused op");
                    std::process::abort();
                }
                pool.running.fetch_sub(1, Ordering::AcqRel);
            }
        }
    }
}

/// Runs `job(member)` on `size` threads at once (the caller is member 0, the others come
/// from a pool of parked worker threads started on first use), and returns when all are
/// done. Members may synchronise with [`Member::sync`].
///
/// `size` is `wanted`, or 1 when another thread's team holds the pool at the moment
/// (the job must then do all the work as member 0 of 1). After the first call for a
/// given size this allocates nothing.
pub(crate) fn run_team(wanted: usize, job: &(dyn Fn(&Member<'_>) + Sync + '_)) {
    let guard = if wanted > 1 {
        TEAM_BUSY.try_lock().ok()
    } else {
        None
    };
    let Some(_guard) = guard else {
        let alone = SpinBarrier::new(1);
        job(&Member {
            index: 0,
            size: 1,
            barrier: &alone,
        });
        return;
    };
    let barrier = SpinBarrier::new(wanted);
    let pool = pool();
    {
        let mut started = pool.workers.lock().unwrap_or_else(|e| e.into_inner());
        while *started < wanted - 1 {
            let index = *started + 1;
            std::thread::Builder::new()
                .name(format!("mnemon-team-{index}"))
                .spawn(move || worker_loop(index))
                .expect("mnemon-nets: cannot start a worker thread");
            *started += 1;
        }
    }
    pool.running.store(wanted - 1, Ordering::Release);
    {
        let mut b = pool.board.lock().unwrap_or_else(|e| e.into_inner());
        b.generation += 1;
        // SAFETY (lifetime erasure): the pointer is only used until `running` is zero,
        // which this function waits for before returning.
        let erased: &'static Job =
            unsafe { std::mem::transmute::<&(dyn Fn(&Member<'_>) + Sync + '_), &'static Job>(job) };
        b.job = Some(JobPtr(erased));
        b.size = wanted;
        b.barrier = &barrier;
    }
    pool.posted.notify_all();
    job(&Member {
        index: 0,
        size: wanted,
        barrier: &barrier,
    });
    let mut spins = 0u32;
    while pool.running.load(Ordering::Acquire) != 0 {
        if spins < 2000 {
            std::hint::spin_loop();
            spins += 1;
        } else {
            std::thread::yield_now();
        }
    }
    let mut b = pool.board.lock().unwrap_or_else(|e| e.into_inner());
    b.job = None;
    b.barrier = std::ptr::null();
}

/// Held by the tests that run teams of several threads, so that no test's team falls
/// back to one member because another test's team holds the pool.
#[cfg(test)]
pub(crate) static TEAM_TESTS: std::sync::Mutex<()> = std::sync::Mutex::new(());

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn split_aligned_covers_the_range_on_aligned_boundaries() {
        assert_eq!(split_aligned(128, 2, 16), vec![0..64, 64..128]);
        assert_eq!(split_aligned(40, 3, 16), vec![0..16, 16..32, 32..40]);
        assert_eq!(split_aligned(8, 4, 16), vec![0..8]);
        assert_eq!(split(5, 8), vec![0..1, 1..2, 2..3, 3..4, 4..5]);
    }

    // Every member runs exactly once per call, and a write made before the barrier by
    // one member is seen after it by all the others, over many phases.
    #[test]
    fn team_members_all_run_and_the_barrier_orders_their_writes() {
        let _serial = TEAM_TESTS.lock().unwrap_or_else(|e| e.into_inner());
        for size in [1, 2, 3] {
            let slots: Vec<AtomicUsize> = (0..size).map(|_| AtomicUsize::new(0)).collect();
            let bad = AtomicUsize::new(0);
            let ran = AtomicUsize::new(0);
            let job = |m: &Member<'_>| {
                let (p, n) = (m.index, m.size);
                assert_eq!(n, size);
                ran.fetch_add(1, Ordering::Relaxed);
                for phase in 1..200 {
                    slots[p].store(phase, Ordering::Relaxed);
                    m.sync();
                    if slots.iter().any(|s| s.load(Ordering::Relaxed) != phase) {
                        bad.fetch_add(1, Ordering::Relaxed);
                    }
                    m.sync();
                }
            };
            run_team(size, &job);
            assert_eq!(ran.load(Ordering::Relaxed), size, "every member ran once");
            assert_eq!(bad.load(Ordering::Relaxed), 0, "size {size}");
        }
    }
}
