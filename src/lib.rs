//! modalmap: phase maps from SEM-EDS element maps.
//!
//! The pipeline for one field, each stage a module with a typed hand-off:
//! [`io`] loads a [`stack::MapStack`]; later stages prepare features, cluster pixels into
//! phases, refine the labels, compute per-phase statistics and write the report.
//! [`synth`] makes synthetic fields with ground truth for the demo and the accuracy tests.
//! The command line ([`cli`]) is a thin layer over this library.

pub mod advisor;
pub mod bse;
pub mod characterise;
pub mod chem;
pub mod choice;
pub mod cleanup;
pub mod cli;
pub mod cluster;
pub mod error;
pub mod fields;
pub mod guard;
pub mod inspect;
pub mod io;
pub mod labels;
pub mod library;
pub mod map_options;
pub mod montage;
pub mod phase_count;
pub mod phases;
pub mod physics;
pub mod pipeline;
pub mod prepare;
pub mod profile;
pub mod refine;
pub mod report;
pub mod run;
pub mod settings;
pub mod stack;
pub mod synth;
#[cfg(test)]
mod test_fields;
pub mod unmix;
pub mod xray_yield;

pub use error::{Error, ErrorKind, Result};
