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
    let mut text = Vec::new();
    push_full(&mut text, x);
    String::from_utf8(text).expect("number text is ASCII")
}

/// Append [`full`]'s text of `x` to `text`: a loop over millions of numbers writes them all
/// into one buffer instead of allocating a string per number.
///
/// Every number of a CSV passes here, and every number of a table through [`readable`]: the
/// one place where no NaN or infinity reaches an output. An undefined number is written as
/// nothing in CSV (the empty field is CSV's missing value), as `undefined` in tables and as
/// `null` in JSON (serde_json's rule for non-finite numbers); the inputs' limits
/// ([`crate::limits`]) keep results finite, so this is the last guard, not the rule.
///
/// The text is Rust's `{:?}` (the shortest digits that read back as `x`; positional from 1e-4
/// to below 1e16, else `1.5e-7`, `1e16`), written by the faster zmij. Its text differs from
/// `{:?}`'s in three ways, undone by [`push_unusual`]: `e+16` for `e16`; positional text
/// (`0.000015`) from 1e-5 to 1e-4 where `{:?}` writes `1.5e-5`; and, when the two shortest
/// candidates are equally near `x` (a tie, see [`may_tie`]), the even last digit where `{:?}`
/// rounds half up. The common case, a positional number that cannot tie, costs two comparisons
/// and a few bit operations besides zmij's own work (inlined into the rows' loops).
#[inline]
fn push_full(text: &mut Vec<u8>, x: f64) {
    if (1e-4..1e16).contains(&x.abs()) && !may_tie(x) {
        text.extend_from_slice(zmij::Buffer::new().format_finite(x).as_bytes());
    } else if x.is_finite() {
        push_unusual(text, x);
    }
}

/// [`push_full`] of a finite number outside the common case: zero, below 1e-4 or from 1e16
/// on, or one that may tie (left to `{:?}`).
#[cold]
#[inline(never)]
fn push_unusual(out: &mut Vec<u8>, x: f64) {
    if may_tie(x) {
        let _ = write!(out, "{x:?}");
        return;
    }
    let mut buffer = zmij::Buffer::new();
    let text = buffer.format_finite(x).as_bytes();
    if (1e-5..1e-4).contains(&x.abs()) {
        // "0.0000ddd" → "d.dde-5"
        let (sign, rest) = text.split_at(usize::from(x < 0.0));
        let digits = &rest[b"0.0000".len()..];
        out.extend_from_slice(sign);
        out.push(digits[0]);
        if digits.len() > 1 {
            out.push(b'.');
            out.extend_from_slice(&digits[1..]);
        }
        out.extend_from_slice(b"e-5");
    } else if x.abs() >= 1e16
        && let Some(plus) = text.iter().position(|&b| b == b'+')
    {
        out.extend_from_slice(&text[..plus]);
        out.extend_from_slice(&text[plus + 1..]);
    } else {
        out.extend_from_slice(text);
    }
}

/// Whether the two shortest candidates for `x` can be equally near it: only when the exact
/// decimal expansion of `x` has 16 to 18 significant digits. With more, `x` is never halfway
/// between two candidates; with at most 15 (zero, whole numbers, fractions with few binary
/// digits such as 0.25 or 1 + 2^-17: a fifth of the times of a grid in steps of 0.05 h), the
/// expansion itself is the shortest text, as no other decimal of at most 15 significant digits
/// reads back as the same double. `x` = m·2^e exactly with m odd; its digits are those of the
/// integer m·2^e = |x| (e ≥ 0; trailing zeros counted, which errs towards `{:?}`) or m·5^−e
/// (e < 0), which has more than 18 when e < −25 (5^26 > 10^18): that first test, a few bit
/// operations, settles almost every number below 2^27 whose significand's last bits are not
/// all zero.
#[inline]
fn may_tie(x: f64) -> bool {
    let bits = x.to_bits();
    let biased = ((bits >> 52) & 0x7ff) as i32;
    // The significand's trailing zeros (the implicit bit set: at most 52, so zero and the
    // subnormals, biased 0, give e < −1000).
    let zeros = (bits | 1 << 52).trailing_zeros() as i32;
    let e = biased - 1075 + zeros;
    if e < -25 {
        return false;
    }
    if e < 0 {
        let m = ((bits & ((1 << 52) - 1)) | (1 << 52)) >> zeros;
        let digits = u128::from(m) * u128::from(FIVES[e.unsigned_abs() as usize]);
        (1_000_000_000_000_000..1_000_000_000_000_000_000).contains(&digits)
    } else {
        (1e15..1e18).contains(&x.abs())
    }
}

/// 5^k for k = 0..=25.
const FIVES: [u64; 26] = {
    let mut fives = [1; 26];
    let mut k = 1;
    while k < 26 {
        fives[k] = fives[k - 1] * 5;
        k += 1;
    }
    fives
};

/// The writer of every CSV output, RFC 4180 as the csv crate writes it: fields separated by
/// commas, rows ended by `\n`, a text field quoted only when it holds a comma, a quote or a
/// line end (its quotes doubled), and a row of one empty field written `""` so that it is not
/// an empty line. Numbers, which never need quoting, are written in [`full`] precision straight
/// into one reused buffer (outputs can have millions of rows: a row of numbers costs no
/// allocation and no scan; its methods are inlined into the callers' loops), which goes to
/// the output whenever a row ends past `FLUSH_AT` bytes. Every row has as many fields as the
/// first, else the row is refused; a closed pipe
/// under the writer stays one.
pub struct CsvWriter<W: Write> {
    out: W,
    buffer: Vec<u8>,
    /// Where the current row starts in the buffer, and its fields so far.
    row_start: usize,
    fields: usize,
    /// The fields of the first row.
    width: Option<usize>,
}

/// The bytes a [`CsvWriter`] gathers before it writes them out.
const FLUSH_AT: usize = 64 * 1024;

impl<W: Write> CsvWriter<W> {
    /// Write CSV into `out`.
    pub fn new(out: W) -> CsvWriter<W> {
        CsvWriter { out, buffer: Vec::with_capacity(FLUSH_AT + 1024), row_start: 0, fields: 0, width: None }
    }

    /// A whole row.
    pub fn row<I: IntoIterator<Item = T>, T: AsRef<[u8]>>(&mut self, fields: I) -> std::io::Result<()> {
        for field in fields {
            self.field(field.as_ref());
        }
        self.end_row()
    }

    /// A text field of the current row.
    pub fn text(&mut self, text: &str) -> std::io::Result<()> {
        self.field(text.as_bytes());
        Ok(())
    }

    /// A number field of the current row, in [`full`] precision.
    #[inline]
    pub fn number(&mut self, x: f64) -> std::io::Result<()> {
        self.separate();
        push_full(&mut self.buffer, x);
        Ok(())
    }

    /// An integer field of the current row.
    pub fn integer(&mut self, n: u64) -> std::io::Result<()> {
        self.separate();
        let _ = write!(self.buffer, "{n}");
        Ok(())
    }

    /// End the current row.
    #[inline]
    pub fn end_row(&mut self) -> std::io::Result<()> {
        let width = *self.width.get_or_insert(self.fields);
        if self.fields != width {
            return Err(std::io::Error::other(format!(
                "CSV row with {} fields after a first row of {width}",
                self.fields
            )));
        }
        if self.buffer.len() == self.row_start {
            self.buffer.extend_from_slice(b"\"\"");
        }
        self.buffer.push(b'\n');
        self.fields = 0;
        if self.buffer.len() >= FLUSH_AT {
            self.out.write_all(&self.buffer)?;
            self.buffer.clear();
        }
        self.row_start = self.buffer.len();
        Ok(())
    }

    /// Write out what is buffered and return the output.
    pub fn finish(mut self) -> std::io::Result<W> {
        self.out.write_all(&self.buffer)?;
        self.out.flush()?;
        Ok(self.out)
    }

    /// The comma before every field of a row but its first.
    fn separate(&mut self) {
        if self.fields > 0 {
            self.buffer.push(b',');
        }
        self.fields += 1;
    }

    /// A text field, quoted when it holds a comma, a quote or a line end.
    fn field(&mut self, text: &[u8]) {
        self.separate();
        if text.iter().any(|b| matches!(b, b',' | b'"' | b'\r' | b'\n')) {
            self.buffer.push(b'"');
            for &b in text {
                if b == b'"' {
                    self.buffer.push(b'"');
                }
                self.buffer.push(b);
            }
            self.buffer.push(b'"');
        } else {
            self.buffer.extend_from_slice(text);
        }
    }
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

/// How a table column is aligned: numbers right, as they read best; text left.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Align {
    /// Left-aligned (text).
    Left,
    /// Right-aligned (numbers).
    Right,
}

/// A column of a plain-text table: its header (a human label with its unit, never a raw
/// key; a `\n` in it breaks it over two lines, so a long label takes a narrow column), its
/// alignment, and how readily it is left out on a narrow terminal.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Column {
    /// The header.
    pub header: String,
    /// The alignment of the header and the cells.
    pub align: Align,
    /// 0: always shown. Otherwise the column may be left out when the table is wider than the
    /// terminal, the highest rank first (and, within a rank, the rightmost first).
    pub drop_rank: u8,
    /// A text column whose cells may wrap over several lines when the table is still too
    /// wide once the optional columns are out.
    pub wrap: bool,
}

impl Column {
    /// A left-aligned column that is always shown.
    pub fn text(header: impl Into<String>) -> Column {
        Column { header: header.into(), align: Align::Left, drop_rank: 0, wrap: false }
    }

    /// A right-aligned column that is always shown.
    pub fn number(header: impl Into<String>) -> Column {
        Column { header: header.into(), align: Align::Right, drop_rank: 0, wrap: false }
    }

    /// The same column, left out on a narrow terminal before those of a lower rank.
    pub fn optional(self, rank: u8) -> Column {
        Column { drop_rank: rank, ..self }
    }

    /// The same column, its cells wrapped over several lines on a narrow terminal.
    pub fn wrapped(self) -> Column {
        Column { wrap: true, ..self }
    }
}

/// The decimals that print every value of one table column alike: enough for `digits`
/// significant digits in its largest magnitude and two in its smallest non-zero one, but no
/// more than any value needs to print exactly, and at most [`MAX_DECIMALS`]; so `2`, `10` and
/// `0.5` print as `2.0`, `10.0` and `0.5`, and `500` and `1000` as they are.
pub fn column_decimals(values: impl IntoIterator<Item = f64>, digits: usize) -> usize {
    let magnitude = |x: f64| x.abs().log10().floor() as i32;
    let exact = |x: f64| {
        (0..MAX_DECIMALS).find(|&d| {
            let scale = 10f64.powi(d as i32);
            ((x * scale).round() / scale - x).abs() <= 1e-9 * x.abs().max(1.0)
        })
    };
    let (mut big, mut small, mut needed) = (None::<f64>, None::<f64>, 0);
    for x in values.into_iter().filter(|x| x.is_finite() && *x != 0.0) {
        big = Some(big.map_or(x.abs(), |b| b.max(x.abs())));
        small = Some(small.map_or(x.abs(), |s| s.min(x.abs())));
        needed = needed.max(exact(x).unwrap_or(MAX_DECIMALS));
    }
    let (Some(big), Some(small)) = (big, small) else { return 0 };
    let for_big = digits as i32 - 1 - magnitude(big);
    let for_small = 1 - magnitude(small);
    (for_big.max(for_small).clamp(0, MAX_DECIMALS as i32) as usize).min(needed)
}

/// The most decimals a table column prints (CSV and JSON carry full precision).
pub const MAX_DECIMALS: usize = 4;

/// `x` with `decimals` decimals (`-0.000` prints as `0.000`).
pub fn fixed(x: f64, decimals: usize) -> String {
    let text = format!("{x:.decimals$}");
    if text.starts_with('-') && text[1..].chars().all(|c| c == '0' || c == '.') {
        text[1..].into()
    } else {
        text
    }
}

/// One table column's numbers with the same decimals ([`column_decimals`]); a missing value
/// prints as `—`.
pub fn number_column(values: &[Option<f64>], digits: usize) -> Vec<String> {
    let decimals = column_decimals(values.iter().flatten().copied(), digits);
    values.iter().map(|x| x.map_or_else(|| "—".into(), |x| fixed(x, decimals))).collect()
}

/// The narrowest a wrapped column becomes before a table turns to its long form.
const MIN_WRAPPED: usize = 12;

/// A plain-text table of `columns` and `rows` (cells already formatted), within `width`
/// characters when given (a terminal's; `None` for files and pipes). A table too wide leaves
/// out its optional columns, highest rank first, and says which; then wraps the cells of its
/// wrapped columns; a table still too wide prints in long form, one `header  value` line per
/// cell.
pub fn render_table(columns: &[Column], rows: &[Vec<String>], width: Option<usize>) -> String {
    let chars = |s: &str| s.chars().count();
    let mut widths: Vec<usize> = columns
        .iter()
        .enumerate()
        .map(|(i, c)| {
            let header = c.header.lines().map(chars).max().unwrap_or(0);
            rows.iter().filter_map(|r| r.get(i)).map(|s| chars(s)).fold(header, usize::max)
        })
        .collect();
    let total = |shown: &[usize], widths: &[usize]| {
        shown.iter().map(|&i| widths[i] + 2).sum::<usize>().saturating_sub(2)
    };
    let mut shown: Vec<usize> = (0..columns.len()).collect();
    let limit = width.unwrap_or(usize::MAX);
    while total(&shown, &widths) > limit {
        // The rightmost column of the highest rank goes first.
        let Some(pos) = shown
            .iter()
            .enumerate()
            .filter(|&(_, &i)| columns[i].drop_rank > 0)
            .max_by_key(|&(p, &i)| (columns[i].drop_rank, p))
            .map(|(p, _)| p)
        else {
            break;
        };
        shown.remove(pos);
    }
    // Still too wide: the wrapped columns share what is left, each down to MIN_WRAPPED.
    let wrapped: Vec<usize> = shown.iter().copied().filter(|&i| columns[i].wrap).collect();
    let excess = total(&shown, &widths).saturating_sub(limit);
    if excess > 0 {
        let room: usize = wrapped.iter().map(|&i| widths[i].saturating_sub(MIN_WRAPPED)).sum();
        if room < excess {
            return long_form(columns, rows, limit);
        }
        let mut left = excess;
        // The widest give first, one character at a time.
        while left > 0 {
            let Some(&i) = wrapped.iter().max_by_key(|&&i| widths[i]) else { break };
            widths[i] -= 1;
            left -= 1;
        }
    }
    let cell_lines = |i: usize, cell: &str| -> Vec<String> {
        if columns[i].wrap && chars(cell) > widths[i] {
            wrap(cell, widths[i])
        } else {
            vec![cell.to_string()]
        }
    };
    let mut out = String::new();
    let line = |cells: &[(usize, &str)], out: &mut String| {
        let parts: Vec<String> = cells
            .iter()
            .map(|&(i, c)| {
                let w = widths[i];
                match columns[i].align {
                    Align::Left => format!("{c:<w$}"),
                    Align::Right => format!("{c:>w$}"),
                }
            })
            .collect();
        out.push_str(parts.join("  ").trim_end());
        out.push('\n');
    };
    // Headers of fewer lines stand at the bottom of the header.
    let header_lines = columns.iter().map(|c| c.header.lines().count()).max().unwrap_or(1);
    for n in 0..header_lines {
        let cells: Vec<(usize, &str)> = shown
            .iter()
            .map(|&i| {
                let lines: Vec<&str> = columns[i].header.lines().collect();
                let k = (n + lines.len()).checked_sub(header_lines);
                (i, k.and_then(|k| lines.get(k).copied()).unwrap_or(""))
            })
            .collect();
        line(&cells, &mut out);
    }
    for r in rows {
        let cells: Vec<(usize, Vec<String>)> =
            shown.iter().map(|&i| (i, cell_lines(i, r.get(i).map_or("", String::as_str)))).collect();
        let height = cells.iter().map(|(_, l)| l.len()).max().unwrap_or(1);
        for n in 0..height {
            let parts: Vec<(usize, &str)> =
                cells.iter().map(|(i, l)| (*i, l.get(n).map_or("", String::as_str))).collect();
            line(&parts, &mut out);
        }
    }
    if shown.len() < columns.len() {
        let left_out: Vec<String> = (0..columns.len())
            .filter(|i| !shown.contains(i))
            .map(|i| columns[i].header.replace('\n', " "))
            .collect();
        let note = format!(
            "Left out to fit {limit} columns: {}. A wider terminal (or COLUMNS), --format csv or -o FILE \
             shows them.",
            left_out.join(", ")
        );
        for l in wrap(&note, limit) {
            out.push_str(&l);
            out.push('\n');
        }
    }
    out
}

/// The long form of a table too wide for `width`: each row as `header  value` lines, values
/// wrapped to the width, a blank line between rows.
fn long_form(columns: &[Column], rows: &[Vec<String>], width: usize) -> String {
    let headers: Vec<String> = columns.iter().map(|c| c.header.replace('\n', " ")).collect();
    let key = headers.iter().map(|h| h.chars().count()).max().unwrap_or(0).min(width / 2);
    let value_width = width.saturating_sub(key + 2).max(1);
    let mut out = String::new();
    for (n, r) in rows.iter().enumerate() {
        if n > 0 {
            out.push('\n');
        }
        for (header, cell) in headers.iter().zip(r) {
            for (i, part) in wrap(cell, value_width).into_iter().enumerate() {
                let label = if i == 0 { wrap(header, key).remove(0) } else { String::new() };
                out.push_str(format!("{label:<key$}  {part}").trim_end());
                out.push('\n');
            }
        }
    }
    out
}

/// `text` in lines of at most `width` characters, broken between words (and inside a word
/// longer than a line). Never empty: an empty text is one empty line.
pub fn wrap(text: &str, width: usize) -> Vec<String> {
    let width = width.max(1);
    let mut lines = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        let mut word: Vec<char> = word.chars().collect();
        let used = line.chars().count();
        if used > 0 && used + 1 + word.len() <= width {
            line.push(' ');
            line.extend(&word);
            continue;
        }
        if used > 0 {
            lines.push(std::mem::take(&mut line));
        }
        while word.len() > width {
            lines.push(word.drain(..width).collect());
        }
        line.extend(&word);
    }
    if !line.is_empty() || lines.is_empty() {
        lines.push(line);
    }
    lines
}

/// `text` with every line longer than `width` (when given) wrapped between words, its
/// continuation lines indented by two spaces; shorter lines (a table's) are kept as they are.
/// What a table-format output prints around its tables (notes, the caution) goes through it.
pub fn fit_to_width(text: &str, width: Option<usize>) -> String {
    let Some(width) = width else { return text.to_string() };
    let mut out = String::with_capacity(text.len());
    for line in text.split_inclusive('\n') {
        let (body, end) = line.strip_suffix('\n').map_or((line, ""), |b| (b, "\n"));
        if body.chars().count() <= width {
            out.push_str(line);
            continue;
        }
        let mut parts = wrap(body, width).into_iter();
        out.push_str(&parts.next().unwrap_or_default());
        let rest: Vec<String> = parts.collect();
        for part in wrap(&rest.join(" "), width.saturating_sub(2)) {
            out.push_str("\n  ");
            out.push_str(&part);
        }
        out.push_str(end);
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

    /// The CSV text of a number is `{:?}`'s, digit for digit (docs/formats.md): on boundaries of
    /// the layouts, on ties (values with short exact expansions), and on a million values of
    /// every magnitude (random bit patterns, random digits in each decade, dyadic fractions,
    /// the times of grids).
    #[test]
    fn full_is_the_debug_text_digit_for_digit() {
        let mut values = vec![0.0, -0.0, 5e-324, f64::MAX, f64::MIN_POSITIVE, 1.0 + 2f64.powi(-17)];
        // The ends of the tie rule: m·2^e with e = −25 (m·5^25 has 18 digits), and whole numbers
        // at the ends of 16 to 18 digits.
        values.extend([2f64.powi(-25), 3.0 * 2f64.powi(-25), 1e15, 1e18, 1e17 + 8.0, 1e18 - 128.0]);
        for edge in [1e-5f64, 1e-4, 1e14, 1e15, 1e16, 1.0, 0.1] {
            let (mut up, mut down) = (edge, edge);
            for _ in 0..200 {
                (up, down) = (up.next_up(), down.next_down());
                values.extend([up, down, -up, -down]);
            }
        }
        let mut state = 0x5EED_0014_u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        for i in 0..1_000_000 {
            values.push(match i % 4 {
                0 => f64::from_bits(next()),
                1 => (next() >> 11) as f64 * 2f64.powi(-53) * 10f64.powi((next() % 80) as i32 - 40),
                2 => (next() % (1 << 40)) as f64 / (1u64 << (next() % 40)) as f64,
                _ => (next() % 1_000_000) as f64 * [0.05, 0.03, 0.1, 0.25, 1e-3][(next() % 5) as usize],
            });
        }
        let mut text = Vec::new();
        for x in values.into_iter().filter(|x| x.is_finite()) {
            text.clear();
            push_full(&mut text, x);
            assert_eq!(text, format!("{x:?}").as_bytes(), "bits {:#x}", x.to_bits());
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

    /// As the csv crate writes them: a row of one empty field is `""`, not an empty line, and
    /// an undefined number is an empty field.
    #[test]
    fn a_row_of_one_empty_field_is_not_an_empty_line() {
        let mut w = CsvWriter::new(Vec::new());
        w.row([""]).unwrap();
        w.number(f64::NAN).unwrap();
        w.end_row().unwrap();
        w.text("").unwrap();
        w.end_row().unwrap();
        assert_eq!(w.finish().unwrap(), b"\"\"\n\"\"\n\"\"\n");
        let mut w = CsvWriter::new(Vec::new());
        w.row(["", ""]).unwrap();
        w.number(f64::INFINITY).unwrap();
        w.number(2.5).unwrap();
        w.end_row().unwrap();
        assert_eq!(w.finish().unwrap(), b",\n,2.5\n");
    }

    #[test]
    fn a_csv_row_of_another_width_is_refused() {
        let mut w = CsvWriter::new(Vec::new());
        w.row(["a", "b"]).unwrap();
        w.number(1.0).unwrap();
        assert!(w.end_row().is_err());
    }

    /// Rows past the buffer's size go out as they end, and the text is the same.
    #[test]
    fn long_csv_outputs_are_written_in_whole_rows() {
        struct Chunks(Vec<Vec<u8>>);
        impl Write for Chunks {
            fn write(&mut self, bytes: &[u8]) -> std::io::Result<usize> {
                self.0.push(bytes.to_vec());
                Ok(bytes.len())
            }
            fn flush(&mut self) -> std::io::Result<()> {
                Ok(())
            }
        }
        let mut w = CsvWriter::new(Chunks(Vec::new()));
        let mut expected = String::new();
        for i in 0..20_000 {
            w.integer(i).unwrap();
            w.text("a \"b\"").unwrap();
            w.number(i as f64 / 8.0).unwrap();
            w.end_row().unwrap();
            expected += &format!("{i},\"a \"\"b\"\"\",{:?}\n", i as f64 / 8.0);
        }
        let chunks = w.finish().unwrap().0;
        assert!(chunks.len() > 2 && chunks.iter().all(|c| c.ends_with(b"\n")));
        assert_eq!(chunks.concat(), expected.as_bytes());
    }

    #[test]
    fn a_closed_pipe_under_the_csv_writer_stays_a_closed_pipe() {
        struct Closed;
        impl Write for Closed {
            fn write(&mut self, _: &[u8]) -> std::io::Result<usize> {
                Err(std::io::ErrorKind::BrokenPipe.into())
            }
            fn flush(&mut self) -> std::io::Result<()> {
                Ok(())
            }
        }
        let mut w = CsvWriter::new(Closed);
        w.row(["a"]).unwrap();
        assert_eq!(w.finish().err().map(|e| e.kind()), Some(std::io::ErrorKind::BrokenPipe));
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

    fn cols() -> Vec<Column> {
        vec![Column::text("name"), Column::number("value").optional(1), Column::text("note").optional(2)]
    }

    #[test]
    fn tables_right_align_numbers_and_left_align_text_columns() {
        let rows = vec![
            vec!["a".to_string(), "1.5".into(), "xyz".into()],
            vec!["bcd".into(), "10".into(), "q".into()],
        ];
        let text = render_table(&cols(), &rows, None);
        assert_eq!(text, "name  value  note\na       1.5  xyz\nbcd      10  q\n");
    }

    #[test]
    fn a_table_too_wide_leaves_out_its_highest_ranked_columns_and_says_so() {
        let rows = vec![vec!["a".to_string(), "1.5".into(), "a long note here".into()]];
        let text = render_table(&cols(), &rows, Some(12));
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[..2], ["name  value", "a       1.5"]);
        assert!(text.contains("note"), "{text}");
        assert!(text.lines().all(|l| l.chars().count() <= 12), "{text}");
    }

    #[test]
    fn a_table_too_wide_wraps_the_cells_of_its_wrapped_columns() {
        let columns = [Column::number("n"), Column::text("description").wrapped()];
        let rows = vec![vec!["1".to_string(), "words that do not fit in one line".into()]];
        let text = render_table(&columns, &rows, Some(18));
        assert_eq!(text, "n  description\n1  words that do\n   not fit in one\n   line\n");
    }

    #[test]
    fn a_table_too_wide_without_optional_columns_prints_in_long_form() {
        let columns = [Column::text("name"), Column::text("description")];
        let rows = vec![vec!["a".to_string(), "words that do not fit in one line".into()]];
        let text = render_table(&columns, &rows, Some(24));
        assert!(text.lines().all(|l| l.chars().count() <= 24), "{text}");
        assert!(text.starts_with("name         a\ndescription  words that\n"), "{text}");
    }

    #[test]
    fn long_lines_wrap_to_the_width_and_short_ones_stay() {
        let text = "a  b\none two three four five six\n";
        assert_eq!(fit_to_width(text, Some(12)), "a  b\none two\n  three four\n  five six\n");
        assert_eq!(fit_to_width(text, None), text);
    }

    #[test]
    fn a_column_of_numbers_prints_with_one_number_of_decimals() {
        assert_eq!(number_column(&[Some(2.0), Some(10.0), Some(0.0), None], 3), ["2", "10", "0", "—"]);
        assert_eq!(number_column(&[Some(2.0), Some(10.0), Some(0.5)], 3), ["2.0", "10.0", "0.5"]);
        assert_eq!(number_column(&[Some(500.0), Some(1000.0)], 3), ["500", "1000"]);
        assert_eq!(number_column(&[Some(0.0123), Some(12.5)], 3), ["0.012", "12.500"]);
        assert_eq!(fixed(-0.0001, 2), "0.00");
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
