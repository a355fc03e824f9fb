//! The exported ONNX graph against mnemon's own acting path
//! (`mnemon_nets::ActorNet::step`) over whole episodes of real tasks, in independent
//! runtimes: `q` and `state_out` must agree to 1e-4 at every step, with each side
//! carrying its own state.
//!
//! Every test leaves the model and a trace of its episodes (inputs, and mnemon's `q`
//! and state after every step) in `<target>/tmp/onnx-traces/<name>/`, where
//! `tests/reference/onnx_check.py` replays them with Python onnxruntime (`.ci/run` does
//! this after the tests). With `--features tract-check` the same episodes also run here
//! in tract, a pure-Rust ONNX implementation from crates.io; it is a feature because
//! tract roughly doubles a clean release build on two cores.

use mnemon_envs::Lanes;
use mnemon_export::{onnx_bytes, Policy, PolicySource};
use mnemon_nets::{ActorNet, Network, Params};
use mnemon_spec::Spec;
use rand::{Rng, SeedableRng};
#[cfg(feature = "tract-check")]
use tract_onnx::prelude::*;

const TOLERANCE: f32 = 1e-4;

fn spec(text: &str) -> Spec {
    match mnemon_spec::load_str(text, "test.toml", &[]) {
        Ok(r) => r.spec,
        Err(e) => panic!("{}", e.render(false)),
    }
}

fn tmaze(agent: &str) -> Spec {
    spec(&format!(
        "name = \"t\"\n[task]\nkind = \"tmaze\"\nlength = 6\n[agent]\n{agent}\n"
    ))
}

fn fog(agent: &str) -> Spec {
    spec(&format!(
        "name = \"f\"\n[task]\nkind = \"fog-grid\"\nmap = \"depot\"\nview = 5\ntime_limit = 30\n[agent]\n{agent}\n"
    ))
}

/// Random parameters of the spec's network, scaled up so the nonlinearities saturate
/// sometimes (a harder comparison than the small initial weights).
fn random_source(spec: &Spec, seed: u64) -> PolicySource {
    let face = mnemon_export::TaskFace::of(spec).unwrap();
    let net = Network::new(&spec.agent, face.net_shape(), seed).unwrap();
    let mut params = net.snapshot().unwrap();
    for (_, _, v) in &mut params.tensors {
        v.iter_mut().for_each(|x| *x *= 2.5);
    }
    PolicySource::from_parts(spec.clone(), params, 0).unwrap()
}

#[cfg(feature = "tract-check")]
struct Onnx {
    plan: std::sync::Arc<TypedSimplePlan>,
    feeds_previous: bool,
    state_len: usize,
}

#[cfg(feature = "tract-check")]
fn load_onnx(source: &PolicySource, batch: usize) -> Onnx {
    let bytes = onnx_bytes(source).unwrap();
    let model = tract_onnx::onnx().model_for_read(&mut &bytes[..]).unwrap();
    let plan = model.into_optimized().unwrap().into_runnable().unwrap();
    let _ = batch;
    let meta: serde_json::Value = {
        let m = mnemon_export::metadata(source);
        let (_, v) = m.iter().find(|(k, _)| k == "mnemon.policy").unwrap();
        serde_json::from_str(v).unwrap()
    };
    Onnx {
        plan,
        feeds_previous: meta["previous_action_reward"].as_bool().unwrap(),
        state_len: meta["state_size"].as_u64().unwrap() as usize,
    }
}

#[cfg(feature = "tract-check")]
impl Onnx {
    /// One step; returns (q, state_out).
    fn step(
        &self,
        obs_shape: &[usize],
        obs: &[f32],
        prev_action: &[i64],
        prev_reward: &[f32],
        state: &[f32],
    ) -> (Vec<f32>, Vec<f32>) {
        let b = prev_action.len();
        let mut shape = vec![b];
        shape.extend_from_slice(obs_shape);
        let mut inputs: TVec<TValue> =
            tvec![Tensor::from_shape(&shape, obs).unwrap().into_tvalue()];
        if self.feeds_previous {
            inputs.push(Tensor::from_shape(&[b], prev_action).unwrap().into_tvalue());
            inputs.push(Tensor::from_shape(&[b], prev_reward).unwrap().into_tvalue());
        }
        if self.state_len > 0 {
            inputs.push(
                Tensor::from_shape(&[b, self.state_len], state)
                    .unwrap()
                    .into_tvalue(),
            );
        }
        let out = self.plan.run(inputs).unwrap();
        let q = out[0]
            .to_plain_array_view::<f32>()
            .unwrap()
            .iter()
            .copied()
            .collect();
        let s = if self.state_len > 0 {
            out[1]
                .to_plain_array_view::<f32>()
                .unwrap()
                .iter()
                .copied()
                .collect()
        } else {
            Vec::new()
        };
        (q, s)
    }
}

#[cfg(feature = "tract-check")]
fn max_diff(a: &[f32], b: &[f32]) -> f32 {
    assert_eq!(a.len(), b.len());
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f32::max)
}

/// Plays `episodes_per_lane` episodes on `lanes` lanes (epsilon-greedy on mnemon's q, so
/// both paths see the same inputs), stepping mnemon's acting path and the ONNX graph
/// side by side, each with its own recurrent state. Returns the largest differences
/// of q and of the state, and the number of steps compared.
fn compare(
    name: &str,
    spec: &Spec,
    lanes: usize,
    episodes_per_lane: usize,
    seed: u64,
) -> (f32, f32, usize) {
    let source = random_source(spec, seed);
    let mut trace = Vec::new();
    let mut reset: Vec<usize> = Vec::new();
    #[cfg(feature = "tract-check")]
    let onnx = load_onnx(&source, lanes);
    let shape = source.face.net_shape();
    let obs_shape: Vec<usize> = match shape.obs {
        mnemon_nets::ObsShape::Vector(n) => vec![n],
        mnemon_nets::ObsShape::Image {
            channels,
            height,
            width,
        } => vec![channels, height, width],
    };
    let mut net = ActorNet::from_params(&spec.agent, shape, &source.params).unwrap();
    let sl = net.state_len();
    #[cfg(feature = "tract-check")]
    assert_eq!(sl, onnx.state_len);
    let a = shape.actions;
    let mut env = Lanes::new(&spec.task, lanes, seed).unwrap();
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let mut state_m = vec![0f32; lanes * sl];
    #[cfg(feature = "tract-check")]
    let mut state_o = vec![0f32; lanes * sl];
    let mut prev_action = vec![usize::MAX; lanes];
    let mut prev_reward = vec![0f32; lanes];
    let mut q_m = vec![0f32; lanes * a];
    let mut ended = vec![0usize; lanes];
    #[allow(unused_mut)] // only the tract comparison updates the differences
    let (mut dq, mut ds, mut steps) = (0f32, 0f32, 0usize);
    while ended.iter().any(|&e| e < episodes_per_lane) {
        let pa: Vec<i64> = prev_action
            .iter()
            .map(|&p| if p == usize::MAX { -1 } else { p as i64 })
            .collect();
        #[cfg(feature = "tract-check")]
        let (q_o, s_o) = onnx.step(&obs_shape, env.obs(), &pa, &prev_reward, &state_o);
        net.step(
            env.obs(),
            &prev_action,
            &prev_reward,
            &mut state_m,
            &mut q_m,
        )
        .unwrap();
        trace.push(serde_json::json!({
            "reset": std::mem::take(&mut reset),
            "obs": env.obs(),
            "prev_action": pa,
            "prev_reward": prev_reward,
            "q": q_m,
            "state": state_m,
        }));
        #[cfg(feature = "tract-check")]
        {
            dq = dq.max(max_diff(&q_m, &q_o));
            ds = ds.max(max_diff(&state_m, &s_o));
            state_o = s_o;
        }
        steps += 1;
        let chosen: Vec<usize> = (0..lanes)
            .map(|l| {
                if rng.random::<f64>() < 0.3 {
                    rng.random_range(0..a)
                } else {
                    let row = &q_m[l * a..(l + 1) * a];
                    (0..a).fold(0, |best, i| if row[i] > row[best] { i } else { best })
                }
            })
            .collect();
        let results = env.step(&chosen).unwrap().to_vec();
        for (l, r) in results.iter().enumerate() {
            if r.ending.is_done() {
                ended[l] += 1;
                reset.push(l);
                state_m[l * sl..(l + 1) * sl].fill(0.0);
                #[cfg(feature = "tract-check")]
                state_o[l * sl..(l + 1) * sl].fill(0.0);
                prev_action[l] = usize::MAX;
                prev_reward[l] = 0.0;
            } else {
                prev_action[l] = chosen[l];
                prev_reward[l] = r.reward;
            }
        }
        assert!(steps < 100_000, "episodes never ended");
    }
    write_trace(name, &source, &obs_shape, lanes, trace);
    // The comparison is only meaningful if the values are not all tiny.
    assert!(
        q_m.iter().any(|v| v.abs() > 0.05),
        "q values too small to compare: {q_m:?}"
    );
    (dq, ds, steps)
}

/// Leaves the model and the episodes for `tests/reference/onnx_check.py`.
fn write_trace(
    name: &str,
    source: &PolicySource,
    obs_shape: &[usize],
    lanes: usize,
    steps: Vec<serde_json::Value>,
) {
    let dir = std::path::Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join("onnx-traces")
        .join(name);
    std::fs::create_dir_all(&dir).unwrap();
    mnemon_export::export_onnx(source, &dir.join("model.onnx")).unwrap();
    let trace = serde_json::json!({
        "name": name,
        "obs_shape": obs_shape,
        "lanes": lanes,
        "steps": steps,
    });
    std::fs::write(dir.join("trace.json"), trace.to_string()).unwrap();
}

fn check(name: &str, spec: &Spec, seed: u64) {
    let (dq, ds, steps) = compare(name, spec, 3, 4, seed);
    if cfg!(feature = "tract-check") {
        eprintln!(
            "{name}: {steps} steps x 3 lanes, tract max |dq| {dq:.2e}, max |dstate| {ds:.2e}"
        );
    } else {
        eprintln!("{name}: {steps} steps x 3 lanes traced for onnx_check.py (tract: --features tract-check)");
    }
    assert!(dq <= TOLERANCE, "{name}: q differs by {dq}");
    assert!(ds <= TOLERANCE, "{name}: state differs by {ds}");
}

#[test]
fn lstm_heads_match_tract() {
    for (head, seed, name) in [
        ("{ kind = \"value\" }", 1, "lstm-value"),
        ("{ kind = \"dueling\" }", 2, "lstm-dueling"),
        ("{ kind = \"quantile\", quantiles = 8 }", 3, "lstm-quantile"),
    ] {
        let s = tmaze(&format!(
            "torso = {{ kind = \"mlp\", layers = [32] }}\nmemory = {{ kind = \"lstm\", size = 24 }}\nhead = {head}"
        ));
        assert!(s.agent.previous_action_reward);
        check(name, &s, seed);
    }
}

#[test]
fn lstm_without_previous_action_matches_tract() {
    let s = tmaze(
        "torso = { kind = \"mlp\", layers = [16, 16], activation = \"tanh\" }\nmemory = { kind = \"lstm\", size = 20 }\nprevious_action_reward = false",
    );
    check("lstm-no-previous", &s, 4);
}

#[test]
fn memoryless_heads_match_tract() {
    for (head, seed, name) in [
        ("{ kind = \"value\" }", 5, "none-value"),
        ("{ kind = \"dueling\" }", 6, "none-dueling"),
        ("{ kind = \"quantile\", quantiles = 5 }", 7, "none-quantile"),
    ] {
        let s = tmaze(&format!(
            "torso = {{ kind = \"mlp\", layers = [32, 16] }}\nmemory = {{ kind = \"none\" }}\nhead = {head}"
        ));
        check(name, &s, seed);
    }
}

#[test]
fn conv_torsos_match_tract() {
    let s = fog(
        "torso = { kind = \"conv\", channels = [8, 12], kernels = [3, 2], strides = [1, 2], out = 32 }\nmemory = { kind = \"lstm\", size = 16 }\nhead = { kind = \"dueling\" }",
    );
    check("conv-lstm-dueling", &s, 8);
    let s = fog(
        "torso = { kind = \"conv\", channels = [6], kernels = [3], strides = [1], out = 24 }\nmemory = { kind = \"none\" }\nhead = { kind = \"quantile\", quantiles = 4 }",
    );
    check("conv-none-quantile", &s, 9);
    // The shipped fog-grid spec itself.
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../../specs/fog-grid.toml");
    let s = mnemon_spec::load(&path, &[]).unwrap().spec;
    check("fog-grid-spec", &s, 10);
}

/// The embedding API plays the same episode as the ONNX graph: same actions, same q.
#[cfg(feature = "tract-check")]
#[test]
fn policy_api_matches_tract() {
    let s =
        tmaze("torso = { kind = \"mlp\", layers = [32] }\nmemory = { kind = \"lstm\", size = 16 }");
    let source = random_source(&s, 11);
    let onnx = load_onnx(&source, 1);
    let mut policy = Policy::new(source.clone()).unwrap();
    let mut env = Lanes::new(&s.task, 1, 5).unwrap();
    let mut state = policy.new_state();
    let mut state_o = vec![0f32; policy.state_len()];
    let (mut pa, mut pr) = (-1i64, 0f32);
    let mut episodes = 0;
    let mut steps = 0;
    while episodes < 5 {
        let obs = env.obs().to_vec();
        let (q_o, s_o) = onnx.step(&[obs.len()], &obs, &[pa], &[pr], &state_o);
        let (action, q) = policy.step(&obs, &mut state).unwrap();
        assert!(max_diff(q, &q_o) <= TOLERANCE);
        assert!(max_diff(state.memory(), &s_o) <= TOLERANCE);
        let greedy = (0..q_o.len()).fold(0, |b, i| if q_o[i] > q_o[b] { i } else { b });
        assert_eq!(action, greedy, "step {steps}");
        state_o = s_o;
        let r = env.step(&[action]).unwrap()[0];
        steps += 1;
        if r.ending.is_done() {
            episodes += 1;
            state.reset();
            state_o.fill(0.0);
            (pa, pr) = (-1, 0.0);
        } else {
            state.reward(r.reward);
            (pa, pr) = (action as i64, r.reward);
        }
        assert!(steps < 10_000);
    }
}

#[test]
fn params_that_do_not_fit_the_spec_are_refused() {
    let s = tmaze("memory = { kind = \"lstm\", size = 8 }");
    let other = tmaze("memory = { kind = \"lstm\", size = 9 }");
    let face = mnemon_export::TaskFace::of(&other).unwrap();
    let params: Params = Network::new(&other.agent, face.net_shape(), 1)
        .unwrap()
        .snapshot()
        .unwrap();
    let err = PolicySource::from_parts(s, params, 0).unwrap_err();
    assert!(err.to_string().contains("memory"), "{err}");
}

/// The model carries what a user outside mnemon needs: version, spec (which loads back
/// to the same spec), action names and state layout.
#[test]
fn metadata_describes_the_policy() {
    use prost::Message;
    let s = tmaze("memory = { kind = \"lstm\", size = 12 }");
    let source = random_source(&s, 12);
    let model = mnemon_export::onnx::ModelProto::decode(&onnx_bytes(&source).unwrap()[..]).unwrap();
    let get = |k: &str| {
        model
            .metadata_props
            .iter()
            .find(|e| e.key == k)
            .map(|e| e.value.clone())
            .unwrap_or_else(|| panic!("no metadata {k}"))
    };
    assert_eq!(get("mnemon.version"), env!("CARGO_PKG_VERSION"));
    assert_eq!(get("mnemon.actions"), r#"["north","east","south","west"]"#);
    let back = mnemon_spec::load_str(&get("mnemon.spec"), "meta", &[]).unwrap();
    assert_eq!(back.spec, s);
    let policy: serde_json::Value = serde_json::from_str(&get("mnemon.policy")).unwrap();
    assert_eq!(policy["state_size"], 24);
    assert_eq!(policy["state_layout"], "h,c");
    let graph = model.graph.unwrap();
    let inputs: Vec<&str> = graph.input.iter().map(|i| i.name.as_str()).collect();
    assert_eq!(inputs, ["obs", "prev_action", "prev_reward", "state"]);
    let outputs: Vec<&str> = graph.output.iter().map(|i| i.name.as_str()).collect();
    assert_eq!(outputs, ["q", "state_out"]);
}

#[test]
fn policy_step_rejects_wrong_sizes() {
    let s = tmaze("memory = { kind = \"lstm\", size = 8 }");
    let mut policy = Policy::new(random_source(&s, 13)).unwrap();
    let mut state = policy.new_state();
    let err = policy.step(&[0.0; 4], &mut state).unwrap_err();
    assert!(err.to_string().contains("observation of 3 floats"), "{err}");
    let other = tmaze("memory = { kind = \"none\" }");
    let mut stateless = Policy::new(random_source(&other, 14)).unwrap().new_state();
    let err = policy.step(&[0.0; 3], &mut stateless).unwrap_err();
    assert!(err.to_string().contains("state of 16 floats"), "{err}");
}
