//! The library's one error type, [`Error`], and the located problem it carries, [`InputError`].
//!
//! Every problem with an input says where the value came from — a place in a file (line and
//! column, or a TOML key), a command-line flag, or a named field of a value passed through the
//! library — as data ([`Origin`]), not as text guessed from a file name. Code that checks a
//! value without knowing where it came from reports the value's field
//! ([`InputError::field`]); the caller that does know puts the real origin in
//! ([`InputError::located`]), so no library message names a flag.
//!
//! Exit codes: 2 for bad input or usage, 1 for any other failure, 0 for a closed output pipe.
//!
//! Every entry point returns [`Result`], so `?` carries any of them through a caller's
//! function, and each problem prints with its origin:
//!
//! ```
//! use cistern::{Error, Needs, Spec};
//!
//! fn draws_of(case: &str) -> cistern::Result<usize> {
//!     let spec = cistern::case::read(case)?;
//!     Ok(spec.resolve(Needs::default())?.draws)
//! }
//!
//! assert_eq!(draws_of("demo-regimens/p01.toml")?, 2000);
//! let Err(Error::Input(problems)) = draws_of("demo-regimens/missing.toml") else { panic!() };
//! assert!(problems[0].to_string().starts_with("demo-regimens/missing.toml: "));
//!
//! let mut spec = Spec::new();
//! spec.grid.limits.max_dose.value = Some("2.5 kg".into());
//! let Err(Error::Input(problems)) = spec.resolve(Needs::default()) else { panic!() };
//! assert_eq!(
//!     problems[0].to_string(),
//!     "limits.max_dose: unknown amount unit 'kg' in '2.5 kg'; accepted units: mg, g, mcg, ug"
//! );
//! # Ok::<(), Error>(())
//! ```

use std::fmt;

/// Where a value (or a problem with it) came from.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Origin {
    /// A file, with the line and the place on it when they are known.
    File {
        /// The file's path as the user gave it.
        path: String,
        /// 1-based line number.
        line: Option<u64>,
        /// The column (CSV) or key (TOML) the value sits in.
        place: Option<Place>,
    },
    /// A command-line flag, spelled as the user typed it (`--max-dose`). Only the binary
    /// creates these.
    Flag(String),
    /// A field of a value given through the library, by its `<quantity>_<unit>` name
    /// (`amount_mg`): the origin of a value whose real source the checking code cannot know.
    Field(String),
}

/// A place within a line of a file.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Place {
    /// A CSV column, by its header.
    Column(String),
    /// A TOML key, dotted (`limits.max_dose`).
    Key(String),
}

impl Origin {
    /// A whole file.
    pub fn file(path: impl Into<String>) -> Origin {
        Origin::File { path: path.into(), line: None, place: None }
    }

    /// A key of a TOML file, on a line when known.
    pub fn key(path: impl Into<String>, line: Option<u64>, key: impl Into<String>) -> Origin {
        Origin::File { path: path.into(), line, place: Some(Place::Key(key.into())) }
    }
}

impl Origin {
    /// The same place without its line: for a problem between two values (a contradiction),
    /// which no single line holds.
    pub fn without_line(&self) -> Origin {
        match self {
            Origin::File { path, place, .. } => {
                Origin::File { path: path.clone(), line: None, place: place.clone() }
            }
            other => other.clone(),
        }
    }
}

impl fmt::Display for Origin {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Origin::File { path, line, place } => {
                f.write_str(path)?;
                let place = place.as_ref().map(|p| match p {
                    Place::Column(c) => format!("column {c}"),
                    Place::Key(k) => format!("key {k}"),
                });
                match (line, place) {
                    (Some(l), Some(p)) => write!(f, ": line {l}, {p}"),
                    (Some(l), None) => write!(f, ": line {l}"),
                    (None, Some(p)) => write!(f, ": {p}"),
                    (None, None) => Ok(()),
                }
            }
            Origin::Flag(flag) => f.write_str(flag),
            Origin::Field(field) => f.write_str(field),
        }
    }
}

/// One problem found in one input, where it was found, and what was expected there.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct InputError {
    /// Where the offending value came from.
    pub origin: Origin,
    /// What is wrong and what was expected.
    pub message: String,
    /// The subjects the problem concerns, when it concerns subjects: the same problem of many
    /// subjects is one problem ([`Problems::finish`] merges them), not one line per subject.
    pub subjects: Vec<String>,
}

impl InputError {
    /// A problem at `origin`.
    pub fn at(origin: Origin, message: impl Into<String>) -> Self {
        InputError { origin, message: message.into(), subjects: Vec::new() }
    }

    /// The problem concerns this subject.
    pub fn for_subject(mut self, id: impl Into<String>) -> Self {
        self.subjects.push(id.into());
        self
    }

    /// A problem with a whole file (add the line and column or key with the builders).
    pub fn in_file(path: impl Into<String>, message: impl Into<String>) -> Self {
        InputError::at(Origin::file(path), message)
    }

    /// A problem with a command-line flag's value.
    pub fn flag(flag: impl Into<String>, message: impl Into<String>) -> Self {
        InputError::at(Origin::Flag(flag.into()), message)
    }

    /// A problem with a field of a value whose source the checking code does not know.
    pub fn field(field: impl Into<String>, message: impl Into<String>) -> Self {
        InputError::at(Origin::Field(field.into()), message)
    }

    /// Attach the 1-based line number (of a file).
    pub fn at_line(mut self, n: u64) -> Self {
        if let Origin::File { line, .. } = &mut self.origin {
            *line = Some(n);
        }
        self
    }

    /// Attach the CSV column (of a file).
    pub fn in_column(self, column: impl Into<String>) -> Self {
        self.with_place(Place::Column(column.into()))
    }

    /// Attach the TOML key (of a file).
    pub fn at_key(self, key: impl Into<String>) -> Self {
        self.with_place(Place::Key(key.into()))
    }

    fn with_place(mut self, p: Place) -> Self {
        if let Origin::File { place, .. } = &mut self.origin {
            *place = Some(p);
        }
        self
    }

    /// Put in the real origin of a problem reported against a field.
    pub fn located(mut self, origin: Origin) -> Self {
        if matches!(self.origin, Origin::Field(_)) {
            self.origin = origin;
        }
        self
    }

    /// The field a problem was reported against, when its origin is not known.
    pub fn field_name(&self) -> Option<&str> {
        match &self.origin {
            Origin::Field(f) => Some(f),
            _ => None,
        }
    }

    /// The problem as text for a caller that reports it as its own: the message alone when
    /// the origin is only a field's name (which the message names already).
    pub fn describe(&self) -> String {
        match self.origin {
            Origin::Field(_) if self.subjects.is_empty() => self.message.clone(),
            _ => self.to_string(),
        }
    }

    /// The line of the file, when known.
    pub fn line(&self) -> Option<u64> {
        match &self.origin {
            Origin::File { line, .. } => *line,
            _ => None,
        }
    }

    /// The CSV column or TOML key, when known.
    pub fn place(&self) -> Option<&str> {
        match &self.origin {
            Origin::File { place: Some(Place::Column(p) | Place::Key(p)), .. } => Some(p),
            _ => None,
        }
    }
}

impl fmt::Display for InputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: ", self.origin)?;
        if !self.subjects.is_empty() {
            write!(f, "{}: ", subjects_phrase(&self.subjects))?;
        }
        f.write_str(&self.message)
    }
}

/// How many subjects (or lines) first shown in a list of them.
const SUBJECTS_SHOWN: usize = 3;

/// `subject P01`, or for several `3 subjects (P01, P02, P03)`, the list cut after the first
/// few (`50 subjects (P01, P02, P03, …)`): one line however many subjects share a problem.
pub fn subjects_phrase(ids: &[String]) -> String {
    counted_phrase(("subject", "subjects"), ids)
}

/// `line 7`, or for several `4 lines (7, 9, 12, …)`: where a grouped warning about the values
/// of a column holds, one line however many rows share it.
pub fn lines_phrase(lines: &[u64]) -> String {
    counted_phrase(("line", "lines"), &lines.iter().map(u64::to_string).collect::<Vec<_>>())
}

/// `WHAT x`, or `N WHATs (x, y, z, …)` with the list cut after the first few.
fn counted_phrase((one, many): (&str, &str), items: &[String]) -> String {
    match items {
        [only] => format!("{one} {only}"),
        _ => {
            let shown = items.iter().take(SUBJECTS_SHOWN).map(String::as_str).collect::<Vec<_>>().join(", ");
            let more = if items.len() > SUBJECTS_SHOWN { ", …" } else { "" };
            format!("{} {many} ({shown}{more})", items.len())
        }
    }
}

impl std::error::Error for InputError {}

/// The error every library entry point returns.
#[derive(Debug, Clone, PartialEq)]
pub enum Error {
    /// One or more problems in the inputs (files, flags or values); exit code 2.
    Input(Vec<InputError>),
    /// A request that cannot be carried out as stated (conflicting options and the like); exit code 2.
    Usage(String),
    /// Anything else: an output that could not be written, a computation that failed; exit code 1.
    Failure(String),
    /// The reader of our output went away (a closed pipe); not a failure, exit code 0.
    OutputClosed,
}

impl Error {
    /// The process exit code for this error.
    pub fn exit_code(&self) -> u8 {
        match self {
            Error::Input(_) | Error::Usage(_) => 2,
            Error::Failure(_) => 1,
            Error::OutputClosed => 0,
        }
    }

    /// Put in the real origin of every problem reported against a field, by the field's name
    /// (for callers that know where each field's value came from).
    pub fn located(self, origin_of: impl Fn(&str) -> Option<Origin>) -> Error {
        match self {
            Error::Input(errors) => Error::Input(
                errors
                    .into_iter()
                    .map(|e| match e.field_name().and_then(&origin_of) {
                        Some(origin) => e.located(origin),
                        None => e,
                    })
                    .collect(),
            ),
            other => other,
        }
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Error::Input(errors) => {
                for (i, e) in errors.iter().enumerate() {
                    if i > 0 {
                        writeln!(f)?;
                    }
                    write!(f, "{e}")?;
                }
                Ok(())
            }
            Error::Usage(m) | Error::Failure(m) => write!(f, "{m}"),
            Error::OutputClosed => write!(f, "output closed"),
        }
    }
}

impl std::error::Error for Error {}

impl From<InputError> for Error {
    fn from(e: InputError) -> Self {
        Error::Input(vec![e])
    }
}

impl From<Vec<InputError>> for Error {
    fn from(e: Vec<InputError>) -> Self {
        Error::Input(e)
    }
}

/// Shorthand for library results.
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// Collects the problems of several independent checks, so that all are reported at once.
#[derive(Debug, Default)]
pub struct Problems {
    errors: Vec<InputError>,
    /// The first failure that is not a problem with an input.
    other: Option<Error>,
}

impl Problems {
    /// No problems yet.
    pub fn new() -> Self {
        Problems::default()
    }

    /// Keep the value, or record its problem and return `None`.
    pub fn take<T>(&mut self, r: std::result::Result<T, InputError>) -> Option<T> {
        r.map_err(|e| self.errors.push(e)).ok()
    }

    /// Keep the value, or record every problem of its error and return `None`.
    pub fn take_all<T>(&mut self, r: Result<T>) -> Option<T> {
        match r {
            Ok(v) => Some(v),
            Err(Error::Input(errors)) => {
                self.errors.extend(errors);
                None
            }
            Err(e) => {
                self.other.get_or_insert(e);
                None
            }
        }
    }

    /// Record a problem.
    pub fn push(&mut self, e: InputError) {
        self.errors.push(e);
    }

    /// `Ok` when nothing went wrong, else every problem recorded, each once (problems with
    /// inputs first: they are what the user can fix). The same problem of several subjects
    /// (same file, column or key, same message) is one problem naming them all; when their
    /// lines differ (each subject's rows), the one problem names no line.
    pub fn finish(self) -> Result<()> {
        use std::collections::{HashMap, HashSet};
        let mut errors: Vec<InputError> = Vec::with_capacity(self.errors.len());
        let mut subjects_of: Vec<HashSet<String>> = Vec::new();
        let mut index: HashMap<(Origin, String, bool), usize> = HashMap::new();
        for e in self.errors {
            let per_subject = !e.subjects.is_empty();
            let origin = if per_subject { e.origin.without_line() } else { e.origin.clone() };
            let key = (origin, e.message.clone(), per_subject);
            match index.get(&key) {
                Some(&i) => {
                    if errors[i].origin != e.origin {
                        errors[i].origin = errors[i].origin.without_line();
                    }
                    for s in e.subjects {
                        if subjects_of[i].insert(s.clone()) {
                            errors[i].subjects.push(s);
                        }
                    }
                }
                None => {
                    index.insert(key, errors.len());
                    subjects_of.push(e.subjects.iter().cloned().collect());
                    errors.push(e);
                }
            }
        }
        match (errors.is_empty(), self.other) {
            (true, None) => Ok(()),
            (true, Some(e)) => Err(e),
            (false, _) => Err(Error::Input(errors)),
        }
    }

    /// The value when nothing went wrong, else every problem recorded.
    pub fn finish_with<T>(self, value: Option<T>) -> Result<T> {
        self.finish()?;
        value.ok_or_else(|| Error::Usage("the inputs could not be read".into()))
    }
}
