//! Output: formats, full-precision numbers, plain-text tables, and the files of a run
//! ([`RunFiles`]: inputs and outputs checked together, outputs written safely).

mod files;

pub use files::{RunFiles, Sink, remove_unfinished};

use crate::choice::choice_enum;
use crate::error::Error;
use serde::Serialize;
use std::io::Write;
use std::path::Path;

/// The caution that travels with every exposure figure.
pub const CAUTION: &str = "Not clinical advice: these are model calculations for research. \
Dosing decisions belong to licensed clinicians following local protocols and the product labelling.";

choice_enum! {
    /// How results are printed.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum Format: "format" {
        /// Aligned columns for reading (the caution is printed below).
        Table = "table",
        /// Pure data for any CSV reader (the caution goes to stderr).
        Csv = "csv",
        /// One JSON document with a `caution` field.
        Json = "json",
    }
}

impl Format {
    /// The format to use when none was asked for: from the output file's extension, else a
    /// table on a terminal and CSV when piped.
    pub fn infer(output: Option<&str>, stdout_is_terminal: bool) -> Format {
        match output.and_then(|o| Path::new(o).extension()).and_then(|e| e.to_str()) {
            Some(e) if e.eq_ignore_ascii_case("json") => Format::Json,
            Some(e) if e.eq_ignore_ascii_case("csv") => Format::Csv,
            Some(e) if e.eq_ignore_ascii_case("txt") => Format::Table,
            _ if output.is_some_and(|o| o != "-") => Format::Csv,
            _ if stdout_is_terminal => Format::Table,
            _ => Format::Csv,
        }
    }
}

/// Shortest text that reads back as the same f64 (`1.0`, `0.1`, `1e-300`).
pub fn full(x: f64) -> String {
    let mut text = String::new();
    push_full(&mut text, x);
    text
}

/// Append [`full`]'s text of `x` to `text`: a loop over millions of numbers can reuse one
/// buffer instead of allocating a string per number.
///
/// Every number of a CSV passes here, and every number of a table through [`readable`]: the
/// one place where no NaN or infinity reaches an output. An undefined number is written as
/// nothing in CSV (the empty field is CSV's missing value), as `undefined` in tables and as
/// `null` in JSON (serde_json's rule for non-finite numbers); the inputs' limits
/// ([`crate::limits`]) keep results finite, so this is the last guard, not the rule.
pub fn push_full(text: &mut String, x: f64) {
    use std::fmt::Write as _;
    if x.is_finite() {
        let _ = write!(text, "{x:?}");
    }
}

/// The writer of every CSV output: [`csv::Writer`], which quotes a field only when it holds a
/// comma, a quote or a line end (RFC 4180), with numbers in [`full`] precision written through
/// one reused buffer, so that a row of numbers costs no allocation (outputs can have millions
/// of rows). Its errors are I/O errors of the kind the output gave, so a closed pipe stays one.
pub struct CsvWriter<W: Write> {
    csv: csv::Writer<W>,
    number: String,
}

impl<W: Write> CsvWriter<W> {
    /// Write CSV into `out`.
    pub fn new(out: W) -> CsvWriter<W> {
        CsvWriter { csv: csv::Writer::from_writer(out), number: String::new() }
    }

    /// A whole row.
    pub fn row<I: IntoIterator<Item = T>, T: AsRef<[u8]>>(&mut self, fields: I) -> std::io::Result<()> {
        self.csv.write_record(fields).map_err(csv_io)
    }

    /// A text field of the current row.
    pub fn text(&mut self, text: &str) -> std::io::Result<()> {
        self.csv.write_field(text).map_err(csv_io)
    }

    /// A number field of the current row, in [`full`] precision.
    pub fn number(&mut self, x: f64) -> std::io::Result<()> {
        self.number.clear();
        push_full(&mut self.number, x);
        self.csv.write_field(&self.number).map_err(csv_io)
    }

    /// An integer field of the current row.
    pub fn integer(&mut self, n: u64) -> std::io::Result<()> {
        use std::fmt::Write as _;
        self.number.clear();
        let _ = write!(self.number, "{n}");
        self.csv.write_field(&self.number).map_err(csv_io)
    }

    /// End the current row.
    pub fn end_row(&mut self) -> std::io::Result<()> {
        self.csv.write_record(None::<&[u8]>).map_err(csv_io)
    }

    /// Write out what is buffered and return the output.
    pub fn finish(self) -> std::io::Result<W> {
        self.csv.into_inner().map_err(|e| e.into_error())
    }
}

/// A CSV writer's error as an I/O error of the same kind.
fn csv_io(e: csv::Error) -> std::io::Error {
    let kind = match e.kind() {
        csv::ErrorKind::Io(io) => io.kind(),
        _ => std::io::ErrorKind::Other,
    };
    std::io::Error::new(kind, e)
}

/// A JSON result with the caution as its last field: the shape of every JSON output.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Cautioned<'a, T> {
    /// The result; its fields come first.
    #[serde(flatten)]
    pub result: &'a T,
    /// [`CAUTION`].
    pub caution: &'static str,
}

/// Write `result` (a struct or a map) as pretty JSON with the caution as its last field, and
/// a line end.
pub fn write_json<T: Serialize>(out: &mut dyn Write, result: &T) -> std::io::Result<()> {
    serde_json::to_writer_pretty(&mut *out, &Cautioned { result, caution: CAUTION })?;
    writeln!(out)
}

/// A prescription number as written: `750`, `1.5`, `0.25` (rounded to 1e-6, no trailing zeros).
pub fn plain(x: f64) -> String {
    format!("{}", (x * 1e6).round() / 1e6)
}

/// A number for reading: `digits` significant digits, no exponent for everyday magnitudes.
pub fn readable(x: f64, digits: usize) -> String {
    if !x.is_finite() {
        return "undefined".into();
    }
    if x == 0.0 {
        return "0".into();
    }
    // The magnitude after rounding to `digits` significant digits (99.96 rounds to 100).
    let rounded: f64 = format!("{:.*e}", digits.saturating_sub(1), x).parse().unwrap_or(x);
    let magnitude = rounded.abs().log10().floor() as i32;
    if !(-4..=9).contains(&magnitude) {
        return format!("{:.*e}", digits.saturating_sub(1), x);
    }
    let decimals = (digits as i32 - 1 - magnitude).max(0) as usize;
    format!("{x:.decimals$}")
}

/// A plain-text table: columns are right-aligned, as numbers read best, except the
/// `text_columns` (0-based), which are left-aligned.
pub fn render_table(headers: &[&str], rows: &[Vec<String>], text_columns: &[usize]) -> String {
    let mut widths: Vec<usize> = headers.iter().map(|h| h.len()).collect();
    for r in rows {
        for (w, cell) in widths.iter_mut().zip(r) {
            *w = (*w).max(cell.chars().count());
        }
    }
    let mut out = String::new();
    let line = |cells: &mut dyn Iterator<Item = &str>, out: &mut String| {
        let parts: Vec<String> = cells
            .zip(&widths)
            .enumerate()
            .map(
                |(i, (c, w))| if text_columns.contains(&i) { format!("{c:<w$}") } else { format!("{c:>w$}") },
            )
            .collect();
        out.push_str(parts.join("  ").trim_end());
        out.push('\n');
    };
    line(&mut headers.iter().copied(), &mut out);
    for r in rows {
        line(&mut r.iter().map(String::as_str), &mut out);
    }
    out
}

/// Turn an I/O error while writing into the project's error; a closed pipe (`| head`) is not
/// a failure.
pub fn io_failure(e: std::io::Error) -> Error {
    if e.kind() == std::io::ErrorKind::BrokenPipe {
        Error::OutputClosed
    } else {
        Error::Failure(format!("cannot write the output: {e}"))
    }
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // these values are exact in binary floating point
mod tests {
    use super::*;

    #[test]
    fn full_precision_round_trips() {
        for x in [0.1, 1.0 / 3.0, 1e-300, 123456789.0123, f64::MIN_POSITIVE] {
            assert_eq!(full(x).parse::<f64>().unwrap(), x);
        }
    }

    #[test]
    fn csv_fields_are_quoted_only_when_they_need_it() {
        let mut w = CsvWriter::new(Vec::new());
        w.row(["plain", "a,b", "say \"hi\"", "two\nlines", ""]).unwrap();
        w.text("P01").unwrap();
        w.integer(12).unwrap();
        w.number(0.1).unwrap();
        w.number(1.0).unwrap();
        w.number(1e-300).unwrap();
        w.end_row().unwrap();
        let text = String::from_utf8(w.finish().unwrap()).unwrap();
        assert_eq!(text, "plain,\"a,b\",\"say \"\"hi\"\"\",\"two\nlines\",\nP01,12,0.1,1.0,1e-300\n");
    }

    #[test]
    fn a_closed_pipe_under_the_csv_writer_stays_a_closed_pipe() {
        let closed = std::io::Error::from(std::io::ErrorKind::BrokenPipe);
        assert_eq!(csv_io(csv::Error::from(closed)).kind(), std::io::ErrorKind::BrokenPipe);
    }

    #[test]
    fn json_results_end_with_the_caution() {
        #[derive(Serialize)]
        struct Answer {
            b: u32,
            a: f64,
        }
        let mut out = Vec::new();
        write_json(&mut out, &Answer { b: 1, a: 0.5 }).unwrap();
        let expected = format!("{{\n  \"b\": 1,\n  \"a\": 0.5,\n  \"caution\": \"{CAUTION}\"\n}}\n");
        assert_eq!(String::from_utf8(out).unwrap(), expected);
    }

    #[test]
    fn tables_right_align_numbers_and_left_align_text_columns() {
        let rows = vec![
            vec!["a".to_string(), "1.5".into(), "xyz".into()],
            vec!["bcd".into(), "10".into(), "q".into()],
        ];
        let text = render_table(&["name", "value", "note"], &rows, &[0, 2]);
        assert_eq!(text, "name  value  note\na       1.5  xyz\nbcd      10  q\n");
    }

    #[test]
    fn readable_numbers_have_the_asked_significant_digits() {
        assert_eq!(readable(19.44137, 4), "19.44");
        assert_eq!(readable(0.0123456, 3), "0.0123");
        assert_eq!(readable(1234.56, 3), "1235");
        assert_eq!(readable(2.5e-7, 3), "2.50e-7");
        assert_eq!(readable(99.96, 3), "100");
        assert_eq!(readable(0.099996, 3), "0.100");
    }
}
