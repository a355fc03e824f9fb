//! `mnemon tasks`: list the registered tasks; `mnemon tasks try` rolls episodes of
//! one task with a simple policy (a user's first check of a new task);
//! `mnemon tasks bench` measures stepping speed for 1 and 8 lanes.

use std::io::Write;
use std::path::Path;
use std::time::Instant;

use clap::{Args, Subcommand};
use mnemon_envs::rng::Rng;
use mnemon_envs::{Ending, Lanes, TaskError};
use mnemon_spec::registry::describe;
use mnemon_spec::tasks::{self, TASK_KINDS};
use mnemon_spec::{TaskSpec, Value};

use crate::Failure;

/// writeln! that ignores a closed stdout (`mnemon tasks | head`) instead of panicking.
macro_rules! out {
    ($w:expr, $($arg:tt)*) => {{
        let _ = writeln!($w, $($arg)*);
    }};
}

/// Arguments of `mnemon tasks`.
#[derive(Args, Debug)]
#[command(after_help = "Examples:\n  \
    mnemon tasks\n  \
    mnemon tasks try tmaze --set length=4 --episodes 200\n  \
    mnemon tasks try cartpole --policy fixed:push-right\n  \
    mnemon tasks try process --set 'command=python3 examples/tasks/beacon.py'\n  \
    mnemon tasks try specs/tmaze-lstm.toml\n  \
    mnemon tasks bench cartpole")]
pub struct TasksArgs {
    /// What to do; without one, list every task.
    #[command(subcommand)]
    pub action: Option<TasksAction>,
}

/// `mnemon tasks` subcommands.
#[derive(Subcommand, Debug)]
pub enum TasksAction {
    /// Roll episodes of a task and print returns, lengths, success rate and speed.
    Try(TryArgs),
    /// Measure steps per second for 1 and 8 lanes.
    Bench(BenchArgs),
}

/// How `try` picks actions.
#[derive(Debug, Clone, PartialEq)]
pub enum Policy {
    /// Uniformly random actions.
    Random,
    /// Always the same action (by name or index).
    Fixed(String),
}

fn parse_policy(s: &str) -> Result<Policy, String> {
    match s {
        "random" => Ok(Policy::Random),
        _ => match s.strip_prefix("fixed:") {
            Some(a) if !a.is_empty() => Ok(Policy::Fixed(a.to_string())),
            _ => Err(format!(
                "unknown policy \"{s}\"; expected random or fixed:ACTION (an action name or index)"
            )),
        },
    }
}

/// Arguments of `mnemon tasks try`.
#[derive(Args, Debug)]
pub struct TryArgs {
    /// A task kind (see `mnemon tasks`) or a spec file whose `[task]` to use.
    #[arg(value_name = "SPEC_OR_KIND")]
    pub target: String,
    /// Episodes to roll.
    #[arg(long, default_value_t = 100)]
    pub episodes: u64,
    /// random, or fixed:ACTION with an action name or index.
    #[arg(long, default_value = "random", value_parser = parse_policy)]
    pub policy: Policy,
    /// Set a task setting, like `length=4` (repeatable).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
    /// Seed of the episodes and of the random policy.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

/// Arguments of `mnemon tasks bench`.
#[derive(Args, Debug)]
pub struct BenchArgs {
    /// A task kind or a spec file.
    #[arg(value_name = "SPEC_OR_KIND")]
    pub target: String,
    /// Lane counts to measure.
    #[arg(long, value_delimiter = ',', default_value = "1,8")]
    pub lanes: Vec<usize>,
    /// Environment steps per measurement (all lanes together); default 4M, 20k for
    /// outside-process tasks.
    #[arg(long)]
    pub steps: Option<u64>,
    /// Set a task setting, like `length=4` (repeatable).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
}

/// Entry point of `mnemon tasks`.
pub fn run(args: TasksArgs) -> Result<(), Failure> {
    match args.action {
        None => {
            let _ = std::io::stdout().write_all(listing().as_bytes());
            Ok(())
        }
        Some(TasksAction::Try(a)) => run_try(a, &mut std::io::stdout()),
        Some(TasksAction::Bench(a)) => run_bench(a, &mut std::io::stdout()),
    }
}

pub(crate) fn show(v: &Value) -> String {
    match v {
        Value::Int(i) => i.to_string(),
        Value::Float(f) => format!("{f:?}"),
        Value::Bool(b) => b.to_string(),
        Value::Str(s) => format!("{s:?}"),
        Value::List(items) => format!(
            "[{}]",
            items.iter().map(show).collect::<Vec<_>>().join(", ")
        ),
        Value::Table(t) => format!(
            "{{{}}}",
            t.iter()
                .map(|(k, v)| format!("{k} = {}", show(v)))
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

/// The text of `mnemon tasks`, from the task table in `mnemon_spec::tasks`.
pub fn listing() -> String {
    let mut out = String::new();
    for kind in TASK_KINDS {
        out.push_str(&format!("{}\n", kind.name));
        match &kind.task {
            Some(facts) => {
                out.push_str(&format!("  {}\n", facts.summary));
                out.push_str(&format!("  partially observable: {}\n", facts.hidden));
            }
            None => out.push_str(&format!("  {}\n", kind.doc)),
        }
        let defaults = TaskSpec {
            kind: kind.name.to_string(),
            settings: Default::default(),
        };
        match mnemon_envs::make(&defaults) {
            Ok(task) => {
                out.push_str(&format!("  observation: {}\n", task.obs_space().describe()));
                out.push_str(&format!(
                    "  actions: {}\n",
                    task.action_space().names.join(", ")
                ));
            }
            Err(_) => {
                out.push_str("  observation and actions: declared by the program in its hello\n")
            }
        }
        if let Some(facts) = &kind.task {
            out.push_str(&format!("  episode end: {}\n", facts.episode_end));
            out.push_str(&format!("  source: {}\n", facts.source));
        }
        out.push_str("  settings:\n");
        for f in kind.fields {
            let default = tasks::default_value(f)
                .as_ref()
                .map(show)
                .unwrap_or_else(|| "(required)".into());
            out.push_str(&format!(
                "    {} = {}  ({}) {}\n",
                f.path,
                default,
                describe(&f.ty),
                f.doc
            ));
        }
        out.push('\n');
    }
    out
}

/// The task a `SPEC_OR_KIND` argument names, with `--set` values applied: each
/// value is read by its setting's type in the task table, then the settings are
/// checked together and defaults filled in.
pub fn task_spec(target: &str, sets: &[String]) -> Result<TaskSpec, Failure> {
    if tasks::kind(target).is_ok() {
        let mut spec = TaskSpec {
            kind: target.to_string(),
            settings: Default::default(),
        };
        for set in sets {
            let Some((key, text)) = set.split_once('=') else {
                return Err(Failure::BadInput(format!(
                    "--set {set}: expected KEY=VALUE"
                )));
            };
            let key = key.trim().strip_prefix("task.").unwrap_or(key.trim());
            let value = tasks::parse_setting(target, key, text.trim())
                .map_err(|e| Failure::BadInput(format!("--set {set}: {e}")))?;
            spec.settings.insert(key.to_string(), value);
        }
        return tasks::complete(&spec).map_err(|e| Failure::BadInput(format!("mnemon tasks: {e}")));
    }
    let path = Path::new(target);
    if !path.exists() {
        let kinds: Vec<&str> = TASK_KINDS.iter().map(|k| k.name).collect();
        return Err(Failure::BadInput(format!(
            "mnemon tasks: \"{target}\" is neither a task kind ({}) nor a spec file",
            kinds.join(", ")
        )));
    }
    let sets: Vec<String> = sets
        .iter()
        .map(|s| {
            if s.starts_with("task.") {
                s.clone()
            } else {
                format!("task.{s}")
            }
        })
        .collect();
    match mnemon_spec::load(path, &sets) {
        Ok(r) => {
            for w in &r.warnings {
                eprintln!("{w}");
            }
            Ok(r.spec.task)
        }
        Err(e) => Err(Failure::BadInput(e.render(crate::color()))),
    }
}

/// Map a task error to an exit code. Settings, maps, unknown kinds and outside
/// programs that misbehave are the user's input (2); anything else is internal (1).
fn task_failure(e: TaskError) -> Failure {
    match e {
        TaskError::Settings(_) | TaskError::Map { .. } | TaskError::Process { .. } => {
            Failure::BadInput(format!("mnemon tasks: {e}"))
        }
        other => Failure::Internal(anyhow::anyhow!("{other}")),
    }
}

fn describe_spec(spec: &TaskSpec) -> String {
    let parts: Vec<String> = spec
        .settings
        .iter()
        .map(|(k, v)| format!("{k} = {}", show(v)))
        .collect();
    if parts.is_empty() {
        spec.kind.clone()
    } else {
        format!("{} ({})", spec.kind, parts.join(", "))
    }
}

fn print_messages(lanes: &mut Lanes, buf: &mut Vec<String>) {
    lanes.drain_messages(buf);
    for line in buf.drain(..) {
        eprintln!("{line}");
    }
}

fn run_try(args: TryArgs, w: &mut dyn Write) -> Result<(), Failure> {
    if args.episodes == 0 {
        return Err(Failure::BadInput(
            "mnemon tasks try: --episodes must be at least 1".into(),
        ));
    }
    let spec = task_spec(&args.target, &args.sets)?;
    let mut lanes = Lanes::new(&spec, 1, args.seed).map_err(task_failure)?;
    let names = lanes.task().action_space().names;
    let fixed = match &args.policy {
        Policy::Random => None,
        Policy::Fixed(a) => Some(match names.iter().position(|n| n == a) {
            Some(i) => i,
            None => match a.parse::<usize>() {
                Ok(i) if i < names.len() => i,
                _ => {
                    return Err(Failure::BadInput(format!(
                        "mnemon tasks try: --policy fixed:{a}: no such action; {} has: {} (or an index 0..{})",
                        spec.kind,
                        names.join(", "),
                        names.len()
                    )))
                }
            },
        }),
    };
    let has_success = lanes.task().has_success();
    out!(w, "task      {}", describe_spec(&spec));
    out!(w, "observe   {}", lanes.task().obs_space().describe());
    out!(w, "actions   {}", names.join(", "));
    let policy = match fixed {
        Some(i) => format!("always {}", names[i]),
        None => "uniformly random".into(),
    };
    out!(
        w,
        "policy    {policy}, {} episodes, seed {}",
        args.episodes,
        args.seed
    );
    let mut rng = Rng::new(args.seed ^ 0x05EE_D0FA_11CE);
    let (mut returns, mut lengths) = (Vec::new(), Vec::new());
    let (mut successes, mut terminal, mut truncated, mut steps) = (0u64, 0u64, 0u64, 0u64);
    let mut messages = Vec::new();
    let start = Instant::now();
    while (returns.len() as u64) < args.episodes {
        let action = fixed.unwrap_or_else(|| rng.below(names.len()));
        let result = lanes.step(&[action]).map(|s| s[0]);
        let step = match result {
            Ok(s) => s,
            Err(e) => {
                print_messages(&mut lanes, &mut messages);
                return Err(task_failure(e));
            }
        };
        steps += 1;
        if let Some(ep) = step.episode {
            returns.push(ep.total_reward);
            lengths.push(ep.length);
            successes += (ep.success == Some(true)) as u64;
            match ep.ending {
                Ending::Terminal => terminal += 1,
                _ => truncated += 1,
            }
            print_messages(&mut lanes, &mut messages);
        }
    }
    let secs = start.elapsed().as_secs_f64();
    let n = returns.len() as f64;
    let stats = |v: &[f64]| {
        let mean = v.iter().sum::<f64>() / v.len() as f64;
        let min = v.iter().cloned().fold(f64::INFINITY, f64::min);
        let max = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        (mean, min, max)
    };
    let (rm, rlo, rhi) = stats(&returns);
    let lf: Vec<f64> = lengths.iter().map(|&l| l as f64).collect();
    let (lm, llo, lhi) = stats(&lf);
    out!(w, "return    mean {rm:.4}  min {rlo:.4}  max {rhi:.4}");
    out!(w, "length    mean {lm:.2}  min {llo}  max {lhi}");
    if has_success {
        out!(
            w,
            "success   {:.1}% ({successes} of {})",
            100.0 * successes as f64 / n,
            returns.len()
        );
    } else {
        out!(w, "success   not defined for {}", spec.kind);
    }
    out!(w, "endings   terminal {terminal}, truncated {truncated}");
    out!(
        w,
        "speed     {} steps/s ({steps} steps in {:.2} ms, policy included)",
        rate(steps as f64 / secs),
        secs * 1e3
    );
    Ok(())
}

fn rate(r: f64) -> String {
    if r >= 1e6 {
        format!("{:.2}M", r / 1e6)
    } else if r >= 1e3 {
        format!("{:.1}k", r / 1e3)
    } else {
        format!("{r:.0}")
    }
}

fn run_bench(args: BenchArgs, w: &mut dyn Write) -> Result<(), Failure> {
    let spec = task_spec(&args.target, &args.sets)?;
    let default_steps = if spec.kind == "process" {
        20_000
    } else {
        4_000_000
    };
    let total = args.steps.unwrap_or(default_steps).max(1);
    out!(
        w,
        "task {}: steps per second, all lanes together, actions uniformly random",
        describe_spec(&spec)
    );
    for &count in &args.lanes {
        if count == 0 {
            return Err(Failure::BadInput(
                "mnemon tasks bench: --lanes values must be at least 1".into(),
            ));
        }
        let mut lanes = Lanes::new(&spec, count, 7).map_err(task_failure)?;
        let n = lanes.task().action_space().count();
        // Actions drawn up front so the measurement is the task's stepping alone.
        let mut rng = Rng::new(3);
        let pool: Vec<usize> = (0..4096 * count).map(|_| rng.below(n)).collect();
        let rounds = total.div_ceil(count as u64);
        let start = Instant::now();
        let mut episodes = 0u64;
        for r in 0..rounds {
            let at = (r as usize % 4096) * count;
            let steps = lanes.step(&pool[at..at + count]).map_err(task_failure)?;
            episodes += steps.iter().filter(|s| s.episode.is_some()).count() as u64;
        }
        let secs = start.elapsed().as_secs_f64();
        let done = rounds * count as u64;
        out!(
            w,
            "  {count:>3} lane{}  {:>9} steps/s  ({done} steps, {episodes} episodes, {secs:.3} s)",
            if count == 1 { " " } else { "s" },
            rate(done as f64 / secs)
        );
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn listing_names_every_task_with_spaces_and_settings() {
        let text = listing();
        for kind in [
            "tmaze",
            "cartpole",
            "cartpole-positions",
            "tiger",
            "recall",
            "fog-grid",
            "process",
        ] {
            assert!(text.lines().any(|l| l == kind), "{kind} missing:\n{text}");
        }
        assert!(text.contains("image 5x5x5"));
        assert!(text.contains("length = 10"));
        assert!(text.contains("command = (required)"));
    }

    #[test]
    fn sets_are_typed_by_the_schema() {
        let s = task_spec("tmaze", &["length=4".into()]).ok().unwrap();
        assert_eq!(s.int("length"), Some(4));
        let s = task_spec("process", &["command=python3 x.py".into()])
            .ok()
            .unwrap();
        assert_eq!(s.strings("command").unwrap(), ["python3", "x.py"]);
        for bad in ["lenght=4", "length=four", "length"] {
            match task_spec("tmaze", &[bad.into()]) {
                Err(Failure::BadInput(msg)) => {
                    assert!(msg.contains("length") || msg.contains("KEY=VALUE"), "{msg}")
                }
                _ => panic!("{bad} accepted"),
            }
        }
        assert!(matches!(
            task_spec("no-such-task", &[]),
            Err(Failure::BadInput(_))
        ));
        // What `tasks try` accepts, `check` accepts: both read the one task table.
        let s = task_spec("fog-grid", &["map=aisles".into()]).ok().unwrap();
        assert_eq!(s.str("map"), Some("aisles"));
        let spec = "[task]\nkind = \"fog-grid\"\nmap = \"aisles\"\n";
        assert!(mnemon_spec::load_str(spec, "aisles.toml", &[]).is_ok());
        for bad in ["view=4", "view=33", "map=depo"] {
            assert!(
                matches!(
                    task_spec("fog-grid", &[bad.into()]),
                    Err(Failure::BadInput(_))
                ),
                "{bad} accepted"
            );
        }
    }

    fn try_text(
        target: &str,
        policy: Policy,
        sets: &[&str],
        episodes: u64,
    ) -> Result<String, Failure> {
        let args = TryArgs {
            target: target.into(),
            episodes,
            policy,
            sets: sets.iter().map(|s| s.to_string()).collect(),
            seed: 1,
        };
        let mut out = Vec::new();
        run_try(args, &mut out)?;
        Ok(String::from_utf8(out).unwrap())
    }

    #[test]
    fn try_runs_every_builtin_task() {
        for kind in [
            "tmaze",
            "cartpole",
            "cartpole-positions",
            "tiger",
            "recall",
            "fog-grid",
        ] {
            let text = try_text(kind, Policy::Random, &[], 5).ok().unwrap();
            assert!(
                text.contains(&format!("task      {kind}")) && text.contains("steps/s"),
                "{text}"
            );
        }
        // Always east in the T-maze: stuck at the junction until the time limit.
        let text = try_text("tmaze", Policy::Fixed("east".into()), &["length=3"], 4)
            .ok()
            .unwrap();
        assert!(text.contains("success   0.0% (0 of 4)"), "{text}");
        assert!(text.contains("endings   terminal 0, truncated 4"), "{text}");
        assert!(text.contains("length    mean 15.00"), "{text}");
        // Always listening to the tiger: -1 per step over the horizon.
        let text = try_text("tiger", Policy::Fixed("0".into()), &["horizon=7"], 3)
            .ok()
            .unwrap();
        assert!(
            text.contains("return    mean -7.0000  min -7.0000  max -7.0000"),
            "{text}"
        );
        assert!(matches!(
            try_text("tmaze", Policy::Fixed("jump".into()), &[], 5),
            Err(Failure::BadInput(_))
        ));
        assert_eq!(parse_policy("fixed:east"), Ok(Policy::Fixed("east".into())));
        assert!(parse_policy("greedy").is_err());
    }

    #[test]
    fn try_runs_the_python_example() {
        let python = std::process::Command::new("python3")
            .arg("--version")
            .output();
        if !python.map(|o| o.status.success()).unwrap_or(false) {
            eprintln!("note: python3 not found; the outside-task example was not tried");
            return;
        }
        let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../examples/tasks/beacon.py");
        let set = format!("command=python3 {}", script.display());
        // Flying east reaches the east end in 5 steps: the beacon when it is there
        // (return 1 - 5 * 0.01 = 0.95), else the wrong end (-0.05); both terminal.
        let text = try_text("process", Policy::Fixed("fly-east".into()), &[&set], 20)
            .ok()
            .unwrap();
        assert!(text.contains("length    mean 5.00  min 5  max 5"), "{text}");
        assert!(
            text.contains("endings   terminal 20, truncated 0"),
            "{text}"
        );
        assert!(text.contains("min -0.0500  max 0.9500"), "{text}");
        let bad = format!(
            "command=python3 {}",
            Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("../../envs/tests/fixtures/misbehave.py version")
                .display()
        );
        match try_text("process", Policy::Random, &[&bad], 1) {
            Err(Failure::BadInput(msg)) => assert!(msg.contains("protocol version 2"), "{msg}"),
            _ => panic!("a wrong protocol version must be bad input"),
        }
    }
}
