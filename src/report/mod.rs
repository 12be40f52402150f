//! The regimen report: a document model drawn as PDF pages (with the `pdf` feature), and its
//! plots as SVG.

pub mod content;
pub mod layout;
#[cfg(feature = "pdf")]
pub mod pdf;
pub mod plot;
pub mod population;
pub mod provenance;
pub mod svg;
pub(crate) mod text;
