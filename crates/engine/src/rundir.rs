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

use std::fs::{self, File, OpenOptions};
use std::io::{self, BufRead, BufReader, Write};
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

/// Writes `bytes` to `path` atomically (temp file, fsync, rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> io::Result<()> {
    mnemon_nets::checkpoint::write_atomic(path, bytes).map_err(|e| io::Error::other(e.to_string()))
}

/// An open run folder.
pub struct RunDir {
    root: PathBuf,
    metrics: File,
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
        write_atomic(&spec_path, spec_toml.as_bytes()).map_err(|e| Error::io(&spec_path, e))?;
        Self::open(root)
    }

    /// Opens an existing run folder for appending (resume).
    pub fn open(root: PathBuf) -> Result<Self> {
        let path = root.join("metrics.jsonl");
        // A run killed mid-line leaves a partial last line: cut it off before appending
        // so the file stays valid JSON lines.
        if let Ok(text) = fs::read(&path) {
            if !text.is_empty() && text.last() != Some(&b'\n') {
                let keep = text.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
                let f = OpenOptions::new()
                    .write(true)
                    .open(&path)
                    .map_err(|e| Error::io(&path, e))?;
                f.set_len(keep as u64).map_err(|e| Error::io(&path, e))?;
            }
        }
        let metrics = OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(|e| Error::io(&path, e))?;
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

    /// Appends one metrics record (a JSON object) as one line.
    pub fn log(&mut self, record: &serde_json::Value) -> Result<()> {
        let mut line = serde_json::to_string(record).map_err(|e| Error::Internal(e.to_string()))?;
        line.push('\n');
        let path = self.root.join("metrics.jsonl");
        self.metrics
            .write_all(line.as_bytes())
            .and_then(|_| self.metrics.flush())
            .map_err(|e| Error::io(&path, e))
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

/// Reads a metrics file, skipping (and counting) lines that are not JSON objects, such
/// as the partial last line of a killed run.
pub fn read_metrics(path: &Path) -> Result<(Vec<serde_json::Value>, usize)> {
    let f = File::open(path).map_err(|e| Error::io(path, e))?;
    let mut good = Vec::new();
    let mut bad = 0;
    for line in BufReader::new(f).lines() {
        let line = line.map_err(|e| Error::io(path, e))?;
        if line.trim().is_empty() {
            continue;
        }
        match serde_json::from_str::<serde_json::Value>(&line) {
            Ok(v) if v.is_object() => good.push(v),
            _ => bad += 1,
        }
    }
    Ok((good, bad))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn run_ids_do_not_collide_and_metrics_survive_a_partial_line() {
        let tmp = tempfile::tempdir().unwrap();
        let a = RunDir::create(tmp.path(), "t", 3, "name = \"t\"\n").unwrap();
        let b = RunDir::create(tmp.path(), "t", 3, "name = \"t\"\n").unwrap();
        assert_ne!(a.root(), b.root());
        let root = a.root().to_path_buf();
        drop(a);
        let mut r = RunDir::open(root.clone()).unwrap();
        r.log(&serde_json::json!({"env_steps": 1})).unwrap();
        drop(r);
        // Simulate a kill mid-write.
        let mut f = OpenOptions::new()
            .append(true)
            .open(root.join("metrics.jsonl"))
            .unwrap();
        f.write_all(b"{\"env_steps\": 2, \"los").unwrap();
        drop(f);
        let (good, bad) = read_metrics(&root.join("metrics.jsonl")).unwrap();
        assert_eq!((good.len(), bad), (1, 1));
        let mut r = RunDir::open(root.clone()).unwrap();
        r.log(&serde_json::json!({"env_steps": 3})).unwrap();
        let (good, bad) = read_metrics(&root.join("metrics.jsonl")).unwrap();
        assert_eq!(
            (good.len(), bad),
            (2, 0),
            "partial line cut before appending"
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
