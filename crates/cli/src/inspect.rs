//! `mnemon inspect CHECKPOINT`: the spec, counters and tensor table of a checkpoint, as
//! text or (`--json`) as one JSON object for scripts.

use std::path::PathBuf;

use clap::Args;
use mnemon_nets::checkpoint;

use crate::Failure;

/// Options of `mnemon inspect`.
#[derive(Args)]
pub struct InspectArgs {
    /// A checkpoint file (`.safetensors`) written by mnemon.
    checkpoint: PathBuf,
    /// Print one JSON object instead of text.
    #[arg(long)]
    json: bool,
}

/// Runs `mnemon inspect`.
pub fn run_inspect(args: InspectArgs) -> Result<(), Failure> {
    let loaded = checkpoint::load(&args.checkpoint)
        .map_err(|e| Failure::BadInput(format!("mnemon inspect: {e}")))?;
    let total: usize = loaded.tensors.iter().map(|t| t.count()).sum();
    if args.json {
        let tensors: Vec<_> = loaded
            .tensors
            .iter()
            .map(|t| serde_json::json!({"name": t.name, "shape": t.shape, "dtype": t.dtype, "count": t.count()}))
            .collect();
        let out = serde_json::json!({
            "file": args.checkpoint.display().to_string(),
            "mnemon_version": loaded.mnemon_version,
            "format_version": checkpoint::FORMAT_VERSION,
            "env_steps": loaded.meta.env_steps,
            "learner_steps": loaded.meta.learner_steps,
            "has_target": loaded.target.is_some(),
            "has_optimizer": loaded.optimizer.is_some(),
            "optimizer_steps": loaded.optimizer.as_ref().map(|o| o.t),
            "extra": loaded.meta.extra,
            "parameters": loaded.online.count(),
            "scalars": total,
            "tensors": tensors,
            "spec": loaded.meta.spec_toml,
        });
        println!("{out}");
        return Ok(());
    }
    println!("checkpoint  {}", args.checkpoint.display());
    println!(
        "written by  mnemon {} (format {})",
        loaded.mnemon_version,
        checkpoint::FORMAT_VERSION
    );
    println!("env steps   {}", loaded.meta.env_steps);
    println!("learner     {} steps", loaded.meta.learner_steps);
    println!(
        "contents    online network ({} parameters){}{}",
        loaded.online.count(),
        if loaded.target.is_some() {
            ", target network"
        } else {
            ""
        },
        match &loaded.optimizer {
            Some(o) => format!(", Adam state after {} steps", o.t),
            None => String::new(),
        }
    );
    for (k, v) in &loaded.meta.extra {
        println!("{k:<11} {v}");
    }
    let width = loaded
        .tensors
        .iter()
        .map(|t| t.name.len())
        .max()
        .unwrap_or(4)
        .max(4);
    println!();
    println!(
        "{:<width$}  {:<14}  {:<5}  {:>10}",
        "name", "shape", "dtype", "count"
    );
    for t in &loaded.tensors {
        let shape = format!("{:?}", t.shape);
        println!(
            "{:<width$}  {:<14}  {:<5}  {:>10}",
            t.name,
            shape,
            t.dtype,
            t.count()
        );
    }
    println!("{:<width$}  {:<14}  {:<5}  {:>10}", "total", "", "", total);
    println!();
    println!("spec:");
    for line in loaded.meta.spec_toml.lines() {
        println!("  {line}");
    }
    Ok(())
}
