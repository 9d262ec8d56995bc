//! The series behind the report's figures, prepared from the stages'
//! results: per-subject time courses, per-epoch changes with the
//! mixed-model estimates, agreement pairs, one segment's profile of SO2
//! along its length for the methods side by side, and sensitivity curves.

use crate::config::segments::VesselKind;
use crate::stats::summary::mean;
use crate::timeline::assign::CaptureStatus;
use std::collections::BTreeMap;

use crate::config::study::{Instrument, MethodKind, Study};
use crate::oximetry::bands::SampledBand;
use crate::oximetry::odr::segment_odr;
use crate::oximetry::pointwise::fit_position;
use crate::oximetry::sensitivity::{OperatingPoint, Unknowns, Weights, so2_errors};
use crate::stages::epochs::EpochTables;
use crate::stages::fits::{FitRow, FundusBands, multiband_model};
use crate::stages::statistics::StatisticsTables;
use crate::stages::transmissions::{PositionRow, TransmissionTables};

pub struct SpanShade {
    pub epoch: String,
    pub start_min: f64,
    pub settle_min: f64,
    pub end_min: f64,
    pub o2_fraction: f64,
}

pub struct Course {
    pub subject: String,
    pub spans: Vec<SpanShade>,
    /// (minutes, SO2 %, steady) per capture.
    pub arterioles: Vec<(f64, f64, bool)>,
    pub venules: Vec<(f64, f64, bool)>,
    /// (minutes, SpO2 %) from the log.
    pub spo2: Vec<(f64, f64)>,
}

pub struct ChangePoint {
    pub kind: &'static str,
    pub epoch: usize,
    pub value: f64,
    pub jitter: f64,
}

pub struct Estimate {
    pub kind: String,
    pub epoch: usize,
    pub estimate: f64,
    pub lower: f64,
    pub upper: f64,
}

/// One method's agreement with the reference within each group of the
/// study's `agreement_by` attribute, groups in order.
pub struct GroupAgreementPanel {
    pub method: String,
    pub attribute: String,
    /// (group, bias, lower and upper limit of agreement, subjects).
    pub groups: Vec<(String, f64, f64, f64, usize)>,
}

pub struct AgreementSeries {
    pub method: String,
    /// (SpO2, SO2) per capture.
    pub pairs: Vec<(f64, f64)>,
    /// Intercept and slope of SO2 on SpO2.
    pub line: Option<(f64, f64)>,
    pub bias: f64,
    pub lower: f64,
    pub upper: f64,
}

pub struct Series {
    pub label: String,
    pub points: Vec<(f64, f64)>,
}

pub struct AlongSegment {
    pub subject: String,
    pub capture: String,
    pub segment: String,
    pub kind: String,
    pub series: Vec<Series>,
    /// (label, SO2, SE) of the joint segment fit.
    pub joint: Option<(String, f64, f64)>,
}

/// One veil: (k, SO2 error per band, SO2 error for all bands), in points.
pub(crate) type SensitivityRow = (f64, Vec<f64>, f64);

pub struct SensitivityCurves {
    pub names: Vec<String>,
    /// Each band's response-weighted centre, nm.
    pub centres_nm: Vec<f64>,
    pub method: &'static str,
    /// Per [`Weights::ALL`], the rows for k = 0, 0.1, …, 0.9.
    pub rows: Vec<(Weights, Vec<SensitivityRow>)>,
    pub so2: f64,
    pub diameter_um: f64,
}

pub struct ReportData {
    /// The method the single-method figures show: the first joint multiband method, else the first.
    pub primary: String,
    pub baseline: String,
    pub confidence: f64,
    pub courses: Vec<Course>,
    pub epochs_after: Vec<String>,
    pub changes: Vec<ChangePoint>,
    pub estimates: Vec<Estimate>,
    pub agreement: Vec<AgreementSeries>,
    pub agreement_groups: Vec<GroupAgreementPanel>,
    pub along: Option<AlongSegment>,
    pub sensitivity: Option<SensitivityCurves>,
    /// Per joint multiband method: the fits' mean residual per band.
    pub residuals: Vec<ResidualPanel>,
    /// Per subject and session: each segment's SO2 per epoch.
    pub vessels: Vec<VesselPanel>,
    /// Per subject and session: the registration of each capture.
    pub registration: Vec<RegistrationPanel>,
}

/// One subject's (and session's) segments across the epochs.
pub struct VesselPanel {
    pub subject: String,
    /// The protocol's epochs, in order: the x axis.
    pub epochs: Vec<String>,
    /// (kind, segment, mean SO2 of the steady captures per epoch).
    pub lines: Vec<(VesselKind, String, Vec<Option<f64>>)>,
}

/// One subject's (and session's) registration over time.
pub struct RegistrationPanel {
    pub subject: String,
    /// (minutes, dx px, dy px, rotation degrees) per registered capture.
    pub points: Vec<(f64, f64, f64, f64)>,
    /// Minutes of the captures that could not be read or registered.
    pub failed: Vec<f64>,
}

/// Per subject and session, each segment's mean SO2 over the steady
/// captures of each epoch, for `method`.
fn vessel_panels(
    study: &Study,
    epochs: &EpochTables,
    fits: &[FitRow],
    method: &str,
) -> Vec<VesselPanel> {
    let c = &epochs.captures;
    let names: Vec<String> = study
        .protocol
        .epochs
        .iter()
        .map(|e| e.name.clone())
        .collect();
    // (subject, session) → (kind, segment) → epoch → values.
    type Cells<'a> = BTreeMap<(VesselKind, &'a str), Vec<Vec<f64>>>;
    let mut per: BTreeMap<(&str, &str), Cells> = BTreeMap::new();
    for r in fits.iter().filter(|r| r.method == method) {
        let cap = &c[r.capture_index];
        let (Some(v), Some(e)) = (r.so2.filter(|v| v.is_finite()), cap.epoch.as_deref()) else {
            continue;
        };
        if cap.status != CaptureStatus::Steady {
            continue;
        }
        let Some(ei) = names.iter().position(|n| n == e) else {
            continue;
        };
        per.entry((cap.subject.as_str(), cap.session.as_str()))
            .or_default()
            .entry((r.kind, r.segment.as_str()))
            .or_insert_with(|| vec![Vec::new(); names.len()])[ei]
            .push(v);
    }
    let mut out = Vec::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            let Some(cells) = per.get(&(subj.id.as_str(), sess.id.as_str())) else {
                continue;
            };
            out.push(VesselPanel {
                subject: if subj.sessions.len() > 1 {
                    format!("{} {}", subj.id, sess.id)
                } else {
                    subj.id.clone()
                },
                epochs: names.clone(),
                lines: cells
                    .iter()
                    .map(|((k, seg), v)| {
                        (
                            *k,
                            seg.to_string(),
                            v.iter().map(|x| (!x.is_empty()).then(|| mean(x))).collect(),
                        )
                    })
                    .collect(),
            });
        }
    }
    out
}

/// Per subject and session, each capture's registration against time.
fn registration_panels(
    study: &Study,
    epochs: &EpochTables,
    images: &TransmissionTables,
) -> Vec<RegistrationPanel> {
    let c = &epochs.captures;
    let mut out = Vec::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            let mut p = RegistrationPanel {
                subject: if subj.sessions.len() > 1 {
                    format!("{} {}", subj.id, sess.id)
                } else {
                    subj.id.clone()
                },
                points: Vec::new(),
                failed: Vec::new(),
            };
            for (i, row) in c
                .iter()
                .enumerate()
                .filter(|(_, r)| r.subject == subj.id && r.session == sess.id)
            {
                let Some(st) = images.status.get(i) else {
                    continue;
                };
                match &st.registration {
                    _ if st.status.failed() => p.failed.push(row.t_s / 60.0),
                    Some(g) => p.points.push((row.t_s / 60.0, g.dx, g.dy, g.angle_deg)),
                    None => {}
                }
            }
            if !p.points.is_empty() || !p.failed.is_empty() {
                out.push(p);
            }
        }
    }
    out
}

/// One method's band residuals over its fits, for the adequacy figure.
pub struct ResidualPanel {
    pub method: String,
    /// (band name, each fit's mean residual in %, misfits' residuals in %).
    pub bands: Vec<(String, Vec<f64>, Vec<f64>)>,
    pub misfits: usize,
    pub fits: usize,
}

/// The band residuals of every joint multiband method's fits.
fn residual_panels(study: &Study, fits: &[FitRow]) -> Vec<ResidualPanel> {
    use crate::oximetry::segment::Adequacy;
    let mut out = Vec::new();
    for m in &study.methods {
        let judged: Vec<&FitRow> = fits
            .iter()
            .filter(|r| r.method == m.label && r.adequacy.is_some())
            .collect();
        if judged.is_empty() {
            continue;
        }
        let mut bands: Vec<(String, Vec<f64>, Vec<f64>)> = Vec::new();
        for (b, band) in study.instrument.bands.iter().enumerate() {
            let of = |misfit: bool| -> Vec<f64> {
                judged
                    .iter()
                    .filter(|r| (r.adequacy.is_some_and(Adequacy::is_misfit)) == misfit)
                    .filter_map(|r| r.band_residuals.iter().find(|(i, _)| *i == b))
                    .map(|(_, v)| *v)
                    .collect()
            };
            let (ok, bad) = (of(false), of(true));
            if !ok.is_empty() || !bad.is_empty() {
                bands.push((band.name.clone(), ok, bad));
            }
        }
        out.push(ResidualPanel {
            method: m.label.clone(),
            misfits: judged
                .iter()
                .filter(|r| r.adequacy.is_some_and(Adequacy::is_misfit))
                .count(),
            fits: judged.len(),
            bands,
        });
    }
    out
}

/// The method single-method figures show: `report: primary:`, else the
/// first joint multiband method, else the first.
pub(crate) fn primary_method(study: &Study) -> String {
    if let Some(m) = &study.report.primary {
        return m.clone();
    }
    study
        .methods
        .iter()
        .find(|m| {
            matches!(
                m.kind,
                MethodKind::Multiband {
                    pointwise: false,
                    ..
                }
            )
        })
        .or(study.methods.first())
        .map(|m| m.label.clone())
        .unwrap_or_default()
}

pub(crate) fn prepare(
    study: &Study,
    epochs: &EpochTables,
    positions: &dyn Fn(usize) -> Vec<PositionRow>,
    fits: &[FitRow],
    stats: &StatisticsTables,
    images: &TransmissionTables,
) -> ReportData {
    let primary = primary_method(study);
    let p = &study.protocol;
    let baseline = p.epochs[p.baseline].name.clone();
    let epochs_after: Vec<String> = p
        .epochs
        .iter()
        .map(|e| e.name.clone())
        .filter(|e| *e != baseline)
        .collect();
    ReportData {
        residuals: residual_panels(study, fits),
        vessels: vessel_panels(study, epochs, fits, &primary),
        registration: registration_panels(study, epochs, images),
        courses: courses(study, epochs, fits, &primary),
        changes: changes(stats, &primary, &baseline, &epochs_after),
        estimates: stats
            .contrasts
            .iter()
            .filter(|c| c.method == primary)
            .filter_map(|c| {
                let t = &c.result.test;
                let (a, b) = t.label.split_once(" - ")?;
                let epoch = epochs_after
                    .iter()
                    .position(|e| e == a.trim())
                    .filter(|_| b.trim() == baseline)?;
                Some(Estimate {
                    kind: c.kind.clone(),
                    epoch,
                    estimate: t.estimate,
                    lower: t.lower,
                    upper: t.upper,
                })
            })
            .collect(),
        agreement: stats
            .agreement
            .iter()
            .map(|r| AgreementSeries {
                method: r.method.clone(),
                pairs: stats
                    .agreement_pairs
                    .iter()
                    .filter(|q| q.method == r.method)
                    .map(|q| (q.spo2, q.so2))
                    .collect(),
                line: r.slope.as_ref().map(|s| (s.intercept, s.test.estimate)),
                bias: r.agreement.bias,
                lower: r.agreement.lower,
                upper: r.agreement.upper,
            })
            .collect(),
        agreement_groups: group_panels(stats),
        along: along_segment(study, epochs, positions, fits, &primary, &baseline),
        sensitivity: sensitivity(study),
        primary,
        baseline,
        confidence: study.statistics.confidence,
        epochs_after,
    }
}

/// The agreement-by-group rows gathered per method, in the statistics'
/// order (methods as run, groups in the attribute's order).
fn group_panels(stats: &StatisticsTables) -> Vec<GroupAgreementPanel> {
    let mut out: Vec<GroupAgreementPanel> = Vec::new();
    for r in &stats.agreement_groups {
        let a = &r.agreement;
        let row = (r.group.clone(), a.bias, a.lower, a.upper, a.subjects);
        match out.iter_mut().find(|p| p.method == r.method) {
            Some(p) => p.groups.push(row),
            None => out.push(GroupAgreementPanel {
                method: r.method.clone(),
                attribute: r.attribute.clone(),
                groups: vec![row],
            }),
        }
    }
    out
}

fn courses(study: &Study, epochs: &EpochTables, fits: &[FitRow], method: &str) -> Vec<Course> {
    let c = &epochs.captures;
    let mut per: BTreeMap<(usize, &str), Vec<f64>> = BTreeMap::new();
    for r in fits.iter().filter(|r| r.method == method) {
        if let Some(v) = r.so2.filter(|v| v.is_finite()) {
            per.entry((
                r.capture_index,
                if r.kind == VesselKind::Arteriole {
                    "a"
                } else {
                    "v"
                },
            ))
            .or_default()
            .push(v);
        }
    }
    let mut out = Vec::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            let name = if subj.sessions.len() > 1 {
                format!("{} {}", subj.id, sess.id)
            } else {
                subj.id.clone()
            };
            let spans = epochs
                .spans
                .iter()
                .filter(|s| s.subject == subj.id && s.session == sess.id)
                .map(|s| SpanShade {
                    epoch: s.epoch.clone(),
                    start_min: s.start_s / 60.0,
                    settle_min: s.settle_end_s / 60.0,
                    end_min: s.end_s / 60.0,
                    o2_fraction: s.o2_fraction,
                })
                .collect();
            let mut course = Course {
                subject: name,
                spans,
                arterioles: vec![],
                venules: vec![],
                spo2: vec![],
            };
            for (i, row) in c
                .iter()
                .enumerate()
                .filter(|(_, r)| r.subject == subj.id && r.session == sess.id)
            {
                for (k, dst) in [("a", &mut course.arterioles), ("v", &mut course.venules)] {
                    if let Some(v) = per.get(&(i, k)) {
                        dst.push((row.t_s / 60.0, mean(v), row.status == CaptureStatus::Steady));
                    }
                }
            }
            if let Some(log) = &sess.spo2 {
                // Every 5th sample of a 1 Hz log is plenty at figure scale.
                course.spo2 = log
                    .samples
                    .iter()
                    .step_by(5)
                    .map(|(t, v)| (t / 60.0, *v))
                    .collect();
            }
            out.push(course);
        }
    }
    out
}

fn changes(
    stats: &StatisticsTables,
    method: &str,
    baseline: &str,
    after: &[String],
) -> Vec<ChangePoint> {
    let mut out = Vec::new();
    for kind in ["arteriole", "venule"] {
        let rows: Vec<_> = stats
            .summaries
            .iter()
            .filter(|s| s.method == method && s.kind == kind && s.mean.is_finite())
            .collect();
        let mut subjects: Vec<&String> = rows.iter().map(|s| &s.subject).collect();
        subjects.sort();
        subjects.dedup();
        for (si, s) in subjects.iter().enumerate() {
            let Some(base) = rows
                .iter()
                .find(|r| &r.subject == *s && r.epoch == baseline)
                .map(|r| r.mean)
            else {
                continue;
            };
            for (ei, e) in after.iter().enumerate() {
                if let Some(v) = rows
                    .iter()
                    .find(|r| &r.subject == *s && r.epoch == *e)
                    .map(|r| r.mean)
                {
                    out.push(ChangePoint {
                        kind,
                        epoch: ei,
                        value: v - base,
                        jitter: 0.16 * (si as f64 / subjects.len().max(1) as f64 - 0.5),
                    });
                }
            }
        }
    }
    out
}

/// One arteriole of the first steady baseline capture, profiled by every
/// two-band and multiband method, position by position.
fn along_segment(
    study: &Study,
    epochs: &EpochTables,
    positions: &dyn Fn(usize) -> Vec<PositionRow>,
    fits: &[FitRow],
    primary: &str,
    baseline: &str,
) -> Option<AlongSegment> {
    let c = &epochs.captures;
    let joint = fits
        .iter()
        .filter(|r| {
            r.method == primary
                && r.kind == VesselKind::Arteriole
                && r.so2.is_some()
                && c[r.capture_index].status == CaptureStatus::Steady
                && c[r.capture_index].epoch.as_deref() == Some(baseline)
        })
        .min_by_key(|r| (r.capture_index, -r.positions))?;
    let ci = joint.capture_index;
    let all = positions(ci);
    let pos: Vec<_> = all
        .iter()
        .filter(|p| {
            p.capture_index == ci
                && p.segment == joint.segment
                && p.flags.is_empty()
                && p.transmission.iter().all(|t| *t > 0.0 && t.is_finite())
        })
        .collect();
    // No positions to show (a pooled analysis has none of the sites'): no figure.
    if pos.is_empty() {
        return None;
    }
    let bands: Vec<SampledBand> = study
        .instrument
        .bands
        .iter()
        .map(|b| SampledBand::from_response(&b.response))
        .collect();
    let um = study.instrument.pixel_size_um;
    let mut series = Vec::new();
    for m in &study.methods {
        match &m.kind {
            MethodKind::TwoBand {
                sensitive,
                isosbestic,
                ..
            } => {
                // The method's calibration line for this subject, from its own segment rows.
                let subject = &c[ci].subject;
                let (x, y): (Vec<f64>, Vec<f64>) = fits
                    .iter()
                    .filter(|r| r.method == m.label && &c[r.capture_index].subject == subject)
                    .filter_map(|r| Some((r.odr?, r.so2?)))
                    .unzip();
                let Some(line) = crate::oximetry::odr::ols(&x, &y) else {
                    continue;
                };
                let points = pos
                    .iter()
                    .filter_map(|p| {
                        Some((
                            p.along_px * um,
                            line.apply(segment_odr(
                                &[p.transmission[*sensitive]],
                                &[p.transmission[*isosbestic]],
                            )?),
                        ))
                    })
                    .collect();
                series.push(Series {
                    label: format!("{} (per position)", m.label),
                    points,
                });
            }
            MethodKind::Multiband {
                bands: sel, loss, ..
            } => {
                if series
                    .iter()
                    .any(|s: &Series| s.label.starts_with("multiband model"))
                {
                    continue;
                }
                let (mut model, settings) = multiband_model(&bands, sel, *loss);
                // The same weighting as the method's fits.
                if let Some(f) = FundusBands::of(m, study, &bands) {
                    match f.spectrum(&pos) {
                        Some(s) => model = f.model(&s),
                        None => continue,
                    }
                }
                let points = pos
                    .iter()
                    .filter_map(|p| {
                        let t: Vec<f64> = sel.iter().map(|b| p.transmission[*b]).collect();
                        let f = fit_position(&model, &t, p.diameter_um, &settings);
                        f.converged.then_some((p.along_px * um, f.so2 * 100.0))
                    })
                    .collect();
                series.push(Series {
                    label: "multiband model (per position)".into(),
                    points,
                });
            }
        }
    }
    Some(AlongSegment {
        subject: c[ci].subject.clone(),
        capture: c[ci].capture.clone(),
        segment: joint.segment.clone(),
        kind: joint.kind.to_string(),
        series,
        joint: joint.so2.map(|v| {
            (
                format!("{} (joint fit)", primary),
                v,
                joint.so2_se.unwrap_or(0.0),
            )
        }),
    })
}

/// The default operating point of `satstep sensitivity`.
pub(crate) const OPERATING_POINT: OperatingPoint = OperatingPoint {
    so2: 0.95,
    diameter_um: 120.0,
    hb_g_per_l: 150.0,
    double_pass: 0.3,
};

/// Sensitivity curves for the instrument's bands `selected` (indices in
/// the instrument's order).
pub(crate) fn sensitivity_curves(
    instrument: &Instrument,
    selected: &[usize],
    op: &OperatingPoint,
    unknowns: Unknowns,
) -> Option<SensitivityCurves> {
    let bands: Vec<SampledBand> = selected
        .iter()
        .map(|b| SampledBand::from_response(&instrument.bands[*b].response))
        .collect();
    let names = selected
        .iter()
        .map(|b| instrument.bands[*b].name.clone())
        .collect();
    let centres_nm = bands.iter().map(SampledBand::centroid_nm).collect();
    let model = crate::oximetry::model::VesselModel::new(
        &bands,
        |_| 1.0,
        crate::oximetry::model::BLOOD_BACKSCATTER,
    );
    let rows = Weights::ALL
        .iter()
        .map(|w| {
            (0..=9)
                .map(|i| {
                    let k = i as f64 / 10.0;
                    so2_errors(&model, op, k, 0.01, unknowns, *w).map(|(per, all)| (k, per, all))
                })
                .collect::<Option<Vec<_>>>()
                .map(|r| (*w, r))
        })
        .collect::<Option<Vec<_>>>()?;
    Some(SensitivityCurves {
        names,
        centres_nm,
        method: unknowns.method(),
        rows,
        so2: op.so2,
        diameter_um: op.diameter_um,
    })
}

/// The instrument's sensitivity for the bands and unknowns of the report's
/// primary multiband method (all bands, segment-shared veil, without one).
fn sensitivity(study: &Study) -> Option<SensitivityCurves> {
    let primary = primary_method(study);
    let (selected, unknowns) = match study
        .methods
        .iter()
        .find(|m| m.label == primary)
        .map(|m| &m.kind)
    {
        Some(MethodKind::Multiband {
            bands, pointwise, ..
        }) => (
            bands.clone(),
            if *pointwise {
                Unknowns::VeilPerPosition
            } else {
                Unknowns::VeilShared
            },
        ),
        _ => (
            (0..study.instrument.bands.len()).collect(),
            Unknowns::VeilShared,
        ),
    };
    if selected.len() < 4 {
        return None;
    }
    sensitivity_curves(&study.instrument, &selected, &OPERATING_POINT, unknowns)
}
