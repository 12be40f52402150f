//! `cistern check`: validate input files and report every problem found.

use cistern::io::doses::parse_doses;
use cistern::io::table::Table;
use cistern::{Error, InputError};
use clap::Args;

/// Validate input files, reporting every problem in every file (not just the first).
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern check demo-regimens/doses.csv
  cistern check doses.csv other-doses.csv

The kind of each file is told from its columns: a CSV with an amount_<unit> column is a doses
file. Exit code 0 when every file is valid, 2 when any problem is found.")]
pub struct CheckArgs {
    /// Files to check
    #[arg(required = true, value_name = "FILE")]
    files: Vec<String>,
}

/// What one valid file holds, in a line.
fn check_file(path: &str) -> Result<String, Vec<InputError>> {
    let table = Table::read(path)?;
    if table.headers.iter().any(|h| h == "amount" || h.starts_with("amount_")) {
        let file = parse_doses(&table)?;
        let doses: usize = file.subjects.iter().map(|(_, d)| d.len()).sum();
        let mut summary = format!("doses file, {} subject(s), {doses} dose(s)", file.subjects.len());
        if !file.ignored_columns.is_empty() {
            summary += &format!("; ignored columns: {}", file.ignored_columns.join(", "));
        }
        return Ok(summary);
    }
    Err(vec![
        InputError::new(
            path,
            "cannot tell what kind of file this is: a doses file needs an amount_<unit> column",
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
