//! The verbs behind the command line: `check`, `protocol show` and `run`.

pub mod epochs;
pub mod fits;
pub mod statistics;
pub mod transmissions;
pub mod mixed;
pub mod sensitivity;

use std::path::Path;

use anyhow::Result;

use crate::cli::printer::Printer;
use crate::cli::Exit;
use crate::config::duration::format_seconds;
use crate::config::protocol::{load_protocol, Protocol};
use crate::config::study::{load_study, resolve_study_path, Study};
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
            printer.error(format!("`{}` has {} errors", file.display(), findings.error_count()));
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
    let header = ["#", "epoch", "from", "steady from", "to", "duration", "gas", "O2", "equivalent altitude"];
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
    let widths: Vec<usize> = (0..header.len()).map(|c| rows.iter().map(|r| r[c].chars().count()).max().unwrap_or(0)).collect();
    for r in &rows {
        let line: Vec<String> = r.iter().zip(&widths).map(|(s, w)| format!("{s:<w$}")).collect();
        out.push_str(&format!("  {}\n", line.join("  ").trim_end()));
    }
    out.push_str(&format!("total {}; baseline `{}`\n", format_seconds(p.total_s()), p.epochs[p.baseline].name));
    if !p.contrasts.is_empty() {
        out.push_str(&format!("contrasts: {}\n", p.contrasts.iter().map(|c| c.label.as_str()).collect::<Vec<_>>().join("; ")));
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
            printer.error(format!("`{}` has {} errors; nothing was simulated", scenario.display(), findings.error_count()));
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

/// Runs a study with the stages that exist so far.
pub fn run(arg: &Path, printer: &Printer) -> Result<Exit> {
    let path = resolve_study_path(arg);
    // A demo or planning folder ships its scenario; its data are generated on first use.
    let dir = if arg.is_dir() { arg.to_path_buf() } else { arg.parent().map(Path::to_path_buf).unwrap_or_default() };
    let scenario = dir.join("scenario.yaml");
    if scenario.is_file() && !dir.join("truth").join("captures.parquet").is_file() {
        printer.info(format!("no simulated data in `{}` yet: simulating it from `{}`", dir.display(), scenario.display()));
        if simulate(&scenario, &dir, printer)? != Exit::Ok {
            return Ok(Exit::Problem);
        }
    }
    let (study, findings) = load_study(&path);
    printer.findings(&findings);
    let Some(study) = study else {
        printer.error(format!("`{}` has {} errors; the run did not start", path.display(), findings.error_count()));
        return Ok(Exit::Problem);
    };
    run_stages(&study, printer)
}

fn run_stages(study: &Study, printer: &Printer) -> Result<Exit> {
    printer.info(format!("study `{}`: {} subjects, {} captures", study.id, study.subjects.len(), study.capture_count()));
    let tables = crate::run::epochs::build(study);
    let written = tables.write(&study.output)?;
    printer.info(format!(
        "epochs: {} captures placed: {} steady, {} settling, {} outside the protocol, {} excluded",
        tables.captures.len(),
        tables.count(CaptureStatus::Steady),
        tables.count(CaptureStatus::Settling),
        tables.count(CaptureStatus::Outside),
        tables.captures.iter().filter(|c| c.status == "excluded").count()
    ));
    for p in &written {
        printer.verbose(format!("  wrote `{}`", p.display()));
    }
    printer.info(format!("wrote the capture and epoch tables under `{}`", study.output.join("epochs").display()));

    let t0 = std::time::Instant::now();
    let images = crate::run::transmissions::build(study, &tables);
    images.write(&study.output, study, &tables)?;
    let count = |s: &str| images.status.iter().filter(|x| x.status == s).count();
    printer.info(format!(
        "images: {} captures analysed, {} could not be read, {} did not register; {} profile positions ({:.1} s)",
        count("ok"),
        count("error"),
        count("not-registered"),
        images.positions.len(),
        t0.elapsed().as_secs_f64()
    ));
    for (row, st) in tables.captures.iter().zip(&images.status) {
        if st.status == "error" || st.status == "not-registered" {
            printer.warn(format!("{}: {}", row.capture, st.message.clone().unwrap_or_default()));
        }
    }
    let t0 = std::time::Instant::now();
    let fits = crate::run::fits::build(study, &tables, &images);
    crate::run::fits::write(&fits, &tables, &study.output)?;
    printer.info(format!(
        "fits: {} segment fits over {} methods, {} with an SO2 ({:.1} s)",
        fits.len(),
        study.methods.len(),
        fits.iter().filter(|f| f.so2.is_some()).count(),
        t0.elapsed().as_secs_f64()
    ));
    let stats = crate::run::statistics::build(study, &tables, &fits);
    stats.write(&study.output)?;
    printer.info(format!("statistics: {} subject × epoch summaries, {} contrasts, {} agreement rows", stats.summaries.len(), stats.contrasts.len(), stats.agreement.len()));
    for (m, k, t, h) in &stats.contrasts {
        printer.info(format!("  {m} {k}: {} = {:+.2} points (95 % CI {:+.2} to {:+.2}, df {:.1}, Holm p {:.2e})", t.label, t.estimate, t.lower, t.upper, t.df, h));
    }
    printer.info("not run yet: the report is not part of this version");
    if count("error") + count("not-registered") > 0 {
        return Ok(Exit::Problem);
    }
    Ok(Exit::Ok)
}
