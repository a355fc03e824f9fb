//! Learning acceptance at CI size: on the T-maze (Bakker 2002) an LSTM agent must learn
//! to carry the cue to the junction, and a memoryless agent must not beat the analytic
//! bound of 0.5 success (a memoryless policy sees the same observation at the junction
//! whichever arm holds the goal). Fixed seeds; release mode.

use std::collections::BTreeMap;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use mnemon_engine::eval::{evaluate, EvalSetup};
use mnemon_engine::train::{train, Silent, TrainOptions};
use mnemon_spec::*;

fn tmaze_spec(memory: Memory, out: &str, seed: u64) -> Spec {
    let mut settings = BTreeMap::new();
    settings.insert("length".to_string(), Value::Int(4));
    settings.insert("time_limit".to_string(), Value::Int(0));
    let lstm = matches!(memory, Memory::Lstm { .. });
    Spec {
        name: "tmaze-ci".into(),
        task: TaskSpec {
            kind: "tmaze".into(),
            settings,
        },
        agent: AgentSpec {
            torso: Torso::Mlp {
                layers: vec![32],
                activation: Activation::Relu,
            },
            memory,
            head: Head::Value,
            previous_action_reward: lstm,
        },
        acting: ActingSpec {
            actors: 1,
            lanes: 8,
            epsilon_base: 0.4,
            epsilon_spread: 7.0,
            round: 160,
        },
        replay: ReplaySpec {
            capacity: 50_000,
            sequence: 12,
            overlap: 6,
            burn_in: 3,
            start_state: StartState::Stored,
            priority_exponent: 0.9,
            priority_correction: 0.6,
            priority_mix: 0.9,
        },
        learn: LearnSpec {
            discount: 0.99,
            n_step: 5,
            batch: 32,
            rate: Schedule::Constant(1e-3),
            adam_epsilon: 1e-4,
            clip: 40.0,
            target_every: 250,
            rescale: 1e-3,
            warmup: 2000,
            replay_ratio: 32.0,
            loss: TdLoss::Huber,
        },
        run: RunSpec {
            budget: Budget::Steps(40_000),
            seed,
            checkpoint_every: 0,
            eval_every: 2000,
            eval_episodes: 100,
            stop: Some(StopWhen::Success(0.95)),
            out: out.into(),
        },
    }
}

fn run(memory: Memory, seed: u64) -> (f64, u64) {
    let tmp = tempfile::tempdir().unwrap();
    let spec = tmaze_spec(memory, tmp.path().to_str().unwrap(), seed);
    let options = TrainOptions {
        resume: None,
        stop: Arc::new(AtomicBool::new(false)),
        spec_toml: String::new(),
        run_dir: None,
    };
    let summary = train(&spec, options, &mut Silent).expect("training runs");
    let ckpt = mnemon_engine::learner::load_params(&summary.checkpoint).expect("checkpoint loads");
    let setup = EvalSetup {
        episodes: 200,
        seed: 99,
        epsilon: 0.0,
        discount: 0.99,
        max_steps: 0,
    };
    let report = evaluate(&spec.task, &spec.agent, &ckpt.params, &setup).expect("evaluation runs");
    (report.success_rate().unwrap(), summary.env_steps)
}

#[test]
fn lstm_solves_the_short_tmaze_and_no_memory_cannot() {
    let (lstm, steps) = run(Memory::Lstm { size: 64 }, 3);
    assert!(
        lstm >= 0.9,
        "LSTM agent reached only {lstm} success after {steps} env steps"
    );
    let (none, _) = run(Memory::None, 3);
    assert!(
        none <= 0.6,
        "memoryless agent at {none}: above the 0.5 bound of Bakker 2002"
    );
}
