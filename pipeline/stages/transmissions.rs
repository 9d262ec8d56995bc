//! The transmissions stage over a study: every analysed capture is read, registered
//! to its eye's reference capture (the eye's earliest capture), its
//! vessel segments are mapped into it and profiled. A capture that cannot
//! be read or registered keeps its row with the reason; the others go on.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;
use rayon::prelude::*;

use super::epochs::{EpochTables, Epochs};
use super::stage::{Run, Stage};
use crate::config::segments::{Segment, VesselKind};
use crate::config::study::Study;
use crate::images::correct::Corrections;
use crate::images::ingest::{CaptureError, Multiband, read_laid_out};
use crate::images::profile::{
    Flag, Neighbour, ProfileSettings, analyse_segment, blur_evidence, vessel_radii,
};
use crate::images::register::{REGIONS, Registration, RegistrationTarget};
use crate::runner::Items;
use crate::runner::Runner;
use crate::runner::key::{Key, KeyBuilder, combine, hash_file_or_missing};
use crate::tables::{Table, TableStream};

/// Lowest correlation in any region of the compared area at which a
/// registered capture counts as matching throughout. A judgement, not a
/// published value: on simulated captures the worst region scores above
/// 0.99; a region under a lid or washed out by glare scores near 0 or
/// below; real captures, with less structure in some regions, stay well
/// above 0.5 where they match.
pub(crate) const MIN_REGION_SCORE: f64 = 0.5;

/// Lowest match score at which a capture counts as registered.
pub(crate) const MIN_REGISTRATION_SCORE: f64 = 0.8;

/// Half the length of a profile across a vessel, in µm: room for the
/// widest venules (about 200 µm) and the background either side.
pub(crate) const PROFILE_HALF_LENGTH_UM: f64 = 220.0;

/// A profile's half length is never below this many pixels (small
/// sensors, coarse pixels), plus [`PROFILE_MARGIN_PX`].
pub(crate) const PROFILE_MIN_HALF_LENGTH_PX: f64 = 8.0;

/// Pixels added to a profile's half length for the background fit.
pub(crate) const PROFILE_MARGIN_PX: f64 = 4.0;

/// Registration and widths use the band nearest this wavelength: near an
/// isosbestic point, with good vessel contrast in every vessel.
pub(crate) const WIDTH_BAND_NM: f64 = 570.0;

#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct PositionRow {
    pub capture_index: usize,
    pub segment: String,
    pub kind: VesselKind,
    pub position: usize,
    pub along_px: f64,
    pub diameter_um: f64,
    /// Why the position is not used; empty when it is.
    pub flags: Vec<Flag>,
    /// A central light reflex was found (see [`crate::images::profile::ProfileResult`]).
    pub reflex: bool,
    pub transmission: Vec<f64>,
    /// Per band, the background's level under the vessel's centre (the
    /// corrected image's units): the fundus spectrum's samples for
    /// `weighting: fundus`.
    pub background: Vec<f64>,
}

/// What the transmissions stage made of a capture, as `captures.csv` writes it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ImageOutcome {
    /// Read, registered and profiled.
    Ok,
    /// Not read (file, calibration frames or reference capture unreadable).
    Error,
    /// Read, but its match score to the eye's reference is too low.
    NotRegistered,
    /// Registered as a whole, but one region of it does not match the
    /// reference (a partial blink, lashes, glare): its transmissions there
    /// would be wrong, and nothing tells which segments escaped.
    PartUnmatched,
    /// Not taken to the transmissions stage (its epochs status says why).
    NotAnalysed,
}

impl ImageOutcome {
    pub fn as_str(&self) -> &'static str {
        match self {
            ImageOutcome::Ok => "ok",
            ImageOutcome::Error => "error",
            ImageOutcome::NotRegistered => "not-registered",
            ImageOutcome::PartUnmatched => "part-unmatched",
            ImageOutcome::NotAnalysed => "not-analysed",
        }
    }

    /// The capture was meant to be analysed and could not be.
    pub fn failed(&self) -> bool {
        matches!(
            self,
            ImageOutcome::Error | ImageOutcome::NotRegistered | ImageOutcome::PartUnmatched
        )
    }
}

impl std::fmt::Display for ImageOutcome {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct ImageStatus {
    pub status: ImageOutcome,
    pub message: Option<String>,
    pub registration: Option<Registration>,
    /// An eye's reference capture in a study without `psf_sd_px`: the blur
    /// that best describes each of a sample of its vessels' profiles.
    pub blur: Option<BlurEvidence>,
}

/// [`blur_evidence`] over a capture's segments.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct BlurEvidence {
    /// The best-fitting SD of each profile weighed, px.
    pub per_profile: Vec<f64>,
}

impl BlurEvidence {
    /// The capture's blur, px: the median of its profiles' (a profile
    /// crossed by another vessel or on a vessel that is no cylinder prefers
    /// some other blur, and a sum of residuals would let a few such decide),
    /// with enough profiles to judge by.
    pub fn sd_px(&self) -> Option<f64> {
        (self.per_profile.len() >= MIN_BLUR_PROFILES)
            .then(|| crate::images::profile::median(self.per_profile.clone()))
    }
}

/// Profiles of an eye's reference capture below which no blur is judged.
const MIN_BLUR_PROFILES: usize = 20;
/// Every how many usable positions of a segment a profile is weighed for
/// the blur, and at most how many per segment.
const BLUR_EVERY: usize = 4;
const BLUR_PER_SEGMENT: usize = 12;
/// A best-fitting blur at or above this SD (px) in a study run without
/// `psf_sd_px` is warned of: on simulated studies sharp captures came out
/// at 0.0–0.2 px (DEVELOPERS.md).
pub(crate) const BLUR_WARN_PX: f64 = 0.8;

#[derive(serde::Serialize, serde::Deserialize)]
/// The transmissions stage's result. The profile positions themselves stay in the
/// stage's item cache, one entry per capture, and are streamed from there
/// into the positions table and into the fits, so memory does not grow
/// with the number of captures.
pub struct TransmissionTables {
    /// One per capture row of the epoch table.
    pub status: Vec<ImageStatus>,
    /// Profile positions per capture.
    pub position_counts: Vec<usize>,
    /// Positions by flag (`unflagged` for none), over all captures.
    pub flag_counts: BTreeMap<String, usize>,
    /// Per vessel kind: unflagged positions, and those of them with a
    /// central light reflex found.
    pub reflex_counts: BTreeMap<String, [usize; 2]>,
    /// Each capture's cache key in this stage (downstream item keys build on it).
    pub keys: Vec<Key>,
}

/// The transmissions stage.
pub(crate) struct Transmissions;

impl Transmissions {
    /// Each capture's item key: the capture file's content (or its spectra
    /// rows) with everything the stage does to it.
    fn item_keys(run: &Run) -> Vec<Key> {
        if run.study.spectra.is_some() {
            spectra_item_keys(run.study, run.output::<Epochs>())
        } else {
            item_keys(run.study, run.output::<Epochs>(), run.hashes())
        }
    }
}

impl Stage for Transmissions {
    const NAME: &'static str = "transmissions";
    // 9: profiles of odd width are flagged (`odd-width`); 10: reflexes
    // counted per kind; 11: through a blur, a reflex shown on a quarter of
    // a segment's positions marks them all; 12: an eye's reference capture
    // is weighed for a blur when none is given; 13: neighbouring vessels
    // are kept out of a profile's background and shape fit; 14: each
    // position keeps its background levels.
    const VERSION: u32 = 14;
    const SUMMARY: &'static str =
        "registration and transmissions along each vessel segment, capture by capture";
    const UPSTREAM: &'static [&'static str] = &["epochs"];
    type Output = TransmissionTables;

    fn settings(study: &Study) -> Key {
        settings_key(study)
    }

    fn inputs(run: &Run) -> Key {
        combine("captures", Self::item_keys(run))
    }

    fn build(run: &Run, runner: &Runner) -> Result<(TransmissionTables, String)> {
        let (study, epochs) = (run.study, run.output::<Epochs>());
        let keys = Self::item_keys(run);
        let shard = runner.shard();
        let analysed = epochs
            .captures
            .iter()
            .zip(&keys)
            .filter(|(c, k)| c.status.analysed() && shard.is_none_or(|s| s.holds(k)))
            .count();
        let items = runner.items(Self::NAME, analysed, "images");
        let t = if study.spectra.is_some() {
            from_spectra(study, epochs, keys, &items)
        } else {
            build(study, epochs, keys, &items)
        };
        let detail = items.finish("captures")?;
        let d = format!("{detail}; {} profile positions", t.total_positions());
        Ok((t, d))
    }

    fn write(t: &TransmissionTables, run: &Run, runner: &Runner) -> Result<Vec<PathBuf>> {
        t.write(run.out(), run.study, run.output::<Epochs>(), runner)
    }

    /// Every capture that could not be read or registered, by name; and a
    /// central reflex on many arteriolar positions where a two-band method
    /// takes its light in.
    fn report(run: &Run, runner: &Runner) {
        let (epochs, images) = (run.output::<Epochs>(), run.output::<Transmissions>());
        if let Some(line) = reflex_warning(run.study, images) {
            runner.warn(line);
        }
        if let Some(line) = blur_warning(run.study, epochs, images) {
            runner.warn(line);
        }
        for i in images.failed() {
            runner.warn(format!(
                "capture `{}` ({}): {}",
                epochs.captures[i].capture,
                images.status[i].status,
                images.status[i].message.clone().unwrap_or_default()
            ));
        }
    }

    fn describe(run: &Run) -> Option<String> {
        Some(describe(run.study))
    }
}

/// The warning for captures that look blurred in a study run without
/// `psf_sd_px`: the eyes whose reference capture's profiles are best
/// described by a blur of at least [`BLUR_WARN_PX`].
pub(crate) fn blur_warning(
    study: &Study,
    epochs: &EpochTables,
    images: &TransmissionTables,
) -> Option<String> {
    if study.instrument.psf_sd_px > 0.0 {
        return None;
    }
    let eyes: Vec<String> = images
        .status
        .iter()
        .enumerate()
        .filter_map(|(i, st)| {
            let sd = st.blur.as_ref()?.sd_px()?;
            let c = &epochs.captures[i];
            (sd >= BLUR_WARN_PX)
                .then(|| format!("{}/{}/{} {sd:.1} px", c.subject, c.session, c.eye))
        })
        .collect();
    if eyes.is_empty() {
        return None;
    }
    let shown: Vec<&str> = eyes.iter().take(5).map(String::as_str).collect();
    Some(format!(
        "the captures look blurred: a Gaussian point-spread function describes the vessels' profiles better than none in {} of the eyes' reference captures ({}{}; best-fitting SD). Without `instrument: psf_sd_px` the vessels are measured too wide (+22 % for arterioles at 1.5 px on a simulated study) and a central reflex is missed; give the blur measured on the camera as `psf_sd_px` (README, \"Blurred captures\")",
        eyes.len(),
        shown.join(", "),
        if eyes.len() > shown.len() {
            ", …"
        } else {
            ""
        }
    ))
}

/// Share of the usable arteriolar positions with a central reflex from
/// which a study with a two-band method is warned.
pub(crate) const REFLEX_WARN_SHARE: f64 = 0.1;

/// The warning for a central reflex on more than [`REFLEX_WARN_SHARE`] of
/// the usable positions of a kind, when a two-band method reads ODR from
/// the transmissions (a reflex's light stays in T where it is read on the
/// centre line, and raises T where it is read beside it less than where it
/// is not found).
pub(crate) fn reflex_warning(study: &Study, images: &TransmissionTables) -> Option<String> {
    let two_band: Vec<&str> = study
        .methods
        .iter()
        .filter(|m| matches!(m.kind, crate::config::study::MethodKind::TwoBand { .. }))
        .map(|m| m.label.as_str())
        .collect();
    if two_band.is_empty() {
        return None;
    }
    let shares: Vec<String> = images
        .reflex_counts
        .iter()
        .filter(|(_, [n, r])| *n > 0 && *r as f64 > REFLEX_WARN_SHARE * *n as f64)
        .map(|(k, [n, r])| format!("{r} of {n} usable {k} positions"))
        .collect();
    (!shares.is_empty()).then(|| {
        format!(
            "a central light reflex was found on {} (`central_reflex` in `transmissions/positions.csv`): the two-band ODR of {} takes in what the reflex leaves in the transmissions; the multiband fits' veil takes it up (README, \"Blurred captures\")",
            shares.join(" and "),
            two_band.iter().map(|l| format!("`{l}`")).collect::<Vec<_>>().join(", ")
        )
    })
}

/// One capture's item in the stage's cache.
pub(crate) type CaptureItem = (ImageStatus, Vec<PositionRow>);

/// The profile settings for a study's instrument.
pub(crate) fn profile_settings(study: &Study) -> ProfileSettings {
    ProfileSettings {
        half_length_px: (PROFILE_HALF_LENGTH_UM / study.instrument.pixel_size_um)
            .max(PROFILE_MIN_HALF_LENGTH_PX)
            + PROFILE_MARGIN_PX,
        psf_sd_px: study.instrument.psf_sd_px,
        ..ProfileSettings::default()
    }
}

/// The stage's settings part: everything besides the files that changes what it computes.
pub(crate) fn settings_key(study: &Study) -> Key {
    let mut k = KeyBuilder::new("transmissions-settings", Transmissions::VERSION);
    k.value("bands", &study.instrument.bands.len())
        .value("width-band", &width_band(study))
        .value("pixel-size", &study.instrument.pixel_size_um)
        .value("profile", &profile_settings(study))
        .value("min-score", &MIN_REGISTRATION_SCORE)
        .value("min-region-score", &MIN_REGION_SCORE)
        .value(
            "band-offsets",
            &study
                .instrument
                .bands
                .iter()
                .map(|b| b.offset_px)
                .collect::<Vec<_>>(),
        )
        .value(
            "estimate-band-offsets",
            &study.instrument.estimate_band_offsets,
        )
        .value("sensor-layout", &study.instrument.layout);
    for (name, f) in [
        ("dark", &study.instrument.dark),
        ("flat", &study.instrument.flat),
    ] {
        if let Some(p) = f {
            k.key(name, &hash_file_or_missing(p));
        }
    }
    k.finish()
}

/// The band used for registration and widths: the one nearest [`WIDTH_BAND_NM`]
/// (isosbestic, good vessel contrast in every vessel).
pub(crate) fn width_band(study: &Study) -> usize {
    nearest_band(study, WIDTH_BAND_NM)
}

/// The instrument's band whose centre is nearest `nm`.
pub(crate) fn nearest_band(study: &Study, nm: f64) -> usize {
    let bands = &study.instrument.bands;
    (0..bands.len())
        .min_by(|a, b| {
            (bands[*a].response.centre_nm() - nm)
                .abs()
                .total_cmp(&(bands[*b].response.centre_nm() - nm).abs())
        })
        .unwrap_or(0)
}

/// A capture's positions by flag, and per kind its unflagged positions
/// and those with a reflex.
fn tally_flags(rows: &[PositionRow]) -> (BTreeMap<String, usize>, BTreeMap<String, [usize; 2]>) {
    let mut flags: BTreeMap<String, usize> = BTreeMap::new();
    let mut reflex: BTreeMap<String, [usize; 2]> = BTreeMap::new();
    for r in rows {
        if r.flags.is_empty() {
            *flags.entry("unflagged".into()).or_default() += 1;
            let e = reflex.entry(r.kind.as_str().to_string()).or_default();
            e[0] += 1;
            e[1] += r.reflex as usize;
        }
        for f in &r.flags {
            *flags.entry(f.as_str().to_string()).or_default() += 1;
        }
    }
    (flags, reflex)
}

/// Adds one capture's reflex counts to a study's.
pub(crate) fn add_reflex_counts(
    to: &mut BTreeMap<String, [usize; 2]>,
    from: &BTreeMap<String, [usize; 2]>,
) {
    for (k, [n, r]) in from {
        let e = to.entry(k.clone()).or_default();
        e[0] += n;
        e[1] += r;
    }
}

type Tally = (
    usize,
    ImageStatus,
    usize,
    (BTreeMap<String, usize>, BTreeMap<String, [usize; 2]>),
);

fn merge(
    results: Vec<Tally>,
    status: &mut [ImageStatus],
    counts: &mut [usize],
    flags: &mut BTreeMap<String, usize>,
    reflex: &mut BTreeMap<String, [usize; 2]>,
) {
    for (i, st, n, (f, r)) in results {
        status[i] = st;
        counts[i] = n;
        for (k, c) in f {
            *flags.entry(k).or_default() += c;
        }
        add_reflex_counts(reflex, &r);
    }
}

/// Cache keys of the captures when a spectra table replaces the images.
pub(crate) fn spectra_item_keys(study: &Study, epochs: &EpochTables) -> Vec<Key> {
    let file = study
        .spectra_file
        .as_deref()
        .map(hash_file_or_missing)
        .unwrap_or_else(|| hash_file_or_missing(Path::new("")));
    let bands: Vec<&str> = study
        .instrument
        .bands
        .iter()
        .map(|b| b.name.as_str())
        .collect();
    epochs
        .captures
        .iter()
        .map(|row| {
            let mut k = KeyBuilder::new("spectra-capture", Transmissions::VERSION);
            k.key("table", &file)
                .value("capture", &(&row.subject, &row.capture))
                .value("bands", &bands)
                .value("status", &row.status);
            k.finish()
        })
        .collect()
}

/// The transmissions stage for a study with a spectra table: each analysed
/// capture's positions come from the table instead of its images (no
/// registration, no profile flags; `along_px` is the position index).
pub(crate) fn from_spectra(
    study: &Study,
    epochs: &EpochTables,
    keys: Vec<Key>,
    items: &Items,
) -> TransmissionTables {
    let n = epochs.captures.len();
    let table = study.spectra.as_ref();
    let file = study
        .spectra_file
        .as_deref()
        .unwrap_or(Path::new(""))
        .display()
        .to_string();
    let mut status: Vec<ImageStatus> = (0..n)
        .map(|i| ImageStatus {
            status: ImageOutcome::NotAnalysed,
            message: Some(format!("status `{}`", epochs.captures[i].status)),
            registration: None,
            blur: None,
        })
        .collect();
    let (mut counts, mut flags, mut reflex) = (vec![0; n], BTreeMap::new(), BTreeMap::new());
    let analysed: Vec<usize> = (0..n)
        .filter(|i| epochs.captures[*i].status.analysed() && items.holds(&keys[*i]))
        .collect();
    let results: Vec<Tally> = analysed
        .par_iter()
        .map(|&i| {
            let row = &epochs.captures[i];
            let (st, rows): CaptureItem = items.get_or_compute(&keys[i], || {
                let found = table.and_then(|t| {
                    t.captures
                        .get(&(row.subject.clone(), row.capture.clone()))
                        .or_else(|| t.captures.get(&(String::new(), row.capture.clone())))
                });
                match found {
                    None => (
                        ImageStatus {
                            status: ImageOutcome::Error,
                            message: Some(format!("not in the spectra table `{file}`")),
                            registration: None,
                            blur: None,
                        },
                        vec![],
                    ),
                    Some(ps) => (
                        ImageStatus {
                            status: ImageOutcome::Ok,
                            message: Some("from the spectra table".into()),
                            registration: None,
                            blur: None,
                        },
                        ps.iter()
                            .map(|p| PositionRow {
                                capture_index: i,
                                segment: p.vessel.clone(),
                                kind: p.kind,
                                position: p.position,
                                along_px: p.position as f64,
                                diameter_um: p.diameter_um,
                                flags: Vec::new(),
                                reflex: false,
                                transmission: p.transmission.clone(),
                                background: p.background.clone(),
                            })
                            .collect(),
                    ),
                }
            });
            (i, st, rows.len(), tally_flags(&rows))
        })
        .collect();
    merge(results, &mut status, &mut counts, &mut flags, &mut reflex);
    TransmissionTables {
        status,
        position_counts: counts,
        flag_counts: flags,
        reflex_counts: reflex,
        keys,
    }
}

/// The capture file behind each row of the epoch table.
pub(crate) fn capture_files(study: &Study, epochs: &EpochTables) -> Vec<PathBuf> {
    epochs
        .captures
        .iter()
        .map(|row| {
            let sess = study
                .subjects
                .iter()
                .find(|s| s.id == row.subject)
                .and_then(|s| s.sessions.iter().find(|x| x.id == row.session));
            sess.and_then(|s| s.captures.iter().find(|c| c.listed == row.capture))
                .map(|c| c.path.clone())
                .unwrap_or_default()
        })
        .collect()
}

/// Cache key of each capture: the stage settings, the capture's and its
/// eye's reference capture's content, the eye's segments and whether the
/// capture is analysed at all.
pub(crate) fn item_keys(
    study: &Study,
    epochs: &EpochTables,
    hashes: &BTreeMap<PathBuf, Key>,
) -> Vec<Key> {
    let settings = settings_key(study);
    let files = capture_files(study, epochs);
    let hash = |p: &Path| {
        hashes
            .get(p)
            .copied()
            .unwrap_or_else(|| hash_file_or_missing(p))
    };
    let mut first: BTreeMap<(String, String, String), usize> = BTreeMap::new();
    for (i, row) in epochs.captures.iter().enumerate() {
        first
            .entry((row.subject.clone(), row.session.clone(), row.eye.clone()))
            .or_insert(i);
    }
    epochs
        .captures
        .iter()
        .enumerate()
        .map(|(i, row)| {
            let group = (row.subject.clone(), row.session.clone(), row.eye.clone());
            let ref_i = first[&group];
            let segs = segments_file(study, &row.subject, &row.session, &row.eye);
            let mut k = KeyBuilder::new("transmissions-capture", Transmissions::VERSION);
            k.key("settings", &settings)
                .key("capture", &hash(&files[i]))
                .key("reference", &hash(&files[ref_i]))
                .value("is-reference", &(i == ref_i))
                .key(
                    "segments",
                    &segs
                        .map(|p| hash(&p))
                        .unwrap_or_else(|| hash_file_or_missing(Path::new(""))),
                )
                .value("status", &row.status);
            k.finish()
        })
        .collect()
}

fn segments_file(study: &Study, subject: &str, session: &str, eye: &str) -> Option<PathBuf> {
    let sess = study
        .subjects
        .iter()
        .find(|s| s.id == subject)?
        .sessions
        .iter()
        .find(|x| x.id == session)?;
    sess.segments
        .iter()
        .find(|(e, _)| e.as_str() == eye)
        .map(|(_, p)| p.clone())
}

pub fn build(
    study: &Study,
    epochs: &EpochTables,
    keys: Vec<Key>,
    items: &Items,
) -> TransmissionTables {
    let nb = study.instrument.bands.len();
    let wb = width_band(study);
    let settings = profile_settings(study);
    // Capture files and segment lists per (subject, session, eye).
    let files = capture_files(study, epochs);
    let corrections = Corrections::load(&study.instrument, wb);
    let mut groups: BTreeMap<(String, String, String), Vec<usize>> = BTreeMap::new();
    let mut segments: BTreeMap<(String, String, String), Vec<Segment>> = BTreeMap::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            for (eye, segs) in &sess.vessels {
                segments.insert(
                    (subj.id.clone(), sess.id.clone(), eye.as_str().to_string()),
                    segs.clone(),
                );
            }
        }
    }
    for (i, row) in epochs.captures.iter().enumerate() {
        groups
            .entry((row.subject.clone(), row.session.clone(), row.eye.clone()))
            .or_default()
            .push(i);
    }
    let mut status: Vec<ImageStatus> = (0..epochs.captures.len())
        .map(|_| ImageStatus {
            status: ImageOutcome::NotAnalysed,
            message: None,
            registration: None,
            blur: None,
        })
        .collect();
    let mut position_counts = vec![0; epochs.captures.len()];
    let mut flag_counts: BTreeMap<String, usize> = BTreeMap::new();
    let mut reflex_counts: BTreeMap<String, [usize; 2]> = BTreeMap::new();
    for (key, idx) in &groups {
        let segs = segments.get(key).cloned().unwrap_or_default();
        let analysed: Vec<usize> = idx
            .iter()
            .copied()
            .filter(|i| epochs.captures[*i].status.analysed())
            .collect();
        for i in idx {
            if !analysed.contains(i) {
                status[*i].message = Some(format!("status `{}`", epochs.captures[*i].status));
            }
        }
        // The eye's reference capture: its earliest listed capture. It is
        // read only if some capture of the eye is not in the cache.
        let Some(&ref_i) = idx.first() else { continue };
        let reference: std::sync::OnceLock<Result<EyeReference, CaptureError>> =
            std::sync::OnceLock::new();
        // Each capture's positions go to the cache; only counts stay here.
        // A shard of a run computes its own captures only.
        let mine: Vec<usize> = analysed
            .iter()
            .copied()
            .filter(|i| items.holds(&keys[*i]))
            .collect();
        let results: Vec<Tally> = mine
            .par_iter()
            .map(|&i| {
                let (st, rows): CaptureItem = items.get_or_compute(&keys[i], || {
                    let read_ref = || -> Result<EyeReference, CaptureError> {
                        let mut r =
                            read_laid_out(&files[ref_i], &study.instrument.layout, nb, None)?;
                        corrections
                            .as_ref()
                            .map_err(|e| CaptureError::Calibration(Box::new(e.clone())))?
                            .apply(&mut r)?;
                        Ok(EyeReference::new(r, wb))
                    };
                    match (reference.get_or_init(read_ref), &corrections) {
                        (Ok(r), Ok(corr)) => analyse_capture(
                            i,
                            i == ref_i,
                            &files[i],
                            r,
                            &segs,
                            nb,
                            wb,
                            &settings,
                            study.instrument.pixel_size_um,
                            corr,
                        ),
                        (_, Err(e)) => (
                            ImageStatus {
                                status: ImageOutcome::Error,
                                message: Some(format!("calibration frames: {e}")),
                                registration: None,
                                blur: None,
                            },
                            vec![],
                        ),
                        (Err(e), _) => (
                            ImageStatus {
                                status: ImageOutcome::Error,
                                message: Some(format!("reference capture: {e}")),
                                registration: None,
                                blur: None,
                            },
                            vec![],
                        ),
                    }
                });
                (i, st, rows.len(), tally_flags(&rows))
            })
            .collect();
        merge(
            results,
            &mut status,
            &mut position_counts,
            &mut flag_counts,
            &mut reflex_counts,
        );
    }
    TransmissionTables {
        status,
        position_counts,
        flag_counts,
        reflex_counts,
        keys,
    }
}

/// An eye's reference capture, its width band made ready once for
/// registering the eye's other captures to it.
pub struct EyeReference {
    pub capture: Multiband,
    target: RegistrationTarget,
}

impl EyeReference {
    pub fn new(capture: Multiband, width_band: usize) -> Self {
        let target =
            RegistrationTarget::new(&capture.bands[width_band], capture.width, capture.height);
        EyeReference { capture, target }
    }
}

#[allow(clippy::too_many_arguments)]
/// One capture through the stage: read, register to the eye's reference
/// (identity for the reference itself), map the segments, profile them.
pub fn analyse_capture(
    i: usize,
    is_reference: bool,
    file: &Path,
    reference: &EyeReference,
    segs: &[Segment],
    nb: usize,
    wb: usize,
    st: &ProfileSettings,
    px_um: f64,
    corr: &Corrections,
) -> (ImageStatus, Vec<PositionRow>) {
    let size = (reference.capture.width, reference.capture.height);
    let mut img = match read_laid_out(file, &corr.layout, nb, Some(size)) {
        Ok(m) => m,
        Err(e) => {
            return (
                ImageStatus {
                    status: ImageOutcome::Error,
                    message: Some(e.to_string()),
                    registration: None,
                    blur: None,
                },
                vec![],
            );
        }
    };
    if let Err(e) = corr.apply(&mut img) {
        return (
            ImageStatus {
                status: ImageOutcome::Error,
                message: Some(e.to_string()),
                registration: None,
                blur: None,
            },
            vec![],
        );
    }
    // The reference capture defines the eye's coordinates: identity.
    let reg = if is_reference {
        Registration::IDENTITY
    } else {
        reference.target.register(&img.bands[wb], 2.0)
    };
    // NaN-aware: a score that is not a number is no match.
    if !(reg.score >= MIN_REGISTRATION_SCORE) {
        let msg = format!(
            "match score {:.3} below {MIN_REGISTRATION_SCORE}",
            reg.score
        );
        return (
            ImageStatus {
                status: ImageOutcome::NotRegistered,
                message: Some(msg),
                registration: Some(reg),
                blur: None,
            },
            vec![],
        );
    }
    if !(reg.worst_region >= MIN_REGION_SCORE) {
        let msg = format!(
            "match score {:.3} overall, but {:.3} in one of its {} × {} regions (below {MIN_REGION_SCORE}): part of the capture does not show the fundus the reference shows (a partial blink, lashes or glare?)",
            reg.score, reg.worst_region, REGIONS, REGIONS
        );
        return (
            ImageStatus {
                status: ImageOutcome::PartUnmatched,
                message: Some(msg),
                registration: Some(reg),
                blur: None,
            },
            vec![],
        );
    }
    let (cx, cy) = (img.width as f64 / 2.0, img.height as f64 / 2.0);
    let lines: Vec<Vec<(f64, f64)>> = segs
        .iter()
        .map(|s| s.points.iter().map(|p| reg.apply(*p, cx, cy)).collect())
        .collect();
    let mut rows = Vec::new();
    // Without a blur given, the eye's reference capture is weighed for one.
    let mut blur = (is_reference && !(st.psf_sd_px > 0.0)).then(|| BlurEvidence {
        per_profile: Vec::new(),
    });
    let radii = vessel_radii(&img, &lines, wb, st);
    for (k, seg) in segs.iter().enumerate() {
        let others = Neighbour::all_but(&lines, &radii, k);
        let profiles = analyse_segment(&img, &lines[k], &others, wb, st);
        if let Some(b) = blur.as_mut() {
            let at: Vec<f64> = profiles
                .iter()
                .filter(|r| r.flags.is_empty())
                .step_by(BLUR_EVERY)
                .take(BLUR_PER_SEGMENT)
                .map(|r| r.along_px)
                .collect();
            b.per_profile
                .extend(blur_evidence(&img, &lines[k], &at, wb, st));
        }
        for r in profiles {
            rows.push(PositionRow {
                capture_index: i,
                segment: seg.id.clone(),
                kind: seg.kind,
                position: r.position,
                along_px: r.along_px,
                diameter_um: r.diameter_px * px_um,
                flags: r.flags,
                reflex: r.reflex,
                transmission: r.transmission,
                background: r.background,
            });
        }
    }
    (
        ImageStatus {
            status: ImageOutcome::Ok,
            message: None,
            registration: Some(reg),
            blur,
        },
        rows,
    )
}

impl TransmissionTables {
    /// The captures that could not be read or registered.
    pub fn failed(&self) -> Vec<usize> {
        (0..self.status.len())
            .filter(|i| self.status[*i].status.failed())
            .collect()
    }

    pub fn total_positions(&self) -> usize {
        self.position_counts.iter().sum()
    }

    /// One capture's profile positions, read back from the stage's cache.
    pub fn positions(&self, runner: &Runner, i: usize) -> Result<Vec<PositionRow>> {
        if self.status[i].status == ImageOutcome::NotAnalysed {
            return Ok(vec![]);
        }
        let (_, rows): CaptureItem = runner.item(Transmissions::NAME, &self.keys[i])?;
        Ok(rows
            .into_iter()
            .map(|mut r| {
                // The stored index is the one of the run that computed the item.
                r.capture_index = i;
                r
            })
            .collect())
    }

    pub fn write(
        &self,
        out: &Path,
        study: &Study,
        epochs: &EpochTables,
        runner: &Runner,
    ) -> Result<Vec<PathBuf>> {
        let dir = out.join("transmissions");
        let mut stream = TableStream::new(&dir, "positions");
        for i in 0..epochs.captures.len() {
            let rows = self.positions(runner, i)?;
            if !rows.is_empty() {
                stream.push(position_table(&rows, study, epochs))?;
            }
        }
        let mut written = stream.finish(position_table(&[], study, epochs))?;
        self.write_status(&dir, epochs, &mut written)?;
        Ok(written)
    }
}

/// The positions table's rows for some positions.
fn position_table(p: &[PositionRow], study: &Study, epochs: &EpochTables) -> Table {
    let c = &epochs.captures;
    let mut t = Table::new();
    t.text("subject", p.iter().map(|r| &c[r.capture_index].subject))
        .text("session", p.iter().map(|r| &c[r.capture_index].session))
        .text("eye", p.iter().map(|r| &c[r.capture_index].eye))
        .text("capture", p.iter().map(|r| &c[r.capture_index].capture))
        .text("segment", p.iter().map(|r| &r.segment))
        .text("kind", p.iter().map(|r| r.kind.as_str()))
        .int("position", p.iter().map(|r| r.position as i64))
        .real("along_px", p.iter().map(|r| r.along_px))
        .real("diameter_um", p.iter().map(|r| r.diameter_um))
        .text("quality_flags", p.iter().map(|r| Flag::join(&r.flags)))
        .text(
            "central_reflex",
            p.iter().map(|r| if r.reflex { "yes" } else { "no" }),
        );
    for (b, band) in study.instrument.bands.iter().enumerate() {
        t.real(
            &format!("t_{}", band.name),
            p.iter().map(|r| r.transmission[b]),
        );
    }
    for (b, band) in study.instrument.bands.iter().enumerate() {
        t.real(
            &format!("background_{}", band.name),
            p.iter()
                .map(|r| r.background.get(b).copied().unwrap_or(f64::NAN)),
        );
    }
    t
}

impl TransmissionTables {
    fn write_status(
        &self,
        dir: &Path,
        epochs: &EpochTables,
        written: &mut Vec<PathBuf>,
    ) -> Result<()> {
        let c = &epochs.captures;
        let s = &self.status;
        let mut t = Table::new();
        t.text("subject", c.iter().map(|r| &r.subject))
            .text("session", c.iter().map(|r| &r.session))
            .text("eye", c.iter().map(|r| &r.eye))
            .text("capture", c.iter().map(|r| &r.capture))
            .text("image_status", s.iter().map(|r| r.status.as_str()))
            .opt_text("message", s.iter().map(|r| r.message.clone()))
            .opt_real("dx_px", s.iter().map(|r| r.registration.map(|g| g.dx)))
            .opt_real("dy_px", s.iter().map(|r| r.registration.map(|g| g.dy)))
            .opt_real(
                "angle_deg",
                s.iter().map(|r| r.registration.map(|g| g.angle_deg)),
            )
            .opt_real(
                "match_score",
                s.iter().map(|r| r.registration.map(|g| g.score)),
            )
            .opt_real(
                "worst_region_score",
                s.iter().map(|r| r.registration.map(|g| g.worst_region)),
            )
            .opt_real(
                "blur_sd_px",
                s.iter()
                    .map(|r| r.blur.as_ref().and_then(BlurEvidence::sd_px)),
            );
        written.extend(t.write(dir, "captures")?);
        Ok(())
    }
}

/// This stage's part of the report's methods text.
fn describe(study: &Study) -> String {
    let s = profile_settings(study);
    let read_as = match &study.instrument.layout {
        crate::config::study::SensorLayout::Pages => {
            "multi-page TIFF files (one page per band)".to_string()
        }
        crate::config::study::SensorLayout::Tiles(_) => {
            "single TIFF frames holding every band at its own rectangle of the sensor, cut into one image per band".to_string()
        }
        crate::config::study::SensorLayout::Grid { columns, rows } => format!(
            "single TIFF frames holding the bands as a {columns} × {rows} grid of equal tiles, cut into one image per band"
        ),
    };
    let (shape, beside) = if s.psf_sd_px > 0.0 {
        (
            format!(
                "The cylinder was seen through the optics' blur: convolved with a Gaussian point-spread function of SD {} px (the instrument's, with the pixel's area and the profile's interpolation added in quadrature), with a central light reflex as a share of the absorbed light given back over the middle third of the diameter, kept where it lowered the residual significantly (F > 25); a segment with such a reflex at a quarter or more of its usable positions was marked as reflecting at all of them.",
                s.psf_sd_px
            ),
            "; through the blur a reflex cannot be read around, and its light stays in the centre-line value",
        )
    } else {
        (
            "Where a central light reflex brightened the axis (by more than 2 % of the background over both flanks), the cylinder was fitted without it. No point-spread function was given; each eye's earliest capture was checked for optical blur by fitting the cylinder convolved with Gaussians of SD 0 to 3 px to a sample of its profiles (the median over profiles of the best-fitting SD, reported per eye).".to_string(),
            ", or at the darkest points beside a reflex",
        )
    };
    let reach = if s.psf_sd_px > 0.0 {
        format!(
            "{:.0} px and twice the point-spread function's SD",
            s.neighbour_margin_px
        )
    } else {
        format!("{:.0} px", s.neighbour_margin_px)
    };
    format!(
        "Captures were read as {read_as} and registered to the eye's earliest capture by a rigid transform (translation and rotation; phase correlation followed by normalised cross-correlation with sub-pixel interpolation in the band nearest 570 nm); captures with a match score below {MIN_REGISTRATION_SCORE} were flagged as not registered, and captures whose correlation fell below {MIN_REGION_SCORE} in any of {REGIONS} × {REGIONS} regions of the compared area (a partial blink, lashes or glare) as partly unmatched; neither was analysed. Along each vessel segment, intensity profiles were sampled across the vessel every {:.0} px by bilinear interpolation; a quadratic background was fitted to the outer parts of each profile (a straight line where fewer than four samples remained on a side) and an absorbing-cylinder profile to the vessel, giving its centre, width (diameter at {:.1} µm per pixel) and fit residual; samples lying on another segment (within its radius, the median over every fourth position of that segment in the same capture, plus {reach}) were left out of both fits. {shape} Transmission in each band was the intensity on the vessel's centre line divided by the background beneath it{beside}. Positions were flagged (off the image, contrast below {:.2}, residual too large, within {:.0} px of another segment or with too little fundus beside the vessel for a background, a width below 2/3 or above 3/2 of the segment's median in that capture) and flagged positions were not used.",
        s.spacing_px, study.instrument.pixel_size_um, s.min_contrast, s.neighbour_margin_px
    )
}
