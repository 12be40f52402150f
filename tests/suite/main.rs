//! The integration tests, as one binary (one link step instead of one per file). Each module
//! was a test file of its own; `common` holds the helpers they share.

mod common;

mod adppk;
mod advisor;
mod bad_input;
mod case_files;
mod cli;
mod diagnostic_plots;
mod diagnostics;
mod engine_properties;
mod engine_vs_ode;
mod every_command;
mod fit_bad_input;
mod fit_calibration;
mod fit_properties;
mod fit_reference;
mod library;
mod limits;
mod messages;
mod misfit;
mod nca;
mod outputs;
mod parser_fuzz;
mod plan;
mod plan_regressions;
mod population;
mod published_engine;
mod published_fit;
mod report;
mod report_render;
mod single_dose;
mod sweep;
mod tables;
mod verify;
mod vpc;
