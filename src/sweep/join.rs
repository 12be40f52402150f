//! Joining the shards' per-subject files into the per-subject file of the unsharded run.
//!
//! A part is a plain CSV file and says nothing of where it came from, so each is checked
//! against the state of the shard that wrote it before its rows count: the shard is found
//! from the part's first subject (so file names and their order do not matter), and the part
//! must then hold exactly that shard's subjects, as many rows as it wrote, and bytes of the
//! SHA-256 it recorded. A stale part, a part of another sweep or a damaged one is refused.

use super::PER_SUBJECT_HEADER;
use super::state::{Part, RowsWritten, SweepState};
use crate::error::{Error, InputError};
use crate::io::digest::Digesting;
use crate::io::output::io_failure;
use std::collections::BTreeMap;
use std::fs::File;
use std::io::{BufRead, BufReader, Read, Write};

/// Write the rows of every part of `state` (which must be complete) to `out`, in subject
/// order with the header once, from the part files `files` (in any order), each checked
/// against its shard.
pub fn join(state: &SweepState, files: &[String], out: &mut dyn Write) -> Result<(), Error> {
    state.complete().map_err(Error::Usage)?;
    let n = state.shards;
    let mut written = Vec::with_capacity(state.parts.len());
    for part in &state.parts {
        let Some(rows) = &part.rows else {
            return Err(Error::Usage(format!(
                "{} was swept without --per-subject, so it has no rows to join",
                part.described(n)
            )));
        };
        written.push((part, rows));
    }
    let mut owner: BTreeMap<u64, &str> = BTreeMap::new();
    for file in files {
        let first = first_subject(file)?;
        // Empty shards (more shards than subjects) all write the header alone.
        let part = state.parts.iter().find(|p| match first {
            Some(s) => p.subjects_from + 1 == s && p.subjects_to > p.subjects_from,
            None => p.subjects_to == p.subjects_from && !owner.contains_key(&p.shard),
        });
        let Some(part) = part else {
            let what = first.map_or("only a header".to_string(), |s| format!("rows from subject {s} on"));
            return Err(InputError::in_file(
                file,
                format!("it holds {what}, but no shard of this sweep (of {n}) starts there: rows of another sweep or of another split?"),
            )
            .into());
        };
        if let Some(other) = owner.insert(part.shard, file) {
            return Err(Error::Usage(format!(
                "{other} and {file} both hold the rows of {}; give each part once",
                part.described(n)
            )));
        }
    }
    let unclaimed: Vec<String> =
        state.parts.iter().filter(|p| !owner.contains_key(&p.shard)).map(|p| p.described(n)).collect();
    if !unclaimed.is_empty() {
        return Err(Error::Usage(format!("no per-subject rows given for {}", unclaimed.join(", "))));
    }
    for (k, (part, rows)) in written.into_iter().enumerate() {
        copy_checked(owner[&part.shard], part, rows, n, k == 0, out)?;
    }
    Ok(())
}

/// The subject of a part's first row (`None` for a part with the header alone), after
/// checking the header.
fn first_subject(file: &str) -> Result<Option<u64>, Error> {
    let unreadable = |e: std::io::Error| InputError::in_file(file, format!("cannot read the file: {e}"));
    let mut reader = BufReader::new(File::open(file).map_err(unreadable)?);
    let mut header = String::new();
    // At most the header's length: a file without line breaks is not read whole.
    (&mut reader).take(PER_SUBJECT_HEADER.len() as u64 + 1).read_line(&mut header).map_err(unreadable)?;
    if header.strip_suffix('\n') != Some(PER_SUBJECT_HEADER) {
        return Err(InputError::in_file(
            file,
            format!("line 1: expected the per-subject header '{PER_SUBJECT_HEADER}' of cistern sweep"),
        )
        .into());
    }
    let mut csv = csv::ReaderBuilder::new().has_headers(false).from_reader(reader);
    let mut record = csv::ByteRecord::new();
    match csv.read_byte_record(&mut record) {
        Ok(false) => Ok(None),
        Ok(true) => subject_of(&record).map(Some).ok_or_else(|| {
            InputError::in_file(file, "line 2, column subject: expected a subject number").into()
        }),
        Err(e) => Err(InputError::in_file(file, format!("line 2: not CSV: {e}")).into()),
    }
}

fn subject_of(record: &csv::ByteRecord) -> Option<u64> {
    std::str::from_utf8(record.get(0)?).ok()?.parse().ok()
}

/// Copy a part to `out` (the header only when `with_header`), reading it once: its rows are
/// counted, its subjects followed and its bytes digested on the way, and it is refused unless
/// all three are what its shard recorded. The caller's output is temporary until every part
/// has passed, so a refused part leaves nothing behind.
fn copy_checked(
    file: &str,
    part: &Part,
    written: &RowsWritten,
    n: u64,
    with_header: bool,
    out: &mut dyn Write,
) -> Result<(), Error> {
    let unreadable = |e: std::io::Error| InputError::in_file(file, format!("cannot read the file: {e}"));
    let opened = File::open(file).map_err(unreadable)?;
    let skip = if with_header { 0 } else { PER_SUBJECT_HEADER.len() + 1 };
    let tee = Tee { inner: BufReader::with_capacity(1 << 20, opened), out, skip, failed: None };
    let mut digesting = Digesting::new(tee);
    let (mut rows, mut last) = (0u64, None);
    let mut csv = csv::ReaderBuilder::new().has_headers(true).from_reader(&mut digesting);
    let mut record = csv::ByteRecord::new();
    loop {
        match csv.read_byte_record(&mut record) {
            Ok(true) => {
                rows += 1;
                last = subject_of(&record);
            }
            Ok(false) => break,
            Err(e) => {
                drop(csv);
                // A failed write reaches the CSV reader as an error of its input.
                return Err(match digesting.inner_mut().failed.take() {
                    Some(write_error) => io_failure(write_error),
                    None => InputError::in_file(file, format!("cannot read the file as CSV: {e}")).into(),
                });
            }
        }
    }
    drop(csv);
    let expected_last = (part.subjects_to > part.subjects_from).then_some(part.subjects_to);
    let refuse = |m: String| -> Error { InputError::in_file(file, m).into() };
    if last != expected_last {
        let held = last.map_or("no subjects".into(), |l| format!("subjects up to {l}"));
        return Err(refuse(format!(
            "it holds {held}, but {} ends at subject {}: a stale part?",
            part.described(n),
            part.subjects_to
        )));
    }
    if rows != written.rows {
        return Err(refuse(format!(
            "it has {rows} rows, but {} wrote {}: a stale or damaged part?",
            part.described(n),
            written.rows
        )));
    }
    let sha256 = digesting.finish();
    if sha256 != written.sha256 {
        return Err(refuse(format!(
            "its SHA-256 is {sha256}, but {} wrote rows of SHA-256 {}: a part of another sweep, or \
             a stale or edited one",
            part.described(n),
            written.sha256
        )));
    }
    Ok(())
}

/// A reader that copies what it reads to `out`, but for its first `skip` bytes; a failed
/// write is kept in `failed`, to be told from a failed read.
struct Tee<'a, R> {
    inner: R,
    out: &'a mut dyn Write,
    skip: usize,
    failed: Option<std::io::Error>,
}

impl<R: Read> Read for Tee<'_, R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        let skipped = self.skip.min(n);
        self.skip -= skipped;
        if let Err(e) = self.out.write_all(&buf[skipped..n]) {
            let message = e.to_string();
            self.failed = Some(e);
            return Err(std::io::Error::other(message));
        }
        Ok(n)
    }
}
