//! The diagnostic plots of a fitted model, as report figures (drawn as SVG by `report::svg` and
//! in the population report's PDF): observed against population and individual predictions
//! (identity line, linear and logarithmic), CWRES against time and against the population
//! prediction (zero line and bin medians), the NPDE's normal QQ plot, each subject's levels with
//! its individual and population curves, and each random effect against each covariate.
//! docs/methods.md, section 12.5, states the two rules computed here: the bin medians and the
//! QQ plot's positions.

use super::LevelDiagnostics;
use crate::engine::{self, Params};
use crate::fit::{FitResult, SubjectData};
use crate::io::labels::label;
use crate::report::content::curve_times;
use crate::report::layout::{DoseTick, HLine, Marker, PlotSpec, Rgb, Series, Stroke};
use crate::report::plot::{Axis, Figure, Scene, Tick, panel_scene, plot_scene};
use crate::stats::interpolated_quantile;
use statrs::distribution::{ContinuousCDF, Normal};

const BLUE: Rgb = (0.12, 0.35, 0.65);
const GREY: Rgb = (0.45, 0.45, 0.45);
const ORANGE: Rgb = (0.85, 0.4, 0.0);

/// A figure of one panel.
const WIDE: (f64, f64) = (480.0, 300.0);
/// A panel of a figure of two columns.
const HALF: (f64, f64) = (240.0, 220.0);

/// At most this many bins of bin medians.
pub const MAX_BINS: usize = 10;
/// At least this many points per bin.
pub const MIN_PER_BIN: usize = 5;

/// The bin medians of a scatter: the points sorted by x and cut into B = min(10, ⌊n/5⌋) bins
/// of consecutive points whose sizes differ by at most one (the larger bins first), each
/// summarised by the median of its x and the median of its y. Empty for fewer than 5 points.
pub fn bin_medians(points: &[(f64, f64)]) -> Vec<(f64, f64)> {
    let mut sorted: Vec<(f64, f64)> = points.to_vec();
    sorted.sort_by(|a, b| a.0.total_cmp(&b.0));
    let n = sorted.len();
    let bins = (n / MIN_PER_BIN).min(MAX_BINS);
    let mut out = Vec::with_capacity(bins);
    let mut start = 0;
    for b in 0..bins {
        let size = n / bins + usize::from(b < n % bins);
        let bin = &sorted[start..start + size];
        let median = |f: fn(&(f64, f64)) -> f64| {
            let mut v: Vec<f64> = bin.iter().map(f).collect();
            v.sort_by(f64::total_cmp);
            interpolated_quantile(&v, 0.5)
        };
        out.push((median(|p| p.0), median(|p| p.1)));
        start += size;
    }
    out
}

/// The normal scores of a QQ plot of n values: Φ⁻¹((i − ½)/n) for i = 1…n (Hazen's plotting
/// positions).
pub fn normal_scores(n: usize) -> Vec<f64> {
    let normal = Normal::new(0.0, 1.0).expect("the standard normal");
    (1..=n).map(|i| normal.inverse_cdf((i as f64 - 0.5) / n as f64)).collect()
}

fn finite_range(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    values.filter(|v| v.is_finite()).fold(None, |r, v| match r {
        None => Some((v, v)),
        Some((lo, hi)) => Some((lo.min(v), hi.max(v))),
    })
}

fn line(label: &str, (lo, hi): (f64, f64), color: Rgb, stroke: Stroke) -> Series {
    Series { label: label.into(), xs: vec![lo, hi], ys: vec![lo, hi], stroke, color }
}

/// A linear axis symmetric about zero, reaching the values and at least ±`reach`.
fn symmetric(values: impl Iterator<Item = f64>, reach: f64) -> Axis {
    let reach = values.filter(|v| v.is_finite()).fold(reach, |m: f64, v| m.max(v.abs()));
    Axis::linear(-reach, reach, true)
}

/// Residuals and NPDE are standard normal under the model: ±2 frames their expected spread.
const NORMAL_REACH: f64 = 2.0;

/// One observed-against-predicted panel: the quantified levels, the identity line, the same
/// range on both axes.
fn observed_panel(points: &[(f64, f64)], (short, what): (&str, &str), log: bool) -> Option<Scene> {
    let (lo, hi) = finite_range(points.iter().flat_map(|p| [p.0, p.1]).filter(|v| !log || *v > 0.0))?;
    let axis = if log { Axis::log(lo, hi * 1.02, 4) } else { Axis::linear(0.0_f64.min(lo), hi * 1.02, true) };
    let scale = if log { "log scale" } else { "linear scale" };
    let mut spec = PlotSpec::empty(format!("{short}, {scale}"), format!("{what} (mg/L)"), "observed (mg/L)");
    spec.log_y = log;
    spec.series.push(line("identity", (axis.lo, axis.hi), GREY, Stroke::Dashed));
    spec.markers = points.iter().map(|&(x, y)| Marker { x, y, hollow: false }).collect();
    spec.markers_label = "level".into();
    Some(panel_scene(&spec, axis.clone(), axis, HALF.0, HALF.1))
}

/// Observed against the population (PRED) and the individual (IPRED) predictions, each on a
/// linear and a logarithmic scale; levels below the limit have no observed value and are left
/// out. Without a model there is no PRED and only the IPRED panels are drawn.
pub fn observed_vs_predicted(rows: &[LevelDiagnostics]) -> Option<Figure> {
    let quantified: Vec<(&LevelDiagnostics, f64)> =
        rows.iter().filter_map(|r| r.observed_mg_l.map(|y| (r, y))).collect();
    let pred: Vec<(f64, f64)> = quantified.iter().filter_map(|(r, y)| Some((r.pred_mg_l?, *y))).collect();
    let ipred: Vec<(f64, f64)> = quantified.iter().map(|(r, y)| (r.ipred_mg_l, *y)).collect();
    let mut panels = Vec::new();
    for (points, what) in
        [(pred, ("PRED", "population prediction")), (ipred, ("IPRED", "individual prediction"))]
    {
        if !points.is_empty() {
            panels.extend([false, true].into_iter().filter_map(|log| observed_panel(&points, what, log)));
        }
    }
    figure("observed-vs-predicted.svg", "Observed against predicted concentrations", panels, 2)
}

/// A residual against `x`: the points, the zero line and the bin medians.
fn residual_panel(points: Vec<(f64, f64)>, title: &str, x_label: &str, y_label: &str) -> Option<Scene> {
    let (lo, hi) = finite_range(points.iter().map(|p| p.0))?;
    let mut spec = PlotSpec::empty(title, x_label, y_label);
    spec.hlines.push(HLine { label: "zero".into(), y: 0.0, color: GREY });
    let medians = bin_medians(&points);
    if !medians.is_empty() {
        spec.series.push(Series {
            label: "bin medians".into(),
            xs: medians.iter().map(|m| m.0).collect(),
            ys: medians.iter().map(|m| m.1).collect(),
            stroke: Stroke::Solid,
            color: ORANGE,
        });
    }
    let y = symmetric(points.iter().map(|p| p.1), NORMAL_REACH);
    spec.markers = points.iter().map(|&(x, y)| Marker { x, y, hollow: false }).collect();
    spec.markers_label = "level".into();
    Some(panel_scene(&spec, Axis::linear(lo, hi, true), y, WIDE.0, WIDE.1))
}

/// CWRES against the sampling time.
pub fn cwres_vs_time(rows: &[LevelDiagnostics]) -> Option<Figure> {
    let points = rows.iter().filter_map(|r| Some((r.time_h, r.cwres?))).collect();
    let panel = residual_panel(points, "CWRES against time", "time (h)", "CWRES");
    figure("cwres-vs-time.svg", "", panel.into_iter().collect(), 1)
}

/// CWRES against the population prediction.
pub fn cwres_vs_prediction(rows: &[LevelDiagnostics]) -> Option<Figure> {
    let points = rows.iter().filter_map(|r| Some((r.pred_mg_l?, r.cwres?))).collect();
    let panel = residual_panel(
        points,
        "CWRES against the population prediction",
        "population prediction (mg/L)",
        "CWRES",
    );
    figure("cwres-vs-prediction.svg", "", panel.into_iter().collect(), 1)
}

/// The NPDE's normal QQ plot: the sorted NPDE against the normal scores, with the identity
/// line (where they lie under the model).
pub fn npde_qq(rows: &[LevelDiagnostics]) -> Option<Figure> {
    let mut npde: Vec<f64> = rows.iter().filter_map(|r| r.npde).collect();
    if npde.is_empty() {
        return None;
    }
    npde.sort_by(f64::total_cmp);
    let scores = normal_scores(npde.len());
    let axis = symmetric(npde.iter().chain(&scores).copied(), NORMAL_REACH);
    let mut spec = PlotSpec::empty("Normal QQ plot of the NPDE", "standard normal quantile", "NPDE");
    spec.series.push(line("identity", (axis.lo, axis.hi), GREY, Stroke::Dashed));
    spec.markers = scores.iter().zip(&npde).map(|(&x, &y)| Marker { x, y, hollow: false }).collect();
    spec.markers_label = "level (every level, those below the limit imputed)".into();
    figure("npde-qq.svg", "", vec![panel_scene(&spec, axis.clone(), axis, WIDE.0, WIDE.1)], 1)
}

/// The fit of the subject named like `subject`.
fn fit_of<'a>(fits: &'a [FitResult], subject: &SubjectData) -> Option<&'a FitResult> {
    fits.iter().find(|f| f.subject == subject.id)
}

/// The typical subject's parameters for this fit's covariates (its absorption as the fit's).
fn typical_params(fit: &FitResult) -> Option<Params> {
    let p = fit.prior.as_ref()?;
    Some(Params {
        cl_l_h: p.cl_l_h,
        v_l: p.v_l,
        ka_per_h: p.ka_per_h.or(fit.parameters.ka_per_h),
        ..fit.parameters
    })
}

/// Each subject's levels (below the limit: hollow, at the limit) with its individual curve
/// and, with a model, the typical subject's curve for its covariates, and its doses.
pub fn individual_fits(subjects: &[SubjectData], fits: &[FitResult]) -> Option<Figure> {
    let panels = subjects
        .iter()
        .filter_map(|s| {
            let fit = fit_of(fits, s)?;
            let first = s.doses.first().map_or(0.0, |d| d.time_h);
            let last = s.levels.iter().map(|l| l.time_h).fold(first, f64::max);
            let end = last + 0.05 * (last - first).max(1.0);
            let mut spec =
                PlotSpec::empty(s.id.as_deref().unwrap_or("subject"), "time (h)", "concentration (mg/L)");
            let mut curve = |label: &str, p: &Params, stroke, color| {
                let times = curve_times(p, &s.doses, (first, end));
                let ys = engine::concentrations(p, &s.doses, &times);
                spec.series.push(Series { label: label.into(), xs: times, ys, stroke, color });
            };
            curve("individual", &fit.parameters, Stroke::Solid, BLUE);
            if let Some(typical) = typical_params(fit) {
                curve("population", &typical, Stroke::Dashed, GREY);
            }
            spec.markers = s
                .levels
                .iter()
                .map(|l| Marker {
                    x: l.time_h,
                    y: l.conc_mg_l.or(l.lloq_mg_l).unwrap_or(0.0),
                    hollow: l.is_blq(),
                })
                .collect();
            spec.markers_label = "level".into();
            spec.doses = s.doses.iter().map(|d| DoseTick { x: d.time_h, color: BLUE }).collect();
            Some(plot_scene(&spec, HALF.0, HALF.1))
        })
        .collect();
    figure("individual-fits.svg", "Individual fits", panels, 2)
}

/// The random effects a fit against a model has: η = ln(estimate / typical value for the
/// subject's covariates), as (name, η) for clearance, volume and (when estimated) ka.
fn random_effects_of(fit: &FitResult) -> Vec<(&'static str, f64)> {
    let Some(prior) = &fit.prior else { return Vec::new() };
    let e = &fit.estimates;
    let mut out = vec![("CL", (e.cl_l_h.value / prior.cl_l_h).ln()), ("V", (e.v_l.value / prior.v_l).ln())];
    if let (Some(ka), Some(typical)) = (&e.ka_per_h, prior.ka_per_h) {
        out.push(("ka", (ka.value / typical).ln()));
    }
    out.retain(|(_, eta)| eta.is_finite());
    out
}

/// A covariate's values over the subjects, when every subject has it: the numeric ones by
/// name, and sex as 0 (female) or 1 (male).
fn covariate_columns(subjects: &[&SubjectData]) -> Vec<(String, Vec<f64>, Axis)> {
    let mut out = Vec::new();
    if let Some(first) = subjects.first() {
        for (name, _) in first.covariates.iter() {
            let values: Option<Vec<f64>> = subjects.iter().map(|s| s.covariates.get(name)).collect();
            if let Some(values) = values
                && let Some((lo, hi)) = finite_range(values.iter().copied())
            {
                out.push((label(name).to_string(), values, Axis::linear(lo, hi, true)));
            }
        }
    }
    let sex: Option<Vec<f64>> = subjects
        .iter()
        .map(|s| s.covariates.sex.map(|x| if x == crate::covariates::Sex::Male { 1.0 } else { 0.0 }))
        .collect();
    if let Some(values) = sex {
        let tick = |value: f64, label: &str| Tick { value, label: Some(label.into()) };
        let axis =
            Axis { lo: -0.5, hi: 1.5, log: false, ticks: vec![tick(0.0, "female"), tick(1.0, "male")] };
        out.push(("sex".to_string(), values, axis));
    }
    out
}

/// Each random effect against each covariate (for covariate model building), one panel per
/// pair, with the zero line. Needs fits against a model (a typical value per subject).
pub fn random_effects(subjects: &[SubjectData], fits: &[FitResult]) -> Option<Figure> {
    let pairs: Vec<(&SubjectData, Vec<(&'static str, f64)>)> =
        subjects.iter().filter_map(|s| Some((s, random_effects_of(fit_of(fits, s)?)))).collect();
    let with: Vec<&SubjectData> = pairs.iter().map(|p| p.0).collect();
    let names: Vec<&'static str> =
        pairs.first().map(|p| p.1.iter().map(|e| e.0).collect()).unwrap_or_default();
    let mut panels = Vec::new();
    for (k, name) in names.iter().enumerate() {
        let etas: Option<Vec<f64>> = pairs.iter().map(|p| p.1.get(k).map(|e| e.1)).collect();
        let Some(etas) = etas else { continue };
        for (covariate, values, x_axis) in covariate_columns(&with) {
            let mut spec =
                PlotSpec::empty(format!("η {name} against {covariate}"), &covariate, format!("η {name}"));
            spec.hlines.push(HLine { label: String::new(), y: 0.0, color: GREY });
            spec.markers = values.iter().zip(&etas).map(|(&x, &y)| Marker { x, y, hollow: false }).collect();
            spec.markers_label = "subject".into();
            panels.push(panel_scene(&spec, x_axis, symmetric(etas.iter().copied(), 0.5), HALF.0, HALF.1));
        }
    }
    figure("random-effects-vs-covariates.svg", "Random effects against covariates", panels, 2)
}

/// The file names of every figure, in the report's order (`--plots-dir` writes them).
pub const FILES: [&str; 6] = [
    "observed-vs-predicted.svg",
    "cwres-vs-time.svg",
    "cwres-vs-prediction.svg",
    "npde-qq.svg",
    "individual-fits.svg",
    "random-effects-vs-covariates.svg",
];

fn figure(file: &'static str, title: &str, panels: Vec<Scene>, columns: usize) -> Option<Figure> {
    (!panels.is_empty()).then(|| Figure { file, title: title.into(), panels, columns })
}

/// Every diagnostic figure there is something to draw for, in the report's order.
pub fn figures(rows: &[LevelDiagnostics], subjects: &[SubjectData], fits: &[FitResult]) -> Vec<Figure> {
    [
        observed_vs_predicted(rows),
        cwres_vs_time(rows),
        cwres_vs_prediction(rows),
        npde_qq(rows),
        individual_fits(subjects, fits),
        random_effects(subjects, fits),
    ]
    .into_iter()
    .flatten()
    .collect()
}
