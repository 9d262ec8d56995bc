//! The image stage over a study: every analysed capture is read, registered
//! to its eye's reference capture (the eye's earliest capture), its
//! vessel segments are mapped into it and profiled. A capture that cannot
//! be read or registered keeps its row with the reason; the others go on.

use std::collections::BTreeMap;
use std::path::Path;

use anyhow::Result;
use rayon::prelude::*;

use crate::config::diag::Findings;
use crate::config::segments::{load_segments, Segment};
use crate::config::study::{BandResponse, Study};
use crate::images::ingest::{read_capture, Multiband};
use crate::images::profile::{analyse_segment, ProfileSettings};
use crate::images::register::{register, Registration};
use crate::run::epochs::EpochTables;
use crate::tables::Table;

/// Lowest match score at which a capture counts as registered.
pub const MIN_REGISTRATION_SCORE: f64 = 0.8;

#[derive(Debug, Clone)]
pub struct PositionRow {
    pub capture_index: usize,
    pub segment: String,
    pub kind: &'static str,
    pub position: usize,
    pub along_px: f64,
    pub diameter_um: f64,
    pub flags: String,
    pub transmission: Vec<f64>,
}

#[derive(Debug, Clone)]
pub struct ImageStatus {
    pub status: String,
    pub message: Option<String>,
    pub registration: Option<Registration>,
}

pub struct ImageTables {
    pub positions: Vec<PositionRow>,
    /// One per capture row of the epoch table.
    pub status: Vec<ImageStatus>,
}

/// The band used for registration and widths: the one nearest 570 nm
/// (isosbestic, good vessel contrast in every vessel).
pub fn width_band(study: &Study) -> usize {
    let centre = |r: &BandResponse| match r {
        BandResponse::Gaussian { centre_nm, .. } => *centre_nm,
        BandResponse::Table { points, .. } => points.iter().map(|p| p.0 * p.1).sum::<f64>() / points.iter().map(|p| p.1).sum::<f64>(),
    };
    (0..study.instrument.bands.len()).min_by(|a, b| (centre(&study.instrument.bands[*a].response) - 570.0).abs().total_cmp(&(centre(&study.instrument.bands[*b].response) - 570.0).abs())).unwrap_or(0)
}

pub fn build(study: &Study, epochs: &EpochTables) -> ImageTables {
    let nb = study.instrument.bands.len();
    let wb = width_band(study);
    let settings = ProfileSettings { half_length_px: (220.0 / study.instrument.pixel_size_um).max(8.0) + 4.0, ..ProfileSettings::default() };
    // Capture files and segment lists per (subject, session, eye).
    let mut files: Vec<std::path::PathBuf> = Vec::with_capacity(epochs.captures.len());
    let mut groups: BTreeMap<(String, String, String), Vec<usize>> = BTreeMap::new();
    let mut segments: BTreeMap<(String, String, String), Vec<Segment>> = BTreeMap::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            for (eye, p) in &sess.segments {
                let segs = load_segments(p, *eye, &mut Findings::new()).unwrap_or_default();
                segments.insert((subj.id.clone(), sess.id.clone(), eye.as_str().to_string()), segs);
            }
        }
    }
    for (i, row) in epochs.captures.iter().enumerate() {
        let sess = study.subjects.iter().find(|s| s.id == row.subject).and_then(|s| s.sessions.iter().find(|x| x.id == row.session));
        let path = sess.and_then(|s| s.captures.iter().find(|c| c.listed == row.capture)).map(|c| c.path.clone()).unwrap_or_default();
        files.push(path);
        groups.entry((row.subject.clone(), row.session.clone(), row.eye.clone())).or_default().push(i);
    }
    let mut status: Vec<ImageStatus> = (0..epochs.captures.len()).map(|_| ImageStatus { status: "not-analysed".into(), message: None, registration: None }).collect();
    let mut positions = Vec::new();
    for (key, idx) in &groups {
        let segs = segments.get(key).cloned().unwrap_or_default();
        let analysed: Vec<usize> = idx.iter().copied().filter(|i| matches!(epochs.captures[*i].status.as_str(), "steady" | "settling")).collect();
        for i in idx {
            if !analysed.contains(i) {
                status[*i].message = Some(format!("status `{}`", epochs.captures[*i].status));
            }
        }
        // The eye's reference capture: its earliest listed capture.
        let Some(&ref_i) = idx.first() else { continue };
        let reference = match read_capture(&files[ref_i], nb, None) {
            Ok(r) => r,
            Err(e) => {
                for i in &analysed {
                    status[*i] = ImageStatus { status: "error".into(), message: Some(format!("reference capture: {e}")), registration: None };
                }
                continue;
            }
        };
        let results: Vec<(usize, ImageStatus, Vec<PositionRow>)> = analysed
            .par_iter()
            .map(|&i| {
                let (st, rows) = analyse_capture(i, i == ref_i, &files[i], &reference, &segs, nb, wb, &settings, study.instrument.pixel_size_um);
                (i, st, rows)
            })
            .collect();
        for (i, st, rows) in results {
            status[i] = st;
            positions.extend(rows);
        }
    }
    ImageTables { positions, status }
}

#[allow(clippy::too_many_arguments)]
fn analyse_capture(i: usize, is_reference: bool, file: &Path, reference: &Multiband, segs: &[Segment], nb: usize, wb: usize, st: &ProfileSettings, px_um: f64) -> (ImageStatus, Vec<PositionRow>) {
    let img = match read_capture(file, nb, Some((reference.width, reference.height))) {
        Ok(m) => m,
        Err(e) => return (ImageStatus { status: "error".into(), message: Some(e.to_string()), registration: None }, vec![]),
    };
    // The reference capture defines the eye's coordinates: identity.
    let reg = if is_reference {
        Registration { dx: 0.0, dy: 0.0, angle_deg: 0.0, score: 1.0 }
    } else {
        register(&reference.bands[wb], &img.bands[wb], img.width, img.height, 2.0)
    };
    if reg.score < MIN_REGISTRATION_SCORE {
        let msg = format!("match score {:.3} below {MIN_REGISTRATION_SCORE}", reg.score);
        return (ImageStatus { status: "not-registered".into(), message: Some(msg), registration: Some(reg) }, vec![]);
    }
    let (cx, cy) = (img.width as f64 / 2.0, img.height as f64 / 2.0);
    let lines: Vec<Vec<(f64, f64)>> = segs.iter().map(|s| s.points.iter().map(|p| reg.apply(*p, cx, cy)).collect()).collect();
    let mut rows = Vec::new();
    for (k, seg) in segs.iter().enumerate() {
        let others: Vec<Vec<(f64, f64)>> = lines.iter().enumerate().filter(|(j, _)| *j != k).map(|(_, l)| l.clone()).collect();
        for r in analyse_segment(&img, &lines[k], &others, wb, st) {
            rows.push(PositionRow {
                capture_index: i,
                segment: seg.id.clone(),
                kind: seg.kind.as_str(),
                position: r.position,
                along_px: r.along_px,
                diameter_um: r.diameter_px * px_um,
                flags: r.flags.iter().map(|f| f.as_str()).collect::<Vec<_>>().join(";"),
                transmission: r.transmission,
            });
        }
    }
    (ImageStatus { status: "ok".into(), message: None, registration: Some(reg) }, rows)
}

impl ImageTables {
    pub fn write(&self, out: &Path, study: &Study, epochs: &EpochTables) -> Result<()> {
        let dir = out.join("transmissions");
        let c = &epochs.captures;
        let p = &self.positions;
        let mut t = Table::new();
        t.text("subject", p.iter().map(|r| &c[r.capture_index].subject))
            .text("session", p.iter().map(|r| &c[r.capture_index].session))
            .text("eye", p.iter().map(|r| &c[r.capture_index].eye))
            .text("capture", p.iter().map(|r| &c[r.capture_index].capture))
            .text("segment", p.iter().map(|r| &r.segment))
            .text("kind", p.iter().map(|r| r.kind))
            .int("position", p.iter().map(|r| r.position as i64))
            .real("along_px", p.iter().map(|r| r.along_px))
            .real("diameter_um", p.iter().map(|r| r.diameter_um))
            .text("flags", p.iter().map(|r| &r.flags));
        for (b, band) in study.instrument.bands.iter().enumerate() {
            t.real(&format!("t_{}", band.name), p.iter().map(|r| r.transmission[b]));
        }
        t.write(&dir, "positions")?;
        let s = &self.status;
        let mut t = Table::new();
        t.text("subject", c.iter().map(|r| &r.subject))
            .text("session", c.iter().map(|r| &r.session))
            .text("eye", c.iter().map(|r| &r.eye))
            .text("capture", c.iter().map(|r| &r.capture))
            .text("image_status", s.iter().map(|r| &r.status))
            .opt_text("message", s.iter().map(|r| r.message.clone()))
            .opt_real("dx_px", s.iter().map(|r| r.registration.map(|g| g.dx)))
            .opt_real("dy_px", s.iter().map(|r| r.registration.map(|g| g.dy)))
            .opt_real("angle_deg", s.iter().map(|r| r.registration.map(|g| g.angle_deg)))
            .opt_real("match_score", s.iter().map(|r| r.registration.map(|g| g.score)));
        t.write(&dir, "captures")?;
        Ok(())
    }
}
