//! Reading TOML files (population models, case files) with located errors.

use crate::error::InputError;
use serde::de::DeserializeOwned;
use std::ops::Range;

/// A TOML document's text, kept to turn byte spans into line numbers.
#[derive(Debug, Clone)]
pub struct TomlText {
    /// Where the text came from (a path), for messages.
    pub source: String,
    text: String,
}

impl TomlText {
    /// Read a file.
    pub fn read(path: &str) -> Result<TomlText, InputError> {
        let text = crate::io::input::read_text(std::path::Path::new(path))?;
        Ok(TomlText { source: path.to_string(), text })
    }

    /// Wrap text already in memory.
    pub fn new(source: &str, text: &str) -> TomlText {
        TomlText { source: source.to_string(), text: text.to_string() }
    }

    /// The 1-based line holding byte `offset`.
    pub(crate) fn line_of(&self, offset: usize) -> u64 {
        let end = offset.min(self.text.len());
        self.text.as_bytes()[..end].iter().filter(|&&b| b == b'\n').count() as u64 + 1
    }

    /// A located error at `span`.
    pub(crate) fn error_at(&self, span: Range<usize>, key: &str, message: impl Into<String>) -> InputError {
        InputError::in_file(&self.source, message).at_line(self.line_of(span.start)).at_key(key)
    }

    /// Deserialize, turning syntax errors, unknown keys and wrong types into a located error.
    pub fn parse<T: DeserializeOwned>(&self) -> Result<T, InputError> {
        toml::from_str(&self.text).map_err(|mut e| {
            let message = e.message().trim().replace('\n', "; ");
            let mut err = InputError::in_file(&self.source, message);
            if let Some(span) = e.span() {
                err = err.at_line(self.line_of(span.start));
            }
            // The key a wrong value or an unknown field sits under: toml shows it (as
            // "in `a.b`") only when the error carries no input text.
            e.set_input(None);
            let key = e
                .to_string()
                .lines()
                .find_map(|l| Some(l.strip_prefix("in `")?.strip_suffix('`')?.to_string()));
            match key {
                Some(key) => err.at_key(key),
                None => err,
            }
        })
    }
}
