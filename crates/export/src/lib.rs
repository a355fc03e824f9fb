//! Shipping a trained mnemon policy outside mnemon.
//!
//! - [`export_onnx`] turns a checkpoint's acting network into one ONNX graph that takes
//!   one time step (see [`graph`] for the exact math and [`graph::names`] for the inputs
//!   and outputs), with the spec, the spaces and the state layout in its metadata.
//! - [`Policy`] steps the same network from Rust: load a checkpoint, `step(obs, &mut
//!   state) -> (action, q)`, reset the state at an episode start.
//!
//! The ONNX messages are written with `prost` from the official message definitions
//! ([`onnx`]); the file is written atomically.

#![deny(missing_docs)]

pub mod error;
pub mod graph;
pub mod onnx;
pub mod policy;

use std::path::Path;

use mnemon_envs::ObsSpace;
use mnemon_spec::Memory;
use prost::Message;

pub use error::{Error, Result};
pub use policy::{Policy, PolicySource, PolicyState, TaskFace};

/// Value of the `mnemon.format` metadata key of an exported model.
pub const FORMAT: &str = "mnemon-policy-step";

/// The metadata stored in an exported model, as `(key, value)` pairs:
/// `mnemon.format`, `mnemon.version`, `mnemon.task`, `mnemon.env_steps`,
/// `mnemon.spec` (the resolved spec as TOML), `mnemon.observation` (a description),
/// `mnemon.actions` (JSON list of action names), `mnemon.state` (the state layout in
/// words) and `mnemon.policy` (the same facts as one JSON object for programs).
pub fn metadata(source: &PolicySource) -> Vec<(String, String)> {
    let face = &source.face;
    let agent = &source.spec.agent;
    let size = match agent.memory {
        Memory::Lstm { size } => size,
        Memory::None => 0,
    };
    let feeds_previous = size > 0 && agent.previous_action_reward;
    let obs_shape: Vec<usize> = match face.obs {
        ObsSpace::Image {
            channels,
            height,
            width,
        } => vec![channels, height, width],
        ref other => vec![other.len()],
    };
    let observation = match face.obs {
        ObsSpace::Image { .. } => format!(
            "{}: float32, channel-major (channels, rows, columns), each value already in [0, 1] as the task gives it; the graph applies no scaling or channel reordering",
            face.obs.describe()
        ),
        ref v => format!("{}: float32, as the task gives it", v.describe()),
    };
    let state = if size > 0 {
        format!(
            "LSTM of size {size}: `state` and `state_out` are [batch, {}], h in columns 0..{size} and c in columns {size}..{}; zeros at an episode start; feed `state_out` back as `state`",
            2 * size,
            2 * size
        )
    } else {
        "none: the policy has no memory, each step depends only on `obs`".to_string()
    };
    let mut inputs = vec!["obs".to_string()];
    if feeds_previous {
        inputs.push("prev_action".into());
        inputs.push("prev_reward".into());
    }
    if size > 0 {
        inputs.push("state".into());
    }
    let mut outputs = vec!["q".to_string()];
    if size > 0 {
        outputs.push("state_out".into());
    }
    let policy = serde_json::json!({
        "format": FORMAT,
        "mnemon_version": env!("CARGO_PKG_VERSION"),
        "task": face.kind,
        "observation_shape": obs_shape,
        "observation_kind": if matches!(face.obs, ObsSpace::Image { .. }) { "image" } else { "vector" },
        "actions": face.actions,
        "state_size": 2 * size,
        "lstm_size": size,
        "state_layout": if size > 0 { "h,c" } else { "" },
        "previous_action_reward": feeds_previous,
        "inputs": inputs,
        "outputs": outputs,
        "greedy": "argmax of q (first maximum)",
        "env_steps": source.env_steps,
    });
    vec![
        ("mnemon.format".into(), FORMAT.into()),
        ("mnemon.version".into(), env!("CARGO_PKG_VERSION").into()),
        ("mnemon.task".into(), face.kind.clone()),
        ("mnemon.env_steps".into(), source.env_steps.to_string()),
        ("mnemon.spec".into(), source.spec_toml.clone()),
        ("mnemon.observation".into(), observation),
        (
            "mnemon.actions".into(),
            serde_json::to_string(&face.actions).expect("strings serialise"),
        ),
        ("mnemon.state".into(), state),
        ("mnemon.policy".into(), policy.to_string()),
    ]
}

/// The ONNX model of one policy step.
pub fn onnx_model(source: &PolicySource) -> Result<onnx::ModelProto> {
    let graph = graph::build_graph(&source.spec.agent, source.face.net_shape(), &source.params)?;
    Ok(onnx::ModelProto {
        ir_version: graph::IR_VERSION,
        producer_name: "mnemon".into(),
        producer_version: env!("CARGO_PKG_VERSION").into(),
        domain: String::new(),
        model_version: 1,
        doc_string: format!(
            "One step of a mnemon policy trained on task {} ({} env steps). Greedy action = argmax of q.",
            source.face.kind, source.env_steps
        ),
        graph: Some(graph),
        opset_import: vec![onnx::OperatorSetIdProto {
            domain: String::new(),
            version: graph::OPSET,
        }],
        metadata_props: metadata(source)
            .into_iter()
            .map(|(key, value)| onnx::StringStringEntryProto { key, value })
            .collect(),
    })
}

/// The serialised ONNX model of one policy step.
pub fn onnx_bytes(source: &PolicySource) -> Result<Vec<u8>> {
    Ok(onnx_model(source)?.encode_to_vec())
}

/// Writes the ONNX model to `out` atomically (temp file, fsync, rename); returns its size
/// in bytes.
pub fn export_onnx(source: &PolicySource, out: &Path) -> Result<usize> {
    let bytes = onnx_bytes(source)?;
    mnemon_nets::checkpoint::write_atomic(out, &bytes)?;
    Ok(bytes.len())
}
