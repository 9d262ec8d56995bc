//! Whole runs through the stages and the runner.

mod demo;
mod report;
mod runner;
mod spectra;
