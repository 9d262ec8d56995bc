//! The stages of `run`, in order, each one file or folder: epochs,
//! transmissions, fits, statistics, report. [`STAGES`] is the one list the runner, `--force`,
//! the help text and the methods text take their order from; adding a stage
//! is one file implementing [`Stage`] plus one line in it.

pub mod epochs;
pub mod fits;
pub mod power;
pub mod report;
pub mod stage;
pub mod statistics;
pub mod transmissions;

use anyhow::Result;

use crate::runner::{Parts, Runner};
pub use stage::{Run, Stage};

/// A stage as the list holds it (the [`Stage`] trait has associated types
/// and constants, so the list holds this object-safe view of it).
pub(crate) trait Listed: Sync {
    fn name(&self) -> &'static str;
    fn summary(&self) -> &'static str;
    /// Runs the stage through the runner and keeps its result in `run`.
    fn run(&self, run: &mut Run, runner: &Runner) -> Result<()>;
    fn describe(&self, run: &Run) -> Option<String>;
}

impl<S: Stage> Listed for S {
    fn name(&self) -> &'static str {
        S::NAME
    }
    fn summary(&self) -> &'static str {
        S::SUMMARY
    }
    fn run(&self, run: &mut Run, runner: &Runner) -> Result<()> {
        let parts = Parts {
            settings: S::settings(run.study),
            inputs: S::inputs(run),
            upstream: S::UPSTREAM.iter().map(|u| (*u, run.key(u))).collect(),
        };
        let shared: &Run = run;
        let (output, key) = runner.stage(
            S::NAME,
            S::VERSION,
            parts,
            |r| S::build(shared, r),
            |o, r| S::write(o, shared, r),
        )?;
        run.keep::<S>(output);
        run.set_key(S::NAME, key);
        S::report(run, runner);
        Ok(())
    }
    fn describe(&self, run: &Run) -> Option<String> {
        S::describe(run)
    }
}

/// The stages of `run`, in the order they run.
pub(crate) static STAGES: &[&dyn Listed] = &[
    &epochs::Epochs,
    &transmissions::Transmissions,
    &fits::Fits,
    &statistics::StatisticsStage,
    &power::Power,
    &report::Report,
];

/// The stage names, in order (what `--force` takes, besides `all`).
pub fn names() -> Vec<&'static str> {
    STAGES.iter().map(|s| s.name()).collect()
}

/// Runs every stage in order.
pub(crate) fn run_all(run: &mut Run, runner: &Runner) -> Result<()> {
    for stage in STAGES {
        run.methods = STAGES.iter().filter_map(|s| s.describe(run)).collect();
        stage.run(run, runner)?;
    }
    Ok(())
}
