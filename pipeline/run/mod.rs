//! The verbs behind the command line: `check`, `protocol show` and `run`.

pub mod epochs;
pub mod fits;
pub mod mixed;
pub mod sensitivity;
pub mod statistics;
pub mod transmissions;

use std::path::Path;

use std::collections::BTreeMap;
use std::path::PathBuf;

use anyhow::{Context, Result};
use rayon::prelude::*;

use crate::cli::Exit;
use crate::cli::printer::Printer;
use crate::config::duration::format_seconds;
use crate::config::protocol::{Protocol, load_protocol};
use crate::config::study::{Study, load_study, resolve_study_path};
use crate::stages::key::{Key, KeyBuilder, combine, hash_file, hash_file_or_missing};
use crate::stages::{Parts, Runner, manifest};
use crate::timeline::assign::CaptureStatus;

/// Validates a study and everything it names. Writes nothing.
pub fn check(arg: &Path, printer: &Printer) -> Result<Exit> {
    let path = resolve_study_path(arg);
    let (study, findings) = load_study(&path);
    printer.findings(&findings);
    match study {
        Some(s) => {
            printer.info(format!(
                "`{}` is valid: {} subjects, {} captures, {} epochs, {} methods ({} warnings)",
                path.display(),
                s.subjects.len(),
                s.capture_count(),
                s.protocol.epochs.len(),
                s.methods.len(),
                findings.warning_count()
            ));
            Ok(Exit::Ok)
        }
        None => {
            printer.error(format!(
                "`{}` has {} errors and {} warnings; nothing was written",
                path.display(),
                findings.error_count(),
                findings.warning_count()
            ));
            Ok(Exit::Problem)
        }
    }
}

/// Prints a protocol's timeline.
pub fn show_protocol(file: &Path, printer: &Printer) -> Result<Exit> {
    match load_protocol(file) {
        Ok(p) => {
            printer.data(render_timeline(&p));
            Ok(Exit::Ok)
        }
        Err(findings) => {
            printer.findings(&findings);
            printer.error(format!(
                "`{}` has {} errors",
                file.display(),
                findings.error_count()
            ));
            Ok(Exit::Problem)
        }
    }
}

/// The timeline as text: one line per epoch with cumulative times.
pub fn render_timeline(p: &Protocol) -> String {
    let mut out = format!("protocol `{}`", p.name);
    if !p.description.is_empty() {
        out.push_str(&format!(": {}", p.description));
    }
    out.push('\n');
    let header = [
        "#",
        "epoch",
        "from",
        "steady from",
        "to",
        "duration",
        "gas",
        "O2",
        "equivalent altitude",
    ];
    let mut rows: Vec<Vec<String>> = vec![header.iter().map(|s| s.to_string()).collect()];
    for (i, (e, start)) in p.epochs.iter().zip(p.planned_starts()).enumerate() {
        rows.push(vec![
            (i + 1).to_string(),
            e.name.clone(),
            format_seconds(start),
            format_seconds(start + e.settle_s),
            format_seconds(start + e.duration_s),
            format_seconds(e.duration_s),
            match e.gas.written {
                crate::config::protocol::GasSpec::Air => "air".into(),
                crate::config::protocol::GasSpec::O2Fraction(_) => "O2 mixture".into(),
                crate::config::protocol::GasSpec::AltitudeM(h) => format!("air at {h:.0} m"),
            },
            format!("{:.3}", e.gas.o2_fraction),
            match e.gas.equivalent_altitude_m {
                Some(h) => format!("{:.0} m", h),
                None => "none (hyperoxic)".into(),
            },
        ]);
    }
    let widths: Vec<usize> = (0..header.len())
        .map(|c| rows.iter().map(|r| r[c].chars().count()).max().unwrap_or(0))
        .collect();
    for r in &rows {
        let line: Vec<String> = r
            .iter()
            .zip(&widths)
            .map(|(s, w)| format!("{s:<w$}"))
            .collect();
        out.push_str(&format!("  {}\n", line.join("  ").trim_end()));
    }
    out.push_str(&format!(
        "total {}; baseline `{}`\n",
        format_seconds(p.total_s()),
        p.epochs[p.baseline].name
    ));
    if !p.contrasts.is_empty() {
        out.push_str(&format!(
            "contrasts: {}\n",
            p.contrasts
                .iter()
                .map(|c| c.label.as_str())
                .collect::<Vec<_>>()
                .join("; ")
        ));
    }
    let r = &p.reference;
    out.push_str(&format!(
        "reference SpO2: {} probe, lag {}, median over {}, unstable above a range of {} points\n",
        serde_yaml_site(r.probe_site),
        format_seconds(r.lag_s),
        format_seconds(r.window_s),
        r.stability_limit
    ));
    out
}

fn serde_yaml_site(s: crate::config::protocol::ProbeSite) -> &'static str {
    use crate::config::protocol::ProbeSite::*;
    match s {
        Finger => "finger",
        Ear => "ear",
        Forehead => "forehead",
        Toe => "toe",
    }
}

/// Writes a synthetic study from a scenario.
pub fn simulate(scenario: &Path, out: &Path, printer: &Printer) -> Result<Exit> {
    let sc = match crate::simulate::load_scenario(scenario) {
        Ok(s) => s,
        Err(findings) => {
            printer.findings(&findings);
            printer.error(format!(
                "`{}` has {} errors; nothing was simulated",
                scenario.display(),
                findings.error_count()
            ));
            return Ok(Exit::Problem);
        }
    };
    let started = std::time::Instant::now();
    let study = crate::simulate::simulate(&sc, out)?;
    printer.info(format!(
        "simulated `{}`: {} subjects, protocol `{}`, seed {} ({:.1} s); study file `{}`, truth under `{}`",
        sc.id,
        sc.subjects,
        sc.protocol.name,
        sc.seed,
        started.elapsed().as_secs_f64(),
        study.display(),
        out.join("truth").display()
    ));
    Ok(Exit::Ok)
}

/// Runs a study: simulates a demo folder's data on first use, validates
/// the study and runs its stages through the cache.
pub fn run(arg: &Path, force: &[String], printer: &Printer) -> Result<Exit> {
    let path = resolve_study_path(arg);
    // A demo or planning folder ships its scenario; its data are generated on first use.
    let dir = if arg.is_dir() {
        arg.to_path_buf()
    } else {
        arg.parent().map(Path::to_path_buf).unwrap_or_default()
    };
    let scenario = dir.join("scenario.yaml");
    if scenario.is_file() && !dir.join("truth").join("captures.parquet").is_file() {
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
    run_stages(&study, force, printer)
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

fn epochs_settings(study: &Study) -> Key {
    let mut k = KeyBuilder::new("epochs-settings", epochs::VERSION);
    // Only the exclusions of whole captures and subjects: the minimum
    // diameter acts on segment values in the statistics stage.
    k.value("protocol", &study.protocol)
        .value("subjects", &study.subjects)
        .value("excluded-subjects", &study.exclusions.subjects)
        .value("excluded-captures", &study.exclusions.captures);
    k.finish()
}

fn run_stages(study: &Study, force: &[String], printer: &Printer) -> Result<Exit> {
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
    let runner = Runner::new(out, printer, force);

    // Content hashes of everything the run reads, once, in parallel.
    let t0 = std::time::Instant::now();
    let inputs = input_files(study);
    let hashed: Vec<(PathBuf, Option<(Key, u64)>)> = inputs
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
    let hashes: BTreeMap<PathBuf, Key> = hashed
        .iter()
        .filter_map(|(p, h)| h.map(|(k, _)| (p.clone(), k)))
        .collect();
    printer.verbose(format!(
        "hashed {} input files in {:.1} s",
        hashed.len(),
        t0.elapsed().as_secs_f64()
    ));
    let hash = |p: &Path| {
        hashes
            .get(p)
            .copied()
            .unwrap_or_else(|| hash_file_or_missing(p))
    };

    // Epochs and reference SpO2.
    let logs = combine(
        "spo2-logs",
        study
            .subjects
            .iter()
            .flat_map(|s| &s.sessions)
            .filter_map(|s| s.reference.as_ref())
            .map(|r| hash(&r.path)),
    );
    let (tables, epochs_key) = runner.stage(
        "epochs",
        epochs::VERSION,
        Parts {
            settings: epochs_settings(study),
            inputs: logs,
            upstream: vec![],
        },
        |_| {
            let t = epochs::build(study);
            let d = format!(
                "{} captures: {} steady, {} settling, {} outside the protocol, {} excluded",
                t.captures.len(),
                t.count(CaptureStatus::Steady),
                t.count(CaptureStatus::Settling),
                t.count(CaptureStatus::Outside),
                t.captures.iter().filter(|c| c.status == "excluded").count()
            );
            Ok((t, d))
        },
        |t, _| t.write(out),
    )?;

    // Images → transmissions, capture by capture.
    let keys = if study.spectra.is_some() {
        transmissions::spectra_item_keys(study, &tables)
    } else {
        transmissions::item_keys(study, &tables, &hashes)
    };
    let (images, images_key) = runner.stage(
        "images",
        transmissions::VERSION,
        Parts {
            settings: transmissions::settings_key(study),
            inputs: combine("captures", keys.iter().copied()),
            upstream: vec![("epochs", epochs_key)],
        },
        |r| {
            let analysed = tables
                .captures
                .iter()
                .filter(|c| matches!(c.status.as_str(), "steady" | "settling"))
                .count();
            let items = r.items("images", analysed, "images");
            let t = if study.spectra.is_some() {
                transmissions::from_spectra(study, &tables, keys.clone(), &items)
            } else {
                transmissions::build(study, &tables, keys.clone(), &items)
            };
            let detail = items.finish("captures")?;
            let d = format!("{detail}; {} profile positions", t.total_positions());
            Ok((t, d))
        },
        |t, r| t.write(out, study, &tables, r),
    )?;
    let failed: Vec<usize> = (0..tables.captures.len())
        .filter(|i| {
            matches!(
                images.status[*i].status.as_str(),
                "error" | "not-registered"
            )
        })
        .collect();
    for &i in &failed {
        runner.warn(format!(
            "capture `{}` ({}): {}",
            tables.captures[i].capture,
            images.status[i].status,
            images.status[i].message.clone().unwrap_or_default()
        ));
    }

    // Fits per method.
    let (fits, fits_key) = runner.stage(
        "fits",
        fits::VERSION,
        Parts {
            settings: fits::settings_key(study),
            inputs: combine("none", []),
            upstream: vec![("epochs", epochs_key), ("images", images_key)],
        },
        |r| {
            let n = images.keys.len()
                * study
                    .methods
                    .iter()
                    .filter(|m| {
                        matches!(m.kind, crate::config::study::MethodKind::Multiband { .. })
                    })
                    .count();
            let items = r.items("fits", n, "fits");
            let rows = fits::build(study, &tables, &images, r, &items)?;
            let detail = items.finish("multiband capture fits")?;
            let d = format!(
                "{} segment fits over {} methods, {} with an SO2 ({detail})",
                rows.len(),
                study.methods.len(),
                rows.iter().filter(|f| f.so2.is_some()).count()
            );
            Ok((rows, d))
        },
        |rows, _| fits::write(rows, &tables, out),
    )?;

    // Statistics.
    let (stats, stats_key) = runner.stage(
        "statistics",
        statistics::VERSION,
        Parts {
            settings: statistics::settings_key(study),
            inputs: combine("none", []),
            upstream: vec![("epochs", epochs_key), ("fits", fits_key)],
        },
        |_| {
            let s = statistics::build(study, &tables, &fits);
            let d = format!(
                "{} subject × epoch summaries, {} contrasts, {} agreement rows",
                s.summaries.len(),
                s.contrasts.len(),
                s.agreement.len()
            );
            Ok((s, d))
        },
        |s, _| s.write(out),
    )?;
    // A minimum diameter that empties a method and vessel kind leaves it
    // out of every statistic: say so rather than let the rows vanish.
    if let Some(d) = study.exclusions.min_diameter_um {
        let mut by: std::collections::BTreeMap<(&str, &str), (i64, i64)> =
            std::collections::BTreeMap::new();
        for r in stats.summaries.iter().filter(|r| r.kind != "arteriovenous") {
            let e = by.entry((r.method.as_str(), r.kind.as_str())).or_default();
            e.0 += r.segments;
            e.1 += r.below_min_diameter;
        }
        for ((m, k), (used, narrow)) in by {
            if used == 0 && narrow > 0 {
                printer.warn(format!("`exclusions.min_diameter_um: {d}` leaves no {k} value of `{m}` ({narrow} values are narrower): no {k} statistics for it"));
            }
        }
    }
    for c in &stats.contrasts {
        let t = &c.result.test;
        printer.info(format!(
            "  {} {}: {} = {:+.2} points ({:.0} % CI {:+.2} to {:+.2}, df {:.1}, p {} ({}), {})",
            c.method,
            c.kind,
            t.label,
            t.estimate,
            study.statistics.confidence * 100.0,
            t.lower,
            t.upper,
            t.df,
            crate::stats::infer::format_p(c.result.p_adjusted),
            stats.adjustment,
            c.result.basis.name()
        ));
    }

    // The report.
    let rel = |p: &Path| {
        p.strip_prefix(&study.root)
            .unwrap_or(p)
            .to_string_lossy()
            .replace('\\', "/")
    };
    let report_inputs = crate::report::Inputs {
        study,
        epochs: &tables,
        images: &images,
        fits: &fits,
        stats: &stats,
        files: hashed
            .iter()
            .map(|(p, h)| {
                (
                    rel(p),
                    h.map(|x| x.0.hex()).unwrap_or_else(|| "unreadable".into()),
                )
            })
            .collect(),
    };
    let mut report_settings = KeyBuilder::new("report-settings", crate::report::VERSION);
    report_settings.value("study", study);
    runner.stage(
        "report",
        crate::report::VERSION,
        Parts {
            settings: report_settings.finish(),
            inputs: combine("inputs", hashed.iter().map(|(p, _)| hash(p))),
            upstream: vec![
                ("epochs", epochs_key),
                ("images", images_key),
                ("fits", fits_key),
                ("statistics", stats_key),
            ],
        },
        |_| {
            Ok((
                (),
                format!("`{}`", out.join("report").join("report.html").display()),
            ))
        },
        |_, r| {
            crate::report::write(
                &report_inputs,
                &|i| images.positions(r, i).unwrap_or_default(),
                out,
            )
        },
    )?;

    let exit = if failed.is_empty() {
        Exit::Ok
    } else {
        Exit::Problem
    };
    let manifest = manifest::Manifest {
        tool: "satstep",
        version: env!("CARGO_PKG_VERSION"),
        cache_format: crate::stages::key::CACHE_FORMAT,
        finished_utc: chrono::Utc::now()
            .format("%Y-%m-%dT%H:%M:%S%.3fZ")
            .to_string(),
        command: std::env::args().collect(),
        study_file: study.file.display().to_string(),
        study: serde_json::to_value(study)?,
        inputs: hashed
            .iter()
            .map(|(p, h)| manifest::InputFile {
                path: p.display().to_string(),
                sha256: h.map(|x| x.0.hex()).unwrap_or_else(|| "unreadable".into()),
                bytes: h.map(|x| x.1).unwrap_or(0),
            })
            .collect(),
        seeds: seeds(study),
        stages: runner.log(),
        captures: capture_counts(&tables, &images, &fits),
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
    tables: &epochs::EpochTables,
    images: &transmissions::ImageTables,
    fits: &[fits::FitRow],
) -> manifest::CaptureCounts {
    let mut counts = manifest::CaptureCounts {
        listed: tables.captures.len(),
        ..Default::default()
    };
    for u in crate::report::tables::usage(tables, images, fits) {
        match u {
            None => counts.used += 1,
            Some(reason) => *counts.not_used.entry(reason).or_default() += 1,
        }
    }
    counts
}
