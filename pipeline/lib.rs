//! satstep: breathing-challenge retinal oximetry studies, from a declarative
//! protocol and study file to per-vessel saturation per gas epoch,
//! statistics and report.
//!
//! Module map (see DEVELOPERS.md for more):
//! - [`config`]: protocol, study and segment files, validated with positions.
//! - [`timeline`]: epoch spans per session, capture-to-epoch assignment, reference SpO2.
//! - [`physiology`]: gas laws and the dissociation curve.
//! - [`tables`]: Parquet and CSV output.
//! - [`run`]: the verbs behind the command line.
//! - [`cli`]: argument parsing and the printer.

pub mod cli;
pub mod config;
pub mod fit;
pub mod images;
pub mod oximetry;
pub mod physiology;
pub mod report;
pub mod run;
pub mod simulate;
pub mod stages;
pub mod stats;
pub mod tables;
pub mod timeline;
