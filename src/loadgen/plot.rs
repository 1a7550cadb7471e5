//! The latency distribution of a run as an SVG drawing: a histogram over a logarithmic time
//! axis (latencies spread over orders of magnitude, and a log axis keeps the body and the tail
//! both readable), with p50, p99 and p99.9 marked.
//!
//! Display bins are equal widths of log(time). Each histogram bucket's count is shared among
//! the display bins it overlaps, in proportion to the overlap, so buckets narrower than a
//! display bin do not leave gaps and wider ones do not make spikes.

use std::fmt::Write as _;

use super::report::{LoadReport, number};
use crate::cli::with_commas;

const WIDTH: f64 = 880.0;
const HEIGHT: f64 = 500.0;
const LEFT: f64 = 80.0;
const RIGHT: f64 = 30.0;
const TOP: f64 = 90.0;
const BOTTOM: f64 = 70.0;
const BINS: usize = 80;
/// Width and height of the plot area.
const PLOT_W: f64 = WIDTH - LEFT - RIGHT;
const PLOT_H: f64 = HEIGHT - TOP - BOTTOM;

/// `&`, `<`, `>` and quotes escaped for XML text and attributes.
fn xml(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// Axis limits in log10(ms): the data range, widened to at least a factor of 2 and padded a
/// little each side.
fn axis_range(min_ms: f64, max_ms: f64) -> (f64, f64) {
    let (mut lo, mut hi) = (min_ms.max(1e-6).log10(), max_ms.max(1e-6).log10());
    let min_span = 2f64.log10();
    if hi - lo < min_span {
        let mid = (lo + hi) / 2.0;
        lo = mid - min_span / 2.0;
        hi = mid + min_span / 2.0;
    }
    let pad = (hi - lo) * 0.04;
    (lo - pad, hi + pad)
}

/// Tick values in ms inside `[lo, hi]` (log10 ms): powers of ten, and 2× and 5× as well when
/// the axis spans few decades.
fn x_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let steps: &[f64] = if hi - lo <= 1.5 {
        &[1.0, 1.5, 2.0, 3.0, 5.0, 7.0]
    } else if hi - lo <= 3.0 {
        &[1.0, 2.0, 5.0]
    } else {
        &[1.0]
    };
    let mut ticks = Vec::new();
    for decade in (lo.floor() as i32)..=(hi.ceil() as i32) {
        for &m in steps {
            let v = m * 10f64.powi(decade);
            let l = v.log10();
            if l >= lo && l <= hi {
                ticks.push(v);
            }
        }
    }
    ticks
}

/// A round step for a linear axis up to `max` with about five ticks.
fn nice_step(max: f64) -> f64 {
    let raw = (max / 5.0).max(1e-9);
    let mag = 10f64.powf(raw.log10().floor());
    [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|&s| s >= raw)
        .unwrap_or(10.0 * mag)
}

/// Shares of ok requests (in %) per display bin over `[lo, hi]` (log10 ms).
fn bins(report: &LoadReport, lo: f64, hi: f64) -> Vec<f64> {
    let total = report.histogram.len().max(1) as f64;
    let width = (hi - lo) / BINS as f64;
    let mut out = vec![0.0; BINS];
    for (low, high, count) in report.histogram.buckets() {
        // Bucket bounds in ns → log10 ms; a bucket is never empty, so a < b.
        let a = (low.max(1) as f64 / 1e6).log10();
        let b = (high as f64 / 1e6).log10().max(a + 1e-12);
        let first = (((a - lo) / width).floor().max(0.0) as usize).min(BINS - 1);
        let last = (((b - lo) / width).floor().max(0.0) as usize).min(BINS - 1);
        for (i, slot) in out.iter_mut().enumerate().take(last + 1).skip(first) {
            let (bin_lo, bin_hi) = (lo + i as f64 * width, lo + (i + 1) as f64 * width);
            let overlap = (b.min(bin_hi) - a.max(bin_lo)).max(0.0);
            *slot += count as f64 * overlap / (b - a) * 100.0 / total;
        }
    }
    out
}

/// The SVG document for `report`.
pub fn render_svg(report: &LoadReport) -> String {
    let mut s = String::new();
    // Writing to a String cannot fail: the `let _` here and in the render functions below
    // discard an always-Ok result.
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{HEIGHT}" viewBox="0 0 {WIDTH} {HEIGHT}" font-family="sans-serif" font-size="13">"#
    );
    let _ = writeln!(
        s,
        r#"<rect width="{WIDTH}" height="{HEIGHT}" fill="white"/>"#
    );
    render_titles(&mut s, report);
    let (Some(min), Some(max)) = (report.histogram.min(), report.histogram.max()) else {
        let _ = writeln!(
            s,
            r#"<text x="{}" y="{}" text-anchor="middle">no successful requests: nothing to plot</text>"#,
            WIDTH / 2.0,
            HEIGHT / 2.0
        );
        s.push_str("</svg>\n");
        return s;
    };
    let (lo, hi) = axis_range(min as f64 / 1e6, max as f64 / 1e6);
    let shares = bins(report, lo, hi);
    let top_share = shares.iter().copied().fold(0.0, f64::max);
    let step = nice_step(top_share);
    let axes = Axes {
        lo,
        hi,
        y_max: (top_share / step).ceil().max(1.0) * step,
        y_step: step,
    };
    render_bars(&mut s, &axes, &shares);
    render_axes(&mut s, &axes);
    render_percentiles(&mut s, report, &axes);
    s.push_str("</svg>\n");
    s
}

/// The plot area's scales: x is log10 of milliseconds from `lo` to `hi`, y the share of ok
/// requests per bin from 0 to `y_max`, ticked every `y_step`.
struct Axes {
    lo: f64,
    hi: f64,
    y_max: f64,
    y_step: f64,
}

impl Axes {
    fn x_of(&self, log_ms: f64) -> f64 {
        LEFT + (log_ms - self.lo) / (self.hi - self.lo) * PLOT_W
    }

    fn y_of(&self, share: f64) -> f64 {
        TOP + PLOT_H - share / self.y_max * PLOT_H
    }
}

/// Title (pace and throughput) and subtitle (counts, errors, duration).
fn render_titles(s: &mut String, report: &LoadReport) {
    let title = format!(
        "convoy bench, {}: {} ok requests/s, {} samples/s",
        report.pace_text(),
        number(report.throughput_per_s),
        number(report.samples_per_s)
    );
    let errors: u64 = report.errors.values().sum();
    let model = if report.model.is_empty() {
        String::new()
    } else {
        format!("model {} {} · ", report.model, report.version)
    };
    let subtitle = format!(
        "{model}{} ok of {} requests, {} errors · {} s measured · latency of ok requests",
        with_commas(report.ok),
        with_commas(report.requests),
        with_commas(errors),
        number(report.duration_s)
    );
    let _ = writeln!(
        s,
        r#"<text x="{}" y="30" text-anchor="middle" font-size="17" font-weight="bold">{}</text>"#,
        WIDTH / 2.0,
        xml(&title)
    );
    let _ = writeln!(
        s,
        r##"<text x="{}" y="52" text-anchor="middle" fill="#444">{}</text>"##,
        WIDTH / 2.0,
        xml(&subtitle)
    );
}

/// Horizontal grid lines with the y ticks, then one bar per non-empty bin.
fn render_bars(s: &mut String, axes: &Axes, shares: &[f64]) {
    let mut v = 0.0;
    while v <= axes.y_max + axes.y_step * 1e-6 {
        let y = axes.y_of(v);
        let _ = writeln!(
            s,
            r##"<line x1="{LEFT}" x2="{}" y1="{y:.1}" y2="{y:.1}" stroke="#e4e4e4"/><text x="{}" y="{:.1}" text-anchor="end">{}</text>"##,
            LEFT + PLOT_W,
            LEFT - 8.0,
            y + 4.0,
            number(v)
        );
        v += axes.y_step;
    }
    let bin_w = PLOT_W / BINS as f64;
    for (i, &share) in shares.iter().enumerate() {
        if share <= 0.0 {
            continue;
        }
        let y = axes.y_of(share);
        let _ = writeln!(
            s,
            r##"<rect x="{:.2}" y="{y:.2}" width="{:.2}" height="{:.2}" fill="#4a7fb5"/>"##,
            LEFT + i as f64 * bin_w,
            bin_w.max(0.5),
            TOP + PLOT_H - y
        );
    }
}

/// Both axes, the x ticks and the axis titles.
fn render_axes(s: &mut String, axes: &Axes) {
    let (pw, ph) = (PLOT_W, PLOT_H);
    let _ = writeln!(
        s,
        r##"<line x1="{LEFT}" x2="{LEFT}" y1="{TOP}" y2="{}" stroke="#222"/><line x1="{LEFT}" x2="{}" y1="{}" y2="{}" stroke="#222"/>"##,
        TOP + ph,
        LEFT + pw,
        TOP + ph,
        TOP + ph
    );
    for t in x_ticks(axes.lo, axes.hi) {
        let x = axes.x_of(t.log10());
        let _ = writeln!(
            s,
            r##"<line x1="{x:.1}" x2="{x:.1}" y1="{}" y2="{}" stroke="#222"/><text x="{x:.1}" y="{}" text-anchor="middle">{}</text>"##,
            TOP + ph,
            TOP + ph + 6.0,
            TOP + ph + 22.0,
            number(t)
        );
    }
    let _ = writeln!(
        s,
        r#"<text x="{}" y="{}" text-anchor="middle">latency (ms, logarithmic scale)</text>"#,
        LEFT + pw / 2.0,
        HEIGHT - 18.0
    );
    let _ = writeln!(
        s,
        r#"<text transform="translate(22 {}) rotate(-90)" text-anchor="middle">share of ok requests per bin (%)</text>"#,
        TOP + ph / 2.0
    );
}

/// Percentile markers; labels on three rows so close ones do not overlap.
fn render_percentiles(s: &mut String, report: &LoadReport, axes: &Axes) {
    let marks = [
        ("p50", report.latency_ms.p50, "#2a9d4a"),
        ("p99", report.latency_ms.p99, "#e08a00"),
        ("p99.9", report.latency_ms.p999, "#c0392b"),
    ];
    for (row, (name, value, colour)) in marks.iter().enumerate() {
        let Some(ms) = value else { continue };
        let x = axes.x_of(ms.max(1e-6).log10());
        let label_y = TOP - 26.0 + row as f64 * 13.0;
        let anchor = if x > LEFT + PLOT_W * 0.85 {
            "end"
        } else {
            "start"
        };
        let dx = if anchor == "end" { -4.0 } else { 4.0 };
        let _ = writeln!(
            s,
            r#"<line x1="{x:.1}" x2="{x:.1}" y1="{:.1}" y2="{}" stroke="{colour}" stroke-width="2" stroke-dasharray="6 4"/><text x="{:.1}" y="{label_y:.1}" fill="{colour}" text-anchor="{anchor}" font-weight="bold">{name} {} ms</text>"#,
            label_y - 4.0,
            TOP + PLOT_H,
            x + dx,
            number(*ms)
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::loadgen::LoadConfig;
    use crate::loadgen::drive::Tally;

    #[test]
    fn svg_marks_percentiles_and_spreads_bins() {
        let mut t = Tally::default();
        for k in 1..=1000u64 {
            t.latency.record(1_000_000 + k * 3_000);
        }
        t.requests = 1000;
        t.ok = 1000;
        t.ok_samples = 1000;
        let r = LoadReport::new(
            &LoadConfig::default(),
            "x",
            std::time::Duration::from_secs(1),
            false,
            t,
        );
        let svg = render_svg(&r);
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>\n"));
        for needle in ["p50 ", "p99 ", "p99.9 ", "latency (ms", "closed loop"] {
            assert!(svg.contains(needle), "no {needle:?}");
        }
        assert!(!svg.contains("NaN") && !svg.contains("inf"));
        // The shares of all bins add up to 100 % (every count lands inside the axis range).
        let (lo, hi) = axis_range(1.003, 4.0);
        let total: f64 = bins(&r, lo, hi).iter().sum();
        assert!((total - 100.0).abs() < 1e-6, "{total}");
    }

    #[test]
    fn empty_runs_still_draw() {
        let r = LoadReport::new(
            &LoadConfig::default(),
            "x",
            std::time::Duration::from_secs(1),
            false,
            Tally::default(),
        );
        assert!(render_svg(&r).contains("nothing to plot"));
    }

    #[test]
    fn ticks_and_steps_are_round() {
        assert_eq!(x_ticks(0.0, 2.0), [1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0]);
        assert_eq!(nice_step(37.0), 10.0);
        assert_eq!(nice_step(4.0), 1.0);
    }
}
