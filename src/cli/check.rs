//! `cistern check`: validate input files and report every problem found.

use super::args::Notify;
use super::study::AdppkArgs;
use cistern::covariates::parse_covariates;
use cistern::io::adppk::{AdppkOptions, looks_like_adppk, parse_adppk};
use cistern::io::doses::parse_doses;
use cistern::io::levels::parse_levels;
use cistern::io::table::{Notices, Table};
use cistern::model::PopulationModel;
use cistern::nca::lambda_z::parse_times;
use cistern::spec::Needs;
use cistern::sweep::population::parse_params;
use cistern::sweep::state::SweepState;
use cistern::workflow::plan::SavedFit;
use cistern::workflow::{Required, Study};
use cistern::{Error, InputError, case};
use clap::Args;

/// Validate input files, reporting every problem in every file (not just the first).
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern check demo-regimens/doses.csv
  cistern check demo-regimens/model.toml demo-regimens/levels.csv demo-regimens/covariates.csv
  cistern check demo-regimens/p01.toml

The kind of each file is told from its content. A TOML file with an [inputs] table is a case
file: its settings and every file it names are checked together, as `plan --case` reads them;
other TOML files are population models. A CSV with an amount_<unit> column is a doses file,
one with a conc_<unit> column a levels file, one with EVID and USUBJID columns an ADPPK
dataset (read with --analyte and --map as the commands read it), one with cl_<unit> and
v_<unit> columns a parameters file (the CSV output of `cistern fit`, read by `sweep --params`),
one with a time_<unit> column and none of these the times of `nca --lambda-z-times`, and one with a
subject column and none of these a covariates file. A JSON file is a sweep state (from `sweep
--shard`) or the JSON output of `cistern fit` (read by `plan --fit`). Exit code 0 when every
file is valid, 2 when any problem is found.")]
pub struct CheckArgs {
    /// Files to check
    #[arg(required = true, value_name = "FILE")]
    files: Vec<String>,
    /// The analyte (PARAMCD) to read from an ADPPK file that holds several
    #[arg(long, value_name = "PARAMCD")]
    analyte: Option<String>,
    /// For ADPPK files: read our variable OURS from their column THEIRS (e.g. amount_mg=AMT); repeatable
    #[arg(long, value_name = "OURS=THEIRS")]
    map: Vec<String>,
    #[command(flatten)]
    notify: Notify,
}

fn has_quantity(table: &Table, quantity: &str) -> bool {
    table.headers.iter().any(|h| {
        let h = h.to_ascii_lowercase();
        h == quantity || h.starts_with(&format!("{quantity}_"))
    })
}

/// What one valid file holds, in a line, and what reading it had to say.
fn check_file(path: &str, adppk: &AdppkOptions) -> Result<(String, Notices), Error> {
    let bytes =
        std::fs::read(path).map_err(|e| InputError::in_file(path, format!("cannot read the file: {e}")))?;
    let extension = std::path::Path::new(path).extension().and_then(|e| e.to_str()).unwrap_or("");
    let is = |ext: &str| extension.eq_ignore_ascii_case(ext);
    let json = is("json") || bytes.trim_ascii_start().starts_with(b"{");
    if is("toml") {
        let text = String::from_utf8_lossy(&bytes);
        let is_case = toml::from_str::<toml::Table>(&text).is_ok_and(|t| t.contains_key("inputs"));
        return if is_case { check_case(path) } else { check_model(path) };
    }
    if json {
        return check_json(path, &bytes);
    }
    if !is("csv") {
        return Err(InputError::in_file(
            path,
            "cannot tell what kind of file this is from its name: expected a .csv, .toml or .json file",
        )
        .into());
    }
    let table = Table::parse(path, &bytes)?;
    if looks_like_adppk(&table) {
        let file = parse_adppk(&table, adppk)?;
        return Ok((file.summary(), file.notices));
    }
    if has_quantity(&table, "amount") {
        let file = parse_doses(&table)?;
        let doses: usize = file.subjects.iter().map(|(_, d)| d.len()).sum();
        return Ok((
            format!("doses file, {} subject(s), {doses} dose(s)", file.subjects.len()),
            file.notices,
        ));
    }
    if has_quantity(&table, "conc") {
        let file = parse_levels(&table)?;
        let levels: usize = file.subjects.iter().map(|(_, l)| l.len()).sum();
        let blq: usize = file.subjects.iter().flat_map(|(_, l)| l).filter(|l| l.is_blq()).count();
        let summary = format!(
            "levels file, {} subject(s), {levels} level(s), {blq} below the limit",
            file.subjects.len()
        );
        return Ok((summary, file.notices));
    }
    if has_quantity(&table, "cl") && has_quantity(&table, "v") {
        let (rows, notes) = parse_params(&table, false, 1.0, 0.0)?;
        let summary = format!("parameters file, {} subject(s)", rows.len());
        return Ok((summary, Notices { notes, warnings: Vec::new() }));
    }
    // Times alone (and subjects): the levels chosen for terminal lines, `nca --lambda-z-times`.
    if has_quantity(&table, "time") {
        let chosen = parse_times(&table)?;
        let times: usize = chosen.values().map(Vec::len).sum();
        let summary = format!(
            "terminal-line times file (nca --lambda-z-times), {} subject(s), {times} time(s)",
            chosen.len()
        );
        return Ok((summary, Notices::default()));
    }
    if table.subject_column()?.is_some() {
        let subjects = parse_covariates(&table)?;
        let warnings = cistern::covariates::unusual(subjects.iter().map(|(_, c)| c));
        let notices = Notices { notes: Vec::new(), warnings };
        return Ok((format!("covariates file, {} subject(s)", subjects.len()), notices));
    }
    Err(InputError::in_file(
        path,
        "cannot tell what kind of file this is: expected an amount_<unit> column (doses), a \
         conc_<unit> column (levels), cl_<unit> and v_<unit> columns (parameters), a time_<unit> \
         column alone (terminal-line times) or a subject column (covariates)",
    )
    .at_line(table.header_line)
    .into())
}

fn check_model(path: &str) -> Result<(String, Notices), Error> {
    let model = PopulationModel::read(path)?;
    let drug = model.drug.as_deref().unwrap_or("unnamed drug");
    let notices = Notices { notes: Vec::new(), warnings: model.warnings.clone() };
    Ok((format!("population model of {drug}"), notices))
}

/// A case file: its settings, and the study it names, read as `plan --case` reads them.
fn check_case(path: &str) -> Result<(String, Notices), Error> {
    let spec = case::read(path)?;
    let resolved = spec.resolve(Needs::default())?;
    let study =
        Study::load(&spec.inputs, Required { model: spec.inputs.model.value.is_some(), levels: false })?;
    let subject = study.subject(&spec.subject)?;
    let mut summary = format!(
        "case file, {} subject(s) in its study, subject {}",
        study.subjects.len(),
        subject.id.as_deref().unwrap_or("(unnamed)")
    );
    if let Some(grid) = &resolved.grid {
        summary += &format!(", {} candidate regimen(s)", grid.candidates.len());
    }
    Ok((summary, study.notices))
}

/// A JSON file: a sweep state, or the JSON output of `cistern fit`.
fn check_json(path: &str, bytes: &[u8]) -> Result<(String, Notices), Error> {
    let text =
        std::str::from_utf8(bytes).map_err(|_| InputError::in_file(path, "the text is not valid UTF-8"))?;
    let value: serde_json::Value = serde_json::from_str(text)
        .map_err(|e| InputError::in_file(path, format!("malformed JSON: {e}")).at_line(e.line() as u64))?;
    if value.get("format").is_some() {
        let state = SweepState::parse(text).map_err(|m| InputError::in_file(path, m))?;
        let covered: u64 = state.parts.iter().map(|p| p.subjects_to - p.subjects_from).sum();
        let summary = format!(
            "sweep state, {} of {} shards: {covered} of {} subjects",
            state.parts.len(),
            state.shards,
            state.setup.subjects
        );
        return Ok((summary, Notices::default()));
    }
    if value.get("subjects").is_some() {
        let fit = SavedFit::read(path)?;
        let with_draws = fit.subjects.iter().filter(|s| !s.draws.is_empty()).count();
        let summary = format!(
            "fit results, {} subject(s), {with_draws} with posterior draws (for plan --fit)",
            fit.subjects.len()
        );
        return Ok((summary, Notices::default()));
    }
    Err(InputError::in_file(
        path,
        "cannot tell what kind of JSON file this is: expected a sweep state (sweep --shard) or the \
         output of `cistern fit --format json`",
    )
    .into())
}

/// Run the command.
pub fn run(args: CheckArgs) -> Result<(), Error> {
    let mut all = Vec::new();
    let mut other = None;
    let adppk = AdppkArgs { adppk: None, analyte: args.analyte.clone(), map: args.map.clone() };
    let mut spec = cistern::spec::Spec::new();
    adppk.apply(&mut spec.inputs);
    for path in &args.files {
        match check_file(path, &spec.inputs.adppk_options) {
            Ok((summary, notices)) => {
                println!("ok: {path}: {summary}");
                args.notify.notices(&notices);
            }
            Err(Error::Input(errors)) => all.extend(errors),
            Err(e) => other = other.or(Some(e)),
        }
    }
    match (all.is_empty(), other) {
        (false, _) => Err(Error::Input(all)),
        (true, Some(e)) => Err(e),
        (true, None) => Ok(()),
    }
}
