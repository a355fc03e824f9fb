//! The comparison report: runs grouped by variant, one row of statistics per variant
//! against a baseline, rendered as markdown, as an aligned text table or as JSON.
//! [`build_report`] does the statistics (with `stats`); the renderers only format.
//! The `mnemon compare` command gathers [`RunRecord`]s and calls these.

use std::fmt;

use serde::Serialize;

use crate::error::{Error, Result};
use crate::runs::{CurvePoint, RunRecord};
use crate::stats::{self, Interval, Welch};

/// The level a run must reach for time-to-threshold.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Threshold {
    /// Evaluation success rate at least this (0 to 1).
    Success(f64),
    /// Mean evaluation return at least this.
    Return(f64),
}

impl Threshold {
    /// A label such as `success >= 0.9` or `return >= 195`.
    pub fn label(&self) -> String {
        match self {
            Threshold::Success(v) => format!("success >= {v}"),
            Threshold::Return(v) => format!("return >= {v}"),
        }
    }

    /// Whether an evaluation meets the threshold. A success threshold is never met by a
    /// task without success.
    pub fn is_met(&self, p: &CurvePoint) -> bool {
        match *self {
            Threshold::Success(v) => p.eval_success.is_some_and(|s| s >= v),
            Threshold::Return(v) => p.eval_return >= v,
        }
    }
}

impl fmt::Display for Threshold {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.label())
    }
}

/// How to build a report.
#[derive(Clone, Debug, PartialEq)]
pub struct ReportOptions {
    /// The variant the others are compared with; `None` takes the first variant in input
    /// order.
    pub baseline: Option<String>,
    /// Level for time-to-threshold; `None` leaves those columns out.
    pub threshold: Option<Threshold>,
    /// Bootstrap resamples per interval (default 2000).
    pub resamples: usize,
    /// Confidence level of the intervals (default 0.95).
    pub level: f64,
    /// Seed of the bootstrap generator; every interval uses it, so a report is
    /// reproducible.
    pub seed: u64,
}

impl Default for ReportOptions {
    fn default() -> Self {
        ReportOptions {
            baseline: None,
            threshold: None,
            resamples: 2000,
            level: 0.95,
            seed: 0,
        }
    }
}

/// Point estimates and intervals of one score over a variant's seeds.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ScoreSummary {
    /// Mean over seeds.
    pub mean: f64,
    /// Median over seeds.
    pub median: f64,
    /// Interquartile mean over seeds ([`stats::iqm`]).
    pub iqm: f64,
    /// Bootstrap interval of the mean.
    pub mean_ci: Interval,
    /// Bootstrap interval of the IQM.
    pub iqm_ci: Interval,
}

/// How fast a variant's seeds first met the threshold during training.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct TimeToThreshold {
    /// Seeds with an evaluation meeting the threshold.
    pub reached: usize,
    /// Seeds in all.
    pub n: usize,
    /// Median env steps at the first evaluation meeting it, over the seeds that did.
    pub median_env_steps: Option<f64>,
    /// Median training wall seconds at that evaluation, over the seeds that did.
    pub median_wall_seconds: Option<f64>,
}

/// One variant's row of the report. Scores are the final returns (and success rates) of
/// the caller's evaluation of each run's final checkpoint.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct VariantRow {
    /// Variant name.
    pub variant: String,
    /// Seeds of its runs, in input order.
    pub seeds: Vec<u64>,
    /// Number of runs.
    pub n: usize,
    /// Final return of each run, in the order of `seeds`.
    pub final_returns: Vec<f64>,
    /// Mean final return.
    pub mean: f64,
    /// Median final return.
    pub median: f64,
    /// Interquartile mean of the final return.
    pub iqm: f64,
    /// Bootstrap interval of the mean final return.
    pub mean_ci: Interval,
    /// Bootstrap interval of the IQM of the final return.
    pub iqm_ci: Interval,
    /// The same statistics of the final success rate, when every run has one.
    pub success: Option<ScoreSummary>,
    /// P(a random seed of this variant has a higher final return than a random seed of
    /// the baseline), ties 1/2; `None` for the baseline itself.
    pub prob_improvement: Option<f64>,
    /// Welch's t test of equal mean final return against the baseline; `None` for the
    /// baseline and where the test is undefined (fewer than 2 seeds, no variance).
    pub welch: Option<Welch>,
    /// Time to threshold, when the report has a threshold.
    pub time_to_threshold: Option<TimeToThreshold>,
}

/// A comparison of variants on one task.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Report {
    /// The task every run trained on.
    pub task: String,
    /// The baseline variant.
    pub baseline: String,
    /// Label of the time-to-threshold level, if any.
    pub threshold: Option<String>,
    /// Bootstrap resamples per interval.
    pub resamples: usize,
    /// Confidence level of the intervals.
    pub level: f64,
    /// Bootstrap seed.
    pub seed: u64,
    /// One row per variant, in first-seen order.
    pub rows: Vec<VariantRow>,
}

/// Builds the report: groups `runs` by variant in first-seen order and computes each
/// variant's row.
///
/// # Errors
/// [`Error::NoRuns`] for no runs; [`Error::MixedTasks`] listing the runs of each task when
/// they are not all of one task; [`Error::UnknownBaseline`] when `opts.baseline` names no
/// variant; [`Error::InvalidOption`] for a level outside (0, 1) or zero resamples.
pub fn build_report(runs: &[RunRecord], opts: &ReportOptions) -> Result<Report> {
    let task = single_task(runs)?.to_string();
    if !(opts.level > 0.0 && opts.level < 1.0) {
        return Err(Error::InvalidOption(format!(
            "confidence level must be between 0 and 1 (e.g. 0.95), got {}",
            opts.level
        )));
    }
    if opts.resamples == 0 {
        return Err(Error::InvalidOption(
            "bootstrap resamples must be at least 1".into(),
        ));
    }
    let groups = group_by_variant(runs);
    let baseline = match &opts.baseline {
        None => groups[0].0.to_string(),
        Some(b) if groups.iter().any(|(v, _)| v == b) => b.clone(),
        Some(b) => {
            return Err(Error::UnknownBaseline {
                name: b.clone(),
                known: groups
                    .iter()
                    .map(|(v, _)| *v)
                    .collect::<Vec<_>>()
                    .join(", "),
            })
        }
    };
    let base_returns: Vec<f64> = groups
        .iter()
        .find(|(v, _)| *v == baseline)
        .map(|(_, rs)| rs.iter().map(|r| r.final_return).collect())
        .unwrap_or_default();
    let rows = groups
        .iter()
        .map(|(variant, rs)| {
            let returns: Vec<f64> = rs.iter().map(|r| r.final_return).collect();
            let summary = summarize(&returns, opts);
            let success = rs
                .iter()
                .map(|r| r.final_success)
                .collect::<Option<Vec<f64>>>()
                .map(|s| summarize(&s, opts));
            let is_base = *variant == baseline;
            VariantRow {
                variant: variant.to_string(),
                seeds: rs.iter().map(|r| r.seed).collect(),
                n: rs.len(),
                mean: summary.mean,
                median: summary.median,
                iqm: summary.iqm,
                mean_ci: summary.mean_ci,
                iqm_ci: summary.iqm_ci,
                success,
                prob_improvement: (!is_base)
                    .then(|| stats::probability_of_improvement(&returns, &base_returns)),
                welch: if is_base {
                    None
                } else {
                    stats::welch_t(&returns, &base_returns)
                },
                time_to_threshold: opts.threshold.map(|t| time_to_threshold(rs, t)),
                final_returns: returns,
            }
        })
        .collect();
    Ok(Report {
        task,
        baseline,
        threshold: opts.threshold.map(|t| t.label()),
        resamples: opts.resamples,
        level: opts.level,
        seed: opts.seed,
        rows,
    })
}

/// The one task all `runs` share. Errors as [`build_report`] for no runs or mixed tasks.
pub(crate) fn single_task(runs: &[RunRecord]) -> Result<&str> {
    let first = runs.first().ok_or(Error::NoRuns)?;
    if runs.iter().all(|r| r.task == first.task) {
        return Ok(&first.task);
    }
    let mut tasks: Vec<(&str, Vec<String>)> = Vec::new();
    for r in runs {
        let dir = r.run_dir.display().to_string();
        match tasks.iter_mut().find(|(t, _)| *t == r.task) {
            Some((_, dirs)) => dirs.push(dir),
            None => tasks.push((&r.task, vec![dir])),
        }
    }
    let parts: Vec<String> = tasks
        .iter()
        .map(|(t, dirs)| format!("task `{t}`: {}", dirs.join(", ")))
        .collect();
    Err(Error::MixedTasks(parts.join("; ")))
}

/// Runs grouped by variant, variants in first-seen order, runs in input order.
pub(crate) fn group_by_variant(runs: &[RunRecord]) -> Vec<(&str, Vec<&RunRecord>)> {
    let mut groups: Vec<(&str, Vec<&RunRecord>)> = Vec::new();
    for r in runs {
        match groups.iter_mut().find(|(v, _)| *v == r.variant) {
            Some((_, rs)) => rs.push(r),
            None => groups.push((&r.variant, vec![r])),
        }
    }
    groups
}

fn summarize(x: &[f64], opts: &ReportOptions) -> ScoreSummary {
    // One stratum: the seeds of one variant on one task.
    let strata = [x.to_vec()];
    let ci = |stat: &dyn Fn(&[Vec<f64>]) -> f64| {
        stats::bootstrap_ci(&strata, stat, opts.resamples, opts.level, opts.seed)
    };
    ScoreSummary {
        mean: stats::mean(x),
        median: stats::median(x),
        iqm: stats::iqm(x),
        mean_ci: ci(&stats::mean_pooled),
        iqm_ci: ci(&stats::iqm_pooled),
    }
}

fn time_to_threshold(runs: &[&RunRecord], t: Threshold) -> TimeToThreshold {
    let hits: Vec<&CurvePoint> = runs
        .iter()
        .filter_map(|r| r.curve.iter().find(|p| t.is_met(p)))
        .collect();
    let steps: Vec<f64> = hits.iter().map(|p| p.env_steps as f64).collect();
    let secs: Vec<f64> = hits.iter().map(|p| p.wall_seconds).collect();
    TimeToThreshold {
        reached: hits.len(),
        n: runs.len(),
        median_env_steps: (!hits.is_empty()).then(|| stats::median(&steps)),
        median_wall_seconds: (!hits.is_empty()).then(|| stats::median(&secs)),
    }
}

/// Column alignment in rendered tables.
#[derive(Clone, Copy, PartialEq)]
enum Align {
    Left,
    Right,
}

/// A rendered table: headings, alignment and cells.
struct Table {
    head: Vec<String>,
    align: Vec<Align>,
    rows: Vec<Vec<String>>,
}

impl Report {
    /// Markdown: a short header (task, seeds, baseline, how intervals were computed), one
    /// table row per variant, and a notes line defining the columns.
    pub fn to_markdown(&self) -> String {
        let mut out = format!("## Comparison on task `{}`\n\n", self.task);
        for (k, v) in self.header_lines(true) {
            out += &format!("- {k}: {v}\n");
        }
        out.push('\n');
        let t = self.table("—");
        let line = |cells: &[String]| format!("| {} |\n", cells.join(" | "));
        out += &line(&t.head);
        let rule: Vec<String> = t
            .align
            .iter()
            .map(|a| match a {
                Align::Left => ":---".to_string(),
                Align::Right => "---:".to_string(),
            })
            .collect();
        out += &format!("|{}|\n", rule.join("|"));
        for r in &t.rows {
            // A `|` in a variant name would split the cell.
            let cells: Vec<String> = r.iter().map(|c| c.replace('|', "\\|")).collect();
            out += &line(&cells);
        }
        out += &format!("\n*Notes.* {}\n", self.notes());
        out
    }

    /// An aligned plain-text table for the terminal (no colour), with the same header and
    /// columns as [`Report::to_markdown`].
    pub fn to_text_table(&self) -> String {
        let mut out = String::new();
        for (k, v) in self.header_lines(false) {
            out += &format!("{k}: {v}\n");
        }
        out.push('\n');
        let t = self.table("-");
        let width = |c: &str| c.chars().count();
        let widths: Vec<usize> = (0..t.head.len())
            .map(|j| {
                t.rows
                    .iter()
                    .map(|r| width(&r[j]))
                    .chain([width(&t.head[j])])
                    .max()
                    .unwrap_or(0)
            })
            .collect();
        let render = |cells: &[String]| {
            let padded: Vec<String> = cells
                .iter()
                .zip(&widths)
                .zip(&t.align)
                .map(|((c, &w), a)| {
                    let pad = " ".repeat(w - width(c));
                    match a {
                        Align::Left => format!("{c}{pad}"),
                        Align::Right => format!("{pad}{c}"),
                    }
                })
                .collect();
            padded.join("  ").trim_end().to_string() + "\n"
        };
        out += &render(&t.head);
        let rule: Vec<String> = widths.iter().map(|&w| "-".repeat(w)).collect();
        out += &(rule.join("  ") + "\n");
        for r in &t.rows {
            out += &render(r);
        }
        out
    }

    /// The report as JSON (non-finite numbers become `null`).
    pub fn to_json(&self) -> serde_json::Value {
        // Serializing plain structs of numbers and strings into a Value cannot fail.
        serde_json::to_value(self).expect("a report always serializes")
    }

    fn pct(&self) -> String {
        let p = self.level * 100.0;
        if (p - p.round()).abs() < 1e-9 {
            format!("{p:.0}")
        } else {
            format!("{}", (p * 1e6).round() / 1e6)
        }
    }

    fn header_lines(&self, markdown: bool) -> Vec<(&'static str, String)> {
        let q = |s: &str| {
            if markdown {
                format!("`{s}`")
            } else {
                s.to_string()
            }
        };
        let runs: usize = self.rows.iter().map(|r| r.n).sum();
        let seeds: Vec<String> = self
            .rows
            .iter()
            .map(|r| {
                let s: Vec<String> = r.seeds.iter().map(u64::to_string).collect();
                format!("{} {}", q(&r.variant), s.join(", "))
            })
            .collect();
        let mut lines = vec![
            ("task", q(&self.task)),
            ("seeds", format!("{runs} runs: {}", seeds.join("; "))),
            ("baseline", q(&self.baseline)),
            (
                "intervals",
                format!(
                    "stratified bootstrap over seeds, {} resamples, percentile {}% (seed {})",
                    self.resamples,
                    self.pct(),
                    self.seed
                ),
            ),
        ];
        if let Some(t) = &self.threshold {
            lines.push(("threshold", t.clone()));
        }
        lines
    }

    fn notes(&self) -> String {
        let mut notes = vec![
            "Scores are each run's final greedy evaluation return, one score per seed.".into(),
            "IQM: interquartile mean, the mean after cutting floor(n/4) seeds from each end \
             (scipy.stats.trim_mean(x, 0.25); the plain mean when n < 4)."
                .to_string(),
            format!(
                "[{}% CI]: stratified bootstrap percentile interval over seeds.",
                self.pct()
            ),
        ];
        if self.rows.iter().any(|r| r.success.is_some()) {
            notes.push("success: mean final success rate, with its interval.".into());
        }
        notes.push(format!(
            "P(beats baseline): probability that a random seed of the variant has a higher \
             final return than a random seed of `{}`, ties counting 1/2.",
            self.baseline
        ));
        notes.push(
            "Welch p: two-sided p-value of Welch's t test of equal mean final return against \
             the baseline."
                .into(),
        );
        if let Some(t) = &self.threshold {
            notes.push(format!(
                "reached: seeds with a training evaluation meeting {t}; steps/time to reach: \
                 median env steps and training wall time at the first such evaluation, over \
                 the seeds that reached it."
            ));
        }
        notes.join(" ")
    }

    fn table(&self, none: &str) -> Table {
        let pct = self.pct();
        let show_success = self.rows.iter().any(|r| r.success.is_some());
        let mut head = vec![
            "variant".to_string(),
            "seeds".to_string(),
            format!("mean return [{pct}% CI]"),
            format!("IQM return [{pct}% CI]"),
        ];
        if show_success {
            head.push(format!("success [{pct}% CI]"));
        }
        head.extend(["P(beats baseline)".to_string(), "Welch p".to_string()]);
        if self.threshold.is_some() {
            head.extend(["reached", "steps to reach", "time to reach"].map(String::from));
        }
        let mut align = vec![Align::Right; head.len()];
        align[0] = Align::Left;
        let rows = self
            .rows
            .iter()
            .map(|r| {
                let mut cells = vec![
                    r.variant.clone(),
                    r.n.to_string(),
                    with_ci(r.mean, r.mean_ci),
                    with_ci(r.iqm, r.iqm_ci),
                ];
                if show_success {
                    cells.push(match &r.success {
                        Some(s) => format!(
                            "{:.2} [{:.2}, {:.2}]",
                            s.mean, s.mean_ci.low, s.mean_ci.high
                        ),
                        None => none.to_string(),
                    });
                }
                cells.push(match r.prob_improvement {
                    Some(p) if p.is_finite() => format!("{p:.2}"),
                    _ => none.to_string(),
                });
                cells.push(match &r.welch {
                    Some(w) if w.p < 0.001 => "<0.001".to_string(),
                    Some(w) => format!("{:.3}", w.p),
                    None => none.to_string(),
                });
                if let Some(t) = &r.time_to_threshold {
                    cells.push(format!("{}/{}", t.reached, t.n));
                    cells.push(t.median_env_steps.map_or(none.to_string(), fmt_steps));
                    cells.push(t.median_wall_seconds.map_or(none.to_string(), fmt_seconds));
                }
                cells
            })
            .collect();
        Table { head, align, rows }
    }
}

/// `value [low, high]` with as many decimals as the magnitude calls for (4 significant
/// digits or so, never fewer than 0 decimals).
pub(crate) fn with_ci(v: f64, ci: Interval) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    let m = [v, ci.low, ci.high]
        .iter()
        .filter(|x| x.is_finite())
        .fold(0.0f64, |a, x| a.max(x.abs()));
    let d = if m >= 1000.0 {
        0
    } else if m >= 100.0 {
        1
    } else if m >= 1.0 {
        2
    } else {
        3
    };
    format!("{v:.d$} [{:.d$}, {:.d$}]", ci.low, ci.high)
}

/// Env steps: `9500`, `45.0k`, `1.20M`.
fn fmt_steps(s: f64) -> String {
    if s < 1e4 {
        format!("{s:.0}")
    } else if s < 1e6 {
        format!("{:.1}k", s / 1e3)
    } else {
        format!("{:.2}M", s / 1e6)
    }
}

/// Seconds: `42.0 s`, `3.5 min`, `1.25 h`.
fn fmt_seconds(s: f64) -> String {
    if s < 120.0 {
        format!("{s:.1} s")
    } else if s < 7200.0 {
        format!("{:.1} min", s / 60.0)
    } else {
        format!("{:.2} h", s / 3600.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::PathBuf;

    fn curve(points: &[(u64, f64, f64)]) -> Vec<CurvePoint> {
        // (env steps, wall seconds, success); return = 100 * success.
        points
            .iter()
            .map(|&(env_steps, wall_seconds, s)| CurvePoint {
                env_steps,
                wall_seconds,
                eval_return: 100.0 * s,
                eval_success: Some(s),
            })
            .collect()
    }

    fn run(
        variant: &str,
        seed: u64,
        ret: f64,
        success: Option<f64>,
        c: Vec<CurvePoint>,
    ) -> RunRecord {
        RunRecord {
            variant: variant.into(),
            seed,
            task: "beacon".into(),
            run_dir: PathBuf::from(format!("runs/{variant}/{seed}")),
            final_return: ret,
            final_success: success,
            env_steps: c.last().map_or(0, |p| p.env_steps),
            wall_seconds: c.last().map_or(0.0, |p| p.wall_seconds),
            curve: c,
        }
    }

    /// Two variants x 3 seeds, expected values worked by hand:
    /// - base returns [10, 20, 30]: mean = median = 20; IQM = mean (n = 3 < 4 cuts none).
    ///   success [0.5, 1, 1]: mean 2.5 / 3.
    /// - lstm returns [25, 30, 50]: mean 35, median 30, IQM 35. success [1, 1, 1].
    /// - P(lstm > base): 25 beats 10, 20; 30 beats 10, 20, ties 30; 50 beats all three:
    ///   (2 + 2.5 + 3) / 9 = 0.8333.
    /// - Welch (Welch 1947): s2(lstm) = (100 + 25 + 225) / 2 = 175, s2(base) = 100;
    ///   t = 15 / sqrt(175/3 + 100/3) = 1.5666989036; df = (275/3)^2 /
    ///   ((175/3)^2/2 + (100/3)^2/2) = 3.7230769231; p = 0.1974603426 from
    ///   scipy.stats.ttest_ind([25, 30, 50], [10, 20, 30], equal_var=False).
    /// - success >= 1.0 first met: base seed 1 never; seed 2 at 3000 steps / 30 s; seed 3
    ///   at 2000 / 25 s -> 2/3, medians 2500 steps, 27.5 s. lstm at 1000/10, 2000/20,
    ///   3000/40 -> 3/3, medians 2000, 20 s.
    fn two_by_three() -> Vec<RunRecord> {
        vec![
            run(
                "base",
                1,
                10.0,
                Some(0.5),
                curve(&[(1000, 10.0, 0.2), (2000, 20.0, 0.5), (3000, 30.0, 0.5)]),
            ),
            run(
                "lstm",
                1,
                25.0,
                Some(1.0),
                curve(&[(1000, 10.0, 1.0), (2000, 20.0, 1.0)]),
            ),
            run(
                "base",
                2,
                20.0,
                Some(1.0),
                curve(&[(1000, 10.0, 0.5), (2000, 20.0, 0.9), (3000, 30.0, 1.0)]),
            ),
            run(
                "lstm",
                2,
                30.0,
                Some(1.0),
                curve(&[(1000, 10.0, 0.5), (2000, 20.0, 1.0)]),
            ),
            run(
                "base",
                3,
                30.0,
                Some(1.0),
                curve(&[(1000, 12.0, 0.5), (2000, 25.0, 1.0), (3000, 31.0, 1.0)]),
            ),
            run(
                "lstm",
                3,
                50.0,
                Some(1.0),
                curve(&[(1000, 10.0, 0.5), (2000, 20.0, 0.9), (3000, 40.0, 1.0)]),
            ),
        ]
    }

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol
    }

    #[test]
    fn hand_computed_two_variants() {
        let opts = ReportOptions {
            threshold: Some(Threshold::Success(1.0)),
            ..ReportOptions::default()
        };
        let r = build_report(&two_by_three(), &opts).unwrap();
        assert_eq!(r.task, "beacon");
        assert_eq!(
            r.baseline, "base",
            "default baseline is the first variant seen"
        );
        assert_eq!(r.threshold.as_deref(), Some("success >= 1"));
        let names: Vec<&str> = r.rows.iter().map(|x| x.variant.as_str()).collect();
        assert_eq!(names, ["base", "lstm"]);

        let base = &r.rows[0];
        assert_eq!(base.seeds, vec![1, 2, 3]);
        assert_eq!(base.n, 3);
        assert_eq!((base.mean, base.median, base.iqm), (20.0, 20.0, 20.0));
        assert_eq!(base.prob_improvement, None);
        assert_eq!(base.welch, None);
        let s = base.success.as_ref().unwrap();
        assert!(close(s.mean, 2.5 / 3.0, 1e-12));
        let t = base.time_to_threshold.as_ref().unwrap();
        assert_eq!((t.reached, t.n), (2, 3));
        assert_eq!(t.median_env_steps, Some(2500.0));
        assert_eq!(t.median_wall_seconds, Some(27.5));

        let lstm = &r.rows[1];
        assert_eq!((lstm.mean, lstm.median, lstm.iqm), (35.0, 30.0, 35.0));
        assert!(close(lstm.prob_improvement.unwrap(), 7.5 / 9.0, 1e-12));
        let w = lstm.welch.unwrap();
        assert!(close(w.t, 1.5666989036, 1e-9), "{w:?}");
        assert!(close(w.df, 3.7230769231, 1e-9), "{w:?}");
        assert!(close(w.p, 0.1974603426, 1e-9), "{w:?}");
        let s = lstm.success.as_ref().unwrap();
        assert_eq!((s.mean, s.mean_ci.low, s.mean_ci.high), (1.0, 1.0, 1.0));
        let t = lstm.time_to_threshold.as_ref().unwrap();
        assert_eq!((t.reached, t.n), (3, 3));
        assert_eq!(t.median_env_steps, Some(2000.0));
        assert_eq!(t.median_wall_seconds, Some(20.0));

        // Bootstrap intervals of a mean lie within the data's range and hold the estimate.
        for row in &r.rows {
            let (lo, hi) = (
                row.final_returns[0].min(row.final_returns[2]),
                row.final_returns[2],
            );
            for (est, ci) in [(row.mean, row.mean_ci), (row.iqm, row.iqm_ci)] {
                assert!(lo <= ci.low && ci.low <= est && est <= ci.high && ci.high <= hi);
            }
        }
    }

    #[test]
    fn report_is_reproducible_for_a_seed() {
        let runs = two_by_three();
        let a = build_report(&runs, &ReportOptions::default()).unwrap();
        let b = build_report(&runs, &ReportOptions::default()).unwrap();
        assert_eq!(a, b);
    }

    #[test]
    fn mixed_tasks_name_the_runs() {
        let mut runs = two_by_three();
        runs[4].task = "cartpole".into();
        match build_report(&runs, &ReportOptions::default()) {
            Err(Error::MixedTasks(msg)) => {
                assert!(msg.contains("task `cartpole`: runs/base/3"), "{msg}");
                assert!(msg.contains("task `beacon`: runs/base/1"), "{msg}");
            }
            other => panic!("expected MixedTasks, got {other:?}"),
        }
    }

    #[test]
    fn no_runs_is_an_error() {
        assert!(matches!(
            build_report(&[], &ReportOptions::default()),
            Err(Error::NoRuns)
        ));
    }

    #[test]
    fn explicit_and_unknown_baselines() {
        let runs = two_by_three();
        let opts = ReportOptions {
            baseline: Some("lstm".into()),
            ..ReportOptions::default()
        };
        let r = build_report(&runs, &opts).unwrap();
        assert_eq!(r.baseline, "lstm");
        assert_eq!(r.rows[1].prob_improvement, None);
        // P(base > lstm) = 1 - 7.5/9 by symmetry.
        assert!(close(r.rows[0].prob_improvement.unwrap(), 1.5 / 9.0, 1e-12));
        let opts = ReportOptions {
            baseline: Some("gru".into()),
            ..ReportOptions::default()
        };
        let err = build_report(&runs, &opts).unwrap_err();
        assert!(matches!(err, Error::UnknownBaseline { .. }));
        assert!(err.to_string().contains("base, lstm"), "{err}");
    }

    #[test]
    fn bad_options_are_errors() {
        let runs = two_by_three();
        for opts in [
            ReportOptions {
                level: 95.0,
                ..ReportOptions::default()
            },
            ReportOptions {
                resamples: 0,
                ..ReportOptions::default()
            },
        ] {
            assert!(matches!(
                build_report(&runs, &opts),
                Err(Error::InvalidOption(_))
            ));
        }
    }

    #[test]
    fn success_only_when_every_run_has_one() {
        let mut runs = two_by_three();
        runs[1].final_success = None; // an lstm run
        let r = build_report(&runs, &ReportOptions::default()).unwrap();
        assert!(r.rows[0].success.is_some());
        assert!(r.rows[1].success.is_none());
        assert!(r.rows[0].time_to_threshold.is_none(), "no threshold asked");
    }

    #[test]
    fn return_threshold_uses_eval_return() {
        let t = Threshold::Return(90.0);
        assert_eq!(t.label(), "return >= 90");
        let r = build_report(
            &two_by_three(),
            &ReportOptions {
                threshold: Some(t),
                ..ReportOptions::default()
            },
        )
        .unwrap();
        // Returns are 100 * success in the curves: >= 90 is success >= 0.9.
        let base = r.rows[0].time_to_threshold.as_ref().unwrap();
        assert_eq!((base.reached, base.median_env_steps), (2, Some(2000.0)));
    }

    #[test]
    fn markdown_and_text_have_every_row() {
        let opts = ReportOptions {
            threshold: Some(Threshold::Success(0.9)),
            ..ReportOptions::default()
        };
        let r = build_report(&two_by_three(), &opts).unwrap();
        let md = r.to_markdown();
        assert!(md.contains("| base | 3 | 20.00 ["), "{md}");
        assert!(md.contains("| lstm | 3 | 35.00 ["), "{md}");
        assert!(
            md.contains("stratified bootstrap over seeds, 2000 resamples, percentile 95%"),
            "{md}"
        );
        assert!(
            md.contains("| variant | seeds | mean return [95% CI] | IQM return [95% CI] |"),
            "{md}"
        );
        assert!(md.contains("| 0.83 | 0.197 | 3/3 |"), "{md}");
        assert!(md.contains("IQM: interquartile mean"), "{md}");
        assert!(md.contains("threshold: success >= 0.9"), "{md}");

        let text = r.to_text_table();
        let lines: Vec<&str> = text.lines().collect();
        let head = lines.iter().position(|l| l.starts_with("variant")).unwrap();
        // Columns align: each row's second column ("3") ends where "seeds" ends.
        let seeds_end = lines[head].find("seeds").unwrap() + "seeds".len();
        for l in &lines[head + 2..head + 4] {
            assert_eq!(&l[seeds_end - 1..seeds_end], "3", "{text}");
        }
        assert!(lines[head + 2].starts_with("base ") && lines[head + 3].starts_with("lstm "));
        assert!(!text.contains('\x1b'), "no colour codes");
    }

    #[test]
    fn json_carries_the_options_and_rows() {
        let r = build_report(&two_by_three(), &ReportOptions::default()).unwrap();
        let j = r.to_json();
        assert_eq!(j["task"], "beacon");
        assert_eq!(j["resamples"], 2000);
        assert_eq!(j["level"], 0.95);
        assert_eq!(j["rows"][1]["variant"], "lstm");
        assert_eq!(j["rows"][1]["mean"], 35.0);
        assert!(j["rows"][1]["welch"]["p"].is_number());
        assert!(j["rows"][0]["welch"].is_null());
        assert!(j["rows"][0]["mean_ci"]["low"].is_number());
    }

    #[test]
    fn number_formats() {
        assert_eq!(
            with_ci(
                195.26,
                Interval {
                    low: 180.0,
                    high: 200.0
                }
            ),
            "195.3 [180.0, 200.0]"
        );
        assert_eq!(
            with_ci(
                0.85,
                Interval {
                    low: 0.625,
                    high: 0.95
                }
            ),
            "0.850 [0.625, 0.950]"
        );
        assert_eq!(fmt_steps(2500.0), "2500");
        assert_eq!(fmt_steps(45_000.0), "45.0k");
        assert_eq!(fmt_seconds(27.5), "27.5 s");
        assert_eq!(fmt_seconds(600.0), "10.0 min");
    }
}
