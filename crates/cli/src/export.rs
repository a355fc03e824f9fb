//! `mnemon export CHECKPOINT_OR_RUN_DIR --out policy.onnx`: the acting network as one
//! ONNX graph of a single time step, for use outside mnemon (see `mnemon_export`).

use std::path::PathBuf;

use clap::Args;
use mnemon_export::{export_onnx, PolicySource};

use crate::Failure;

/// Options of `mnemon export`.
#[derive(Args)]
pub struct ExportArgs {
    /// A checkpoint file, or a run folder (its latest checkpoint is used).
    target: PathBuf,
    /// Where to write the ONNX model (written atomically).
    #[arg(long, short)]
    out: PathBuf,
    /// Print one JSON object instead of text.
    #[arg(long)]
    json: bool,
}

/// Runs `mnemon export`.
pub fn run_export(args: ExportArgs) -> Result<(), Failure> {
    let ckpt = crate::train::checkpoint_of(&args.target, "mnemon export")?;
    let source =
        PolicySource::load(&ckpt).map_err(|e| Failure::BadInput(format!("mnemon export: {e}")))?;
    let bytes = export_onnx(&source, &args.out).map_err(|e| {
        Failure::BadInput(format!(
            "mnemon export: cannot write {}: {e}",
            args.out.display()
        ))
    })?;
    let face = &source.face;
    let state = 2 * match source.spec.agent.memory {
        mnemon_spec::Memory::Lstm { size } => size,
        mnemon_spec::Memory::None => 0,
    };
    let mut inputs = vec!["obs"];
    if state > 0 && source.spec.agent.previous_action_reward {
        inputs.extend(["prev_action", "prev_reward"]);
    }
    if state > 0 {
        inputs.push("state");
    }
    let outputs = if state > 0 {
        vec!["q", "state_out"]
    } else {
        vec!["q"]
    };
    if args.json {
        println!(
            "{}",
            serde_json::json!({
                "checkpoint": ckpt,
                "out": args.out,
                "bytes": bytes,
                "task": face.kind,
                "observation": face.obs.describe(),
                "actions": face.actions,
                "state_size": state,
                "inputs": inputs,
                "outputs": outputs,
                "parameters": source.params.count(),
            })
        );
    } else {
        println!("checkpoint   {}", ckpt.display());
        println!("wrote        {} ({bytes} bytes)", args.out.display());
        println!(
            "task         {} ({} env steps)",
            face.kind, source.env_steps
        );
        println!("observation  {}", face.obs.describe());
        println!("actions      {}", face.actions.join(", "));
        println!("inputs       {}", inputs.join(", "));
        println!(
            "outputs      {} (greedy action = argmax of q)",
            outputs.join(", ")
        );
        if state > 0 {
            println!(
                "state        [batch, {state}]: h then c; zeros at an episode start; prev_action -1 at an episode start"
            );
        }
    }
    Ok(())
}
