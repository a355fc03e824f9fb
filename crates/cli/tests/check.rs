//! `mnemon check` and `mnemon explain` as a user runs them: exit codes (0 ok,
//! 2 bad input), located errors on stderr, origins on stdout.

use std::path::PathBuf;
use std::process::{Command, Output};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn mnemon(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_mnemon"))
        .args(args)
        .current_dir(root())
        .env("NO_COLOR", "1")
        .output()
        .expect("run mnemon")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).to_string()
}

#[test]
fn shipped_specs_pass_check() {
    let mut args = vec!["check"];
    let files: Vec<String> = ["specs", "specs/presets"]
        .iter()
        .flat_map(|d| std::fs::read_dir(root().join(d)).unwrap())
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
        .map(|p| p.strip_prefix(root()).unwrap().display().to_string())
        .collect();
    assert!(files.len() >= 9);
    args.extend(files.iter().map(String::as_str));
    let o = mnemon(&args);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
}

#[test]
fn bad_specs_exit_2_with_every_error_located() {
    let o = mnemon(&[
        "check",
        "tests/spec_errors/typos.toml",
        "--set",
        "learn.batch=0",
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    for want in [
        "tests/spec_errors/typos.toml:6:1",
        "did you mean \"length\"?",
        "tests/spec_errors/typos.toml:9:1",
        "did you mean \"burn_in\"?",
        "tests/spec_errors/typos.toml:14:9",
        "tests/spec_errors/typos.toml:15:12",
        "--set:1:13",
        "8 errors found",
    ] {
        assert!(e.contains(want), "missing {want:?} in:\n{e}");
    }

    let o = mnemon(&["check", "tests/spec_errors/cycle_a.toml"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("tests/spec_errors/cycle_b.toml:2:11"),
        "{}",
        stderr(&o)
    );
    assert!(stderr(&o).contains("extends cycle"));

    let o = mnemon(&["check", "specs/tiger.toml", "--set", "replay.burnin=3"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("--set:1:8"), "{}", stderr(&o));

    // One good and one missing file: both reported, still exit 2.
    let o = mnemon(&["check", "specs/tiger.toml", "no/such/spec.toml"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stdout).contains("ok  specs/tiger.toml"));
    assert!(stderr(&o).contains("cannot read spec no/such/spec.toml"));

    // Usage errors are bad input too.
    assert_eq!(mnemon(&["check"]).status.code(), Some(2));
}

#[test]
fn explain_shows_origins_and_the_reference() {
    let o = mnemon(&[
        "explain",
        "crates/spec/tests/fixtures/child.toml",
        "--set",
        "replay.burn_in=12",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("[crates/spec/tests/fixtures/child.toml:2]"),
        "{out}"
    );
    assert!(
        out.contains("[preset crates/spec/tests/fixtures/preset.toml:16]"),
        "{out}"
    );
    assert!(out.contains("burn_in = 12") && out.contains("[--set replay.burn_in=12]"));
    assert!(out.contains("[default]"));

    // A shipped spec: its values name the files they come from.
    let o = mnemon(&["explain", "specs/tmaze-none.toml"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(String::from_utf8_lossy(&o.stdout).contains("[preset specs/tmaze-lstm.toml:"));

    let o = mnemon(&["explain", "--reference"]);
    assert_eq!(o.status.code(), Some(0));
    let committed = std::fs::read_to_string(root().join("docs/spec-reference.md")).unwrap();
    assert_eq!(String::from_utf8_lossy(&o.stdout), committed);

    let o = mnemon(&["explain", "tests/spec_errors/typos.toml"]);
    assert_eq!(o.status.code(), Some(2));
}
