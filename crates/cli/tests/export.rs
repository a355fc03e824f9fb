//! `mnemon export` through the binary: a trained run exports, and bad input (a file that
//! is not a checkpoint, a damaged checkpoint, an unwritable destination, an empty run
//! folder) is refused with a clear message and exit code 2, leaving nothing behind.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn mnemon() -> Command {
    Command::new(env!("CARGO_BIN_EXE_mnemon"))
}

fn spec_path() -> String {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../specs/tmaze-lstm.toml")
        .display()
        .to_string()
}

/// A short run (no learning needed: the export is about the file, not the policy).
fn train(out: &Path) -> PathBuf {
    let status = mnemon()
        .args(["train", &spec_path(), "--quiet"])
        .args(["--set", &format!("run.out=\"{}\"", out.display())])
        .args(["--set", "run.budget=600", "--set", "learn.warmup=200"])
        .status()
        .unwrap();
    assert!(status.success());
    out.join("tmaze-lstm").join("seed1-001")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn export(target: &Path, out: &Path) -> Output {
    mnemon()
        .args([
            "export",
            target.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .arg("--json")
        .output()
        .unwrap()
}

fn files_in(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn export_writes_a_model_and_refuses_bad_input() {
    let tmp = tempfile::tempdir().unwrap();
    let run = train(&tmp.path().join("runs"));
    let dest = tmp.path().join("out");
    std::fs::create_dir(&dest).unwrap();

    // A run folder exports its latest checkpoint.
    let model = dest.join("policy.onnx");
    let o = export(&run, &model);
    assert!(o.status.success(), "{}", stderr(&o));
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let size = std::fs::metadata(&model).unwrap().len();
    assert_eq!(report["bytes"].as_u64(), Some(size));
    assert_eq!(report["task"], "tmaze");
    assert_eq!(report["state_size"], 128);
    assert_eq!(
        report["inputs"],
        serde_json::json!(["obs", "prev_action", "prev_reward", "state"])
    );
    assert_eq!(
        report["actions"],
        serde_json::json!(["north", "east", "south", "west"])
    );
    let good = std::fs::read(&model).unwrap();

    // Not a mnemon file.
    let text = tmp.path().join("notes.safetensors");
    std::fs::write(&text, "just some text\n").unwrap();
    let o = export(&text, &model);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("not a readable safetensors file"),
        "{}",
        stderr(&o)
    );

    // A damaged checkpoint: one byte of the last tensor flipped.
    let ckpt = std::fs::read_dir(run.join("checkpoints"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|e| e == "safetensors"))
        .unwrap();
    let mut bytes = std::fs::read(&ckpt).unwrap();
    let n = bytes.len();
    bytes[n - 3] ^= 0x40;
    let damaged = tmp.path().join("damaged.safetensors");
    std::fs::write(&damaged, &bytes).unwrap();
    let o = export(&damaged, &model);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("damaged"), "{}", stderr(&o));

    // A missing file.
    let o = export(&tmp.path().join("nothing.safetensors"), &model);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));

    // An empty run folder.
    let o = export(&dest, &model);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("no checkpoint"), "{}", stderr(&o));

    // Unwritable destinations: a missing folder, and a path that is a folder.
    let o = export(&ckpt, &tmp.path().join("no/such/folder/p.onnx"));
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("cannot write"), "{}", stderr(&o));
    let folder = dest.join("a-folder");
    std::fs::create_dir(&folder).unwrap();
    let o = export(&ckpt, &folder);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("cannot write"), "{}", stderr(&o));

    // None of the failures touched the good model or left a temporary file.
    assert_eq!(std::fs::read(&model).unwrap(), good);
    assert_eq!(files_in(&dest), vec!["a-folder", "policy.onnx"]);
}
