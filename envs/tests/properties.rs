//! Properties every built-in task must have, checked on random settings, seeds and
//! action sequences: observations stay inside the declared space, a seed fixes the
//! episode, and lanes are independent (each lane behaves exactly like a lone task
//! fed that lane's episode seeds and actions).

use std::collections::BTreeMap;

use mnemon_envs::{episode_seed, make, Ending, Lanes, Task};
use mnemon_spec::{TaskSpec, Value};
use proptest::prelude::*;

/// A random valid spec of one of the built-in kinds.
fn any_spec() -> impl Strategy<Value = TaskSpec> {
    // A time limit is 0 (automatic) or at least length + 2 (the task table's rule).
    let tmaze = (1i64..12, prop_oneof![Just(0i64), 1i64..60]).prop_map(|(l, t)| {
        let t = if t == 0 { 0 } else { t.max(l + 2) };
        spec(
            "tmaze",
            [("length", Value::Int(l)), ("time_limit", Value::Int(t))],
        )
    });
    let cartpole = (1i64..600).prop_map(|t| spec("cartpole", [("time_limit", Value::Int(t))]));
    let positions = (1i64..600, prop_oneof![Just(0.0f64), 0.0f64..0.5]).prop_map(|(t, n)| {
        spec(
            "cartpole-positions",
            [("time_limit", Value::Int(t)), ("noise", Value::Float(n))],
        )
    });
    let tiger = (1i64..30, 0.5f64..1.0, any::<bool>()).prop_map(|(h, a, e)| {
        spec(
            "tiger",
            [
                ("horizon", Value::Int(h)),
                ("listen_accuracy", Value::Float(a)),
                ("end_on_open", Value::Bool(e)),
            ],
        )
    });
    let recall = (2i64..8, 0i64..12).prop_map(|(s, d)| {
        spec(
            "recall",
            [("symbols", Value::Int(s)), ("distractors", Value::Int(d))],
        )
    });
    let fog = (
        prop_oneof![Just("depot"), Just("aisles")],
        prop_oneof![Just(3i64), Just(5), Just(7)],
        1i64..120,
    )
        .prop_map(|(m, v, t)| {
            spec(
                "fog-grid",
                [
                    ("map", Value::Str(m.into())),
                    ("view", Value::Int(v)),
                    ("time_limit", Value::Int(t)),
                ],
            )
        });
    prop_oneof![tmaze, cartpole, positions, tiger, recall, fog]
}

fn spec<const N: usize>(kind: &str, settings: [(&str, Value); N]) -> TaskSpec {
    TaskSpec {
        kind: kind.into(),
        settings: settings
            .into_iter()
            .map(|(k, v)| (k.to_string(), v))
            .collect::<BTreeMap<_, _>>(),
    }
}

type Trace = Vec<(Vec<f32>, f32, Ending, Option<bool>)>;

/// Play `actions` (taken modulo the action count) on a lone task, resetting with
/// `seed_of(episode)` whenever an episode ends.
fn play(task: &mut dyn Task, actions: &[usize], seed_of: impl Fn(u64) -> u64) -> Trace {
    let n = task.action_space().count();
    let mut obs = vec![0.0; task.obs_space().len()];
    let mut episode = 0;
    task.reset(seed_of(0), &mut obs).unwrap();
    let mut trace = vec![(obs.clone(), 0.0, Ending::Running, None)];
    for &a in actions {
        let out = task.step(a % n, &mut obs).unwrap();
        trace.push((obs.clone(), out.reward, out.ending, out.success));
        if out.ending.is_done() {
            episode += 1;
            task.reset(seed_of(episode), &mut obs).unwrap();
            trace.push((obs.clone(), 0.0, Ending::Running, None));
        }
    }
    trace
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    #[test]
    fn observations_stay_inside_the_declared_space(
        s in any_spec(), seed in any::<u64>(), actions in prop::collection::vec(0usize..16, 1..400)
    ) {
        let mut task = make(&s).unwrap();
        let space = task.obs_space();
        let has_success = task.has_success();
        for (obs, reward, ending, success) in play(task.as_mut(), &actions, |e| seed ^ e) {
            prop_assert!(space.contains(&obs), "{} observation {:?} outside {:?}", s.kind, obs, space);
            prop_assert!(reward.is_finite());
            // success is reported exactly on ending steps of tasks that define it
            prop_assert_eq!(success.is_some(), has_success && ending.is_done());
        }
    }

    #[test]
    fn a_seed_fixes_the_episode(
        s in any_spec(), seed in any::<u64>(), actions in prop::collection::vec(0usize..16, 1..200)
    ) {
        let a = play(make(&s).unwrap().as_mut(), &actions, |e| seed.wrapping_add(e));
        let b = play(make(&s).unwrap().as_mut(), &actions, |e| seed.wrapping_add(e));
        prop_assert_eq!(a, b);
    }

    #[test]
    fn lanes_are_independent_and_match_lone_tasks(
        s in any_spec(), seed in any::<u64>(), lanes in 1usize..5,
        actions in prop::collection::vec(0usize..16, 1..150)
    ) {
        let mut l = Lanes::new(&s, lanes, seed).unwrap();
        let n = l.task().action_space().count();
        let len = l.obs_len();
        // lane i takes actions[(t + 3 i) % len]: different lanes, different actions
        let act = |t: usize, i: usize| actions[(t + 3 * i) % actions.len()] % n;
        let mut got: Vec<Trace> = (0..lanes)
            .map(|i| vec![(l.obs()[i * len..(i + 1) * len].to_vec(), 0.0, Ending::Running, None)])
            .collect();
        for t in 0..actions.len() {
            let acts: Vec<usize> = (0..lanes).map(|i| act(t, i)).collect();
            let steps = l.step(&acts).unwrap().to_vec();
            for (i, st) in steps.iter().enumerate() {
                if st.ending.is_done() {
                    let fin = l.final_obs(i).unwrap().to_vec();
                    got[i].push((fin, st.reward, st.ending, st.success));
                    got[i].push((l.obs()[i * len..(i + 1) * len].to_vec(), 0.0, Ending::Running, None));
                    let ep = st.episode.unwrap();
                    prop_assert_eq!(ep.ending, st.ending);
                } else {
                    prop_assert!(l.final_obs(i).is_none());
                    got[i].push((l.obs()[i * len..(i + 1) * len].to_vec(), st.reward, st.ending, st.success));
                }
            }
        }
        for (i, trace) in got.iter().enumerate() {
            let lane_actions: Vec<usize> = (0..actions.len()).map(|t| act(t, i)).collect();
            let mut lone = make(&s).unwrap();
            let want = play(lone.as_mut(), &lane_actions, |e| episode_seed(seed, i as u64, e));
            prop_assert_eq!(trace, &want, "lane {}", i);
        }
    }
}

#[test]
fn episode_summaries_add_up() {
    // T-maze, always west: every step bumps the start wall (-0.1) until the time limit.
    let s = spec(
        "tmaze",
        [("length", Value::Int(3)), ("time_limit", Value::Int(50))],
    );
    let mut l = Lanes::new(&s, 2, 9).unwrap();
    let (mut total, mut len, mut seen) = (0.0f64, 0u64, 0);
    for t in 0..400 {
        let st = l.step(&[3, t % 4]).unwrap()[0];
        total += st.reward as f64;
        len += 1;
        if let Some(ep) = st.episode {
            assert_eq!((ep.total_reward, ep.length), (total, len));
            assert!((ep.total_reward - -5.0).abs() < 1e-5);
            assert_eq!((ep.ending, ep.success), (Ending::Truncated, Some(false)));
            total = 0.0;
            len = 0;
            seen += 1;
        }
    }
    assert_eq!(seen, 8);
    assert_eq!(l.episodes_done(0), 8);
    assert!(Lanes::new(&s, 0, 1).is_err());
    assert!(l.step(&[0]).is_err());
}
