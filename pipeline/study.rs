//! The study loaded once: the study file, its protocol and capture lists,
//! and every file a session names (segment files, the SpO2 log, a spectra
//! table) read and checked together, with every finding kept. The stages
//! take the loaded study and never read these files again.

use std::path::Path;

use crate::config::diag::Findings;
use crate::config::duration::format_seconds;
use crate::config::segments::load_segments;
use crate::config::spo2log::read_log;
use crate::config::study::SensorLayout;
use crate::config::time::seconds_between;
use crate::timeline::assign::session_spans;

pub use crate::config::study::{Study, resolve_study_path};

/// Loads the study at `path` (a study file; see [`resolve_study_path`]).
/// `None` when any finding is an error; the findings say why.
pub fn load_study(path: &Path) -> (Option<Study>, Findings) {
    let (study, mut findings) = crate::config::study::read_study_file(path);
    let study = study.map(|mut s| {
        check_paths_are_text(&s, &mut findings);
        read_session_files(&mut s, &mut findings);
        check_capture_times(&s, &mut findings);
        check_model_support(&s, &mut findings);
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
    let (layout, bands) = (
        study.instrument.layout.clone(),
        study.instrument.bands.len(),
    );
    for sess in study.subjects.iter_mut().flat_map(|s| &mut s.sessions) {
        for (eye, p) in &sess.segments {
            // A missing file was reported with the study file.
            if p.is_file() {
                let image = sess
                    .captures
                    .iter()
                    .find(|c| c.eye == *eye)
                    .and_then(|c| capture_size(&c.path, &layout, bands));
                if let Some(segs) = load_segments(p, *eye, image, findings) {
                    sess.vessels.insert(*eye, segs);
                }
            }
        }
        if let Some(log) = &sess.reference {
            sess.spo2 = read_log(log, &sess.start, findings);
        }
    }
}

/// Every path the study names must be text (UTF-8): it enters the cache
/// keys, the manifest and the report as text.
fn check_paths_are_text(study: &Study, findings: &mut Findings) {
    let mut paths: Vec<&Path> = vec![&study.root, &study.output];
    for sess in study.subjects.iter().flat_map(|s| &s.sessions) {
        paths.extend(sess.captures.iter().map(|c| c.path.as_path()));
        paths.extend(sess.segments.values().map(|p| p.as_path()));
        paths.extend(sess.reference.iter().map(|r| r.path.as_path()));
    }
    if let Some(p) = paths.into_iter().find(|p| p.to_str().is_none()) {
        findings
            .error(
                &study.file,
                None,
                format!("the path `{}` is not valid UTF-8 text", p.to_string_lossy()),
            )
            .hint("rename the folder or file so that its name is UTF-8 text");
    }
}

/// Width and height of a capture's bands in pixels (a tile's, for a tiled
/// layout), from its TIFF header alone; `None` when it cannot be read (the
/// transmissions stage says why).
fn capture_size(p: &Path, layout: &SensorLayout, bands: usize) -> Option<(f64, f64)> {
    let f = std::fs::File::open(p).ok()?;
    let (w, h) = tiff::decoder::Decoder::new(std::io::BufReader::new(f))
        .ok()?
        .dimensions()
        .ok()?;
    match layout.rectangles(bands, w as usize, h as usize) {
        None => Some((w as f64, h as f64)),
        Some(Ok(r)) => Some((r[0][2] as f64, r[0][3] as f64)),
        Some(Err(_)) => None,
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

/// Refuses a multiband method's extensions when its bands cannot separate
/// them from SO2 ([`crate::oximetry::sensitivity::support`]).
fn check_model_support(study: &Study, findings: &mut Findings) {
    use crate::config::study::MethodKind;
    use crate::config::vessel_model::{Extensions, ModelChoice};
    use crate::oximetry::sensitivity::{SUPPORT_MAX_INFLATION, support};
    for m in &study.methods {
        let MethodKind::Multiband {
            bands,
            model: ModelChoice::Fixed(e),
            model_mark,
            ..
        } = &m.kind
        else {
            continue;
        };
        if *e == Extensions::BASE {
            continue;
        }
        let sampled: Vec<crate::oximetry::bands::SampledBand> = bands
            .iter()
            .map(|b| {
                crate::oximetry::bands::SampledBand::from_response(
                    &study.instrument.bands[*b].response,
                )
            })
            .collect();
        let s = support(&crate::oximetry::model::VesselModel::new(
            &sampled,
            |_| 1.0,
            crate::oximetry::model::BLOOD_BACKSCATTER,
        ));
        let Some(mine) = s
            .iter()
            .find(|x| x.extensions == *e)
            .filter(|x| !x.supported)
        else {
            continue;
        };
        let ok: Vec<String> = s
            .iter()
            .filter(|x| x.supported && x.extensions != Extensions::BASE)
            .map(|x| format!("`{}`", x.extensions.name()))
            .collect();
        findings
            .error(
                &study.file,
                *model_mark,
                format!(
                    "method `{}`: these {} bands cannot separate `{}` from SO2: it would multiply the SO2 standard error by {:.1} (at most {SUPPORT_MAX_INFLATION} is accepted)",
                    m.label,
                    bands.len(),
                    e.name(),
                    mine.inflation,
                ),
            )
            .hint(if ok.is_empty() {
                "use `model: base`, or more bands; `satstep sensitivity STUDY` lists what the bands support".to_string()
            } else {
                format!(
                    "these bands support {} (or `auto`); `satstep sensitivity STUDY` lists them",
                    ok.join(", ")
                )
            });
    }
}
