//! Output: formats, full-precision numbers, plain-text tables, and atomic file writes.

use crate::choice::choice_enum;
use crate::error::Error;
use std::io::Write;
use std::path::{Path, PathBuf};

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
    format!("{x:?}")
}

/// A CSV field, quoted when it holds a comma, a quote or a line end (RFC 4180).
pub fn csv_field(s: &str) -> std::borrow::Cow<'_, str> {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\"")).into()
    } else {
        s.into()
    }
}

/// A prescription number as written: `750`, `1.5`, `0.25` (rounded to 1e-6, no trailing zeros).
pub fn plain(x: f64) -> String {
    format!("{}", (x * 1e6).round() / 1e6)
}

/// A number for reading: `digits` significant digits, no exponent for everyday magnitudes.
pub fn readable(x: f64, digits: usize) -> String {
    if !x.is_finite() {
        return format!("{x}");
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

/// A plain-text table with right-aligned columns.
pub fn render_table(headers: &[&str], rows: &[Vec<String>]) -> String {
    let mut widths: Vec<usize> = headers.iter().map(|h| h.len()).collect();
    for r in rows {
        for (w, cell) in widths.iter_mut().zip(r) {
            *w = (*w).max(cell.chars().count());
        }
    }
    let mut out = String::new();
    let line = |cells: &mut dyn Iterator<Item = &str>, out: &mut String| {
        let parts: Vec<String> = cells.zip(&widths).map(|(c, w)| format!("{c:>w$}")).collect();
        out.push_str(parts.join("  ").trim_end());
        out.push('\n');
    };
    line(&mut headers.iter().copied(), &mut out);
    for r in rows {
        line(&mut r.iter().map(String::as_str), &mut out);
    }
    out
}

/// Where output goes: stdout, or a file written under a temporary name and renamed into place
/// on [`Sink::finish`], so a failed run never leaves a partial or clobbered file.
pub struct Sink {
    writer: Box<dyn Write>,
    temp: Option<(PathBuf, PathBuf)>,
}

impl Sink {
    /// Open the output. `-` or no path means stdout. Refuses to write over any of `inputs`.
    pub fn open(path: Option<&str>, inputs: &[&str]) -> Result<Sink, Error> {
        let Some(path) = path.filter(|p| *p != "-") else {
            return Ok(Sink {
                writer: Box::new(std::io::BufWriter::new(std::io::stdout().lock())),
                temp: None,
            });
        };
        let target = PathBuf::from(path);
        let same = |input: &str| match (std::fs::canonicalize(input), std::fs::canonicalize(&target)) {
            (Ok(a), Ok(b)) => a == b,
            _ => Path::new(input) == target,
        };
        if let Some(input) = inputs.iter().find(|i| same(i)) {
            return Err(Error::Usage(format!(
                "refusing to write the output over the input file '{input}'; choose another -o path"
            )));
        }
        let dir = match target.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        let name = target.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let temp = dir.join(format!(".{name}.{}.tmp", std::process::id()));
        let file = std::fs::File::create(&temp)
            .map_err(|e| Error::Failure(format!("cannot create the output '{path}': {e}")))?;
        Ok(Sink { writer: Box::new(std::io::BufWriter::new(file)), temp: Some((temp, target)) })
    }

    /// The writer to print into.
    pub fn writer(&mut self) -> &mut dyn Write {
        &mut self.writer
    }

    /// Flush and, for a file, move it into place.
    pub fn finish(mut self) -> Result<(), Error> {
        let flushed = self.writer.flush();
        // Close the file before renaming it.
        self.writer = Box::new(std::io::sink());
        match (flushed, self.temp.take()) {
            (Ok(()), None) => Ok(()),
            (Err(e), None) => Err(io_failure(e)),
            (Ok(()), Some((temp, target))) => std::fs::rename(&temp, &target).map_err(|e| {
                let _ = std::fs::remove_file(&temp);
                Error::Failure(format!("cannot write '{}': {e}", target.display()))
            }),
            (Err(e), Some((temp, _))) => {
                let _ = std::fs::remove_file(&temp);
                Err(io_failure(e))
            }
        }
    }
}

impl Drop for Sink {
    fn drop(&mut self) {
        // Not finished: an error happened, so leave nothing behind.
        if let Some((temp, _)) = self.temp.take() {
            let _ = std::fs::remove_file(temp);
        }
    }
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
    fn readable_numbers_have_the_asked_significant_digits() {
        assert_eq!(readable(19.44137, 4), "19.44");
        assert_eq!(readable(0.0123456, 3), "0.0123");
        assert_eq!(readable(1234.56, 3), "1235");
        assert_eq!(readable(2.5e-7, 3), "2.50e-7");
        assert_eq!(readable(99.96, 3), "100");
        assert_eq!(readable(0.099996, 3), "0.100");
    }
}
