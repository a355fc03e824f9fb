//! The key registry: every spec key defined once, with its dotted path, type,
//! default, range or choices and one-line doc (habit 2 of STYLE.md). Validation
//! (`resolve/`), `explain` and `docs/spec-reference.md` (`emit.rs`) all read it,
//! so they cannot drift apart.
//!
//! Parts (`agent.torso`, `agent.memory`, `agent.head`) and the task (`task`) are
//! tables chosen by `kind`; each kind lists its own fields here or in `tasks.rs`.

/// An inclusive or exclusive bound of a real range.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bound {
    /// The bound.
    pub value: f64,
    /// Whether the bound itself is allowed.
    pub inclusive: bool,
}

/// Closed bound.
pub const fn at(value: f64) -> Option<Bound> {
    Some(Bound {
        value,
        inclusive: true,
    })
}

/// Open bound.
pub const fn above(value: f64) -> Option<Bound> {
    Some(Bound {
        value,
        inclusive: false,
    })
}

/// The type of a key, with its range or choices.
#[derive(Debug, Clone, Copy)]
pub enum Ty {
    /// Whole number in `min..=max`; strings with suffixes k, M, G are accepted.
    Int {
        /// Smallest allowed value.
        min: i64,
        /// Largest allowed value.
        max: i64,
    },
    /// Real number within optional bounds; integers are accepted.
    Float {
        /// Lower bound.
        lo: Option<Bound>,
        /// Upper bound.
        hi: Option<Bound>,
    },
    /// `true` / `false`.
    Bool,
    /// Free text.
    Str,
    /// A run name: letters, digits, `-`, `_`, `.`.
    Name,
    /// One of a fixed list of words.
    Choice(&'static [&'static str]),
    /// List of whole numbers, each in `min..=max`, at least `min_len` of them.
    IntList {
        /// Smallest element.
        min: i64,
        /// Largest element.
        max: i64,
        /// Fewest elements.
        min_len: usize,
    },
    /// Non-empty list of strings.
    StrList,
    /// Any table, passed through.
    AnyTable,
    /// Env steps (`"2M"`) or wall time (`"20m"`, `"90s"`, `"1h"`).
    Budget,
    /// A schedule over steps whose values must be > 0.
    Schedule,
    /// `{}` (none), `{ success = X }` or `{ return = X }`.
    Stop,
    /// A table chosen by its `kind`.
    Part(&'static [Kind]),
}

/// Where a key's default comes from.
#[derive(Debug, Clone, Copy)]
pub enum KeyDefault {
    /// This TOML value.
    Value(&'static str),
    /// Computed from other keys; the text says how.
    Computed(&'static str),
    /// No default: the key must be given.
    Required,
}

/// One key.
#[derive(Debug, Clone, Copy)]
pub struct Key {
    /// Dotted path (`replay.burn_in`); for a kind's field, just its name.
    pub path: &'static str,
    /// Type and range.
    pub ty: Ty,
    /// Default.
    pub default: KeyDefault,
    /// One-line doc.
    pub doc: &'static str,
}

/// One kind of a part (or task) with its own fields.
#[derive(Debug, Clone, Copy)]
pub struct Kind {
    /// The word after `kind =`.
    pub name: &'static str,
    /// One-line doc.
    pub doc: &'static str,
    /// Its settings.
    pub fields: &'static [Key],
    /// For a task kind: what it offers and how `mnemon tasks` describes it (`None`
    /// for kinds of network parts).
    pub task: Option<crate::tasks::TaskFacts>,
}

const fn key(path: &'static str, ty: Ty, default: &'static str, doc: &'static str) -> Key {
    Key {
        path,
        ty,
        default: KeyDefault::Value(default),
        doc,
    }
}

const fn int(min: i64, max: i64) -> Ty {
    Ty::Int { min, max }
}

const fn float(lo: Option<Bound>, hi: Option<Bound>) -> Ty {
    Ty::Float { lo, hi }
}

const BIG: i64 = 1 << 53;

/// Torso kinds.
pub const TORSO_KINDS: &[Kind] = &[
    Kind {
        name: "mlp",
        doc: "fully connected layers",
        fields: &[
            key(
                "layers",
                Ty::IntList {
                    min: 1,
                    max: 65536,
                    min_len: 0,
                },
                "[64]",
                "widths of the hidden layers in order; [] passes the observation through",
            ),
            key(
                "activation",
                Ty::Choice(&["relu", "tanh"]),
                "\"relu\"",
                "activation after each layer",
            ),
        ],
        task: None,
    },
    Kind {
        name: "conv",
        doc: "convolution layers for image observations, then one linear layer",
        fields: &[
            key(
                "channels",
                Ty::IntList {
                    min: 1,
                    max: 4096,
                    min_len: 1,
                },
                "[16, 32]",
                "output channels of each conv layer",
            ),
            key(
                "kernels",
                Ty::IntList {
                    min: 1,
                    max: 64,
                    min_len: 1,
                },
                "[3, 3]",
                "square kernel size of each conv layer (one per entry of channels)",
            ),
            key(
                "strides",
                Ty::IntList {
                    min: 1,
                    max: 64,
                    min_len: 1,
                },
                "[1, 1]",
                "stride of each conv layer (one per entry of channels)",
            ),
            key(
                "out",
                int(1, 65536),
                "128",
                "width of the linear layer after the convs",
            ),
        ],
        task: None,
    },
];

/// Memory kinds.
pub const MEMORY_KINDS: &[Kind] = &[
    Kind {
        name: "lstm",
        doc: "an LSTM carrying hidden and cell state across steps",
        fields: &[key(
            "size",
            int(1, 65536),
            "128",
            "width of the hidden and cell state",
        )],
        task: None,
    },
    Kind {
        name: "none",
        doc: "no memory: the torso output goes straight to the head",
        fields: &[],
        task: None,
    },
];

/// Head kinds.
pub const HEAD_KINDS: &[Kind] = &[
    Kind {
        name: "value",
        doc: "one expected value (Q) per action",
        fields: &[],
        task: None,
    },
    Kind {
        name: "dueling",
        doc: "dueling aggregation V + A - mean(A) (Wang et al. 2016)",
        fields: &[],
        task: None,
    },
    Kind {
        name: "quantile",
        doc: "quantile regression of the return (Dabney et al. 2017); acts on the mean",
        fields: &[
            key(
                "quantiles",
                int(2, 1024),
                "32",
                "quantiles per action (at least 2)",
            ),
            key(
                "kappa",
                float(above(0.0), None),
                "1.0",
                "threshold of the quantile Huber loss",
            ),
        ],
        task: None,
    },
];

/// Every key, in documentation (and `explain`) order.
pub const KEYS: &[Key] = &[
    Key {
        path: "name",
        ty: Ty::Name,
        default: KeyDefault::Computed("the spec file's name without .toml"),
        doc: "experiment name; runs go to <run.out>/<name>/",
    },
    Key {
        path: "extends",
        ty: Ty::Str,
        default: KeyDefault::Computed("none"),
        doc: "a spec this one starts from, relative to this file; its tables are merged key by key",
    },
    Key {
        path: "task",
        ty: Ty::Part(crate::tasks::TASK_KINDS),
        default: KeyDefault::Required,
        doc: "the task the agent learns; `kind` picks it, the other keys are its settings",
    },
    Key {
        path: "agent.previous_action_reward",
        ty: Ty::Bool,
        default: KeyDefault::Computed("true with an lstm memory, false without"),
        doc: "feed the previous action (one-hot) and reward to the network with the observation",
    },
    key(
        "agent.torso",
        Ty::Part(TORSO_KINDS),
        "{ kind = \"mlp\" }",
        "feature extractor applied to each observation",
    ),
    key(
        "agent.memory",
        Ty::Part(MEMORY_KINDS),
        "{ kind = \"lstm\" }",
        "recurrent memory between torso and head",
    ),
    key(
        "agent.head",
        Ty::Part(HEAD_KINDS),
        "{ kind = \"value\" }",
        "what the network predicts per action",
    ),
    key("acting.actors", int(1, 256), "1", "actor threads"),
    key(
        "acting.lanes",
        int(1, 4096),
        "8",
        "task copies stepped together by one actor",
    ),
    key(
        "acting.round",
        int(1, BIG),
        "400",
        "round length: env steps each actor takes (all its lanes together) with one set of parameters before pulling the learner's newest",
    ),
    key(
        "acting.epsilon.base",
        float(at(0.0), at(1.0)),
        "0.4",
        "exploration of the first actor lane; lane i of N explores with base^(1 + spread*i/(N-1))",
    ),
    key(
        "acting.epsilon.spread",
        float(at(0.0), at(100.0)),
        "7.0",
        "how fast exploration falls off across actor lanes",
    ),
    key(
        "replay.capacity",
        int(1, BIG),
        "\"100k\"",
        "transitions kept in replay (at least batch * sequence)",
    ),
    key(
        "replay.sequence",
        int(2, 100_000),
        "40",
        "steps per stored sequence, burn-in included",
    ),
    key(
        "replay.overlap",
        int(0, 100_000),
        "20",
        "steps shared by adjacent sequences of one lane (less than sequence)",
    ),
    key(
        "replay.burn_in",
        int(0, 100_000),
        "10",
        "leading steps of a sequence that only warm the recurrent state",
    ),
    key(
        "replay.start_state",
        Ty::Choice(&["stored", "zero"]),
        "\"stored\"",
        "recurrent state the learner's unroll starts from: the actor's stored one, or zeros",
    ),
    key(
        "replay.priority.exponent",
        float(at(0.0), at(1.0)),
        "0.9",
        "priority exponent alpha; 0 samples uniformly",
    ),
    key(
        "replay.priority.correction",
        float(at(0.0), at(1.0)),
        "0.6",
        "importance-weight exponent beta; 0 turns the correction off",
    ),
    key(
        "replay.priority.mix",
        float(at(0.0), at(1.0)),
        "0.9",
        "eta of a sequence's priority eta*max|d| + (1-eta)*mean|d|",
    ),
    key(
        "learn.discount",
        float(above(0.0), at(1.0)),
        "0.99",
        "discount gamma per step, in (0, 1]",
    ),
    key(
        "learn.n_step",
        int(1, 1000),
        "5",
        "steps of real reward before bootstrapping",
    ),
    key("learn.batch", int(1, 65536), "32", "sequences per learner step"),
    key(
        "learn.rate",
        Ty::Schedule,
        "1e-3",
        "Adam learning rate by learner step: a number, \"ramp(from, to, over)\" or \"points(step:value, ...)\"",
    ),
    key(
        "learn.adam_epsilon",
        float(above(0.0), at(1.0)),
        "1e-3",
        "Adam's epsilon (1e-3 as in Kapturowski et al. 2019)",
    ),
    key(
        "learn.clip",
        float(at(0.0), None),
        "40.0",
        "global gradient-norm clip; 0 turns it off",
    ),
    key(
        "learn.target_every",
        int(1, BIG),
        "1000",
        "learner steps between copies of the online network to the target network",
    ),
    key(
        "learn.rescale",
        float(at(0.0), at(1.0)),
        "1e-3",
        "epsilon of the value rescaling h(x); 0 turns rescaling off",
    ),
    key(
        "learn.warmup",
        int(0, BIG),
        "\"5k\"",
        "transitions in replay before the first learner step",
    ),
    key(
        "learn.replay_ratio",
        float(above(0.0), at(1000.0)),
        "4.0",
        "transitions the learner samples per transition the actors insert",
    ),
    key(
        "learn.loss",
        Ty::Choice(&["squared", "huber"]),
        "\"squared\"",
        "TD error shape of the value and dueling heads (huber: threshold 1)",
    ),
    key(
        "run.budget",
        Ty::Budget,
        "\"200k\"",
        "how long to train: env steps (\"2M\") or wall time (\"20m\", \"90s\", \"1h\")",
    ),
    key(
        "run.seed",
        int(0, BIG),
        "1",
        "seed of every random stream of the run",
    ),
    key(
        "run.checkpoint_every",
        int(0, BIG),
        "\"50k\"",
        "env steps between checkpoints; 0 keeps only the final one",
    ),
    key(
        "run.eval.every",
        int(0, BIG),
        "\"10k\"",
        "env steps between greedy evaluations; 0 turns evaluation off",
    ),
    key(
        "run.eval.episodes",
        int(0, 1_000_000),
        "20",
        "episodes per evaluation (at least 1 when evaluating)",
    ),
    key(
        "run.stop",
        Ty::Stop,
        "{}",
        "stop early when an evaluation reaches { success = X } or { return = X }; {} runs the whole budget",
    ),
    key(
        "run.out",
        Ty::Str,
        "\"runs\"",
        "folder under which each run gets <name>/<run-id>/",
    ),
];

/// Keys that were renamed: `(old path, new path)`. The old path still works, with a
/// warning that names the new one.
pub const RENAMED: &[(&str, &str)] = &[("acting.refresh", "acting.round")];

/// The new path of a renamed key.
pub fn renamed(old: &str) -> Option<&'static str> {
    RENAMED.iter().find(|(o, _)| *o == old).map(|(_, n)| *n)
}

/// Whether `v` lies within the bounds (and is finite).
pub(crate) fn in_bounds(v: f64, lo: &Option<Bound>, hi: &Option<Bound>) -> bool {
    if !v.is_finite() {
        return false;
    }
    let lo_ok = match lo {
        Some(b) if b.inclusive => v >= b.value,
        Some(b) => v > b.value,
        None => true,
    };
    let hi_ok = match hi {
        Some(b) if b.inclusive => v <= b.value,
        Some(b) => v < b.value,
        None => true,
    };
    lo_ok && hi_ok
}

/// The key at exactly `path`.
pub fn find(path: &str) -> Option<&'static Key> {
    KEYS.iter().find(|k| k.path == path)
}

/// Whether `path` is a section (a table that holds keys), like `replay` or
/// `replay.priority`.
pub fn is_section(path: &str) -> bool {
    KEYS.iter().any(|k| {
        k.path.len() > path.len()
            && k.path.starts_with(path)
            && k.path.as_bytes()[path.len()] == b'.'
    })
}

/// The names directly under section `prefix` ("" for the top level).
pub fn children(prefix: &str) -> Vec<&'static str> {
    let mut out: Vec<&'static str> = Vec::new();
    for k in KEYS {
        let rest = if prefix.is_empty() {
            Some(k.path)
        } else {
            k.path
                .strip_prefix(prefix)
                .and_then(|r| r.strip_prefix('.'))
        };
        if let Some(r) = rest {
            let first = r.split('.').next().unwrap_or(r);
            if !out.contains(&first) {
                out.push(first);
            }
        }
    }
    if prefix.is_empty() {
        out.push("vary");
    }
    out
}

/// Every full path whose last part is `name` (to say "`burn_in` belongs in [replay]").
pub fn paths_ending_in(name: &str) -> Vec<String> {
    let mut out = Vec::new();
    for k in KEYS {
        if k.path.rsplit('.').next() == Some(name) {
            out.push(k.path.to_string());
        }
        if let Ty::Part(kinds) = k.ty {
            for kind in kinds {
                for f in kind.fields {
                    if f.path == name {
                        let p = format!("{}.{}", k.path, f.path);
                        if !out.contains(&p) {
                            out.push(p);
                        }
                    }
                }
            }
        }
    }
    out
}

/// Human text of a type, for "expected ..." labels and the reference.
pub fn describe(ty: &Ty) -> String {
    match ty {
        Ty::Int { min, max } => {
            if *max >= BIG {
                format!("an integer >= {min} (k, M, G suffixes allowed, like \"200k\")")
            } else {
                format!("an integer in {min}..={max}")
            }
        }
        Ty::Float { lo, hi } => match (lo, hi) {
            (Some(l), Some(h)) => format!(
                "a number in {}{}, {}{}",
                if l.inclusive { "[" } else { "(" },
                l.value,
                h.value,
                if h.inclusive { "]" } else { ")" }
            ),
            (Some(l), None) => format!(
                "a number {} {}",
                if l.inclusive { ">=" } else { ">" },
                l.value
            ),
            (None, Some(h)) => format!(
                "a number {} {}",
                if h.inclusive { "<=" } else { "<" },
                h.value
            ),
            (None, None) => "a number".into(),
        },
        Ty::Bool => "true or false".into(),
        Ty::Str => "a string".into(),
        Ty::Name => "a name of letters, digits, '-', '_' and '.'".into(),
        Ty::Choice(c) => format!(
            "one of {}",
            c.iter()
                .map(|s| format!("\"{s}\""))
                .collect::<Vec<_>>()
                .join(", ")
        ),
        Ty::IntList { min, min_len, .. } => {
            if *min_len > 0 {
                format!("a non-empty list of integers >= {min}")
            } else {
                format!("a list of integers >= {min}")
            }
        }
        Ty::StrList => "a non-empty list of strings".into(),
        Ty::AnyTable => "a table".into(),
        Ty::Budget => "env steps (\"2M\") or a duration (\"20m\", \"90s\", \"1h\")".into(),
        Ty::Schedule => {
            "a number > 0, \"ramp(from, to, over)\" or \"points(step:value, ...)\"".into()
        }
        Ty::Stop => "{}, { success = X } or { return = X }".into(),
        Ty::Part(kinds) => format!(
            "a table with kind = {}",
            kinds
                .iter()
                .map(|k| format!("\"{}\"", k.name))
                .collect::<Vec<_>>()
                .join(" | ")
        ),
    }
}
