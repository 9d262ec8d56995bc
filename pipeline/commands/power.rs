//! `satstep power`: plan the next study by simulation. From a study (its
//! protocol, statistics settings and finished run's variance components),
//! a scenario or a protocol, a range of designs and the effects to detect,
//! it simulates studies, analyses each with the statistics stage's model
//! and test, and writes the power table, the smallest designs, a figure
//! and a text for an ethics application (see `stages::power`).

use std::path::{Path, PathBuf};

use anyhow::Result;

use super::Exit;
use crate::config::csvfile::read_table;
use crate::config::diag::Findings;
use crate::config::protocol::{Protocol, load_protocol};
use crate::config::read::parse_counts;
use crate::console::Printer;
use crate::simulate::power::{
    Plan, Question, Studies, Variances, grid, needed, run, simulated, variances_from,
};
use crate::stages::power::{Source, studies_text, write_outputs};
use crate::stats::epoch_model::Adjustment;
use crate::study::{load_study, resolve_study_path};

pub struct PowerArgs {
    pub input: PathBuf,
    pub effects: Vec<String>,
    pub subjects: String,
    pub captures: String,
    pub segments: String,
    pub eyes: String,
    pub sessions: String,
    pub variances: Option<PathBuf>,
    pub sd: Vec<String>,
    pub methods: Vec<String>,
    pub kinds: Vec<String>,
    pub target: f64,
    pub simulations: String,
    pub seed: u64,
    pub out: Option<PathBuf>,
}

/// What the input file is.
enum Input {
    Study(Box<crate::config::study::Study>),
    Protocol(Protocol),
}

fn load_input(arg: &Path, printer: &Printer) -> Option<Input> {
    let path = if arg.is_dir() {
        if arg.join("study.yaml").is_file() {
            resolve_study_path(arg)
        } else {
            arg.join("scenario.yaml")
        }
    } else {
        arg.to_path_buf()
    };
    let mut findings = Findings::new();
    let root = crate::config::read::load_tree(
        &path,
        "study, scenario or protocol file",
        "give a study (folder or file), a scenario or a protocol",
        &mut findings,
    );
    let Some(root) = root else {
        printer.findings(&findings);
        return None;
    };
    if root.get("study").is_some() {
        let (study, findings) = load_study(&path);
        printer.findings(&findings);
        return study.map(|s| Input::Study(Box::new(s)));
    }
    let protocol = if root.get("scenario").is_some() {
        crate::simulate::load_scenario(&path).map(|s| s.protocol)
    } else {
        load_protocol(&path)
    };
    match protocol {
        Ok(p) => Some(Input::Protocol(p)),
        Err(f) => {
            printer.findings(&f);
            None
        }
    }
}

/// Reads `method, kind, group, variance` rows of a variance components table.
fn read_variances(path: &Path, printer: &Printer) -> Option<Vec<(String, String, String, f64)>> {
    let mut findings = Findings::new();
    let table = read_table(path, &mut findings);
    let rows = table.and_then(|t| {
        let cols: Vec<Option<usize>> = ["method", "kind", "group", "variance"]
            .iter()
            .map(|c| t.column(path, c, "the variance components", &mut findings))
            .collect();
        let cols: Vec<usize> = cols.into_iter().collect::<Option<_>>()?;
        let mut out = Vec::new();
        for row in &t.rows {
            let f = |i: usize| row.field(cols[i]).map(|(s, _)| s.to_string());
            let (Some(m), Some(k), Some(g), Some((v, mark))) =
                (f(0), f(1), f(2), row.field(cols[3]))
            else {
                findings.error(
                    path,
                    Some(crate::config::diag::Mark::new(row.line, 1)),
                    "a row lacks a method, kind, group or variance",
                );
                continue;
            };
            match v.trim().parse::<f64>() {
                Ok(x) if x.is_finite() && x >= 0.0 => out.push((m, k, g, x)),
                _ => {
                    findings
                        .error(
                            path,
                            Some(mark),
                            format!("variance `{v}` is not a number ≥ 0"),
                        )
                        .hint("the table is the statistics stage's `variance_components`");
                }
            }
        }
        Some(out)
    });
    printer.findings(&findings);
    rows.filter(|_| !findings.has_errors())
}

/// Applies `--sd GROUP=SD` statements to every method's variances.
fn apply_sd(
    statements: &[String],
    epochs: &[String],
    v: &mut [(String, String, Variances)],
) -> Result<(), String> {
    for s in statements {
        let (group, value) = s
            .split_once('=')
            .ok_or_else(|| format!("`--sd {s}`: write `GROUP=SD`, e.g. `eye=1.5`"))?;
        let sd: f64 = value
            .trim()
            .parse()
            .ok()
            .filter(|x: &f64| x.is_finite() && *x >= 0.0)
            .ok_or_else(|| format!("`--sd {s}`: the SD must be a number ≥ 0 (points of SO2)"))?;
        let group = group.trim();
        for (_, _, x) in v.iter_mut() {
            match group {
                "subject" => x.subject = sd,
                "session" => x.session = sd,
                "eye" => x.eye = sd,
                "segment" => x.segment = sd,
                "residual" => x.residual = sd,
                "response" => x.response.iter_mut().for_each(|r| *r = sd),
                g => match g.strip_prefix("response:") {
                    Some(e) => match epochs.iter().position(|n| n == e) {
                        Some(i) => x.response[i] = sd,
                        None => {
                            return Err(format!(
                                "`--sd {s}`: no epoch `{e}` in the protocol ({})",
                                epochs.join(", ")
                            ));
                        }
                    },
                    None => {
                        return Err(format!(
                            "`--sd {s}`: unknown group `{g}`; use subject, session, eye, segment, residual, response or response:EPOCH"
                        ));
                    }
                },
            }
        }
    }
    Ok(())
}

pub fn power(a: &PowerArgs, printer: &Printer) -> Result<Exit> {
    let problem = |m: String| {
        printer.error(m);
        Ok(Exit::Problem)
    };
    let Some(input) = load_input(&a.input, printer) else {
        printer.error(format!(
            "`{}` could not be read; nothing was written",
            a.input.display()
        ));
        return Ok(Exit::Problem);
    };
    let (protocol, confidence, adjustment, results) = match &input {
        Input::Study(s) => (
            s.protocol.clone(),
            s.statistics.confidence,
            s.statistics.adjustment.into(),
            Some(s.output.clone()),
        ),
        Input::Protocol(p) => (p.clone(), 0.95, Adjustment::Holm, None),
    };
    let labels: Vec<&str> = protocol
        .contrasts
        .iter()
        .map(|c| c.label.as_str())
        .collect();
    let mut effects = Vec::new();
    for e in &a.effects {
        let Some((label, value)) = e.rsplit_once('=') else {
            return problem(format!(
                "`--effect {e}`: write `CONTRAST=POINTS`, e.g. `--effect \"low-15 - air=-4\"`"
            ));
        };
        let Some(v) = value.trim().parse::<f64>().ok().filter(|v| v.is_finite()) else {
            return problem(format!(
                "`--effect {e}`: `{}` is not a number of SO2 points",
                value.trim()
            ));
        };
        effects.push((label.trim().to_string(), v));
    }
    if effects.is_empty() {
        return problem(format!(
            "state the effect to detect, in SO2 points: `--effect \"CONTRAST=POINTS\"` for one of the protocol's contrasts ({})",
            labels.join(", ")
        ));
    }
    let question = match Question::for_protocol(&protocol, &effects, confidence, adjustment) {
        Ok(q) => q,
        Err(e) => {
            return problem(format!(
                "`--effect`: {e} (the protocol's contrasts: {})",
                labels.join(", ")
            ));
        }
    };
    let epochs = question.epochs.clone();
    let counts = |name: &str, text: &str, lo: usize, hi: usize| {
        parse_counts(text, lo, hi).map_err(|e| format!("`--{name}`: {e}"))
    };
    let [subj, capt, segm, eye, sess] = crate::config::study::PLAN_BOUNDS;
    let grids = (|| -> Result<_, String> {
        Ok((
            counts("subjects", &a.subjects, subj.0, subj.1)?,
            counts("captures", &a.captures, capt.0, capt.1)?,
            counts("segments", &a.segments, segm.0, segm.1)?,
            counts("eyes", &a.eyes, eye.0, eye.1)?,
            counts("sessions", &a.sessions, sess.0, sess.1)?,
        ))
    })();
    let (subjects, captures, segments, eyes, sessions) = match grids {
        Ok(g) => g,
        Err(e) => return problem(e),
    };
    let designs = grid(&subjects, &captures, &segments, &eyes, &sessions);
    let studies = match a.simulations.trim() {
        "auto" => Studies::Auto,
        t => match t.parse::<usize>() {
            Ok(n) if (10..=100_000).contains(&n) => Studies::Fixed(n),
            _ => {
                return problem(format!(
                    "`--simulations {t}`: give `auto` or a count 10–100000"
                ));
            }
        },
    };
    if !(a.target > 0.0 && a.target < 1.0) {
        return problem(format!(
            "`--target {}`: give a power between 0 and 1, e.g. 0.8",
            a.target
        ));
    }
    // The variances: a table (given, or the study's finished run), else all stated.
    let table = a.variances.clone().or_else(|| {
        results
            .as_ref()
            .map(|r| r.join("statistics").join("variance_components.csv"))
    });
    let (mut variances, mut missing, source) = match &table {
        Some(path) if path.is_file() => {
            let Some(rows) = read_variances(path, printer) else {
                return problem(format!(
                    "`{}` could not be read; nothing was written",
                    path.display()
                ));
            };
            let (v, m) = variances_from(&rows, &epochs, &a.methods, &a.kinds);
            (v, m, Source::Table(path.clone()))
        }
        Some(path) if a.variances.is_some() || a.sd.is_empty() => {
            return problem(format!(
                "no variance components at `{}`: run the study first (`satstep run`), give a table with `--variances`, or state them with `--sd GROUP=SD`",
                path.display()
            ));
        }
        _ => {
            if a.sd.is_empty() {
                return problem("state the variance components with `--sd GROUP=SD` (subject, segment, residual, response, …) or give a finished run's table with `--variances`".into());
            }
            let zero = Variances {
                subject: 0.0,
                session: 0.0,
                eye: 0.0,
                segment: 0.0,
                response: vec![0.0; epochs.len()],
                residual: 0.0,
            };
            (
                vec![("stated".to_string(), "any vessel".to_string(), zero)],
                Vec::new(),
                Source::Stated,
            )
        }
    };
    if let Err(e) = apply_sd(&a.sd, &epochs, &mut variances) {
        return problem(e);
    }
    if variances.is_empty() {
        return problem(
            "no method and kind left: check `--method` and `--kind` against the variance table"
                .into(),
        );
    }
    // A statement fills a component the table lacked.
    let stated = |g: &String| {
        a.sd.iter()
            .any(|s| s.split('=').next().map(str::trim) == Some(g))
    };
    missing.retain(|m| !m.stated_by().iter().any(stated));
    let missing = needed(missing, &designs);
    for m in &missing {
        printer.warn(format!("no variance component {m} in the table: taken as 0; state it with `--sd` if the planned study has it"));
    }
    let plan = Plan {
        question,
        effects,
        designs,
        variances,
        target: a.target,
        studies,
        seed: a.seed,
    };
    // Not the study's `results/power/`: that folder is the `power` stage's.
    let out = a.out.clone().unwrap_or_else(|| PathBuf::from("power"));
    let cells = plan.designs.len() * plan.variances.len();
    printer.info(format!(
        "simulating {} designs × {} methods and kinds ({})",
        plan.designs.len(),
        plan.variances.len(),
        studies_text(plan.studies)
    ));
    let bar = crate::runner::progress::Progress::new(
        printer,
        cells * plan.studies.first_pass(),
        "studies",
    );
    let t0 = std::time::Instant::now();
    let rows = run(&plan, &|n| bar.inc_by(n));
    bar.finish();
    let simulated = simulated(&rows, plan.question.contrasts.len());
    let files = write_outputs(&out, &plan, &rows, &source, &missing, &protocol.name)?;
    printer.info(format!(
        "{simulated} studies simulated and analysed in {:.1} s; wrote {} files to `{}`",
        t0.elapsed().as_secs_f64(),
        files.len(),
        out.display()
    ));
    for line in crate::stages::power::summary_lines(&plan, &rows) {
        printer.info(line);
    }
    Ok(Exit::Ok)
}
