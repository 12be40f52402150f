//! The integration tests, as one binary (one link step instead of one per file). Each module
//! was a test file of its own; `common` holds the helpers they share.

mod common;

mod advisor;
mod bad_input;
mod case_files;
mod cli;
mod engine_properties;
mod engine_vs_ode;
mod fit_bad_input;
mod fit_calibration;
mod fit_properties;
mod fit_reference;
mod library;
mod limits;
mod outputs;
mod parser_fuzz;
mod plan;
mod published_engine;
mod published_fit;
mod report;
mod report_render;
mod sweep;
mod tables;
mod verify;
