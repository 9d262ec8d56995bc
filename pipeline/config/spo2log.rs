//! Pulse-oximeter logs: one CSV per session, read once with the study.
//! Empty cells, `NaN` and `-` are dropouts; 0 is a dropout too (some
//! oximeters log it while they have no reading) and is counted in a
//! warning; any other value outside 1–100, or infinite, is impossible and an
//! error. A time or value that cannot be read is a finding with
//! `file:line:column`.

use std::path::{Path, PathBuf};

use chrono::{DateTime, FixedOffset};

use super::csvfile::read_csv;
use super::diag::{Findings, Mark};
use super::time::{parse_time, seconds_between};

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ReferenceLog {
    pub path: PathBuf,
    pub time_column: String,
    pub spo2_column: String,
}

/// A session's log, times in seconds from the session start, sorted.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SpO2Log {
    pub samples: Vec<(f64, f64)>,
    pub dropouts: usize,
}

/// Share of a log's samples without a value above which the log is said
/// (common practice for a usable recording; no published threshold).
const MAX_DROPOUT_PERCENT: usize = 20;

/// Reads a log; malformed lines are findings with `file:line:column`.
pub(crate) fn read_log(
    log: &ReferenceLog,
    session_start: &DateTime<FixedOffset>,
    findings: &mut Findings,
) -> Option<SpO2Log> {
    let p: &Path = &log.path;
    let before = findings.error_count();
    let t = read_csv(p, findings)?;
    let tc = t.column(p, &log.time_column, "the SpO2 log", findings);
    let sc = t.column(p, &log.spo2_column, "the SpO2 log", findings);
    let (tc, sc) = (tc?, sc?);
    let mut out = SpO2Log::default();
    let mut zeros = 0usize;
    for row in &t.rows {
        let Some((ts, tm)) = row.field(tc) else {
            findings.error(p, Some(Mark::new(row.line, 1)), "this line has no time");
            continue;
        };
        let time = match parse_time(ts) {
            Ok(v) => v,
            Err(e) => {
                findings
                    .error(p, Some(tm), format!("time: {e}"))
                    .hint("the log's times must be ISO 8601 with the UTC offset");
                continue;
            }
        };
        let value = row.field(sc).map(|(s, m)| (s.to_string(), m));
        let v = match value {
            None => None,
            Some((s, _)) if s.is_empty() || s.eq_ignore_ascii_case("nan") || s == "-" => None,
            Some((s, m)) => match s.parse::<f64>() {
                Ok(v) if v.is_finite() && (1.0..=100.0).contains(&v) => Some(v),
                // Some oximeters log 0 while they have no reading.
                Ok(0.0) => {
                    zeros += 1;
                    None
                }
                Ok(_) => {
                    findings
                        .error(
                            p,
                            Some(m),
                            format!("SpO2 `{s}` is impossible: a saturation lies between 0 and 100 %"),
                        )
                        .hint("leave the cell empty (or write NaN) for a dropout; check the column is SpO2");
                    continue;
                }
                Err(_) => {
                    findings
                        .error(p, Some(m), format!("SpO2 `{s}` is not a number"))
                        .hint("leave the cell empty for a dropout");
                    continue;
                }
            },
        };
        match v {
            Some(v) => out.samples.push((seconds_between(session_start, &time), v)),
            None => out.dropouts += 1,
        }
    }
    if zeros > 0 {
        findings
            .warning(
                p,
                None,
                format!("{zeros} SpO2 values of 0 were taken as dropouts (no reading)"),
            )
            .hint("if the oximeter writes 0 for something else, convert the log first");
    }
    // A few dropouts are normal (a probe slipping); a log that is mostly
    // dropouts has the wrong column, a broken probe or a convention this
    // reader does not know, and every capture would lose its reference.
    let total = out.dropouts + out.samples.len();
    if total > 0 && out.dropouts * 100 > MAX_DROPOUT_PERCENT * total {
        findings
            .warning(
                p,
                None,
                format!(
                    "{} of {total} samples have no SpO2 value (empty, NaN, `-` or 0) and were taken as dropouts",
                    out.dropouts
                ),
            )
            .hint(format!(
                "more than {MAX_DROPOUT_PERCENT} % of a log missing leaves captures without a reference: check the column and the oximeter's export"
            ));
    }
    if findings.error_count() > before {
        return None;
    }
    out.samples.sort_by(|a, b| a.0.total_cmp(&b.0));
    Some(out)
}
