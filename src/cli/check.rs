//! `cistern check`: validate input files and report every problem found.

use cistern::covariates::parse_covariates;
use cistern::io::doses::parse_doses;
use cistern::io::levels::parse_levels;
use cistern::io::table::Table;
use cistern::model::PopulationModel;
use cistern::{Error, InputError};
use clap::Args;

/// Validate input files, reporting every problem in every file (not just the first).
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern check demo-regimens/doses.csv
  cistern check demo-regimens/model.toml demo-regimens/levels.csv demo-regimens/covariates.csv

The kind of each file is told from its name and columns: a .toml file is a population model;
a CSV with an amount_<unit> column is a doses file, one with a conc_<unit> column a levels
file, and one with a subject column and neither a covariates file. Exit code 0 when every
file is valid, 2 when any problem is found.")]
pub struct CheckArgs {
    /// Files to check
    #[arg(required = true, value_name = "FILE")]
    files: Vec<String>,
}

fn has_quantity(table: &Table, quantity: &str) -> bool {
    table.headers.iter().any(|h| h == quantity || h.starts_with(&format!("{quantity}_")))
}

/// What one valid file holds, in a line.
fn check_file(path: &str) -> Result<String, Vec<InputError>> {
    let extension = std::path::Path::new(path).extension().and_then(|e| e.to_str()).unwrap_or("");
    if !extension.eq_ignore_ascii_case("csv") && !extension.eq_ignore_ascii_case("toml") {
        return Err(vec![InputError::in_file(
            path,
            "cannot tell what kind of file this is from its name: expected a .csv or .toml file",
        )]);
    }
    if extension.eq_ignore_ascii_case("toml") {
        let model = PopulationModel::read(path)?;
        let drug = model.drug.as_deref().unwrap_or("unnamed drug");
        return Ok(format!("population model of {drug}"));
    }
    let table = Table::read(path)?;
    if has_quantity(&table, "amount") {
        let file = parse_doses(&table)?;
        let doses: usize = file.subjects.iter().map(|(_, d)| d.len()).sum();
        let mut summary = format!("doses file, {} subject(s), {doses} dose(s)", file.subjects.len());
        if !file.ignored_columns.is_empty() {
            summary += &format!("; ignored columns: {}", file.ignored_columns.join(", "));
        }
        return Ok(summary);
    }
    if has_quantity(&table, "conc") {
        let file = parse_levels(&table)?;
        let levels: usize = file.subjects.iter().map(|(_, l)| l.len()).sum();
        let blq: usize = file.subjects.iter().flat_map(|(_, l)| l).filter(|l| l.is_blq()).count();
        return Ok(format!(
            "levels file, {} subject(s), {levels} level(s), {blq} below the limit",
            file.subjects.len()
        ));
    }
    if table.column("subject").is_some() {
        let subjects = parse_covariates(&table)?;
        return Ok(format!("covariates file, {} subject(s)", subjects.len()));
    }
    Err(vec![
        InputError::in_file(
            path,
            "cannot tell what kind of file this is: expected an amount_<unit> column (doses), \
             a conc_<unit> column (levels) or a subject column (covariates)",
        )
        .at_line(table.header_line),
    ])
}

/// Run the command.
pub fn run(args: CheckArgs) -> Result<(), Error> {
    let mut all = Vec::new();
    for path in &args.files {
        match check_file(path) {
            Ok(summary) => println!("ok: {path}: {summary}"),
            Err(errors) => all.extend(errors),
        }
    }
    if all.is_empty() { Ok(()) } else { Err(Error::Input(all)) }
}
