//! Ctrl-C through the binary: SIGINT during `mnemon train` stops after the current
//! round with a final checkpoint and an end record, exits 130 (README, "Exit codes"),
//! and `--resume` goes on from there.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn mnemon() -> Command {
    Command::new(env!("CARGO_BIN_EXE_mnemon"))
}

fn spec_path() -> String {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../specs/tmaze-none.toml")
        .display()
        .to_string()
}

fn checkpoints(run: &Path) -> Vec<PathBuf> {
    let mut v: Vec<_> = std::fs::read_dir(run.join("checkpoints"))
        .map(|d| d.filter_map(|e| e.ok()).map(|e| e.path()).collect())
        .unwrap_or_default();
    v.retain(|p| p.extension().is_some_and(|e| e == "safetensors"));
    v.sort();
    v
}

fn steps_of(ckpt: &Path) -> u64 {
    ckpt.file_stem()
        .unwrap()
        .to_string_lossy()
        .trim_start_matches("step-")
        .parse()
        .unwrap()
}

fn records(run: &Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(run.join("metrics.jsonl"))
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

#[test]
fn ctrl_c_saves_a_final_checkpoint_exits_130_and_resumes() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().display().to_string();
    let mut child = mnemon()
        .args(["train", &spec_path(), "--quiet"])
        .args(["--set", &format!("run.out=\"{out}\"")])
        .args(["--set", "run.checkpoint_every=2k", "--set", "run.budget=1M"])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let run = tmp.path().join("tmaze-none").join("seed1-001");
    let started = Instant::now();
    while checkpoints(&run).is_empty() {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "no checkpoint appeared"
        );
        assert!(child.try_wait().unwrap().is_none(), "training exited early");
        std::thread::sleep(Duration::from_millis(20));
    }
    let pid = i32::try_from(child.id()).unwrap();
    // SAFETY: kill(2) on our own child's pid; no memory is involved.
    assert_eq!(unsafe { libc::kill(pid, libc::SIGINT) }, 0);
    let output = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(130), "{stderr}");

    // The last record is the end record of an interrupt, at the final checkpoint's step.
    let recs = records(&run);
    let end = recs.last().unwrap();
    assert_eq!(end["kind"], "end", "{end}");
    assert_eq!(end["stopped_by"], "interrupt");
    let last = checkpoints(&run).pop().unwrap();
    let stopped_at = end["env_steps"].as_u64().unwrap();
    assert_eq!(steps_of(&last), stopped_at, "final checkpoint at the stop");

    // --resume goes on from the interrupt to a budget above it and exits 0.
    let budget = stopped_at + 3000;
    let resumed = mnemon()
        .args(["train", "--quiet", "--resume"])
        .arg(&run)
        .args(["--set", &format!("run.budget={budget}")])
        .output()
        .unwrap();
    assert!(
        resumed.status.success(),
        "{}",
        String::from_utf8_lossy(&resumed.stderr)
    );
    let recs = records(&run);
    let end = recs.last().unwrap();
    assert_eq!(end["stopped_by"], "budget", "{end}");
    assert!(end["env_steps"].as_u64().unwrap() >= budget);
    let first_after = recs
        .iter()
        .position(|r| r["kind"] == "end")
        .map(|i| &recs[i + 1])
        .unwrap();
    assert!(
        first_after["env_steps"].as_u64().unwrap() > stopped_at,
        "counters continue from the interrupt: {first_after}"
    );
}
