//! `cistern plan`: rank candidate regimens for one subject by probability of target
//! attainment over the posterior, recommend one that respects every limit, and advise when to
//! draw the next level.

use super::args::{OutputArgs, choice, flag_value, whole};
use super::regimen_grid::GridArgs;
use super::study::StudyArgs;
use cistern::error::Problems;
use cistern::spec::{DEFAULT_DRAWS, Stated};
use cistern::workflow::plan::plan_settings;
use cistern::workflow::{NextLevel, PlanSubject, Required, Study, plan};
use cistern::{InputError, Origin, Seeds};
use std::path::PathBuf;

use cistern::Error;
use cistern::io::labels::{name_and_unit, percent};
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, column_decimals, fit_to_width, fixed, full, io_failure,
    number_column, readable, render_table, write_json,
};
use cistern::plan::advisor::Advice;
use cistern::plan::recommend::Plan;
use cistern::plan::session::{DEFAULT_SAMPLE_AFTER_H, Exposure, Outcome};
use cistern::plan::targets::{Limits, Target};
use cistern::units::Kind;
use clap::Args;
use serde::Serialize;

/// Rank candidate regimens for one subject and recommend one, with the next-level advice.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # fit P01 of the demo and plan 1-h infusions every 8-24 h aiming at an AUC24 window
  cistern plan --model demo-regimens/model.toml --doses demo-regimens/doses.csv \\
      --levels demo-regimens/levels.csv --covariates demo-regimens/covariates.csv --subject P01 \\
      --target auc24=400..600 --target trough=..15 --amounts 500..2000/250 --every 8h,12h,24h \\
      --durations 1h --max-dose 2g --max-peak 60mg/l

  # from a saved fit with posterior draws (cistern fit ... --keep-draws 2000 --format json -o fit.json)
  cistern plan --fit fit.json --doses demo-regimens/doses.csv --subject P02 --target trough=10..20 \\
      --amounts 500..1500/250 --every 12h --max-rate 10mg/min

  # a priori, for a new patient: no doses or levels, the model and the covariates alone
  cistern plan --model demo-regimens/model.toml --covariate age_y=60 --covariate sex=F \\
      --covariate weight_kg=70 --covariate height_cm=168 --covariate scr_mg_dl=0.9 \\
      --target auc24=400..600 --amounts 500..2000/250 --every 8h,12h,24h --durations 1h

Targets: auc24, auc_day<N> (AUC over day N of therapy), trough, peak, cavg, and
above=LO..HI[@PCT%] (share of the interval with the level in the window). Exposure limits
(--max-peak, --max-trough) are broken when the chance of exceeding them is above --max-risk.")]
pub struct PlanArgs {
    #[command(flatten)]
    study: StudyArgs,
    /// A saved fit (JSON from `cistern fit --keep-draws N`) instead of --model and --levels
    #[arg(long, value_name = "FILE", conflicts_with_all = ["model", "levels"])]
    fit: Option<String>,
    /// The subject to plan for (needed when the files hold several)
    #[arg(long, value_name = "ID")]
    subject: Option<String>,
    /// Posterior draws to plan over (prior draws when planning a priori) [default: the case's,
    /// else 2000]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u32>)]
    draws: Option<u32>,
    /// Seed for the posterior draws and the advisor's simulations [default: the case's, else 1]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u64>)]
    seed: Option<u64>,
    /// Time of the new regimen's first dose [default: one interval after the last dose given]
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    start: Option<String>,
    #[command(flatten)]
    grid: GridArgs,
    /// Exposure the next-level advice should pin down [default: that of the first target]
    #[arg(long, value_parser = choice::<Exposure>())]
    advise_on: Option<Exposure>,
    /// Dosing intervals of the new regimen searched for the next sampling time
    #[arg(long, default_value_t = 2, value_parser = clap::value_parser!(u32).range(1..=20))]
    advise_intervals: u32,
    /// Earliest sampling time the advice proposes after the end of an infusion or bolus, to
    /// leave out the distribution phase [default: 1h, common practice]. After an oral dose,
    /// when the advice is about the trough, no time before the expected peak is proposed
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    sample_after: Option<String>,
    /// Leave out the next-level advice
    #[arg(long)]
    no_advice: bool,
    #[command(flatten)]
    output: OutputArgs,
}

/// The JSON output.
#[derive(Serialize)]
struct PlanJson<'a> {
    subject: Option<&'a str>,
    a_priori: bool,
    start_h: f64,
    targets: &'a [Target],
    limits: &'a Limits,
    #[serde(flatten)]
    plan: &'a Plan,
    next_level: Option<&'a Advice>,
}

/// Run the command.
pub fn run(args: PlanArgs) -> Result<(), Error> {
    let mut spec = args.study.spec()?;
    spec.subject.set("--subject", args.subject.clone());
    spec.seed.set("--seed", args.seed);
    spec.draws.set("--draws", args.draws);
    spec.start.set("--start", args.start.clone());
    let mut problems = Problems::new();
    args.grid.apply(&mut spec, &mut problems);
    let sample_after_h = match &args.sample_after {
        Some(t) => problems.take(flag_value("--sample-after", Kind::Time, t).and_then(|h| {
            if h >= 0.0 {
                Ok(h)
            } else {
                Err(InputError::flag("--sample-after", format!("expected a time of 0 or more, found '{t}'")))
            }
        })),
        None => Some(DEFAULT_SAMPLE_AFTER_H),
    };
    let seeds = Seeds(spec.seed());
    // The output is opened before the fit and the plan, so a bad path fails first.
    let inputs = spec.files().into_iter().chain(args.fit.as_ref().map(PathBuf::from));
    let mut sink = args.output.sink(&mut RunFiles::new(inputs))?;
    let subject = match &args.fit {
        Some(path) => {
            let saved = Stated { value: PathBuf::from(path), origin: Origin::Flag("--fit".into()) };
            problems.take_all(PlanSubject::saved(&saved, &spec.inputs.doses, &spec.subject))
        }
        None => {
            // A bad --draws is reported by the spec's resolution below.
            let draws = spec.draws().unwrap_or(DEFAULT_DRAWS as usize);
            let required = Required { model: true, levels: false };
            problems.take_all(Study::load(&spec.inputs, required).and_then(|study| {
                args.output.notify.notices(&study.notices);
                let model = study.model.as_ref().ok_or_else(|| Error::Usage("no population model".into()))?;
                PlanSubject::of(study.subject(&spec.subject)?, model, seeds, draws).map(|(s, _)| s)
            }))
        }
    };
    // Candidates not given are derived for the subject's point estimate.
    let settings = problems.take_all(plan_settings(&spec, subject.as_ref()));
    let ((settings, subject), sample_after_h) =
        problems.finish_with(settings.zip(subject).zip(sample_after_h))?;
    let Some(grid) = &settings.grid else {
        return Err(Error::Usage("the candidate grid is incomplete".into()));
    };
    for w in &subject.warnings {
        args.output.note(&format!("fit: {w}"));
    }
    if subject.a_priori {
        args.output.note(&a_priori_text(&subject));
    }
    for n in &grid.notes {
        args.output.note(&format!("candidates: {n}"));
    }
    grid.warnings.iter().for_each(|w| super::args::warn(w));
    let next_level = NextLevel {
        exposure: args.advise_on,
        intervals: if args.no_advice { 0 } else { args.advise_intervals },
        sample_after_h,
    };
    let Outcome { start_h, plan: result, advice, notes, warnings } =
        plan(&subject, grid, settings.start_h, next_level, seeds)?;
    for w in &warnings {
        super::args::warn(w);
    }
    let targets = &grid.targets;
    let limits = &grid.limits;
    for n in &notes {
        args.output.note(n);
    }
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => {
            let doc = PlanJson {
                subject: subject.id.as_deref(),
                a_priori: subject.a_priori,
                start_h,
                targets,
                limits,
                plan: &result,
                next_level: advice.as_ref(),
            };
            write_json(out, &doc).map_err(io_failure)?;
        }
        Format::Csv => write_csv(out, &result).map_err(io_failure)?,
        Format::Table => {
            let width = args.output.table_width();
            let text = table(&subject, targets, &result, advice.as_ref(), start_h, width);
            write!(out, "{}", fit_to_width(&format!("{text}\n{CAUTION}\n"), width)).map_err(io_failure)?;
        }
    }
    args.output.caution_for_csv(format);
    sink.finish()
}

/// What an a priori plan rests on, for the note and the table.
fn a_priori_text(subject: &PlanSubject) -> String {
    format!(
        "a priori: no levels, so the plan is over {} draws from the population model for the \
         subject's covariates (typical CL {} L/h, V {} L), not over a posterior",
        subject.posterior.draws.len(),
        readable(subject.posterior.point.cl_l_h, 4),
        readable(subject.posterior.point.v_l, 4)
    )
}

fn write_csv(out: &mut dyn std::io::Write, plan: &Plan) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    w.row([
        "rank",
        "amount_mg",
        "every_h",
        "duration_h",
        "route",
        "daily_mg",
        "pta",
        "p_over_peak",
        "p_over_trough",
        "peak_p05_mg_l",
        "peak_p50_mg_l",
        "peak_p95_mg_l",
        "trough_p05_mg_l",
        "trough_p50_mg_l",
        "trough_p95_mg_l",
        "auc24_p05_mg_h_l",
        "auc24_p50_mg_h_l",
        "auc24_p95_mg_h_l",
        "time_to_target_h",
        "limits_broken",
    ])?;
    let opt = |x: Option<f64>| x.map(full).unwrap_or_default();
    for (i, a) in plan.candidates.iter().enumerate() {
        let p = &a.predicted;
        w.row([
            (i + 1).to_string(),
            full(a.regimen.amount_mg),
            full(a.regimen.every_h),
            full(a.regimen.duration_h),
            a.regimen.route.to_string(),
            full(a.daily_mg),
            full(a.pta),
            opt(a.p_over_peak),
            opt(a.p_over_trough),
            full(p.peak_mg_l.p05),
            full(p.peak_mg_l.median),
            full(p.peak_mg_l.p95),
            full(p.trough_mg_l.p05),
            full(p.trough_mg_l.median),
            full(p.trough_mg_l.p95),
            full(p.auc24_mg_h_l.p05),
            full(p.auc24_mg_h_l.median),
            full(p.auc24_mg_h_l.p95),
            opt(a.time_to_target_h),
            a.limits_broken.join("; "),
        ])?;
    }
    w.finish().map(drop)
}

/// Candidates the table shows (CSV and JSON list all).
const SHOWN: usize = 15;

fn table(
    post: &PlanSubject,
    targets: &[Target],
    plan: &Plan,
    advice: Option<&Advice>,
    start: f64,
    width: Option<usize>,
) -> String {
    use cistern::plan::recommend::{Assessment, Band};
    let mut text = String::new();
    let who = post.id.as_deref().unwrap_or("the subject");
    let goals: Vec<String> = targets.iter().map(Target::to_string).collect();
    text +=
        &format!("Plan for {who}: targets {}; new regimen from {} h\n", goals.join(", "), readable(start, 5));
    if post.a_priori {
        text += &format!("{}\n", a_priori_text(post));
    }
    text.push('\n');
    let shown: Vec<&Assessment> = plan.candidates.iter().take(SHOWN).collect();
    // One number of decimals per metric, for its medians and its 90 % ranges alike.
    let metrics: [fn(&Assessment) -> &Band; 3] =
        [|a| &a.predicted.peak_mg_l, |a| &a.predicted.trough_mg_l, |a| &a.predicted.auc24_mg_h_l];
    let decimals =
        metrics.map(|m| column_decimals(shown.iter().flat_map(|a| [m(a).p05, m(a).median, m(a).p95]), 3));
    let rows: Vec<Vec<String>> = shown
        .iter()
        .enumerate()
        .map(|(i, a)| {
            let mut row = vec![(i + 1).to_string(), a.regimen.describe(), fixed(100.0 * a.pta, 1)];
            for (m, d) in metrics.iter().zip(decimals) {
                let b = m(a);
                row.push(fixed(b.median, d));
                row.push(format!("{}–{}", fixed(b.p05, d), fixed(b.p95, d)));
            }
            row.push(if a.limits_broken.is_empty() {
                "ok".into()
            } else {
                format!("{} broken", a.limits_broken.len())
            });
            row
        })
        .collect();
    let columns = [
        Column::number("rank"),
        Column::text("regimen"),
        Column::number("PTA\n(%)"),
        Column::number("peak\n(mg/L)").optional(1),
        Column::number("peak\n90 %").optional(2),
        Column::number("trough\n(mg/L)"),
        Column::number("trough\n90 %").optional(2),
        Column::number("AUC24\n(mg·h/L)"),
        Column::number("AUC24\n90 %").optional(2),
        Column::text("limits"),
    ];
    text += &render_table(&columns, &rows, width);
    text += &format!(
        "Medians over the {}, with their 5th to 95th percentiles (90 %).\n",
        cistern::plan::draws_name(post.a_priori)
    );
    if plan.candidates.len() > SHOWN {
        text +=
            &format!("… and {} more candidates (--format csv lists all)\n", plan.candidates.len() - SHOWN);
    }
    text.push('\n');
    match &plan.recommended {
        Some(r) => {
            let a = &r.assessment;
            text += &format!(
                "Recommended: {} from {} h — PTA {}",
                a.regimen.describe(),
                readable(r.start_h, 5),
                percent(a.pta)
            );
            if let Some(t) = a.time_to_target_h {
                text += &format!(
                    ", targets first met over the interval ending {} h after the start",
                    readable(t, 4)
                );
            }
            text.push('\n');
            if let (Some(ld), t) = (r.loading_dose_mg, r.time_to_target_with_loading_h) {
                text += &format!(
                    "  with a loading dose of {} mg as the first dose{}\n",
                    readable(ld, 4),
                    t.map(|t| format!(" (targets met by {} h)", readable(t, 4))).unwrap_or_default()
                );
            }
        }
        None => text += "Nothing is recommended.\n",
    }
    for n in &plan.notes {
        text += &format!("note: {n}\n");
    }
    for (i, a) in plan.candidates.iter().take(SHOWN).enumerate() {
        for why in &a.limits_broken {
            text += &format!("rank {}: {why}\n", i + 1);
        }
    }
    if let Some(adv) = advice {
        let (exposure, unit) = name_and_unit(&adv.exposure);
        text += &format!(
            "\nNext level: to pin down {exposure} (its 90 % interval is now {} {unit} wide), draw it at\n",
            readable(adv.current_ci90_width, 3)
        );
        let times: Vec<_> = adv.times.iter().take(5).collect();
        let column = |f: &dyn Fn(&cistern::plan::advisor::SampleValue) -> f64, digits| {
            number_column(&times.iter().map(|s| Some(f(s))).collect::<Vec<_>>(), digits)
        };
        let cells = [
            column(&|s| s.time_h, 5),
            column(&|s| s.after_dose_h, 3),
            column(&|s| s.expected_ci90_width, 3),
            column(&|s| s.interval_narrowing_pct, 2),
        ];
        let rows: Vec<Vec<String>> =
            (0..times.len()).map(|i| cells.iter().map(|c| c[i].clone()).collect()).collect();
        let columns = [
            Column::number("time (h)"),
            Column::number("after the\ndose (h)"),
            Column::number(format!("expected 90 %\nwidth ({unit})")),
            Column::number("narrower\nby (%)"),
        ];
        text += &render_table(&columns, &rows, width);
    }
    text
}
