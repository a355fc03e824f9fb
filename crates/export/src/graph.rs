//! Builds the one-step ONNX graph of a policy from its spec and parameters.
//!
//! The graph spells out exactly what [`mnemon_nets::ActorNet::step`] computes, with
//! standard opset-13 operators only (Gemm, MatMul, Add, Sub, Mul, Relu, Tanh, Sigmoid,
//! Slice, Concat, Conv, Transpose, Flatten, Reshape, ReduceMean, Equal, Cast, Identity):
//!
//! - MLP torso: `Gemm(x, W, b, transB=1)` then the spec's activation, per layer.
//! - Conv torso: the observation is `[batch, C, H, W]`; each layer is `Conv` (no padding,
//!   square kernel and stride) then `Relu`; mnemon flattens the last feature map
//!   channels-last (`[H', W', C']`), so the graph transposes to NHWC before `Flatten`,
//!   then the linear layer and `Relu`.
//! - Previous action and reward (when the spec feeds them to the memory): the action's
//!   one-hot is `Cast(Equal(prev_action[:, None], [0..A]))`, so any value outside
//!   `0..A` (e.g. -1 at an episode start) gives the all-zero row mnemon uses for "none".
//! - LSTM: `gates = (x W_ih^T + b) + h W_hh^T`, gate blocks in the order i, f, g, o
//!   (sigmoid, sigmoid, tanh, sigmoid); `c' = f c + i g`, `h' = o tanh(c')`. The state is
//!   one tensor `[batch, 2H]`: h in columns `0..H`, c in `H..2H`.
//! - Heads: value `Gemm`; dueling `V + (A - mean A)` (Wang et al. 2016); quantile: the
//!   mean over the quantiles of each action (Dabney et al. 2017), so `q` is always
//!   `[batch, actions]` and the greedy action is its argmax.

use mnemon_nets::{NetShape, ObsShape, Params};
use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};

use crate::error::{Error, Result};
use crate::onnx::*;

/// ONNX operator-set version the graph is written for.
pub const OPSET: i64 = 13;
/// IR version matching [`OPSET`] (ONNX 1.8).
pub const IR_VERSION: i64 = 7;

/// Names of the graph's inputs and outputs.
pub mod names {
    /// Observation input `[batch, *observation shape]`, float32.
    pub const OBS: &str = "obs";
    /// Recurrent state input `[batch, 2 * size]` (h then c), float32.
    pub const STATE: &str = "state";
    /// Previous action input `[batch]`, int64 (outside `0..actions` = none).
    pub const PREV_ACTION: &str = "prev_action";
    /// Previous reward input `[batch]`, float32.
    pub const PREV_REWARD: &str = "prev_reward";
    /// Per-action values `[batch, actions]`.
    pub const Q: &str = "q";
    /// Recurrent state after the step `[batch, 2 * size]`.
    pub const STATE_OUT: &str = "state_out";
}

/// Accumulates nodes and initializers, naming intermediate values `v0`, `v1`, ...
struct Builder<'a> {
    params: &'a Params,
    nodes: Vec<NodeProto>,
    inits: Vec<TensorProto>,
    next: usize,
}

fn attr_int(name: &str, i: i64) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        i,
        r#type: ATTR_INT,
        ..Default::default()
    }
}

fn attr_ints(name: &str, ints: &[i64]) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        ints: ints.to_vec(),
        r#type: ATTR_INTS,
        ..Default::default()
    }
}

fn dims(shape: &[usize]) -> Vec<i64> {
    shape.iter().map(|&d| d as i64).collect()
}

impl Builder<'_> {
    fn param(&self, name: &str) -> Result<(&[usize], &[f32])> {
        self.params
            .get(name)
            .ok_or_else(|| Error::Params(format!("no tensor named {name}")))
    }

    /// Adds a float32 constant; returns its name.
    fn constant(&mut self, name: &str, shape: &[usize], values: &[f32]) -> String {
        self.inits.push(TensorProto {
            dims: dims(shape),
            data_type: FLOAT,
            name: name.into(),
            raw_data: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        });
        name.into()
    }

    /// Adds an int64 constant; returns its name.
    fn constant_i64(&mut self, name: &str, values: &[i64]) -> String {
        self.inits.push(TensorProto {
            dims: vec![values.len() as i64],
            data_type: INT64,
            name: name.into(),
            raw_data: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        });
        name.into()
    }

    /// A parameter of the network as a constant under its own name.
    fn weight(&mut self, name: &str) -> Result<String> {
        let (shape, values) = self.param(name)?;
        let (shape, values) = (shape.to_vec(), values.to_vec());
        Ok(self.constant(name, &shape, &values))
    }

    /// Adds a node with one output; returns the output's name.
    fn node(&mut self, op: &str, inputs: &[&str], attribute: Vec<AttributeProto>) -> String {
        let out = format!("v{}", self.next);
        self.next += 1;
        self.nodes.push(NodeProto {
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: vec![out.clone()],
            name: format!("{op}_{}", self.next - 1),
            op_type: op.into(),
            attribute,
            domain: String::new(),
        });
        out
    }

    /// `x W^T + b` with the parameters `{prefix}.weight` `[out, in]`, `{prefix}.bias`.
    fn linear(&mut self, x: &str, prefix: &str) -> Result<String> {
        let w = self.weight(&format!("{prefix}.weight"))?;
        let b = self.weight(&format!("{prefix}.bias"))?;
        Ok(self.node("Gemm", &[x, &w, &b], vec![attr_int("transB", 1)]))
    }

    /// Columns `from..to` of a `[batch, n]` value.
    fn columns(&mut self, x: &str, from: usize, to: usize) -> String {
        let tag = self.next;
        let s = self.constant_i64(&format!("slice{tag}.starts"), &[from as i64]);
        let e = self.constant_i64(&format!("slice{tag}.ends"), &[to as i64]);
        let a = self.constant_i64(&format!("slice{tag}.axes"), &[1]);
        self.node("Slice", &[x, &s, &e, &a], vec![])
    }
}

fn tensor_info(name: &str, elem_type: i32, shape: &[Option<usize>], doc: &str) -> ValueInfoProto {
    ValueInfoProto {
        name: name.into(),
        r#type: Some(TypeProto {
            tensor_type: Some(TensorTypeProto {
                elem_type,
                shape: Some(TensorShapeProto {
                    dim: shape
                        .iter()
                        .map(|d| match d {
                            Some(n) => Dimension {
                                dim_value: Some(*n as i64),
                                dim_param: None,
                            },
                            None => Dimension {
                                dim_value: None,
                                dim_param: Some("batch".into()),
                            },
                        })
                        .collect(),
                }),
            }),
        }),
        doc_string: doc.into(),
    }
}

/// The graph of one policy step. `params` must hold exactly the tensors the spec's
/// network defines (checked by the caller through [`mnemon_nets::ActorNet`]).
pub fn build_graph(agent: &AgentSpec, shape: NetShape, params: &Params) -> Result<GraphProto> {
    let mut g = Builder {
        params,
        nodes: Vec::new(),
        inits: Vec::new(),
        next: 0,
    };
    let actions = shape.actions;
    let mut inputs = Vec::new();
    let obs_dims: Vec<Option<usize>> = match shape.obs {
        ObsShape::Vector(n) => vec![None, Some(n)],
        ObsShape::Image {
            channels,
            height,
            width,
        } => vec![None, Some(channels), Some(height), Some(width)],
    };
    inputs.push(tensor_info(
        names::OBS,
        FLOAT,
        &obs_dims,
        "observation of one step, as the task gives it (images channel-major C x H x W, values in [0, 1], no further scaling)",
    ));

    // Torso.
    let mut x = names::OBS.to_string();
    match &agent.torso {
        Torso::Mlp { layers, activation } => {
            if matches!(shape.obs, ObsShape::Image { .. }) {
                x = g.node("Flatten", &[&x], vec![attr_int("axis", 1)]);
            }
            for i in 0..layers.len() {
                let y = g.linear(&x, &format!("torso.{i}"))?;
                x = match activation {
                    Activation::Relu => g.node("Relu", &[&y], vec![]),
                    Activation::Tanh => g.node("Tanh", &[&y], vec![]),
                };
            }
        }
        Torso::Conv {
            kernels, strides, ..
        } => {
            if !matches!(shape.obs, ObsShape::Image { .. }) {
                return Err(Error::Params(
                    "a conv torso needs image observations".into(),
                ));
            }
            for (i, (&k, &s)) in kernels.iter().zip(strides).enumerate() {
                let w = g.weight(&format!("torso.conv{i}.weight"))?;
                let b = g.weight(&format!("torso.conv{i}.bias"))?;
                let y = g.node(
                    "Conv",
                    &[&x, &w, &b],
                    vec![
                        attr_ints("kernel_shape", &[k as i64, k as i64]),
                        attr_ints("strides", &[s as i64, s as i64]),
                    ],
                );
                x = g.node("Relu", &[&y], vec![]);
            }
            // mnemon flattens the feature map channels-last.
            let t = g.node("Transpose", &[&x], vec![attr_ints("perm", &[0, 2, 3, 1])]);
            let f = g.node("Flatten", &[&t], vec![attr_int("axis", 1)]);
            let y = g.linear(&f, "torso.out")?;
            x = g.node("Relu", &[&y], vec![]);
        }
    }

    // Memory.
    let mut outputs = Vec::new();
    let mut state_out = None;
    if let Memory::Lstm { size: h } = agent.memory {
        if agent.previous_action_reward {
            inputs.push(tensor_info(
                names::PREV_ACTION,
                INT64,
                &[None],
                "action taken before this step; -1 (any value outside 0..actions) at an episode start",
            ));
            inputs.push(tensor_info(
                names::PREV_REWARD,
                FLOAT,
                &[None],
                "reward received before this step; 0 at an episode start",
            ));
            let col = g.constant_i64("shape.column", &[-1, 1]);
            let pa = g.node("Reshape", &[names::PREV_ACTION, &col], vec![]);
            let range: Vec<i64> = (0..actions as i64).collect();
            let range = g.constant_i64("action.indices", &range);
            let eq = g.node("Equal", &[&pa, &range], vec![]);
            let one_hot = g.node("Cast", &[&eq], vec![attr_int("to", FLOAT as i64)]);
            let pr = g.node("Reshape", &[names::PREV_REWARD, &col], vec![]);
            x = g.node("Concat", &[&x, &one_hot, &pr], vec![attr_int("axis", 1)]);
        }
        inputs.push(tensor_info(
            names::STATE,
            FLOAT,
            &[None, Some(2 * h)],
            "LSTM state before this step: h in columns 0..size, c in size..2*size; zeros at an episode start",
        ));
        let h0 = g.columns(names::STATE, 0, h);
        let c0 = g.columns(names::STATE, h, 2 * h);
        let w_ih = g.weight("memory.w_ih")?;
        let b = g.weight("memory.bias")?;
        let (hs, w_hh) = g.param("memory.w_hh")?;
        if hs != [4 * h, h] {
            return Err(Error::Params(format!(
                "memory.w_hh has shape {hs:?}, expected [{}, {h}]",
                4 * h
            )));
        }
        // W_hh^T, [H, 4H], for MatMul.
        let mut wt = vec![0f32; 4 * h * h];
        for r in 0..4 * h {
            for c in 0..h {
                wt[c * 4 * h + r] = w_hh[r * h + c];
            }
        }
        let w_hh_t = g.constant("memory.w_hh.transposed", &[h, 4 * h], &wt);
        let xi = g.node("Gemm", &[&x, &w_ih, &b], vec![attr_int("transB", 1)]);
        let hh = g.node("MatMul", &[&h0, &w_hh_t], vec![]);
        let gates = g.node("Add", &[&xi, &hh], vec![]);
        let gi = g.columns(&gates, 0, h);
        let gf = g.columns(&gates, h, 2 * h);
        let gg = g.columns(&gates, 2 * h, 3 * h);
        let go = g.columns(&gates, 3 * h, 4 * h);
        let i = g.node("Sigmoid", &[&gi], vec![]);
        let f = g.node("Sigmoid", &[&gf], vec![]);
        let gt = g.node("Tanh", &[&gg], vec![]);
        let o = g.node("Sigmoid", &[&go], vec![]);
        let fc = g.node("Mul", &[&f, &c0], vec![]);
        let ig = g.node("Mul", &[&i, &gt], vec![]);
        let c1 = g.node("Add", &[&fc, &ig], vec![]);
        let tc = g.node("Tanh", &[&c1], vec![]);
        let h1 = g.node("Mul", &[&o, &tc], vec![]);
        state_out = Some((g.node("Concat", &[&h1, &c1], vec![attr_int("axis", 1)]), h));
        x = h1;
    }

    // Head.
    let q = match agent.head {
        Head::Value => g.linear(&x, "head")?,
        Head::Dueling => {
            let v = g.linear(&x, "head.value")?;
            let a = g.linear(&x, "head.advantage")?;
            let mean = g.node(
                "ReduceMean",
                &[&a],
                vec![attr_ints("axes", &[1]), attr_int("keepdims", 1)],
            );
            let centred = g.node("Sub", &[&a, &mean], vec![]);
            g.node("Add", &[&centred, &v], vec![])
        }
        Head::Quantile { quantiles, .. } => {
            let z = g.linear(&x, "head")?;
            let s = g.constant_i64("shape.quantiles", &[-1, actions as i64, quantiles as i64]);
            let z = g.node("Reshape", &[&z, &s], vec![]);
            g.node(
                "ReduceMean",
                &[&z],
                vec![attr_ints("axes", &[2]), attr_int("keepdims", 0)],
            )
        }
    };
    g.nodes.push(NodeProto {
        input: vec![q],
        output: vec![names::Q.into()],
        name: "q".into(),
        op_type: "Identity".into(),
        ..Default::default()
    });
    outputs.push(tensor_info(
        names::Q,
        FLOAT,
        &[None, Some(actions)],
        "value of each action; the greedy action is the argmax",
    ));
    if let Some((s, h)) = state_out {
        g.nodes.push(NodeProto {
            input: vec![s],
            output: vec![names::STATE_OUT.into()],
            name: "state_out".into(),
            op_type: "Identity".into(),
            ..Default::default()
        });
        outputs.push(tensor_info(
            names::STATE_OUT,
            FLOAT,
            &[None, Some(2 * h)],
            "LSTM state after this step (h then c): feed it back as `state` at the next step",
        ));
    }
    Ok(GraphProto {
        node: g.nodes,
        name: "mnemon_policy_step".into(),
        initializer: g.inits,
        doc_string: "one step of a mnemon policy".into(),
        input: inputs,
        output: outputs,
    })
}
