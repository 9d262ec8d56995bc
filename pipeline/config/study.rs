//! Study files: who was imaged, with which instrument and protocol, which
//! captures and reference logs belong to each session, which oximetry
//! methods to run and which data to exclude. Paths are relative to the
//! study file's folder. The layout is documented in the README.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use chrono::{DateTime, FixedOffset};

use super::csvfile::read_csv;
use super::diag::{Findings, Mark};
pub use super::eye::Eye;
use super::protocol::{Protocol, load_protocol, read_protocol};
use super::read::{MapView, Reader};
use super::segments::Segment;
pub use super::spo2log::ReferenceLog;
use super::spo2log::SpO2Log;
use super::time::parse_time;
use super::vessel_model::{EXTENSION_NAMES, Extensions, ModelChoice};
use super::yaml::{Node, Value};

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum BandResponse {
    Gaussian {
        centre_nm: f64,
        fwhm_nm: f64,
    },
    /// Tabulated relative response, (wavelength nm, response), ascending.
    Table {
        file: PathBuf,
        points: Vec<(f64, f64)>,
    },
}

impl BandResponse {
    /// The band's centre: given, or the response-weighted mean wavelength.
    pub fn centre_nm(&self) -> f64 {
        match self {
            BandResponse::Gaussian { centre_nm, .. } => *centre_nm,
            BandResponse::Table { points, .. } => {
                points.iter().map(|p| p.0 * p.1).sum::<f64>()
                    / points.iter().map(|p| p.1).sum::<f64>()
            }
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Band {
    pub name: String,
    pub response: BandResponse,
    /// Where this band's image sits relative to the registration band, px
    /// (content at (x, y) there is at (x + dx, y + dy) here).
    pub offset_px: Option<(f64, f64)>,
    /// The band's signal from a white target relative to the other bands
    /// (the camera's sensitivity times the lamp's spectrum there): with it,
    /// a background level over its gain is the fundus reflectance's band
    /// average up to one common factor ([`crate::oximetry::fundus`]).
    pub gain: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Instrument {
    pub name: String,
    pub pixel_size_um: f64,
    pub bands: Vec<Band>,
    /// Dark frame and flat field: multi-page TIFFs, one page per band.
    pub dark: Option<PathBuf>,
    pub flat: Option<PathBuf>,
    /// Estimate each capture's band-to-band offsets by phase correlation
    /// against the registration band (bands with `offset_px` keep theirs).
    pub estimate_band_offsets: bool,
    /// How a capture file holds the bands.
    pub layout: SensorLayout,
    /// SD of the optics' point-spread function (eye and camera), taken as
    /// a Gaussian, px; 0 when not given (profiles fitted sharp).
    pub psf_sd_px: f64,
}

/// How a capture file (and the dark and flat frames) holds the bands.
#[derive(Debug, Clone, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
pub enum SensorLayout {
    /// One TIFF page per band, in band order.
    #[default]
    Pages,
    /// One frame; each band at its rectangle `[x, y, width, height]` (px,
    /// from the top left), in band order, all of one size.
    Tiles(Vec<[usize; 4]>),
    /// One frame cut into `columns` × `rows` equal tiles, the bands in
    /// reading order (left to right, then down).
    Grid { columns: usize, rows: usize },
}

impl SensorLayout {
    /// Each band's rectangle in a frame of `width` × `height` px, or why the
    /// frame cannot hold them; `None` for pages.
    pub fn rectangles(
        &self,
        bands: usize,
        width: usize,
        height: usize,
    ) -> Option<Result<Vec<[usize; 4]>, String>> {
        let rects = match self {
            SensorLayout::Pages => return None,
            SensorLayout::Tiles(t) => t.clone(),
            SensorLayout::Grid { columns, rows } => {
                if width % columns != 0 || height % rows != 0 {
                    return Some(Err(format!(
                        "a {columns} × {rows} grid does not divide a {width} × {height} px frame into equal tiles"
                    )));
                }
                let (tw, th) = (width / columns, height / rows);
                (0..bands)
                    .map(|b| [(b % columns) * tw, (b / columns) * th, tw, th])
                    .collect()
            }
        };
        for (b, r) in rects.iter().enumerate() {
            if r[0] + r[2] > width || r[1] + r[3] > height {
                return Some(Err(format!(
                    "band {}'s tile [{}, {}, {}, {}] reaches beyond the {width} × {height} px frame",
                    b + 1,
                    r[0],
                    r[1],
                    r[2],
                    r[3]
                )));
            }
        }
        Some(Ok(rects))
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Capture {
    /// As written in the list.
    pub listed: String,
    pub path: PathBuf,
    pub time: DateTime<FixedOffset>,
    pub eye: Eye,
    /// Where it was listed, for messages.
    pub source: PathBuf,
    /// Not part of the capture's identity (cache keys, manifest).
    #[serde(skip)]
    pub mark: Mark,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Session {
    pub id: String,
    pub start: DateTime<FixedOffset>,
    pub eyes: Vec<Eye>,
    /// Recorded switch times: (epoch index, time), in epoch order.
    pub switches: Vec<(usize, DateTime<FixedOffset>)>,
    pub captures: Vec<Capture>,
    pub reference: Option<ReferenceLog>,
    pub segments: BTreeMap<Eye, PathBuf>,
    /// The reference log's samples, read once with the study
    /// ([`crate::study::load_study`]); not part of the session's identity.
    #[serde(skip)]
    pub spo2: Option<SpO2Log>,
    /// Each eye's segments, read once with the study.
    #[serde(skip)]
    pub vessels: BTreeMap<Eye, Vec<Segment>>,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Subject {
    pub id: String,
    pub age: Option<f64>,
    pub sex: Option<String>,
    pub pigmentation: Option<i64>,
    /// The site that recruited the subject, in a multi-site study: the
    /// epoch model then carries a site term (`stats::epoch_model`).
    #[serde(default)]
    pub site: Option<String>,
    pub sessions: Vec<Session>,
}

/// How a two-band method turns ODR into SO2.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum Calibration {
    /// SO2 (%) = intercept + slope · ODR.
    Fixed { intercept: f64, slope: f64 },
    /// Arterioles in `epoch` at the reference SpO2, venules at `venule_so2`.
    TwoPoint { epoch: usize, venule_so2: f64 },
    /// Regression on the reference SpO2 across subjects, leave one subject out.
    Regression,
    /// Per subject: the slope from the subject's own arteriolar ODR against
    /// the reference SpO2 across epochs, the line through the subject's
    /// mean; free of what differs between subjects (veil, vessel diameter).
    WithinSubject,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum MethodKind {
    TwoBand {
        sensitive: usize,
        isosbestic: usize,
        calibration: Calibration,
        diameter_correction: bool,
    },
    Multiband {
        bands: Vec<usize>,
        loss: Loss,
        pointwise: bool,
        model: ModelChoice,
        /// Where the study file says `model:` (for the check of what the
        /// bands can identify, made once the study is loaded).
        #[serde(skip)]
        model_mark: Option<Mark>,
        /// What weights each band's average over wavelength.
        weighting: Weighting,
    },
}

/// What weights a band's average over wavelength in a multiband model.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum Weighting {
    /// The band's response alone.
    Response,
    /// The response times the fundus reflectance behind each segment, read
    /// from its background levels over the bands' gains.
    Fundus,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum Loss {
    Squared,
    Huber { scale: f64 },
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Method {
    /// Label used in tables (defaults to the method's name).
    pub label: String,
    pub kind: MethodKind,
}

#[derive(Debug, Clone, PartialEq, Default, serde::Serialize, serde::Deserialize)]
pub struct Exclusions {
    pub min_diameter_um: Option<f64>,
    pub subjects: Vec<String>,
    pub captures: Vec<ExcludedCapture>,
}

/// A capture the study file leaves out, and why.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ExcludedCapture {
    /// As written: the capture's path relative to the study file's folder,
    /// or as its capture list writes it when that names one capture only.
    pub file: String,
    pub reason: String,
    /// The listed capture it names, found once the study is read (not part
    /// of the study's identity: it depends on where the folder lies).
    #[serde(skip)]
    pub path: PathBuf,
    #[serde(skip)]
    pub mark: Mark,
}

/// Adjustment of p values across a model's contrasts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Adjustment {
    /// Holm's step-down adjustment (Holm 1979).
    Holm,
    None,
}

/// The `power:` section: plan a follow-up study from this run's own
/// variance components (the `power` stage; `satstep power` takes the same
/// choices on its command line).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PowerSettings {
    /// The effects to detect, by contrast label, in SO2 points.
    pub effects: Vec<(String, f64)>,
    pub subjects: Vec<usize>,
    pub captures_per_epoch: Vec<usize>,
    pub segments_per_eye: Vec<usize>,
    pub eyes: Vec<usize>,
    pub sessions: Vec<usize>,
    /// Method labels to plan for (empty: every method).
    pub methods: Vec<String>,
    /// Vessel kinds to plan for (empty: both).
    pub kinds: Vec<String>,
    pub target: f64,
    /// Studies per design; `None` for the automatic count.
    pub simulations: Option<usize>,
    pub seed: u64,
}

/// The tables the report writes, by name: what `report: appendix:` may list.
pub const REPORT_TABLES: &[&str] = &[
    "participants",
    "so2_by_epoch",
    "contrasts",
    "variance_components",
    "agreement",
    "agreement_by_group",
    "bias_difference",
    "slope_on_reference",
    "method_comparison",
    "method_agreement",
    "capture_accounting",
    "data_quality",
    "truth",
];

/// The `report:` section: how the report presents the results. Nothing in
/// it changes a number.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ReportSettings {
    /// The method the single-method figures show; `None`: the first joint
    /// multiband method, else the first method.
    pub primary: Option<String>,
    /// Print width of the figures' PNG files, mm.
    pub figure_width_mm: f64,
    /// Print resolution of the figures' PNG files, dots per inch.
    pub dpi: u32,
    /// Tables set in the appendix instead of the results; `None`: every
    /// table longer than [`ReportSettings::LONG_TABLE_ROWS`] rows.
    pub appendix: Option<Vec<String>>,
    /// The date under the title; `None`: the last session's date, so that
    /// the same inputs give the same report on any day.
    pub date: Option<chrono::NaiveDate>,
}

impl ReportSettings {
    /// Rows above which a table goes to the appendix unless `appendix:` says.
    pub const LONG_TABLE_ROWS: usize = 24;
}

impl Default for ReportSettings {
    fn default() -> Self {
        ReportSettings {
            primary: None,
            // The text width of a two-column journal page, about 7 in.
            figure_width_mm: 174.0,
            dpi: 300,
            appendix: None,
            date: None,
        }
    }
}

/// Bounds of the design choices a plan may try: subjects, captures per
/// epoch, segments per eye, eyes, sessions (the `power:` section and
/// `satstep power` alike).
pub const PLAN_BOUNDS: [(usize, usize); 5] = [(2, 500), (1, 50), (1, 30), (1, 2), (1, 2)];

/// Settings of the statistics stage.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StatisticsSettings {
    /// Coverage of the confidence intervals of contrasts and slopes.
    pub confidence: f64,
    /// Adjustment of the contrasts' p values within a method and kind.
    pub adjustment: Adjustment,
    /// Leave joint multiband fits the adequacy test calls misfits out of
    /// every statistic (by default they are used and flagged in `fits/so2`).
    pub adequate_only: bool,
    /// The subject attribute the agreement with the reference is broken
    /// down by, as pulse-oximeter accuracy practice asks for pigmentation.
    pub agreement_by: GroupBy,
}

/// A subject attribute that groups subjects.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GroupBy {
    /// The fundus pigmentation grade (higher: darker).
    Pigmentation,
    Sex,
    Site,
    /// No breakdown.
    None,
}

impl GroupBy {
    pub const NAMES: &[&str] = &["pigmentation", "sex", "site", "none"];

    pub fn name(self) -> &'static str {
        match self {
            GroupBy::Pigmentation => "pigmentation",
            GroupBy::Sex => "sex",
            GroupBy::Site => "site",
            GroupBy::None => "none",
        }
    }

    /// The subject's group, if it has the attribute.
    pub fn of(self, s: &Subject) -> Option<String> {
        match self {
            GroupBy::Pigmentation => s.pigmentation.map(|g| g.to_string()),
            GroupBy::Sex => s.sex.clone(),
            GroupBy::Site => s.site.clone(),
            GroupBy::None => None,
        }
    }
}

impl Default for StatisticsSettings {
    fn default() -> Self {
        StatisticsSettings {
            confidence: 0.95,
            adjustment: Adjustment::Holm,
            adequate_only: false,
            agreement_by: GroupBy::Pigmentation,
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Study {
    pub id: String,
    pub title: String,
    pub file: PathBuf,
    pub root: PathBuf,
    pub protocol: Protocol,
    pub protocol_file: Option<PathBuf>,
    pub instrument: Instrument,
    pub subjects: Vec<Subject>,
    pub methods: Vec<Method>,
    pub exclusions: Exclusions,
    pub statistics: StatisticsSettings,
    /// A follow-up study to plan (the `power` stage), if any.
    pub power: Option<PowerSettings>,
    /// How the report presents the results (the `report:` section).
    pub report: ReportSettings,
    /// A spectra table that replaces the images (see `config::spectra`).
    pub spectra_file: Option<PathBuf>,
    /// Its contents, read and checked with the study.
    #[serde(skip)]
    pub spectra: Option<super::spectra::SpectraTable>,
    pub output: PathBuf,
    /// A pooled analysis (`satstep pool`): the sites' runs it pools, in
    /// order; empty for a study run from its own captures.
    #[serde(default)]
    pub sites: Vec<SiteSource>,
}

/// One site's run in a pooled analysis: its name, where its results were
/// read from, and the SHA-256 of its manifest (which holds the hashes of
/// every file the site's run read).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SiteSource {
    pub name: String,
    pub results: PathBuf,
    pub manifest_sha256: String,
    pub subjects: usize,
    pub captures: usize,
}

impl Study {
    /// The study as cache keys see it: every path inside the study file's
    /// folder written relative to that folder, and every path outside it
    /// absolute, so that how the folder was typed (`.`, relative, absolute)
    /// or where it lies changes no key. A moved folder is up to date; one
    /// that names files outside itself by a relative path is not once those
    /// resolve elsewhere, which is the safe side. File contents enter the
    /// keys separately, as hashes or parsed values.
    pub fn portable(&self) -> Study {
        let cwd = std::env::current_dir().unwrap_or_default();
        let root = lexical(&cwd.join(&self.root));
        let place = |p: &Path| -> PathBuf {
            let abs = lexical(&cwd.join(p));
            abs.strip_prefix(&root)
                .map(Path::to_path_buf)
                .unwrap_or(abs)
        };
        let mut s = self.clone();
        s.file = place(&s.file);
        s.root = PathBuf::new();
        s.output = place(&s.output);
        for p in [&mut s.protocol_file, &mut s.spectra_file]
            .into_iter()
            .chain([&mut s.instrument.dark, &mut s.instrument.flat])
            .flatten()
        {
            *p = place(p);
        }
        for b in &mut s.instrument.bands {
            if let BandResponse::Table { file, .. } = &mut b.response {
                *file = place(file);
            }
        }
        for session in s.subjects.iter_mut().flat_map(|s| &mut s.sessions) {
            for c in &mut session.captures {
                c.path = place(&c.path);
                c.source = place(&c.source);
            }
            if let Some(r) = &mut session.reference {
                r.path = place(&r.path);
            }
            for p in session.segments.values_mut() {
                *p = place(p);
            }
        }
        s
    }

    pub fn capture_count(&self) -> usize {
        self.subjects
            .iter()
            .flat_map(|s| &s.sessions)
            .map(|s| s.captures.len())
            .sum()
    }
}

/// A study path may name the file or a folder holding `study.yaml`.
pub fn resolve_study_path(arg: &Path) -> PathBuf {
    if arg.is_dir() {
        arg.join("study.yaml")
    } else {
        arg.to_path_buf()
    }
}

const STUDY_KEYS: &[&str] = &[
    "study",
    "title",
    "protocol",
    "instrument",
    "subjects",
    "methods",
    "exclusions",
    "statistics",
    "power",
    "spectra",
    "report",
    "output",
];
const REPORT_KEYS: &[&str] = &["primary", "figure_width_mm", "dpi", "appendix", "date"];
const POWER_KEYS: &[&str] = &[
    "effects",
    "subjects",
    "captures_per_epoch",
    "segments_per_eye",
    "eyes",
    "sessions",
    "methods",
    "kinds",
    "target",
    "simulations",
    "seed",
];
const STATISTICS_KEYS: &[&str] = &["confidence", "adjust", "adequate_only", "agreement_by"];
const INSTRUMENT_KEYS: &[&str] = &[
    "name",
    "pixel_size_um",
    "bands",
    "dark",
    "flat",
    "band_offsets",
    "layout",
    "psf_sd_px",
];
const LAYOUT_KEYS: &[&str] = &["tiles", "grid"];
const GRID_KEYS: &[&str] = &["columns", "rows"];
const BAND_KEYS: &[&str] = &[
    "name",
    "centre_nm",
    "fwhm_nm",
    "response",
    "offset_px",
    "gain",
];
const SUBJECT_KEYS: &[&str] = &["id", "age", "sex", "pigmentation", "site", "sessions"];
const SESSION_KEYS: &[&str] = &[
    "id",
    "start",
    "eyes",
    "switches",
    "captures",
    "reference",
    "segments",
];
const CAPTURE_KEYS: &[&str] = &["file", "time", "eye"];
const LOG_KEYS: &[&str] = &["file", "columns"];
const LOG_COLUMN_KEYS: &[&str] = &["time", "spo2"];
const METHOD_KEYS_TWO_BAND: &[&str] = &[
    "method",
    "label",
    "sensitive",
    "isosbestic",
    "calibration",
    "diameter_correction",
];
const METHOD_KEYS_MULTI: &[&str] = &[
    "method",
    "label",
    "bands",
    "loss",
    "huber_scale",
    "model",
    "weighting",
];
const METHOD_NAMES: &[&str] = &["two-band", "multiband", "multiband-pointwise"];
const CALIBRATION_KEYS: &[&str] = &["mode", "intercept", "slope", "epoch", "venule_so2"];
const EXCLUSION_KEYS: &[&str] = &["min_diameter_um", "subjects", "captures"];
const EXCLUDED_CAPTURE_KEYS: &[&str] = &["file", "reason"];

/// Reads and validates a study file and everything it names (protocol,
/// capture lists, reference logs, segment files). All findings, errors and
/// warnings, come back together; the study is `Some` only without errors.
/// Reads and checks the study file and the files it lists, keeping the
/// study even when there are errors so that the session files can be
/// checked too; [`crate::study::load_study`] reads those and decides.
pub(crate) fn read_study_file(path: &Path) -> (Option<Study>, Findings) {
    read_study_file_with(path, false)
}

/// [`read_study_file`], optionally without requiring the segment files
/// to exist (`satstep segments propose` writes them).
pub(crate) fn read_study_file_with(
    path: &Path,
    segment_files_may_be_missing: bool,
) -> (Option<Study>, Findings) {
    let mut findings = Findings::new();
    let Some(root_node) = super::read::load_tree(
        path,
        "study file",
        "give the study file, or a folder that holds `study.yaml`",
        &mut findings,
    ) else {
        return (None, findings);
    };
    let root_dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let study = {
        let mut r = Reader::new(path, &mut findings);
        r.segment_files_may_be_missing = segment_files_may_be_missing;
        read_study(&mut r, &root_node, path, &root_dir)
    };
    // File-level checks that need the whole study.
    let study = study.map(|mut s| {
        match_exclusions(&mut s, &mut findings);
        check_files(&s, &mut findings);
        s.spectra = check_spectra(&s, &mut findings);
        s
    });
    (study, findings)
}

/// `a/./b/../c` → `a/c`, without touching the file system (a capture
/// named in the study need not exist when a spectra table replaces it).
fn lexical(p: &Path) -> PathBuf {
    use std::path::Component;
    let mut out = PathBuf::new();
    for c in p.components() {
        match c {
            Component::CurDir => {}
            // `..` above the start is kept, and so is a second one after it.
            Component::ParentDir => {
                if matches!(
                    out.components().next_back(),
                    None | Some(Component::ParentDir)
                ) || !out.pop()
                {
                    out.push("..");
                }
            }
            other => out.push(other.as_os_str()),
        }
    }
    out
}

/// Finds the listed capture each exclusion names: by its path relative to
/// the study file's folder, else as a capture list writes it if that is one
/// capture only. An exclusion that names none, or several, is an error: a
/// capture meant to be left out must not be analysed by mistake.
fn match_exclusions(study: &mut Study, findings: &mut Findings) {
    let listed: Vec<(&str, &Capture)> = study
        .subjects
        .iter()
        .flat_map(|s| {
            s.sessions
                .iter()
                .flat_map(move |x| x.captures.iter().map(move |c| (s.id.as_str(), c)))
        })
        .collect();
    let rel = |c: &Capture| {
        lexical(&c.path)
            .strip_prefix(lexical(&study.root))
            .map(|p| p.to_string_lossy().replace('\\', "/"))
            .unwrap_or_else(|_| c.path.display().to_string())
    };
    let mut found = Vec::new();
    for e in &study.exclusions.captures {
        let want = lexical(&study.root.join(&e.file));
        let by_path: Vec<&(&str, &Capture)> = listed
            .iter()
            .filter(|(_, c)| lexical(&c.path) == want)
            .collect();
        let hits = if by_path.is_empty() {
            listed.iter().filter(|(_, c)| c.listed == e.file).collect()
        } else {
            by_path
        };
        match hits.as_slice() {
            [(_, c)] => found.push(Some(c.path.clone())),
            [] => {
                let names: Vec<String> = listed.iter().map(|(_, c)| rel(c)).collect();
                let names: Vec<&str> = names.iter().map(String::as_str).collect();
                let example = names
                    .first()
                    .copied()
                    .unwrap_or("subjects/ID/captures/c001.tif");
                let best = names
                    .iter()
                    .map(|n| (strsim::normalized_damerau_levenshtein(&e.file, n), *n))
                    .max_by(|a, b| a.0.total_cmp(&b.0).then(b.1.cmp(a.1)))
                    .filter(|(score, _)| *score >= 0.8);
                let hint = match best {
                    Some((_, n)) => format!("did you mean `{n}`?"),
                    None => format!(
                        "write the capture's path relative to the study file's folder, e.g. `{example}`"
                    ),
                };
                findings
                    .error(
                        &study.file,
                        Some(e.mark),
                        format!("excluded capture `{}` is not a listed capture", e.file),
                    )
                    .hint(hint);
                found.push(None);
            }
            many => {
                let which: Vec<String> = many
                    .iter()
                    .map(|(s, c)| format!("`{}` (subject {s})", rel(c)))
                    .collect();
                findings
                    .error(
                        &study.file,
                        Some(e.mark),
                        format!(
                            "excluded capture `{}` names {} captures: {}",
                            e.file,
                            many.len(),
                            which.join(", ")
                        ),
                    )
                    .hint("write the one capture's path relative to the study file's folder");
                found.push(None);
            }
        }
    }
    for (e, p) in study.exclusions.captures.iter_mut().zip(found) {
        e.path = p.unwrap_or_default();
    }
}

fn read_study(r: &mut Reader, node: &Node, file: &Path, root: &Path) -> Option<Study> {
    let m = r.map(node, "the study file", STUDY_KEYS)?;
    let id = r
        .required(&m, "study", "the study file")
        .and_then(|n| r.name(n, "`study`"));
    let title = m
        .get("title")
        .and_then(|n| r.name(n, "`title`"))
        .unwrap_or_default();

    let (protocol, protocol_file) = match r.required(&m, "protocol", "the study file") {
        None => (None, None),
        Some(n) => match n.as_scalar() {
            Some(rel) => {
                let p = root.join(rel);
                match load_protocol(&p) {
                    Ok(proto) => (Some(proto), Some(p)),
                    Err(f) => {
                        if f.iter().any(|x| x.mark.is_none() && x.file == p) {
                            r.error(
                                n.mark,
                                format!("cannot read the protocol file `{}`", p.display()),
                            )
                            .hint("the path is relative to the study file's folder");
                        } else {
                            r.findings.extend(f);
                        }
                        (None, Some(p))
                    }
                }
            }
            None => (read_protocol(r, n), None),
        },
    };

    let instrument = r
        .required(&m, "instrument", "the study file")
        .and_then(|n| read_instrument(r, n, root));

    let mut subjects = Vec::new();
    let mut seen_subjects: HashMap<String, Mark> = HashMap::new();
    if let Some(n) = r.required(&m, "subjects", "the study file") {
        if let Some(items) = r.list(n, "`subjects`") {
            if items.is_empty() {
                r.error(n.mark, "the study has no subjects")
                    .hint("add at least one `- id: …` under `subjects:`");
            }
            for item in items {
                if let Some(s) = read_subject(r, item, root, protocol.as_ref()) {
                    let mark = item.get("id").map(|x| x.mark).unwrap_or(item.mark);
                    if let Some(first) = seen_subjects.get(&s.id) {
                        r.error(
                            mark,
                            format!(
                                "subject `{}` is listed twice (first at line {})",
                                s.id, first.line
                            ),
                        );
                    }
                    seen_subjects.insert(s.id.clone(), mark);
                    subjects.push((s, mark));
                }
            }
        }
    }
    // A site for some subjects and not others would put the others in the
    // reference site without a word.
    if let Some((with, _)) = subjects.iter().find(|(s, _)| s.site.is_some()) {
        for (s, mark) in subjects.iter().filter(|(s, _)| s.site.is_none()) {
            r.error(
                *mark,
                format!(
                    "subject `{}` has no `site`, but subject `{}` has one: in a multi-site study every subject needs its site",
                    s.id, with.id
                ),
            )
            .hint("add `site: …` to every subject, or remove it from all");
        }
    }
    let subjects: Vec<Subject> = subjects.into_iter().map(|(s, _)| s).collect();

    let methods = match m.get("methods") {
        None => Vec::new(),
        Some(n) => read_methods(
            r,
            n,
            instrument.as_ref().map_or(&[][..], |i| &i.bands[..]),
            protocol.as_ref(),
        ),
    };

    let exclusions = match m.get("exclusions") {
        None => Some(Exclusions::default()),
        Some(n) => read_exclusions(r, n, &seen_subjects),
    };

    let statistics = match m.get("statistics") {
        None => Some(StatisticsSettings::default()),
        Some(n) => read_statistics(r, n),
    };

    let power = match (m.get("power"), &protocol) {
        (Some(n), Some(p)) => read_power(r, n, p, &methods).map(Some),
        _ => Some(None),
    };

    let report = match m.get("report") {
        None => Some(ReportSettings::default()),
        Some(n) => read_report(r, n, &methods),
    };

    let spectra_file = m
        .get("spectra")
        .and_then(|n| r.text(n, "`spectra`"))
        .map(|t| root.join(t));

    let (output, output_mark) = match m.get("output") {
        None => (root.join("results"), node.mark),
        Some(n) => (
            root.join(r.text(n, "`output`").unwrap_or_else(|| "results".into())),
            n.mark,
        ),
    };
    if output.exists() && !output.is_dir() {
        r.error(
            output_mark,
            format!(
                "the output folder `{}` is a file, not a folder",
                output.display()
            ),
        )
        .hint("set `output:` to a folder (it is created if missing), e.g. `results`");
    }

    Some(Study {
        id: id?,
        title,
        file: file.to_path_buf(),
        root: root.to_path_buf(),
        protocol: protocol?,
        protocol_file,
        instrument: instrument?,
        subjects,
        methods,
        exclusions: exclusions?,
        statistics: statistics?,
        power: power?,
        report: report?,
        spectra_file,
        spectra: None,
        output,
        sites: Vec::new(),
    })
}

fn positive(r: &mut Reader, n: &Node, what: &str) -> Option<f64> {
    let v = r.number(n, what)?;
    if v <= 0.0 {
        r.error(
            n.mark,
            format!("{what} must be greater than zero, found {v}"),
        );
        return None;
    }
    Some(v)
}

/// A blur wider than this leaves no vessel edge to fit at the profile's
/// length.
const MAX_PSF_SD_PX: f64 = 5.0;

pub(crate) fn read_instrument(r: &mut Reader, node: &Node, root: &Path) -> Option<Instrument> {
    let m = r.map(node, "`instrument`", INSTRUMENT_KEYS)?;
    let name = m
        .get("name")
        .and_then(|n| r.name(n, "`name`"))
        .unwrap_or_else(|| "unnamed".into());
    let pixel = r
        .required(&m, "pixel_size_um", "`instrument`")
        .and_then(|n| positive(r, n, "`pixel_size_um`"));
    let mut bands: Vec<Band> = Vec::new();
    let mut ok = true;
    if let Some(n) = r.required(&m, "bands", "`instrument`") {
        match r.list(n, "`bands`") {
            Some(items) => {
                if items.len() < 2 {
                    r.error(n.mark, "the instrument needs at least two bands")
                        .hint("list every spectral band in the order of the capture's pages");
                    ok = false;
                }
                let mut marks = Vec::new();
                for item in items {
                    match read_band(r, item, root) {
                        Some(b) => {
                            if bands.iter().any(|x| x.name == b.name) {
                                r.error(item.mark, format!("band name `{}` is used twice", b.name));
                                ok = false;
                            }
                            bands.push(b);
                            marks.push(item.mark);
                        }
                        None => ok = false,
                    }
                }
                // Gains are relative to each other: a band without one
                // leaves the others meaningless.
                let with = bands.iter().filter(|b| b.gain.is_some()).count();
                if with > 0 && with < bands.len() {
                    let (b, mark) = bands
                        .iter()
                        .zip(&marks)
                        .find(|(b, _)| b.gain.is_none())
                        .expect("some band has no gain");
                    let given: Vec<String> = bands
                        .iter()
                        .filter(|b| b.gain.is_some())
                        .map(|b| format!("`{}`", b.name))
                        .collect();
                    r.error(
                        *mark,
                        format!(
                            "band `{}` has no `gain`, though {} {} one",
                            b.name,
                            given.join(", "),
                            if with == 1 { "has" } else { "have" }
                        ),
                    )
                    .hint("gains are relative to each other: give every band its `gain`, or none");
                    ok = false;
                }
            }
            None => ok = false,
        }
    }
    let file = |r: &mut Reader, key: &str| -> Option<PathBuf> {
        let n = m.get(key)?;
        let p = root.join(r.text(n, &format!("`{key}`"))?);
        if !p.is_file() {
            r.error(
                n.mark,
                format!("the {key} frame `{}` does not exist", p.display()),
            )
            .hint("a multi-page TIFF with one page per band, the size of the captures");
        }
        Some(p)
    };
    let (dark, flat) = (file(r, "dark"), file(r, "flat"));
    let estimate_band_offsets = match m.get("band_offsets") {
        None => false,
        Some(n) => match r.text(n, "`band_offsets`")?.as_str() {
            "estimate" => true,
            "given" => false,
            other => {
                r.error(n.mark, format!("`band_offsets` is `given` (each band's `offset_px`, default 0) or `estimate` (phase correlation per capture), found `{other}`"));
                return None;
            }
        },
    };
    let layout = match m.get("layout") {
        None => Some(SensorLayout::Pages),
        Some(n) => read_layout(r, n, bands.len()),
    };
    let psf_sd_px = match m.get("psf_sd_px") {
        None => Some(0.0),
        Some(n) => r.number(n, "`psf_sd_px`").and_then(|v| {
            if (0.0..=MAX_PSF_SD_PX).contains(&v) {
                Some(v)
            } else {
                r.error(
                    n.mark,
                    format!("`psf_sd_px` must be from 0 to {MAX_PSF_SD_PX} px, found {v}"),
                )
                .hint("the SD of the Gaussian that blurs a point in the captures, in pixels (e.g. 1.5), measured with an edge or point target");
                None
            }
        }),
    };
    if !ok {
        return None;
    }
    Some(Instrument {
        name,
        pixel_size_um: pixel?,
        bands,
        dark,
        flat,
        estimate_band_offsets,
        layout: layout?,
        psf_sd_px: psf_sd_px?,
    })
}

/// `layout: pages`, `layout: {tiles: [[x, y, width, height], …]}` (one per
/// band) or `layout: {grid: {columns: C, rows: R}}`.
pub(crate) fn read_layout(r: &mut Reader, n: &Node, bands: usize) -> Option<SensorLayout> {
    const HINT: &str = "`layout: pages` (one TIFF page per band), `layout: {tiles: [[x, y, width, height], …]}` (one rectangle per band, in band order) or `layout: {grid: {columns: 4, rows: 2}}` (equal tiles, bands left to right, then down)";
    if !matches!(n.value, Value::Map(_)) {
        let v = r.text(n, "`layout`")?;
        if v == "pages" {
            return Some(SensorLayout::Pages);
        }
        r.error(n.mark, format!("unknown `layout: {v}`")).hint(HINT);
        return None;
    }
    let m = r.map(n, "`layout`", LAYOUT_KEYS)?;
    match (m.get("tiles"), m.get("grid")) {
        (Some(t), None) => {
            let items = r.list(t, "`tiles`")?;
            if items.len() != bands {
                r.error(
                    t.mark,
                    format!(
                        "`tiles` lists {} rectangles; the instrument has {bands} bands",
                        items.len()
                    ),
                )
                .hint("one `[x, y, width, height]` per band, in band order");
                return None;
            }
            let mut rects = Vec::new();
            for item in items {
                let v = r.list(item, "a tile")?;
                let nums: Vec<i64> = v
                    .iter()
                    .filter_map(|x| r.integer(x, "a tile's `[x, y, width, height]`"))
                    .collect();
                if nums.len() != 4
                    || v.len() != 4
                    || nums[0] < 0
                    || nums[1] < 0
                    || nums[2] < 1
                    || nums[3] < 1
                {
                    r.error(item.mark, "a tile is `[x, y, width, height]` in pixels: x and y at least 0, width and height at least 1");
                    return None;
                }
                rects.push([
                    nums[0] as usize,
                    nums[1] as usize,
                    nums[2] as usize,
                    nums[3] as usize,
                ]);
            }
            if let Some(k) = rects
                .iter()
                .position(|q| (q[2], q[3]) != (rects[0][2], rects[0][3]))
            {
                r.error(items[k].mark, format!("band {}'s tile is {} × {} px, band 1's {} × {}: every band's tile has one size", k + 1, rects[k][2], rects[k][3], rects[0][2], rects[0][3]));
                return None;
            }
            Some(SensorLayout::Tiles(rects))
        }
        (None, Some(g)) => {
            let gm = r.map(g, "`grid`", GRID_KEYS)?;
            let c = r
                .required(&gm, "columns", "`grid`")
                .and_then(|x| r.integer(x, "`columns`"));
            let rr = r
                .required(&gm, "rows", "`grid`")
                .and_then(|x| r.integer(x, "`rows`"));
            let (c, rr) = (c?, rr?);
            if c < 1 || rr < 1 || (c * rr) < bands as i64 {
                r.error(
                    g.mark,
                    format!(
                        "a {c} × {rr} grid has room for {} tiles; the instrument has {bands} bands",
                        (c * rr).max(0)
                    ),
                );
                return None;
            }
            Some(SensorLayout::Grid {
                columns: c as usize,
                rows: rr as usize,
            })
        }
        _ => {
            r.error(n.mark, "`layout` names either `tiles` or `grid`")
                .hint(HINT);
            None
        }
    }
}

fn read_band(r: &mut Reader, node: &Node, root: &Path) -> Option<Band> {
    let m = r.map(node, "a band", BAND_KEYS)?;
    let name = r
        .required(&m, "name", "a band")
        .and_then(|n| r.name(n, "a band's `name`"));
    let response = match (m.get("centre_nm"), m.get("fwhm_nm"), m.get("response")) {
        (Some(c), Some(w), None) => {
            let c = positive(r, c, "`centre_nm`");
            let w = positive(r, w, "`fwhm_nm`");
            if let Some(cv) = c {
                if !(250.0..=1000.0).contains(&cv) {
                    r.error(m.get("centre_nm").expect("present").mark, format!("`centre_nm` {cv} is outside 250–1000 nm, the range of the hemoglobin tables"));
                    return None;
                }
            }
            Some(BandResponse::Gaussian {
                centre_nm: c?,
                fwhm_nm: w?,
            })
        }
        (None, None, Some(f)) => {
            let rel = r.text(f, "`response`")?;
            let p = root.join(&rel);
            read_response_table(r, &p, f.mark)
        }
        _ => {
            r.error(m.mark(), "a band needs `centre_nm` and `fwhm_nm`, or a `response` file")
                .hint("e.g. `{name: b570, centre_nm: 570, fwhm_nm: 10}` or `{name: b570, response: bands/b570.csv}`");
            None
        }
    };
    let offset_px = match m.get("offset_px") {
        None => None,
        Some(n) => {
            let v = r.list(n, "`offset_px`")?;
            if v.len() != 2 {
                r.error(n.mark, "`offset_px` is `[dx, dy]` in pixels");
                return None;
            }
            Some((
                r.number(&v[0], "`offset_px` dx")?,
                r.number(&v[1], "`offset_px` dy")?,
            ))
        }
    };
    let gain = match m.get("gain") {
        None => Some(None),
        Some(n) => positive(r, n, "`gain`").map(Some),
    };
    Some(Band {
        name: name?,
        response: response?,
        offset_px,
        gain: gain?,
    })
}

fn read_response_table(r: &mut Reader, p: &Path, mark: Mark) -> Option<BandResponse> {
    if !p.is_file() {
        r.error(
            mark,
            format!("response file `{}` does not exist", p.display()),
        )
        .hint("the path is relative to the study file's folder");
        return None;
    }
    let t = read_csv(p, r.findings)?;
    let wl = t.column(p, "wavelength_nm", "a band response", r.findings)?;
    let rs = t.column(p, "response", "a band response", r.findings)?;
    let mut pts = Vec::new();
    let mut ok = true;
    for row in &t.rows {
        let parse = |i: usize| {
            row.field(i).and_then(|(s, m)| {
                s.parse::<f64>()
                    .ok()
                    .filter(|v| v.is_finite())
                    .map(|v| (v, m))
            })
        };
        match (parse(wl), parse(rs)) {
            (Some((w, _)), Some((v, _))) if v >= 0.0 => pts.push((w, v)),
            _ => {
                r.findings.error(
                    p,
                    Some(Mark::new(row.line, 1)),
                    "expected a wavelength in nm and a response ≥ 0",
                );
                ok = false;
            }
        }
    }
    if ok && (pts.len() < 2 || pts.windows(2).any(|w| w[1].0 <= w[0].0)) {
        r.findings.error(
            p,
            None,
            "a band response needs at least two rows with increasing wavelengths",
        );
        ok = false;
    }
    if ok && pts.iter().all(|(_, v)| *v == 0.0) {
        r.findings
            .error(p, None, "the band response is zero everywhere");
        ok = false;
    }
    ok.then(|| BandResponse::Table {
        file: p.to_path_buf(),
        points: pts,
    })
}

fn read_subject(
    r: &mut Reader,
    node: &Node,
    root: &Path,
    protocol: Option<&Protocol>,
) -> Option<Subject> {
    let m = r.map(node, "a subject", SUBJECT_KEYS)?;
    let id = r
        .required(&m, "id", "a subject")
        .and_then(|n| r.name(n, "a subject's `id`"));
    let age = m.get("age").and_then(|n| positive(r, n, "`age`"));
    let sex = m.get("sex").and_then(|n| r.text(n, "`sex`"));
    let pigmentation = m
        .get("pigmentation")
        .and_then(|n| r.integer(n, "`pigmentation`"));
    let site = m.get("site").and_then(|n| r.name(n, "a subject's `site`"));
    let mut sessions = Vec::new();
    if let Some(n) = r.required(&m, "sessions", "a subject") {
        if let Some(items) = r.list(n, "`sessions`") {
            if items.is_empty() {
                r.error(n.mark, "the subject has no sessions");
            }
            for item in items {
                if let Some(s) = read_session(r, item, root, protocol) {
                    if sessions.iter().any(|x: &Session| x.id == s.id) {
                        r.error(
                            item.mark,
                            format!("session `{}` is listed twice for this subject", s.id),
                        );
                    }
                    sessions.push(s);
                }
            }
        }
    }
    Some(Subject {
        id: id?,
        age,
        sex,
        pigmentation,
        site,
        sessions,
    })
}

fn read_eye(r: &mut Reader, n: &Node) -> Option<Eye> {
    r.choice(n, "eye", &Eye::NAMES)
        .and_then(|s| Eye::from_name(&s))
}

fn read_session(
    r: &mut Reader,
    node: &Node,
    root: &Path,
    protocol: Option<&Protocol>,
) -> Option<Session> {
    let m = r.map(node, "a session", SESSION_KEYS)?;
    let id = m
        .get("id")
        .and_then(|n| r.name(n, "a session's `id`"))
        .unwrap_or_else(|| "1".into());
    let start = r
        .required(&m, "start", "a session")
        .and_then(|n| r.time(n, "`start`"));
    let eyes: Vec<Eye> = match r.required(&m, "eyes", "a session") {
        None => Vec::new(),
        Some(n) => match n.as_scalar() {
            Some(_) => read_eye(r, n).into_iter().collect(),
            None => r
                .list(n, "`eyes`")
                .map(|items| items.iter().filter_map(|i| read_eye(r, i)).collect())
                .unwrap_or_default(),
        },
    };
    let switches = match (m.get("switches"), protocol, start) {
        (Some(n), Some(p), Some(st)) => read_switches(r, n, p, st),
        // Without a valid protocol the epoch names cannot be checked, and
        // the protocol's own errors say why: one root cause, one finding.
        (Some(_), None, _) => Vec::new(),
        _ => Vec::new(),
    };
    let captures = match r.required(&m, "captures", "a session") {
        None => Vec::new(),
        Some(n) => {
            let before = r.findings.error_count();
            let c = read_captures(r, n, root, &eyes);
            // Said once: a list whose lines were all wrong has its own errors.
            if c.is_empty() && r.findings.error_count() == before {
                r.error(n.mark, "the session lists no captures")
                    .hint("a capture list has a header line `file,time` and one line per capture");
            }
            c
        }
    };
    let reference = m.get("reference").and_then(|n| read_log(r, n, root));
    let mut segments = BTreeMap::new();
    if let Some(n) = m.get("segments") {
        let allowed: Vec<&str> = eyes.iter().map(|e| e.as_str()).collect();
        if let Some(sm) = r.map(n, "`segments` (one file per eye)", &allowed) {
            for eye in &eyes {
                if let Some(f) = sm.get(eye.as_str()) {
                    if let Some(rel) = r.text(f, "a segment file") {
                        let p = root.join(&rel);
                        if !p.is_file() && !r.segment_files_may_be_missing {
                            r.error(f.mark, format!("segment file `{rel}` does not exist"))
                                .hint("the path is relative to the study file's folder; `satstep segments propose` writes a proposal there from the eye's reference capture");
                        }
                        segments.insert(*eye, p);
                    }
                }
            }
        }
    }
    if eyes.is_empty() {
        return None;
    }
    Some(Session {
        id,
        start: start?,
        eyes,
        switches,
        captures,
        reference,
        segments,
        spo2: None,
        vessels: BTreeMap::new(),
    })
}

fn read_switches(
    r: &mut Reader,
    node: &Node,
    p: &Protocol,
    start: DateTime<FixedOffset>,
) -> Vec<(usize, DateTime<FixedOffset>)> {
    let names: Vec<&str> = p.epochs.iter().map(|e| e.name.as_str()).collect();
    let Some(m) = r.map(node, "`switches` (epoch name: time it began)", &names) else {
        return Vec::new();
    };
    let mut out: Vec<(usize, DateTime<FixedOffset>, Mark)> = Vec::new();
    for (i, name) in names.iter().enumerate() {
        if let Some(n) = m.get(name) {
            if let Some(t) = r.time(n, &format!("switch to `{name}`")) {
                out.push((i, t, n.mark));
            }
        }
    }
    let mut prev = (start, "the session start".to_string());
    for (i, t, mark) in &out {
        if *i == 0 && *t != start {
            r.error(
                *mark,
                format!(
                    "the first epoch `{}` begins at the session's `start`",
                    names[0]
                ),
            )
            .hint("remove this switch, or move `start` to this time");
        } else if *i > 0 && *t <= prev.0 {
            r.error(
                *mark,
                format!(
                    "switch to `{}` at {} is not after {}",
                    names[*i],
                    t.to_rfc3339(),
                    prev.1
                ),
            )
            .hint("recorded switch times must follow the protocol's epoch order");
        }
        prev = (*t, format!("the switch to `{}`", names[*i]));
    }
    out.into_iter()
        .filter(|(i, _, _)| *i > 0)
        .map(|(i, t, _)| (i, t))
        .collect()
}

fn read_captures(r: &mut Reader, node: &Node, root: &Path, eyes: &[Eye]) -> Vec<Capture> {
    let default_eye = (eyes.len() == 1).then(|| eyes[0]);
    let mut out = Vec::new();
    if let Some(rel) = node.as_scalar() {
        // A CSV capture list: file,time[,eye]
        let p = root.join(rel);
        if !p.is_file() {
            r.error(node.mark, format!("capture list `{rel}` does not exist"))
                .hint("the path is relative to the study file's folder");
            return out;
        }
        let Some(t) = read_csv(&p, r.findings) else {
            return out;
        };
        let fc = t.column(&p, "file", "a capture list", r.findings);
        let tc = t.column(&p, "time", "a capture list", r.findings);
        let ec = t.header.iter().position(|h| h == "eye");
        let (Some(fc), Some(tc)) = (fc, tc) else {
            return out;
        };
        let list_dir = p.parent().map(Path::to_path_buf).unwrap_or_default();
        for row in &t.rows {
            let Some((file, fmark)) = row.field(fc).filter(|(s, _)| !s.is_empty()) else {
                r.findings
                    .error(&p, Some(Mark::new(row.line, 1)), "this row has no `file`");
                continue;
            };
            let time = match row.field(tc) {
                Some((s, m)) => match parse_time(s) {
                    Ok(v) => Some(v),
                    Err(e) => {
                        r.findings.error(&p, Some(m), format!("`time`: {e}"))
                            .hint("write date-times as ISO 8601 with the UTC offset, e.g. `2026-03-04T09:15:00+01:00`");
                        None
                    }
                },
                None => {
                    r.findings
                        .error(&p, Some(Mark::new(row.line, 1)), "this row has no `time`");
                    None
                }
            };
            let eye = match ec.and_then(|i| row.field(i)).filter(|(s, _)| !s.is_empty()) {
                Some((s, m)) => match Eye::from_name(s).filter(|e| eyes.contains(e)) {
                    Some(e) => Some(e),
                    None => {
                        r.findings
                            .error(
                                &p,
                                Some(m),
                                format!("eye `{s}` is not one of this session's eyes"),
                            )
                            .hint(format!(
                                "this session images {}",
                                eyes.iter()
                                    .map(|e| format!("`{}`", e.as_str()))
                                    .collect::<Vec<_>>()
                                    .join(", ")
                            ));
                        None
                    }
                },
                None => {
                    if default_eye.is_none() {
                        r.findings.error(
                            &p,
                            Some(fmark),
                            "the session images two eyes: say which one in an `eye` column",
                        );
                    }
                    default_eye
                }
            };
            if let (Some(time), Some(eye)) = (time, eye) {
                out.push(Capture {
                    listed: file.to_string(),
                    path: list_dir.join(file),
                    time,
                    eye,
                    source: p.clone(),
                    mark: fmark,
                });
            }
        }
        return out;
    }
    let Some(items) = r.list(node, "`captures` (a CSV file or a list)") else {
        return out;
    };
    for item in items {
        let Some(m) = r.map(item, "a capture", CAPTURE_KEYS) else {
            continue;
        };
        let file = r
            .required(&m, "file", "a capture")
            .and_then(|n| r.text(n, "`file`"));
        let time = r
            .required(&m, "time", "a capture")
            .and_then(|n| r.time(n, "`time`"));
        let eye = match m.get("eye") {
            Some(n) => read_eye(r, n),
            None => {
                if default_eye.is_none() {
                    r.error(
                        m.mark(),
                        "the session images two eyes: say which one with `eye:`",
                    );
                }
                default_eye
            }
        };
        if let (Some(f), Some(t), Some(e)) = (file, time, eye) {
            out.push(Capture {
                path: root.join(&f),
                listed: f,
                time: t,
                eye: e,
                source: r.file.to_path_buf(),
                mark: item.mark,
            });
        }
    }
    out
}

fn read_log(r: &mut Reader, node: &Node, root: &Path) -> Option<ReferenceLog> {
    let m = r.map(node, "`reference` (the SpO2 log)", LOG_KEYS)?;
    let file_node = r.required(&m, "file", "`reference`")?;
    let rel = r.text(file_node, "`file`")?;
    let p = root.join(&rel);
    let (tc, sc) = match m.get("columns") {
        None => ("time".to_string(), "spo2".to_string()),
        Some(n) => {
            let cm = r.map(n, "`columns`", LOG_COLUMN_KEYS)?;
            let t = cm
                .get("time")
                .and_then(|x| r.text(x, "`time`"))
                .unwrap_or_else(|| "time".into());
            let s = cm
                .get("spo2")
                .and_then(|x| r.text(x, "`spo2`"))
                .unwrap_or_else(|| "spo2".into());
            (t, s)
        }
    };
    if !p.is_file() {
        r.error(
            file_node.mark,
            format!("reference log `{rel}` does not exist"),
        )
        .hint("the path is relative to the study file's folder");
        return None;
    }
    Some(ReferenceLog {
        path: p,
        time_column: tc,
        spo2_column: sc,
    })
}

fn read_methods(
    r: &mut Reader,
    node: &Node,
    instrument_bands: &[Band],
    protocol: Option<&Protocol>,
) -> Vec<Method> {
    let bands: Vec<String> = instrument_bands.iter().map(|b| b.name.clone()).collect();
    let mut out: Vec<Method> = Vec::new();
    let Some(items) = r.list(node, "`methods`") else {
        return out;
    };
    let band_refs: Vec<&str> = bands.iter().map(|s| s.as_str()).collect();
    for item in items {
        let Some(kind_node) = item.get("method") else {
            r.error(item.mark, "a method needs `method:`")
                .hint(format!("one of {}", METHOD_NAMES.join(", ")));
            continue;
        };
        let Some(kind) = r.choice(kind_node, "method", METHOD_NAMES) else {
            continue;
        };
        let keys = if kind == "two-band" {
            METHOD_KEYS_TWO_BAND
        } else {
            METHOD_KEYS_MULTI
        };
        let Some(m) = r.map(item, &format!("method `{kind}`"), keys) else {
            continue;
        };
        let label = m
            .get("label")
            .and_then(|n| r.name(n, "`label`"))
            .unwrap_or_else(|| kind.clone());
        if out.iter().any(|x| x.label == label) {
            r.error(item.mark, format!("two methods are labelled `{label}`"))
                .hint("give each a distinct `label:`");
        }
        let band = |r: &mut Reader, key: &str| -> Option<usize> {
            let n = r.required(&m, key, &format!("method `{kind}`"))?;
            let b = r.text(n, &format!("`{key}`"))?;
            let idx = band_refs.iter().position(|x| *x == b);
            if idx.is_none() && !band_refs.is_empty() {
                let hint = super::diag::suggest(&b, &band_refs);
                r.error(
                    n.mark,
                    format!("band `{b}` is not one of the instrument's bands"),
                )
                .hint(hint);
            }
            idx
        };
        let method = if kind == "two-band" {
            let s = band(r, "sensitive");
            let i = band(r, "isosbestic");
            let cal = r
                .required(&m, "calibration", "method `two-band`")
                .and_then(|n| read_calibration(r, n, protocol));
            let dc = m
                .get("diameter_correction")
                .and_then(|n| r.boolean(n, "`diameter_correction`"))
                .unwrap_or(false);
            if let (Some(s), Some(i)) = (s, i) {
                if s == i {
                    r.error(
                        m.mark(),
                        "`sensitive` and `isosbestic` must be different bands",
                    );
                }
            }
            match (s, i, cal) {
                (Some(s), Some(i), Some(c)) => Some(MethodKind::TwoBand {
                    sensitive: s,
                    isosbestic: i,
                    calibration: c,
                    diameter_correction: dc,
                }),
                _ => None,
            }
        } else {
            let bands_sel = match m.get("bands") {
                None => Some((0..bands.len()).collect::<Vec<_>>()),
                Some(n) => r.list(n, "`bands`").map(|items| {
                    items
                        .iter()
                        .filter_map(|b| {
                            let t = r.text(b, "a band")?;
                            let idx = band_refs.iter().position(|x| *x == t);
                            if idx.is_none() {
                                let hint = super::diag::suggest(&t, &band_refs);
                                r.error(
                                    b.mark,
                                    format!("band `{t}` is not one of the instrument's bands"),
                                )
                                .hint(hint);
                            }
                            idx
                        })
                        .collect()
                }),
            };
            if let (Some(b), Some(n)) = (&bands_sel, m.get("bands")) {
                if b.len() < 4 {
                    r.error(n.mark, format!("a multiband fit needs at least 4 bands, {} given", b.len()))
                        .hint("with fewer bands than unknowns the model cannot be fitted; use `two-band` instead");
                }
            }
            let loss = match m.get("loss") {
                None => Some("huber".to_string()),
                Some(n) => r.choice(n, "`loss`", &["huber", "squared"]),
            };
            let scale = match m.get("huber_scale") {
                None => Some(1.5),
                Some(n) => positive(r, n, "`huber_scale`"),
            };
            let loss = match (loss.as_deref(), scale) {
                (Some("squared"), _) => Some(Loss::Squared),
                (Some(_), Some(s)) => Some(Loss::Huber { scale: s }),
                _ => None,
            };
            let pointwise = kind == "multiband-pointwise";
            let model = match m.get("model") {
                None => Some(ModelChoice::Fixed(Extensions::BASE)),
                Some(n) => read_model(r, n, pointwise),
            };
            let weighting = read_weighting(r, m.get("weighting"), instrument_bands);
            match (bands_sel, loss, model, weighting) {
                (Some(b), Some(l), Some(model), Some(weighting)) => Some(MethodKind::Multiband {
                    bands: b,
                    loss: l,
                    pointwise,
                    model,
                    model_mark: m.get("model").map(|n| n.mark),
                    weighting,
                }),
                _ => None,
            }
        };
        if let Some(k) = method {
            out.push(Method { label, kind: k });
        }
    }
    out
}

/// `weighting:` of a multiband method. Without it, the fundus weights the
/// bands when every band has a `gain` (the gains are there for nothing
/// else), and the response alone otherwise. (A spectra table's
/// `background` column is checked with the table.)
fn read_weighting(r: &mut Reader, node: Option<&Node>, bands: &[Band]) -> Option<Weighting> {
    let gains = !bands.is_empty() && bands.iter().all(|b| b.gain.is_some());
    let Some(node) = node else {
        return Some(if gains {
            Weighting::Fundus
        } else {
            Weighting::Response
        });
    };
    match r
        .choice(node, "`weighting`", &["response", "fundus"])?
        .as_str()
    {
        "fundus" if !gains => {
            r.error(
                node.mark,
                "`weighting: fundus` needs every band's `gain`, and the instrument does not give them all",
            )
            .hint("add `gain:` to each band (its signal from a white target relative to the other bands), or use `weighting: response`");
            None
        }
        "fundus" => Some(Weighting::Fundus),
        _ => Some(Weighting::Response),
    }
}

/// `model:` of a multiband method: `base`, `auto`, an extension's name or
/// a list of them.
fn read_model(r: &mut Reader, node: &Node, pointwise: bool) -> Option<ModelChoice> {
    let choices: Vec<&str> = ["base", "auto"]
        .into_iter()
        .chain(EXTENSION_NAMES)
        .collect();
    let names: Vec<(String, Mark)> = match r.list_or_one(node) {
        Some(items) => items
            .into_iter()
            .filter_map(|n| r.choice(n, "`model`", &choices).map(|t| (t, n.mark)))
            .collect(),
        None => return None,
    };
    if pointwise && names.iter().any(|(n, _)| n != "base") {
        r.error(node.mark, "`multiband-pointwise` fits the base model only")
            .hint("the extensions are shared along a segment: use `method: multiband` for them");
        return None;
    }
    if names.iter().any(|(n, _)| n == "auto" || n == "base") && names.len() > 1 {
        r.error(
            node.mark,
            "`base` and `auto` stand alone; list extensions to combine them",
        );
        return None;
    }
    match names.first().map(|(n, _)| n.as_str()) {
        Some("auto") => Some(ModelChoice::Auto),
        _ => Some(ModelChoice::Fixed(
            names
                .iter()
                .fold(Extensions::BASE, |acc, (n, _)| acc.with(n).unwrap_or(acc)),
        )),
    }
}

fn read_calibration(
    r: &mut Reader,
    node: &Node,
    protocol: Option<&Protocol>,
) -> Option<Calibration> {
    let m = r.map(node, "`calibration`", CALIBRATION_KEYS)?;
    let mode = r.required(&m, "mode", "`calibration`").and_then(|n| {
        r.choice(
            n,
            "calibration `mode`",
            &["fixed", "two-point", "regression", "within-subject"],
        )
    })?;
    let only = |r: &mut Reader, m: &MapView, allowed: &[&str]| {
        for k in CALIBRATION_KEYS
            .iter()
            .filter(|k| **k != "mode" && !allowed.contains(k))
        {
            if let Some(n) = m.get(k) {
                r.error(
                    n.mark,
                    format!("`{k}` does not apply to calibration mode `{mode}`"),
                );
            }
        }
    };
    match mode.as_str() {
        "fixed" => {
            only(r, &m, &["intercept", "slope"]);
            let a = r
                .required(&m, "intercept", "a fixed calibration")
                .and_then(|n| r.number(n, "`intercept`"));
            let b_node = r.required(&m, "slope", "a fixed calibration");
            let b = b_node.and_then(|n| r.number(n, "`slope`"));
            if let (Some(b), Some(n)) = (b, b_node) {
                if b >= 0.0 {
                    r.warning(n.mark, format!("`slope` {b} is not negative: SO2 usually falls as the optical density ratio rises"));
                }
            }
            Some(Calibration::Fixed {
                intercept: a?,
                slope: b?,
            })
        }
        "two-point" => {
            only(r, &m, &["epoch", "venule_so2"]);
            let e_node = r.required(&m, "epoch", "a two-point calibration");
            let e = e_node.and_then(|n| r.text(n, "`epoch`"));
            let idx = match (e, protocol, e_node) {
                (Some(e), Some(p), Some(n)) => {
                    let idx = p.epoch_index(&e);
                    if idx.is_none() {
                        let names: Vec<&str> = p.epochs.iter().map(|x| x.name.as_str()).collect();
                        let hint = super::diag::suggest(&e, &names);
                        r.error(
                            n.mark,
                            format!("calibration epoch `{e}` is not an epoch of the protocol"),
                        )
                        .hint(hint);
                    }
                    idx
                }
                _ => None,
            };
            let v_node = r.required(&m, "venule_so2", "a two-point calibration");
            let v = v_node.and_then(|n| r.number(n, "`venule_so2`"));
            if let (Some(v), Some(n)) = (v, v_node) {
                if !(0.0..=100.0).contains(&v) {
                    r.error(n.mark, format!("`venule_so2` {v} is outside 0–100 %"));
                    return None;
                }
            }
            Some(Calibration::TwoPoint {
                epoch: idx?,
                venule_so2: v?,
            })
        }
        "within-subject" => {
            only(r, &m, &[]);
            Some(Calibration::WithinSubject)
        }
        _ => {
            only(r, &m, &[]);
            Some(Calibration::Regression)
        }
    }
}

fn read_statistics(r: &mut Reader, node: &Node) -> Option<StatisticsSettings> {
    let m = r.map(node, "`statistics`", STATISTICS_KEYS)?;
    let mut s = StatisticsSettings::default();
    if let Some(n) = m.get("confidence") {
        let v = r.number(n, "`confidence`")?;
        if !(0.5..1.0).contains(&v) {
            r.error(n.mark, format!("`confidence` is a coverage between 0.5 and 1 (0.95 for 95 % intervals), found {v}"));
            return None;
        }
        s.confidence = v;
    }
    if let Some(n) = m.get("adequate_only") {
        s.adequate_only = r.boolean(n, "`adequate_only`")?;
    }
    if let Some(n) = m.get("agreement_by") {
        let v = r.choice(n, "`agreement_by` (a subject attribute)", GroupBy::NAMES)?;
        s.agreement_by = match v.as_str() {
            "pigmentation" => GroupBy::Pigmentation,
            "sex" => GroupBy::Sex,
            "site" => GroupBy::Site,
            _ => GroupBy::None,
        };
    }
    if let Some(n) = m.get("adjust") {
        match r.text(n, "`adjust`")?.as_str() {
            "holm" => s.adjustment = Adjustment::Holm,
            "none" => s.adjustment = Adjustment::None,
            other => {
                let hint = super::diag::suggest(other, &["holm", "none"]);
                r.error(
                    n.mark,
                    format!("`adjust` is `holm` or `none`, found `{other}`"),
                )
                .hint(hint);
                return None;
            }
        }
    }
    Some(s)
}

fn read_report(r: &mut Reader, node: &Node, methods: &[Method]) -> Option<ReportSettings> {
    let m = r.map(node, "`report`", REPORT_KEYS)?;
    let mut s = ReportSettings::default();
    let mut ok = true;
    if let Some(n) = m.get("primary") {
        let labels: Vec<&str> = methods.iter().map(|m| m.label.as_str()).collect();
        s.primary = r.choice(n, "`primary` (a method of `methods:`)", &labels);
        ok &= s.primary.is_some();
    }
    if let Some(n) = m.get("figure_width_mm") {
        match r.number(n, "`figure_width_mm`") {
            Some(v) if (40.0..=400.0).contains(&v) => s.figure_width_mm = v,
            Some(v) => {
                r.error(
                    n.mark,
                    format!("`figure_width_mm` is a print width of 40–400 mm, found {v}"),
                )
                .hint(
                    "a journal column is about 85 mm wide, a two-column page's text about 174 mm",
                );
                ok = false;
            }
            None => ok = false,
        }
    }
    if let Some(n) = m.get("dpi") {
        match r.integer(n, "`dpi`") {
            Some(v) if (72..=1200).contains(&v) => s.dpi = v as u32,
            Some(v) => {
                r.error(
                    n.mark,
                    format!("`dpi` is a print resolution of 72–1200 dots per inch, found {v}"),
                )
                .hint("journals ask for 300 dpi for figures, 600 for line art");
                ok = false;
            }
            None => ok = false,
        }
    }
    if let Some(n) = m.get("appendix") {
        let mut names = Vec::new();
        for i in r.list_or_one(n)? {
            match r.choice(i, "`appendix` (a report table)", REPORT_TABLES) {
                Some(t) => names.push(t),
                None => ok = false,
            }
        }
        s.appendix = Some(names);
    }
    if let Some(n) = m.get("date") {
        let text = r.text(n, "`date`")?;
        match chrono::NaiveDate::parse_from_str(&text, "%Y-%m-%d") {
            Ok(d) => s.date = Some(d),
            Err(_) => {
                r.error(
                    n.mark,
                    format!("`date` is a day as YYYY-MM-DD, found `{text}`"),
                );
                ok = false;
            }
        }
    }
    ok.then_some(s)
}

/// A list of counts: `[6, 8, 10]`, one count, or a text `6..20/2` or
/// `6,8,10` ([`super::read::parse_counts`]).
fn read_counts(r: &mut Reader, n: &Node, what: &str, lo: usize, hi: usize) -> Option<Vec<usize>> {
    let counts = match &n.value {
        Value::Seq(items) => {
            let mut v = Vec::new();
            for i in items {
                v.push(r.integer(i, what)?);
            }
            super::read::bounded_counts(v, lo, hi)
        }
        Value::Scalar { text, .. } => super::read::parse_counts(text, lo, hi),
        _ => {
            r.error(
                n.mark,
                format!("{what}: write a count, a list `[6, 8, 10]` or a range `\"6..20/2\"`"),
            );
            return None;
        }
    };
    counts
        .map_err(|e| {
            r.error(n.mark, format!("{what}: {e}"));
        })
        .ok()
}

fn read_power(
    r: &mut Reader,
    node: &Node,
    protocol: &Protocol,
    methods: &[Method],
) -> Option<PowerSettings> {
    let m = r.map(node, "`power`", POWER_KEYS)?;
    let labels: Vec<&str> = protocol
        .contrasts
        .iter()
        .map(|c| c.label.as_str())
        .collect();
    let mut effects = Vec::new();
    let en = r.required(&m, "effects", "`power`")?;
    let em = r.map(en, "`effects` (contrast: SO2 points to detect)", &labels)?;
    for label in &labels {
        if let Some(n) = em.get(label) {
            effects.push((
                label.to_string(),
                r.number(n, &format!("the effect of `{label}`"))?,
            ));
        }
    }
    if effects.is_empty() {
        r.error(en.mark, "`effects` names no contrast")
            .hint(format!(
                "give the SO2 points to detect for one of the protocol's contrasts: {}",
                labels.join(", ")
            ));
        return None;
    }
    let counts =
        |r: &mut Reader, key: &str, default: &[usize], lo: usize, hi: usize| match m.get(key) {
            None => Some(default.to_vec()),
            Some(n) => read_counts(r, n, &format!("`{key}`"), lo, hi),
        };
    let [subj, capt, segm, eye, sess] = PLAN_BOUNDS;
    let subjects = counts(r, "subjects", &[6, 8, 10, 12, 16, 20, 24], subj.0, subj.1);
    let captures = counts(r, "captures_per_epoch", &[5], capt.0, capt.1);
    let segments = counts(r, "segments_per_eye", &[4], segm.0, segm.1);
    let eyes = counts(r, "eyes", &[1], eye.0, eye.1);
    let sessions = counts(r, "sessions", &[1], sess.0, sess.1);
    let names = |r: &mut Reader, key: &str, allowed: &[&str]| -> Option<Vec<String>> {
        let Some(n) = m.get(key) else {
            return Some(Vec::new());
        };
        let mut out = Vec::new();
        for i in r.list(n, &format!("`{key}`"))? {
            out.push(r.choice(i, &format!("`{key}`"), allowed)?);
        }
        Some(out)
    };
    let method_labels: Vec<&str> = methods.iter().map(|m| m.label.as_str()).collect();
    let chosen_methods = names(r, "methods", &method_labels);
    let kinds = names(r, "kinds", &["arteriole", "venule"]);
    let target = match m.get("target") {
        None => Some(0.8),
        Some(n) => r.number(n, "`target`").and_then(|v| {
            if v > 0.0 && v < 1.0 {
                Some(v)
            } else {
                r.error(
                    n.mark,
                    format!("`target` is a power between 0 and 1 (0.8 for 80 %), found {v}"),
                );
                None
            }
        }),
    };
    let simulations = match m.get("simulations") {
        None => Some(None),
        Some(n) if n.as_scalar() == Some("auto") => Some(None),
        Some(n) => r.integer(n, "`simulations`").and_then(|v| {
            if (10..=100_000).contains(&v) {
                Some(Some(v as usize))
            } else {
                r.error(
                    n.mark,
                    format!("`simulations` is `auto` or a count 10–100000, found {v}"),
                );
                None
            }
        }),
    };
    let seed = match m.get("seed") {
        None => Some(1),
        Some(n) => r.integer(n, "`seed`").map(|v| v as u64),
    };
    Some(PowerSettings {
        effects,
        subjects: subjects?,
        captures_per_epoch: captures?,
        segments_per_eye: segments?,
        eyes: eyes?,
        sessions: sessions?,
        methods: chosen_methods?,
        kinds: kinds?,
        target: target?,
        simulations: simulations?,
        seed: seed?,
    })
}

fn read_exclusions(
    r: &mut Reader,
    node: &Node,
    subjects: &HashMap<String, Mark>,
) -> Option<Exclusions> {
    let m = r.map(node, "`exclusions`", EXCLUSION_KEYS)?;
    let min_d = m
        .get("min_diameter_um")
        .and_then(|n| positive(r, n, "`min_diameter_um`"));
    let mut subj = Vec::new();
    if let Some(n) = m.get("subjects") {
        for item in r.list(n, "`subjects`").unwrap_or_default() {
            if let Some(s) = r.text(item, "a subject id") {
                if !subjects.is_empty() && !subjects.contains_key(&s) {
                    let ids: Vec<&str> = subjects.keys().map(|k| k.as_str()).collect();
                    let hint = super::diag::suggest(&s, &ids);
                    r.error(item.mark, format!("subject `{s}` is not in the study"))
                        .hint(hint);
                }
                subj.push(s);
            }
        }
    }
    let mut caps = Vec::new();
    if let Some(n) = m.get("captures") {
        for item in r.list(n, "`captures`").unwrap_or_default() {
            let Some(cm) = r.map(item, "an excluded capture", EXCLUDED_CAPTURE_KEYS) else {
                continue;
            };
            let f = r
                .required(&cm, "file", "an excluded capture")
                .and_then(|x| r.text(x, "`file`"));
            let reason = r
                .required(&cm, "reason", "an excluded capture")
                .and_then(|x| r.text(x, "`reason`"));
            if let (Some(f), Some(reason)) = (f, reason) {
                caps.push(ExcludedCapture {
                    file: f,
                    reason,
                    path: PathBuf::new(),
                    mark: item.mark,
                });
            }
        }
    }
    Some(Exclusions {
        min_diameter_um: min_d,
        subjects: subj,
        captures: caps,
    })
}

/// Checks across the study: capture files exist, none is listed twice, all
/// fall within the protocol's span.
/// Reads the spectra table, if the study names one, and checks that every
/// capture in it is listed (unambiguously) in the study.
fn check_spectra(study: &Study, findings: &mut Findings) -> Option<super::spectra::SpectraTable> {
    let path = study.spectra_file.as_ref()?;
    let bands: Vec<String> = study
        .instrument
        .bands
        .iter()
        .map(|b| b.name.clone())
        .collect();
    let table = super::spectra::read_spectra(path, &bands, findings)?;
    let mut listed: HashMap<&str, Vec<&str>> = HashMap::new();
    for subj in &study.subjects {
        for c in subj.sessions.iter().flat_map(|s| &s.captures) {
            listed
                .entry(c.listed.as_str())
                .or_default()
                .push(subj.id.as_str());
        }
    }
    for (subject, capture) in table.captures.keys() {
        let who = listed.get(capture.as_str()).cloned().unwrap_or_default();
        let mark = table
            .marks
            .get(&(subject.clone(), capture.clone()))
            .copied();
        if subject.is_empty() && who.len() > 1 {
            findings.error(path, mark, format!("capture `{capture}` is listed for subjects {}; the spectra table needs a `subject` column", who.join(", ")));
        } else if who.is_empty() || (!subject.is_empty() && !who.contains(&subject.as_str())) {
            findings
                .error(
                    path,
                    mark,
                    format!(
                        "capture `{capture}`{} is not in any capture list of the study",
                        if subject.is_empty() {
                            String::new()
                        } else {
                            format!(" of subject `{subject}`")
                        }
                    ),
                )
                .hint("`capture` must be written as in the capture list");
        }
    }
    if !table.has_background {
        for m in &study.methods {
            if let MethodKind::Multiband {
                weighting: Weighting::Fundus,
                ..
            } = m.kind
            {
                findings
                    .error(
                        path,
                        Some(Mark::new(1, 1)),
                        format!(
                            "method `{}` weights its bands by the fundus (every band has a `gain`), and the spectra table has no `background` column to read the fundus from",
                            m.label
                        ),
                    )
                    .hint("add a `background` column (each band's background level under the vessel's centre), or give the method `weighting: response`");
            }
        }
    }
    Some(table)
}

fn check_files(study: &Study, findings: &mut Findings) {
    let mut seen: HashMap<PathBuf, (PathBuf, Mark)> = HashMap::new();
    for subj in &study.subjects {
        for sess in &subj.sessions {
            for c in &sess.captures {
                // With a spectra table the capture files are not needed.
                if study.spectra_file.is_none() && !c.path.is_file() {
                    findings
                        .error(
                            &c.source,
                            Some(c.mark),
                            format!("capture `{}` does not exist", c.listed),
                        )
                        .hint(format!("looked for `{}`", c.path.display()));
                }
                let key = c.path.canonicalize().unwrap_or_else(|_| c.path.clone());
                if let Some((src, mark)) = seen.get(&key) {
                    findings
                        .error(
                            &c.source,
                            Some(c.mark),
                            format!(
                                "capture `{}` is listed twice (first at {}:{}:{})",
                                c.listed,
                                src.display(),
                                mark.line,
                                mark.col
                            ),
                        )
                        .hint("remove one of the two lines");
                } else {
                    seen.insert(key, (c.source.clone(), c.mark));
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The properties a JSON Schema allows at `pointer`.
    fn schema_keys(schema: &str, pointer: &str) -> Vec<String> {
        let v: serde_json::Value = serde_json::from_str(schema).expect("valid JSON");
        let mut keys: Vec<String> = v
            .pointer(pointer)
            .and_then(|p| p.as_object())
            .unwrap_or_else(|| panic!("{pointer} is an object"))
            .keys()
            .cloned()
            .collect();
        keys.sort();
        keys
    }

    fn sorted(k: &[&str]) -> Vec<String> {
        let mut v: Vec<String> = k.iter().map(|s| s.to_string()).collect();
        v.sort();
        v
    }

    /// The JSON Schemas that `satstep schema` prints name exactly the keys
    /// the readers take, at every level: a key added to a reader and not
    /// to its schema (or the other way) fails here.
    #[test]
    fn the_schemas_name_the_keys_the_readers_take() {
        let study = include_str!("../../schemas/study.schema.json");
        let protocol = include_str!("../../schemas/protocol.schema.json");
        let segments = include_str!("../../schemas/segments.schema.json");
        let cases: [(&str, &str, &[&str]); 20] = [
            (study, "/properties", STUDY_KEYS),
            (study, "/properties/report/properties", REPORT_KEYS),
            (study, "/properties/power/properties", POWER_KEYS),
            (study, "/properties/statistics/properties", STATISTICS_KEYS),
            (study, "/properties/exclusions/properties", EXCLUSION_KEYS),
            (
                study,
                "/properties/exclusions/properties/captures/items/properties",
                EXCLUDED_CAPTURE_KEYS,
            ),
            (study, "/$defs/instrument/properties", INSTRUMENT_KEYS),
            (
                study,
                "/$defs/instrument/properties/layout/oneOf/1/properties",
                LAYOUT_KEYS,
            ),
            (
                study,
                "/$defs/instrument/properties/layout/oneOf/1/properties/grid/properties",
                GRID_KEYS,
            ),
            (study, "/$defs/band/properties", BAND_KEYS),
            (study, "/$defs/subject/properties", SUBJECT_KEYS),
            (study, "/$defs/session/properties", SESSION_KEYS),
            (study, "/$defs/capture/properties", CAPTURE_KEYS),
            (
                study,
                "/$defs/session/properties/reference/oneOf/1/properties",
                LOG_KEYS,
            ),
            (
                study,
                "/$defs/session/properties/reference/oneOf/1/properties/columns/properties",
                LOG_COLUMN_KEYS,
            ),
            (
                study,
                "/$defs/method/oneOf/0/properties",
                METHOD_KEYS_TWO_BAND,
            ),
            (study, "/$defs/method/oneOf/1/properties", METHOD_KEYS_MULTI),
            (study, "/$defs/calibration/properties", CALIBRATION_KEYS),
            (
                protocol,
                "/properties",
                super::super::protocol::PROTOCOL_KEYS,
            ),
            (
                protocol,
                "/$defs/epoch/properties",
                super::super::protocol::EPOCH_KEYS,
            ),
        ];
        for (schema, pointer, keys) in cases {
            assert_eq!(schema_keys(schema, pointer), sorted(keys), "{pointer}");
        }
        assert_eq!(
            schema_keys(protocol, "/$defs/epoch/properties/gas/oneOf/1/properties"),
            sorted(super::super::protocol::GAS_KEYS)
        );
        assert_eq!(
            schema_keys(protocol, "/properties/reference/properties"),
            sorted(super::super::protocol::REFERENCE_KEYS)
        );
        assert_eq!(
            schema_keys(segments, "/properties"),
            sorted(super::super::segments::FILE_KEYS)
        );
        assert_eq!(
            schema_keys(segments, "/properties/segments/items/properties"),
            sorted(super::super::segments::SEGMENT_KEYS)
        );
        assert_eq!(
            schema_keys(
                segments,
                "/properties/segments/items/properties/proposed/properties"
            ),
            sorted(super::super::segments::PROPOSED_KEYS)
        );
        // Each method's name is in the one list of method names.
        assert_eq!(
            sorted(METHOD_NAMES),
            sorted(&["two-band", "multiband", "multiband-pointwise"])
        );
    }

    #[test]
    fn lexical_keeps_every_parent_above_the_start() {
        for (p, want) in [
            ("a/./b/../c", "a/c"),
            ("../../x", "../../x"),
            ("a/../../x", "../x"),
            ("/s/./t/..", "/s"),
        ] {
            assert_eq!(lexical(Path::new(p)), PathBuf::from(want), "{p}");
        }
    }
}
