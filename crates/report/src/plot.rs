//! Plots of runs, as SVG (for documents and the web) and PNG (for anything else), drawn
//! with `plotters`: learning curves per variant ([`learning_curves`]) and final scores
//! with their intervals ([`final_scores`]). [`mean_curves`] is the data behind the
//! learning-curve plot, public so the caller can also write it as a table.
//!
//! Text is drawn with DejaVu Sans embedded in the binary (the `dejavu` crate, registered
//! with plotters' `ab_glyph` feature), so PNGs have readable text on machines with no
//! fonts installed. Colours are the Okabe-Ito palette, distinguishable with the common
//! colour-vision deficiencies. Every file is written atomically: drawn to a temporary
//! file in the same folder, then renamed over the target.

use std::path::Path;
use std::sync::OnceLock;

use image::ImageEncoder;
use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use plotters::style::{register_font, FontStyle};
use serde::Serialize;

use crate::compare::{group_by_variant, single_task, with_ci, Report, VariantRow};
use crate::error::{Error, Result};
use crate::runs::{CurvePoint, RunRecord};
use crate::stats::{self, Interval};

/// Okabe-Ito colours, most distinct first (yellow, weak on white, comes last).
const PALETTE: [RGBColor; 8] = [
    RGBColor(0, 114, 178),   // blue
    RGBColor(213, 94, 0),    // vermillion
    RGBColor(0, 158, 115),   // bluish green
    RGBColor(204, 121, 167), // reddish purple
    RGBColor(230, 159, 0),   // orange
    RGBColor(86, 180, 233),  // sky blue
    RGBColor(0, 0, 0),       // black
    RGBColor(240, 228, 66),  // yellow
];

/// The font family name the embedded font is registered under.
const FONT: &str = "sans-serif";

/// Which point estimate [`final_scores`] draws.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum FinalStatistic {
    /// Interquartile mean with its interval (the default: robust to one outlying seed).
    Iqm,
    /// Mean with its interval.
    Mean,
}

/// How to draw plots.
#[derive(Clone, Debug, PartialEq)]
pub struct PlotOptions {
    /// Title; `None` makes one from the task name.
    pub title: Option<String>,
    /// Image width in pixels (default 1000).
    pub width: u32,
    /// Image height in pixels (default 600).
    pub height: u32,
    /// Bootstrap resamples for the learning-curve bands (default 2000).
    pub resamples: usize,
    /// Confidence level of the learning-curve bands (default 0.95).
    pub level: f64,
    /// Bootstrap seed for the bands.
    pub seed: u64,
    /// The estimate [`final_scores`] shows (default IQM).
    pub final_statistic: FinalStatistic,
}

impl Default for PlotOptions {
    fn default() -> Self {
        PlotOptions {
            title: None,
            width: 1000,
            height: 600,
            resamples: 2000,
            level: 0.95,
            seed: 0,
            final_statistic: FinalStatistic::Iqm,
        }
    }
}

/// One point of a variant's learning curve: the mean over seeds and its interval.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct BandPoint {
    /// Env steps.
    pub env_steps: u64,
    /// Mean evaluation return over the variant's seeds.
    pub mean: f64,
    /// Bootstrap interval of that mean across seeds.
    pub ci: Interval,
}

/// A variant's learning curve as plotted.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct VariantCurve {
    /// Variant name.
    pub variant: String,
    /// Seeds averaged (runs with at least one evaluation).
    pub seeds: usize,
    /// Points in increasing env steps.
    pub points: Vec<BandPoint>,
}

/// The mean learning curve of each variant (first-seen order) with a bootstrap interval
/// of the mean across seeds at each step.
///
/// The steps are every step at which any seed of the variant evaluated, from the first
/// step at which every seed has evaluated (so each point averages the same seeds), plus
/// the end of the longest run of all variants. At each step a seed contributes its latest
/// evaluation at or before it. A run that stopped early (on reaching its target) thus
/// carries its last evaluation forward to the longest run's end, and every variant's line
/// spans the same steps. Runs with no evaluation are left out; a variant with none has
/// no points. With `resamples` 0 the intervals are NaN (no band).
///
/// # Panics
/// If `resamples > 0` and `level` is not strictly between 0 and 1.
pub fn mean_curves(
    runs: &[RunRecord],
    resamples: usize,
    level: f64,
    seed: u64,
) -> Vec<VariantCurve> {
    let end = runs
        .iter()
        .map(|r| r.env_steps.max(r.curve.last().map_or(0, |p| p.env_steps)))
        .max()
        .unwrap_or(0);
    group_by_variant(runs)
        .into_iter()
        .map(|(variant, rs)| {
            // Sorted copies: the lookups below need increasing env steps, whoever built
            // the records.
            let rs: Vec<Vec<CurvePoint>> = rs
                .into_iter()
                .filter(|r| !r.curve.is_empty())
                .map(|r| {
                    let mut c = r.curve.clone();
                    c.sort_by_key(|p| p.env_steps);
                    c
                })
                .collect();
            let start = rs.iter().map(|c| c[0].env_steps).max().unwrap_or(0);
            let mut steps: Vec<u64> = rs
                .iter()
                .flat_map(|c| c.iter().map(|p| p.env_steps))
                .filter(|&s| s >= start)
                .collect();
            steps.sort_unstable();
            steps.dedup();
            if !rs.is_empty() && steps.last().is_some_and(|&s| s < end) {
                steps.push(end);
            }
            let points = steps
                .into_iter()
                .map(|s| {
                    let values: Vec<f64> = rs
                        .iter()
                        .map(|c| {
                            let k = c.partition_point(|p| p.env_steps <= s);
                            c[k - 1].eval_return
                        })
                        .collect();
                    let ci = if resamples == 0 {
                        Interval::NAN
                    } else {
                        stats::bootstrap_ci(
                            std::slice::from_ref(&values),
                            &stats::mean_pooled,
                            resamples,
                            level,
                            seed,
                        )
                    };
                    BandPoint {
                        env_steps: s,
                        mean: stats::mean(&values),
                        ci,
                    }
                })
                .collect();
            VariantCurve {
                variant: variant.to_string(),
                seeds: rs.len(),
                points,
            }
        })
        .collect()
}

/// Learning curves: greedy evaluation return (y) against env steps (x), one line per
/// variant at the mean over seeds, with a shaded band for the bootstrap interval of that
/// mean across seeds (see [`mean_curves`]: runs that stopped early carry their last
/// evaluation forward to the longest run's end, drawn as the same line). Writes `svg`
/// and `png`.
///
/// # Errors
/// [`Error::NoRuns`] or [`Error::MixedTasks`] as for a report; [`Error::Plot`] when no run
/// has an evaluation or drawing fails; [`Error::Io`] when a file cannot be written.
pub fn learning_curves(
    runs: &[RunRecord],
    svg: &Path,
    png: &Path,
    opts: &PlotOptions,
) -> Result<()> {
    let task = single_task(runs)?;
    check_plot_options(opts)?;
    let curves = mean_curves(runs, opts.resamples, opts.level, opts.seed);
    if curves.iter().all(|c| c.points.is_empty()) {
        return Err(Error::Plot(
            "no run has an evaluation record; nothing to draw".into(),
        ));
    }
    let title = opts
        .title
        .clone()
        .unwrap_or_else(|| format!("{task}: learning curves"));
    let footer = format!(
        "line: mean over seeds; band: {}% bootstrap CI of the mean; runs that stopped early hold their last evaluation",
        pct(opts.level)
    );
    render(
        svg,
        png,
        opts,
        |root| draw_curves(root, &curves, &title, &footer),
        |root| draw_curves(root, &curves, &title, &footer),
    )
}

/// Final scores: per variant, a dot at the IQM (or mean, see
/// [`PlotOptions::final_statistic`]) of the final return with a horizontal bar for its
/// interval, and each seed's score as a small circle; variants are labelled on the left,
/// each with its estimate and interval under the name, first variant on top as in the
/// report. The image is `opts.width` x `opts.height`, made taller when needed to give
/// each variant at least 48 pixels. Writes `svg` and `png`.
///
/// # Errors
/// [`Error::NoRuns`] for an empty report; [`Error::Plot`] when drawing fails;
/// [`Error::Io`] when a file cannot be written.
pub fn final_scores(report: &Report, svg: &Path, png: &Path, opts: &PlotOptions) -> Result<()> {
    if report.rows.is_empty() {
        return Err(Error::NoRuns);
    }
    check_plot_options(opts)?;
    let name = match opts.final_statistic {
        FinalStatistic::Iqm => "IQM",
        FinalStatistic::Mean => "mean",
    };
    let title = opts.title.clone().unwrap_or_else(|| {
        format!(
            "{}: final return, {name} with {}% CI",
            report.task,
            pct(report.level)
        )
    });
    let footer = format!(
        "dot: {name} over seeds; bar: {}% stratified bootstrap CI ({} resamples); small circles: single seeds",
        pct(report.level),
        report.resamples
    );
    let stat = opts.final_statistic;
    // At least 48 px a row so labels never overlap.
    let opts = &PlotOptions {
        height: opts.height.max(170 + 48 * report.rows.len() as u32),
        ..opts.clone()
    };
    render(
        svg,
        png,
        opts,
        |root| draw_final(root, report, stat, &title, &footer),
        |root| draw_final(root, report, stat, &title, &footer),
    )
}

fn check_plot_options(opts: &PlotOptions) -> Result<()> {
    if opts.width < 200 || opts.height < 150 {
        return Err(Error::InvalidOption(format!(
            "plot size must be at least 200x150 pixels, got {}x{}",
            opts.width, opts.height
        )));
    }
    if !(opts.level > 0.0 && opts.level < 1.0) {
        return Err(Error::InvalidOption(format!(
            "confidence level must be between 0 and 1 (e.g. 0.95), got {}",
            opts.level
        )));
    }
    Ok(())
}

fn pct(level: f64) -> String {
    let p = level * 100.0;
    if (p - p.round()).abs() < 1e-9 {
        format!("{p:.0}")
    } else {
        format!("{}", (p * 1e6).round() / 1e6)
    }
}

/// Registers the embedded font once per process.
fn fonts() -> Result<()> {
    static DONE: OnceLock<std::result::Result<(), String>> = OnceLock::new();
    DONE.get_or_init(|| {
        for (style, bytes) in [
            (FontStyle::Normal, dejavu::sans::regular()),
            (FontStyle::Bold, dejavu::sans::bold()),
        ] {
            register_font(FONT, style, bytes)
                .map_err(|_| "the embedded DejaVu Sans font did not load".to_string())?;
        }
        Ok(())
    })
    .clone()
    .map_err(Error::Plot)
}

fn plot_err<E: std::fmt::Display>(e: E) -> Error {
    Error::Plot(e.to_string())
}

/// Draws the same picture to an SVG and a PNG (two closures, one per backend type, as a
/// closure cannot be generic), each written atomically.
fn render<S, P>(svg: &Path, png: &Path, opts: &PlotOptions, draw_svg: S, draw_png: P) -> Result<()>
where
    S: Fn(DrawingArea<SVGBackend, Shift>) -> Result<()>,
    P: Fn(DrawingArea<BitMapBackend, Shift>) -> Result<()>,
{
    fonts()?;
    let size = (opts.width, opts.height);
    let mut text = String::new();
    draw_svg(SVGBackend::with_string(&mut text, size).into_drawing_area())?;
    write_atomic(svg, text.as_bytes())?;

    let mut pixels = vec![0u8; opts.width as usize * opts.height as usize * 3];
    draw_png(BitMapBackend::with_buffer(&mut pixels, size).into_drawing_area())?;
    let mut encoded = Vec::new();
    image::codecs::png::PngEncoder::new(&mut encoded)
        .write_image(&pixels, opts.width, opts.height, image::ColorType::Rgb8)
        .map_err(plot_err)?;
    write_atomic(png, &encoded)
}

/// Writes `bytes` atomically (`mnemon_runs::write_atomic`), so a reader never sees
/// half a file.
fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    mnemon_runs::write_atomic(path, bytes).map_err(|e| match e {
        mnemon_runs::Error::Io { path, source } => Error::Io { path, source },
        other => Error::io(path, std::io::Error::other(other.to_string())),
    })
}

/// Tick labels for env steps: `0`, `500`, `20k`, `1.5M`.
fn steps_label(x: f64) -> String {
    let trim = |v: f64| {
        let s = format!("{v:.2}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    };
    if x.abs() >= 1e6 {
        format!("{}M", trim(x / 1e6))
    } else if x.abs() >= 1e3 {
        format!("{}k", trim(x / 1e3))
    } else {
        trim(x)
    }
}

/// Tick labels for scores: few decimals, no trailing zeros.
fn score_label(x: f64) -> String {
    let s = format!("{x:.3}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" {
        "0".into()
    } else {
        s.to_string()
    }
}

/// `[lo, hi]` padded by `frac` of its width on each side (1 either side when empty).
fn padded(lo: f64, hi: f64, frac: f64) -> (f64, f64) {
    if !(lo.is_finite() && hi.is_finite()) {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-12 {
        return (lo - 1.0, hi + 1.0);
    }
    let pad = (hi - lo) * frac;
    (lo - pad, hi + pad)
}

/// Splits off a footer line and draws the caption in it; returns the main area.
fn with_footer<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    footer: &str,
) -> Result<DrawingArea<DB, Shift>> {
    let (_, h) = root.dim_in_pixel();
    let (main, foot) = root.split_vertically(h.saturating_sub(34));
    let style = TextStyle::from((FONT, 16).into_font()).color(&RGBColor(80, 80, 80));
    foot.draw_text(footer, &style, (16, 8)).map_err(plot_err)?;
    Ok(main)
}

fn draw_curves<DB: DrawingBackend>(
    root: DrawingArea<DB, Shift>,
    curves: &[VariantCurve],
    title: &str,
    footer: &str,
) -> Result<()> {
    root.fill(&WHITE).map_err(plot_err)?;
    let main = with_footer(&root, footer)?;
    let all = curves.iter().flat_map(|c| &c.points);
    let x_max = all.clone().map(|p| p.env_steps).max().unwrap_or(1).max(1) as f64;
    let lo = all
        .clone()
        .flat_map(|p| [p.mean, p.ci.low])
        .filter(|v| v.is_finite())
        .fold(f64::INFINITY, f64::min);
    let hi = all
        .flat_map(|p| [p.mean, p.ci.high])
        .filter(|v| v.is_finite())
        .fold(f64::NEG_INFINITY, f64::max);
    let (y0, y1) = padded(lo, hi, 0.05);

    let mut chart = ChartBuilder::on(&main)
        .caption(title, (FONT, 28).into_font().style(FontStyle::Bold))
        .margin(16)
        .x_label_area_size(56)
        .y_label_area_size(84)
        .build_cartesian_2d(0.0..x_max * 1.02, y0..y1)
        .map_err(plot_err)?;
    chart
        .configure_mesh()
        .x_desc("env steps")
        .y_desc("greedy evaluation return")
        .axis_desc_style((FONT, 22))
        .label_style((FONT, 18))
        .x_label_formatter(&|x| steps_label(*x))
        .y_label_formatter(&|y| score_label(*y))
        .max_light_lines(0)
        .bold_line_style(RGBColor(220, 220, 220))
        .draw()
        .map_err(plot_err)?;

    for (i, c) in curves.iter().enumerate() {
        let color = PALETTE[i % PALETTE.len()];
        let band: Vec<(f64, f64)> = c
            .points
            .iter()
            .map(|p| (p.env_steps as f64, p.ci.high))
            .chain(
                c.points
                    .iter()
                    .rev()
                    .map(|p| (p.env_steps as f64, p.ci.low)),
            )
            .filter(|(_, y)| y.is_finite())
            .collect();
        if band.len() > 2 {
            chart
                .draw_series(std::iter::once(Polygon::new(
                    band,
                    color.mix(0.18).filled(),
                )))
                .map_err(plot_err)?;
        }
    }
    // Lines over all bands, so no band hides another variant's line. Past the eighth
    // variant the colours repeat, dashed.
    let mut labels = Vec::new();
    for (i, c) in curves.iter().enumerate() {
        let color = PALETTE[i % PALETTE.len()];
        let line: Vec<(f64, f64)> = c
            .points
            .iter()
            .map(|p| (p.env_steps as f64, p.mean))
            .collect();
        let seeds = if c.seeds == 1 { "seed" } else { "seeds" };
        let label = format!("{} ({} {seeds})", c.variant, c.seeds);
        labels.push(label.clone());
        let style = color.stroke_width(3);
        if i < PALETTE.len() {
            chart
                .draw_series(LineSeries::new(line, style))
                .map_err(plot_err)?
                .label(label)
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 28, y)], color.stroke_width(4))
                });
        } else {
            chart
                .draw_series(DashedLineSeries::new(line, 12, 8, style))
                .map_err(plot_err)?
                .label(label)
                .legend(move |(x, y)| {
                    EmptyElement::at((x, y))
                        + PathElement::new(vec![(0, 0), (10, 0)], color.stroke_width(4))
                        + PathElement::new(vec![(18, 0), (28, 0)], color.stroke_width(4))
                });
        }
    }
    // The legend goes in the corner that covers the fewest curve points; its size is
    // estimated from the label lengths (about 11 px a character at 20 px).
    let (pw, ph) = chart.plotting_area().dim_in_pixel();
    let longest = labels.iter().map(|l| l.chars().count()).max().unwrap_or(0);
    let box_w = (12 + 36 + 11 * longest + 24) as f64 / pw.max(1) as f64;
    let box_h = (12 + 26 * labels.len() + 16) as f64 / ph.max(1) as f64;
    chart
        .configure_series_labels()
        .position(legend_corner(curves, x_max * 1.02, (y0, y1), box_w, box_h))
        .margin(12)
        .legend_area_size(36)
        .label_font((FONT, 20))
        .background_style(WHITE.mix(0.9))
        .border_style(RGBColor(160, 160, 160))
        .draw()
        .map_err(plot_err)?;
    root.present().map_err(plot_err)
}

/// The corner of the plot whose legend box (`box_w` x `box_h`, fractions of the plot
/// area) holds the fewest points of the curves and bands, sampled along each segment;
/// ties go to lower right, then upper left (where rising learning curves leave room).
fn legend_corner(
    curves: &[VariantCurve],
    x_max: f64,
    (y0, y1): (f64, f64),
    box_w: f64,
    box_h: f64,
) -> SeriesLabelPosition {
    let mut pts: Vec<(f64, f64)> = Vec::new();
    for c in curves {
        let norm = |p: &BandPoint, v: f64| (p.env_steps as f64 / x_max, (v - y0) / (y1 - y0));
        for w in c.points.windows(2) {
            for t in 0..=8 {
                let t = t as f64 / 8.0;
                for pick in [
                    |p: &BandPoint| p.mean,
                    |p: &BandPoint| p.ci.low,
                    |p: &BandPoint| p.ci.high,
                ] {
                    let (ax, ay) = norm(&w[0], pick(&w[0]));
                    let (bx, by) = norm(&w[1], pick(&w[1]));
                    pts.push((ax + (bx - ax) * t, ay + (by - ay) * t));
                }
            }
        }
        if let [p] = c.points.as_slice() {
            pts.push(norm(p, p.mean));
        }
    }
    let (w, h) = (box_w.min(1.0), box_h.min(1.0));
    let corners = [
        (SeriesLabelPosition::LowerRight, (1.0 - w, 1.0), (0.0, h)),
        (SeriesLabelPosition::UpperLeft, (0.0, w), (1.0 - h, 1.0)),
        (
            SeriesLabelPosition::UpperRight,
            (1.0 - w, 1.0),
            (1.0 - h, 1.0),
        ),
        (SeriesLabelPosition::LowerLeft, (0.0, w), (0.0, h)),
    ];
    let inside = |(xa, xb): (f64, f64), (ya, yb): (f64, f64)| {
        pts.iter()
            .filter(|&&(x, y)| xa <= x && x <= xb && ya <= y && y <= yb)
            .count()
    };
    let mut best = (usize::MAX, SeriesLabelPosition::LowerRight);
    for (pos, xs, ys) in corners {
        let n = inside(xs, ys);
        if n < best.0 {
            best = (n, pos);
        }
    }
    best.1
}

fn draw_final<DB: DrawingBackend>(
    root: DrawingArea<DB, Shift>,
    report: &Report,
    statistic: FinalStatistic,
    title: &str,
    footer: &str,
) -> Result<()> {
    root.fill(&WHITE).map_err(plot_err)?;
    let main = with_footer(&root, footer)?;
    let k = report.rows.len();
    let est = |r: &VariantRow| match statistic {
        FinalStatistic::Iqm => (r.iqm, r.iqm_ci),
        FinalStatistic::Mean => (r.mean, r.mean_ci),
    };
    let values = report.rows.iter().flat_map(|r| {
        let (e, ci) = est(r);
        [e, ci.low, ci.high]
            .into_iter()
            .chain(r.final_returns.iter().copied())
    });
    let lo = values
        .clone()
        .filter(|v| v.is_finite())
        .fold(f64::INFINITY, f64::min);
    let hi = values
        .filter(|v| v.is_finite())
        .fold(f64::NEG_INFINITY, f64::max);
    let (x0, x1) = padded(lo, hi, 0.08);
    // Left of each row: the variant name, and under it the estimate with its interval.
    let labels: Vec<(String, String)> = report
        .rows
        .iter()
        .map(|r| {
            let (e, ci) = est(r);
            (r.variant.clone(), with_ci(e, ci))
        })
        .collect();
    let label_px = labels
        .iter()
        .map(|(a, b)| (a.chars().count() * 12).max(b.chars().count() * 10))
        .max()
        .unwrap_or(0) as u32;
    // Row i sits at y = k - 1 - i, so the first variant (the report's order) is on top.
    let row_y = |i: usize| (k - 1 - i) as f64;

    let mut chart = ChartBuilder::on(&main)
        .caption(title, (FONT, 28).into_font().style(FontStyle::Bold))
        .margin(16)
        .x_label_area_size(56)
        .y_label_area_size((label_px + 28).clamp(80, 420))
        .build_cartesian_2d(x0..x1, -0.6..k as f64 - 0.4)
        .map_err(plot_err)?;
    chart
        .configure_mesh()
        .disable_y_mesh()
        .y_labels(0)
        .x_desc("final greedy evaluation return")
        .axis_desc_style((FONT, 22))
        .label_style((FONT, 18))
        .x_label_formatter(&|x| score_label(*x))
        .max_light_lines(0)
        .bold_line_style(RGBColor(220, 220, 220))
        .draw()
        .map_err(plot_err)?;

    let name_style = TextStyle::from((FONT, 20).into_font())
        .color(&BLACK)
        .pos(Pos::new(HPos::Right, VPos::Bottom));
    let value_style = TextStyle::from((FONT, 16).into_font())
        .color(&RGBColor(70, 70, 70))
        .pos(Pos::new(HPos::Right, VPos::Top));
    for (i, r) in report.rows.iter().enumerate() {
        let color = PALETTE[i % PALETTE.len()];
        let y = row_y(i);
        let (e, ci) = est(r);
        // Labels in the area left of the axis: backend pixels of the row's left end.
        let (px, py) = chart.backend_coord(&(x0, y));
        let (ox, oy) = main.get_base_pixel();
        let at = (px - ox - 12, py - oy);
        main.draw_text(&labels[i].0, &name_style, (at.0, at.1 + 1))
            .map_err(plot_err)?;
        main.draw_text(&labels[i].1, &value_style, (at.0, at.1 + 4))
            .map_err(plot_err)?;

        let seeds = r.final_returns.iter().filter(|v| v.is_finite()).map(|&v| {
            EmptyElement::at((v, y)) + Circle::new((0, 15), 4, RGBColor(90, 90, 90).stroke_width(1))
        });
        chart.draw_series(seeds).map_err(plot_err)?;
        if ci.low.is_finite() && ci.high.is_finite() {
            let bar = color.stroke_width(4);
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(ci.low, y), (ci.high, y)],
                    bar,
                )))
                .map_err(plot_err)?;
            chart
                .draw_series([ci.low, ci.high].map(|x| {
                    EmptyElement::at((x, y)) + PathElement::new(vec![(0, -10), (0, 10)], bar)
                }))
                .map_err(plot_err)?;
        }
        if e.is_finite() {
            chart
                .draw_series(std::iter::once(
                    EmptyElement::at((e, y)) + Circle::new((0, 0), 8, color.filled()),
                ))
                .map_err(plot_err)?;
        }
    }
    root.present().map_err(plot_err)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::PathBuf;

    fn run(variant: &str, seed: u64, curve: &[(u64, f64)], env_steps: u64) -> RunRecord {
        RunRecord {
            variant: variant.into(),
            seed,
            task: "beacon".into(),
            run_dir: PathBuf::from(format!("runs/{variant}/{seed}")),
            final_return: curve.last().map_or(0.0, |p| p.1),
            final_success: None,
            curve: curve
                .iter()
                .map(|&(env_steps, eval_return)| CurvePoint {
                    env_steps,
                    wall_seconds: env_steps as f64 / 100.0,
                    eval_return,
                    eval_success: None,
                })
                .collect(),
            env_steps,
            wall_seconds: env_steps as f64 / 100.0,
        }
    }

    #[test]
    fn early_stopped_runs_carry_their_last_evaluation_forward() {
        // Seed 2 reached its target at 2000 steps and stopped; seed 1 ran to 4000, and the
        // other variant's run to 5000 (the longest run's end).
        let runs = vec![
            run(
                "a",
                1,
                &[(1000, 1.0), (2000, 2.0), (3000, 3.0), (4000, 4.0)],
                4000,
            ),
            run("a", 2, &[(1000, 5.0), (2000, 10.0)], 2000),
            run("b", 1, &[(1000, 0.0), (5000, 1.0)], 5000),
        ];
        let c = mean_curves(&runs, 0, 0.95, 0);
        let a: Vec<(u64, f64)> = c[0].points.iter().map(|p| (p.env_steps, p.mean)).collect();
        // Means by hand: (1+5)/2, (2+10)/2, (3+10)/2, (4+10)/2, and at 5000 (4+10)/2.
        assert_eq!(
            a,
            vec![
                (1000, 3.0),
                (2000, 6.0),
                (3000, 6.5),
                (4000, 7.0),
                (5000, 7.0)
            ]
        );
        assert_eq!(c[0].seeds, 2);
        let b: Vec<u64> = c[1].points.iter().map(|p| p.env_steps).collect();
        assert_eq!(b, vec![1000, 5000]);
    }

    #[test]
    fn curves_start_where_every_seed_has_evaluated() {
        // Seed 2 evaluated first at 1500: the curve starts there; at 2000 seed 2 holds 1500's.
        let runs = vec![
            run("a", 1, &[(1000, 1.0), (2000, 3.0)], 2000),
            run("a", 2, &[(1500, 5.0)], 2000),
            run("a", 3, &[], 0),
        ];
        let c = mean_curves(&runs, 100, 0.95, 0);
        let a: Vec<(u64, f64)> = c[0].points.iter().map(|p| (p.env_steps, p.mean)).collect();
        assert_eq!(a, vec![(1500, 3.0), (2000, 4.0)]);
        assert_eq!(c[0].seeds, 2, "a run without evaluations is left out");
        let p = c[0].points[1];
        assert!(p.ci.low <= p.mean && p.mean <= p.ci.high);
    }

    #[test]
    fn curve_order_does_not_matter() {
        let sorted = vec![run("a", 1, &[(1000, 1.0), (2000, 2.0), (3000, 4.0)], 3000)];
        let shuffled = vec![run("a", 1, &[(3000, 4.0), (1000, 1.0), (2000, 2.0)], 3000)];
        assert_eq!(
            mean_curves(&sorted, 20, 0.9, 3),
            mean_curves(&shuffled, 20, 0.9, 3)
        );
    }

    #[test]
    fn tick_labels() {
        assert_eq!(steps_label(0.0), "0");
        assert_eq!(steps_label(20_000.0), "20k");
        assert_eq!(steps_label(1_500_000.0), "1.5M");
        assert_eq!(score_label(0.850), "0.85");
        assert_eq!(score_label(-0.0001), "0");
        assert_eq!(pct(0.95), "95");
        assert_eq!(pct(0.999), "99.9");
    }
}
