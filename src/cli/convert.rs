//! `cistern convert`: an ADPPK dataset written as our own doses, levels and covariates files,
//! so that what was read can be inspected.

use super::args::Notify;
use super::study::AdppkArgs;
use cistern::io::adppk::read_adppk;
use cistern::io::output::{RunFiles, io_failure};
use cistern::spec::Spec;
use cistern::{Error, InputError, Origin};
use clap::Args;
use std::path::Path;

/// Write an ADPPK dataset as our doses, levels and covariates files (base units, full precision).
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern convert --adppk adppk.csv --map amount_mg=AMT --out-dir study/
  cistern convert --adppk adppk.csv --map amount_mg=AMT --analyte THEO --out-dir study/

Writes DIR/doses.csv, DIR/levels.csv and DIR/covariates.csv, each atomically; never over an
input. Nothing is written when the file has a problem (exit code 2).")]
pub struct ConvertArgs {
    #[command(flatten)]
    adppk: AdppkArgs,
    /// The directory to write doses.csv, levels.csv and covariates.csv into (it must exist)
    #[arg(long, value_name = "DIR", required = true)]
    out_dir: String,
    #[command(flatten)]
    notify: Notify,
}

/// Run the command.
pub fn run(args: ConvertArgs) -> Result<(), Error> {
    let mut spec = Spec::new();
    args.adppk.apply(&mut spec.inputs);
    let path = spec.inputs.adppk.required("give the ADPPK file to convert")?.to_string_lossy().into_owned();
    let adppk = read_adppk(&path, &spec.inputs.adppk_options)?;
    args.notify.notices(&adppk.notices);
    let dir = Path::new(&args.out_dir);
    if !dir.is_dir() {
        return Err(InputError::flag("--out-dir", format!("'{}' is not a directory", args.out_dir)).into());
    }
    let mut files = RunFiles::new(spec.files());
    let mut open =
        |name: &str| files.open(Origin::Flag("--out-dir".into()), &dir.join(name).to_string_lossy());
    let (mut doses, mut levels, mut covariates) =
        (open("doses.csv")?, open("levels.csv")?, open("covariates.csv")?);
    adppk.write_ours(doses.writer(), levels.writer(), covariates.writer()).map_err(io_failure)?;
    doses.finish()?;
    levels.finish()?;
    covariates.finish()?;
    args.notify.note(&format!("{}; written to {}", adppk.summary(), args.out_dir));
    Ok(())
}
