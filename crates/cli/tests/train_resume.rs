//! End to end through the binary: train, kill the process with SIGKILL mid-run, resume,
//! and check that counters continue, the metrics stay valid JSON lines and every
//! checkpoint loads.

use std::path::Path;
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

fn checkpoints(run: &Path) -> Vec<std::path::PathBuf> {
    let mut v: Vec<_> = std::fs::read_dir(run.join("checkpoints"))
        .map(|d| d.filter_map(|e| e.ok()).map(|e| e.path()).collect())
        .unwrap_or_default();
    v.retain(|p| p.extension().is_some_and(|e| e == "safetensors"));
    v.sort();
    v
}

#[test]
fn a_killed_run_resumes_from_its_last_checkpoint() {
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
    while checkpoints(&run).len() < 3 {
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
    // SIGKILL at an arbitrary moment after the third checkpoint.
    std::thread::sleep(Duration::from_millis(137));
    child.kill().unwrap();
    child.wait().unwrap();
    let before = checkpoints(&run);
    let last_steps: u64 = before
        .last()
        .unwrap()
        .file_stem()
        .unwrap()
        .to_string_lossy()
        .trim_start_matches("step-")
        .parse()
        .unwrap();

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
    let out = tmp.path().display().to_string();
    let done = mnemon()
        .args(["train", &spec_path(), "--quiet"])
        .args(["--set", &format!("run.out=\"{out}\"")])
        .args(["--set", "run.budget=3000", "--set", "learn.warmup=500"])
        .output()
        .unwrap();
    assert!(
        done.status.success(),
        "{}",
        String::from_utf8_lossy(&done.stderr)
    );
    let run = tmp.path().join("tmaze-none/seed1-001");
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
    let out = tmp.path().display().to_string();
    let done = mnemon()
        .args(["train", &spec_path(), "--quiet"])
        .args(["--set", &format!("run.out=\"{out}\"")])
        .args(["--set", "run.budget=\"1s\"", "--set", "learn.warmup=500"])
        .output()
        .unwrap();
    assert!(
        done.status.success(),
        "{}",
        String::from_utf8_lossy(&done.stderr)
    );
    let run = tmp.path().join("tmaze-none/seed1-001");
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
