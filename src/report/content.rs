//! What the regimen report says: the analysis turned into a [`Document`] of blocks.

use super::layout::{Band, Block, Document, DoseTick, HLine, Marker, PlotSpec, Series, Stroke, Table};
use crate::covariates::Covariates;
use crate::dosing::{Dose, Route};
use crate::engine::{self, Params};
use crate::fit::{Estimate, FitResult};
use crate::io::labels::{label, name_and_unit};
use crate::io::levels::Level;
use crate::io::output::{column_decimals, fixed, plain, readable};
use crate::model::PopulationModel;
use crate::nca::IntervalNca;
use crate::plan::advisor::Advice;
use crate::plan::recommend::{self, Plan};
use crate::plan::targets::{Limits, Metric, Target};
use crate::plan::{Course, draws_name};
use crate::stats::selected_quantile;
use crate::sweep::summary::{Summary, SummaryRow};
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use rayon::prelude::*;
use statrs::distribution::Normal;

/// Everything the report shows.
#[derive(Debug, Clone)]
pub struct Analysis<'a> {
    /// Report title.
    pub title: String,
    /// Author line, if any.
    pub author: Option<String>,
    /// A note from the case file.
    pub note: Option<String>,
    /// The population model.
    pub model: &'a PopulationModel,
    /// The subject's covariates (with derived ones).
    pub covariates: &'a Covariates,
    /// The dose history.
    pub doses: &'a [Dose],
    /// The levels.
    pub levels: &'a [Level],
    /// The non-compartmental analysis of the subject's levels (`cistern nca`'s defaults).
    pub nca: &'a [IntervalNca],
    /// The subject's identifier.
    pub subject: Option<&'a str>,
    /// The fit; `None` when the plan is a priori (no levels).
    pub fit: Option<&'a FitResult>,
    /// The point estimate: the fit's, or the typical values for the covariates a priori.
    pub point: Params,
    /// Posterior draws (prior draws a priori).
    pub draws: &'a [Params],
    /// Targets and limits.
    pub targets: &'a [Target],
    /// Limits.
    pub limits: &'a Limits,
    /// How the candidates the case did not give were derived (the grid's notes).
    pub candidates_derived: &'a [String],
    /// The history and the new regimen's start.
    pub course: Course<'a>,
    /// The ranked candidates and the recommendation.
    pub plan: &'a Plan,
    /// The next-level advice.
    pub advice: Option<&'a Advice>,
    /// An optional sweep's summary.
    pub sweep: Option<&'a Summary>,
    /// Where the report came from, and its caution.
    pub stamp: Stamp,
}

/// What every report carries besides its analysis: where it came from (the reproducibility
/// block and the footer) and the caution shown on every page.
#[derive(Debug, Clone)]
pub struct Stamp {
    /// (input path, SHA-256) pairs.
    pub digests: Vec<(String, String)>,
    /// The seed used.
    pub seed: u64,
    /// The command line that produced the report.
    pub command_line: String,
    /// Tool version.
    pub version: String,
    /// Creation time, ISO 8601 UTC.
    pub created_iso: String,
    /// The caution text.
    pub caution: String,
}

impl Stamp {
    /// The reproducibility block every report ends with: each input's SHA-256, the seed, the
    /// command and the version.
    pub(crate) fn reproducibility(&self, b: &mut Vec<Block>) {
        b.push(Block::Heading("Reproducibility".into()));
        b.push(Block::Table(Table {
            headers: vec!["input file".into(), "SHA-256".into()],
            rows: self.digests.iter().map(|(path, sha)| vec![path.clone(), sha.clone()]).collect(),
            right: vec![false, false],
        }));
        b.push(Block::KeyValues(vec![
            ("Seed".into(), self.seed.to_string()),
            ("Command".into(), self.command_line.clone()),
            ("Version".into(), format!("cistern {}", self.version)),
        ]));
    }

    /// The report's head: `about` (what it is about), the creation time, the tool, the author,
    /// and the case's note under them.
    pub(crate) fn head(
        &self,
        about: Vec<(String, String)>,
        author: &Option<String>,
        note: &Option<String>,
    ) -> Vec<Block> {
        let mut pairs = about;
        pairs.push(("Created".into(), self.created_iso.clone()));
        pairs.push(("Tool".into(), format!("cistern {}", self.version)));
        pairs.extend(author.iter().map(|a| ("Prepared by".to_string(), a.clone())));
        let mut blocks = vec![Block::KeyValues(pairs)];
        blocks.extend(note.iter().map(|n| Block::Note(n.clone())));
        blocks
    }

    /// The document of `blocks`, with the caution, the footer and the dates.
    pub(crate) fn document(&self, title: &str, author: &Option<String>, blocks: Vec<Block>) -> Document {
        Document {
            title: title.to_string(),
            caution: self.caution.clone(),
            footer: format!("cistern {} · created {}", self.version, self.created_iso),
            created_iso: self.created_iso.clone(),
            author: author.clone(),
            blocks,
        }
    }
}

const BLUE: (f32, f32, f32) = (0.12, 0.35, 0.65);
const GREY: (f32, f32, f32) = (0.45, 0.45, 0.45);

fn r3(x: f64) -> String {
    readable(x, 3)
}

/// One table column's numbers, all with the decimals chosen for the column
/// ([`column_decimals`]: `digits` significant digits of its largest value), so that `0`, `8`
/// and `20.5` print as `0.0`, `8.0` and `20.5`; a missing value is an empty cell.
fn column(values: &[Option<f64>], digits: usize) -> Vec<String> {
    let decimals = column_decimals(values.iter().flatten().copied(), digits);
    values.iter().map(|x| x.map_or_else(String::new, |x| fixed(x, decimals))).collect()
}

/// Table rows from columns of cells (all of one length).
fn rows_of(columns: Vec<Vec<String>>) -> Vec<Vec<String>> {
    let n = columns.first().map_or(0, Vec::len);
    (0..n).map(|i| columns.iter().map(|c| c[i].clone()).collect()).collect()
}

fn estimate_cells(e: &Estimate) -> [String; 3] {
    [
        readable(e.value, 4),
        e.ci95
            .map(|c| format!("{} – {}", readable(c[0], 3), readable(c[1], 3)))
            .unwrap_or_else(|| "—".into()),
        e.se.map(|s| readable(s, 3)).unwrap_or_else(|| "—".into()),
    ]
}

fn band(b: &recommend::Band) -> String {
    format!("{} ({} – {})", r3(b.median), r3(b.p05), r3(b.p95))
}

/// Points a plot samples evenly over its span, besides the corners of the curve.
const PLOT_POINTS: usize = 800;

/// The times a plot of the exact curve over `[lo, hi]` samples: an even grid, every dose start
/// and infusion end (where the exact curve has its corners: an infusion's peak is at its end),
/// and a point just before each (so a bolus shows as a jump, not a ramp). The engine is exact
/// at every time, so the plot is the exact curve at these points. `simulate --svg` and the
/// report's concentration plot both sample here.
pub fn curve_times(params: &Params, doses: &[Dose], (lo, hi): (f64, f64)) -> Vec<f64> {
    let span = hi - lo;
    if span <= 0.0 {
        return vec![lo];
    }
    let mut times: Vec<f64> = (0..=PLOT_POINTS).map(|i| lo + span * i as f64 / PLOT_POINTS as f64).collect();
    let just_before = span * 1e-9;
    for d in doses {
        let start = d.time_h + if d.route == Route::Oral { params.tlag_h } else { 0.0 };
        for corner in [start, start + d.duration_h] {
            times.extend([corner - just_before, corner].into_iter().filter(|t| (lo..=hi).contains(t)));
        }
    }
    times.sort_by(f64::total_cmp);
    times.dedup();
    times
}

/// The concentration plot, linear and logarithmic: observed levels, the individual prediction
/// over the history and the recommended regimen, a 90 % prediction band (parameter draws plus
/// residual error), the target band, the LLOQ line and the doses.
pub fn concentration_plots(a: &Analysis) -> Vec<PlotSpec> {
    let rec = a.plan.recommended.as_ref();
    let first = a.doses.first().map_or(0.0, |d| d.time_h);
    let last_level = a.levels.iter().map(|l| l.time_h).fold(first, f64::max);
    let end = match rec {
        Some(r) => r.start_h + 3.0 * r.assessment.regimen.every_h,
        None => last_level.max(a.doses.last().map_or(first, |d| d.time_h)) + 24.0,
    };
    let doses = match rec {
        Some(r) => a.course.continued(&r.assessment.regimen, r.loading_dose_mg, end),
        None => a.doses.to_vec(),
    };
    let times = curve_times(&a.point, &doses, (first, end));
    let point = engine::concentrations(&a.point, &doses, &times);
    // Prediction band: every draw (up to 400) with residual error, 5th–95th percentile per time.
    let residual = a.fit.and_then(|f| f.residual).unwrap_or(a.model.residual);
    let step = (a.draws.len() / 400).max(1);
    let normal = Normal::new(0.0, 1.0).expect("standard normal");
    let mut rng = StdRng::seed_from_u64(crate::seeds::Seeds(a.stamp.seed).report_bands());
    // The draws' exact curves in parallel, then their residual errors from the one stream, draw
    // by draw and time by time.
    let mut curves: Vec<Vec<f64>> =
        a.draws.par_iter().step_by(step).map(|p| engine::concentrations(p, &doses, &times)).collect();
    for f in curves.iter_mut().flatten() {
        *f = (*f + residual.variance(*f).sqrt() * normal.sample(&mut rng)).max(0.0);
    }
    let (lo, hi): (Vec<f64>, Vec<f64>) = (0..times.len())
        .into_par_iter()
        .map(|j| {
            let mut column: Vec<f64> = curves.iter().map(|c| c[j]).collect();
            if column.is_empty() {
                return (point[j], point[j]);
            }
            (selected_quantile(&mut column, 0.05), selected_quantile(&mut column, 0.95))
        })
        .unzip();
    let target = a.targets.iter().find_map(|t| match t.metric {
        Metric::Trough | Metric::Peak | Metric::Cavg => Some((
            t.lo.unwrap_or(0.0),
            t.hi.unwrap_or(f64::INFINITY),
            format!("{} target: {} mg/L", t.name(), bounds(t)),
        )),
        Metric::Above { lo_mg_l, hi_mg_l } => Some((lo_mg_l, hi_mg_l, "target window".to_string())),
        _ => None,
    });
    let lloq = a.levels.iter().filter_map(|l| l.lloq_mg_l).fold(f64::NAN, f64::max);
    let markers: Vec<Marker> = a
        .levels
        .iter()
        .map(|l| Marker { x: l.time_h, y: l.conc_mg_l.or(l.lloq_mg_l).unwrap_or(0.0), hollow: l.is_blq() })
        .collect();
    [false, true]
        .iter()
        .map(|&log_y| PlotSpec {
            title: if log_y {
                "Concentration, logarithmic scale".into()
            } else {
                "Concentration, linear scale".into()
            },
            x_label: "time (h)".into(),
            y_label: "concentration (mg/L)".into(),
            log_y,
            bands: vec![Band {
                label: "90 % prediction band".into(),
                xs: times.clone(),
                lo: lo.clone(),
                hi: hi.clone(),
                color: BLUE,
            }],
            target: target.clone(),
            series: vec![Series {
                label: if a.fit.is_some() {
                    "individual prediction"
                } else {
                    "typical prediction (a priori)"
                }
                .into(),
                xs: times.clone(),
                ys: point.clone(),
                stroke: Stroke::Solid,
                color: BLUE,
            }],
            hlines: if lloq.is_finite() {
                vec![HLine { label: format!("LLOQ {} mg/L", r3(lloq)), y: lloq, color: GREY }]
            } else {
                Vec::new()
            },
            markers: markers.clone(),
            markers_label: "observed level (hollow: below LLOQ)".into(),
            doses: doses.iter().map(|d| DoseTick { x: d.time_h, color: BLUE }).collect(),
            start_x: rec.map(|r| r.start_h),
        })
        .collect()
}

/// Build the report around its concentration plots (made once by [`concentration_plots`], so
/// an SVG export can reuse them).
pub fn build(a: &Analysis, plots: &[PlotSpec]) -> Document {
    let mut b = Vec::new();
    let who = a.subject.unwrap_or("the subject").to_string();
    let drug = a.model.drug.clone().unwrap_or_else(|| "unnamed drug".into());
    let about = vec![("Subject".to_string(), who.clone()), ("Drug (model)".to_string(), drug)];
    b.extend(a.stamp.head(about, &a.author, &a.note));

    // Summary: covariates, doses, levels.
    b.push(Block::Heading("Subject and data".into()));
    let mut cov_rows: Vec<Vec<String>> =
        a.covariates.iter().map(|(k, v)| vec![label(k).to_string(), readable(v, 4)]).collect();
    if let Some(sex) = a.covariates.sex {
        cov_rows.insert(0, vec!["sex".into(), format!("{sex:?}").to_lowercase()]);
    }
    if !cov_rows.is_empty() {
        b.push(Block::Table(Table {
            headers: vec!["covariate".into(), "value".into()],
            rows: cov_rows,
            right: vec![false, true],
        }));
    }
    for d in &a.covariates.derivations {
        b.push(Block::Note(format!("Derived: {d}.")));
    }
    let of = |f: fn(&Dose) -> Option<f64>| a.doses.iter().map(f).collect::<Vec<_>>();
    let dose_rows = rows_of(vec![
        column(&of(|d| Some(d.time_h)), 5),
        column(&of(|d| Some(d.amount_mg)), 5),
        a.doses.iter().map(|d| d.route.to_string()).collect(),
        column(&of(|d| (d.duration_h > 0.0).then_some(d.duration_h)), 3),
    ]);
    b.push(Block::Table(Table {
        headers: vec!["dose time (h)".into(), "amount (mg)".into(), "route".into(), "duration (h)".into()],
        rows: dose_rows,
        right: vec![true, true, false, true],
    }));
    match a.fit {
        Some(fit) => fit_section(fit, &mut b),
        None => a_priori_section(a, &mut b),
    }
    b.extend(plots.iter().cloned().map(Block::Plot));
    nca_section(a.nca, &mut b);

    // Recommendation.
    b.push(Block::Heading("Proposed regimen".into()));
    let goals: Vec<String> = a.targets.iter().map(Target::to_string).collect();
    b.push(Block::Paragraph(format!("Targets: {}. {}", goals.join("; "), limits_text(a.limits))));
    match &a.plan.recommended {
        Some(r) => {
            let s = &r.assessment;
            let mut kv = vec![
                ("Regimen".to_string(), s.regimen.describe()),
                ("First dose at".to_string(), format!("{} h", readable(r.start_h, 5))),
                ("Probability of target attainment".to_string(), format!("{:.1} %", 100.0 * s.pta)),
                (
                    "Predicted peak, mg/L (90 %)".to_string(),
                    band(&s.predicted.peak_mg_l) + &target_text(a.targets, Metric::Peak),
                ),
                (
                    "Predicted trough, mg/L (90 %)".to_string(),
                    band(&s.predicted.trough_mg_l) + &target_text(a.targets, Metric::Trough),
                ),
                (
                    "Predicted AUC24, mg·h/L (90 %)".to_string(),
                    band(&s.predicted.auc24_mg_h_l) + &target_text(a.targets, Metric::Auc24),
                ),
            ];
            if let Some(t) = s.time_to_target_h {
                kv.push((
                    "Targets first met".into(),
                    format!("over the interval ending {} h after the start", readable(t, 4)),
                ));
            }
            if let Some(ld) = r.loading_dose_mg {
                let when =
                    r.time_to_target_with_loading_h.map(|t| format!(", targets met by {} h", readable(t, 4)));
                kv.push((
                    "Loading dose".into(),
                    format!("{} mg as the first dose{}", plain(ld), when.unwrap_or_default()),
                ));
            }
            for (p, what) in [(s.p_over_peak, "peak"), (s.p_over_trough, "trough")] {
                if let Some(p) = p {
                    kv.push((format!("Chance the {what} exceeds its limit"), format!("{:.1} %", 100.0 * p)));
                }
            }
            b.push(Block::KeyValues(kv));
        }
        None => b.push(Block::Paragraph("No candidate respects every limit: nothing is recommended.".into())),
    }
    for n in &a.plan.notes {
        b.push(Block::Note(format!("Note: {n}.")));
    }
    for n in a.candidates_derived {
        b.push(Block::Note(format!("Candidates: {n}.")));
    }
    let shown: Vec<_> = a.plan.candidates.iter().take(12).collect();
    let median = |f: fn(&recommend::Assessment) -> f64| {
        column(&shown.iter().map(|c| Some(f(c))).collect::<Vec<_>>(), 3)
    };
    let alt_rows = rows_of(vec![
        (1..=shown.len()).map(|i| i.to_string()).collect(),
        shown.iter().map(|c| c.regimen.describe()).collect(),
        shown.iter().map(|c| format!("{:.1}", 100.0 * c.pta)).collect(),
        median(|c| c.predicted.peak_mg_l.median),
        median(|c| c.predicted.trough_mg_l.median),
        median(|c| c.predicted.auc24_mg_h_l.median),
        shown
            .iter()
            .map(|c| if c.limits_broken.is_empty() { "—".into() } else { c.limits_broken.join("; ") })
            .collect(),
    ]);
    b.push(Block::Table(Table {
        headers: vec![
            "rank".into(),
            "regimen".into(),
            "PTA %".into(),
            "peak".into(),
            "trough".into(),
            "AUC24".into(),
            "limits broken".into(),
        ],
        rows: alt_rows,
        right: vec![true, false, true, true, true, true, false],
    }));
    b.push(Block::Note(format!(
        "Alternatives ranked by PTA, then lower daily dose, then longer interval; medians over the {} \
         (peak and trough in mg/L, AUC24 in mg·h/L).",
        draws_name(a.fit.is_none())
    )));
    if let Some(adv) = a.advice {
        b.push(Block::Heading("When to draw the next level".into()));
        let (exposure, unit) = name_and_unit(&adv.exposure);
        b.push(Block::Paragraph(format!(
            "One more level, drawn at the times below, is expected to narrow the 90 % interval of {exposure} \
             (now {} {unit} wide) the most.",
            r3(adv.current_ci90_width)
        )));
        let times: Vec<_> = adv.times.iter().take(6).collect();
        let of = |f: fn(&&crate::plan::advisor::SampleValue) -> f64| {
            times.iter().map(|s| Some(f(s))).collect::<Vec<_>>()
        };
        let rows = rows_of(vec![
            column(&of(|s| s.time_h), 5),
            column(&of(|s| s.after_dose_h), 3),
            column(&of(|s| s.expected_ci90_width), 3),
            times.iter().map(|s| format!("{:.0} %", s.interval_narrowing_pct)).collect(),
        ]);
        b.push(Block::Table(Table {
            headers: vec![
                "time (h)".into(),
                "after dose (h)".into(),
                format!("expected 90 % width ({unit})"),
                "narrower by (%)".into(),
            ],
            rows,
            right: vec![true, true, true, true],
        }));
    }
    if let Some(s) = a.sweep {
        sweep_page(s, &mut b);
    }
    methods(a, &mut b);
    a.stamp.document(&a.title, &a.author, b)
}

/// The non-compartmental summary of the levels, without a model: a row per dosing interval with
/// a measurable level, and the log-scale panel of each interval with a terminal line. An
/// interval without one says why (its notes) instead of showing a line.
fn nca_section(nca: &[IntervalNca], b: &mut Vec<Block>) {
    let measured: Vec<&IntervalNca> = nca.iter().filter(|r| r.cmax_mg_l.is_some()).collect();
    if measured.is_empty() {
        return;
    }
    b.push(Block::Heading("Non-compartmental analysis".into()));
    b.push(Block::Paragraph(
        "Exposure from the measured levels alone, without the model (as cistern nca computes it by default: \
         linear-up/log-down areas, λz chosen automatically; methods section 10). Times are hours after each dose."
            .into(),
    ));
    // One decimal count per column ([`column`]), a dash where the levels do not give the value.
    let values: [fn(&IntervalNca) -> Option<f64>; 6] = [
        |r| r.cmax_mg_l,
        |r| r.tmax_h,
        |r| r.auc_last_mg_h_l,
        |r| r.lambda_z_per_h,
        |r| r.half_life_h,
        |r| r.auc_inf_obs_mg_h_l,
    ];
    let mut columns = vec![measured.iter().map(|r| r.interval.to_string()).collect::<Vec<_>>()];
    for value in values {
        let cells = column(&measured.iter().map(|r| value(r)).collect::<Vec<_>>(), 4);
        columns.push(cells.into_iter().map(|c| if c.is_empty() { "—".into() } else { c }).collect());
    }
    let rows = rows_of(columns);
    b.push(Block::Table(Table {
        headers: vec![
            "dose".into(),
            "Cmax (mg/L)".into(),
            "Tmax (h)".into(),
            "AUClast (mg·h/L)".into(),
            "λz (1/h)".into(),
            "half-life (h)".into(),
            "AUC0–∞ (mg·h/L)".into(),
        ],
        rows,
        right: vec![true; 7],
    }));
    b.push(Block::Note(
        "Each column to 4 significant digits of its largest value; — where the levels do not give the value \
         (the notes say why). AUC0–∞ uses the observed last level and is given for the first dose only."
            .into(),
    ));
    for r in &measured {
        for n in &r.notes {
            b.push(Block::Note(format!("Dose {}: {n}.", r.interval)));
        }
    }
    if measured.iter().all(|r| r.terminal.is_none()) {
        b.push(Block::Note(
            "No interval has the levels a terminal line needs, so no λz, half-life or AUC0–∞ is given and no \
             line is drawn."
                .into(),
        ));
    }
    b.extend(
        measured.iter().filter(|r| r.terminal.is_some()).map(|r| Block::Plot(crate::nca::plot::panel(r))),
    );
}

/// The levels against the fit, the estimates and the fit's diagnostics.
fn fit_section(fit: &FitResult, b: &mut Vec<Block>) {
    let of = |f: fn(&crate::fit::LevelFit) -> Option<f64>| fit.levels.iter().map(f).collect::<Vec<_>>();
    let observed = column(&of(|l| l.observed_mg_l), 4).into_iter().zip(&fit.levels).map(|(y, l)| {
        match (l.observed_mg_l, l.lloq_mg_l) {
            (Some(_), _) => y,
            (None, Some(q)) => format!("<{} (BLQ)", r3(q)),
            (None, None) => "BLQ".into(),
        }
    });
    let level_rows = rows_of(vec![
        column(&of(|l| Some(l.time_h)), 5),
        observed.collect(),
        column(&of(|l| Some(l.predicted_mg_l)), 4),
        column(&of(|l| l.weighted_residual), 3),
    ]);
    b.push(Block::Table(Table {
        headers: vec![
            "level time (h)".into(),
            "observed (mg/L)".into(),
            "predicted (mg/L)".into(),
            "weighted residual".into(),
        ],
        rows: level_rows,
        right: vec![true, true, true, true],
    }));

    // Estimates.
    b.push(Block::Heading("Estimates".into()));
    let mut rows = Vec::new();
    for (name, unit, est, typical) in fit.named_estimates() {
        let [v, ci, se] = estimate_cells(est);
        rows.push(vec![
            format!("{name} ({unit})"),
            v,
            ci,
            se,
            typical.map(|t| readable(t, 4)).unwrap_or_default(),
        ]);
    }
    b.push(Block::Table(Table {
        headers: vec![
            "parameter".into(),
            "estimate".into(),
            "95 % interval".into(),
            "SE / posterior SD".into(),
            "population typical".into(),
        ],
        rows,
        right: vec![false, true, true, true, true],
    }));
    let method = serde_json::to_value(fit.method)
        .ok()
        .and_then(|v| v.as_str().map(str::to_string))
        .unwrap_or_default();
    let intervals = serde_json::to_value(fit.intervals)
        .ok()
        .and_then(|v| v.as_str().map(str::to_string))
        .unwrap_or_default();
    let mut diag = vec![
        ("Method".to_string(), format!("{method} ({intervals} intervals)")),
        ("Converged".to_string(), if fit.converged { "yes".into() } else { "NO".into() }),
        ("Objective (−2 log posterior + const.)".to_string(), readable(fit.objective, 6)),
    ];
    if let Some(ess) = fit.effective_draws {
        diag.push(("Effective posterior draws".into(), format!("{ess:.0}")));
    }
    b.push(Block::KeyValues(diag));
    if fit.warnings.is_empty() {
        b.push(Block::Note("No warnings from the fit.".into()));
    }
    for w in &fit.warnings {
        b.push(Block::Note(format!("Warning: {w}.")));
    }
}

/// What an a priori plan rests on, in place of a fit: no levels, draws from the prior.
fn a_priori_section(a: &Analysis, b: &mut Vec<Block>) {
    b.push(Block::Heading("A priori".into()));
    b.push(Block::Paragraph(format!(
        "No levels are on record, so nothing is fitted: the plan is a priori, over {} parameter sets \
         drawn from the population model for this subject's covariates (typical clearance {} L/h, \
         volume {} L, with the model's between-subject variability), not over a posterior. A level \
         drawn under the new regimen would narrow these predictions.",
        a.draws.len(),
        readable(a.point.cl_l_h, 4),
        readable(a.point.v_l, 4)
    )));
}

/// Regimens the sweep page shows, best first.
const SWEEP_ROWS: usize = 20;

/// The sweep's page: PTA by regimen and the exposure percentiles, best regimens first (the
/// page says how many of how many it shows), and which limits the starred ones break.
fn sweep_page(s: &Summary, b: &mut Vec<Block>) {
    let mut rows: Vec<&SummaryRow> = s.regimens.iter().collect();
    rows.sort_by(|a, b| b.pta.total_cmp(&a.pta).then(a.daily_mg.total_cmp(&b.daily_mg)));
    rows.truncate(SWEEP_ROWS);
    let breaks = |r: &SummaryRow| !(r.dose_limits_broken.is_empty() && r.exposure_limits_broken.is_empty());
    let label = |r: &SummaryRow| format!("{}{}", r.regimen.describe(), if breaks(r) { " *" } else { "" });
    let cells = |f: fn(&SummaryRow) -> Option<f64>| column(&rows.iter().map(|r| f(r)).collect::<Vec<_>>(), 3);
    let headers: Vec<String> = [
        "regimen",
        "PTA (%)",
        "trough p05 (mg/L)",
        "trough p50 (mg/L)",
        "trough p95 (mg/L)",
        "peak p50 (mg/L)",
        "AUC24 p05 (mg·h/L)",
        "AUC24 p50 (mg·h/L)",
        "AUC24 p95 (mg·h/L)",
    ]
    .map(String::from)
    .to_vec();
    let shown = if rows.len() < s.regimens.len() {
        format!("the best {} of {} regimens", rows.len(), s.regimens.len())
    } else {
        format!("all {} regimens", rows.len())
    };
    b.push(Block::PageBreak);
    b.push(Block::Heading(format!("Virtual population: {} subjects", s.subjects)));
    b.push(Block::Bars(super::layout::BarChart {
        title: format!("Probability of target attainment by regimen: {shown}"),
        labels: rows.iter().map(|r| label(r)).collect(),
        values: rows.iter().map(|r| 100.0 * r.pta).collect(),
        axis_label: "probability of target attainment (%)".into(),
    }));
    b.push(Block::Table(Table {
        right: headers.iter().map(|h| h != "regimen").collect(),
        headers,
        rows: rows_of(vec![
            rows.iter().map(|r| label(r)).collect(),
            rows.iter().map(|r| format!("{:.1}", 100.0 * r.pta)).collect(),
            cells(|r| r.trough_mg_l.p05),
            cells(|r| r.trough_mg_l.p50),
            cells(|r| r.trough_mg_l.p95),
            cells(|r| r.peak_mg_l.p50),
            cells(|r| r.auc24_mg_h_l.p05),
            cells(|r| r.auc24_mg_h_l.p50),
            cells(|r| r.auc24_mg_h_l.p95),
        ]),
    }));
    b.push(Block::Note(format!(
        "Best first: {shown}, by PTA, then the lower daily dose. PTA: share of the virtual subjects meeting \
         every target; p05, p50 and p95: the 5th, 50th and 95th percentiles over the subjects, at steady state."
    )));
    for r in rows.iter().filter(|r| breaks(r)) {
        let why: Vec<&str> =
            r.dose_limits_broken.iter().chain(&r.exposure_limits_broken).map(String::as_str).collect();
        b.push(Block::Note(format!("* {}: {}.", r.regimen.describe(), why.join("; "))));
    }
}

/// The stated target on `metric`, after a predicted value: `; target 400–600`, `; target at
/// most 15`, or nothing when there is none.
fn target_text(targets: &[Target], metric: Metric) -> String {
    targets.iter().find(|t| t.metric == metric).map(|t| format!("; target {}", bounds(t))).unwrap_or_default()
}

/// A target's bounds for reading: `400–600`, `at most 15`, `at least 10`.
fn bounds(t: &Target) -> String {
    match (t.lo, t.hi) {
        (Some(lo), Some(hi)) => format!("{}–{}", plain(lo), plain(hi)),
        (None, Some(hi)) => format!("at most {}", plain(hi)),
        (Some(lo), None) => format!("at least {}", plain(lo)),
        (None, None) => String::new(),
    }
}

fn limits_text(l: &Limits) -> String {
    let mut parts = Vec::new();
    let mut add = |label: &str, v: Option<f64>, unit: &str| {
        if let Some(v) = v {
            parts.push(format!("{label} {} {unit}", plain(v)));
        }
    };
    add("maximum single dose", l.max_dose_mg, "mg");
    add("maximum daily dose", l.max_daily_mg, "mg");
    add("maximum infusion rate", l.max_rate_mg_h.map(|r| r / 60.0), "mg/min");
    add("maximum peak", l.max_peak_mg_l, "mg/L");
    add("maximum trough", l.max_trough_mg_l, "mg/L");
    add("minimum interval", l.min_every_h, "h");
    if parts.is_empty() {
        "No safety limits were stated.".into()
    } else {
        format!(
            "Limits: {}; an exposure limit counts as broken when the chance of exceeding it is above {:.0} %.",
            parts.join(", "),
            100.0 * l.max_risk
        )
    }
}

fn methods(a: &Analysis, b: &mut Vec<Block>) {
    let m = a.model;
    b.push(Block::Heading("Methods and assumptions".into()));
    b.push(Block::Paragraph(
        "Model: one well-mixed compartment with first-order elimination, dA/dt = −k·A + ka·D + R(t), \
         C = A/V, k = CL/V; intravenous boluses enter A at once, infusions at a constant rate, oral doses \
         enter a depot D (bioavailability F, lag time) absorbed at rate ka. Concentrations and AUC are the \
         exact solution by superposition; steady state is solved in closed form."
            .into(),
    ));
    let mut prior = format!(
        "Population model: CL {} L/h (CV {:.0} %), V {} L (CV {:.0} %), log-normal between subjects, \
         ω² = ln(1 + CV²)",
        plain(m.clearance.typical),
        100.0 * m.clearance.bsv_cv,
        plain(m.volume.typical),
        100.0 * m.volume.bsv_cv
    );
    for (pair, value) in [
        ("CL and V", m.correlation.cl_v),
        ("CL and ka", m.correlation.cl_ka),
        ("V and ka", m.correlation.v_ka),
    ] {
        if let Some(rho) = value.filter(|r| *r != 0.0) {
            prior += &format!(", correlation of {pair} {}", plain(rho));
        }
    }
    for (p, name) in [(&m.clearance, "CL"), (&m.volume, "V")] {
        for c in &p.covariates {
            prior += &format!(
                "; {name} scales with {} ({:?}, reference {}, effect {})",
                c.covariate,
                c.form,
                plain(c.reference),
                plain(c.effect)
            );
        }
    }
    if let Some(abs) = &m.absorption {
        prior += &format!(
            "; ka {} 1/h (CV {:.0} %), F {}, lag {} h",
            plain(abs.ka.typical),
            100.0 * abs.ka.bsv_cv,
            plain(abs.f),
            plain(abs.tlag_h)
        );
    }
    b.push(Block::Paragraph(prior + "."));
    let estimation = if a.fit.is_some() {
        "Estimation: maximum a posteriori (Bayesian) with the levels below the quantification limit \
         entering by the M3 likelihood; intervals from adaptive importance sampling of the exact posterior \
         (seeded). Planning: each candidate is evaluated at steady state for every posterior draw"
    } else {
        "Estimation: none, as no levels are on record; the parameters are drawn (seeded) from the \
         population model's between-subject distribution for this subject's covariates, the population \
         prior. Planning: each candidate is evaluated at steady state for every draw from that prior"
    };
    b.push(Block::Paragraph(format!(
        "Residual error: σ² = a² + (b·f)² with a = {} mg/L and b = {}. {estimation}; PTA is the share of \
         draws meeting every target.",
        plain(m.residual.additive_mg_l),
        plain(m.residual.proportional_cv)
    )));
    b.push(Block::Paragraph(
        "Assumptions that the data do not show: the one-compartment model holds (no marked distribution \
         phase, linear elimination), the parameters stay constant over the planned course (stable renal \
         function), the dose history and sampling times are recorded correctly, and the population model \
         describes this patient's population."
            .into(),
    ));
    for r in [
        "Sheiner LB, Beal SL. Bayesian individualization of pharmacokinetics: simple implementation and comparison with non-Bayesian methods. J Pharm Sci 1982;71:1344–1348 (issue number not confirmed).",
        "Beal SL. Ways to fit a PK model with some data below the quantification limit. J Pharmacokinet Pharmacodyn 2001;28:481–504.",
        "Cockcroft DW, Gault MH. Prediction of creatinine clearance from serum creatinine. Nephron 1976;16:31–41.",
        "Chaloner K, Verdinelli I. Bayesian experimental design: a review. Statist Sci 1995;10(3):273–304.",
    ] {
        b.push(Block::Note(r.into()));
    }
    a.stamp.reproducibility(b);
}
