//! `cistern merge`: combine the shard states of one sweep into its summary.

use super::args::OutputArgs;
use cistern::io::output::io_failure;
use cistern::sweep::state::{Merger, SweepState};
use cistern::sweep::summary::Summary;
use cistern::{Error, InputError};
use clap::Args;

/// Combine the shard states written by `cistern sweep --shard I/N` into the summary one
/// unsharded run writes, byte for byte. Every shard 1/N..N/N of one sweep is needed, once.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # eight shards computed on a cluster, merged into the summary
  cistern merge shard-*.json -o summary.csv

Per-subject files of the shards concatenate, in shard order with the header once, into the
per-subject file of the unsharded run; see docs/sweeps.md.")]
pub struct MergeArgs {
    /// Shard state files (JSON) of one sweep, in any order
    #[arg(value_name = "SHARD", required = true)]
    shards: Vec<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// Run the command.
pub fn run(args: MergeArgs) -> Result<(), Error> {
    let mut merger = Merger::default();
    for path in &args.shards {
        let text = std::fs::read_to_string(path)
            .map_err(|e| InputError::in_file(path, format!("cannot read the file as UTF-8 text: {e}")))?;
        let state = SweepState::parse(&text).map_err(|m| InputError::in_file(path, m))?;
        merger.add(path, state).map_err(Error::Usage)?;
    }
    let merged = merger.finish().map_err(Error::Usage)?;
    let inputs: Vec<&str> = args.shards.iter().map(String::as_str).collect();
    let format = args.output.format();
    let mut sink = args.output.sink(&inputs)?;
    Summary::of(&merged).write(sink.writer(), format, args.output.table_width()).map_err(io_failure)?;
    args.output.caution_for_csv(format);
    args.output.note(&format!("merged {} shards of {} subjects", args.shards.len(), merged.setup.subjects));
    sink.finish()
}
