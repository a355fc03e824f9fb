//! Plots drawn to a temporary folder: both files exist, the PNG decodes to the asked size
//! and is not blank, the SVG holds the variant names and axis labels, and no temporary
//! file is left behind.

use std::path::{Path, PathBuf};

use mnemon_report::plot::{final_scores, learning_curves, PlotOptions};
use mnemon_report::{build_report, CurvePoint, Error, ReportOptions, RunRecord};

/// Two variants x 3 seeds on a made-up task; `memory` learns faster, and its seed 2 stops
/// early at 6000 steps (as a run that met its target would).
fn runs() -> Vec<RunRecord> {
    let mut out = Vec::new();
    for (variant, rate, stop) in [
        ("feedforward", 0.5, [10_000, 10_000, 10_000]),
        ("memory", 1.2, [10_000, 6_000, 10_000]),
    ] {
        for seed in 0..3u64 {
            let curve: Vec<CurvePoint> = (1..=10u64)
                .map(|k| k * 1000)
                .filter(|&s| s <= stop[seed as usize])
                .map(|s| {
                    let x = s as f64 / 10_000.0;
                    CurvePoint {
                        env_steps: s,
                        wall_seconds: s as f64 / 500.0,
                        eval_return: 100.0 * (1.0 - (-rate * 3.0 * x).exp()) + 4.0 * seed as f64,
                        eval_success: Some((x * rate).min(1.0)),
                    }
                })
                .collect();
            let last = *curve.last().unwrap();
            out.push(RunRecord {
                variant: variant.into(),
                seed,
                task: "beacon-delay".into(),
                run_dir: PathBuf::from(format!("runs/{variant}/{seed}")),
                final_return: last.eval_return,
                final_success: last.eval_success,
                curve,
                env_steps: last.env_steps,
                wall_seconds: last.wall_seconds,
            });
        }
    }
    out
}

fn check_png(path: &Path, w: u32, h: u32) {
    let img = image::open(path)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()))
        .to_rgb8();
    assert_eq!(img.dimensions(), (w, h));
    let first = img.get_pixel(0, 0);
    let distinct = img.pixels().filter(|p| *p != first).count();
    assert!(
        distinct > (w * h / 100) as usize,
        "PNG looks blank: {distinct} non-background pixels"
    );
    // Some pixels carry the first palette colour (Okabe-Ito blue) or a blend toward it.
    assert!(
        img.pixels().any(|p| p.0[2] > 150 && p.0[0] < 60),
        "no blue line drawn"
    );
}

fn no_temp_files(dir: &Path) {
    for e in std::fs::read_dir(dir).unwrap() {
        let name = e.unwrap().file_name().to_string_lossy().into_owned();
        assert!(!name.contains(".tmp"), "temporary file left behind: {name}");
    }
}

/// Where to keep a copy of the plots for a person to look at, if asked.
fn keep(dir: &Path) {
    if let Some(to) = std::env::var_os("MNEMON_REPORT_KEEP_PLOTS") {
        std::fs::create_dir_all(&to).unwrap();
        for e in std::fs::read_dir(dir).unwrap() {
            let e = e.unwrap();
            std::fs::copy(e.path(), Path::new(&to).join(e.file_name())).unwrap();
        }
    }
}

#[test]
fn learning_curves_svg_and_png() {
    let dir = tempfile::tempdir().unwrap();
    let (svg, png) = (dir.path().join("curves.svg"), dir.path().join("curves.png"));
    let opts = PlotOptions::default();
    learning_curves(&runs(), &svg, &png, &opts).unwrap();
    check_png(&png, opts.width, opts.height);
    let text = std::fs::read_to_string(&svg).unwrap();
    for needle in [
        "feedforward",
        "memory",
        "env steps",
        "greedy evaluation return",
        "beacon-delay",
    ] {
        assert!(text.contains(needle), "SVG lacks {needle:?}");
    }
    no_temp_files(dir.path());
    keep(dir.path());
}

#[test]
fn final_scores_svg_and_png() {
    let dir = tempfile::tempdir().unwrap();
    let (svg, png) = (dir.path().join("final.svg"), dir.path().join("final.png"));
    let report = build_report(&runs(), &ReportOptions::default()).unwrap();
    let opts = PlotOptions {
        width: 900,
        height: 420,
        ..PlotOptions::default()
    };
    final_scores(&report, &svg, &png, &opts).unwrap();
    check_png(&png, 900, 420);
    let text = std::fs::read_to_string(&svg).unwrap();
    for needle in [
        "feedforward",
        "memory",
        "final greedy evaluation return",
        "IQM",
    ] {
        assert!(text.contains(needle), "SVG lacks {needle:?}");
    }
    no_temp_files(dir.path());
    keep(dir.path());
}

#[test]
fn plots_overwrite_existing_files() {
    let dir = tempfile::tempdir().unwrap();
    let (svg, png) = (dir.path().join("c.svg"), dir.path().join("c.png"));
    std::fs::write(&svg, "old").unwrap();
    std::fs::write(&png, "old").unwrap();
    learning_curves(
        &runs(),
        &svg,
        &png,
        &PlotOptions {
            resamples: 50,
            ..PlotOptions::default()
        },
    )
    .unwrap();
    assert!(std::fs::read_to_string(&svg).unwrap().starts_with("<svg"));
    check_png(&png, 1000, 600);
}

#[test]
fn unwritable_target_is_an_error_naming_it() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("missing-folder").join("c.svg");
    let png = dir.path().join("c.png");
    let err = learning_curves(
        &runs(),
        &svg,
        &png,
        &PlotOptions {
            resamples: 10,
            ..PlotOptions::default()
        },
    )
    .unwrap_err();
    assert!(matches!(err, Error::Io { .. }));
    assert!(err.to_string().contains("missing-folder"), "{err}");
}

#[test]
fn mixed_tasks_and_no_evaluations_are_errors() {
    let dir = tempfile::tempdir().unwrap();
    let (svg, png) = (dir.path().join("c.svg"), dir.path().join("c.png"));
    let mut mixed = runs();
    mixed[0].task = "cartpole".into();
    assert!(matches!(
        learning_curves(&mixed, &svg, &png, &PlotOptions::default()),
        Err(Error::MixedTasks(_))
    ));
    let mut empty = runs();
    for r in &mut empty {
        r.curve.clear();
    }
    assert!(matches!(
        learning_curves(&empty, &svg, &png, &PlotOptions::default()),
        Err(Error::Plot(_))
    ));
    assert!(!svg.exists() && !png.exists());
}

#[test]
fn one_variant_and_many_variants_draw() {
    let dir = tempfile::tempdir().unwrap();
    let one: Vec<RunRecord> = runs()
        .into_iter()
        .filter(|r| r.variant == "memory")
        .collect();
    let report = build_report(&one, &ReportOptions::default()).unwrap();
    let (svg, png) = (dir.path().join("one.svg"), dir.path().join("one.png"));
    final_scores(&report, &svg, &png, &PlotOptions::default()).unwrap();
    check_png(&png, 1000, 600);
    learning_curves(
        &one,
        &dir.path().join("one-c.svg"),
        &dir.path().join("one-c.png"),
        &PlotOptions::default(),
    )
    .unwrap();

    // Nine variants (the palette has eight colours, so one repeats) with long names.
    let mut many = Vec::new();
    for k in 0..9 {
        for mut r in runs().into_iter().filter(|r| r.variant == "memory") {
            r.variant = format!("lstm-{}-units-burn-in-{}", 64 << (k % 3), 10 * k);
            r.final_return += 3.0 * k as f64;
            for p in &mut r.curve {
                p.eval_return += 3.0 * k as f64;
            }
            many.push(r);
        }
    }
    let report = build_report(&many, &ReportOptions::default()).unwrap();
    let (svg, png) = (dir.path().join("many.svg"), dir.path().join("many.png"));
    final_scores(&report, &svg, &png, &PlotOptions::default()).unwrap();
    // Grown to 48 px a variant (170 + 48 * 9 = 602) so rows do not overlap.
    check_png(&png, 1000, 602);
    assert!(std::fs::read_to_string(&svg)
        .unwrap()
        .contains("lstm-256-units-burn-in-80"));
    learning_curves(
        &many,
        &dir.path().join("many-c.svg"),
        &dir.path().join("many-c.png"),
        &PlotOptions::default(),
    )
    .unwrap();
    keep(dir.path());
}
