//! cistern: a dosing planner for drugs with one-compartment, first-order (linear) kinetics.
//!
//! The library does all the work; the `cistern` binary parses arguments and prints.
//! Data flows one way: [`io`] → typed inputs ([`dosing`], [`engine::Params`]) → [`engine`]
//! → typed results → [`io::output`]. See docs/methods.md for every equation and its source.

#![forbid(unsafe_code)]
#![deny(clippy::float_cmp)]
#![warn(missing_docs)]

pub mod case;
pub mod choice;
pub mod covariates;
pub mod dosing;
pub mod engine;
pub mod error;
pub mod fit;
pub mod io;
pub mod model;
pub mod plan;
pub mod report;
pub mod seeds;
pub mod spec;
pub mod stats;
pub mod sweep;
pub mod units;
pub mod verify;
pub mod workflow;

pub use error::{Error, InputError, Origin, Result};
pub use io::output::CAUTION;
pub use seeds::Seeds;
