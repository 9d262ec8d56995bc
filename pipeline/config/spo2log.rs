//! Pulse-oximeter logs: one CSV per session, read once with the study.
//! Empty cells, `NaN`, `-`, non-finite values and values outside 1–100 are
//! dropouts; a time or value that cannot be read is a finding with
//! `file:line:column`.

use std::path::{Path, PathBuf};

use chrono::{DateTime, FixedOffset};

use super::csvfile::read_csv;
use super::diag::{Findings, Mark};
use super::time::{parse_time, seconds_between};

#[derive(Debug, Clone, PartialEq, serde::Serialize)]
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
                Ok(_) => None,
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
    if findings.error_count() > before {
        return None;
    }
    out.samples.sort_by(|a, b| a.0.total_cmp(&b.0));
    Some(out)
}
