//! satstep's integration tests, one binary with a module per layer:
//! - [`commands`]: the program as a user runs it (arguments, messages, exit status).
//! - [`stages`]: whole runs through the stages and the runner (cache, resumption, report).
//! - [`engines`]: the engines against published values and their own physics.
//! - [`crosscheck`]: agreement with R's lme4 and lmerTest, and calibration on
//!   whole simulated studies (the long runs are `#[ignore]`d; `.ci/run` runs them).
//! - [`architecture`]: the layering of the source tree.

// Tests may print what they measured (shown with --nocapture).
#![allow(clippy::print_stdout)]

mod architecture;
mod commands;
mod common;
mod crosscheck;
mod engines;
mod stages;
