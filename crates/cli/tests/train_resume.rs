//! End to end through the binary: stopping a run and resuming it. A run killed with
//! SIGKILL mid-run resumes from its last checkpoint (counters continue, the metrics stay
//! valid JSON lines, every checkpoint loads); Ctrl-C (SIGINT) stops after the current
//! round with a final checkpoint and an end record, exits 130 (README, "Exit codes") and
//! resumes; a run that used its budget is refused until the budget grows.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
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

/// Starts a long run (budget 1M, a checkpoint every 2k env steps) under `out` and waits
/// until it has written `n` checkpoints; returns the process and its run folder.
fn long_run_with_checkpoints(out: &Path, n: usize) -> (Child, PathBuf) {
    let mut child = mnemon()
        .args(["train", &spec_path(), "--quiet"])
        .args(["--set", &format!("run.out=\"{}\"", out.display())])
        .args(["--set", "run.checkpoint_every=2k", "--set", "run.budget=1M"])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let run = out.join("tmaze-none").join("seed1-001");
    let started = Instant::now();
    while checkpoints(&run).len() < n {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "no checkpoints appeared"
        );
        if let Some(status) = child.try_wait().unwrap() {
            let mut err = String::new();
            use std::io::Read;
            child
                .stderr
                .take()
                .unwrap()
                .read_to_string(&mut err)
                .unwrap();
            panic!("training exited early ({status}): {err}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    (child, run)
}

/// Trains to the end of a short budget (`--set run.budget=...` in `budget`) under `out`
/// and returns the run folder.
fn finished_run(out: &Path, budget: &str) -> PathBuf {
    let done = mnemon()
        .args(["train", &spec_path(), "--quiet"])
        .args(["--set", &format!("run.out=\"{}\"", out.display())])
        .args(["--set", budget, "--set", "learn.warmup=500"])
        .output()
        .unwrap();
    assert!(
        done.status.success(),
        "{}",
        String::from_utf8_lossy(&done.stderr)
    );
    out.join("tmaze-none/seed1-001")
}

#[test]
fn a_killed_run_resumes_from_its_last_checkpoint() {
    let tmp = tempfile::tempdir().unwrap();
    let (mut child, run) = long_run_with_checkpoints(tmp.path(), 3);
    // SIGKILL at an arbitrary moment after the third checkpoint.
    std::thread::sleep(Duration::from_millis(137));
    child.kill().unwrap();
    child.wait().unwrap();
    let before = checkpoints(&run);
    let last_steps = steps_of(before.last().unwrap());

    let status = mnemon()
        .args(["train", "--resume", run.to_str().unwrap(), "--quiet"])
        .args(["--set", &format!("run.budget={}", last_steps + 4000)])
        .status()
        .unwrap();
    assert!(status.success());

    let text = std::fs::read_to_string(run.join("metrics.jsonl")).unwrap();
    let mut steps = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let v: serde_json::Value = serde_json::from_str(line)
            .unwrap_or_else(|e| panic!("metrics line {} is not JSON ({e}): {line}", i + 1));
        steps.push(v["env_steps"].as_u64().unwrap());
    }
    let end = steps.last().copied().unwrap();
    assert!(
        end >= last_steps + 4000,
        "resumed run ended at {end}, before the new budget"
    );
    // Counters continue from the checkpoint: no record after the resume goes below it.
    let resume_at = steps.iter().rposition(|&s| s <= last_steps + 400).unwrap();
    assert!(steps[resume_at..].windows(2).all(|w| w[0] <= w[1]));
    for ckpt in checkpoints(&run) {
        let st = mnemon()
            .args(["eval", ckpt.to_str().unwrap(), "--episodes", "4", "--json"])
            .output()
            .unwrap();
        assert!(
            st.status.success(),
            "{}: {}",
            ckpt.display(),
            String::from_utf8_lossy(&st.stderr)
        );
    }
}

#[test]
fn resuming_a_run_that_used_its_budget_says_how_to_extend_it() {
    let tmp = tempfile::tempdir().unwrap();
    let run = finished_run(tmp.path(), "run.budget=3000");
    let again = mnemon()
        .args(["train", "--quiet", "--resume"])
        .arg(&run)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&again.stderr);
    assert_eq!(again.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("used its budget") && stderr.contains("run.budget"),
        "{stderr}"
    );
    let more = mnemon()
        .args(["train", "--quiet", "--resume"])
        .arg(&run)
        .args(["--set", "run.budget=5000"])
        .output()
        .unwrap();
    assert!(
        more.status.success(),
        "{}",
        String::from_utf8_lossy(&more.stderr)
    );
}

#[test]
fn resuming_a_run_that_used_its_time_budget_runs_nothing() {
    let tmp = tempfile::tempdir().unwrap();
    let run = finished_run(tmp.path(), "run.budget=\"1s\"");
    let metrics = std::fs::read_to_string(run.join("metrics.jsonl")).unwrap();
    let again = mnemon()
        .args(["train", "--quiet", "--resume"])
        .arg(&run)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&again.stderr);
    assert_eq!(again.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("used its budget") && stderr.contains("seconds"),
        "{stderr}"
    );
    assert_eq!(
        std::fs::read_to_string(run.join("metrics.jsonl")).unwrap(),
        metrics,
        "no round ran"
    );
}

#[test]
fn ctrl_c_saves_a_final_checkpoint_exits_130_and_resumes() {
    let tmp = tempfile::tempdir().unwrap();
    let (child, run) = long_run_with_checkpoints(tmp.path(), 1);
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
