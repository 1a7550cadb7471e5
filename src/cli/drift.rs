//! `convoy drift`: how a served model's recent inputs compare with the reference its bundle
//! carries.
//!
//! Calls the predictor's `Drift` RPC once and prints the reply: a table with one row per
//! statistic, the predicted-class line and a one-line summary ([`render_text`]); or the reply
//! as JSON (`--json`, [`DriftJson`]); and, with `--plot`, an SVG of the reference's bins against
//! the window's for the statistics that moved ([`render_svg`]).

use std::fmt::Write as _;
use std::path::PathBuf;

use serde::Serialize;

use super::{CliError, with_commas};
use crate::service::api::{self, predictor_client::PredictorClient};

/// Flags of `convoy drift`.
#[derive(Clone, Debug, clap::Args)]
pub struct DriftArgs {
    /// Server address, e.g. 127.0.0.1:7171 or http://host:7171.
    #[arg(long, env = "CONVOY_SERVER", default_value = "127.0.0.1:7171")]
    pub server: String,
    /// Model name (default: the server's default model).
    #[arg(long, default_value = "")]
    pub model: String,
    /// Print the reply as JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Also draw the reference's and the window's bins of the statistics that moved, as SVG.
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    #[command(flatten)]
    pub tls: super::TlsArgs,
}

/// Runs `convoy drift`.
///
/// # Errors
/// An unreachable server, a refused call, an SVG file that cannot be written.
pub fn drift(args: &DriftArgs) -> Result<(), CliError> {
    let reply = super::block_on(async {
        PredictorClient::new(super::connect(&args.server, &args.tls).await?)
            .drift(api::DriftRequest {
                model: args.model.clone(),
            })
            .await
            .map(tonic::Response::into_inner)
            .map_err(|s| super::rpc_error(&s))
    })?;
    if args.json {
        super::print_json(&DriftJson::from(&reply))?;
    } else {
        print!("{}", render_text(&reply));
    }
    if let Some(path) = &args.plot {
        if reply.monitored {
            std::fs::write(path, render_svg(&reply)).map_err(|source| CliError::File {
                path: path.clone(),
                source,
            })?;
            eprintln!("convoy drift: wrote {}", path.display());
        } else {
            eprintln!("convoy drift: no plot written: the model is not monitored");
        }
    }
    Ok(())
}

/// The reply as `--json` prints it.
#[derive(Debug, Serialize)]
pub struct DriftJson {
    pub model: String,
    pub version: String,
    pub monitored: bool,
    pub note: String,
    pub window_capacity: u32,
    pub window_samples: u32,
    pub samples_seen: u64,
    pub reference_samples: u64,
    pub alpha: f64,
    pub ks_level: f64,
    pub statistics: Vec<StatisticJson>,
    pub predicted_class: Option<ClassJson>,
    pub drift: bool,
}

/// One statistic of [`DriftJson`].
#[derive(Debug, Serialize)]
pub struct StatisticJson {
    pub name: String,
    pub window: u32,
    pub psi: Option<f64>,
    pub ks_statistic: Option<f64>,
    pub ks_p_value: Option<f64>,
    pub ks_significant: bool,
    pub out_of_range: u64,
    pub non_finite: u64,
    pub verdict: String,
    pub bin_edges: Vec<f64>,
    pub reference_counts: Vec<u64>,
    pub window_counts: Vec<u64>,
    pub reference_min: f64,
    pub reference_max: f64,
}

/// The predicted class of [`DriftJson`].
#[derive(Debug, Serialize)]
pub struct ClassJson {
    pub window: u32,
    pub psi: Option<f64>,
    pub chi_square: Option<f64>,
    pub degrees_of_freedom: u32,
    pub p_value: Option<f64>,
    pub significant: bool,
    pub verdict: String,
    pub reference_counts: Vec<u64>,
    pub window_counts: Vec<u64>,
    pub labels: Vec<String>,
}

impl From<&api::DriftReply> for DriftJson {
    fn from(r: &api::DriftReply) -> Self {
        DriftJson {
            model: r.model.clone(),
            version: r.version.clone(),
            monitored: r.monitored,
            note: r.note.clone(),
            window_capacity: r.window_capacity,
            window_samples: r.window_samples,
            samples_seen: r.samples_seen,
            reference_samples: r.reference_samples,
            alpha: r.alpha,
            ks_level: r.ks_level,
            statistics: r
                .statistics
                .iter()
                .map(|s| StatisticJson {
                    name: s.name.clone(),
                    window: s.window,
                    psi: s.psi,
                    ks_statistic: s.ks_statistic,
                    ks_p_value: s.ks_p_value,
                    ks_significant: s.ks_significant,
                    out_of_range: s.out_of_range,
                    non_finite: s.non_finite,
                    verdict: s.verdict.clone(),
                    bin_edges: s.bin_edges.clone(),
                    reference_counts: s.reference_counts.clone(),
                    window_counts: s.window_counts.clone(),
                    reference_min: s.reference_min,
                    reference_max: s.reference_max,
                })
                .collect(),
            predicted_class: r.predicted_class.as_ref().map(|c| ClassJson {
                window: c.window,
                psi: c.psi,
                chi_square: c.chi_square,
                degrees_of_freedom: c.degrees_of_freedom,
                p_value: c.p_value,
                significant: c.significant,
                verdict: c.verdict.clone(),
                reference_counts: c.reference_counts.clone(),
                window_counts: c.window_counts.clone(),
                labels: c.labels.clone(),
            }),
            drift: r.drift,
        }
    }
}

/// A value with `decimals` digits, or `-` when absent.
fn opt(v: Option<f64>, decimals: usize) -> String {
    v.map_or_else(|| "-".into(), |v| format!("{v:.decimals$}"))
}

/// A p-value: three decimals, or two significant digits in exponent form below 0.001 so small
/// values stay distinguishable.
fn p_text(p: Option<f64>) -> String {
    match p {
        None => "-".into(),
        Some(0.0) => "0".into(),
        Some(p) if p < 1e-3 => format!("{p:.1e}"),
        Some(p) => format!("{p:.3}"),
    }
}

/// Three significant digits (a Bonferroni level such as 0.05/8 = 0.00625 stays exact).
fn significant(v: f64) -> String {
    if !v.is_finite() || v <= 0.0 {
        return v.to_string();
    }
    let decimals = (2.0 - v.log10().floor()).max(0.0) as usize;
    let text = format!("{v:.decimals$}");
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    }
}

/// Verdicts as the reply spells them: `too_few_samples` reads better with spaces in a table.
fn verdict_text(v: &str) -> String {
    v.replace('_', " ")
}

/// The text `convoy drift` prints: a header, one row per statistic, the predicted-class line
/// and a summary.
pub fn render_text(r: &api::DriftReply) -> String {
    let mut s = String::new();
    let version = if r.version.is_empty() {
        String::new()
    } else {
        format!(" version {}", r.version)
    };
    if !r.monitored {
        // Writing to a String cannot fail; the `let _` below discard an always-Ok result.
        let _ = writeln!(s, "model {}{version}: {}", r.model, r.note);
        return s;
    }
    let _ = writeln!(
        s,
        "model {}{version}: {} samples in the window (capacity {}), {} seen; reference {} samples",
        r.model,
        with_commas(u64::from(r.window_samples)),
        with_commas(u64::from(r.window_capacity)),
        with_commas(r.samples_seen),
        with_commas(r.reference_samples)
    );
    let _ = writeln!(
        s,
        "KS at alpha {} overall, {} per statistic",
        r.alpha,
        significant(r.ks_level)
    );
    if !r.note.is_empty() {
        let _ = writeln!(s, "note: {}", r.note);
    }
    let _ = writeln!(s);
    let with_non_finite = r.statistics.iter().any(|st| st.non_finite > 0);
    let mut rows = vec![vec![
        "statistic".to_string(),
        "window".into(),
        "PSI".into(),
        "KS D".into(),
        "KS p".into(),
        "verdict".into(),
        "outside range".into(),
    ]];
    if with_non_finite {
        rows[0].push("non-finite".into());
    }
    for st in &r.statistics {
        let mut row = vec![
            st.name.clone(),
            with_commas(u64::from(st.window)),
            opt(st.psi, 3),
            opt(st.ks_statistic, 3),
            p_text(st.ks_p_value),
            verdict_text(&st.verdict),
            with_commas(st.out_of_range),
        ];
        if with_non_finite {
            row.push(with_commas(st.non_finite));
        }
        rows.push(row);
    }
    let widths: Vec<usize> = (0..rows[0].len())
        .map(|c| rows.iter().map(|r| r[c].chars().count()).max().unwrap_or(0))
        .collect();
    for row in &rows {
        let mut line = String::new();
        for (c, cell) in row.iter().enumerate() {
            // Names and verdicts read left-aligned, numbers right-aligned.
            if c == 0 || c == 5 {
                let _ = write!(line, "{cell:<w$}  ", w = widths[c]);
            } else {
                let _ = write!(line, "{cell:>w$}  ", w = widths[c]);
            }
        }
        let _ = writeln!(s, "{}", line.trim_end());
    }
    let _ = writeln!(s);
    if let Some(c) = &r.predicted_class {
        let _ = writeln!(
            s,
            "predicted class: window {}, PSI {}, chi-square {} ({} dof), p {}: {}",
            with_commas(u64::from(c.window)),
            opt(c.psi, 3),
            opt(c.chi_square, 2),
            c.degrees_of_freedom,
            p_text(c.p_value),
            verdict_text(&c.verdict)
        );
    }
    let _ = writeln!(s, "{}", summary(r));
    s
}

/// The one-line verdict over all statistics and the predicted class.
fn summary(r: &api::DriftReply) -> String {
    let n = r.statistics.len();
    let count = |v: &str| r.statistics.iter().filter(|s| s.verdict == v).count();
    let (drifted, moderate, unjudged) =
        (count("drift"), count("moderate"), count("too_few_samples"));
    let class = r.predicted_class.as_ref().map(|c| c.verdict.as_str());
    if unjudged == n && matches!(class, None | Some("too_few_samples")) {
        return format!(
            "not judged yet: too few samples in the window ({})",
            r.window_samples
        );
    }
    let class_drift = class == Some("drift");
    let mut line = match (drifted, class_drift) {
        (0, false) => "no drift".to_string(),
        (0, true) => format!("drift in the predicted classes (0 of {n} statistics)"),
        (d, false) => format!("drift in {d} of {n} statistics"),
        (d, true) => format!("drift in {d} of {n} statistics and in the predicted classes"),
    };
    if moderate > 0 {
        let _ = write!(line, "; {moderate} of {n} moderate");
    }
    line
}

// --- SVG ---------------------------------------------------------------------------------

const WIDTH: f64 = 880.0;
const HEADER: f64 = 80.0;
const PANEL: f64 = 270.0;
const LEFT: f64 = 80.0;
const RIGHT: f64 = 30.0;
const PANEL_TOP: f64 = 40.0;
const PANEL_BOTTOM: f64 = 58.0;
const REFERENCE_COLOUR: &str = "#8aa4c8";
const WINDOW_COLOUR: &str = "#e08a00";
/// Panels drawn when no statistic is moderate or drifting: enough to show the closest calls.
const CALM_PANELS: usize = 3;

/// `&`, `<`, `>` and quotes escaped for XML text and attributes.
fn xml(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// The statistics a plot shows: every moderate or drifting one, in reply order; if there are
/// none, the [`CALM_PANELS`] with the largest PSI.
pub fn plotted(r: &api::DriftReply) -> Vec<&api::StatisticDrift> {
    let moved: Vec<&api::StatisticDrift> = r
        .statistics
        .iter()
        .filter(|s| s.verdict == "moderate" || s.verdict == "drift")
        .collect();
    if !moved.is_empty() {
        return moved;
    }
    let mut calm: Vec<&api::StatisticDrift> =
        r.statistics.iter().filter(|s| s.psi.is_some()).collect();
    calm.sort_by(|a, b| b.psi.unwrap_or(0.0).total_cmp(&a.psi.unwrap_or(0.0)));
    calm.truncate(CALM_PANELS);
    calm
}

/// Counts as fractions of their sum (all zero when the sum is).
fn fractions(counts: &[u64]) -> Vec<f64> {
    let total: u64 = counts.iter().sum();
    counts
        .iter()
        .map(|&c| {
            if total > 0 {
                c as f64 / total as f64
            } else {
                0.0
            }
        })
        .collect()
}

/// A short number for bin labels: `digits` decimals (significant digits in exponent form for
/// very small or large values), trailing zeros dropped.
fn short(v: f64, digits: usize) -> String {
    let a = v.abs();
    if a != 0.0 && !(1e-3..1e4).contains(&a) {
        format!("{v:.prec$e}", prec = digits.saturating_sub(1))
    } else {
        let t = format!("{v:.digits$}");
        let t = t.trim_end_matches('0').trim_end_matches('.');
        if t == "-0" { "0".into() } else { t.into() }
    }
}

/// Label of bin `i` of a statistic with inner `edges`. Three digits, more when a bin's two
/// edges would otherwise print alike (top-1 probabilities crowd just below 1).
fn bin_label(edges: &[f64], i: usize) -> String {
    match (i.checked_sub(1).and_then(|j| edges.get(j)), edges.get(i)) {
        (None, Some(hi)) => format!("< {}", short(*hi, 3)),
        (Some(lo), None) => format!("≥ {}", short(*lo, 3)),
        (Some(lo), Some(hi)) => {
            let digits = (3..=7)
                .find(|&d| short(*lo, d) != short(*hi, d))
                .unwrap_or(7);
            format!("[{}, {})", short(*lo, digits), short(*hi, digits))
        }
        (None, None) => "all".into(),
    }
}

/// The SVG `--plot` writes: one panel per [`plotted`] statistic, reference and window share of
/// each reference bin side by side.
pub fn render_svg(r: &api::DriftReply) -> String {
    let chosen = plotted(r);
    let height = HEADER + PANEL * chosen.len().max(1) as f64;
    let mut s = String::new();
    // Writing to a String cannot fail; the `let _` below discard an always-Ok result.
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{height}" viewBox="0 0 {WIDTH} {height}" font-family="sans-serif" font-size="13">"#
    );
    let _ = writeln!(
        s,
        r#"<rect width="{WIDTH}" height="{height}" fill="white"/>"#
    );
    let title = format!("convoy drift: model {} version {}", r.model, r.version);
    let subtitle = format!(
        "window of {} samples against a reference of {} · share of samples per reference bin",
        with_commas(u64::from(r.window_samples)),
        with_commas(r.reference_samples)
    );
    let _ = writeln!(
        s,
        r#"<text x="{}" y="28" text-anchor="middle" font-size="17" font-weight="bold">{}</text>"#,
        WIDTH / 2.0,
        xml(&title)
    );
    let _ = writeln!(
        s,
        r##"<text x="{}" y="50" text-anchor="middle" fill="#444">{}</text>"##,
        WIDTH / 2.0,
        xml(&subtitle)
    );
    // Legend.
    for (k, (name, colour)) in [("reference", REFERENCE_COLOUR), ("window", WINDOW_COLOUR)]
        .iter()
        .enumerate()
    {
        let x = WIDTH / 2.0 - 90.0 + k as f64 * 110.0;
        let _ = writeln!(
            s,
            r#"<rect x="{x}" y="60" width="12" height="12" fill="{colour}"/><text x="{}" y="71">{name}</text>"#,
            x + 17.0
        );
    }
    if chosen.is_empty() {
        let _ = writeln!(
            s,
            r#"<text x="{}" y="{}" text-anchor="middle">no statistic has values in the window: nothing to plot</text>"#,
            WIDTH / 2.0,
            HEADER + PANEL / 2.0
        );
    }
    for (p, st) in chosen.iter().enumerate() {
        panel(&mut s, st, HEADER + p as f64 * PANEL);
    }
    s.push_str("</svg>\n");
    s
}

/// One statistic's panel, its top at `y0`.
fn panel(s: &mut String, st: &api::StatisticDrift, y0: f64) {
    let (pw, ph) = (WIDTH - LEFT - RIGHT, PANEL - PANEL_TOP - PANEL_BOTTOM);
    let reference = fractions(&st.reference_counts);
    let window = fractions(&st.window_counts);
    let bins = reference.len().max(window.len()).max(1);
    let top = reference.iter().chain(&window).copied().fold(0.0, f64::max);
    // Axis up to the next tenth (of 100 %) above the highest bar, at least 10 %.
    let y_max = ((top * 10.0).ceil() / 10.0).clamp(0.1, 1.0);
    let base = y0 + PANEL_TOP + ph;
    let y_of = |f: f64| base - f / y_max * ph;
    let _ = writeln!(s, r#"<g class="panel">"#);
    let title = format!(
        "{} — PSI {}, {}",
        st.name,
        opt(st.psi, 3),
        verdict_text(&st.verdict)
    );
    let _ = writeln!(
        s,
        r#"<text x="{LEFT}" y="{:.1}" font-size="15" font-weight="bold">{}</text>"#,
        y0 + 24.0,
        xml(&title)
    );
    let ticks = (y_max * 10.0).round() as usize;
    let step = if ticks > 5 { 2 } else { 1 };
    for t in (0..=ticks).step_by(step) {
        let f = t as f64 / 10.0;
        let y = y_of(f);
        let _ = writeln!(
            s,
            r##"<line x1="{LEFT}" x2="{}" y1="{y:.1}" y2="{y:.1}" stroke="#e4e4e4"/><text x="{}" y="{:.1}" text-anchor="end">{}%</text>"##,
            LEFT + pw,
            LEFT - 8.0,
            y + 4.0,
            t * 10
        );
    }
    let slot = pw / bins as f64;
    let bar = slot * 0.38;
    for i in 0..bins {
        let x = LEFT + i as f64 * slot + slot * 0.1;
        for (k, (values, colour)) in [(&reference, REFERENCE_COLOUR), (&window, WINDOW_COLOUR)]
            .iter()
            .enumerate()
        {
            let f = values.get(i).copied().unwrap_or(0.0);
            let y = y_of(f);
            let _ = writeln!(
                s,
                r#"<rect x="{:.2}" y="{y:.2}" width="{bar:.2}" height="{:.2}" fill="{colour}"/>"#,
                x + k as f64 * bar,
                base - y
            );
        }
        // Labels alternate between two rows, so each has two slots of width; with more bins
        // than fit even so, only every k-th is labelled.
        let every = bins.div_ceil(24);
        if i % every == 0 {
            let row = (i / every) % 2;
            let _ = writeln!(
                s,
                r#"<text x="{:.1}" y="{:.1}" text-anchor="middle" font-size="11">{}</text>"#,
                LEFT + (i as f64 + 0.5) * slot,
                base + 15.0 + row as f64 * 13.0,
                xml(&bin_label(&st.bin_edges, i))
            );
        }
    }
    let _ = writeln!(
        s,
        r##"<line x1="{LEFT}" x2="{LEFT}" y1="{:.1}" y2="{base:.1}" stroke="#222"/><line x1="{LEFT}" x2="{}" y1="{base:.1}" y2="{base:.1}" stroke="#222"/>"##,
        y0 + PANEL_TOP,
        LEFT + pw
    );
    let _ = writeln!(
        s,
        r#"<text x="{}" y="{:.1}" text-anchor="middle" fill="\#444">{} bins of the reference (equal mass); reference range {} to {}; {} window values outside it</text>"#,
        LEFT + pw / 2.0,
        base + 44.0,
        bins,
        short(st.reference_min, 3),
        short(st.reference_max, 3),
        with_commas(st.out_of_range)
    );
    let _ = writeln!(s, "</g>");
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stat(name: &str, psi: Option<f64>, verdict: &str) -> api::StatisticDrift {
        api::StatisticDrift {
            name: name.into(),
            window: 500,
            psi,
            ks_statistic: psi.map(|p| p / 4.0),
            ks_p_value: psi.map(|p| if p > 0.25 { 1.2e-40 } else { 0.4 }),
            ks_significant: psi.is_some_and(|p| p > 0.25),
            out_of_range: if verdict == "drift" { 37 } else { 0 },
            non_finite: 0,
            verdict: verdict.into(),
            bin_edges: vec![-1.0, -0.5, 0.0, 0.5],
            reference_counts: vec![200, 200, 200, 200, 200],
            window_counts: vec![10, 40, 100, 150, 200],
            reference_min: -2.0,
            reference_max: 2.0,
        }
    }

    /// A reply made by hand: 2 of 4 statistics drift, one is moderate, the class drifts.
    fn reply() -> api::DriftReply {
        api::DriftReply {
            model: "stamped-parts".into(),
            version: "1.0.0".into(),
            monitored: true,
            note: String::new(),
            window_capacity: 500,
            window_samples: 500,
            samples_seen: 1234,
            reference_samples: 2000,
            alpha: 0.05,
            ks_level: 0.0125,
            statistics: vec![
                stat("mean_c0", Some(2.5), "drift"),
                stat("contrast_c0", Some(0.15), "moderate"),
                stat("sharpness", Some(0.7), "drift"),
                stat("entropy", Some(0.02), "stable"),
            ],
            predicted_class: Some(api::ClassDrift {
                window: 500,
                psi: Some(1.2),
                chi_square: Some(512.25),
                degrees_of_freedom: 3,
                p_value: Some(3.0e-110),
                significant: true,
                verdict: "drift".into(),
                reference_counts: vec![500, 500, 500, 500],
                window_counts: vec![300, 50, 50, 100],
                labels: vec![],
            }),
            drift: true,
        }
    }

    #[test]
    fn table_lists_every_statistic_then_class_and_summary() {
        let text = render_text(&reply());
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(
            lines[0],
            "model stamped-parts version 1.0.0: 500 samples in the window (capacity 500), 1,234 \
             seen; reference 2,000 samples"
        );
        assert_eq!(lines[1], "KS at alpha 0.05 overall, 0.0125 per statistic");
        assert_eq!(significant(0.05 / 8.0), "0.00625");
        assert_eq!(significant(0.05 / 7.0), "0.00714");
        assert_eq!(significant(0.05), "0.05");
        assert_eq!(significant(250.0), "250");
        assert_eq!(
            lines[3],
            "statistic    window    PSI   KS D     KS p  verdict   outside range"
        );
        assert_eq!(
            lines[4],
            "mean_c0         500  2.500  0.625  1.2e-40  drift                37"
        );
        assert_eq!(
            lines[5],
            "contrast_c0     500  0.150  0.037    0.400  moderate              0"
        );
        assert_eq!(
            lines[9],
            "predicted class: window 500, PSI 1.200, chi-square 512.25 (3 dof), p 3.0e-110: drift"
        );
        assert_eq!(
            lines[10],
            "drift in 2 of 4 statistics and in the predicted classes; 1 of 4 moderate"
        );
        assert!(!text.contains("non-finite"), "column only when any");
    }

    #[test]
    fn non_finite_column_and_calm_summaries() {
        let mut r = reply();
        r.statistics[3].non_finite = 4;
        let text = render_text(&r);
        assert!(
            text.lines()
                .nth(3)
                .unwrap()
                .ends_with("outside range  non-finite")
        );
        for st in &mut r.statistics {
            st.verdict = "stable".into();
        }
        r.predicted_class.as_mut().unwrap().verdict = "stable".into();
        assert_eq!(summary(&r), "no drift");
        for st in &mut r.statistics {
            st.verdict = "too_few_samples".into();
        }
        r.predicted_class.as_mut().unwrap().verdict = "too_few_samples".into();
        r.window_samples = 12;
        assert_eq!(
            summary(&r),
            "not judged yet: too few samples in the window (12)"
        );
    }

    #[test]
    fn unmonitored_models_print_the_note() {
        let r = api::DriftReply {
            model: "m".into(),
            version: "2".into(),
            monitored: false,
            note: "the bundle carries no drift reference".into(),
            ..Default::default()
        };
        assert_eq!(
            render_text(&r),
            "model m version 2: the bundle carries no drift reference\n"
        );
        let json = serde_json::to_value(DriftJson::from(&r)).unwrap();
        assert_eq!(json["monitored"], false);
        assert!(json["predicted_class"].is_null());
    }

    #[test]
    fn json_mirrors_the_reply() {
        let json = serde_json::to_value(DriftJson::from(&reply())).unwrap();
        assert_eq!(json["statistics"][0]["name"], "mean_c0");
        assert_eq!(json["statistics"][0]["psi"], 2.5);
        assert_eq!(json["statistics"][3]["window_counts"][4], 200);
        assert_eq!(json["predicted_class"]["degrees_of_freedom"], 3);
        assert_eq!(json["drift"], true);
    }

    /// Checks XML well-formedness as far as this SVG needs it (W3C XML 1.0, fifth edition,
    /// §2.1 and §3: one root, properly nested and closed elements; §2.4: `<` and `&` in
    /// character data only as markup or entity references; cited from memory).
    fn assert_well_formed(svg: &str) {
        let mut stack: Vec<&str> = Vec::new();
        let mut rest = svg;
        let mut roots = 0;
        while let Some(open) = rest.find('<') {
            let text = &rest[..open];
            for (i, _) in text.match_indices('&') {
                let entity = &text[i..];
                assert!(
                    ["&amp;", "&lt;", "&gt;", "&quot;"]
                        .iter()
                        .any(|e| entity.starts_with(e)),
                    "bare & in {text:?}"
                );
            }
            let close = rest[open..].find('>').expect("tag closes") + open;
            let tag = &rest[open + 1..close];
            assert!(!tag.contains('<'), "< inside a tag: {tag:?}");
            assert_eq!(
                tag.matches('"').count() % 2,
                0,
                "unbalanced quotes: {tag:?}"
            );
            if let Some(name) = tag.strip_prefix('/') {
                assert_eq!(stack.pop(), Some(name.trim()), "mismatched </{name}>");
            } else {
                let name = tag.split_whitespace().next().expect("tag has a name");
                if stack.is_empty() {
                    roots += 1;
                }
                if !tag.ends_with('/') {
                    stack.push(name.trim_end_matches('/'));
                }
            }
            rest = &rest[close + 1..];
        }
        assert!(stack.is_empty(), "unclosed {stack:?}");
        assert_eq!(roots, 1, "one root element");
        assert!(rest.trim().is_empty());
    }

    #[test]
    fn svg_has_one_panel_per_moved_statistic() {
        let svg = render_svg(&reply());
        assert_well_formed(&svg);
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>\n"));
        // Two drift + one moderate.
        assert_eq!(svg.matches(r#"<g class="panel">"#).count(), 3);
        assert!(svg.contains("mean_c0 — PSI 2.500, drift"));
        assert!(svg.contains("contrast_c0 — PSI 0.150, moderate"));
        assert!(!svg.contains("entropy — "));
        // Five bins, two bars each, per panel; plus the background and two legend squares.
        assert_eq!(svg.matches("<rect").count(), 3 * 10 + 3);
        // Bin labels from the edges: below the first, between, from the last on.
        assert!(svg.contains("&lt; -1<") && svg.contains("[-0.5, 0)<") && svg.contains("≥ 0.5<"));
        assert!(!svg.contains("NaN") && !svg.contains("inf"));
        // Edges that agree to three decimals get more.
        assert_eq!(bin_label(&[0.99, 0.99981, 0.99994], 2), "[0.9998, 0.9999)");
        assert_eq!(bin_label(&[4.0e-7, 1.85e-5], 1), "[4.00e-7, 1.85e-5)");
    }

    #[test]
    fn calm_replies_plot_the_three_largest_psi() {
        let mut r = reply();
        for (st, psi) in r.statistics.iter_mut().zip([0.01, 0.05, 0.03, 0.08]) {
            st.psi = Some(psi);
            st.verdict = "stable".into();
        }
        let names: Vec<&str> = plotted(&r).iter().map(|s| s.name.as_str()).collect();
        assert_eq!(names, ["entropy", "contrast_c0", "sharpness"]);
        let svg = render_svg(&r);
        assert_well_formed(&svg);
        assert_eq!(svg.matches(r#"<g class="panel">"#).count(), 3);
        // No values at all: a document saying so, still well-formed.
        for st in &mut r.statistics {
            st.psi = None;
        }
        let empty = render_svg(&r);
        assert_well_formed(&empty);
        assert!(empty.contains("nothing to plot"));
    }
}
