//! The study loaded once: the study file, its protocol and capture lists,
//! and every file a session names (segment files, the SpO2 log, a spectra
//! table) read and checked together, with every finding kept. The stages
//! take the loaded study and never read these files again.

use std::path::Path;

use crate::config::diag::Findings;
use crate::config::duration::format_seconds;
use crate::config::segments::load_segments;
use crate::config::spo2log::read_log;
use crate::config::time::seconds_between;
use crate::timeline::assign::session_spans;

pub use crate::config::study::{Study, resolve_study_path};

/// Loads the study at `path` (a study file; see [`resolve_study_path`]).
/// `None` when any finding is an error; the findings say why.
pub(crate) fn load_study(path: &Path) -> (Option<Study>, Findings) {
    let (study, mut findings) = crate::config::study::read_study_file(path);
    let study = study.map(|mut s| {
        read_session_files(&mut s, &mut findings);
        check_capture_times(&s, &mut findings);
        s
    });
    if findings.has_errors() {
        (None, findings)
    } else {
        (study, findings)
    }
}

/// Each session's segment files and reference log, kept in the session.
fn read_session_files(study: &mut Study, findings: &mut Findings) {
    for sess in study.subjects.iter_mut().flat_map(|s| &mut s.sessions) {
        for (eye, p) in &sess.segments {
            // A missing file was reported with the study file.
            if p.is_file() {
                if let Some(segs) = load_segments(p, *eye, findings) {
                    sess.vessels.insert(*eye, segs);
                }
            }
        }
        if let Some(log) = &sess.reference {
            sess.spo2 = read_log(log, &sess.start, findings);
        }
    }
}

/// A capture outside every epoch is kept (status `outside`) but said.
fn check_capture_times(study: &Study, findings: &mut Findings) {
    for sess in study.subjects.iter().flat_map(|s| &s.sessions) {
        let spans = session_spans(&study.protocol, sess);
        let first = spans.first().map(|s| s.start_s).unwrap_or(0.0);
        let last = spans.last().map(|s| s.end_s).unwrap_or(0.0);
        for c in &sess.captures {
            let t = seconds_between(&sess.start, &c.time);
            if t < first || t >= last {
                findings
                    .warning(&c.source, Some(c.mark), format!(
                        "capture `{}` at {} is outside the protocol ({} to {} after the session start); it is kept with status `outside`",
                        c.listed,
                        c.time.to_rfc3339(),
                        format_seconds(first),
                        format_seconds(last)
                    ))
                    .hint("check the capture's time stamp and the session's `start`");
            }
        }
    }
}
