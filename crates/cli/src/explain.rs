//! `mnemon explain`: print the fully resolved spec as TOML, each value with where it
//! came from (default, file:line, preset, --set) and its one-line doc; or, with
//! `--reference`, the generated key reference (docs/spec-reference.md).

use std::path::PathBuf;

use clap::Args;

use crate::Failure;

/// Arguments of `mnemon explain`.
#[derive(Args, Debug)]
#[command(after_help = "Examples:\n  \
    mnemon explain specs/tmaze-none.toml\n  \
    mnemon explain specs/tmaze-lstm.toml --set replay.burn_in=20 --set agent.memory.size=128\n  \
    mnemon explain --reference > docs/spec-reference.md")]
pub struct ExplainArgs {
    /// Spec file to explain.
    #[arg(value_name = "SPEC", required_unless_present = "reference")]
    pub spec: Option<PathBuf>,
    /// Override a key, like `replay.burn_in=20` (repeatable).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
    /// Print the reference of every spec key (Markdown) instead.
    #[arg(long, conflicts_with = "spec")]
    pub reference: bool,
}

/// Print the explanation (or the reference) to stdout.
pub fn run_explain(args: ExplainArgs) -> Result<(), Failure> {
    if args.reference {
        print!("{}", mnemon_spec::reference_markdown());
        return Ok(());
    }
    let Some(path) = args.spec else {
        return Err(Failure::BadInput("mnemon explain: give a SPEC file".into()));
    };
    match mnemon_spec::load(&path, &args.sets) {
        Ok(r) => {
            for w in &r.warnings {
                eprintln!("{w}");
            }
            print!("{}", mnemon_spec::explain(&r));
            Ok(())
        }
        Err(e) => Err(Failure::BadInput(e.render(crate::color()))),
    }
}
