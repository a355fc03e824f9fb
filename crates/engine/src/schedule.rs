//! Several trainings at once (`mnemon compare`): a pool of `parallel` worker threads
//! takes the unfinished runs in order, each trained (or resumed) in its own folder.
//! Finished runs are left as they are, so calling it again after an interrupt goes on
//! where it stopped.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

use mnemon_spec::Spec;

use crate::error::{Error, Result};
use crate::rundir::{run_state, RunState};
use crate::train::{train, Observer, Summary, TrainOptions};

/// One run of a schedule: a spec trained in its own folder.
#[derive(Debug, Clone)]
pub struct Job {
    /// The run's folder (created, resumed or reused).
    pub dir: PathBuf,
    /// The resolved spec.
    pub spec: Spec,
    /// The spec as resolved TOML (what the folder's `spec.toml` must hold).
    pub spec_toml: String,
}

/// What the caller hears about the runs while they go on (the binary draws bars).
pub trait Watch: Sync {
    /// Run `job` starts (or resumes): the observer of its progress.
    fn started(&self, job: usize) -> Box<dyn Observer + '_>;
    /// Run `job` ended (an interrupted run ends with `StopReason::Interrupt`).
    fn finished(&self, job: usize, result: &Result<Summary>);
}

/// How a schedule ended.
#[derive(Debug, Default)]
pub struct Outcome {
    /// Runs finished for good (by budget or target), those found finished included.
    pub finished: usize,
    /// Runs that failed, by job index, in the order they failed.
    pub failures: Vec<(usize, Error)>,
}

/// Trainings that fit the machine at once: cores / (actors + 1) of the largest spec,
/// at least one, so the threads of all runs never oversubscribe the cores.
pub fn default_parallel(jobs: &[Job]) -> usize {
    let cores = std::thread::available_parallelism().map_or(2, |n| n.get());
    let per_run = jobs
        .iter()
        .map(|j| j.spec.acting.actors + 1)
        .max()
        .unwrap_or(2);
    (cores / per_run).max(1)
}

/// Where each job's folder stands (new, finished, or to be resumed).
pub fn states(jobs: &[Job]) -> Vec<RunState> {
    jobs.iter().map(|j| run_state(&j.dir)).collect()
}

/// Trains every job of `states` (see [`states`]) that is not finished, `parallel` at a
/// time, until all are done or `stop` is set (runs then stop with a final checkpoint and
/// no new run starts). A job's failure does not stop the others.
pub fn train_all(
    jobs: &[Job],
    states: &[RunState],
    parallel: usize,
    stop: &Arc<AtomicBool>,
    watch: &dyn Watch,
) -> Outcome {
    let todo: Vec<usize> = (0..jobs.len())
        .filter(|&i| states[i] != RunState::Done)
        .collect();
    let next = AtomicUsize::new(0);
    let finished = AtomicUsize::new(jobs.len() - todo.len());
    let failures = Mutex::new(Vec::new());
    std::thread::scope(|scope| {
        for _ in 0..parallel.max(1).min(todo.len()) {
            scope.spawn(|| loop {
                if stop.load(Ordering::SeqCst) {
                    break;
                }
                let Some(&i) = todo.get(next.fetch_add(1, Ordering::SeqCst)) else {
                    break;
                };
                let result = train_job(&jobs[i], states[i], stop, watch, i);
                watch.finished(i, &result);
                match result {
                    Ok(s) if s.stopped_by.is_final() => {
                        finished.fetch_add(1, Ordering::SeqCst);
                    }
                    Ok(_) => {}
                    Err(e) => failures.lock().expect("no panics while held").push((i, e)),
                }
            });
        }
    });
    Outcome {
        finished: finished.into_inner(),
        failures: failures.into_inner().expect("no panics while held"),
    }
}

/// Trains one job: resumes an unfinished folder, starts a new one afresh.
fn train_job(
    job: &Job,
    state: RunState,
    stop: &Arc<AtomicBool>,
    watch: &dyn Watch,
    i: usize,
) -> Result<Summary> {
    let resume = state == RunState::Unfinished;
    if !resume && job.dir.exists() {
        // A folder with a spec but no checkpoint holds nothing to keep.
        std::fs::remove_dir_all(&job.dir).map_err(|e| Error::io(&job.dir, e))?;
    }
    if let Some(parent) = job.dir.parent() {
        std::fs::create_dir_all(parent).map_err(|e| Error::io(parent, e))?;
    }
    let options = TrainOptions {
        resume: resume.then(|| job.dir.clone()),
        stop: stop.clone(),
        spec_toml: job.spec_toml.clone(),
        run_dir: (!resume).then(|| job.dir.clone()),
    };
    let mut observer = watch.started(i);
    train(&job.spec, options, observer.as_mut())
}
