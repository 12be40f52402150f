//! `cistern merge`: combine the states of one sweep's shards into its summary, into a merged
//! state that merges again, and join the shards' per-subject files, each checked first.

use super::args::OutputArgs;
use cistern::io::output::{CAUTION, Sink, io_failure};
use cistern::sweep::join::join;
use cistern::sweep::state::{Merger, SweepState};
use cistern::sweep::summary::Summary;
use cistern::{Error, InputError};
use clap::Args;

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
    let mut merger = Merger::default();
    for path in &args.states {
        let text = std::fs::read_to_string(path)
            .map_err(|e| InputError::in_file(path, format!("cannot read the file as UTF-8 text: {e}")))?;
        let state = SweepState::parse(&text).map_err(|m| InputError::in_file(path, m))?;
        merger.add(path, state).map_err(Error::Usage)?;
    }
    let merged = merger.finish().map_err(Error::Usage)?;
    let summary = args.output.output.is_some() || (args.state_out.is_none() && args.per_subject.is_none());
    if summary {
        merged.complete().map_err(|m| {
            Error::Usage(format!("{m}; --state-out without -o writes the merged state of some shards"))
        })?;
    }
    let outputs = [
        ("-o", summary.then(|| args.output.output.as_deref().unwrap_or("-"))),
        ("--state-out", args.state_out.as_deref()),
        ("--per-subject", args.per_subject.as_deref()),
    ];
    for (i, (flag, path)) in outputs.iter().enumerate() {
        if let Some((other, _)) = outputs[..i].iter().find(|(_, p)| p.is_some() && p == path) {
            return Err(InputError::flag(
                *flag,
                format!(
                    "'{}' is also where {other} goes; give each output its own file",
                    path.unwrap_or("-")
                ),
            )
            .into());
        }
    }

    let inputs: Vec<&str> = args.states.iter().chain(&args.rows).map(String::as_str).collect();
    let mut joined = match &args.per_subject {
        Some(path) => {
            let mut sink = Sink::open(Some(path), &inputs)?;
            join(&merged, &args.rows, sink.writer())?;
            Some(sink)
        }
        None => None,
    };
    let mut state_sink = match &args.state_out {
        Some(path) => {
            let mut sink = Sink::open(Some(path), &inputs)?;
            merged.write(sink.writer()).map_err(io_failure)?;
            Some(sink)
        }
        None => None,
    };
    let mut summary_sink = match summary {
        true => {
            let format = args.output.format();
            let mut sink = args.output.sink(&inputs)?;
            Summary::of(&merged).write(sink.writer(), format).map_err(io_failure)?;
            args.output.caution_for_csv(format);
            Some(sink)
        }
        false => None,
    };
    if summary_sink.is_none() {
        // States and per-subject rows cannot carry the caution themselves.
        eprintln!("caution: {CAUTION}");
    }
    let covered: u64 = merged.parts.iter().map(|p| p.subjects_to - p.subjects_from).sum();
    args.output.note(&format!(
        "merged {} of {} shards ({covered} of {} subjects)",
        merged.parts.len(),
        merged.shards,
        merged.setup.subjects
    ));
    for sink in [joined.take(), state_sink.take(), summary_sink.take()].into_iter().flatten() {
        sink.finish()?;
    }
    Ok(())
}
