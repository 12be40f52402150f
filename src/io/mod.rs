//! Readers and writers: CSV tables with located errors, dose files, output formats, digests.

pub(crate) mod digest;
pub mod doses;
pub mod labels;
pub mod levels;
pub mod output;
pub mod table;
pub mod tomlfile;
