//! Whole runs through the stages and the runner.

mod blinks;
mod conventions;
mod demo;
mod layout;
mod optics;
mod pigmentation;
mod report;
mod runner;
mod spectra;
mod tracing;
