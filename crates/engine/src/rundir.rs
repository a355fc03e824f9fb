//! Runs on disk: `runs/<name>/<run-id>/` with the resolved spec, the metrics stream and
//! checkpoints.
//!
//! ```text
//! runs/<name>/<run-id>/
//!   spec.toml            resolved spec (reproduces the run on its own)
//!   metrics.jsonl        one JSON object a line (see the README's "Metrics" section)
//!   checkpoints/step-<env steps>.safetensors   (+ its .optim / .target companions)
//! ```
//! Every whole-file write is atomic (temp file, fsync, rename). Metrics are appended one
//! complete line per write and flushed, so a run killed at any moment leaves at most a
//! partial last line, which `read_metrics` skips.

use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use mnemon_runs::{read_metrics, MetricsLog, Record};

use crate::error::{Error, Result};

pub use mnemon_runs::write_atomic;

/// An open run folder.
pub struct RunDir {
    root: PathBuf,
    metrics: MetricsLog,
}

impl RunDir {
    /// Creates `out/<name>/<run-id>` where run-id is `seed<seed>-<n>` with the first
    /// free n, and writes the resolved spec into it.
    pub fn create(out: &Path, name: &str, seed: u64, spec_toml: &str) -> Result<Self> {
        let parent = out.join(name);
        fs::create_dir_all(&parent).map_err(|e| Error::io(&parent, e))?;
        let mut n = 1;
        let root = loop {
            let candidate = parent.join(format!("seed{seed}-{n:03}"));
            match fs::create_dir(&candidate) {
                Ok(()) => break candidate,
                Err(e) if e.kind() == io::ErrorKind::AlreadyExists => n += 1,
                Err(e) => return Err(Error::io(&candidate, e)),
            }
        };
        Self::create_at(root, spec_toml)
    }

    /// Creates a run folder at exactly `root` (which must not hold a run yet).
    pub fn create_at(root: PathBuf, spec_toml: &str) -> Result<Self> {
        let ckpt = root.join("checkpoints");
        fs::create_dir_all(&ckpt).map_err(|e| Error::io(&ckpt, e))?;
        let spec_path = root.join("spec.toml");
        if spec_path.exists() {
            return Err(Error::Input(format!(
                "{} already holds a run; resume it with `mnemon train --resume {}`",
                root.display(),
                root.display()
            )));
        }
        write_atomic(&spec_path, spec_toml.as_bytes())?;
        Self::open(root)
    }

    /// Opens an existing run folder for appending (resume); a partial last metrics line
    /// (a run killed mid-write) is cut off first.
    pub fn open(root: PathBuf) -> Result<Self> {
        let metrics = MetricsLog::open(&root.join("metrics.jsonl"))?;
        Ok(RunDir { root, metrics })
    }

    /// The run's folder.
    pub fn root(&self) -> &Path {
        &self.root
    }

    /// The checkpoint folder.
    pub fn checkpoints(&self) -> PathBuf {
        self.root.join("checkpoints")
    }

    /// Path of the checkpoint at `env_steps`.
    pub fn checkpoint_path(&self, env_steps: u64) -> PathBuf {
        self.checkpoints()
            .join(format!("step-{env_steps:010}.safetensors"))
    }

    /// Appends one record to `metrics.jsonl` as one line.
    pub fn log(&mut self, record: &Record) -> Result<()> {
        Ok(self.metrics.append(record)?)
    }
}

/// The newest checkpoint in a run folder (by env steps in the name), if any.
pub fn latest_checkpoint(run: &Path) -> Option<PathBuf> {
    let mut found: Vec<(u64, PathBuf)> = fs::read_dir(run.join("checkpoints"))
        .ok()?
        .filter_map(|e| e.ok())
        .filter_map(|e| {
            let name = e.file_name().to_string_lossy().into_owned();
            let steps = name
                .strip_prefix("step-")?
                .strip_suffix(".safetensors")?
                .parse::<u64>()
                .ok()?;
            Some((steps, e.path()))
        })
        .collect();
    found.sort();
    found.pop().map(|(_, p)| p)
}

/// Where a run folder stands on disk.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RunState {
    /// No run yet: no spec, or no checkpoint to go on from.
    New,
    /// Finished (its last record says it stopped by budget or target).
    Done,
    /// Has a checkpoint but did not finish (killed or interrupted): resume it.
    Unfinished,
}

/// Where the run folder `dir` stands: new, finished, or to be resumed.
pub fn run_state(dir: &Path) -> RunState {
    if !dir.join("spec.toml").exists() || latest_checkpoint(dir).is_none() {
        return RunState::New;
    }
    let stopped = read_metrics(&dir.join("metrics.jsonl"))
        .ok()
        .and_then(|m| m.stopped_by());
    match stopped {
        Some(reason) if reason.is_final() => RunState::Done,
        _ => RunState::Unfinished,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use mnemon_runs::StopReason;

    fn end(reason: StopReason) -> Record {
        Record::End(mnemon_runs::EndRecord {
            env_steps: 10,
            learner_steps: 1,
            wall_seconds: 1.0,
            stopped_by: reason,
            target_reached_at: None,
            phases: Default::default(),
        })
    }

    #[test]
    fn run_ids_do_not_collide_and_states_follow_the_last_record() {
        let tmp = tempfile::tempdir().unwrap();
        let a = RunDir::create(tmp.path(), "t", 3, "name = \"t\"\n").unwrap();
        let b = RunDir::create(tmp.path(), "t", 3, "name = \"t\"\n").unwrap();
        assert_ne!(a.root(), b.root());
        let root = a.root().to_path_buf();
        drop(a);
        assert_eq!(run_state(&root), RunState::New, "no checkpoint yet");
        write_atomic(
            &RunDir::open(root.clone()).unwrap().checkpoint_path(10),
            b"x",
        )
        .unwrap();
        assert_eq!(
            run_state(&root),
            RunState::Unfinished,
            "killed: no end record"
        );
        let mut r = RunDir::open(root.clone()).unwrap();
        r.log(&end(StopReason::Interrupt)).unwrap();
        assert_eq!(run_state(&root), RunState::Unfinished);
        r.log(&Record::Train(Default::default())).unwrap();
        r.log(&end(StopReason::Target)).unwrap();
        assert_eq!(run_state(&root), RunState::Done);
        r.log(&Record::Train(Default::default())).unwrap();
        assert_eq!(
            run_state(&root),
            RunState::Unfinished,
            "resumed after its end"
        );
    }

    #[test]
    fn latest_checkpoint_orders_by_steps() {
        let tmp = tempfile::tempdir().unwrap();
        let r = RunDir::create(tmp.path(), "t", 1, "").unwrap();
        for s in [900u64, 10_000, 2_000] {
            write_atomic(&r.checkpoint_path(s), b"x").unwrap();
        }
        let last = latest_checkpoint(r.root()).unwrap();
        assert!(last.ends_with("step-0000010000.safetensors"), "{last:?}");
    }

    #[test]
    fn creating_over_an_existing_run_is_refused() {
        let tmp = tempfile::tempdir().unwrap();
        let r = RunDir::create(tmp.path(), "t", 1, "").unwrap();
        let root = r.root().to_path_buf();
        drop(r);
        assert!(matches!(RunDir::create_at(root, ""), Err(Error::Input(_))));
    }
}
