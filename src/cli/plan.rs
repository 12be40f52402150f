//! `cistern plan`: rank candidate regimens for one subject by probability of target
//! attainment over the posterior, recommend one that respects every limit, and advise when to
//! draw the next level.

use super::args::{OutputArgs, Problems, choice, flag_value};
use super::regimen_grid::GridArgs;
use super::study::{StudyArgs, planning_fit, seed_and_draws};
use cistern::engine::Params;

use cistern::io::output::{CAUTION, Format, full, io_failure, readable, render_table};
use cistern::model::Residual;
use cistern::plan::advisor::Advice;
use cistern::plan::recommend::Plan;
use cistern::plan::session::{Exposure, Outcome, Posterior, Settings, plan_subject};
use cistern::plan::targets::{Limits, Target};
use cistern::units::Kind;
use cistern::{Error, InputError};
use clap::Args;
use serde::{Deserialize, Serialize};

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
    /// Posterior draws to plan over [default: the case's, else 2000]
    #[arg(long, value_parser = clap::value_parser!(u32).range(100..=100_000))]
    draws: Option<u32>,
    /// Seed for the posterior draws and the advisor's simulations [default: the case's, else 1]
    #[arg(long)]
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
    /// Leave out the next-level advice
    #[arg(long)]
    no_advice: bool,
    #[command(flatten)]
    output: OutputArgs,
}

/// The parts of a saved fit that planning reads.
#[derive(Deserialize)]
struct SavedFit {
    subjects: Vec<SavedSubject>,
}

#[derive(Deserialize)]
struct SavedSubject {
    subject: Option<String>,
    parameters: Params,
    #[serde(default)]
    residual: Option<Residual>,
    #[serde(default)]
    draws: Vec<Params>,
}

#[derive(Serialize)]
struct PlanJson<'a> {
    subject: Option<&'a str>,
    start_h: f64,
    targets: &'a [Target],
    limits: &'a Limits,
    #[serde(flatten)]
    plan: &'a Plan,
    next_level: Option<&'a Advice>,
    caution: &'a str,
}

/// The subject's history, point estimate, draws and residual model.
struct Subject {
    id: Option<String>,
    doses: Vec<cistern::dosing::Dose>,
    point: Params,
    draws: Vec<Params>,
    residual: Option<Residual>,
    warnings: Vec<String>,
}

fn pick<'a, T>(
    items: &'a [T],
    id_of: impl Fn(&T) -> Option<&str>,
    wanted: Option<&str>,
    source: &str,
) -> Result<&'a T, Error> {
    match wanted {
        Some(w) => items
            .iter()
            .find(|x| id_of(x) == Some(w))
            .ok_or_else(|| InputError::new(source, format!("no subject '{w}' in the data")).into()),
        None if items.len() == 1 => Ok(&items[0]),
        None => Err(Error::Usage(format!(
            "the data hold {} subjects: choose one with --subject (e.g. --subject {})",
            items.len(),
            items.iter().find_map(&id_of).unwrap_or("ID")
        ))),
    }
}

/// The settings after merging the flags with the case file.
struct Resolved {
    study: StudyArgs,
    subject: Option<String>,
    seed: u64,
    draws: u32,
}

fn posterior(args: &PlanArgs, r: &Resolved, problems: &mut Problems) -> Result<Option<Subject>, Error> {
    if let Some(path) = &args.fit {
        let text = std::fs::read_to_string(path)
            .map_err(|e| InputError::new(path, format!("cannot read the file: {e}")))?;
        let saved: SavedFit = serde_json::from_str(&text).map_err(|e| {
            InputError::new(path, format!("not a fit from `cistern fit --format json`: {e}"))
                .at_line(e.line() as u64)
        })?;
        let s = pick(&saved.subjects, |s| s.subject.as_deref(), r.subject.as_deref(), path)?;
        if s.draws.is_empty() {
            return Err(InputError::new(
                path,
                "the fit has no posterior draws: run `cistern fit` with --keep-draws 2000",
            )
            .into());
        }
        let Some(doses_path) = r.study.doses.as_deref() else {
            return Err(InputError::new(
                "--doses",
                "the dose history is required with --fit, e.g. --doses doses.csv",
            )
            .into());
        };
        let table = cistern::io::table::Table::read(doses_path).map_err(Error::Input)?;
        let file = cistern::io::doses::parse_doses(&table).map_err(Error::Input)?;
        // The history must be the fitted subject's: matched by identifier, or the only one
        // when neither file names subjects.
        let (_, doses) = pick(&file.subjects, |(id, _)| id.as_deref(), s.subject.as_deref(), doses_path)?;
        return Ok(Some(Subject {
            id: s.subject.clone(),
            doses: doses.clone(),
            point: s.parameters,
            draws: s.draws.clone(),
            residual: s.residual,
            warnings: Vec::new(),
        }));
    }
    let Some(study) = r.study.load(problems) else { return Ok(None) };
    let Some(model) = &study.model else {
        problems.push(r.study.missing(
            "--model",
            "inputs.model",
            "planning needs the population model (or a saved fit with --fit)",
        ));
        return Ok(None);
    };
    for n in &study.notes {
        args.output.note(n);
    }
    let subject = pick(
        &study.subjects,
        |s| s.id.as_deref(),
        r.subject.as_deref(),
        r.study.levels.as_deref().unwrap_or("--levels"),
    )?;
    let fit = planning_fit(subject, model, r.seed, r.draws as usize)?;
    Ok(Some(Subject {
        id: subject.id.clone(),
        doses: subject.doses.clone(),
        point: fit.parameters,
        draws: fit.draws,
        residual: fit.residual,
        warnings: fit.warnings,
    }))
}

/// Run the command.
pub fn run(args: PlanArgs) -> Result<(), Error> {
    let mut problems = Problems::new();
    let (study, case) = args.study.with_case()?;
    let (seed, draws) = seed_and_draws(args.seed, args.draws, case.as_ref());
    let resolved = Resolved {
        study,
        subject: args.subject.clone().or_else(|| case.as_ref().and_then(|c| c.subject.clone())),
        seed,
        draws,
    };
    let grid = match args.grid.grid_or_case(case.as_ref()) {
        Ok(g) => Some(g),
        Err(Error::Input(errors)) => {
            errors.into_iter().for_each(|e| problems.push(e));
            None
        }
        Err(e) => return Err(e),
    };
    let start = args
        .start
        .as_ref()
        .or(case.as_ref().and_then(|c| c.start.as_ref()))
        .and_then(|s| problems.take(flag_value("--start", Kind::Time, s)));
    let post = posterior(&args, &resolved, &mut problems)?;
    problems.finish()?;
    let (Some((candidates, targets, limits)), Some(post)) = (grid, post) else {
        return Err(Error::Usage("the arguments could not be read".into()));
    };
    for w in &post.warnings {
        args.output.note(&format!("fit: {w}"));
    }
    let settings = Settings {
        candidates: &candidates,
        targets: &targets,
        limits,
        start_h: start,
        advise_on: args.advise_on,
        advise_intervals: if args.no_advice { 0 } else { args.advise_intervals },
        seed: cistern::fit::mix_seed(resolved.seed, 1),
    };
    let posterior = Posterior { point: post.point, draws: post.draws.clone(), residual: post.residual };
    let Outcome { start_h, plan: result, advice, notes } =
        plan_subject(&post.doses, &posterior, &settings).map_err(|e| Error::Usage(e.message))?;
    for n in &notes {
        args.output.note(n);
    }
    let inputs: Vec<&str> = resolved.study.paths().into_iter().chain(args.fit.as_deref()).collect();
    let format = args.output.format();
    let mut sink = args.output.sink(&inputs)?;
    let out = sink.writer();
    match format {
        Format::Json => {
            let doc = PlanJson {
                subject: post.id.as_deref(),
                start_h,
                targets: &targets,
                limits: &limits,
                plan: &result,
                next_level: advice.as_ref(),
                caution: CAUTION,
            };
            serde_json::to_writer_pretty(&mut *out, &doc).map_err(|e| io_failure(e.into()))?;
            writeln!(out).map_err(io_failure)?;
        }
        Format::Csv => write_csv(out, &result).map_err(io_failure)?,
        Format::Table => {
            write!(out, "{}", table(&post, &targets, &result, advice.as_ref(), start_h))
                .map_err(io_failure)?;
            writeln!(out, "\n{CAUTION}").map_err(io_failure)?;
        }
    }
    args.output.caution_for_csv(format);
    sink.finish()
}

fn write_csv(out: &mut dyn std::io::Write, plan: &Plan) -> std::io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record([
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
        w.write_record([
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
    w.flush()
}

fn band(b: &cistern::plan::recommend::Band, digits: usize) -> String {
    format!("{} ({}–{})", readable(b.median, digits), readable(b.p05, digits), readable(b.p95, digits))
}

fn table(post: &Subject, targets: &[Target], plan: &Plan, advice: Option<&Advice>, start: f64) -> String {
    let mut text = String::new();
    let who = post.id.as_deref().unwrap_or("the subject");
    let goals: Vec<String> = targets.iter().map(Target::to_string).collect();
    text += &format!(
        "Plan for {who}: targets {}; new regimen from {} h\n\n",
        goals.join(", "),
        readable(start, 5)
    );
    let rows: Vec<Vec<String>> = plan
        .candidates
        .iter()
        .take(15)
        .enumerate()
        .map(|(i, a)| {
            vec![
                (i + 1).to_string(),
                a.regimen.describe(),
                format!("{:.1} %", 100.0 * a.pta),
                band(&a.predicted.peak_mg_l, 3),
                band(&a.predicted.trough_mg_l, 3),
                band(&a.predicted.auc24_mg_h_l, 3),
                if a.limits_broken.is_empty() {
                    "ok".into()
                } else {
                    format!("{} broken", a.limits_broken.len())
                },
            ]
        })
        .collect();
    text += &render_table(
        &[
            "rank",
            "regimen",
            "PTA",
            "peak mg/L (90 %)",
            "trough mg/L (90 %)",
            "AUC24 mg·h/L (90 %)",
            "limits",
        ],
        &rows,
    );
    if plan.candidates.len() > 15 {
        text += &format!("… and {} more candidates (--format csv lists all)\n", plan.candidates.len() - 15);
    }
    text.push('\n');
    match &plan.recommended {
        Some(r) => {
            let a = &r.assessment;
            text += &format!(
                "Recommended: {} from {} h — PTA {:.1} %",
                a.regimen.describe(),
                readable(r.start_h, 5),
                100.0 * a.pta
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
    for (i, a) in plan.candidates.iter().take(15).enumerate() {
        for why in &a.limits_broken {
            text += &format!("rank {}: {why}\n", i + 1);
        }
    }
    if let Some(adv) = advice {
        text += &format!(
            "\nNext level: to pin down {} (90 % interval now {} wide), draw it at\n",
            adv.exposure,
            readable(adv.current_ci90_width, 3)
        );
        let rows: Vec<Vec<String>> = adv
            .times
            .iter()
            .take(5)
            .map(|s| {
                vec![
                    readable(s.time_h, 5),
                    readable(s.after_dose_h, 3),
                    readable(s.expected_ci90_width, 3),
                    format!("{:.0} %", s.shrinkage_pct),
                ]
            })
            .collect();
        text += &render_table(&["time_h", "h after dose", "expected 90 % width", "shrinkage"], &rows);
    }
    text
}
