//! `satstep segments propose`: vessel segments proposed from each eye's
//! reference capture, so that a study need not start from hand-typed pixel
//! coordinates. For every eye of every session: the reference capture
//! (the eye's earliest, as the transmissions stage uses it) is read and
//! corrected as a run reads it; the band with the most vessel contrast is
//! traced ([`crate::images::vessels`]); each centre line is profiled as a
//! run profiles it, which gives its diameter and its transmissions; lines
//! that are not clean vessels of the wanted size are dropped; the rest are
//! split into arterioles and venules by their ODR
//! ([`crate::oximetry::odr::split_kinds`]). The segment file is written in
//! the study's format with each segment marked `proposed:`, with an overlay
//! image beside it to review.
//!
//! A segment file is never overwritten once edited: the file carries a
//! digest of what was proposed, and a file whose text no longer matches
//! it (or that has none, i.e. was made by hand) is replaced only with
//! `--force`.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use rayon::prelude::*;
use sha2::{Digest, Sha256};

use super::Exit;
use crate::config::eye::Eye;
use crate::config::segments::VesselKind;
use crate::config::study::{MethodKind, Study, read_study_file_with, resolve_study_path};
use crate::console::Printer;
use crate::images::correct::Corrections;
use crate::images::ingest::{Multiband, read_laid_out};
use crate::images::profile::{Neighbour, analyse_segment, median, vessel_radii};
use crate::images::vessels::{
    DetectSettings, centre_lines, length, line_response, refine, vessel_contrast,
};
use crate::oximetry::odr::split_kinds;
use crate::stages::report::qc::{ProposedLine, proposal_overlay};
use crate::stages::transmissions::{nearest_band, profile_settings, width_band};
use crate::tables::write_bytes_atomic;

/// What to propose and where.
#[derive(Debug, Clone)]
pub struct ProposeArgs {
    pub study: PathBuf,
    /// `EYE`, `SUBJECT/EYE` or `SUBJECT/SESSION/EYE`; every eye when empty.
    pub eyes: Vec<String>,
    pub force: bool,
    pub min_diameter_um: f64,
    pub max_diameter_um: f64,
    pub min_length_um: f64,
    /// Optic-disc centre in the reference capture, px.
    pub disc: Option<(f64, f64)>,
    /// Keep only what lies between these distances from the disc centre, µm.
    pub ring_um: Option<(f64, f64)>,
}

/// The line before the body of a proposed segment file; the digest is
/// SHA-256 of everything after this line.
const DIGEST_TAG: &str = "# proposal-digest: ";

/// A kind this probable or less is drawn and reported as unsure.
const SURE: f64 = 0.9;

/// A centre line kept after profiling it.
struct Candidate {
    points: Vec<(f64, f64)>,
    diameter_um: f64,
    odr: f64,
}

/// One eye's proposal, or why there is none.
struct EyeOutcome {
    label: String,
    file: PathBuf,
    result: Result<Proposal, String>,
}

struct Proposal {
    band: String,
    reference: String,
    arterioles: usize,
    venules: usize,
    unsure: usize,
    dropped: usize,
    /// Why each dropped line was dropped, for `--verbose`.
    reasons: Vec<String>,
    overlay: PathBuf,
}

pub fn propose(args: &ProposeArgs, printer: &Printer) -> Result<Exit> {
    let path = resolve_study_path(&args.study);
    let (study, findings) = read_study_file_with(&path, true);
    printer.findings(&findings);
    let Some(study) = study.filter(|_| !findings.has_errors()) else {
        printer.error(format!(
            "`{}` has {} errors; no segments were proposed",
            path.display(),
            findings.error_count()
        ));
        return Ok(Exit::Problem);
    };
    if !(args.min_diameter_um > 0.0 && args.max_diameter_um > args.min_diameter_um) {
        printer.error("`--min-diameter` must be positive and below `--max-diameter`");
        return Ok(Exit::Problem);
    }
    if args.ring_um.is_some() && args.disc.is_none() {
        printer
            .error("`--ring` needs `--disc X,Y`, the optic-disc centre in the reference capture");
        return Ok(Exit::Problem);
    }
    let mut eyes = Vec::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            for eye in &sess.eyes {
                let label = format!("{}/{}/{}", subj.id, sess.id, eye.as_str());
                if !args.eyes.is_empty() && !args.eyes.iter().any(|f| selects(f, &label)) {
                    continue;
                }
                let file = sess.segments.get(eye).cloned().unwrap_or_else(|| {
                    study.root.join("segments").join(format!(
                        "{}-{}-{}.yaml",
                        subj.id,
                        sess.id,
                        eye.as_str()
                    ))
                });
                let reference = sess
                    .captures
                    .iter()
                    .filter(|c| c.eye == *eye)
                    .min_by_key(|c| c.time)
                    .map(|c| (c.path.clone(), c.listed.clone()));
                eyes.push((
                    label,
                    *eye,
                    file,
                    reference,
                    !sess.segments.contains_key(eye),
                ));
            }
        }
    }
    if eyes.is_empty() {
        printer.error(format!(
            "no eye of the study matches {}",
            args.eyes.join(", ")
        ));
        return Ok(Exit::Problem);
    }
    let outcomes: Vec<(EyeOutcome, bool)> = eyes
        .par_iter()
        .map(|(label, eye, file, reference, unnamed)| {
            let result = match reference {
                None => Err("the session lists no capture of this eye".to_string()),
                Some((p, listed)) => propose_eye(&study, args, *eye, file, p, listed),
            };
            (
                EyeOutcome {
                    label: label.clone(),
                    file: file.clone(),
                    result,
                },
                *unnamed,
            )
        })
        .collect();
    let mut exit = Exit::Ok;
    for (o, unnamed) in outcomes {
        let rel = o.file.strip_prefix(&study.root).unwrap_or(&o.file);
        match o.result {
            Ok(p) => {
                printer.info(format!(
                    "{}: {} segments proposed ({} arterioles, {} venules; {} of unsure kind; {} candidate lines dropped) from `{}` in band {} → `{}`, review on `{}`",
                    o.label,
                    p.arterioles + p.venules,
                    p.arterioles,
                    p.venules,
                    p.unsure,
                    p.dropped,
                    p.reference,
                    p.band,
                    rel.display(),
                    p.overlay.strip_prefix(&study.root).unwrap_or(&p.overlay).display()
                ));
                for r in &p.reasons {
                    printer.verbose(format!("{}: dropped: {r}", o.label));
                }
                if unnamed {
                    let (subject, rest) = o.label.split_once('/').unwrap_or((&o.label, ""));
                    let (session, eye) = rest.split_once('/').unwrap_or(("", rest));
                    printer.warn(format!(
                        "session `{session}` of `{subject}` names no segment file for {eye}: add `segments: {{{eye}: {}}}` to it in `{}`",
                        rel.display(),
                        path.display()
                    ));
                }
            }
            Err(why) => {
                printer.error(format!("{}: no segments proposed: {why}", o.label));
                exit = Exit::Problem;
            }
        }
    }
    Ok(exit)
}

/// Whether a `--eye` filter (`EYE`, `SUBJECT/EYE`, `SUBJECT/SESSION/EYE`)
/// selects the eye `subject/session/eye`.
fn selects(filter: &str, label: &str) -> bool {
    let f: Vec<&str> = filter.split('/').collect();
    let l: Vec<&str> = label.split('/').collect();
    match f.as_slice() {
        [eye] => *eye == l[2] || *eye == l[0],
        [subject, eye] => *subject == l[0] && *eye == l[2],
        [subject, session, eye] => *subject == l[0] && *session == l[1] && *eye == l[2],
        _ => false,
    }
}

fn propose_eye(
    study: &Study,
    args: &ProposeArgs,
    eye: Eye,
    file: &Path,
    capture: &Path,
    listed: &str,
) -> Result<Proposal, String> {
    if let Some(why) = edited(file) {
        if !args.force {
            return Err(format!(
                "`{}` {why}; it is kept (`--force` replaces it)",
                file.display()
            ));
        }
    }
    let inst = &study.instrument;
    let nb = inst.bands.len();
    let wb = width_band(study);
    let mut img: Multiband =
        read_laid_out(capture, &inst.layout, nb, None).map_err(|e| e.to_string())?;
    Corrections::load(inst, wb)
        .map_err(|e| format!("calibration frames: {e}"))?
        .apply(&mut img)
        .map_err(|e| e.to_string())?;
    let px = inst.pixel_size_um;
    let settings = DetectSettings {
        min_diameter_px: args.min_diameter_um / px,
        max_diameter_px: args.max_diameter_um / px,
        min_length_px: args.min_length_um / px,
        min_contrast: 0.03,
    };
    // The band that shows the vessels best (ties: the first).
    let band = (0..nb)
        .map(|b| {
            (
                b,
                vessel_contrast(&img.bands[b], img.width, img.height, &settings),
            )
        })
        .fold(
            (0, f64::NEG_INFINITY),
            |a, (b, v)| if v > a.1 { (b, v) } else { a },
        )
        .0;
    let map = line_response(&img.bands[band], img.width, img.height, &settings);
    let mut lines: Vec<Vec<(f64, f64)>> = centre_lines(&map, &settings)
        .into_iter()
        .map(|c| c.points)
        .collect();
    if let (Some(disc), Some((inner, outer))) = (args.disc, args.ring_um) {
        lines = lines
            .iter()
            .flat_map(|l| within_ring(l, disc, inner / px, outer / px))
            .filter(|l| length(l) >= settings.min_length_px)
            .collect();
    }
    // Each line profiled as a run profiles it, with the others as
    // neighbours; its diameter and its ODR from the unflagged positions.
    let (sens, iso) = study
        .methods
        .iter()
        .find_map(|m| match m.kind {
            MethodKind::TwoBand {
                sensitive,
                isosbestic,
                ..
            } => Some((sensitive, isosbestic)),
            _ => None,
        })
        .unwrap_or_else(|| (nearest_band(study, 600.0), nearest_band(study, 570.0)));
    let ps = profile_settings(study);
    // Each traced line moved onto the centre the profiles find, then
    // profiled again as a run profiles it.
    let mut reasons = Vec::new();
    let mut refined = Vec::new();
    for (i, line) in lines.iter().enumerate() {
        // Radii unknown yet: neighbours only flag the positions they cross.
        let others = Neighbour::all_but(&lines, &[], i);
        match refine(&img, line, &others, wb, &ps) {
            Some(r) if length(&r) >= settings.min_length_px => refined.push(r),
            _ => reasons.push(format!(
                "the line from ({:.0}, {:.0}) has too few usable profiles",
                line[0].0, line[0].1
            )),
        }
    }
    // Once more, with the neighbours where the first pass put them: a
    // line that stopped beside a neighbour's traced end now sees it.
    let lines: Vec<Vec<(f64, f64)>> = (0..refined.len())
        .filter_map(|i| {
            let others = Neighbour::all_but(&refined, &[], i);
            refine(&img, &refined[i], &others, wb, &ps)
                .filter(|r| length(r) >= settings.min_length_px)
                .or_else(|| Some(refined[i].clone()))
        })
        .collect();
    let mut kept = Vec::new();
    // Judged as the transmissions stage will analyse them: each line's
    // neighbours kept out of its background.
    let radii = vessel_radii(&img, &lines, wb, &ps);
    for (i, line) in lines.iter().enumerate() {
        let others = Neighbour::all_but(&lines, &radii, i);
        let prof = analyse_segment(&img, line, &others, wb, &ps);
        let good: Vec<_> = prof.iter().filter(|p| p.flags.is_empty()).collect();
        let start = line[0];
        if good.len() < 3 || 4 * good.len() < prof.len() {
            reasons.push(format!(
                "the line from ({:.0}, {:.0}) has {} usable profile positions of {}",
                start.0,
                start.1,
                good.len(),
                prof.len()
            ));
            continue;
        }
        let diameter_um = median(good.iter().map(|p| p.diameter_px * px).collect());
        let od = |b: usize| -median(good.iter().map(|p| p.transmission[b]).collect()).ln();
        let (od_s, od_i) = (od(sens), od(iso));
        if !(diameter_um >= args.min_diameter_um && diameter_um <= args.max_diameter_um) {
            reasons.push(format!(
                "the line from ({:.0}, {:.0}) is {diameter_um:.0} µm wide",
                start.0, start.1
            ));
            continue;
        }
        if !(od_i > 0.005 && od_s.is_finite()) {
            reasons.push(format!(
                "the line from ({:.0}, {:.0}) has an optical density of {od_i:.3} in {}",
                start.0, start.1, inst.bands[iso].name
            ));
            continue;
        }
        kept.push(Candidate {
            points: line.clone(),
            diameter_um,
            odr: od_s / od_i,
        });
    }
    let kinds = split_kinds(&kept.iter().map(|c| c.odr).collect::<Vec<_>>());
    // Ids by kind, in the order the lines were traced.
    let (mut na, mut nv) = (0, 0);
    let ids: Vec<String> = kinds
        .iter()
        .map(|(k, _)| match k {
            VesselKind::Arteriole => {
                na += 1;
                format!("A{na}")
            }
            VesselKind::Venule => {
                nv += 1;
                format!("V{nv}")
            }
        })
        .collect();
    let band_name = &inst.bands[band].name;
    let overlay = file.with_extension("png");
    let header = format!(
        "# Vessel segments proposed by `satstep segments propose` from capture `{listed}`,\n\
         # traced in band {band_name}; centred on band {}, which a run profiles;\n\
         # kinds from the ODR of {} over {}.\n\
         # Review every segment on `{}` before analysing: correct centre lines\n\
         # and kinds, delete what is not a clean single vessel, and delete the\n\
         # `proposed:` line of each segment you have checked. Research use only.\n",
        inst.bands[wb].name,
        inst.bands[sens].name,
        inst.bands[iso].name,
        overlay.file_name().unwrap_or_default().to_string_lossy()
    );
    let mut body = format!("eye: {}\nsegments:\n", eye.as_str());
    if kept.is_empty() {
        body = format!("eye: {}\nsegments: []\n", eye.as_str());
    }
    for ((c, (kind, p)), id) in kept.iter().zip(&kinds).zip(&ids) {
        let pts: Vec<String> = c
            .points
            .iter()
            .map(|(x, y)| format!("[{x:.2}, {y:.2}]"))
            .collect();
        let _ = write!(
            body,
            "  - id: {id}\n    kind: {kind}\n    points: [{}]\n    proposed: {{kind_confidence: {p:.3}, diameter_um: {:.1}, odr: {:.4}}}\n",
            pts.join(", "),
            c.diameter_um,
            c.odr
        );
    }
    let digest = hex(&Sha256::digest(body.as_bytes()));
    let text = format!("{header}{DIGEST_TAG}{digest}\n{body}");
    if let Some(dir) = file.parent() {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("cannot create `{}`", dir.display()))
            .map_err(|e| format!("{e:#}"))?;
    }
    write_bytes_atomic(file, text.as_bytes()).map_err(|e| e.to_string())?;
    let drawn: Vec<ProposedLine> = kept
        .iter()
        .zip(&kinds)
        .zip(&ids)
        .map(|((c, (kind, p)), id)| ProposedLine {
            id,
            kind: *kind,
            points: &c.points,
            unsure: *p <= SURE,
        })
        .collect();
    let caption = format!(
        "Proposed segments: `{listed}`, band {band_name} ({} segments)",
        kept.len()
    );
    let png = proposal_overlay(&img.bands[band], img.width, img.height, &caption, &drawn)
        .map_err(|e| format!("the overlay image: {e}"))?;
    write_bytes_atomic(&overlay, &png).map_err(|e| e.to_string())?;
    Ok(Proposal {
        band: band_name.clone(),
        reference: listed.to_string(),
        arterioles: na,
        venules: nv,
        unsure: kinds.iter().filter(|k| k.1 <= SURE).count(),
        dropped: reasons.len(),
        reasons,
        overlay,
    })
}

/// Why an existing segment file must not be replaced, or `None` when it
/// does not exist or is a proposal nobody has changed.
fn edited(file: &Path) -> Option<&'static str> {
    let text = std::fs::read_to_string(file).ok()?;
    let Some(at) = text.find(DIGEST_TAG) else {
        return Some("exists and was not proposed by satstep");
    };
    let rest = &text[at + DIGEST_TAG.len()..];
    let (digest, body) = rest.split_once('\n').unwrap_or((rest, ""));
    if digest.trim() == hex(&Sha256::digest(body.as_bytes())) {
        None
    } else {
        Some("was edited after it was proposed")
    }
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// The pieces of a polyline between `inner` and `outer` px from `disc`,
/// cut at 0.5 px resolution.
fn within_ring(l: &[(f64, f64)], disc: (f64, f64), inner: f64, outer: f64) -> Vec<Vec<(f64, f64)>> {
    let inside = |p: (f64, f64)| {
        let r = ((p.0 - disc.0).powi(2) + (p.1 - disc.1).powi(2)).sqrt();
        r >= inner && r <= outer
    };
    let mut pieces: Vec<Vec<(f64, f64)>> = Vec::new();
    let mut open = false;
    for w in l.windows(2) {
        let n = (length(w) / 0.5).ceil().max(1.0) as usize;
        for k in 0..n {
            let f = k as f64 / n as f64;
            let p = (
                w[0].0 + f * (w[1].0 - w[0].0),
                w[0].1 + f * (w[1].1 - w[0].1),
            );
            if inside(p) {
                if !open {
                    pieces.push(Vec::new());
                    open = true;
                }
                pieces.last_mut().expect("opened").push(p);
            } else {
                open = false;
            }
        }
    }
    if let Some(&last) = l.last() {
        if inside(last) && open {
            pieces.last_mut().expect("open").push(last);
        }
    }
    pieces.retain(|p| p.len() >= 2);
    pieces
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eye_filters_name_an_eye_a_subject_or_both() {
        assert!(selects("OD", "V01/s1/OD"));
        assert!(!selects("OS", "V01/s1/OD"));
        assert!(selects("V01", "V01/s1/OD"));
        assert!(selects("V01/OD", "V01/s1/OD"));
        assert!(!selects("V02/OD", "V01/s1/OD"));
        assert!(selects("V01/s1/OD", "V01/s1/OD"));
        assert!(!selects("V01/s2/OD", "V01/s1/OD"));
    }

    #[test]
    fn a_ring_keeps_the_part_of_a_line_inside_it() {
        let l = [(0.0, 0.0), (100.0, 0.0)];
        let p = within_ring(&l, (0.0, 0.0), 20.0, 60.0);
        assert_eq!(p.len(), 1);
        assert!((p[0][0].0 - 20.0).abs() <= 0.5, "{:?}", p[0][0]);
        assert!((p[0].last().unwrap().0 - 60.0).abs() <= 0.5);
    }
}
