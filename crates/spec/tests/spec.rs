//! The spec language end to end: shipped specs load, round trips through `to_toml`
//! and `explain`, origins, `extends` merging, `--set`, `[vary]` expansion, the
//! registry's invariants, the committed reference, and a property test that no
//! input makes the loader panic or lose an error's location.

use std::path::PathBuf;

use mnemon_spec::registry::{self, KeyDefault, Ty, KEYS};
use mnemon_spec::*;
use proptest::prelude::*;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn shipped() -> Vec<PathBuf> {
    let mut out = Vec::new();
    for dir in ["specs", "specs/presets"] {
        for e in std::fs::read_dir(root().join(dir)).unwrap() {
            let p = e.unwrap().path();
            if p.extension().is_some_and(|x| x == "toml") {
                out.push(p);
            }
        }
    }
    out.sort();
    out
}

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures")
        .join(name)
}

fn spec_of(text: &str) -> Spec {
    match load_str(text, "t.toml", &[]) {
        Ok(r) => r.spec,
        Err(e) => panic!("{e}\n--- text:\n{text}"),
    }
}

#[test]
fn shipped_specs_load_and_open_with_a_comment() {
    let files = shipped();
    let names: Vec<String> = files
        .iter()
        .map(|p| p.file_name().unwrap().to_string_lossy().to_string())
        .collect();
    for want in [
        "small.toml",
        "tmaze-lstm.toml",
        "tmaze-none.toml",
        "cartpole.toml",
        "cartpole-positions.toml",
        "tiger.toml",
        "recall.toml",
        "fog-grid.toml",
        "compare-memory.toml",
    ] {
        assert!(names.iter().any(|n| n == want), "missing specs/{want}");
    }
    for p in &files {
        let r = load(p, &[]).unwrap_or_else(|e| panic!("{}:\n{e}", p.display()));
        expand(&r).unwrap_or_else(|e| panic!("{}:\n{e}", p.display()));
        let text = std::fs::read_to_string(p).unwrap();
        assert!(
            text.starts_with("# "),
            "{} must open with a comment",
            p.display()
        );
        assert!(
            text.contains("Expected result") || text.contains("Measured"),
            "{}: the header says what result to expect",
            p.display()
        );
    }
}

#[test]
fn shipped_specs_mean_what_they_say() {
    let s = load(&root().join("specs/tmaze-lstm.toml"), &[])
        .unwrap()
        .spec;
    assert_eq!(s.task.kind, "tmaze");
    assert_eq!(s.agent.memory, Memory::Lstm { size: 64 });
    assert!(
        s.agent.previous_action_reward,
        "default is true with an LSTM"
    );
    // time_limit 0 is resolved to 3 * (length + 2).
    assert_eq!(s.task.int("time_limit"), Some(36));
    assert_eq!(s.run.stop, Some(StopWhen::Success(0.95)));

    // tmaze-none inherits everything but the memory, which is replaced whole.
    let n = load(&root().join("specs/tmaze-none.toml"), &[])
        .unwrap()
        .spec;
    assert_eq!(n.agent.memory, Memory::None);
    assert!(!n.agent.previous_action_reward);
    assert_eq!(n.replay, s.replay);
    assert_eq!(n.learn, s.learn);
    assert_eq!(n.task, s.task);

    let f = load(&root().join("specs/fog-grid.toml"), &[]).unwrap().spec;
    assert!(matches!(f.agent.torso, Torso::Conv { .. }));
    let c = load(&root().join("specs/cartpole-positions.toml"), &[])
        .unwrap()
        .spec;
    assert_eq!(c.task.float("noise"), Some(0.0));
    assert_eq!(c.run.stop, Some(StopWhen::Return(450.0)));
}

#[test]
fn defaults_fill_every_key() {
    let s = spec_of("[task]\nkind = \"tiger\"\n");
    assert_eq!(s.name, "t");
    assert_eq!(s.task.int("horizon"), Some(10));
    assert_eq!(s.task.float("listen_accuracy"), Some(0.85));
    assert_eq!(s.task.bool("end_on_open"), Some(false));
    assert_eq!(s.replay.sequence, 40);
    assert_eq!(s.replay.overlap, 20);
    assert_eq!(s.replay.burn_in, 10);
    assert_eq!(s.replay.capacity, 100_000);
    assert_eq!(s.learn.n_step, 5);
    assert_eq!(s.learn.discount, 0.99);
    assert_eq!(s.learn.rate, Schedule::Constant(1e-3));
    assert_eq!(s.learn.warmup, 5_000);
    assert_eq!(s.acting.lanes, 8);
    assert_eq!(s.acting.epsilon_base, 0.4);
    assert_eq!(s.run.budget, Budget::Steps(200_000));
    assert_eq!(s.run.out, "runs");
    assert_eq!(s.run.stop, None);
    assert_eq!(
        s.agent.torso,
        Torso::Mlp {
            layers: vec![64],
            activation: Activation::Relu
        }
    );
    assert_eq!(s.agent.memory, Memory::Lstm { size: 128 });
    assert_eq!(s.agent.head, Head::Value);
}

#[test]
fn values_in_every_form() {
    let s = spec_of(
        r#"
name = "forms"
[task]
kind = "process"
command = ["python3", "my_task.py"]
settings = { depth = 3, label = "x", nested = { a = [1, 2] } }
[agent]
torso = { kind = "mlp", layers = [], activation = "tanh" }
memory = "none"
head = { kind = "quantile", quantiles = 8 }
[replay]
capacity = "1.5M"
[learn]
rate = "points(0:1e-3, 100k:1e-4)"
[run]
budget = "1h30m"
stop = { return = 450 }
"#,
    );
    assert_eq!(
        s.task.strings("command"),
        Some(vec!["python3".to_string(), "my_task.py".to_string()])
    );
    assert_eq!(s.task.float("timeout"), Some(5.0));
    assert!(matches!(s.task.settings.get("settings"), Some(Value::Table(t)) if t.len() == 3));
    assert_eq!(s.agent.memory, Memory::None);
    assert_eq!(
        s.agent.head,
        Head::Quantile {
            quantiles: 8,
            kappa: 1.0
        }
    );
    assert_eq!(s.replay.capacity, 1_500_000);
    assert_eq!(
        s.learn.rate,
        Schedule::Points(vec![(0, 1e-3), (100_000, 1e-4)])
    );
    assert_eq!(s.run.budget, Budget::Seconds(5400.0));
    assert_eq!(s.run.stop, Some(StopWhen::Return(450.0)));
}

#[test]
fn set_overrides_are_typed_and_recorded() {
    let sets: Vec<String> = [
        "replay.burn_in=20",
        "learn.rate=ramp(1e-3, 1e-4, 1M)",
        "agent.memory={kind=\"none\"}",
        "replay.capacity=200k",
        "task.length=4",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    let r = load(&fixture("preset.toml"), &sets).unwrap();
    assert_eq!(r.spec.replay.burn_in, 20);
    assert_eq!(
        r.spec.learn.rate,
        Schedule::Ramp {
            from: 1e-3,
            to: 1e-4,
            over: 1_000_000
        }
    );
    assert_eq!(r.spec.agent.memory, Memory::None);
    assert_eq!(r.spec.replay.capacity, 200_000);
    // The automatic time limit follows the overridden length: 3 * (4 + 2).
    assert_eq!(r.spec.task.int("time_limit"), Some(18));
    assert_eq!(
        r.origins["replay.burn_in"],
        Origin::Set("replay.burn_in=20".into())
    );
    // Values from an extended file are marked as preset values, with their line.
    let r = load(&fixture("child.toml"), &[]).unwrap();
    assert_eq!(
        r.origins["learn.discount"],
        Origin::Preset {
            path: fixture("preset.toml"),
            line: 16
        }
    );
    assert_eq!(
        r.origins["task.length"],
        Origin::File {
            path: fixture("child.toml"),
            line: 6
        }
    );
    assert_eq!(r.origins["learn.adam_epsilon"], Origin::Default);
    assert_eq!(r.spec.learn.discount, 0.97);
    assert_eq!(r.spec.task.int("length"), Some(6));
    assert_eq!(r.spec.task.int("time_limit"), Some(24));
    // Changing a part's kind drops the old kind's settings; the task too.
    let r = load(
        &fixture("child.toml"),
        &["agent.memory.kind=lstm".into(), "task.kind=recall".into()],
    )
    .unwrap();
    assert_eq!(r.spec.agent.memory, Memory::Lstm { size: 128 });
    assert_eq!(r.spec.task.kind, "recall");
    assert_eq!(r.spec.task.int("symbols"), Some(4));
    // A deep set merges into a part of the same kind.
    let r = load(&fixture("preset.toml"), &["agent.memory.size=256".into()]).unwrap();
    assert_eq!(r.spec.agent.memory, Memory::Lstm { size: 256 });
}

#[test]
fn explain_shows_origins_and_docs() {
    let p = fixture("child.toml");
    let r = load(&p, &["replay.burn_in=12".into()]).unwrap();
    let text = explain(&r);
    let line = |key: &str| -> String {
        text.lines()
            .find(|l| l.starts_with(&format!("{key} =")))
            .unwrap_or_else(|| panic!("no {key} in\n{text}"))
            .to_string()
    };
    // From the file itself, from the extended file, from --set, from defaults.
    assert!(
        line("name").contains(&format!("[{}:2]", p.display())),
        "{}",
        line("name")
    );
    let preset = fixture("preset.toml");
    assert!(
        line("discount").contains(&format!("[preset {}:16]", preset.display())),
        "{}",
        line("discount")
    );
    assert!(line("burn_in").contains("[--set replay.burn_in=12]"));
    assert!(line("adam_epsilon").contains("[default]"));
    assert!(line("burn_in").contains("only warm the recurrent state"));
    // And it reads back to the same spec.
    assert_eq!(spec_of(&text), r.spec);
}

#[test]
fn round_trip_through_to_toml_and_explain() {
    for p in shipped() {
        let r = load(&p, &[]).unwrap();
        let back = load_str(&to_toml(&r.spec), "stored.toml", &[])
            .unwrap_or_else(|e| panic!("{}:\n{e}\n{}", p.display(), to_toml(&r.spec)));
        assert_eq!(back.spec, r.spec, "{}", p.display());
        assert_eq!(spec_of(&explain(&r)), r.spec, "{}", p.display());
        // Every expanded variant round-trips too.
        for (label, s) in expand(&r).unwrap() {
            assert_eq!(spec_of(&to_toml(&s)), s, "{} {label}", p.display());
        }
    }
    let s = spec_of(
        r#"
[task]
kind = "fog-grid"
[agent]
torso = { kind = "conv", channels = [8, 16, 16], kernels = [3, 3, 1], strides = [1, 2, 1], out = 64 }
head = { kind = "quantile", quantiles = 5, kappa = 0.5 }
previous_action_reward = false
[learn]
rate = "ramp(0.003, 1e-5, 77)"
loss = "huber"
discount = 1
[replay]
start_state = "zero"
[run]
budget = "90s"
eval = { every = 0 }
"#,
    );
    assert_eq!(spec_of(&to_toml(&s)), s);
}

#[test]
fn vary_expands_axes_times_seeds() {
    let r = load(&fixture("compare.toml"), &[]).unwrap();
    assert_eq!(r.vary.axes.len(), 1);
    assert_eq!(r.vary.seeds, vec![1, 2, 3]);
    let v = expand(&r).unwrap();
    let labels: Vec<&str> = v.iter().map(|(l, _)| l.as_str()).collect();
    assert_eq!(
        labels,
        [
            "agent.memory=lstm/seed=1",
            "agent.memory=lstm/seed=2",
            "agent.memory=lstm/seed=3",
            "agent.memory=none/seed=1",
            "agent.memory=none/seed=2",
            "agent.memory=none/seed=3"
        ]
    );
    for (i, (_, s)) in v.iter().enumerate() {
        assert_eq!(s.run.seed, [1, 2, 3][i % 3]);
        let want = if i < 3 {
            Memory::Lstm { size: 64 }
        } else {
            Memory::None
        };
        assert_eq!(s.agent.memory, want);
        // The default of previous_action_reward follows the memory of the variant.
        assert_eq!(s.agent.previous_action_reward, i < 3);
        assert_eq!(s.task, r.spec.task);
    }

    // Command-line axes add to (or replace) the file's, seeds replace its seeds.
    let v = expand_with(
        &r,
        &[("replay.burn_in".into(), vec!["5".into(), "15".into()])],
        Some(vec![7]),
    )
    .unwrap();
    assert_eq!(v.len(), 4);
    assert_eq!(v[1].0, "agent.memory=lstm/replay.burn_in=15/seed=7");
    assert_eq!(v[1].1.replay.burn_in, 15);
    assert!(v.iter().all(|(_, s)| s.run.seed == 7));
    let v = expand_with(
        &r,
        &[(
            "agent.memory".into(),
            vec!["{kind=\"lstm\", size=8}".into()],
        )],
        Some(vec![]),
    )
    .unwrap();
    assert_eq!(v.len(), 1);
    assert_eq!(v[0].1.agent.memory, Memory::Lstm { size: 8 });

    // No [vary]: the spec itself.
    let r = load(&root().join("specs/tiger.toml"), &[]).unwrap();
    let v = expand(&r).unwrap();
    assert_eq!(v.len(), 1);
    assert_eq!(v[0].0, "base");
    assert_eq!(v[0].1, r.spec);

    // Each value is fine alone, one combination breaks burn_in + 1 + n_step <= sequence.
    let r = load_str(
        "[task]\nkind = \"tmaze\"\n[replay]\noverlap = 5\n[vary]\n\"replay.sequence\" = [17, 40]\n\"learn.n_step\" = [5, 10]\n",
        "v.toml",
        &[],
    )
    .unwrap();
    let e = expand(&r).unwrap_err();
    assert_eq!(e.len(), 1, "{e}");
    assert!(e.diagnostics[0].message.contains("does not fit"), "{e}");
    assert_eq!(e.diagnostics[0].file, "v.toml");
    // A bad command-line axis value is located in its own text.
    let e = expand_with(&r, &[("replay.burn_in".into(), vec!["x".into()])], None).unwrap_err();
    assert_eq!(e.diagnostics[0].file, "--vary", "{e}");
    assert_eq!(e.diagnostics[0].col, 16);
}

#[test]
fn registry_invariants() {
    let mut seen = std::collections::BTreeSet::new();
    for k in KEYS {
        assert!(seen.insert(k.path), "duplicate key {}", k.path);
        assert!(!k.doc.is_empty(), "{} has no doc", k.path);
        assert!(
            !registry::is_section(k.path),
            "{} is both a key and a section",
            k.path
        );
        if let Ty::Choice(c) = k.ty {
            if let KeyDefault::Value(d) = k.default {
                assert!(
                    c.contains(&d.trim_matches('"')),
                    "{}: default not a choice",
                    k.path
                );
            }
        }
        if let Ty::Part(kinds) = k.ty {
            let mut names = std::collections::BTreeSet::new();
            for kind in kinds {
                assert!(
                    names.insert(kind.name),
                    "{}: kind {} twice",
                    k.path,
                    kind.name
                );
                assert!(!kind.doc.is_empty());
                let mut fields = std::collections::BTreeSet::new();
                for f in kind.fields {
                    assert!(
                        fields.insert(f.path),
                        "{} {}: {} twice",
                        k.path,
                        kind.name,
                        f.path
                    );
                    assert!(f.path != "kind" && !f.doc.is_empty());
                }
            }
        }
    }
    // Every default passes its own validator: each kind of each part with all of
    // its defaults makes a valid spec (on a task that fits it).
    for kind in tasks::TASK_KINDS {
        let extra = if kind.name == "process" {
            "command = [\"prog\"]\n"
        } else {
            ""
        };
        spec_of(&format!("[task]\nkind = \"{}\"\n{extra}", kind.name));
    }
    for part in ["agent.torso", "agent.memory", "agent.head"] {
        let Ty::Part(kinds) = registry::find(part).unwrap().ty else {
            panic!()
        };
        for kind in kinds {
            let (section, key) = part.split_once('.').unwrap();
            spec_of(&format!(
                "[task]\nkind = \"fog-grid\"\n[{section}]\n{key} = {{ kind = \"{}\" }}\n",
                kind.name
            ));
        }
    }
    // Every key of a resolved spec has an origin and a doc in `explain`.
    let r = load_str("[task]\nkind = \"tmaze\"\n", "t.toml", &[]).unwrap();
    for line in explain(&r).lines().filter(|l| l.contains(" = ")) {
        let (_, comment) = line.split_once("# [").expect(line);
        let doc = comment.split_once("] ").expect(line).1;
        assert!(!doc.trim().is_empty(), "no doc: {line}");
    }
}

#[test]
fn committed_reference_is_current() {
    let path = root().join("docs/spec-reference.md");
    let now = reference_markdown();
    if std::env::var_os("MNEMON_BLESS").is_some() {
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        std::fs::write(&path, &now).unwrap();
    }
    let committed = std::fs::read_to_string(&path).unwrap_or_default();
    assert!(
        committed == now,
        "docs/spec-reference.md is stale: run `mnemon explain --reference > docs/spec-reference.md` \
         (or MNEMON_BLESS=1 cargo test -p mnemon-spec)"
    );
    // Every key and every kind's setting is in it.
    for k in KEYS {
        assert!(
            now.contains(&format!("`{}", k.path)),
            "{} undocumented",
            k.path
        );
        if let Ty::Part(kinds) = k.ty {
            for kind in kinds {
                for f in kind.fields {
                    assert!(now.contains(&format!("`{}.{}`", k.path, f.path)));
                }
            }
        }
    }
}

// ---- property tests --------------------------------------------------------------

fn located(e: &Errors) -> Result<(), TestCaseError> {
    prop_assert!(!e.is_empty());
    for d in &e.diagnostics {
        prop_assert!(!d.file.is_empty());
        prop_assert!(d.line >= 1 && d.col >= 1, "{:?}", d);
        prop_assert!(!d.message.is_empty());
    }
    let _ = e.to_string(); // rendering must not panic either
    Ok(())
}

const BASE: &str = r#"name = "p"
[task]
kind = "tmaze"
length = 6
[agent]
memory = { kind = "lstm", size = 32 }
head = { kind = "quantile", quantiles = 4 }
[replay]
capacity = "20k"
sequence = 30
burn_in = 5
[learn]
rate = "ramp(1e-3, 1e-4, 50k)"
[run]
budget = "20m"
stop = { success = 0.9 }
[vary]
"agent.memory" = [{ kind = "none" }, { kind = "lstm", size = 8 }]
seeds = [1, 2]
"#;

const SET_KEYS: &[&str] = &[
    "replay.burn_in",
    "replay.sequence",
    "learn.rate",
    "agent.memory",
    "agent.memory.size",
    "agent.head.quantiles",
    "task.kind",
    "task.length",
    "run.budget",
    "run.stop",
    "run.eval.every",
    "name",
    "vary.seeds",
    "acting",
    "replay..x",
    "",
    "zz.top",
    "task.kind.x",
];

const SET_VALUES: &[&str] = &[
    "0",
    "-1",
    "7",
    "99999999999999999999",
    "1.5",
    "true",
    "\"text\"",
    "lstm",
    "none",
    "{kind=\"none\"}",
    "{kind=\"lstm\", size=0}",
    "[1, 2]",
    "[]",
    "ramp(1,2,3)",
    "points(5:1)",
    "2M",
    "20m",
    "{ success = 2 }",
    "",
    "=",
    "cartpole",
    "fog-grid",
    "\u{e9}\u{301}",
];

fn set_pair() -> impl Strategy<Value = String> {
    (
        prop::sample::select(SET_KEYS),
        prop::sample::select(SET_VALUES),
        any::<bool>(),
    )
        .prop_map(|(k, v, eq)| {
            if eq {
                format!("{k}={v}")
            } else {
                format!("{k}{v}")
            }
        })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 400, ..ProptestConfig::default() })]

    #[test]
    fn random_bytes_never_panic(bytes in prop::collection::vec(any::<u8>(), 0..300)) {
        let text = String::from_utf8_lossy(&bytes);
        if let Err(e) = load_str(&text, "r.toml", &[]) {
            located(&e)?;
        }
    }

    #[test]
    fn mutated_specs_never_panic(
        cuts in prop::collection::vec((0usize..600, 0usize..8, prop::sample::select(&["", "\"", "[", "]", "=", "{", "}", ",", "\n", "x", "1", "-", "k", ".", "#", "é", "kind", "ramp(", "\"lstm\""][..])), 1..5),
        sets in prop::collection::vec(set_pair(), 0..4),
    ) {
        let mut text = BASE.to_string();
        for (at, len, insert) in cuts {
            let mut a = at.min(text.len());
            while !text.is_char_boundary(a) { a -= 1; }
            let mut b = (a + len).min(text.len());
            while !text.is_char_boundary(b) { b += 1; }
            text.replace_range(a..b, insert);
        }
        match load_str(&text, "m.toml", &sets) {
            Err(e) => located(&e)?,
            Ok(r) => {
                // Whatever loads must expand (or fail with located errors) and round-trip.
                if let Err(e) = expand(&r) { located(&e)?; }
                prop_assert_eq!(spec_of(&to_toml(&r.spec)), r.spec.clone());
            }
        }
    }

    #[test]
    fn random_sets_never_panic(sets in prop::collection::vec(set_pair(), 1..6)) {
        match load_str(BASE, "b.toml", &sets) {
            Err(e) => located(&e)?,
            Ok(r) => prop_assert_eq!(spec_of(&to_toml(&r.spec)), r.spec.clone()),
        }
    }
}

#[test]
fn renamed_keys_still_load_with_a_warning() {
    let old = "[task]\nkind = \"tmaze\"\n[acting]\nrefresh = 160\n";
    let r = load_str(old, "old.toml", &[]).unwrap();
    assert_eq!(r.spec.acting.round, 160);
    assert_eq!(r.warnings.len(), 1, "{:?}", r.warnings);
    assert!(
        r.warnings[0].starts_with("old.toml:4:1: warning:")
            && r.warnings[0].contains("`acting.round`"),
        "{:?}",
        r.warnings
    );
    assert!(r.origins.contains_key("acting.round"));
    // A --set under the old name overrides the new name written in the file.
    let new = "[task]\nkind = \"tmaze\"\n[acting]\nround = 160\n";
    let r = load_str(new, "new.toml", &["acting.refresh=300".into()]).unwrap();
    assert_eq!(r.spec.acting.round, 300);
    assert_eq!(r.warnings.len(), 1, "{:?}", r.warnings);
    assert!(
        r.warnings[0].starts_with("--set:1:1: warning:"),
        "{:?}",
        r.warnings
    );
    let r = load_str(new, "new.toml", &[]).unwrap();
    assert!(r.warnings.is_empty(), "{:?}", r.warnings);
    assert_eq!(r.spec.acting.round, 160);
    // A [vary] axis under the old name varies the new key.
    let varied = format!("{new}[vary]\n\"acting.refresh\" = [100, 200]\n");
    let r = load_str(&varied, "vary.toml", &[]).unwrap();
    let rounds: Vec<u64> = expand(&r)
        .unwrap()
        .iter()
        .map(|(_, s)| s.acting.round)
        .collect();
    assert_eq!(rounds, [100, 200]);
}

#[test]
fn every_built_in_fog_grid_map_is_accepted() {
    for map in tasks::FOG_GRID_MAPS {
        let text = format!("[task]\nkind = \"fog-grid\"\nmap = \"{map}\"\n");
        let r = load_str(&text, "m.toml", &[]).unwrap();
        assert_eq!(r.spec.task.str("map"), Some(*map));
    }
}
