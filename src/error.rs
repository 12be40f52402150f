//! Errors: one located error type for bad input, and the top-level error the binary maps to
//! an exit code (2 for bad input or usage, 1 for any other failure).

use std::fmt;

/// One problem found in one input: a file (or a command-line flag), with the line and column
/// where it was found when those are known, and what was expected there.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputError {
    /// The file path, or the flag (`--dose`) the value came from.
    pub source: String,
    /// 1-based line number in the file, when the problem is on a line.
    pub line: Option<u64>,
    /// Column name (CSV header or TOML key), when the problem is in one column.
    pub column: Option<String>,
    /// What is wrong and what was expected.
    pub message: String,
}

impl InputError {
    /// A problem with a whole input (no line or column).
    pub fn new(source: impl Into<String>, message: impl Into<String>) -> Self {
        InputError { source: source.into(), line: None, column: None, message: message.into() }
    }

    /// Attach the 1-based line number.
    pub fn at_line(mut self, line: u64) -> Self {
        self.line = Some(line);
        self
    }

    /// Attach the column (a CSV header or a TOML key).
    pub fn in_column(mut self, column: impl Into<String>) -> Self {
        self.column = Some(column.into());
        self
    }
}

impl fmt::Display for InputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.source)?;
        // A TOML file's locations are keys; a CSV file's are columns.
        let what = if self.source.ends_with(".toml") { "key" } else { "column" };
        match (&self.line, &self.column) {
            (Some(l), Some(c)) => write!(f, ": line {l}, {what} {c}")?,
            (Some(l), None) => write!(f, ": line {l}")?,
            (None, Some(c)) => write!(f, ": {what} {c}")?,
            (None, None) => {}
        }
        write!(f, ": {}", self.message)
    }
}

/// A value outside its allowed range: which field (by its `<quantity>_<unit>` name, e.g.
/// `cl_l_h`, `duration_h`) and what is wrong, so each caller can name its own flag or column.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Invalid {
    /// The field's name.
    pub field: &'static str,
    /// What is wrong.
    pub message: String,
}

impl Invalid {
    /// A problem with `field`.
    pub fn new(field: &'static str, message: impl Into<String>) -> Self {
        Invalid { field, message: message.into() }
    }
}

impl fmt::Display for Invalid {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for Invalid {}

/// The error any library entry point returns.
#[derive(Debug, Clone, PartialEq)]
pub enum Error {
    /// One or more problems in the inputs (files or flag values); exit code 2.
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
