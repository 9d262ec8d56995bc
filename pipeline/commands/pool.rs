//! `satstep pool`: one analysis of a multi-site study from the sites' own
//! runs, without their images. Each site sends the folder its run wrote,
//! of which only derived numbers are read: `manifest.json` (the study as
//! run: protocol, instrument, methods, settings), `epochs/captures.csv`
//! and `spans.csv`, `transmissions/captures.csv` and `positions.csv`
//! (counts of positions and flags only) and `fits/so2.csv`. The sites must
//! have run the same protocol with the same instrument bands, methods and
//! statistics settings; the first difference is named.
//!
//! The pooled cohort then goes through the same cohort-level stages as a
//! study's own run (two-band calibration over the pooled rows, statistics
//! with the site as a term of the epoch model, report), so that pooling
//! two sites gives what one run over all their subjects with `site:` set
//! gives. Subjects keep their ids unless two sites use the same one; then
//! they become `<site>:<id>`. The pooled manifest keeps each site's
//! manifest hash.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, anyhow, bail};
use serde::de::DeserializeOwned;

use super::Exit;
use crate::config::segments::VesselKind;
use crate::config::study::{MethodKind, SiteSource, Study};
use crate::console::Printer;
use crate::fit::lm::Termination;
use crate::oximetry::segment::SegmentFitError;
use crate::runner::key::{Key, KeyBuilder, hash_file};
use crate::runner::{Runner, manifest};
use crate::stages::Run;
use crate::stages::epochs::{CaptureRow, EpochTables, SpanRow};
use crate::stages::fits::{FitRow, Outcome};
use crate::stages::transmissions::{ImageOutcome, ImageStatus, TransmissionTables};

pub struct PoolArgs {
    /// Each site's results folder, as `NAME=DIR` or `DIR` (the site is then
    /// named by its study id).
    pub sites: Vec<String>,
    pub out: PathBuf,
    /// The pooled study's id (default `pooled`).
    pub id: Option<String>,
}

/// A CSV table a site's run wrote, read whole, with errors that name the
/// file, line and column.
struct Csv {
    path: PathBuf,
    header: Vec<String>,
    rows: Vec<csv::StringRecord>,
}

impl Csv {
    fn read(path: &Path) -> Result<Csv> {
        let mut r = csv::ReaderBuilder::new()
            .from_path(path)
            .with_context(|| {
                format!(
                    "reading `{}`: a site's results folder must hold the tables its `satstep run` wrote",
                    path.display()
                )
            })?;
        let header = r
            .headers()
            .with_context(|| format!("reading the header of `{}`", path.display()))?
            .iter()
            .map(str::to_string)
            .collect();
        let mut rows = Vec::new();
        for (i, rec) in r.records().enumerate() {
            rows.push(rec.with_context(|| format!("`{}` line {}", path.display(), i + 2))?);
        }
        Ok(Csv {
            path: path.to_path_buf(),
            header,
            rows,
        })
    }

    fn column(&self, name: &str) -> Result<usize> {
        self.header.iter().position(|h| h == name).ok_or_else(|| {
            anyhow!(
                "`{}` has no column `{name}`: it was not written by this version of `satstep run`; rerun the site's study with it",
                self.path.display()
            )
        })
    }

    fn optional(&self, name: &str) -> Option<usize> {
        self.header.iter().position(|h| h == name)
    }

    fn text(&self, row: usize, col: usize) -> &str {
        self.rows[row].get(col).unwrap_or("")
    }

    fn where_(&self, row: usize, col: usize) -> String {
        format!(
            "`{}` line {}, column {} (`{}`)",
            self.path.display(),
            row + 2,
            col + 1,
            self.header[col]
        )
    }

    fn real(&self, row: usize, col: usize) -> Result<Option<f64>> {
        let t = self.text(row, col);
        if t.is_empty() {
            return Ok(None);
        }
        t.parse::<f64>()
            .map(Some)
            .map_err(|_| anyhow!("{}: `{t}` is not a number", self.where_(row, col)))
    }

    fn int(&self, row: usize, col: usize) -> Result<i64> {
        let t = self.text(row, col);
        t.parse::<i64>()
            .map_err(|_| anyhow!("{}: `{t}` is not a whole number", self.where_(row, col)))
    }

    fn opt_text(&self, row: usize, col: usize) -> Option<String> {
        Some(self.text(row, col).to_string()).filter(|t| !t.is_empty())
    }

    /// A value written by its kebab-case name (statuses, kinds).
    fn word<T: DeserializeOwned>(&self, row: usize, col: usize) -> Result<T> {
        let t = self.text(row, col);
        serde_json::from_value(serde_json::Value::String(t.to_string())).map_err(|_| {
            anyhow!(
                "{}: `{t}` is not a value this column takes",
                self.where_(row, col)
            )
        })
    }
}

/// One site's run, as read from its results folder.
struct Site {
    source: SiteSource,
    study: Study,
    /// The site manifest's JSON of the study, for comparing settings.
    settings: serde_json::Value,
    epochs: EpochTables,
    status: Vec<ImageStatus>,
    position_counts: Vec<usize>,
    flag_counts: BTreeMap<String, usize>,
    reflex_counts: BTreeMap<String, [usize; 2]>,
    fits: Vec<FitRow>,
    /// Every file read, with its hash.
    files: Vec<(PathBuf, Key, u64)>,
}

fn read_site(arg: &str) -> Result<Site> {
    let (name, dir) = match arg.split_once('=') {
        Some((n, d)) if !n.is_empty() && !n.contains(['/', '\\']) => (Some(n.to_string()), d),
        _ => (None, arg),
    };
    let dir = PathBuf::from(dir);
    let dir = if dir.join("results").join("manifest.json").is_file() {
        dir.join("results")
    } else {
        dir
    };
    let mpath = dir.join("manifest.json");
    let bytes = std::fs::read(&mpath).with_context(|| {
        format!(
            "reading `{}`: give each site's results folder (the one its `satstep run` wrote, holding `manifest.json`)",
            mpath.display()
        )
    })?;
    let manifest: serde_json::Value = serde_json::from_slice(&bytes)
        .with_context(|| format!("`{}` is not a run manifest (JSON)", mpath.display()))?;
    let settings = manifest
        .get("study")
        .cloned()
        .ok_or_else(|| anyhow!("`{}` has no `study`: not a run manifest", mpath.display()))?;
    let mut study: Study = serde_json::from_value(settings.clone()).with_context(|| {
        format!(
            "`{}`: its study could not be read; was it written by another version of satstep?",
            mpath.display()
        )
    })?;
    if !study.sites.is_empty() {
        bail!(
            "`{}` is a pooled analysis itself; pool the sites' own runs",
            dir.display()
        );
    }
    let name = name.unwrap_or_else(|| study.id.clone());
    let mut files = Vec::new();
    let mut read = |rel: &str| -> Result<Csv> {
        let p = dir.join(rel);
        let csv = Csv::read(&p)?;
        let len = std::fs::metadata(&p).map(|m| m.len()).unwrap_or(0);
        files.push((p.clone(), hash_file(&p)?, len));
        Ok(csv)
    };
    let caps = read("epochs/captures.csv")?;
    let spans = read("epochs/spans.csv")?;
    let images = read("transmissions/captures.csv")?;
    let so2 = read("fits/so2.csv")?;
    // The positions table has a row per profile position: it is streamed
    // below, never held whole.
    let ppath = dir.join("transmissions/positions.csv");
    let plen = std::fs::metadata(&ppath).map(|m| m.len()).unwrap_or(0);
    files.push((ppath.clone(), hash_file(&ppath)?, plen));
    files.insert(0, (mpath.clone(), hash_file(&mpath)?, bytes.len() as u64));

    // Captures.
    let col = |t: &Csv, n: &str| t.column(n);
    let (cs, cse, cey, cca, cti, cts, cep, ctie, co2, cst, cex, csp, csn, csr, csps) = (
        col(&caps, "subject")?,
        col(&caps, "session")?,
        col(&caps, "eye")?,
        col(&caps, "capture")?,
        col(&caps, "time")?,
        col(&caps, "t_s")?,
        col(&caps, "epoch")?,
        col(&caps, "t_in_epoch_s")?,
        col(&caps, "o2_fraction")?,
        col(&caps, "status")?,
        col(&caps, "exclusion")?,
        col(&caps, "spo2")?,
        col(&caps, "spo2_samples")?,
        col(&caps, "spo2_range")?,
        col(&caps, "spo2_status")?,
    );
    let mut captures = Vec::with_capacity(caps.rows.len());
    for i in 0..caps.rows.len() {
        let t = caps.text(i, cti);
        captures.push(CaptureRow {
            subject: caps.text(i, cs).into(),
            session: caps.text(i, cse).into(),
            eye: caps.text(i, cey).into(),
            capture: caps.text(i, cca).into(),
            time: chrono::DateTime::parse_from_rfc3339(t).map_err(|_| {
                anyhow!(
                    "{}: `{t}` is not an ISO 8601 time with an offset",
                    caps.where_(i, cti)
                )
            })?,
            t_s: caps.real(i, cts)?.unwrap_or(f64::NAN),
            epoch: caps.opt_text(i, cep),
            t_in_epoch_s: caps.real(i, ctie)?,
            o2_fraction: caps.real(i, co2)?,
            status: caps.word(i, cst)?,
            exclusion: caps.opt_text(i, cex),
            spo2: caps.real(i, csp)?,
            spo2_samples: caps.int(i, csn)?,
            spo2_range: caps.real(i, csr)?,
            spo2_status: caps.word(i, csps)?,
        });
    }
    let index: BTreeMap<(&str, &str, &str, &str), usize> = captures
        .iter()
        .enumerate()
        .map(|(i, c)| {
            (
                (
                    c.subject.as_str(),
                    c.session.as_str(),
                    c.eye.as_str(),
                    c.capture.as_str(),
                ),
                i,
            )
        })
        .collect();
    // The capture a row names, by its four key cells; `line` for the error.
    let locate = |rec: &csv::StringRecord, c: [usize; 4], path: &Path, line: usize| {
        let cell = |k: usize| rec.get(c[k]).unwrap_or("");
        index
            .get(&(cell(0), cell(1), cell(2), cell(3)))
            .copied()
            .ok_or_else(|| {
                anyhow!(
                    "`{}` line {line}: capture `{}` of subject `{}` is not in `epochs/captures.csv`; the site's tables are not from one run",
                    path.display(),
                    cell(3),
                    cell(0)
                )
            })
    };
    let find = |t: &Csv, i: usize, c: [usize; 4]| locate(&t.rows[i], c, &t.path, i + 2);
    let keys = |t: &Csv| -> Result<[usize; 4]> {
        Ok([
            t.column("subject")?,
            t.column("session")?,
            t.column("eye")?,
            t.column("capture")?,
        ])
    };

    // Spans.
    let (ss, sse, sep, sst, sss, sse2, sen, ssrc, so2c) = (
        col(&spans, "subject")?,
        col(&spans, "session")?,
        col(&spans, "epoch")?,
        col(&spans, "start")?,
        col(&spans, "start_s")?,
        col(&spans, "settle_end_s")?,
        col(&spans, "end_s")?,
        col(&spans, "start_source")?,
        col(&spans, "o2_fraction")?,
    );
    let mut span_rows = Vec::new();
    for i in 0..spans.rows.len() {
        let t = spans.text(i, sst);
        span_rows.push(SpanRow {
            subject: spans.text(i, ss).into(),
            session: spans.text(i, sse).into(),
            epoch: spans.text(i, sep).into(),
            start: chrono::DateTime::parse_from_rfc3339(t).map_err(|_| {
                anyhow!(
                    "{}: `{t}` is not an ISO 8601 time with an offset",
                    spans.where_(i, sst)
                )
            })?,
            start_s: spans.real(i, sss)?.unwrap_or(f64::NAN),
            settle_end_s: spans.real(i, sse2)?.unwrap_or(f64::NAN),
            end_s: spans.real(i, sen)?.unwrap_or(f64::NAN),
            start_source: spans.text(i, ssrc).into(),
            o2_fraction: spans.real(i, so2c)?.unwrap_or(f64::NAN),
        });
    }

    // Image status per capture (registration details are not carried over).
    let mut status: Vec<ImageStatus> = captures
        .iter()
        .map(|_| ImageStatus {
            status: ImageOutcome::NotAnalysed,
            message: None,
            registration: None,
            blur: None,
        })
        .collect();
    let (ik, ist, imsg) = (
        keys(&images)?,
        images.column("image_status")?,
        images.column("message")?,
    );
    for i in 0..images.rows.len() {
        let c = find(&images, i, ik)?;
        status[c] = ImageStatus {
            status: images.word(i, ist)?,
            message: images.opt_text(i, imsg),
            registration: None,
            blur: None,
        };
    }

    // Positions and flags per capture, counted as the site's run counted them.
    let mut position_counts = vec![0usize; captures.len()];
    let mut flag_counts: BTreeMap<String, usize> = BTreeMap::new();
    let mut reflex_counts: BTreeMap<String, [usize; 2]> = BTreeMap::new();
    let mut reader =
        csv::Reader::from_path(&ppath).with_context(|| format!("reading `{}`", ppath.display()))?;
    let positions = Csv {
        path: ppath.clone(),
        header: reader
            .headers()
            .with_context(|| format!("reading the header of `{}`", ppath.display()))?
            .iter()
            .map(str::to_string)
            .collect(),
        rows: Vec::new(),
    };
    let (pk, pfl) = (keys(&positions)?, positions.column("quality_flags")?);
    // Older runs may lack these columns; their reflexes are then not counted.
    let (pkind, preflex) = (
        positions.header.iter().position(|h| h == "kind"),
        positions.header.iter().position(|h| h == "central_reflex"),
    );
    let mut rec = csv::StringRecord::new();
    let mut line = 1;
    while reader
        .read_record(&mut rec)
        .with_context(|| format!("`{}` line {}", ppath.display(), line + 1))?
    {
        line += 1;
        position_counts[locate(&rec, pk, &ppath, line)?] += 1;
        let flags = rec.get(pfl).unwrap_or("");
        if flags.is_empty() {
            *flag_counts.entry("unflagged".into()).or_default() += 1;
            if let (Some(k), Some(r)) = (pkind, preflex) {
                let e = reflex_counts
                    .entry(rec.get(k).unwrap_or("").to_string())
                    .or_default();
                e[0] += 1;
                e[1] += (rec.get(r) == Some("yes")) as usize;
            }
        }
        for f in flags.split([';', ',', ' ']).filter(|f| !f.is_empty()) {
            *flag_counts.entry(f.to_string()).or_default() += 1;
        }
    }

    // Fits.
    let fk = keys(&so2)?;
    let c = |n: &str| so2.column(n);
    let (fseg, fkind, fmeth, fso2, fse, fodr, fodru, fchi, fadq, fmt, fmod, fveil, fback, ffund) = (
        c("segment")?,
        c("kind")?,
        c("method")?,
        c("so2")?,
        c("so2_se")?,
        c("odr")?,
        c("odr_uncorrected")?,
        c("reduced_chi2")?,
        c("adequacy")?,
        c("misfit_t")?,
        c("model")?,
        c("veil_slope")?,
        c("backscatter_scale")?,
        c("fundus_slope")?,
    );
    let frise = c("fundus_rise")?;
    let ftied = c("tied_models")?;
    let (fit_, fev, fterm, fdet, fpos, fdia) = (
        c("iterations")?,
        c("evaluations")?,
        c("termination")?,
        c("termination_detail")?,
        c("positions")?,
        c("diameter_um")?,
    );
    let residual_cols: Vec<(usize, usize)> = study
        .instrument
        .bands
        .iter()
        .enumerate()
        .filter_map(|(b, band)| Some((b, so2.optional(&format!("residual_{}", band.name))?)))
        .collect();
    let mut fits = Vec::with_capacity(so2.rows.len());
    for i in 0..so2.rows.len() {
        let ci = find(&so2, i, fk)?;
        let kind: VesselKind = so2.word(i, fkind)?;
        let code = so2.text(i, fterm);
        let detail = so2.text(i, fdet);
        let termination = outcome(code, detail).ok_or_else(|| {
            anyhow!(
                "{}: `{code}` is not a termination code",
                so2.where_(i, fterm)
            )
        })?;
        let mut band_residuals = Vec::new();
        for &(b, col) in &residual_cols {
            if let Some(v) = so2.real(i, col)? {
                band_residuals.push((b, v));
            }
        }
        fits.push(FitRow {
            capture_index: ci,
            segment: so2.text(i, fseg).into(),
            kind,
            method: so2.text(i, fmeth).into(),
            so2: so2.real(i, fso2)?,
            so2_se: so2.real(i, fse)?,
            reduced_chi2: so2.real(i, fchi)?,
            odr: so2.real(i, fodr)?,
            odr_uncorrected: so2.real(i, fodru)?,
            iterations: so2.int(i, fit_)?,
            evaluations: so2.int(i, fev)?,
            termination,
            positions: so2.int(i, fpos)?,
            diameter_um: so2.real(i, fdia)?.unwrap_or(f64::NAN),
            along_sd: None,
            adequacy: match so2.opt_text(i, fadq) {
                Some(_) => Some(so2.word(i, fadq)?),
                None => None,
            },
            misfit_t: so2.real(i, fmt)?,
            band_residuals,
            model: so2.opt_text(i, fmod),
            veil_slope: so2.real(i, fveil)?,
            backscatter_scale: so2.real(i, fback)?,
            fundus_slope: so2.real(i, ffund)?,
            fundus_rise: so2.real(i, frise)?,
            tied_models: so2.opt_text(i, ftied),
            alternatives: Vec::new(),
        });
    }
    let subjects = study.subjects.len();
    let n_captures = captures.len();
    let source = SiteSource {
        name,
        results: std::path::absolute(&dir).unwrap_or(dir.clone()),
        manifest_sha256: files[0].1.hex(),
        subjects,
        captures: n_captures,
    };
    study.sites = Vec::new();
    Ok(Site {
        source,
        study,
        settings,
        epochs: EpochTables {
            captures,
            spans: span_rows,
        },
        status,
        position_counts,
        flag_counts,
        reflex_counts,
        fits,
        files,
    })
}

/// The fit outcome a `termination` code (and its detail) stands for. Codes
/// that only a cohort's calibration gives are read as the ODR they started
/// from: the pooled run calibrates again.
fn outcome(code: &str, detail: &str) -> Option<Outcome> {
    let numbers: Vec<usize> = detail
        .split(|c: char| !c.is_ascii_digit())
        .filter_map(|t| t.parse().ok())
        .collect();
    Some(match code {
        "too-few-positions" => Outcome::TooFewPositions {
            usable: numbers.first().copied().unwrap_or(0),
        },
        "odr" | "no-two-point-calibration" => Outcome::Odr,
        "no-optical-density" => Outcome::NoOpticalDensity,
        "no-diameter" => Outcome::NoDiameter,
        "pointwise" => Outcome::Pointwise {
            converged: numbers.first().copied().unwrap_or(0),
            positions: numbers.get(1).copied().unwrap_or(0),
        },
        "not-fitted" => Outcome::NotFitted(if detail.contains("starting point") {
            SegmentFitError::NoStart
        } else if detail.contains("non-finite") {
            SegmentFitError::NonFinite
        } else {
            SegmentFitError::Shape
        }),
        other => Outcome::Joint(
            serde_json::from_value::<Termination>(serde_json::Value::String(other.into())).ok()?,
        ),
    })
}

/// The first place two JSON values differ, as a path and both values.
fn first_difference(
    a: &serde_json::Value,
    b: &serde_json::Value,
    path: &str,
) -> Option<(String, String, String)> {
    use serde_json::Value;
    match (a, b) {
        (Value::Object(x), Value::Object(y)) => {
            let keys: BTreeSet<&String> = x.keys().chain(y.keys()).collect();
            keys.into_iter().find_map(|k| {
                first_difference(
                    x.get(k).unwrap_or(&Value::Null),
                    y.get(k).unwrap_or(&Value::Null),
                    &format!("{path}.{k}"),
                )
            })
        }
        (Value::Array(x), Value::Array(y)) if x.len() == y.len() => x
            .iter()
            .zip(y)
            .enumerate()
            .find_map(|(i, (p, q))| first_difference(p, q, &format!("{path}[{i}]"))),
        _ if a == b => None,
        _ => Some((path.to_string(), a.to_string(), b.to_string())),
    }
}

/// What must be the same at every site for one analysis to cover them:
/// the protocol (epochs, contrasts, baseline), the instrument's bands, the
/// methods and the statistics settings and exclusions of segment values.
const SHARED: &[(&str, &str)] = &[
    ("protocol", "the protocol"),
    ("instrument/bands", "the instrument's bands"),
    ("methods", "the methods"),
    ("statistics", "the statistics settings"),
    ("exclusions/min_diameter_um", "the minimum diameter"),
];

fn check_compatible(sites: &[Site]) -> Result<()> {
    let first = &sites[0];
    for other in &sites[1..] {
        for (pointer, what) in SHARED {
            let p = format!("/{pointer}");
            let (a, b) = (
                first
                    .settings
                    .pointer(&p)
                    .unwrap_or(&serde_json::Value::Null),
                other
                    .settings
                    .pointer(&p)
                    .unwrap_or(&serde_json::Value::Null),
            );
            if let Some((path, x, y)) = first_difference(a, b, &pointer.replace('/', ".")) {
                bail!(
                    "sites `{}` and `{}` differ in {what}, so one analysis cannot cover both: `{path}` is {x} at `{}` and {y} at `{}`; run both sites with the same settings",
                    first.source.name,
                    other.source.name,
                    first.source.name,
                    other.source.name
                );
            }
        }
    }
    Ok(())
}

/// Pools the sites' runs and runs the cohort-level stages into `out`.
pub fn pool(args: &PoolArgs, printer: &Printer) -> Result<Exit> {
    if args.sites.len() < 2 {
        printer.error("`satstep pool` needs at least two sites' results folders");
        return Ok(Exit::Problem);
    }
    let mut sites = Vec::new();
    for a in &args.sites {
        match read_site(a) {
            Ok(s) => sites.push(s),
            Err(e) => {
                printer.error(format!("site `{a}`: {e:#}"));
                return Ok(Exit::Problem);
            }
        }
    }
    let mut names = BTreeSet::new();
    for s in &sites {
        if !names.insert(s.source.name.clone()) {
            printer.error(format!(
                "two sites are named `{}`; name them with `NAME=DIR`",
                s.source.name
            ));
            return Ok(Exit::Problem);
        }
    }
    if let Err(e) = check_compatible(&sites) {
        printer.error(format!("{e:#}"));
        return Ok(Exit::Problem);
    }

    // Subject ids shared by two sites are prefixed with the site.
    let mut seen: BTreeMap<&str, usize> = BTreeMap::new();
    for s in &sites {
        for subj in &s.study.subjects {
            *seen.entry(subj.id.as_str()).or_default() += 1;
        }
    }
    let shared: BTreeSet<String> = seen
        .into_iter()
        .filter(|(_, n)| *n > 1)
        .map(|(id, _)| id.to_string())
        .collect();
    if !shared.is_empty() {
        printer.warn(format!(
            "{} subject ids are used at more than one site ({}); they are pooled as `<site>:<id>`",
            shared.len(),
            shared
                .iter()
                .take(5)
                .cloned()
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    let rename = |site: &str, id: &str| {
        if shared.contains(id) {
            format!("{site}:{id}")
        } else {
            id.to_string()
        }
    };

    let mut study = sites[0].study.clone();
    study.id = args.id.clone().unwrap_or_else(|| "pooled".into());
    study.title = format!(
        "Pooled analysis of {} sites ({})",
        sites.len(),
        sites
            .iter()
            .map(|s| s.source.name.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    );
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("creating `{}`", args.out.display()))?;
    let out = std::path::absolute(&args.out).unwrap_or(args.out.clone());
    study.output = out.clone();
    study.root = out.clone();
    study.file = out.join("manifest.json");
    study.protocol_file = None;
    study.spectra_file = None;
    // Planning a follow-up is a site's or the pooled study's own decision.
    study.power = None;
    study.exclusions.subjects.clear();
    study.exclusions.captures.clear();
    study.subjects.clear();
    let mut epochs = EpochTables {
        captures: Vec::new(),
        spans: Vec::new(),
    };
    let (mut status, mut counts, mut flags) = (Vec::new(), Vec::new(), BTreeMap::new());
    let mut reflex: BTreeMap<String, [usize; 2]> = BTreeMap::new();
    let mut per_method: Vec<Vec<FitRow>> = vec![Vec::new(); study.methods.len()];
    let mut inputs = Vec::new();
    for s in &sites {
        let name = &s.source.name;
        let offset = epochs.captures.len();
        for subj in &s.study.subjects {
            let mut subj = subj.clone();
            subj.id = rename(name, &subj.id);
            subj.site = Some(name.clone());
            study.subjects.push(subj);
        }
        epochs
            .captures
            .extend(s.epochs.captures.iter().cloned().map(|mut c| {
                c.subject = rename(name, &c.subject);
                c
            }));
        epochs
            .spans
            .extend(s.epochs.spans.iter().cloned().map(|mut c| {
                c.subject = rename(name, &c.subject);
                c
            }));
        status.extend(s.status.iter().cloned());
        counts.extend(s.position_counts.iter().copied());
        for (k, n) in &s.flag_counts {
            *flags.entry(k.clone()).or_default() += n;
        }
        crate::stages::transmissions::add_reflex_counts(&mut reflex, &s.reflex_counts);
        for f in &s.fits {
            let Some(mi) = study.methods.iter().position(|m| m.label == f.method) else {
                printer.error(format!(
                    "site `{name}`: `fits/so2.csv` has rows of method `{}`, which its study does not define",
                    f.method
                ));
                return Ok(Exit::Problem);
            };
            let mut f = f.clone();
            f.capture_index += offset;
            if let MethodKind::TwoBand {
                diameter_correction,
                ..
            } = &study.methods[mi].kind
            {
                // Back to the ODR as measured: the pooled cohort is corrected
                // and calibrated anew, as one run over it would be.
                if *diameter_correction {
                    f.odr = f.odr_uncorrected;
                }
                f.odr_uncorrected = None;
                f.so2 = None;
            }
            per_method[mi].push(f);
        }
        inputs.extend(s.files.iter().map(|(p, k, n)| (p.clone(), Some((*k, *n)))));
    }
    study.sites = sites.iter().map(|s| s.source.clone()).collect();
    let fits = crate::stages::fits::assemble(&study, &epochs, per_method);
    let images = TransmissionTables {
        status,
        position_counts: counts,
        flag_counts: flags,
        reflex_counts: reflex,
        // The sites' profile positions are not pooled (each capture's item
        // would be read from a site's cache); per-position figures are left out.
        keys: vec![Key([0; 32]); epochs.captures.len()],
    };
    let mut k = KeyBuilder::new("pooled-sites", 1);
    for s in &sites {
        k.value("site", &s.source.name);
        for (p, h, _) in &s.files {
            k.value(
                "file",
                &p.file_name().map(|n| n.to_string_lossy().to_string()),
            )
            .key("hash", h);
        }
    }
    let key = k.finish();
    printer.info(format!(
        "pooling {} sites: {} subjects, {} captures; results under `{}`",
        sites.len(),
        study.subjects.len(),
        epochs.captures.len(),
        out.display()
    ));

    let runner = Runner::new(&out, printer, &[]);
    let mut run = Run::new(&study, inputs);
    crate::stages::run_cohort(&mut run, &runner, epochs, images, fits, key)?;
    // The pooled capture table and fits (two-band methods recalibrated on
    // the pooled cohort), for analyses outside satstep.
    {
        use crate::stages::Stage;
        use crate::stages::epochs::Epochs;
        use crate::stages::fits::Fits;
        Epochs::write(run.output::<Epochs>(), &run, &runner)?;
        Fits::write(run.output::<Fits>(), &run, &runner)?;
    }

    let manifest = manifest::Manifest {
        tool: "satstep",
        version: env!("CARGO_PKG_VERSION"),
        cache_format: crate::runner::key::CACHE_FORMAT,
        finished_utc: manifest::utc_now(),
        command: std::env::args().collect(),
        study_file: String::new(),
        study: serde_json::to_value(&study)?,
        inputs: manifest::InputFile::list(&run.inputs),
        seeds: BTreeMap::from([(
            "analysis".to_string(),
            "none: no stage draws random numbers".to_string(),
        )]),
        stages: runner.log(),
        captures: manifest::CaptureCounts::default(),
        warnings: runner.warnings.lock().expect("not poisoned").clone(),
        exit_status: 0,
    };
    manifest.write(&out)?;
    printer.info(format!("wrote `{}`", out.join("manifest.json").display()));
    Ok(Exit::Ok)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn termination_codes_read_back_as_written() {
        for o in [
            Outcome::TooFewPositions { usable: 5 },
            Outcome::Odr,
            Outcome::NoOpticalDensity,
            Outcome::NoDiameter,
            Outcome::Pointwise {
                converged: 11,
                positions: 12,
            },
            Outcome::Joint(Termination::SmallCostChange),
            Outcome::Joint(Termination::MaxIterations),
            Outcome::NotFitted(SegmentFitError::NoStart),
            Outcome::NotFitted(SegmentFitError::NonFinite),
        ] {
            let back = outcome(o.code(), &o.detail().unwrap_or_default()).unwrap();
            assert_eq!(back, o, "{}", o.code());
        }
        assert_eq!(outcome("no-such-code", ""), None);
    }

    #[test]
    fn the_first_difference_is_named_by_its_path() {
        let a = serde_json::json!({"epochs": [{"name": "air", "o2": 0.21}, {"name": "low", "o2": 0.15}]});
        let b = serde_json::json!({"epochs": [{"name": "air", "o2": 0.21}, {"name": "low", "o2": 0.12}]});
        assert_eq!(
            first_difference(&a, &b, "protocol"),
            Some(("protocol.epochs[1].o2".into(), "0.15".into(), "0.12".into()))
        );
        assert_eq!(first_difference(&a, &a, "protocol"), None);
    }
}
