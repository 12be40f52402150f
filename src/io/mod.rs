//! Readers and writers: input files read under one size cap, CSV tables with located errors,
//! dose files, output formats and safe output files, digests.

pub mod adppk;
pub(crate) mod digest;
pub mod doses;
pub mod input;
pub mod labels;
pub mod levels;
pub mod output;
pub mod table;
pub mod tomlfile;
