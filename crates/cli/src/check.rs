//! `mnemon check`: load and validate spec files, printing every problem found.
//! Exit 0 when all are valid, 2 when any is not.

use std::path::PathBuf;

use clap::Args;

use crate::Failure;

/// Arguments of `mnemon check`.
#[derive(Args, Debug)]
#[command(after_help = "Examples:\n  \
    mnemon check specs/tmaze-lstm.toml\n  \
    mnemon check specs/*.toml specs/presets/*.toml\n  \
    mnemon check specs/tiger.toml --set replay.burn_in=20 --set learn.rate=\"ramp(1e-3, 1e-4, 100k)\"")]
pub struct CheckArgs {
    /// Spec files to check.
    #[arg(required = true, value_name = "SPEC")]
    pub specs: Vec<PathBuf>,
    /// Override a key, like `replay.burn_in=20` (repeatable; applied to every spec).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub sets: Vec<String>,
    /// Print nothing for valid specs.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Check each spec; all problems of all files are printed before returning.
pub fn run_check(args: CheckArgs) -> Result<(), Failure> {
    let mut bad = 0usize;
    for path in &args.specs {
        match mnemon_spec::load(path, &args.sets) {
            Ok(r) => {
                for w in &r.warnings {
                    eprintln!("{w}");
                }
                let variants = match mnemon_spec::expand(&r) {
                    Ok(v) => v.len(),
                    Err(e) => {
                        bad += 1;
                        eprintln!("{}", e.render(crate::color()));
                        continue;
                    }
                };
                if !args.quiet {
                    let extra = if variants > 1 {
                        format!(", {variants} variants")
                    } else {
                        String::new()
                    };
                    println!(
                        "ok  {}  ({}: task {}{extra})",
                        path.display(),
                        r.spec.name,
                        r.spec.task.kind
                    );
                }
            }
            Err(e) => {
                bad += 1;
                eprintln!("{}\n", e.render(crate::color()));
            }
        }
    }
    if bad == 0 {
        Ok(())
    } else {
        Err(Failure::BadInput(format!(
            "mnemon check: {bad} of {} spec{} invalid",
            args.specs.len(),
            if args.specs.len() == 1 { "" } else { "s" }
        )))
    }
}
