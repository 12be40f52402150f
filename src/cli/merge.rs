//! `cistern merge`: combine the states of one sweep's shards into its summary, into a merged
//! state that merges again, and join the shards' per-subject files, each checked first.

use super::args::OutputArgs;
use cistern::io::input::read_text;
use cistern::io::output::{CAUTION, RunFiles, io_failure};
use cistern::sweep::join::join;
use cistern::sweep::state::{Merger, SweepState};
use cistern::sweep::summary::Summary;
use cistern::{Error, InputError};
use clap::Args;
use std::path::Path;

/// Combine the states written by `cistern sweep --shard I/N` (or by `merge --state-out`) into
/// the summary one unsharded run writes, byte for byte; write the merged state, which merges
/// again, to merge in stages; join the shards' per-subject files, each checked against the
/// state of the shard that wrote it.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # sixteen shards computed on a cluster: the summary and the per-subject file
  cistern merge states/shard-*.json -o summary.csv \\
      --rows rows/part-*.csv --per-subject subjects.csv

  # in stages: the shards finished so far into one state, later the rest onto it
  cistern merge states/shard-{1..8}.json --state-out first-half.json
  cistern merge first-half.json states/shard-{9..16}.json -o summary.csv

The summary goes to -o, or to stdout when neither --state-out nor --per-subject is given; the
summary and the per-subject file need every shard, once. A merged state may hold any of them.
Each part given with --rows is matched to its shard by its first subject, whatever its name,
and refused unless its subjects, row count and SHA-256 are those the shard recorded. See
docs/sweeps.md.")]
pub struct MergeArgs {
    /// State files (JSON) of one sweep's shards, or merged states of some of them, in any order
    #[arg(value_name = "STATE", required = true)]
    states: Vec<String>,
    /// Also write the merged state (JSON) to FILE: `merge` reads it again, with other shards
    #[arg(long, value_name = "FILE")]
    state_out: Option<String>,
    /// The shards' per-subject files (written by `sweep --shard I/N --per-subject`), in any
    /// order, to join into --per-subject
    #[arg(long, value_name = "PART", num_args = 1.., requires = "per_subject")]
    rows: Vec<String>,
    /// Join the --rows parts into FILE, the per-subject file of the unsharded run
    #[arg(long, value_name = "FILE", requires = "rows")]
    per_subject: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// Run the command.
pub fn run(args: MergeArgs) -> Result<(), Error> {
    // The outputs are opened first, so a bad path fails before any state is read; opening
    // them among the run's files refuses one that is an input or another output.
    let summary = args.output.output.is_some() || (args.state_out.is_none() && args.per_subject.is_none());
    let mut files = RunFiles::new(args.states.iter().chain(&args.rows));
    let mut joined = files.open_flag("--per-subject", args.per_subject.as_deref())?;
    let mut state_sink = files.open_flag("--state-out", args.state_out.as_deref())?;
    let mut summary_sink = if summary { Some(args.output.sink(&mut files)?) } else { None };

    let mut merger = Merger::default();
    for path in &args.states {
        let text = read_text(Path::new(path))?;
        let state = SweepState::parse(&text).map_err(|m| InputError::in_file(path, m))?;
        merger.add(path, state).map_err(Error::Usage)?;
    }
    let merged = merger.finish().map_err(Error::Usage)?;
    if summary {
        merged.complete().map_err(|m| {
            Error::Usage(format!("{m}; --state-out without -o writes the merged state of some shards"))
        })?;
    }
    if let Some(sink) = joined.as_mut() {
        join(&merged, &args.rows, sink.writer())?;
    }
    if let Some(sink) = state_sink.as_mut() {
        merged.write(sink.writer()).map_err(io_failure)?;
    }
    match summary_sink.as_mut() {
        Some(sink) => {
            let format = args.output.format();
            Summary::of(&merged)
                .write(sink.writer(), format, args.output.table_width())
                .map_err(io_failure)?;
            args.output.caution_for_csv(format);
        }
        // States and per-subject rows cannot carry the caution themselves.
        None => eprintln!("caution: {CAUTION}"),
    }
    let covered: u64 = merged.parts.iter().map(|p| p.subjects_to - p.subjects_from).sum();
    args.output.note(&format!(
        "merged {} of {} shards ({covered} of {} subjects)",
        merged.parts.len(),
        merged.shards,
        merged.setup.subjects
    ));
    for sink in [joined, state_sink, summary_sink].into_iter().flatten() {
        sink.finish()?;
    }
    Ok(())
}
