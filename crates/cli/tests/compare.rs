//! `mnemon compare` end to end through the binary: a small comparison trains, reports
//! and plots; a second call reuses the finished runs; `--from` rebuilds the report;
//! bad input (empty folders, mixed tasks, truncated metrics, missing checkpoints,
//! an existing report) gives a clear message or a warning naming the file.

use std::path::Path;
use std::process::{Command, Output};

fn mnemon() -> Command {
    Command::new(env!("CARGO_BIN_EXE_mnemon"))
}

/// A T-maze comparison small enough for CI: L = 4, 2 variants x 2 seeds, 4k env steps.
fn write_spec(dir: &Path) -> std::path::PathBuf {
    let spec = dir.join("small-compare.toml");
    std::fs::write(
        &spec,
        r#"name = "small-compare"
[task]
kind = "tmaze"
length = 4
[agent]
torso = { kind = "mlp", layers = [16] }
memory = { kind = "lstm", size = 16 }
[acting]
lanes = 8
round = 160
[replay]
sequence = 12
overlap = 6
burn_in = 3
[learn]
warmup = 500
replay_ratio = 4
[run]
budget = 4000
checkpoint_every = 0
eval = { every = 1000, episodes = 20 }
[vary]
"agent.memory" = [{ kind = "lstm", size = 16 }, { kind = "none" }]
seeds = [1, 2]
"#,
    )
    .unwrap();
    spec
}

fn run(cmd: &mut Command) -> (Output, String, String) {
    let out = cmd.output().unwrap();
    let so = String::from_utf8_lossy(&out.stdout).into_owned();
    let se = String::from_utf8_lossy(&out.stderr).into_owned();
    (out, so, se)
}

#[test]
fn a_comparison_trains_reports_plots_and_resumes() {
    let tmp = tempfile::tempdir().unwrap();
    let spec = write_spec(tmp.path());
    let out = tmp.path().join("cmp");
    let (o, stdout, stderr) = run(mnemon()
        .args(["compare", spec.to_str().unwrap(), "--out"])
        .arg(&out)
        .args(["--episodes", "40"]));
    assert!(o.status.success(), "{stderr}");
    assert!(
        stderr.contains("0 finished already, 4 to train"),
        "{stderr}"
    );
    for f in [
        "plan.json",
        "report.md",
        "report.json",
        "curves.svg",
        "curves.png",
        "scores.svg",
        "scores.png",
    ] {
        assert!(out.join(f).is_file(), "{f} missing");
    }
    assert!(stdout.contains("agent.memory=lstm") && stdout.contains("agent.memory=none"));
    let report: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("report.json")).unwrap()).unwrap();
    let rows = report["rows"].as_array().expect("rows");
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[0]["variant"], "agent.memory=lstm");
    assert_eq!(rows[0]["n"], 2);
    let md = std::fs::read_to_string(out.join("report.md")).unwrap();
    assert!(md.contains("agent.memory=none"), "{md}");

    // Again: every run is found finished and reused (no training, metrics untouched).
    let metrics = out.join("runs/agent.memory-lstm/seed1/metrics.jsonl");
    let before = std::fs::read(&metrics).unwrap();
    let (o, _, stderr) = run(mnemon()
        .args(["compare", spec.to_str().unwrap(), "--out"])
        .arg(&out)
        .args(["--episodes", "40", "--json"]));
    assert!(o.status.success(), "{stderr}");
    assert_eq!(std::fs::read(&metrics).unwrap(), before);

    // The same folder with a changed spec is refused without --force.
    let (o, _, stderr) = run(mnemon()
        .args(["compare", spec.to_str().unwrap(), "--out"])
        .arg(&out)
        .args(["--set", "learn.batch=16"]));
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr.contains("different spec") && stderr.contains("--force"),
        "{stderr}"
    );

    // --from the runs folder: variants by folder; a truncated metrics line warns with
    // the file's name; a run without checkpoint is skipped with a warning.
    let none1 = out.join("runs/agent.memory-none/seed1");
    let mut m = std::fs::read(none1.join("metrics.jsonl")).unwrap();
    m.extend_from_slice(b"{\"kind\": \"eval\", \"env_st");
    std::fs::write(none1.join("metrics.jsonl"), m).unwrap();
    let none2 = out.join("runs/agent.memory-none/seed2");
    std::fs::remove_dir_all(none2.join("checkpoints")).unwrap();
    let from_out = tmp.path().join("again");
    let (o, stdout, stderr) = run(mnemon()
        .args(["compare", "--from"])
        .arg(out.join("runs"))
        .arg("--out")
        .arg(&from_out));
    assert!(o.status.success(), "{stderr}");
    assert!(
        stderr.contains("seed1/metrics.jsonl") && stderr.contains("skipped"),
        "{stderr}"
    );
    assert!(stderr.contains("seed2: no checkpoint"), "{stderr}");
    assert!(stdout.contains("agent.memory-none"), "{stdout}");

    // An existing report is not overwritten without --force.
    let (o, _, stderr) = run(mnemon()
        .args(["compare", "--from"])
        .arg(out.join("runs"))
        .arg("--out")
        .arg(&from_out));
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr.contains("--force"), "{stderr}");
}

#[test]
fn bad_folders_and_arguments_are_clear_errors() {
    let tmp = tempfile::tempdir().unwrap();
    let (o, _, stderr) = run(mnemon().args(["compare", "--from"]).arg(tmp.path()));
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr.contains("no runs found"), "{stderr}");

    let spec = write_spec(tmp.path());
    for (args, phrase) in [
        (vec!["--seeds", "5..1"], "--seeds 5..1"),
        (vec!["--vary", "replay.burn_in"], "expected KEY=V1,V2"),
        (vec!["--vary", "replay.burnin=1,2"], "burn_in"),
        (vec!["--threshold", "speed=3"], "--threshold"),
    ] {
        // Arguments are checked before any training: nothing is made.
        let (o, _, stderr) = run(mnemon()
            .args(["compare", spec.to_str().unwrap(), "--out"])
            .arg(tmp.path().join("x"))
            .args(&args));
        assert_eq!(o.status.code(), Some(2), "{args:?}: {stderr}");
        assert!(stderr.contains(phrase), "{args:?}: {stderr}");
        assert!(
            !tmp.path().join("x/runs").exists(),
            "{args:?}: trained before refusing"
        );
    }
}

#[test]
fn runs_of_different_tasks_do_not_mix_in_one_table() {
    let tmp = tempfile::tempdir().unwrap();
    let spec = write_spec(tmp.path());
    let out = tmp.path().join("cmp");
    let (o, _, stderr) = run(mnemon()
        .args(["compare", spec.to_str().unwrap(), "--out"])
        .arg(&out)
        .args(["--vary", "task.length=4,5", "--seeds", "1", "--quiet"])
        .args(["--set", "run.budget=600", "--set", "learn.warmup=200"]));
    assert_eq!(o.status.code(), Some(2), "{stderr}");
    assert!(stderr.contains("different tasks"), "{stderr}");
    assert!(!out.join("runs").exists(), "nothing trained");
}
