//! Invalid specs, each with the file, line, column and a key phrase of the
//! problem it must be reported as. All go through the public API (`load_str` for
//! text, `load` for files under tests/spec_errors/); `crates/cli/tests/check.rs`
//! runs a few through the `mnemon check` binary for the exit code.

use std::path::PathBuf;

use mnemon_spec::{load, load_str, Diagnostic, Errors};

struct Case {
    what: &'static str,
    text: &'static str,
    sets: &'static [&'static str],
    file: &'static str,
    line: usize,
    col: usize,
    phrase: &'static str,
}

const fn case(
    what: &'static str,
    text: &'static str,
    sets: &'static [&'static str],
    file: &'static str,
    line: usize,
    col: usize,
    phrase: &'static str,
) -> Case {
    Case {
        what,
        text,
        sets,
        file,
        line,
        col,
        phrase,
    }
}

const T: &str = "t.toml";
const S: &str = "--set";
const NO: &[&str] = &[];

/// A task first, so that what fails is the rule about another section.
macro_rules! with_task {
    ($rest:literal) => {
        concat!("[task]\nkind = \"tmaze\"\n", $rest)
    };
}

/// Top-level lines, then a task.
macro_rules! before_task {
    ($top:literal) => {
        concat!($top, "[task]\nkind = \"tmaze\"\n")
    };
}

const CASES: &[Case] = &[
    case("typo key", with_task!("[replay]\nburnin = 5\n"), NO, T, 4, 1, "did you mean \"burn_in\"?"),
    case("typo section", with_task!("[replya]\nburn_in = 5\n"), NO, T, 3, 2, "did you mean \"replay\"?"),
    case("typo top-level key", before_task!("nmae = \"x\"\n"), NO, T, 1, 1, "did you mean \"name\"?"),
    case("top-level key after [task]", with_task!("name = \"x\"\n"), NO, T, 3, 1, "put it before [task]"),
    case("key in the wrong section", with_task!("[learn]\nburn_in = 5\n"), NO, T, 4, 1, "write it as replay.burn_in"),
    case("wrong type: bool for int", with_task!("[replay]\nsequence = true\n"), NO, T, 4, 12, "must be an integer"),
    case("wrong type: int for bool", with_task!("[agent]\nprevious_action_reward = 1\n"), NO, T, 4, 26, "must be true or false"),
    case("wrong type: string for float", with_task!("[learn]\ndiscount = \"0.9\"\n"), NO, T, 4, 12, "write numbers without quotes"),
    case("negative", with_task!("[replay]\nburn_in = -1\n"), NO, T, 4, 11, "out of range: got -1"),
    case("out of range above", with_task!("[learn]\ndiscount = 1.5\n"), NO, T, 4, 12, "a number in (0, 1]"),
    case("open bound", with_task!("[learn]\ndiscount = 0\n"), NO, T, 4, 12, "out of range"),
    case("n_step below 1", with_task!("[learn]\nn_step = 0\n"), NO, T, 4, 10, "an integer in 1..=1000"),
    case("TOML syntax: unclosed table", "[replay\nburn_in = 5\n", NO, T, 1, 8, "TOML syntax error"),
    case("TOML syntax: duplicate key", with_task!("[replay]\nburn_in = 5\nburn_in = 6\n"), NO, T, 5, 1, "duplicate key"),
    case("bad suffix", with_task!("[replay]\ncapacity = \"10x\"\n"), NO, T, 4, 13, "expected a count"),
    case("minutes where a count is expected", with_task!("[run]\ncheckpoint_every = \"2m\"\n"), NO, T, 4, 21, "`m` means minutes"),
    case("bad budget", with_task!("[run]\nbudget = \"20q\"\n"), NO, T, 4, 11, "expected a count"),
    case("schedule with too few arguments", with_task!("[learn]\nrate = \"ramp(1e-3, 1e-4)\"\n"), NO, T, 4, 9, "ramp takes 3 arguments"),
    case("schedule with a bad number", with_task!("[learn]\nrate = \"ramp(1e-3, x, 1M)\"\n"), NO, T, 4, 20, "expected a number, got \"x\""),
    case("schedule must stay positive", with_task!("[learn]\nrate = -1e-3\n"), NO, T, 4, 8, "must be > 0"),
    case("schedule points must increase", with_task!("[learn]\nrate = \"points(0:1e-3, 0:1e-4)\"\n"), NO, T, 4, 24, "steps must increase"),
    case("unknown schedule", with_task!("[learn]\nrate = \"cosine(1, 2)\"\n"), NO, T, 4, 9, "expected a schedule"),
    case("unknown task kind", "[task]\nkind = \"tmaz\"\n", NO, T, 2, 8, "did you mean \"tmaze\"?"),
    case("no task", "name = \"x\"\n", NO, T, 1, 1, "no [task] section"),
    case("task setting typo", with_task!("lenght = 3\n"), NO, T, 3, 1, "did you mean \"length\"?"),
    case("tmaze time limit too short", with_task!("length = 10\ntime_limit = 5\n"), NO, T, 4, 14, "too short"),
    case("fog-grid view must be odd", "[task]\nkind = \"fog-grid\"\nview = 4\n", NO, T, 3, 8, "must be odd"),
    case("fog-grid unknown map", "[task]\nkind = \"fog-grid\"\nmap = \"depto\"\n", NO, T, 3, 7, "did you mean \"depot\"?"),
    case("process needs a command", "[task]\nkind = \"process\"\n", NO, T, 2, 8, "needs `command`"),
    case("tiger accuracy range", "[task]\nkind = \"tiger\"\nlisten_accuracy = 0.3\n", NO, T, 3, 19, "[0.5, 1]"),
    case("burn-in + n-step must fit", with_task!("[replay]\nsequence = 10\nburn_in = 5\n"), NO, T, 5, 11, "does not fit in replay.sequence (10)"),
    case("overlap below sequence", with_task!("[replay]\nsequence = 20\noverlap = 20\nburn_in = 2\n"), NO, T, 5, 11, "must be less than replay.sequence"),
    case("capacity holds a batch", with_task!("[replay]\ncapacity = 100\n"), NO, T, 4, 12, "cannot hold one batch"),
    case("warmup within capacity", with_task!("[replay]\ncapacity = \"2k\"\n[learn]\nwarmup = \"5k\"\n"), NO, T, 6, 10, "learning would never start"),
    case("quantile head needs 2 quantiles", with_task!("[agent]\nhead = { kind = \"quantile\", quantiles = 1 }\n"), NO, T, 4, 41, "an integer in 2..=1024"),
    case("conv torso needs images", with_task!("[agent]\ntorso = { kind = \"conv\" }\n"), NO, T, 4, 18, "needs image observations"),
    case("conv lists must match", "[task]\nkind = \"fog-grid\"\n[agent]\ntorso = { kind = \"conv\", channels = [8, 8], kernels = [3] }\n", NO, T, 4, 55, "kernels has 1 entries but channels has 2"),
    case("stop needs evaluation", with_task!("[run]\neval = { every = 0 }\nstop = { success = 0.9 }\n"), NO, T, 5, 8, "run.eval.every is 0"),
    case("success stop without a success flag", "[task]\nkind = \"cartpole\"\n[run]\nstop = { success = 0.9 }\n", NO, T, 4, 8, "no success flag"),
    case("tiger has no success flag", "[task]\nkind = \"tiger\"\n[run]\nstop = { success = 0.9 }\n", NO, T, 4, 8, "no success flag"),
    case("fog-grid view beyond the table", "[task]\nkind = \"fog-grid\"\nview = 33\n", NO, T, 3, 8, "3..=31"),
    case("old and new name of a key together", with_task!("[acting]\nround = 100\nrefresh = 200\n"), NO, T, 5, 1, "old name of `acting.round`, and both are given"),
    case("eval needs episodes", with_task!("[run]\neval = { episodes = 0 }\n"), NO, T, 4, 21, "at least 1"),
    case("unknown stop condition", with_task!("[run]\nstop = { sucess = 0.9 }\n"), NO, T, 4, 10, "did you mean \"success\"?"),
    case("unknown memory kind", with_task!("[agent]\nmemory = { kind = \"gru\" }\n"), NO, T, 4, 19, "unknown memory kind \"gru\""),
    case("setting of another kind", with_task!("[agent]\nmemory = { kind = \"none\", size = 5 }\n"), NO, T, 4, 27, "unknown setting `size`"),
    case("choice typo", with_task!("[replay]\nstart_state = \"stord\"\n"), NO, T, 4, 15, "did you mean \"stored\"?"),
    case("name unusable as a folder", before_task!("name = \"my run\"\n"), NO, T, 1, 8, "cannot be used as a folder name"),
    case("section given as a value", before_task!("replay = 3\n"), NO, T, 1, 10, "must be a table"),
    case("extends in a stored spec", before_task!("extends = \"x.toml\"\n"), NO, T, 1, 1, "only be used in a spec file"),
    case("bad --set path", with_task!(""), &["replay.burnin=5"], S, 1, 8, "did you mean \"burn_in\"?"),
    case("bad --set section", with_task!(""), &["replya.burn_in=5"], S, 1, 1, "did you mean \"replay\"?"),
    case("bad --set value", with_task!(""), &["replay.burn_in=abc"], S, 1, 16, "expected a count"),
    case("bad --set range", with_task!(""), &["learn.discount=2"], S, 1, 16, "out of range"),
    case("--set without =", with_task!(""), &["replay.burn_in"], S, 1, 1, "KEY=VALUE"),
    case("--set with an empty path part", with_task!(""), &["replay..burn_in=3"], S, 1, 8, "not a key path"),
    case("--set through a scalar", before_task!("name = \"x\"\n"), &["name.x=1"], S, 1, 1, "not a table"),
    case("--set breaks a rule", with_task!(""), &["replay.sequence=12"], S, 1, 17, "does not fit"),
    case("vary value out of range", with_task!("[vary]\n\"replay.burn_in\" = [5, -1]\n"), NO, T, 4, 24, "out of range"),
    case("vary unknown axis", with_task!("[vary]\n\"agent.memroy\" = [{ kind = \"none\" }]\n"), NO, T, 4, 1, "did you mean \"memory\"?"),
    case("vary duplicate seed", with_task!("[vary]\nseeds = [1, 2, 1]\n"), NO, T, 4, 16, "listed twice"),
    case("vary axis not a list", with_task!("[vary]\n\"replay.burn_in\" = 5\n"), NO, T, 4, 20, "must be a list"),
];

fn text_of(d: &Diagnostic) -> String {
    format!(
        "{} | {} | {}",
        d.message,
        d.expected.clone().unwrap_or_default(),
        d.help.clone().unwrap_or_default()
    )
}

fn assert_reported(what: &str, e: &Errors, file: &str, line: usize, col: usize, phrase: &str) {
    let hit = e.diagnostics.iter().any(|d| {
        d.file.ends_with(file) && d.line == line && d.col == col && text_of(d).contains(phrase)
    });
    assert!(
        hit,
        "case {what:?}: expected {file}:{line}:{col} with {phrase:?}, got:\n{}",
        e.diagnostics
            .iter()
            .map(|d| format!("  {}:{}:{} {}", d.file, d.line, d.col, text_of(d)))
            .collect::<Vec<_>>()
            .join("\n")
    );
    // The rendered form names the place too.
    let shown = e.to_string();
    assert!(
        shown.contains(&format!("{file}:{line}:{col}")),
        "case {what:?}: rendered:\n{shown}"
    );
}

#[test]
fn invalid_specs_are_reported_where_they_are() {
    assert!(CASES.len() >= 30);
    let mut failures = Vec::new();
    for c in CASES {
        let sets: Vec<String> = c.sets.iter().map(|s| s.to_string()).collect();
        match load_str(c.text, T, &sets) {
            Ok(_) => failures.push(format!("case {:?} was accepted", c.what)),
            Err(e) => {
                let r = std::panic::catch_unwind(|| {
                    assert_reported(c.what, &e, c.file, c.line, c.col, c.phrase)
                });
                if let Err(p) = r {
                    failures.push(
                        p.downcast_ref::<String>()
                            .cloned()
                            .unwrap_or_else(|| "?".into()),
                    );
                }
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n\n"));
}

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/spec_errors")
        .join(name)
}

#[test]
fn extends_problems_are_located() {
    let e = load(&fixture("missing_extends.toml"), &[]).unwrap_err();
    assert_reported(
        "missing extends file",
        &e,
        "missing_extends.toml",
        3,
        11,
        "cannot read the extended spec",
    );

    let e = load(&fixture("cycle_a.toml"), &[]).unwrap_err();
    assert_reported("extends cycle", &e, "cycle_b.toml", 2, 11, "extends cycle:");
    let msg = &e.diagnostics[0].message;
    // The chain is listed in order and closes on the file that started it.
    let a = msg.find("cycle_a.toml").unwrap();
    let b = msg.find("cycle_b.toml").unwrap();
    assert!(a < b && msg.rfind("cycle_a.toml").unwrap() > b, "{msg}");

    let e = load(&fixture("extends_number.toml"), &[]).unwrap_err();
    assert_reported(
        "extends not a string",
        &e,
        "extends_number.toml",
        2,
        11,
        "must be a string",
    );

    let e = load(&fixture("no_such_file.toml"), &[]).unwrap_err();
    assert!(e.diagnostics[0].message.contains("cannot read spec"), "{e}");
    assert_eq!((e.diagnostics[0].line, e.diagnostics[0].col), (1, 1));
}

#[test]
fn all_errors_are_reported_not_just_the_first() {
    let text = std::fs::read_to_string(fixture("typos.toml")).unwrap();
    let e = load_str(
        &text,
        "tests/spec_errors/typos.toml",
        &["learn.batch=0".into()],
    )
    .unwrap_err();
    let rendered = e.to_string();
    let expected_file = fixture("typos.expected");
    if std::env::var_os("MNEMON_BLESS").is_some() {
        std::fs::write(&expected_file, &rendered).unwrap();
    }
    let expected = std::fs::read_to_string(&expected_file).unwrap();
    assert_eq!(
        rendered, expected,
        "rerun with MNEMON_BLESS=1 if the change is intended"
    );
    assert!(e.len() >= 5, "{rendered}");
}
