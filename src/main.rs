//! The `cistern` binary: parse arguments, call the library, print, and map the outcome to an
//! exit code (0 success, 1 failure, 2 bad input or usage).

#![forbid(unsafe_code)]

mod cli;

use std::process::ExitCode;

fn main() -> ExitCode {
    cli::run()
}
