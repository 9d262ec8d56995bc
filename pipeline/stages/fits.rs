//! The fit stage: for every capture and vessel segment, the study's
//! methods turn the unflagged positions' transmissions into SO2. Two-band
//! calibrations that need the cohort (two reference points, regression)
//! are made after all segment ODRs are known.

use crate::stats::summary::mean;
use crate::timeline::assign::CaptureStatus;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;
use rayon::prelude::*;

use super::epochs::{EpochTables, Epochs};
use super::stage::{Run, Stage};
use super::transmissions::{PositionRow, TransmissionTables, Transmissions};
use crate::config::segments::VesselKind;
use crate::config::study::{Calibration, Loss, Method, MethodKind, Study, Weighting};
use crate::config::vessel_model::ModelChoice;
use crate::fit::Termination;
use crate::images::profile::median;
use crate::oximetry::bands::SampledBand;
use crate::oximetry::fundus::FundusSpectrum;
use crate::oximetry::model::{BLOOD_BACKSCATTER, Extensions, VesselModel};
use crate::oximetry::odr::{
    Calibrated, Linear, diameter_corrected, inverse_calibration, leave_one_subject_out,
    segment_odr, two_point, two_point_slope_se, within_group_slope,
};
use crate::oximetry::pointwise::fit_pointwise;
use crate::oximetry::segment::{
    ADEQUACY_FALSE_ALARM, Adequacy, Candidate, EyeFit, FitSettings, MISFIT_MIN_RESIDUAL,
    RobustLoss, SegmentFit, SegmentFitError, SegmentSpectra, base_describes_eye, choose_across,
    choose_for_eye, eye_misfits, fit_candidates, fit_segment,
};
use crate::oximetry::sensitivity::supported_models;
use crate::runner::key::{Key, KeyBuilder};
use crate::runner::{Items, Runner};
use crate::tables::Table;

/// Wavelengths (nm) between which a fundus's reflectance rises: melanin
/// absorbs less towards the red and the choroid's blood much less beyond
/// about 590 nm, so a fundus is brighter at 610 than at 560 nm in every eye
/// (a fact of the trade).
pub(crate) const RISE_NM: (f64, f64) = (560.0, 610.0);

/// One warning per method that weights its bands by the fundus and reads
/// the fundus as falling from 560 to 610 nm in most segment fits (median
/// [`FitRow::fundus_rise`] below 1): the stated band gains are then wrong,
/// most likely given as their inverses, and the weighting they drive with
/// them.
pub(crate) fn gain_warnings(rows: &[FitRow], study: &Study) -> Vec<String> {
    let mut out = Vec::new();
    for m in &study.methods {
        let rises: Vec<f64> = rows
            .iter()
            .filter(|r| r.method == m.label)
            .filter_map(|r| r.fundus_rise)
            .collect();
        if rises.is_empty() {
            continue;
        }
        let n = rises.len();
        let mid = median(rises);
        if mid < 1.0 {
            out.push(format!(
                "`{}`: through the bands' stated `gain`s the fundus behind the vessels reads {mid:.2} times as bright at {} nm as at {} nm (median over {n} segment fits), where a fundus is brighter towards the red; the gains are likely wrong (each is a white target's signal in the band relative to the others, not its inverse), and so is the weighting of the bands by the fundus: check them, or give the method `weighting: response`",
                m.label, RISE_NM.1, RISE_NM.0
            ));
        }
    }
    out
}

/// One warning per `model: auto` method with eyes whose segments could not
/// tell models apart ([`FitRow::tied_models`]): the eyes, the model
/// fitted in each and the models tied with it.
pub(crate) fn tie_warnings(rows: &[FitRow], epochs: &EpochTables, study: &Study) -> Vec<String> {
    let mut out = Vec::new();
    for m in &study.methods {
        let eyes = by_eye(rows, epochs, |r| {
            r.method == m.label && r.tied_models.is_some() && r.model.is_some()
        });
        if eyes.is_empty() {
            continue;
        }
        // Every fit of an eye names the same models: its first says.
        let list: Vec<String> = eyes
            .iter()
            .map(|((subject, session, eye), members)| {
                let r = &rows[members[0]];
                let model = r.model.as_deref().unwrap_or_default();
                let others: Vec<String> = r
                    .tied_models
                    .as_deref()
                    .unwrap_or_default()
                    .split(", ")
                    .filter(|n| *n != model)
                    .map(|n| format!("`{n}`"))
                    .collect();
                format!(
                    "{subject} {session} {eye}: `{model}`, {} alike",
                    others.join(", ")
                )
            })
            .collect();
        out.push(format!(
            "`{}`: in {} eye(s) the segments could not tell the vessel model chosen from others, though the information criterion summed over all fits preferred it ({}). Its SO2 may be off by the difference between them, which these bands do not resolve; the SE includes that difference, and `tied_models` in `fits/so2` names them. On simulated studies, three bands added below 500 nm let the segments tell the veil slope from the fundus slope; a study that knows its eyes' optics may instead name its model",
            m.label,
            eyes.len(),
            list.join("; ")
        ));
    }
    out
}

/// Share of a method's joint fits that may misfit before the run warns.
pub(crate) const MISFIT_WARN_SHARE: f64 = 0.1;

/// One warning per multiband method whose fits misfit in more than
/// [`MISFIT_WARN_SHARE`] of segments: the share, the bands with the largest
/// mean residual over the misfits, and the first segments.
pub(crate) fn misfit_warnings(rows: &[FitRow], epochs: &EpochTables, study: &Study) -> Vec<String> {
    let c = &epochs.captures;
    let mut out = Vec::new();
    for m in &study.methods {
        let fitted: Vec<&FitRow> = rows
            .iter()
            .filter(|r| r.method == m.label && r.adequacy.is_some())
            .collect();
        let misfits: Vec<&FitRow> = fitted
            .iter()
            .copied()
            .filter(|r| r.adequacy.is_some_and(Adequacy::is_misfit))
            .collect();
        if fitted.is_empty() || (misfits.len() as f64) <= MISFIT_WARN_SHARE * fitted.len() as f64 {
            continue;
        }
        let mut by_band: BTreeMap<usize, (f64, usize)> = BTreeMap::new();
        for r in &misfits {
            for (b, v) in &r.band_residuals {
                let e = by_band.entry(*b).or_default();
                e.0 += v;
                e.1 += 1;
            }
        }
        let mut bands: Vec<(usize, f64)> = by_band
            .into_iter()
            .map(|(b, (s, n))| (b, s / n as f64))
            .collect();
        bands.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()));
        let names: Vec<String> = bands
            .iter()
            .take(3)
            .map(|(b, v)| format!("{} {v:+.1} %", study.instrument.bands[*b].name))
            .collect();
        // Rows run capture by capture, so a segment recurs among other segments.
        let mut segs: Vec<String> = Vec::new();
        for r in &misfits {
            let s = format!("{}/{}", c[r.capture_index].subject, r.segment);
            if !segs.contains(&s) {
                segs.push(s);
            }
        }
        let shown: Vec<String> = segs.iter().take(5).cloned().collect();
        let alone = misfits
            .iter()
            .filter(|r| r.adequacy == Some(Adequacy::Misfit))
            .count();
        out.push(format!(
            "`{}`: the vessel model does not describe the spectra of {} of {} segment fits ({:.0} %, more than {:.0} %; {alone} on their own, {} with the other segments of their eye): bands {} off on average (model − measured); e.g. {}{}. SO2 from these fits may be biased by several points: look at the residual columns of `fits/so2`, and fit an extended model (`model: auto`, or the extensions `satstep sensitivity` says the bands support) or restrict the statistics to adequate fits",
            m.label,
            misfits.len(),
            fitted.len(),
            100.0 * misfits.len() as f64 / fitted.len() as f64,
            100.0 * MISFIT_WARN_SHARE,
            misfits.len() - alone,
            names.join(", "),
            shown.join(", "),
            if segs.len() > shown.len() { ", …" } else { "" }
        ));
    }
    out
}

/// Fewest unflagged positions a segment needs to be fitted.
pub(crate) const MIN_POSITIONS: usize = 8;

/// How a segment's fit ended, as the `termination` column writes it.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum Outcome {
    /// Fewer than [`MIN_POSITIONS`] unflagged positions.
    TooFewPositions { usable: usize },
    /// Two-band: the ODR was computed.
    Odr,
    /// Two-band: no finite optical density in one of the bands.
    NoOpticalDensity,
    /// Multiband: a position has no diameter.
    NoDiameter,
    /// Multiband with `weighting: fundus`: some band has no positive
    /// background level at the segment's usable positions.
    NoFundusSpectrum,
    /// Multiband, position by position.
    Pointwise { converged: usize, positions: usize },
    /// Multiband, joint fit: why the optimiser stopped.
    Joint(Termination),
    /// Multiband, joint fit: it could not start or ended non-finite.
    NotFitted(SegmentFitError),
    /// Two-band, two-point calibration: no calibration could be made for the method.
    NoTwoPointCalibration { epoch: String },
}

impl Outcome {
    /// The `termination` column: a code from a fixed set (DEVELOPERS.md,
    /// "Table formats"), so that programs can count and filter on it.
    pub fn code(&self) -> &'static str {
        match self {
            Outcome::TooFewPositions { .. } => "too-few-positions",
            Outcome::Odr => "odr",
            Outcome::NoOpticalDensity => "no-optical-density",
            Outcome::NoDiameter => "no-diameter",
            Outcome::NoFundusSpectrum => "no-fundus-spectrum",
            Outcome::Pointwise { .. } => "pointwise",
            Outcome::Joint(t) => t.as_str(),
            Outcome::NotFitted(_) => "not-fitted",
            Outcome::NoTwoPointCalibration { .. } => "no-two-point-calibration",
        }
    }

    /// The `termination_detail` column: what the code alone does not say.
    pub fn detail(&self) -> Option<String> {
        match self {
            Outcome::Odr | Outcome::Joint(_) | Outcome::NoOpticalDensity => None,
            _ => Some(self.to_string()),
        }
    }
}

impl std::fmt::Display for Outcome {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Outcome::TooFewPositions { usable } => {
                write!(f, "too few usable positions ({usable} < {MIN_POSITIONS})")
            }
            Outcome::Odr => f.write_str("odr"),
            Outcome::NoOpticalDensity => f.write_str("no optical density"),
            Outcome::NoDiameter => {
                f.write_str("no diameter: the multiband model needs `diameter_um`")
            }
            Outcome::NoFundusSpectrum => f.write_str(
                "no fundus spectrum: some band has no positive background level at the usable positions (`weighting: fundus`)",
            ),
            Outcome::Pointwise {
                converged,
                positions,
            } => write!(f, "{converged} of {positions} positions converged"),
            Outcome::Joint(t) => f.write_str(t.as_str()),
            Outcome::NotFitted(e) => write!(f, "not fitted: {e}"),
            Outcome::NoTwoPointCalibration { epoch } => write!(
                f,
                "no two-point calibration: no arteriole with reference SpO2 and no venule in `{epoch}`"
            ),
        }
    }
}

#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct FitRow {
    pub capture_index: usize,
    pub segment: String,
    pub kind: VesselKind,
    pub method: String,
    pub so2: Option<f64>,
    pub so2_se: Option<f64>,
    pub reduced_chi2: Option<f64>,
    pub odr: Option<f64>,
    /// The ODR before the diameter correction, when the method applies one.
    pub odr_uncorrected: Option<f64>,
    pub iterations: i64,
    pub evaluations: i64,
    pub termination: Outcome,
    pub positions: i64,
    pub diameter_um: f64,
    /// SD of the per-position estimates along the segment (pointwise fits).
    pub along_sd: Option<f64>,
    /// Joint multiband fits: whether the model describes the spectra.
    pub adequacy: Option<Adequacy>,
    /// Joint multiband fits: the adequacy test's largest |t| over bands.
    pub misfit_t: Option<f64>,
    /// Joint multiband fits: mean residual per band of the method, in % of
    /// the transmission, as (instrument band index, residual).
    pub band_residuals: Vec<(usize, f64)>,
    /// Joint multiband fits: the model fitted (`base` or its extensions),
    /// the one `model: auto` chose.
    pub model: Option<String>,
    /// `model: auto`: the models the eye's segments could not tell apart,
    /// `, `-joined, the one fitted first; the SE weighs them alike (see
    /// `choose_for_eye`).
    #[serde(default)]
    pub tied_models: Option<String>,
    /// Joint multiband fits: the extensions' parameters where fitted
    /// (veil change per 100 nm, albedo scale, double-pass change per 100 nm).
    pub veil_slope: Option<f64>,
    pub backscatter_scale: Option<f64>,
    pub fundus_slope: Option<f64>,
    /// `weighting: fundus`: the fundus reflectance read behind the segment
    /// at [`RISE_NM`]`.1` over that at [`RISE_NM`]`.0` (see [`gain_warnings`]).
    pub fundus_rise: Option<f64>,
    /// `model: auto`: every candidate model's fit of this capture's
    /// segment, until the choice across the eye's fits (`choose_models`)
    /// replaces the row by one of them.
    pub alternatives: Vec<Alternative>,
}

/// One candidate model's fit of a segment in one capture, as a whole row
/// and as the choice sees it.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct Alternative {
    pub candidate: Candidate,
    pub row: FitRow,
}

impl FitRow {
    /// Narrower than `min_um`; a row without a measured diameter counts as
    /// narrower, since it cannot show that it is wide enough.
    pub fn below_diameter(&self, min_um: f64) -> bool {
        !(self.diameter_um >= min_um)
    }
}

/// The fits stage.
pub struct Fits;

impl Stage for Fits {
    const NAME: &'static str = "fits";
    // 9: `weighting: fundus`; 10: `eye-misfit`, and `auto` keeps the base
    // model where it describes the eye; 11: `auto` asks the segments to
    // agree (`tied_models`).
    const VERSION: u32 = 11;
    const SUMMARY: &'static str = "SO2 of every segment of every capture by each method";
    const UPSTREAM: &'static [&'static str] = &["epochs", "transmissions"];
    type Output = FitTables;

    /// The methods and the bands they read.
    fn settings(study: &Study) -> Key {
        let mut k = KeyBuilder::new("fits-settings", Self::VERSION);
        k.value("methods", &study.methods)
            .value("bands", &study.portable().instrument.bands)
            .value("min-positions", &MIN_POSITIONS);
        k.finish()
    }

    fn build(run: &Run, runner: &Runner) -> Result<(FitTables, String)> {
        let study = run.study;
        let multiband = study
            .methods
            .iter()
            .filter(|m| matches!(m.kind, MethodKind::Multiband { .. }))
            .count();
        let fitted = run
            .output::<Transmissions>()
            .position_counts
            .iter()
            .filter(|n| **n > 0)
            .count();
        let items = runner.items(Self::NAME, fitted * multiband, "fits");
        let tables = build(
            study,
            run.output::<Epochs>(),
            run.output::<Transmissions>(),
            runner,
            &items,
        )?;
        let detail = items.finish("multiband capture fits")?;
        let rows = &tables.rows;
        let d = format!(
            "{} segment fits over {} methods, {} with an SO2 ({detail})",
            rows.len(),
            study.methods.len(),
            rows.iter().filter(|f| f.so2.is_some()).count()
        );
        Ok((tables, d))
    }

    fn write(tables: &FitTables, run: &Run, _: &Runner) -> Result<Vec<PathBuf>> {
        let mut files = write(&tables.rows, run.output::<Epochs>(), run.study, run.out())?;
        files.extend(write_calibrations(&tables.calibrations, run.out())?);
        Ok(files)
    }

    /// Says when a method's model does not describe the spectra of more
    /// than [`MISFIT_WARN_SHARE`] of its fits, naming the bands and
    /// segments, when `auto` found models its segments could not tell
    /// apart, and when the stated band gains read the fundus backwards.
    fn report(run: &Run, runner: &Runner) {
        let rows = &run.output::<Fits>().rows;
        let epochs = run.output::<Epochs>();
        for line in misfit_warnings(rows, epochs, run.study)
            .into_iter()
            .chain(tie_warnings(rows, epochs, run.study))
            .chain(gain_warnings(rows, run.study))
        {
            runner.warn(line);
        }
    }

    fn describe(run: &Run) -> Option<String> {
        Some(describe(run.study))
    }
}

/// Fits every capture's segments by every method. Captures are taken in
/// parallel, each reading its positions from the transmissions stage's cache and
/// dropping them when done; multiband results are cached per capture.
fn build(
    study: &Study,
    epochs: &EpochTables,
    images: &TransmissionTables,
    runner: &Runner,
    items: &Items,
) -> Result<FitTables> {
    let bands: Vec<SampledBand> = study
        .instrument
        .bands
        .iter()
        .map(|b| SampledBand::from_response(&b.response))
        .collect();
    // The bands as keys see them (a response table by its place in the study).
    let band_key = study.portable().instrument.bands;
    let captures: Vec<usize> = (0..epochs.captures.len())
        .filter(|i| images.position_counts[*i] > 0)
        .collect();
    // Each multiband method's vessel models and fit settings, prepared once:
    // `auto`'s candidates come from an identifiability analysis that would
    // otherwise be repeated for every segment.
    let prepared: Vec<Option<Prepared>> = study
        .methods
        .iter()
        .map(|m| prepare(m, study, &bands))
        .collect();
    let per_capture: Vec<Vec<Vec<FitRow>>> = captures
        .par_iter()
        .map(|&ci| -> Result<Vec<Vec<FitRow>>> {
            // Read from the cache once, and only if some method needs them.
            let loaded: std::cell::OnceCell<Vec<PositionRow>> = std::cell::OnceCell::new();
            let load = || -> Result<&[PositionRow]> {
                if let Some(v) = loaded.get() {
                    return Ok(v);
                }
                let v = images.positions(runner, ci)?;
                Ok(loaded.get_or_init(|| v))
            };
            let mut out = Vec::with_capacity(study.methods.len());
            for (m, prep) in study.methods.iter().zip(&prepared) {
                let rows = match &m.kind {
                    // Multiband fits are the slow part: kept per capture, so that an
                    // interrupted run or a changed capture refits only what it must.
                    MethodKind::Multiband { .. } => {
                        let mut k = KeyBuilder::new("fits-capture", Fits::VERSION);
                        k.value("method", m)
                            .value("bands", &band_key)
                            .value("min-positions", &MIN_POSITIONS)
                            .key("transmissions", &images.keys[ci]);
                        items.try_get_or_compute(&k.finish(), || {
                            Ok(fit_capture(m, prep.as_ref(), ci, load()?))
                        })?
                    }
                    MethodKind::TwoBand { .. } => fit_capture(m, None, ci, load()?),
                };
                out.push(
                    rows.into_iter()
                        .map(|mut r| {
                            r.capture_index = ci;
                            r
                        })
                        .collect(),
                );
            }
            Ok(out)
        })
        .collect::<Result<_>>()?;
    let per_method = (0..study.methods.len())
        .map(|mi| {
            per_capture
                .iter()
                .flat_map(|c| c[mi].iter().cloned())
                .collect()
        })
        .collect();
    Ok(assemble(study, epochs, per_method))
}

/// The cohort-level end of the fits stage: each two-band method's diameter
/// correction and calibration, over the whole cohort's rows at once.
/// `per_method[m]` holds method `m`'s rows, two-band rows with their ODRs
/// as measured (a pooled analysis recalibrates the sites' rows here).
pub(crate) fn assemble(
    study: &Study,
    epochs: &EpochTables,
    per_method: Vec<Vec<FitRow>>,
) -> FitTables {
    let mut out = Vec::new();
    let mut calibrations = Vec::new();
    for (m, mut rows) in study.methods.iter().zip(per_method) {
        choose_models(&mut rows, epochs);
        judge_eyes(&mut rows, epochs);
        if let MethodKind::TwoBand {
            calibration,
            diameter_correction,
            ..
        } = &m.kind
        {
            if *diameter_correction {
                correct_for_diameter(&mut rows);
            }
            calibrations.extend(
                calibrate(&mut rows, calibration, study, epochs)
                    .into_iter()
                    .map(|(subject, c)| CalibrationRow {
                        method: m.label.clone(),
                        subject,
                        line: c,
                    }),
            );
        }
        out.extend(rows);
    }
    FitTables {
        rows: out,
        calibrations,
    }
}

/// What the fits stage hands on: every segment fit, and each two-band
/// method's calibration lines.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct FitTables {
    pub rows: Vec<FitRow>,
    pub calibrations: Vec<CalibrationRow>,
}

/// One calibration line of a two-band method: for the whole cohort
/// (`subject` empty) or for one subject (leave-one-out regression, or
/// within-subject).
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct CalibrationRow {
    pub method: String,
    pub subject: Option<String>,
    pub line: Calibrated,
}

/// `fits/calibration`: one row per calibration line.
fn write_calibrations(rows: &[CalibrationRow], out: &Path) -> Result<Vec<PathBuf>> {
    let mut t = Table::new();
    t.text("method", rows.iter().map(|r| &r.method))
        .opt_text("subject", rows.iter().map(|r| r.subject.clone()))
        .real("intercept", rows.iter().map(|r| r.line.intercept))
        .real("slope", rows.iter().map(|r| r.line.slope))
        .opt_real(
            "slope_se",
            rows.iter()
                .map(|r| Some(r.line.slope_se).filter(|v| v.is_finite())),
        )
        .int("points", rows.iter().map(|r| r.line.points as i64));
    Ok(t.write(&out.join("fits"), "calibration")?)
}

/// A multiband method's models: the base model over its bands (the
/// pointwise fit's), the models its segment fits choose among (one unless
/// `model: auto`), and the fit settings. With `weighting: fundus` these
/// are weighted by the response alone and stand for the form only: each
/// segment's fit rebuilds them over its own fundus spectrum ([`Prepared::for_segment`]).
struct Prepared {
    base: VesselModel,
    candidates: Vec<VesselModel>,
    settings: FitSettings,
    fundus: Option<FundusBands>,
}

/// What `weighting: fundus` reads a segment's spectrum with: every band of
/// the instrument and its gain, and the method's own bands.
pub(crate) struct FundusBands {
    all: Vec<SampledBand>,
    gains: Vec<f64>,
    selected: Vec<SampledBand>,
    /// The bands' mean wavelengths reach both of [`RISE_NM`] (no
    /// extrapolation is judged).
    reach_rise: bool,
}

impl FundusBands {
    /// None unless the method weights by the fundus (every band then has a
    /// gain: the study file's check makes sure).
    pub(crate) fn of(m: &Method, study: &Study, bands: &[SampledBand]) -> Option<Self> {
        let MethodKind::Multiband {
            bands: sel,
            weighting: Weighting::Fundus,
            ..
        } = &m.kind
        else {
            return None;
        };
        let centres: Vec<f64> = bands.iter().map(SampledBand::centroid_nm).collect();
        let reach = |nm: f64| centres.iter().any(|c| *c <= nm) && centres.iter().any(|c| *c >= nm);
        Some(FundusBands {
            reach_rise: reach(RISE_NM.0) && reach(RISE_NM.1),
            all: bands.to_vec(),
            gains: study
                .instrument
                .bands
                .iter()
                .map(|b| b.gain.unwrap_or(f64::NAN))
                .collect(),
            selected: sel.iter().map(|b| bands[*b].clone()).collect(),
        })
    }

    /// The fundus spectrum behind a segment: per band, the median of its
    /// positions' background levels over the band's gain. None where a
    /// band has no positive level.
    pub(crate) fn spectrum(&self, pos: &[&PositionRow]) -> Option<FundusSpectrum> {
        let levels: Vec<f64> = (0..self.all.len())
            .map(|b| {
                let v: Vec<f64> = pos
                    .iter()
                    .filter_map(|p| p.background.get(b).copied())
                    .filter(|v| v.is_finite() && *v > 0.0)
                    .collect();
                if v.is_empty() {
                    f64::NAN
                } else {
                    median(v) / self.gains[b]
                }
            })
            .collect();
        FundusSpectrum::from_band_levels(&self.all, &levels)
    }

    /// `R(610 nm) / R(560 nm)` of a spectrum read through these bands, when
    /// their mean wavelengths reach both.
    pub(crate) fn rise(&self, spectrum: &FundusSpectrum) -> Option<f64> {
        self.reach_rise
            .then(|| spectrum.at(RISE_NM.1) / spectrum.at(RISE_NM.0))
    }

    /// The base model over the method's bands weighted by `spectrum`.
    pub(crate) fn model(&self, spectrum: &FundusSpectrum) -> VesselModel {
        VesselModel::new(&self.selected, |l| spectrum.at(l), BLOOD_BACKSCATTER)
    }
}

impl Prepared {
    /// The base model and the candidates for one segment's positions, and
    /// the fundus's rise read behind it ([`FundusBands::rise`]); None when
    /// the fundus spectrum cannot be read from them.
    fn for_segment(
        &self,
        pos: &[&PositionRow],
    ) -> Option<(VesselModel, Vec<VesselModel>, Option<f64>)> {
        let Some(f) = &self.fundus else {
            return Some((self.base.clone(), self.candidates.clone(), None));
        };
        let spectrum = f.spectrum(pos)?;
        let base = f.model(&spectrum);
        let candidates = self
            .candidates
            .iter()
            .map(|c| base.clone().with_extensions(c.extensions))
            .collect();
        Some((base, candidates, f.rise(&spectrum)))
    }
}

fn prepare(m: &Method, study: &Study, bands: &[SampledBand]) -> Option<Prepared> {
    let MethodKind::Multiband {
        bands: sel,
        loss,
        model,
        ..
    } = &m.kind
    else {
        return None;
    };
    let (base, settings) = multiband_model(bands, sel, *loss);
    let candidates = match model {
        ModelChoice::Fixed(e) => vec![base.clone().with_extensions(*e)],
        ModelChoice::Auto => supported_models(&base),
    };
    Some(Prepared {
        base,
        candidates,
        settings,
        fundus: FundusBands::of(m, study, bands),
    })
}

/// One capture's segments by one method (before any cohort calibration;
/// `prep` for a multiband method).
fn fit_capture(
    m: &Method,
    prep: Option<&Prepared>,
    ci: usize,
    positions: &[PositionRow],
) -> Vec<FitRow> {
    let mut groups: BTreeMap<String, Vec<&PositionRow>> = BTreeMap::new();
    for r in positions {
        if r.flags.is_empty() && r.transmission.iter().all(|t| t.is_finite() && *t > 0.0) {
            groups.entry(r.segment.clone()).or_default().push(r);
        }
    }
    // Every segment the transmissions stage profiled, even with too few positions.
    let mut keys: Vec<(usize, String, VesselKind)> = positions
        .iter()
        .map(|r| (ci, r.segment.clone(), r.kind))
        .collect();
    keys.sort();
    keys.dedup();
    let groups: BTreeMap<(usize, String), Vec<&PositionRow>> =
        groups.into_iter().map(|(k, v)| ((ci, k), v)).collect();
    {
        let fit_one = |(ci, seg, kind): &(usize, String, VesselKind)| -> FitRow {
            let pos = groups.get(&(*ci, seg.clone())).cloned().unwrap_or_default();
            let diameter = if pos.is_empty() {
                f64::NAN
            } else {
                pos.iter().map(|p| p.diameter_um).sum::<f64>() / pos.len() as f64
            };
            let mut row = FitRow {
                capture_index: *ci,
                segment: seg.clone(),
                kind: *kind,
                method: m.label.clone(),
                so2: None,
                so2_se: None,
                reduced_chi2: None,
                odr: None,
                odr_uncorrected: None,
                iterations: 0,
                evaluations: 0,
                termination: Outcome::TooFewPositions { usable: pos.len() },
                positions: pos.len() as i64,
                diameter_um: diameter,
                along_sd: None,
                adequacy: None,
                misfit_t: None,
                band_residuals: Vec::new(),
                model: None,
                veil_slope: None,
                backscatter_scale: None,
                fundus_slope: None,
                fundus_rise: None,
                tied_models: None,
                alternatives: Vec::new(),
            };
            if pos.len() < MIN_POSITIONS {
                return row;
            }
            row.termination = match &m.kind {
                MethodKind::TwoBand {
                    sensitive,
                    isosbestic,
                    ..
                } => {
                    let ts: Vec<f64> = pos.iter().map(|p| p.transmission[*sensitive]).collect();
                    let ti: Vec<f64> = pos.iter().map(|p| p.transmission[*isosbestic]).collect();
                    row.odr = segment_odr(&ts, &ti);
                    if row.odr.is_some() {
                        Outcome::Odr
                    } else {
                        Outcome::NoOpticalDensity
                    }
                }
                MethodKind::Multiband { .. } if pos.iter().any(|p| !p.diameter_um.is_finite()) => {
                    Outcome::NoDiameter
                }
                MethodKind::Multiband {
                    bands: sel,
                    pointwise,
                    ..
                } => {
                    let prep = prep.expect("a multiband method is prepared");
                    let Some((model, candidates, rise)) = prep.for_segment(&pos) else {
                        row.termination = Outcome::NoFundusSpectrum;
                        return row;
                    };
                    row.fundus_rise = rise;
                    let (model, settings) = (&model, &prep.settings);
                    let spectra = SegmentSpectra {
                        diameters_um: pos.iter().map(|p| p.diameter_um).collect(),
                        transmissions: pos
                            .iter()
                            .map(|p| sel.iter().map(|b| p.transmission[*b]).collect())
                            .collect(),
                    };
                    if *pointwise {
                        let f = fit_pointwise(model, &spectra, settings);
                        if f.so2.is_finite() {
                            row.so2 = Some(f.so2 * 100.0);
                            row.so2_se = Some(f.so2_se * 100.0);
                            row.along_sd = Some(f.so2_sd * 100.0).filter(|v| v.is_finite());
                        }
                        row.iterations = f.positions.iter().map(|p| p.iterations as i64).sum();
                        row.evaluations = f.positions.iter().map(|p| p.evaluations as i64).sum();
                        Outcome::Pointwise {
                            converged: f.n_converged,
                            positions: f.positions.len(),
                        }
                    } else {
                        let fitted = match &candidates[..] {
                            [one] => fit_segment(one, &spectra, settings).map(|f| vec![f]),
                            all => fit_candidates(all, &spectra, settings),
                        };
                        match fitted {
                            Ok(fits) => {
                                let mut alternatives: Vec<Alternative> = fits
                                    .iter()
                                    .map(|f| {
                                        let mut r = row.clone();
                                        fill_joint(&mut r, f, sel);
                                        Alternative {
                                            candidate: Candidate::of(f),
                                            row: r,
                                        }
                                    })
                                    .collect();
                                // This fit's own choice; `assemble` replaces it
                                // by the choice across the eye's fits.
                                let candidates: Vec<Candidate> =
                                    alternatives.iter().map(|a| a.candidate.clone()).collect();
                                let (i, se) = choose_across(&[candidates])[0]
                                    .expect("every alternative was fitted");
                                let mut chosen = alternatives[i].row.clone();
                                chosen.so2_se = Some(se * 100.0);
                                if alternatives.len() > 1 {
                                    chosen.alternatives = std::mem::take(&mut alternatives);
                                }
                                row = chosen;
                                row.termination.clone()
                            }
                            Err(e) => Outcome::NotFitted(e),
                        }
                    }
                }
            };
            row
        };
        keys.iter().map(fit_one).collect()
    }
}

/// A row's fields from a joint fit (`sel`: the method's bands).
fn fill_joint(row: &mut FitRow, f: &SegmentFit, sel: &[usize]) {
    row.model = Some(f.model.name());
    let fitted = |v: (f64, f64)| Some(v.0).filter(|x| x.is_finite());
    row.veil_slope = fitted(f.veil_slope);
    row.backscatter_scale = fitted(f.backscatter_scale);
    row.fundus_slope = fitted(f.fundus_slope);
    row.so2 = Some(f.so2 * 100.0);
    row.so2_se = Some(f.so2_se * 100.0);
    row.reduced_chi2 = Some(f.reduced_chi2);
    row.adequacy = Some(f.adequacy);
    row.misfit_t = Some(f.misfit_t).filter(|t| t.is_finite());
    row.band_residuals = sel
        .iter()
        .zip(&f.band_residuals)
        .map(|(b, r)| (*b, r * 100.0))
        .collect();
    row.iterations = f.iterations as i64;
    row.evaluations = f.evaluations as i64;
    row.termination = Outcome::Joint(f.termination);
}

/// `model: auto`'s choice across each eye's fits ([`choose_for_eye`]):
/// the rows of one method that carry alternatives, grouped by subject,
/// session and eye (all its segments in all its captures), each replaced
/// by its fit of the model chosen for the eye: the base model where its
/// fits describe the eye ([`base_describes_eye`]), else the model the
/// information criterion chooses, its SE widened by the choice's
/// uncertainty and by the models the segments could not tell from it
/// ([`FitRow::tied_models`]). Rows without alternatives are left as they
/// are.
fn choose_models(rows: &mut [FitRow], epochs: &EpochTables) {
    let groups = by_eye(rows, epochs, |r| !r.alternatives.is_empty());
    for members in groups.into_values() {
        let candidates: Vec<Vec<Candidate>> = members
            .iter()
            .map(|&i| {
                rows[i]
                    .alternatives
                    .iter()
                    .map(|a| a.candidate.clone())
                    .collect()
            })
            .collect();
        // Whether the base model describes the eye, from its base fits.
        let base: Vec<(&FitRow, Vec<f64>)> = members
            .iter()
            .filter_map(|&i| {
                rows[i]
                    .alternatives
                    .iter()
                    .find(|a| a.candidate.model == Extensions::BASE.name())
                    .map(|a| (&a.row, fractions(&a.row)))
            })
            .collect();
        let keep_base = base.len() == members.len()
            && base_describes_eye(&base.iter().map(|(r, v)| eye_fit(r, v)).collect::<Vec<_>>());
        let segments: Vec<&str> = members.iter().map(|&i| rows[i].segment.as_str()).collect();
        let choice = choose_for_eye(&candidates, &segments, keep_base);
        let tied = (!choice.tied.is_empty()).then(|| choice.tied.join(", "));
        for (&i, pick) in members.iter().zip(choice.picks) {
            if let Some((k, se)) = pick {
                let mut chosen = rows[i].alternatives[k].row.clone();
                chosen.so2_se = Some(se * 100.0);
                chosen.capture_index = rows[i].capture_index;
                chosen.tied_models = tied.clone();
                rows[i] = chosen;
            }
            rows[i].alternatives.clear();
        }
    }
}

/// The adequacy test of each eye's joint fits together ([`eye_misfits`]):
/// one method's rows with an adequacy, grouped by subject, session and eye.
/// In an eye that misfits, every fit that passed on its own becomes
/// `eye-misfit`.
fn judge_eyes(rows: &mut [FitRow], epochs: &EpochTables) {
    let eyes = by_eye(rows, epochs, |r| {
        r.adequacy.is_some() && !r.band_residuals.is_empty()
    });
    let mut misfit_rows = Vec::new();
    for members in eyes.into_values() {
        let residuals: Vec<Vec<f64>> = members.iter().map(|&i| fractions(&rows[i])).collect();
        let fits: Vec<EyeFit> = members
            .iter()
            .zip(&residuals)
            .map(|(&i, v)| eye_fit(&rows[i], v))
            .collect();
        if eye_misfits(&fits) {
            misfit_rows.extend(members);
        }
    }
    for i in misfit_rows {
        if rows[i].adequacy == Some(Adequacy::Ok) {
            rows[i].adequacy = Some(Adequacy::EyeMisfit);
        }
    }
}

/// The indices of the rows that `keep`, grouped by the subject, session
/// and eye of their capture.
fn by_eye<'a>(
    rows: &[FitRow],
    epochs: &'a EpochTables,
    keep: impl Fn(&FitRow) -> bool,
) -> BTreeMap<(&'a str, &'a str, &'a str), Vec<usize>> {
    let mut eyes: BTreeMap<(&str, &str, &str), Vec<usize>> = BTreeMap::new();
    for (i, r) in rows.iter().enumerate().filter(|(_, r)| keep(r)) {
        let c = &epochs.captures[r.capture_index];
        eyes.entry((&c.subject, &c.session, &c.eye))
            .or_default()
            .push(i);
    }
    eyes
}

/// A row's band residuals as fractions of the transmission.
fn fractions(r: &FitRow) -> Vec<f64> {
    r.band_residuals.iter().map(|(_, v)| v / 100.0).collect()
}

/// A joint fit's row as the eye's adequacy test sees it.
fn eye_fit<'a>(r: &'a FitRow, residuals: &'a [f64]) -> EyeFit<'a> {
    EyeFit {
        segment: &r.segment,
        band_residuals: residuals,
        adequacy: r.adequacy.unwrap_or(Adequacy::Ok),
    }
}

/// The vessel model over the method's bands and the fit settings for its loss.
pub(crate) fn multiband_model(
    bands: &[SampledBand],
    selected: &[usize],
    loss: Loss,
) -> (VesselModel, FitSettings) {
    let model = VesselModel::new(
        &selected
            .iter()
            .map(|b| bands[*b].clone())
            .collect::<Vec<_>>(),
        |_| 1.0,
        BLOOD_BACKSCATTER,
    );
    let settings = FitSettings {
        loss: match loss {
            Loss::Squared => RobustLoss::Squared,
            Loss::Huber { scale } => RobustLoss::Huber { scale },
        },
        ..FitSettings::default()
    };
    (model, settings)
}

/// The two-band diameter correction: ODR depends on vessel diameter as
/// well as on SO2, so the linear dependence is removed before calibration,
/// `ODR' = ODR − b·(d − d_ref)`, with `b` the pooled within-group slope of
/// ODR on diameter over groups of one capture and vessel kind (centred per
/// group, so that differences in saturation between captures and kinds do
/// not enter the slope) and `d_ref` the median diameter of the rows with an
/// ODR. The uncorrected ODR stays in `odr_uncorrected`. Returns (b, d_ref).
pub(crate) fn correct_for_diameter(rows: &mut [FitRow]) -> Option<(f64, f64)> {
    let mut groups: BTreeMap<(usize, &str), Vec<(f64, f64)>> = BTreeMap::new();
    for r in rows.iter() {
        if let Some(o) = r
            .odr
            .filter(|o| o.is_finite())
            .filter(|_| r.diameter_um.is_finite())
        {
            groups
                .entry((r.capture_index, r.kind.as_str()))
                .or_default()
                .push((r.diameter_um, o));
        }
    }
    let slope = within_group_slope(&groups.into_values().collect::<Vec<_>>())?;
    let mut d: Vec<f64> = rows
        .iter()
        .filter(|r| r.odr.is_some() && r.diameter_um.is_finite())
        .map(|r| r.diameter_um)
        .collect();
    d.sort_by(f64::total_cmp);
    let reference = d[d.len() / 2];
    for r in rows.iter_mut() {
        r.odr_uncorrected = r.odr;
        r.odr = r.odr.and_then(|o| {
            r.diameter_um
                .is_finite()
                .then(|| diameter_corrected(o, r.diameter_um, slope, reference))
        });
    }
    Some((slope, reference))
}

/// Applies the two-band calibration to rows holding ODRs; returns the
/// lines used, per subject where the mode has one per subject.
fn calibrate(
    rows: &mut [FitRow],
    cal: &Calibration,
    study: &Study,
    epochs: &EpochTables,
) -> Vec<(Option<String>, Calibrated)> {
    let c = &epochs.captures;
    let steady = |r: &FitRow| c[r.capture_index].status == CaptureStatus::Steady;
    // Steady arterioles with a reference: (subject, ODR, SpO2).
    let arterioles: Vec<(String, f64, f64)> = rows
        .iter()
        .filter(|r| r.kind == VesselKind::Arteriole && steady(r))
        .filter_map(|r| {
            Some((
                c[r.capture_index].subject.clone(),
                r.odr?,
                c[r.capture_index].spo2?,
            ))
        })
        .collect();
    let per_subject = |rows: &mut [FitRow], lines: &BTreeMap<String, Option<Calibrated>>| {
        for r in rows.iter_mut() {
            let l = lines.get(&c[r.capture_index].subject).copied().flatten();
            r.so2 = l.and_then(|l| {
                r.odr.map(|o| {
                    Linear {
                        intercept: l.intercept,
                        slope: l.slope,
                    }
                    .apply(o)
                })
            });
        }
        lines
            .iter()
            .filter_map(|(s, l)| Some((Some(s.clone()), (*l)?)))
            .collect()
    };
    match cal {
        Calibration::Fixed { intercept, slope } => {
            let l = Linear {
                intercept: *intercept,
                slope: *slope,
            };
            for r in rows.iter_mut() {
                r.so2 = r.odr.map(|o| l.apply(o));
            }
            vec![(
                None,
                Calibrated {
                    intercept: *intercept,
                    slope: *slope,
                    slope_se: f64::NAN,
                    points: 0,
                },
            )]
        }
        Calibration::TwoPoint { epoch, venule_so2 } => {
            let name = &study.protocol.epochs[*epoch].name;
            let in_epoch = |r: &FitRow| {
                steady(r) && c[r.capture_index].epoch.as_deref() == Some(name.as_str())
            };
            let a: Vec<(f64, f64)> = rows
                .iter()
                .filter(|r| r.kind == VesselKind::Arteriole && in_epoch(r))
                .filter_map(|r| Some((r.odr?, c[r.capture_index].spo2?)))
                .collect();
            let v: Vec<f64> = rows
                .iter()
                .filter(|r| r.kind == VesselKind::Venule && in_epoch(r))
                .filter_map(|r| r.odr)
                .collect();
            let se_of_mean = |x: &[f64]| {
                if x.len() < 2 {
                    return f64::NAN;
                }
                let m = mean(x);
                (x.iter().map(|v| (v - m).powi(2)).sum::<f64>()
                    / (x.len() - 1) as f64
                    / x.len() as f64)
                    .sqrt()
            };
            let (oa, sa): (Vec<f64>, Vec<f64>) = a.iter().copied().unzip();
            let line = if a.is_empty() || v.is_empty() {
                None
            } else {
                two_point(mean(&oa), mean(&sa), mean(&v), *venule_so2)
            };
            for r in rows.iter_mut() {
                r.so2 = line.and_then(|l| r.odr.map(|o| l.apply(o)));
                if line.is_none() {
                    r.termination = Outcome::NoTwoPointCalibration {
                        epoch: name.clone(),
                    };
                }
            }
            line.map(|l| {
                (
                    None,
                    Calibrated {
                        intercept: l.intercept,
                        slope: l.slope,
                        slope_se: two_point_slope_se(
                            &l,
                            mean(&oa),
                            mean(&v),
                            se_of_mean(&oa),
                            se_of_mean(&v),
                            se_of_mean(&sa),
                        ),
                        points: a.len() + v.len(),
                    },
                )
            })
            .into_iter()
            .collect()
        }
        Calibration::Regression => {
            let pairs: Vec<(&str, f64, f64)> = arterioles
                .iter()
                .map(|(s, o, p)| (s.as_str(), *o, *p))
                .collect();
            let lines: BTreeMap<String, Option<Calibrated>> = leave_one_subject_out(&pairs)
                .into_iter()
                .map(|(s, l)| (s.to_string(), l))
                .collect();
            per_subject(rows, &lines)
        }
        Calibration::WithinSubject => {
            let mut by: BTreeMap<String, (Vec<f64>, Vec<f64>)> = BTreeMap::new();
            for (s, o, p) in &arterioles {
                let e = by.entry(s.clone()).or_default();
                e.0.push(*o);
                e.1.push(*p);
            }
            let lines: BTreeMap<String, Option<Calibrated>> = by
                .into_iter()
                .map(|(s, (x, y))| (s, inverse_calibration(&x, &y)))
                .collect();
            // Subjects without arterioles get no line (and no SO2).
            let mut all = lines.clone();
            for r in rows.iter() {
                all.entry(c[r.capture_index].subject.clone())
                    .or_insert(None);
            }
            per_subject(rows, &all)
        }
    }
}

fn write(rows: &[FitRow], epochs: &EpochTables, study: &Study, out: &Path) -> Result<Vec<PathBuf>> {
    let c = &epochs.captures;
    let mut t = Table::new();
    t.text("subject", rows.iter().map(|r| &c[r.capture_index].subject))
        .text("session", rows.iter().map(|r| &c[r.capture_index].session))
        .text("eye", rows.iter().map(|r| &c[r.capture_index].eye))
        .text("capture", rows.iter().map(|r| &c[r.capture_index].capture))
        .opt_text(
            "epoch",
            rows.iter().map(|r| c[r.capture_index].epoch.clone()),
        )
        .text(
            "status",
            rows.iter().map(|r| c[r.capture_index].status.as_str()),
        )
        .text("segment", rows.iter().map(|r| &r.segment))
        .text("kind", rows.iter().map(|r| r.kind.as_str()))
        .text("method", rows.iter().map(|r| &r.method))
        .opt_real("so2", rows.iter().map(|r| r.so2))
        .opt_real("so2_se", rows.iter().map(|r| r.so2_se))
        .opt_real("odr", rows.iter().map(|r| r.odr))
        .opt_real("odr_uncorrected", rows.iter().map(|r| r.odr_uncorrected))
        .opt_real("reduced_chi2", rows.iter().map(|r| r.reduced_chi2))
        .opt_text(
            "adequacy",
            rows.iter()
                .map(|r| r.adequacy.map(|a| a.as_str().to_string())),
        )
        .opt_real("misfit_t", rows.iter().map(|r| r.misfit_t))
        .opt_text("model", rows.iter().map(|r| r.model.clone()))
        .opt_text("tied_models", rows.iter().map(|r| r.tied_models.clone()))
        .opt_real("veil_slope", rows.iter().map(|r| r.veil_slope))
        .opt_real(
            "backscatter_scale",
            rows.iter().map(|r| r.backscatter_scale),
        )
        .opt_real("fundus_slope", rows.iter().map(|r| r.fundus_slope))
        .opt_real("fundus_rise", rows.iter().map(|r| r.fundus_rise))
        .int("iterations", rows.iter().map(|r| r.iterations))
        .int("evaluations", rows.iter().map(|r| r.evaluations))
        .text("termination", rows.iter().map(|r| r.termination.code()))
        .opt_text(
            "termination_detail",
            rows.iter().map(|r| r.termination.detail()),
        )
        .int("positions", rows.iter().map(|r| r.positions))
        .real("diameter_um", rows.iter().map(|r| r.diameter_um))
        .opt_real("spo2", rows.iter().map(|r| c[r.capture_index].spo2));
    for (b, band) in study.instrument.bands.iter().enumerate() {
        t.opt_real(
            &format!("residual_{}", band.name),
            rows.iter().map(|r| {
                r.band_residuals
                    .iter()
                    .find(|(i, _)| *i == b)
                    .map(|(_, v)| *v)
            }),
        );
    }
    Ok(t.write(&out.join("fits"), "so2")?)
}

/// What a joint method's model choice adds to the methods text.
fn model_sentence(choice: ModelChoice, bands: &[SampledBand]) -> String {
    let describe = |e: Extensions| {
        let mut parts = Vec::new();
        if e.veil_slope {
            parts.push("a veil linear in wavelength");
        }
        if e.backscatter {
            parts.push(
                "a blood backscatter proportional to the albedo μs'/(μs' + μa(λ)) with μs' = 15 /cm",
            );
        }
        if e.fundus {
            parts.push(
                "a double-pass fraction linear in wavelength (following the fundus reflectance)",
            );
        }
        parts.join(", ")
    };
    match choice {
        ModelChoice::Fixed(e) if e == Extensions::BASE => String::new(),
        ModelChoice::Fixed(e) => format!(
            " The model was extended by {}, each one parameter shared along the segment.",
            describe(e)
        ),
        ModelChoice::Auto => {
            let base = VesselModel::new(bands, |_| 1.0, BLOOD_BACKSCATTER);
            let supported: Vec<String> = crate::oximetry::sensitivity::support(&base)
                .into_iter()
                .filter(|s| s.supported && s.extensions.count() > 0)
                .map(|s| describe(s.extensions))
                .collect();
            format!(
                " For each eye and session one model was chosen for all its segments and captures. The base model was kept where its fits described the eye (at least three segments, the eye's fits together not a misfit, and at most {:.0} % of them misfits on their own); otherwise the model was chosen by the sum over the eye's fits of Schwarz's information criterion (with the residual sum of squares under the Huber loss at a cut-off of 1.5 times the stated noise, over a count of residuals made effective for their correlation along the segment), among the base model and its extensions that these {} bands separate from SO2, that is those that inflate its standard error at most {}-fold: {}. Each extension is one parameter shared along a segment and fitted anew in each capture; where the criterion chose, each SO2's standard error includes the uncertainty of the choice (Buckland, Burnham and Augustin, 1997). Because the image stage's errors repeat from capture to capture, the criterion's choice stood only where the segments agreed with it: another model was set aside only where its excess criterion, averaged over each segment's captures and then over the segments, exceeded its standard error between the segments by more than Student's one-sided {:.0} % quantile (at least three segments); the standard errors then weighed the models left alike.",
                crate::oximetry::segment::KEEP_BASE_MISFIT_SHARE * 100.0,
                bands.len(),
                crate::oximetry::sensitivity::SUPPORT_MAX_INFLATION,
                if supported.is_empty() {
                    "none".to_string()
                } else {
                    supported.join("; ")
                },
                100.0 * (1.0 - crate::oximetry::segment::MODEL_EXCLUSION_LEVEL)
            )
        }
    }
}

/// This stage's part of the report's methods text: one sentence per method.
fn describe(study: &Study) -> String {
    let band = |i: &usize| study.instrument.bands[*i].name.clone();
    let mut parts = vec![format!(
        "Segments with at least {MIN_POSITIONS} usable positions were analysed by each method."
    )];
    for m in &study.methods {
        parts.push(match &m.kind {
            MethodKind::TwoBand { sensitive, isosbestic, calibration, diameter_correction } => {
                let cal = match calibration {
                    Calibration::Fixed { intercept, slope } => format!("with fixed constants (SO2 = {intercept} + {slope}·ODR)"),
                    Calibration::TwoPoint { epoch, venule_so2 } => format!("calibrated from two points in epoch `{}`: arterioles at the reference SpO2 and venules at {venule_so2} %", study.protocol.epochs[*epoch].name),
                    Calibration::Regression => "calibrated against the reference SpO2 across subjects, leaving each subject out of its own calibration, by classical calibration (arteriolar ODR regressed on SpO2 and the line inverted, so that noise in ODR does not shrink the slope)".to_string(),
                    Calibration::WithinSubject => "calibrated within each subject by classical calibration (the subject's own arteriolar ODR regressed on the reference SpO2 across the protocol's epochs, steady captures, and the line inverted), so that the slope is free of what differs between subjects; the subject's arterioles then agree with the reference by construction, and its venules and the changes between epochs are what is measured".to_string(),
                };
                format!(
                    "`{}`: the optical density ratio ODR = log10(1/T_{})/log10(1/T_{}) of the segment's mean optical densities, SO2 linear in ODR, {cal}{}.",
                    m.label,
                    band(sensitive),
                    band(isosbestic),
                    if *diameter_correction {
                        ", after a linear correction of ODR for vessel diameter to the median diameter, the slope estimated within captures and vessel kinds from the study's own segments (as in Hardarson et al. 2006, cited from memory)"
                    } else {
                        ""
                    }
                )
            }
            MethodKind::Multiband {
                bands,
                loss,
                pointwise,
                model,
                weighting,
                ..
            } => {
                let weighted = match weighting {
                    Weighting::Response => "",
                    Weighting::Fundus => " Each band's average over wavelength was weighted by its response and by the fundus reflectance behind the segment, read from the background levels under the segment's usable positions (per band the median level divided by the band's stated gain, a white target's relative signal) and interpolated between the bands' mean wavelengths by a natural cubic spline of its logarithm, continued straight beyond the outermost bands, whose band averages reproduce the measured levels.",
                };
                let l = match loss {
                    Loss::Squared => "least squares".to_string(),
                    Loss::Huber { scale } => format!("a Huber loss (threshold {scale} noise SD)"),
                };
                let names: Vec<String> = bands.iter().map(band).collect();
                if *pointwise {
                    format!("`{}`: the same model fitted independently at each position, then averaged along the segment ({}; bands {}).{weighted}", m.label, l, names.join(", "))
                } else {
                    format!(
                        "`{}`: a band-integrated vessel transmission model (hemoglobin extinction from Prahl's compilation integrated over each band's response on a 1 nm grid; single- and double-pass Beer–Lambert paths, backscatter, and an additive veil T_obs = (1 − k)·T + k) fitted jointly to all positions of a segment, with SO2, hemoglobin concentration and k shared along the segment and path fractions per position, by bounded Levenberg–Marquardt ({l}; bands {}); standard errors from the Jacobian at the optimum scaled by the residual variance. Each fit's adequacy was tested on its residuals: per band, the mean residual of {} contiguous blocks of positions was compared with its standard error between blocks (t test, Bonferroni over bands for a {:.0} % false-alarm rate), and a band whose mean residual exceeded {:.1} % of the transmission at that level marked the fit as a misfit. The fits of each eye were also tested together, with each segment's band residuals averaged over its captures as one value: a band whose mean over the eye's segments differed from zero by the same t test across segments and by more than {:.2} % marked every fit of that eye as a misfit of the eye.",
                        m.label,
                        names.join(", "),
                        crate::oximetry::segment::ADEQUACY_BLOCKS,
                        ADEQUACY_FALSE_ALARM * 100.0,
                        MISFIT_MIN_RESIDUAL * 100.0,
                        crate::oximetry::segment::EYE_MISFIT_MIN_RESIDUAL * 100.0
                    ) + weighted
                        + &model_sentence(
                        *model,
                        &bands
                            .iter()
                            .map(|b| SampledBand::from_response(&study.instrument.bands[*b].response))
                            .collect::<Vec<_>>(),
                    )
                }
            }
        });
    }
    parts.join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn position(background: Vec<f64>) -> PositionRow {
        PositionRow {
            capture_index: 0,
            segment: "A1".into(),
            kind: VesselKind::Arteriole,
            position: 0,
            along_px: 0.0,
            diameter_um: 100.0,
            flags: Vec::new(),
            reflex: false,
            transmission: vec![0.5; background.len()],
            background,
        }
    }

    #[test]
    fn the_fundus_spectrum_is_the_background_over_the_gains() {
        let bands: Vec<SampledBand> = [548.0, 570.0, 586.0, 600.0]
            .iter()
            .map(|c| SampledBand::gaussian(*c, 8.0))
            .collect();
        let fundus = |l: f64| 0.04 + 0.18 / (1.0 + (-(l - 590.0) / 18.0).exp());
        let level: Vec<f64> = bands.iter().map(|b| b.average(fundus)).collect();
        // The camera's gains, and the backgrounds it records at three
        // positions (a common scale, and the illumination varying along).
        let camera = [0.5, 2.0, 1.0, 3.0];
        let positions = [0.9, 1.0, 1.2].map(|k| {
            position(
                level
                    .iter()
                    .zip(camera)
                    .map(|(l, g)| 1000.0 * k * l * g)
                    .collect(),
            )
        });
        let read_with = |stated: &[f64]| {
            FundusBands {
                all: bands.clone(),
                gains: stated.to_vec(),
                selected: bands.clone(),
                reach_rise: false,
            }
            .spectrum(&positions.iter().collect::<Vec<_>>())
            .unwrap()
        };
        let truth = FundusSpectrum::from_band_levels(&bands, &level).unwrap();
        let truth_ratio = truth.at(600.0) / truth.at(548.0);
        // The stated gains divided out, the spectrum is the fundus's.
        let read = read_with(&camera);
        assert!((read.at(600.0) / read.at(548.0) / truth_ratio - 1.0).abs() < 1e-9);
        // With the gains wrongly stated as equal, it would be another.
        let raw = read_with(&[1.0; 4]);
        assert!((raw.at(600.0) / raw.at(548.0) / truth_ratio - 1.0).abs() > 0.5);
        // A band without a positive level: no spectrum.
        let mut dark = level.clone();
        dark[1] = 0.0;
        let f = FundusBands {
            all: bands.clone(),
            gains: vec![1.0; 4],
            selected: bands.clone(),
            reach_rise: false,
        };
        assert!(f.spectrum(&[&position(dark)]).is_none());
    }
}
