//! satstep: breathing-challenge retinal oximetry studies, from a declarative
//! protocol and study file to per-vessel saturation per gas epoch,
//! statistics and report.
//!
//! Layers, each importing only from the layers below it (checked by the
//! `architecture` tests; DEVELOPERS.md draws the map):
//! - [`cli`]: argument parsing; hands each verb to [`commands`].
//! - [`commands`]: one file per verb (`check`, `protocol show`, `run`,
//!   `simulate`, `mixed`, `sensitivity`) and the exit status.
//! - [`stages`]: the stages of `run` in one list (epochs, images, fits,
//!   statistics, report), each one file or folder.
//! - [`runner`]: runs a stage only when something it depends on changed:
//!   keys, the cache, per-item entries, the manifest, progress bars.
//! - [`study`]: the study loaded once, every file it names read and checked.
//! - Engines, which know nothing of stages:
//!   - [`config`]: protocol, study, segment, log and spectra files, validated with positions.
//!   - [`timeline`]: epoch spans per session, capture-to-epoch assignment, reference SpO2.
//!   - [`images`]: capture reading, registration, flat-field and profile sampling.
//!   - [`oximetry`]: the vessel models and the two-band and multiband methods.
//!   - [`fit`]: the Levenberg–Marquardt engine the models use.
//!   - [`stats`]: linear mixed models, the epoch model, agreement.
//!   - [`physiology`]: gas laws and the dissociation curve.
//!   - [`simulate`]: synthetic studies with known truth.
//!   - [`tables`]: Parquet and CSV output.
//!   - [`console`]: the printer every layer reports through.

pub mod cli;
pub mod commands;
pub mod config;
pub mod console;
pub mod fit;
pub mod images;
pub mod oximetry;
pub mod physiology;
pub mod runner;
pub mod simulate;
pub mod stages;
pub mod stats;
pub mod study;
pub mod tables;
pub mod timeline;
