//! The epoch stage: every listed capture with its gas epoch, status and
//! reference SpO2, and every session's epoch spans. Nothing is dropped:
//! captures in a settle window, outside the protocol or excluded by the
//! study keep their row with a status that says why they are not analysed.

use std::path::{Path, PathBuf};

use anyhow::Result;

use super::stage::{Run, Stage};
use crate::config::study::Study;
use crate::config::time::seconds_between;
use crate::runner::Runner;
use crate::runner::key::{Key, KeyBuilder, combine};
use crate::tables::Table;
use crate::timeline::assign::{CaptureStatus, assign, session_spans};
use crate::timeline::reference::{ReferenceStatus, reference_at};

/// One row of the capture table.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct CaptureRow {
    pub subject: String,
    pub session: String,
    pub eye: String,
    pub capture: String,
    pub time: chrono::DateTime<chrono::FixedOffset>,
    pub t_s: f64,
    pub epoch: Option<String>,
    pub t_in_epoch_s: Option<f64>,
    pub o2_fraction: Option<f64>,
    pub status: CaptureStatus,
    pub exclusion: Option<String>,
    pub spo2: Option<f64>,
    pub spo2_samples: i64,
    pub spo2_range: Option<f64>,
    pub spo2_status: ReferenceStatus,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SpanRow {
    pub subject: String,
    pub session: String,
    pub epoch: String,
    pub start: chrono::DateTime<chrono::FixedOffset>,
    pub start_s: f64,
    pub settle_end_s: f64,
    pub end_s: f64,
    pub start_source: String,
    pub o2_fraction: f64,
}

#[derive(serde::Serialize, serde::Deserialize)]
pub struct EpochTables {
    pub captures: Vec<CaptureRow>,
    pub spans: Vec<SpanRow>,
}

/// The epochs stage.
pub(crate) struct Epochs;

impl Stage for Epochs {
    const NAME: &'static str = "epochs";
    const VERSION: u32 = 2;
    const SUMMARY: &'static str = "each capture's gas epoch, status and reference SpO2";
    const UPSTREAM: &'static [&'static str] = &[];
    type Output = EpochTables;

    fn settings(study: &Study) -> Key {
        let mut k = KeyBuilder::new("epochs-settings", Self::VERSION);
        // Only the exclusions of whole captures and subjects: the minimum
        // diameter acts on segment values in the statistics stage.
        k.value("protocol", &study.protocol)
            .value("subjects", &study.portable().subjects)
            .value("excluded-subjects", &study.exclusions.subjects)
            .value("excluded-captures", &study.exclusions.captures);
        k.finish()
    }

    fn inputs(run: &Run) -> Key {
        combine(
            "spo2-logs",
            run.study
                .subjects
                .iter()
                .flat_map(|s| &s.sessions)
                .filter_map(|s| s.reference.as_ref())
                .map(|r| run.hash(&r.path)),
        )
    }

    fn build(run: &Run, _: &Runner) -> Result<(EpochTables, String)> {
        let t = build(run.study);
        let d = format!(
            "{} captures: {} steady, {} settling, {} outside the protocol, {} excluded",
            t.captures.len(),
            t.count(CaptureStatus::Steady),
            t.count(CaptureStatus::Settling),
            t.count(CaptureStatus::Outside),
            t.count(CaptureStatus::Excluded)
        );
        Ok((t, d))
    }

    fn write(t: &EpochTables, run: &Run, _: &Runner) -> Result<Vec<PathBuf>> {
        t.write(run.out())
    }

    fn describe(run: &Run) -> Option<String> {
        Some(describe(run.study))
    }
}

/// Assigns every capture, with its reference SpO2 from the session's log
/// as read with the study (a session without a log gets `missing`).
pub fn build(study: &Study) -> EpochTables {
    let mut captures = Vec::new();
    let mut spans_out = Vec::new();
    let p = &study.protocol;
    for subj in &study.subjects {
        let subject_excluded = study.exclusions.subjects.contains(&subj.id);
        for sess in &subj.sessions {
            let spans = session_spans(p, sess);
            for s in &spans {
                let start =
                    sess.start + chrono::Duration::microseconds((s.start_s * 1e6).round() as i64);
                spans_out.push(SpanRow {
                    subject: subj.id.clone(),
                    session: sess.id.clone(),
                    epoch: p.epochs[s.epoch].name.clone(),
                    start,
                    start_s: s.start_s,
                    settle_end_s: s.settle_end_s,
                    end_s: s.end_s,
                    start_source: if s.recorded { "recorded" } else { "planned" }.to_string(),
                    o2_fraction: p.epochs[s.epoch].gas.o2_fraction,
                });
            }
            let log = sess.spo2.as_ref();
            let mut caps: Vec<_> = sess.captures.iter().collect();
            caps.sort_by(|a, b| a.time.cmp(&b.time).then(a.listed.cmp(&b.listed)));
            for c in caps {
                let t = seconds_between(&sess.start, &c.time);
                let (epoch, status) = assign(&spans, t);
                let excluded = if subject_excluded {
                    Some("subject excluded in the study file".to_string())
                } else {
                    study
                        .exclusions
                        .captures
                        .iter()
                        .find(|e| e.path == c.path)
                        .map(|e| e.reason.clone())
                };
                let r = log.map(|l| reference_at(l, t, &p.reference));
                captures.push(CaptureRow {
                    subject: subj.id.clone(),
                    session: sess.id.clone(),
                    eye: c.eye.as_str().to_string(),
                    capture: c.listed.clone(),
                    time: c.time,
                    t_s: t,
                    epoch: epoch.map(|e| p.epochs[e].name.clone()),
                    t_in_epoch_s: epoch.map(|e| t - spans[e].start_s),
                    o2_fraction: epoch.map(|e| p.epochs[e].gas.o2_fraction),
                    status: if excluded.is_some() {
                        CaptureStatus::Excluded
                    } else {
                        status
                    },
                    exclusion: excluded,
                    spo2: r.and_then(|r| r.spo2),
                    spo2_samples: r.map(|r| r.samples as i64).unwrap_or(0),
                    spo2_range: r.and_then(|r| r.range),
                    spo2_status: r.map(|r| r.status).unwrap_or(ReferenceStatus::Missing),
                });
            }
        }
    }
    EpochTables {
        captures,
        spans: spans_out,
    }
}

impl EpochTables {
    pub fn count(&self, status: CaptureStatus) -> usize {
        self.captures.iter().filter(|c| c.status == status).count()
    }

    pub fn write(&self, out: &Path) -> Result<Vec<PathBuf>> {
        let dir = out.join("epochs");
        let c = &self.captures;
        let mut t = Table::new();
        t.text("subject", c.iter().map(|r| &r.subject))
            .text("session", c.iter().map(|r| &r.session))
            .text("eye", c.iter().map(|r| &r.eye))
            .text("capture", c.iter().map(|r| &r.capture))
            .time("time", c.iter().map(|r| r.time))
            .real("t_s", c.iter().map(|r| r.t_s))
            .opt_text("epoch", c.iter().map(|r| r.epoch.clone()))
            .opt_real("t_in_epoch_s", c.iter().map(|r| r.t_in_epoch_s))
            .opt_real("o2_fraction", c.iter().map(|r| r.o2_fraction))
            .text("status", c.iter().map(|r| r.status.as_str()))
            .opt_text("exclusion", c.iter().map(|r| r.exclusion.clone()))
            .opt_real("spo2", c.iter().map(|r| r.spo2))
            .int("spo2_samples", c.iter().map(|r| r.spo2_samples))
            .opt_real("spo2_range", c.iter().map(|r| r.spo2_range))
            .text("spo2_status", c.iter().map(|r| r.spo2_status.as_str()));
        let mut paths = t.write(&dir, "captures")?;
        let s = &self.spans;
        let mut t = Table::new();
        t.text("subject", s.iter().map(|r| &r.subject))
            .text("session", s.iter().map(|r| &r.session))
            .text("epoch", s.iter().map(|r| &r.epoch))
            .time("start", s.iter().map(|r| r.start))
            .real("start_s", s.iter().map(|r| r.start_s))
            .real("settle_end_s", s.iter().map(|r| r.settle_end_s))
            .real("end_s", s.iter().map(|r| r.end_s))
            .text("start_source", s.iter().map(|r| &r.start_source))
            .real("o2_fraction", s.iter().map(|r| r.o2_fraction));
        paths.extend(t.write(&dir, "spans")?);
        Ok(paths)
    }
}

/// This stage's part of the report's methods text.
fn describe(study: &Study) -> String {
    let p = &study.protocol;
    let r = &p.reference;
    format!(
        "Each capture was assigned to the gas epoch in which it was taken (intervals closed at the start and open at the end; recorded switch times replaced the planned ones where given). Captures inside an epoch's settle window were kept but not analysed as steady state. The reference SpO2 of a capture was the median of the pulse-oximeter samples in a window of {} centred {} after the capture (the probe shows a change that long after the blood has it; samples at both ends of the window included), marked unstable when the samples in the window spanned more than {} points.",
        crate::config::duration::format_seconds(r.window_s),
        crate::config::duration::format_seconds(r.lag_s),
        r.stability_limit
    )
}
