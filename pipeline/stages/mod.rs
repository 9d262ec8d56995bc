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
    fn cohort_level(&self) -> bool;
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
    fn cohort_level(&self) -> bool {
        S::COHORT_LEVEL
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
        // A shard sees part of the cohort: what it would say of shares and
        // counts is said by the final run over the whole.
        if runner.shard().is_none() {
            S::report(run, runner);
        }
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

/// Runs every stage in order; a shard of a run stops before the first
/// cohort-level stage.
pub(crate) fn run_all(run: &mut Run, runner: &Runner) -> Result<()> {
    for stage in STAGES {
        if runner.shard().is_some() && stage.cohort_level() {
            break;
        }
        run.methods = STAGES.iter().filter_map(|s| s.describe(run)).collect();
        stage.run(run, runner)?;
    }
    Ok(())
}

/// Runs the cohort-level stages on per-capture results that were computed
/// elsewhere: a pooled analysis (`satstep pool`) hands in the sites'
/// capture tables and fits, keyed by `key` (the sites' manifests), and
/// the statistics, power and report stages run as in a study's own run.
pub(crate) fn run_cohort(
    run: &mut Run,
    runner: &Runner,
    epochs: epochs::EpochTables,
    images: transmissions::TransmissionTables,
    fits: fits::FitTables,
    key: crate::runner::key::Key,
) -> Result<()> {
    run.keep::<epochs::Epochs>(epochs);
    run.keep::<transmissions::Transmissions>(images);
    run.keep::<fits::Fits>(fits);
    for name in ["epochs", "transmissions", "fits"] {
        run.set_key(name, key);
    }
    for stage in STAGES.iter().filter(|s| s.cohort_level()) {
        run.methods = STAGES.iter().filter_map(|s| s.describe(run)).collect();
        stage.run(run, runner)?;
    }
    Ok(())
}
