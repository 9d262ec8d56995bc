//! `satstep run`: simulates a demo folder's data on first use, loads the
//! study once, runs its stages through the cache in the order of
//! [`crate::stages::STAGES`] and writes the run's manifest.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use rayon::prelude::*;

use super::Exit;
use super::simulate::simulate;
use crate::config::study::Study;
use crate::console::Printer;
use crate::runner::key::hash_file;
use crate::runner::{Runner, Shard, manifest};
use crate::stages::epochs::{EpochTables, Epochs};
use crate::stages::fits::{FitRow, Fits};
use crate::stages::transmissions::{TransmissionTables, Transmissions};
use crate::stages::{Run, run_all};
use crate::study::{load_study, resolve_study_path};

/// Runs a study: simulates a demo folder's data on first use, validates
/// the study and runs its stages through the cache.
pub fn run(arg: &Path, force: &[String], shard: Option<Shard>, printer: &Printer) -> Result<Exit> {
    let path = resolve_study_path(arg);
    // A demo or planning folder ships its scenario; its data are generated on first use.
    let dir = if arg.is_dir() {
        arg.to_path_buf()
    } else {
        arg.parent().map(Path::to_path_buf).unwrap_or_default()
    };
    let scenario = dir.join("scenario.yaml");
    if scenario.is_file() && !dir.join("truth").join("captures.parquet").is_file() {
        if let Some(shard) = shard {
            // Shards start together: each would simulate the same folder.
            printer.error(format!(
                "`{}` has no simulated data yet, and shard {shard} cannot make it alone: run `satstep simulate {} --out {}` once before the shards",
                dir.display(),
                scenario.display(),
                dir.display()
            ));
            return Ok(Exit::Problem);
        }
        printer.info(format!(
            "no simulated data in `{}` yet: simulating it from `{}`",
            dir.display(),
            scenario.display()
        ));
        if simulate(&scenario, &dir, printer)? != Exit::Ok {
            return Ok(Exit::Problem);
        }
    }
    let (study, findings) = load_study(&path);
    printer.findings(&findings);
    let Some(study) = study else {
        printer.error(format!(
            "`{}` has {} errors; the run did not start",
            path.display(),
            findings.error_count()
        ));
        return Ok(Exit::Problem);
    };
    run_stages(&study, force, shard, printer)
}

/// Every file the run reads, in a fixed order.
fn input_files(study: &Study) -> Vec<PathBuf> {
    let mut v = vec![study.file.clone()];
    v.extend(study.protocol_file.clone());
    v.extend(study.spectra_file.clone());
    for sess in study.subjects.iter().flat_map(|s| &s.sessions) {
        let mut lists: Vec<PathBuf> = sess
            .captures
            .iter()
            .map(|c| c.source.clone())
            .filter(|p| *p != study.file)
            .collect();
        lists.dedup();
        v.extend(lists);
        v.extend(sess.reference.as_ref().map(|r| r.path.clone()));
        v.extend(sess.segments.values().cloned());
        if study.spectra_file.is_none() {
            v.extend(sess.captures.iter().map(|c| c.path.clone()));
        }
    }
    let mut seen = std::collections::BTreeSet::new();
    v.retain(|p| seen.insert(p.clone()));
    v
}

fn run_stages(
    study: &Study,
    force: &[String],
    shard: Option<Shard>,
    printer: &Printer,
) -> Result<Exit> {
    printer.info(format!(
        "study `{}`: {} subjects, {} captures; results under `{}`",
        study.id,
        study.subjects.len(),
        study.capture_count(),
        study.output.display()
    ));
    let out = &study.output;
    std::fs::create_dir_all(out)
        .with_context(|| format!("creating the output folder `{}`", out.display()))?;
    let mut runner = Runner::new(out, printer, force);
    if let Some(s) = shard {
        runner = runner.sharded(s);
    }
    let orphans = crate::tables::remove_orphaned_temporaries(out);
    if orphans > 0 {
        printer.info(format!(
            "removed {orphans} temporary files an interrupted run left under `{}`",
            out.display()
        ));
    }

    // Content hashes of everything the run reads, once, in parallel.
    let t0 = std::time::Instant::now();
    let hashed: Vec<(PathBuf, Option<(crate::runner::key::Key, u64)>)> = input_files(study)
        .par_iter()
        .map(|p| {
            (
                p.clone(),
                hash_file(p)
                    .ok()
                    .map(|k| (k, std::fs::metadata(p).map(|m| m.len()).unwrap_or(0))),
            )
        })
        .collect();
    printer.verbose(format!(
        "hashed {} input files in {:.1} s",
        hashed.len(),
        t0.elapsed().as_secs_f64()
    ));

    let mut run = Run::new(study, hashed);
    run_all(&mut run, &runner)?;
    if let Some(shard) = shard {
        // No manifest and no tables: the final run over every shard's items writes them.
        let failed = run.output::<Transmissions>().failed().len();
        printer.info(format!(
            "shard {shard} done: its captures are in the cache under `{}`{}; once every shard is done, `satstep run {}` completes the study",
            runner.store.root().display(),
            if failed > 0 {
                format!(" ({failed} could not be analysed; the final run names them)")
            } else {
                String::new()
            },
            study.file.display()
        ));
        return Ok(Exit::Ok);
    }

    let failed = run.output::<Transmissions>().failed();
    let exit = if failed.is_empty() {
        Exit::Ok
    } else {
        Exit::Problem
    };
    let manifest = manifest::Manifest {
        tool: "satstep",
        version: env!("CARGO_PKG_VERSION"),
        cache_format: crate::runner::key::CACHE_FORMAT,
        finished_utc: manifest::utc_now(),
        command: std::env::args().collect(),
        study_file: study.file.display().to_string(),
        study: serde_json::to_value(study)?,
        inputs: manifest::InputFile::list(&run.inputs),
        seeds: seeds(study),
        stages: runner.log(),
        captures: capture_counts(
            run.output::<Epochs>(),
            run.output::<Transmissions>(),
            &run.output::<Fits>().rows,
        ),
        warnings: runner.warnings.lock().expect("not poisoned").clone(),
        exit_status: exit as i32,
    };
    manifest.write(out)?;
    printer.info(format!("wrote `{}`", out.join("manifest.json").display()));
    if !failed.is_empty() {
        printer.warn(format!("{} captures could not be analysed (see `transmissions/captures.csv`); everything else was written", failed.len()));
    }
    Ok(exit)
}

/// The analysis draws no random numbers; a simulated study's seed is kept.
fn seeds(study: &Study) -> BTreeMap<String, String> {
    let mut s = BTreeMap::new();
    s.insert(
        "analysis".into(),
        "none: no stage draws random numbers".into(),
    );
    if let Ok(text) = std::fs::read_to_string(study.root.join("truth").join("rendering.yaml")) {
        // The simulator names its seed in the file's first line: "(seed N)".
        if let Some(rest) = text.lines().next().and_then(|l| l.split("(seed ").nth(1)) {
            s.insert(
                "simulation".into(),
                rest.chars().take_while(char::is_ascii_digit).collect(),
            );
        }
    }
    s
}

fn capture_counts(
    tables: &EpochTables,
    images: &TransmissionTables,
    fits: &[FitRow],
) -> manifest::CaptureCounts {
    let mut counts = manifest::CaptureCounts {
        listed: tables.captures.len(),
        ..Default::default()
    };
    for u in crate::stages::report::tables::usage(tables, images, fits) {
        match u {
            None => counts.used += 1,
            Some(reason) => *counts.not_used.entry(reason).or_default() += 1,
        }
    }
    counts
}
