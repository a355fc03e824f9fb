//! Network assembly, unroll semantics (burn-in, start state), the actor path against the
//! learner path, and checkpoints.

use mnemon_nets::checkpoint::{self, Meta};
use mnemon_nets::{ActorNet, NetShape, Network, ObsShape, Optimizer, UnrollInput};
use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};

fn agent(memory: Memory, head: Head, par: bool) -> AgentSpec {
    AgentSpec {
        torso: Torso::Mlp {
            layers: vec![12, 10],
            activation: Activation::Relu,
        },
        memory,
        head,
        previous_action_reward: par,
    }
}

fn conv_agent(head: Head) -> AgentSpec {
    AgentSpec {
        torso: Torso::Conv {
            channels: vec![4, 6],
            kernels: vec![3, 2],
            strides: vec![1, 2],
            out: 16,
        },
        memory: Memory::Lstm { size: 8 },
        head,
        previous_action_reward: true,
    }
}

struct Batch {
    b: usize,
    t: usize,
    obs: Vec<f32>,
    act: Vec<u32>,
    rew: Vec<f32>,
    start: Vec<f32>,
}

fn batch(b: usize, t: usize, obs_len: usize, actions: usize, state_len: usize, seed: u64) -> Batch {
    use rand::{Rng, SeedableRng};
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    Batch {
        b,
        t,
        obs: (0..b * t * obs_len)
            .map(|_| rng.random_range(-1f32..1.0))
            .collect(),
        act: (0..b * t)
            .map(|_| rng.random_range(0..=actions as u32))
            .collect(),
        rew: (0..b * t).map(|_| rng.random_range(-1f32..1.0)).collect(),
        start: (0..b * state_len)
            .map(|_| rng.random_range(-0.5f32..0.5))
            .collect(),
    }
}

impl Batch {
    fn input(&self, start: bool) -> UnrollInput<'_> {
        UnrollInput {
            batch: self.b,
            steps: self.t,
            obs: &self.obs,
            prev_action: &self.act,
            prev_reward: &self.rew,
            start: start.then_some(self.start.as_slice()),
        }
    }
}

fn to_vec(t: &candle_core::Tensor) -> Vec<f32> {
    t.flatten_all().unwrap().to_vec1::<f32>().unwrap()
}

fn assert_close(a: &[f32], b: &[f32], tol: f32, what: &str) {
    assert_eq!(a.len(), b.len(), "{what}: lengths");
    let scale = b.iter().fold(1e-6f32, |m, x| m.max(x.abs()));
    let err = a.iter().zip(b).fold(0f32, |m, (x, y)| m.max((x - y).abs()));
    assert!(
        err <= tol * scale,
        "{what}: max error {err} (scale {scale})"
    );
}

/// Steps the actor path through every step of every sequence; returns q `[B, T, A]`.
fn actor_q(net: &Network, bt: &Batch, start: bool) -> Vec<f32> {
    let mut actor = ActorNet::new(net).unwrap();
    let (a, ol, sl) = (net.shape().actions, net.shape().obs.len(), net.state_len());
    let mut state = if start {
        bt.start.clone()
    } else {
        vec![0.0; bt.b * sl]
    };
    let mut out = vec![0f32; bt.b * bt.t * a];
    let mut q = vec![0f32; bt.b * a];
    for s in 0..bt.t {
        let obs: Vec<f32> = (0..bt.b)
            .flat_map(|l| bt.obs[(l * bt.t + s) * ol..(l * bt.t + s + 1) * ol].to_vec())
            .collect();
        let pa: Vec<usize> = (0..bt.b).map(|l| bt.act[l * bt.t + s] as usize).collect();
        let pr: Vec<f32> = (0..bt.b).map(|l| bt.rew[l * bt.t + s]).collect();
        actor.step(&obs, &pa, &pr, &mut state, &mut q).unwrap();
        for l in 0..bt.b {
            out[(l * bt.t + s) * a..(l * bt.t + s + 1) * a].copy_from_slice(&q[l * a..(l + 1) * a]);
        }
    }
    out
}

fn q_mean_over_quantiles(q: &candle_core::Tensor) -> Vec<f32> {
    if q.rank() == 4 {
        to_vec(&q.mean(3).unwrap())
    } else {
        to_vec(q)
    }
}

#[test]
fn actor_step_equals_learner_unroll_for_every_part() {
    let shape = NetShape {
        obs: ObsShape::Vector(5),
        actions: 3,
    };
    let quant = Head::Quantile {
        quantiles: 4,
        kappa: 1.0,
    };
    for (i, ag) in [
        agent(Memory::Lstm { size: 8 }, Head::Value, true),
        agent(Memory::Lstm { size: 8 }, Head::Dueling, false),
        agent(Memory::Lstm { size: 8 }, quant.clone(), true),
        agent(Memory::None, Head::Value, false),
        agent(Memory::None, Head::Dueling, false),
    ]
    .into_iter()
    .enumerate()
    {
        let net = Network::new(&ag, shape, 11 + i as u64).unwrap();
        let bt = batch(5, 7, 5, 3, net.state_len(), 3);
        let out = net.unroll_no_grad(&bt.input(true)).unwrap();
        assert_close(
            &actor_q(&net, &bt, true),
            &q_mean_over_quantiles(&out.q),
            1e-5,
            &format!("spec {i}"),
        );
    }
    let ishape = NetShape {
        obs: ObsShape::Image {
            channels: 2,
            height: 7,
            width: 6,
        },
        actions: 3,
    };
    for head in [Head::Value, quant] {
        let net = Network::new(&conv_agent(head), ishape, 5).unwrap();
        let bt = batch(3, 4, 2 * 7 * 6, 3, net.state_len(), 9);
        let out = net.unroll_no_grad(&bt.input(false)).unwrap();
        assert_close(
            &actor_q(&net, &bt, false),
            &q_mean_over_quantiles(&out.q),
            1e-5,
            "conv torso",
        );
    }
}

#[test]
fn burn_in_gives_the_same_values_and_no_gradient_through_the_boundary() {
    let shape = NetShape {
        obs: ObsShape::Vector(5),
        actions: 3,
    };
    let net = Network::new(
        &agent(Memory::Lstm { size: 8 }, Head::Value, true),
        shape,
        1,
    )
    .unwrap();
    let bt = batch(4, 9, 5, 3, net.state_len(), 2);
    let full = net.unroll_no_grad(&bt.input(true)).unwrap();
    let burn = net.unroll(&bt.input(true), 3).unwrap();
    assert_eq!(burn.q.dims(), &[4, 6, 3]);
    let tail = to_vec(&full.q.narrow(1, 3, 6).unwrap());
    assert_close(
        &to_vec(&burn.q),
        &tail,
        1e-6,
        "burn-in unroll vs full unroll",
    );
    // Gradients must equal those of an unroll that starts at the boundary state with the
    // burn-in steps cut off: nothing flows back through the boundary.
    let cut = Batch {
        b: 4,
        t: 6,
        obs: (0..4)
            .flat_map(|l| bt.obs[(l * 9 + 3) * 5..(l * 9 + 9) * 5].to_vec())
            .collect(),
        act: (0..4)
            .flat_map(|l| bt.act[l * 9 + 3..l * 9 + 9].to_vec())
            .collect(),
        rew: (0..4)
            .flat_map(|l| bt.rew[l * 9 + 3..l * 9 + 9].to_vec())
            .collect(),
        start: burn.boundary_state.clone(),
    };
    let direct = net.unroll(&cut.input(true), 0).unwrap();
    assert_close(
        &to_vec(&direct.q),
        &to_vec(&burn.q),
        1e-6,
        "boundary restart",
    );
    let g1 = burn.q.sqr().unwrap().sum_all().unwrap().backward().unwrap();
    let g2 = direct
        .q
        .sqr()
        .unwrap()
        .sum_all()
        .unwrap()
        .backward()
        .unwrap();
    for (name, v) in net.vars() {
        assert_close(
            &to_vec(g1.get(v.as_tensor()).unwrap()),
            &to_vec(g2.get(v.as_tensor()).unwrap()),
            1e-5,
            name,
        );
    }
    // Zero start state differs from the stored one.
    let zero = net.unroll_no_grad(&bt.input(false)).unwrap();
    assert_ne!(to_vec(&zero.q), to_vec(&full.q));
}

#[test]
fn parameter_names_and_bad_input() {
    let shape = NetShape {
        obs: ObsShape::Vector(5),
        actions: 3,
    };
    let net = Network::new(
        &agent(Memory::Lstm { size: 8 }, Head::Dueling, true),
        shape,
        1,
    )
    .unwrap();
    let names: Vec<&str> = net.vars().iter().map(|(n, _)| n.as_str()).collect();
    assert_eq!(
        names,
        [
            "torso.0.weight",
            "torso.0.bias",
            "torso.1.weight",
            "torso.1.bias",
            "memory.w_ih",
            "memory.w_hh",
            "memory.bias",
            "head.value.weight",
            "head.value.bias",
            "head.advantage.weight",
            "head.advantage.bias"
        ]
    );
    // memory input = 10 torso features + 3 one-hot actions + 1 reward
    assert_eq!(net.vars()[4].1.dims(), &[32, 14]);
    let bt = batch(2, 3, 4, 3, net.state_len(), 1);
    let err = net.unroll(&bt.input(false), 0).unwrap_err().to_string();
    assert!(
        err.contains("unroll obs") && err.contains("[2, 3, 5]"),
        "{err}"
    );
    let bt = batch(2, 3, 5, 3, net.state_len(), 1);
    assert!(
        net.unroll(&bt.input(false), 3).is_err(),
        "burn-in must be shorter than the sequence"
    );
    let conv = conv_agent(Head::Value);
    let err = Network::new(&conv, shape, 1).unwrap_err().to_string();
    assert!(err.contains("image"), "{err}");
}

#[test]
fn checkpoint_round_trip_and_rejections() {
    let dir = tempfile::tempdir().unwrap();
    let shape = NetShape {
        obs: ObsShape::Vector(5),
        actions: 3,
    };
    let ag = agent(Memory::Lstm { size: 8 }, Head::Value, true);
    let net = Network::new(&ag, shape, 1).unwrap();
    let target = Network::new(&ag, shape, 2).unwrap();
    let mut opt = Optimizer::new(&net, 1e-3, 40.0);
    let bt = batch(2, 4, 5, 3, net.state_len(), 1);
    let g = net
        .unroll(&bt.input(false), 1)
        .unwrap()
        .q
        .sqr()
        .unwrap()
        .sum_all()
        .unwrap()
        .backward()
        .unwrap();
    opt.step(&net, &g, 1e-3).unwrap();
    let mut meta = Meta {
        spec_toml: "name = \"x\"\n".into(),
        env_steps: 1234,
        learner_steps: 56,
        ..Default::default()
    };
    meta.extra.insert("seed".into(), "7".into());
    let path = dir.path().join("step-1234.safetensors");
    checkpoint::save(&path, &net, Some(&target), Some(&opt), &meta).unwrap();
    let loaded = checkpoint::load(&path).unwrap();
    assert_eq!(loaded.meta, meta);
    let sorted = |mut p: mnemon_nets::Params| {
        p.tensors.sort_by(|a, b| a.0.cmp(&b.0));
        p
    };
    assert!(
        sorted(loaded.online.clone()) == sorted(net.snapshot().unwrap()),
        "online parameters differ after the round trip"
    );
    assert!(
        sorted(loaded.target.clone().unwrap()) == sorted(target.snapshot().unwrap()),
        "target parameters differ"
    );
    let mut net2 = Network::new(&ag, shape, 99).unwrap();
    let mut tgt2 = Network::new(&ag, shape, 98).unwrap();
    let mut opt2 = Optimizer::new(&net2, 1e-3, 40.0);
    loaded
        .restore(&mut net2, Some(&mut tgt2), Some(&mut opt2))
        .unwrap();
    assert!(
        net2.snapshot().unwrap() == net.snapshot().unwrap(),
        "restored online network differs"
    );
    assert!(
        tgt2.snapshot().unwrap() == target.snapshot().unwrap(),
        "restored target network differs"
    );
    assert!(opt2 == opt, "restored optimizer differs");
    assert_eq!(loaded.tensors.len(), 4 * net.vars().len());

    // Shape mismatch against the spec: a wider LSTM.
    let mut wide = Network::new(
        &agent(Memory::Lstm { size: 9 }, Head::Value, true),
        shape,
        1,
    )
    .unwrap();
    let err = loaded
        .restore(&mut wide, None, None)
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("memory.w_ih") && err.contains("[36, 14]") && err.contains("[32, 14]"),
        "{err}"
    );

    // Truncated file.
    let bytes = std::fs::read(&path).unwrap();
    let cut = dir.path().join("cut.safetensors");
    std::fs::write(&cut, &bytes[..bytes.len() - 100]).unwrap();
    let err = checkpoint::load(&cut).unwrap_err().to_string();
    assert!(
        err.contains("cut.safetensors") && err.contains("truncated"),
        "{err}"
    );

    // A flipped byte in the tensor data.
    let mut flipped = bytes.clone();
    let n = flipped.len();
    flipped[n - 5] ^= 0x40;
    let err = checkpoint::parse(&path, &flipped).unwrap_err().to_string();
    assert!(err.contains("checksum"), "{err}");

    // A safetensors file from elsewhere, and a wrong format version.
    let foreign = dir.path().join("foreign.safetensors");
    let data = vec![0u8; 8];
    let view =
        safetensors::tensor::TensorView::new(safetensors::Dtype::F32, vec![2], &data).unwrap();
    std::fs::write(
        &foreign,
        safetensors::serialize([("w", view.clone())], None).unwrap(),
    )
    .unwrap();
    let err = checkpoint::load(&foreign).unwrap_err().to_string();
    assert!(err.contains("not a mnemon checkpoint"), "{err}");
    let md = std::collections::HashMap::from([
        ("format".to_string(), "mnemon-checkpoint".to_string()),
        ("format_version".to_string(), "99".to_string()),
    ]);
    std::fs::write(
        &foreign,
        safetensors::serialize([("w", view)], Some(md)).unwrap(),
    )
    .unwrap();
    let err = checkpoint::load(&foreign).unwrap_err().to_string();
    assert!(err.contains("version 99"), "{err}");
    let err = checkpoint::load(&dir.path().join("missing.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(err.contains("missing.safetensors"), "{err}");
    // no temp files left behind
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().contains(".tmp-"))
        .collect();
    assert!(leftovers.is_empty());
}

#[test]
fn copy_from_and_snapshot_refresh() {
    let shape = NetShape {
        obs: ObsShape::Vector(5),
        actions: 3,
    };
    let ag = agent(Memory::Lstm { size: 8 }, Head::Value, false);
    let a = Network::new(&ag, shape, 1).unwrap();
    let mut b = Network::new(&ag, shape, 2).unwrap();
    assert!(a.snapshot().unwrap() != b.snapshot().unwrap());
    b.copy_from(&a).unwrap();
    assert!(
        a.snapshot().unwrap() == b.snapshot().unwrap(),
        "copy_from did not copy"
    );
    let c = Network::new(&ag, shape, 3).unwrap();
    let mut actor = ActorNet::new(&c).unwrap();
    actor.refresh(&a.snapshot().unwrap()).unwrap();
    let bt = batch(1, 1, 5, 3, 16, 4);
    let mut st = vec![0f32; 16];
    let mut q = vec![0f32; 3];
    actor.step(&bt.obs, &[0], &[0.0], &mut st, &mut q).unwrap();
    let want = to_vec(&a.unroll_no_grad(&bt.input(false)).unwrap().q);
    assert_close(&q, &want, 1e-5, "refreshed actor");
    assert!(actor
        .step(&bt.obs, &[0, 1], &[0.0], &mut st, &mut q)
        .is_err());
}
