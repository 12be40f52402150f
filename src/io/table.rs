//! Reading CSV files into rows that remember their line numbers.
//!
//! Accepted: a UTF-8 byte-order mark, LF, CRLF or lone-CR line ends, quoted fields, `#` comment lines,
//! surrounding spaces. Refused, with the line: a file with no header, a duplicate column (in
//! any case), a row with the wrong number of fields, text that is not UTF-8, control
//! characters and byte-order marks within fields.

use crate::error::InputError;
use crate::units::{Kind, parse_name};

/// Column names that identify subjects in other conventions, lower case without punctuation:
/// a file naming its subjects so must call the column `subject`.
const SUBJECT_LIKE: &[&str] = &[
    "id",
    "pid",
    "ptid",
    "patid",
    "patient",
    "patientid",
    "subj",
    "subjid",
    "subjectid",
    "usubjid",
    "participant",
    "participantid",
];

/// What reading a file has to tell the user besides its data.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Notices {
    /// Notes: nothing is wrong (silenced by `--quiet`).
    pub notes: Vec<String>,
    /// Warnings: something may be misread (always shown).
    pub warnings: Vec<String>,
}

impl Notices {
    /// Take in another's notes and warnings.
    pub fn extend(&mut self, other: Notices) {
        self.notes.extend(other.notes);
        self.warnings.extend(other.warnings);
    }
}

/// One data row with the 1-based line it started on: a view into its table's rows.
#[derive(Debug, Clone, Copy)]
pub struct Row<'a> {
    /// 1-based line number in the file.
    pub line: u64,
    /// The fields, trimmed.
    pub fields: Fields<'a>,
}

/// Where a field lies in the text of its table's rows: `start..end`.
type Span = (usize, usize);

/// The trimmed fields of a row: spans of the one text that holds every row's fields.
#[derive(Clone, Copy)]
pub struct Fields<'a> {
    text: &'a str,
    spans: &'a [Span],
}

impl<'a> Fields<'a> {
    /// The `i`-th field. Panics when `i` is out of range, like indexing a slice.
    pub fn get(&self, i: usize) -> &'a str {
        let (start, end) = self.spans[i];
        &self.text[start..end]
    }

    /// The number of fields.
    pub fn len(&self) -> usize {
        self.spans.len()
    }

    /// No fields.
    pub fn is_empty(&self) -> bool {
        self.spans.is_empty()
    }

    /// The fields in order.
    pub fn iter(self) -> impl Iterator<Item = &'a str> {
        (0..self.len()).map(move |i| self.get(i))
    }
}

impl std::ops::Index<usize> for Fields<'_> {
    type Output = str;
    fn index(&self, i: usize) -> &str {
        self.get(i)
    }
}

/// Fields are equal when their texts are, wherever they lie.
impl PartialEq for Fields<'_> {
    fn eq(&self, other: &Self) -> bool {
        self.len() == other.len() && self.iter().eq(other.iter())
    }
}

impl Eq for Fields<'_> {}

impl std::hash::Hash for Fields<'_> {
    fn hash<H: std::hash::Hasher>(&self, state: &mut H) {
        self.len().hash(state);
        self.iter().for_each(|f| f.hash(state));
    }
}

impl std::fmt::Debug for Fields<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list().entries(self.iter()).finish()
    }
}

/// A table's data rows in file order: every field of every row in one text, with its span and
/// each row's line, so that reading a file allocates nothing per row (files can have hundreds
/// of thousands of rows). Every row has as many fields as the header.
#[derive(Debug, Clone)]
pub struct Rows {
    text: String,
    /// The fields' spans in `text`, `width` a row.
    spans: Vec<Span>,
    lines: Vec<u64>,
    /// Fields a row (at least 1: a header names a column).
    width: usize,
}

impl Rows {
    /// The number of rows.
    pub fn len(&self) -> usize {
        self.lines.len()
    }

    /// No rows.
    pub fn is_empty(&self) -> bool {
        self.lines.is_empty()
    }

    /// Row `i` (from 0), if there is one.
    pub fn get(&self, i: usize) -> Option<Row<'_>> {
        let line = *self.lines.get(i)?;
        let spans = &self.spans[i * self.width..(i + 1) * self.width];
        Some(Row { line, fields: Fields { text: &self.text, spans } })
    }

    /// The first row, if there is one.
    pub fn first(&self) -> Option<Row<'_>> {
        self.get(0)
    }

    /// The rows in order.
    pub fn iter(&self) -> RowsIter<'_> {
        RowsIter { rows: self, next: 0 }
    }

    /// Trim the fields of the record whose untrimmed spans in `text` start at `spans[from]`, and
    /// keep it as a row on `line`. A blank line is left out; a row with another number of
    /// fields than the header, or with a character that would hide, is refused with an error.
    fn end_record(
        &mut self,
        from: usize,
        line: u64,
        source: &str,
        headers: &[String],
        errors: &mut Vec<InputError>,
    ) {
        let text = self.text.as_str();
        self.spans[from..].iter_mut().for_each(|span| *span = trimmed(text, *span));
        let fields = &self.spans[from..];
        if fields.len() == 1 && fields[0].0 == fields[0].1 {
            self.spans.truncate(from); // a blank line
            return;
        }
        if fields.len() != headers.len() {
            errors.push(
                InputError::in_file(
                    source,
                    format!("expected {} fields as in the header, found {}", headers.len(), fields.len()),
                )
                .at_line(line),
            );
            self.spans.truncate(from);
            return;
        }
        // Printable ASCII (almost every row) holds nothing hidden.
        if !printable(&text[fields[0].0..fields[fields.len() - 1].1]) {
            for (&(start, end), header) in fields.iter().zip(headers) {
                if let Some(c) = text[start..end].chars().find(|&c| hidden(c)) {
                    errors.push(
                        InputError::in_file(
                            source,
                            format!("the field holds an invisible character (U+{:04X}); remove it", c as u32),
                        )
                        .at_line(line)
                        .in_column(header.clone()),
                    );
                }
            }
        }
        self.lines.push(line);
    }

    /// Read the data of a file that holds no quotes, `text`, starting on `line`: what the CSV
    /// reader makes of such text, each line a record whose fields end at commas, empty lines
    /// and `#` comment lines skipped (line ends are LF or CRLF: lone CRs are LFs by now), but
    /// several times faster. The rows' text must be empty.
    fn read_unquoted(
        &mut self,
        text: &str,
        mut line: u64,
        source: &str,
        headers: &[String],
        errors: &mut Vec<InputError>,
    ) {
        self.text.push_str(text);
        let bytes = text.as_bytes();
        let (mut start, mut field, mut from) = (0, 0, self.spans.len());
        for end in memchr::memchr2_iter(b',', b'\n', bytes).chain([bytes.len()]) {
            if bytes.get(end) == Some(&b',') {
                self.spans.push((field, end));
                field = end + 1;
                continue;
            }
            let content_end = if end > start && bytes[end - 1] == b'\r' { end - 1 } else { end };
            if content_end > start && bytes[start] != b'#' {
                self.spans.push((field, content_end));
                self.end_record(from, line, source, headers, errors);
            } else {
                self.spans.truncate(from); // the commas of a comment
            }
            (start, field, from, line) = (end + 1, end + 1, self.spans.len(), line + 1);
        }
    }
}

/// The rows of a [`Rows`] in order.
#[derive(Debug, Clone)]
pub struct RowsIter<'a> {
    rows: &'a Rows,
    next: usize,
}

impl<'a> Iterator for RowsIter<'a> {
    type Item = Row<'a>;
    fn next(&mut self) -> Option<Row<'a>> {
        let row = self.rows.get(self.next)?;
        self.next += 1;
        Some(row)
    }
}

impl<'a> IntoIterator for &'a Rows {
    type Item = Row<'a>;
    type IntoIter = RowsIter<'a>;
    fn into_iter(self) -> RowsIter<'a> {
        self.iter()
    }
}

/// A field's span without the whitespace around it (Unicode's, as `str::trim`).
fn trimmed(text: &str, (start, end): Span) -> Span {
    let field = &text[start..end];
    // Most fields start and end with a printable ASCII character: nothing to trim.
    let bytes = field.as_bytes();
    if bytes.first().is_some_and(u8::is_ascii_graphic) && bytes.last().is_some_and(u8::is_ascii_graphic) {
        return (start, end);
    }
    let start = start + (field.len() - field.trim_start().len());
    (start, start + field.trim().len())
}

/// Only printable ASCII. Not stopping at the first other byte, so it is checked many bytes at
/// a time.
fn printable(text: &str) -> bool {
    text.bytes().fold(true, |all, b| all & (b' '..=b'~').contains(&b))
}

/// A parsed CSV file.
#[derive(Debug, Clone)]
pub struct Table {
    /// Where the data came from (a path), for messages.
    pub source: String,
    /// Column names, trimmed.
    pub headers: Vec<String>,
    /// 1-based line of the header.
    pub header_line: u64,
    /// Data rows in file order.
    pub rows: Rows,
}

/// A column we know, with its position and unit factor.
#[derive(Debug, Clone)]
pub struct Column {
    /// Index in the row.
    pub index: usize,
    /// The header as written (`amount_g`).
    pub name: String,
    /// Factor to base units (1 for columns without a unit).
    pub factor: f64,
    /// The quantity kind of a `<quantity>_<unit>` column, whose values are checked against
    /// its limits ([`crate::limits`]); `None` for a plain column.
    pub kind: Option<Kind>,
}

/// The bytes of a file, or why they cannot be read ([`crate::io::input::read`]).
fn read_bytes(path: &str) -> Result<Vec<u8>, Vec<InputError>> {
    crate::io::input::read(std::path::Path::new(path)).map_err(|e| vec![e])
}

impl Table {
    /// Parse CSV bytes. Every problem found is returned, not only the first.
    pub fn parse(source: &str, bytes: &[u8]) -> Result<Table, Vec<InputError>> {
        let table = Table::parse_maybe_empty(source, bytes)?;
        if table.rows.is_empty() {
            return Err(vec![
                InputError::in_file(source, "the file has a header but no data rows")
                    .at_line(table.header_line),
            ]);
        }
        Ok(table)
    }

    /// [`Table::parse`], but a header without data rows is a table with no rows.
    pub fn parse_maybe_empty(source: &str, bytes: &[u8]) -> Result<Table, Vec<InputError>> {
        let bytes = bytes.strip_prefix(b"\xef\xbb\xbf").unwrap_or(bytes);
        // Line ends may also be a lone CR (old spreadsheet exports). The reader ends a comment
        // only at LF, so such a file would silently lose every row after a comment: read each
        // lone CR as LF (byte for byte, so positions and line numbers stay right).
        let lone_cr = |i: usize| bytes[i] == b'\r' && bytes.get(i + 1) != Some(&b'\n');
        let unified: Vec<u8>;
        let bytes = if memchr::memchr_iter(b'\r', bytes).any(lone_cr) {
            unified = (0..bytes.len()).map(|i| if lone_cr(i) { b'\n' } else { bytes[i] }).collect();
            &unified[..]
        } else {
            bytes
        };
        // Fields are trimmed here (`Rows::end_record`) rather than by the reader, which would
        // allocate a record a row to do it. The data rows of a file without quotes (as machine-
        // written tables are) are read without the reader (`Rows::read_unquoted`).
        let mut reader =
            csv::ReaderBuilder::new().comment(Some(b'#')).flexible(true).has_headers(true).from_reader(bytes);
        // The reader's positions point where it started looking, before any blank or comment
        // lines it skipped (and its line count skips comments), so the line of a record is
        // found from its byte offset, past those skipped lines.
        // Lines are counted as the reader moves forward, from the last offset asked about (an
        // earlier offset is counted from the start again).
        let counted = std::cell::Cell::new((0usize, 1u64));
        let line_of_offset = |i: usize| {
            let (from, line) = counted.get();
            let (from, line) = if i >= from { (from, line) } else { (0, 1) };
            let line = line + bytes[from..i].iter().filter(|&&b| b == b'\n').count() as u64;
            counted.set((i, line));
            line
        };
        let line_at = |p: &csv::Position| {
            let mut i = p.byte() as usize;
            while i < bytes.len() {
                let at_line_start = i == 0 || bytes[i - 1] == b'\n';
                if bytes[i] == b'\r' || bytes[i] == b'\n' {
                    i += 1;
                } else if at_line_start && bytes[i] == b'#' {
                    i += bytes[i..].iter().position(|&b| b == b'\n').map_or(bytes.len() - i, |n| n + 1);
                } else {
                    break;
                }
            }
            line_of_offset(i)
        };
        let located = |pos: Option<&csv::Position>, msg: String| {
            let e = InputError::in_file(source, msg);
            match pos {
                Some(p) => e.at_line(line_at(p)),
                None => e,
            }
        };
        let (headers, header_line): (Vec<String>, u64) = match reader.headers() {
            Ok(h) => (h.iter().map(|h| h.trim().to_string()).collect(), h.position().map_or(1, line_at)),
            Err(e) => return Err(vec![located(e.position(), csv_message(&e))]),
        };
        if headers.iter().all(String::is_empty) {
            return Err(vec![InputError::in_file(
                source,
                "the file is empty: expected a header line naming the columns",
            )]);
        }
        let mut errors = Vec::new();
        for (i, h) in headers.iter().enumerate() {
            if let Some(c) = h.chars().find(|&c| hidden(c)) {
                errors.push(
                    InputError::in_file(
                        source,
                        format!(
                            "column {} holds an invisible character (U+{:04X}) in its name",
                            i + 1,
                            c as u32
                        ),
                    )
                    .at_line(header_line),
                );
            } else if h.is_empty() {
                errors.push(
                    InputError::in_file(source, format!("column {} has no name", i + 1)).at_line(header_line),
                );
            } else if headers[..i].iter().any(|o| o.eq_ignore_ascii_case(h)) {
                errors.push(
                    InputError::in_file(source, format!("duplicate column '{h}'"))
                        .at_line(header_line)
                        .in_column(h.clone()),
                );
            }
        }
        let mut rows =
            Rows { text: String::new(), spans: Vec::new(), lines: Vec::new(), width: headers.len() };
        let data_start = reader.position().byte() as usize;
        let data = &bytes[data_start..];
        match std::str::from_utf8(data) {
            Ok(text) if memchr::memchr(b'"', data).is_none() => {
                rows.read_unquoted(text, line_of_offset(data_start), source, &headers, &mut errors);
            }
            _ => {
                // One record reused for every row.
                let mut record = csv::StringRecord::new();
                loop {
                    match reader.read_record(&mut record) {
                        Ok(false) => break,
                        Ok(true) => {
                            let from = rows.spans.len();
                            for field in &record {
                                let start = rows.text.len();
                                rows.text.push_str(field);
                                rows.spans.push((start, rows.text.len()));
                            }
                            let line = record.position().map_or(header_line, line_at);
                            rows.end_record(from, line, source, &headers, &mut errors);
                        }
                        Err(e) => errors.push(located(e.position(), csv_message(&e))),
                    }
                }
            }
        }
        if errors.is_empty() {
            Ok(Table { source: source.to_string(), headers, header_line, rows })
        } else {
            Err(errors)
        }
    }

    /// Read and parse a CSV file.
    pub fn read(path: &str) -> Result<Table, Vec<InputError>> {
        Table::parse(path, &read_bytes(path)?)
    }

    /// Read and parse a CSV file that may hold a header and no data rows.
    pub fn read_maybe_empty(path: &str) -> Result<Table, Vec<InputError>> {
        Table::parse_maybe_empty(path, &read_bytes(path)?)
    }

    /// Find a plain column (no unit) by name, in any case (`Route`, `ROUTE`).
    pub fn column(&self, name: &str) -> Option<Column> {
        self.headers.iter().position(|h| h.eq_ignore_ascii_case(name)).map(|index| Column {
            index,
            name: self.headers[index].clone(),
            factor: 1.0,
            kind: None,
        })
    }

    /// The `subject` column, when the file has one. A column named as subject identifiers
    /// often are (`ID`, `patient`, `USUBJID`) but not `subject` is refused rather than
    /// ignored: ignoring it would merge every subject's rows into one subject.
    pub fn subject_column(&self) -> Result<Option<Column>, InputError> {
        if let Some(c) = self.column("subject") {
            return Ok(Some(c));
        }
        let looks_like_id = |h: &str| {
            let squeezed: String =
                h.chars().filter(char::is_ascii_alphanumeric).map(|c| c.to_ascii_lowercase()).collect();
            SUBJECT_LIKE.contains(&squeezed.as_str())
        };
        match self.headers.iter().find(|h| looks_like_id(h)) {
            Some(h) => Err(InputError::in_file(
                &self.source,
                format!(
                    "column '{h}' looks like a subject identifier: name it 'subject' (rows are \
                     matched to subjects by the subject column; any other column is ignored)"
                ),
            )
            .at_line(self.header_line)
            .in_column(h.clone())),
            None => Ok(None),
        }
    }

    /// Find the `<quantity>_<unit>` column for `quantity`, checking its unit.
    ///
    /// Errors: the quantity appears twice with different units, or with an unknown unit.
    pub(crate) fn unit_column(&self, quantity: &str, kind: Kind) -> Result<Option<Column>, InputError> {
        let mut found: Option<Column> = None;
        for (index, h) in self.headers.iter().enumerate() {
            match parse_name(h, &[(quantity, kind)]) {
                Ok(Some(n)) => {
                    if let Some(prev) = &found {
                        return Err(InputError::in_file(
                            &self.source,
                            format!("columns '{}' and '{h}' both give the {quantity}; keep one", prev.name),
                        )
                        .at_line(self.header_line)
                        .in_column(h.clone()));
                    }
                    found = Some(Column { index, name: h.clone(), factor: n.factor, kind: Some(kind) });
                }
                Ok(None) => {}
                Err(m) => {
                    return Err(InputError::in_file(&self.source, m)
                        .at_line(self.header_line)
                        .in_column(h.clone()));
                }
            }
        }
        Ok(found)
    }

    /// The columns no reader claimed: a note naming those that hold one value on every row,
    /// and a warning for each whose rows differ (data that may matter, and is not read).
    pub(crate) fn ignored_columns(&self, used: &[&Column]) -> Notices {
        let mut same = Vec::new();
        let mut notices = Notices::default();
        let Some(first_row) = self.rows.first() else { return notices };
        for (i, h) in self.headers.iter().enumerate().filter(|(i, _)| !used.iter().any(|c| c.index == *i)) {
            let first = first_row.fields.get(i);
            match self.rows.iter().find(|r| r.fields.get(i) != first) {
                Some(other) => notices.warnings.push(format!(
                    "{}: column '{h}' is ignored, though its rows differ ('{first}' on line {}, '{}' on \
                     line {})",
                    self.source,
                    first_row.line,
                    other.fields.get(i),
                    other.line
                )),
                None => same.push(h.as_str()),
            }
        }
        if !same.is_empty() {
            notices.notes.push(format!("{}: ignored columns: {}", self.source, same.join(", ")));
        }
        notices
    }
}

impl Table {
    /// One warning per column of `columns` whose values lie outside the plausible limits of
    /// its quantity ([`crate::limits::implausible`]): read as written, but perhaps in another
    /// unit than meant. The warning names the file and column, the lines (the first few), the
    /// first such value, the unit the column's name gives, and how to name another. Values
    /// that do not parse are the readers' problem, not this one's; `<x` is read as `x`.
    pub(crate) fn unusual_values(&self, columns: &[&Column]) -> Vec<String> {
        let mut warnings = Vec::new();
        for column in columns {
            let Some(kind) = column.kind else { continue };
            let mut lines = Vec::new();
            let mut first = None;
            for row in &self.rows {
                let text = row.text(column).trim_start_matches('<').trim();
                let Ok(x) = text.parse::<f64>() else { continue };
                if let Some(unusual) = crate::limits::implausible(kind, x * column.factor) {
                    lines.push(row.line);
                    first.get_or_insert((x, unusual));
                }
            }
            let Some((x, first)) = first else { continue };
            let meant = crate::limits::plausible_unit(kind, x, column.factor);
            let which = if lines.len() == 1 { "" } else { "the first: " };
            warnings.push(format!(
                "{}: column {}, {}: {which}{first}{}",
                self.source,
                column.name,
                crate::error::lines_phrase(&lines),
                column.unit_hint(meant)
            ));
        }
        warnings
    }
}

impl Column {
    /// Which unit the column's name gives, and how to name the column for `other` (the unit
    /// its values were perhaps meant in).
    pub(crate) fn unit_hint(&self, other: Option<String>) -> String {
        let (quantity, unit) = self.name.split_once('_').unwrap_or((self.name.as_str(), ""));
        let other = other.map_or_else(String::new, |u| {
            format!("; name it {quantity}_{} to mean {u}", u.replace('/', "_"))
        });
        format!(" (read in {}, the unit in the column's name{other})", unit.replace('_', "/"))
    }
}

impl<'a> Row<'a> {
    /// The trimmed text of a column ("" when empty).
    pub fn text(&self, column: &Column) -> &'a str {
        self.fields.get(column.index)
    }

    /// A finite number in the column, converted to base units.
    pub fn number(&self, source: &str, column: &Column) -> Result<f64, InputError> {
        let text = self.text(column);
        let error = |what: &str| {
            InputError::in_file(source, format!("expected a number, found {what}"))
                .at_line(self.line)
                .in_column(column.name.clone())
        };
        if text.is_empty() {
            return Err(error("an empty field"));
        }
        match text.parse::<f64>() {
            Ok(v) if v.is_finite() && !(v * column.factor).is_finite() => {
                Err(error(&format!("'{text}', out of range once converted")))
            }
            Ok(v) if v.is_finite() => match column.kind {
                Some(kind) => crate::limits::check(kind, v * column.factor).map_err(|m| {
                    InputError::in_file(source, m).at_line(self.line).in_column(column.name.clone())
                }),
                None => Ok(v * column.factor),
            },
            _ => Err(error(&format!("'{text}'"))),
        }
    }

    /// An optional number: `None` for an empty field.
    pub(crate) fn optional_number(&self, source: &str, column: &Column) -> Result<Option<f64>, InputError> {
        if self.text(column).is_empty() { Ok(None) } else { self.number(source, column).map(Some) }
    }

    /// A located error about this row.
    pub fn error(&self, source: &str, column: Option<&Column>, message: impl Into<String>) -> InputError {
        let e = InputError::in_file(source, message).at_line(self.line);
        match column {
            Some(c) => e.in_column(c.name.clone()),
            None => e,
        }
    }
}

/// A character that would print nothing visible or act on a terminal (NUL, escape sequences),
/// or a byte-order mark past the start of the file: in a field it would make `S1` and a
/// different-looking `S1` two subjects, or rewrite the screen when printed. Tabs and the line
/// ends of a quoted field over several lines are kept.
fn hidden(c: char) -> bool {
    (c.is_control() && !matches!(c, '\t' | '\n' | '\r')) || c == '\u{feff}'
}

fn csv_message(e: &csv::Error) -> String {
    match e.kind() {
        csv::ErrorKind::Utf8 { .. } => "the text is not valid UTF-8".to_string(),
        csv::ErrorKind::Io(io) => format!("cannot read: {io}"),
        _ => format!("malformed CSV: {e}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use proptest::test_runner::RngSeed;

    #[test]
    fn bom_crlf_quotes_and_comments_are_accepted() {
        let text = "\u{feff}# a comment\r\ntime_h,amount_mg\r\n\"0\", 100\r\n# another\r\n12,100\r\n";
        let t = Table::parse("x.csv", text.as_bytes()).unwrap();
        assert_eq!(t.headers, ["time_h", "amount_mg"]);
        assert_eq!(t.rows.len(), 2);
        let first = t.rows.first().unwrap();
        assert_eq!(first.fields.iter().collect::<Vec<_>>(), ["0", "100"]);
        assert_eq!(first.line, 3);
        assert_eq!(t.rows.get(1).unwrap().line, 5);
    }

    #[test]
    fn rows_without_quotes_keep_their_lines() {
        let text = "time_h,amount_mg\r\n0, 100\r\n# a comment, with a comma\r\n\r\n \t\n12,100\r4,\n";
        let t = Table::parse("x.csv", text.as_bytes()).unwrap();
        let rows: Vec<_> = t.rows.iter().map(|r| (r.line, r.fields.iter().collect::<Vec<_>>())).collect();
        assert_eq!(rows, [(2, vec!["0", "100"]), (6, vec!["12", "100"]), (7, vec!["4", ""])]);
    }

    #[test]
    fn every_problem_is_reported_with_its_line() {
        let text = "a,b,a\n1,2,3\n1,2\n4,5,6,7\n";
        let errors = Table::parse("x.csv", text.as_bytes()).unwrap_err();
        assert_eq!(errors.len(), 3, "{errors:?}");
        assert_eq!(errors[1].line(), Some(3));
        assert_eq!(errors[2].line(), Some(4));
    }

    /// What a parse gives, every row with its line, or every error.
    fn outcome(text: &str) -> String {
        match Table::parse("x.csv", text.as_bytes()) {
            Ok(t) => format!(
                "{:?} {} {:?}",
                t.headers,
                t.header_line,
                t.rows.iter().map(|r| (r.line, r.fields)).collect::<Vec<_>>()
            ),
            Err(errors) => errors.iter().map(|e| format!("{e}\n")).collect(),
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig {
            cases: 4000,
            rng_seed: RngSeed::Fixed(0x5EED_7AB1),
            failure_persistence: None,
            ..ProptestConfig::default()
        })]

        /// Data without quotes reads as the CSV reader reads it: a last line holding a quote in
        /// a comment sends the same data through the reader, and changes nothing else.
        #[test]
        fn rows_without_quotes_read_as_the_csv_reader_reads_them(
            header in prop::sample::select(vec!["a,b\n", "a\r\n", "# c\n\na,b,c\r\n", "\"a\",\"b\"\n", "a,b"]),
            body in prop::collection::vec(
                prop::sample::select(vec![
                    "1", "x", "\u{e9}", ",", " ", "\t", "\n", "\r", "\r\n", "#", "\u{0}", "\u{feff}", "\u{85}",
                    "\u{3000}",
                ]),
                0..40,
            ),
        ) {
            let text = format!("{header}{}", body.concat());
            prop_assert_eq!(outcome(&text), outcome(&format!("{text}\n#\"")));
        }
    }
}
