//! The report stage: the paper's tables (CSV, Markdown, LaTeX), its figures
//! (SVG, PNG) and two documents that gather them with the cohort, the
//! protocol, a methods text assembled from each stage's own description,
//! data quality, the cautions and the provenance: `report.html` (one
//! self-contained file: figures inlined as SVG, styles inline, no links
//! out) and `report.md` (figures as links to the PNG files beside it).
//!
//! Layout under `<output>/report/`: `report.html`, `report.md`,
//! `tables/<name>.{csv,md,tex}`, `figures/<name>.{svg,png}`.

pub mod data;
mod document;
pub mod figures;
mod findings;
pub(crate) mod qc;
pub mod style;
pub mod tables;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;

use super::epochs::{EpochTables, Epochs};
use super::fits::{FitRow, Fits};
use super::stage::{Run, Stage};
use super::statistics::{StatisticsStage, StatisticsTables};
use super::transmissions::{PositionRow, TransmissionTables, Transmissions};
use crate::config::study::Study;
use crate::runner::Runner;
use crate::runner::key::{Key, KeyBuilder, combine};
use crate::tables::create_folder;
use crate::tables::write_bytes_atomic;
use document::{Block, Document, Section};
use tables::ReportTable;

/// The report stage.
pub(crate) struct Report;

impl Stage for Report {
    const NAME: &'static str = "report";
    /// Version of the report's layout; bump when its output changes.
    const VERSION: u32 = 15;
    const COHORT_LEVEL: bool = true;
    const SUMMARY: &'static str = "the paper's tables and figures, report.html and report.md";
    const UPSTREAM: &'static [&'static str] =
        &["epochs", "transmissions", "fits", "statistics", "power"];
    type Output = ();

    fn settings(study: &Study) -> Key {
        let mut k = KeyBuilder::new("report-settings", Self::VERSION);
        k.value("study", &study.portable());
        // A simulated study's truth is not an input of the analysis, but the
        // report compares with it.
        for f in findings::TRUTH_FILES {
            if let Ok(b) = std::fs::read(study.root.join(f)) {
                k.bytes(f, &b);
            }
        }
        k.finish()
    }

    /// Every input file: the report lists them with their hashes.
    fn inputs(run: &Run) -> Key {
        combine("inputs", run.inputs.iter().map(|(p, _)| run.hash(p)))
    }

    fn build(run: &Run, _: &Runner) -> Result<((), String)> {
        Ok((
            (),
            format!(
                "`{}`",
                run.out().join("report").join("report.html").display()
            ),
        ))
    }

    fn write(_: &(), run: &Run, runner: &Runner) -> Result<Vec<PathBuf>> {
        let study = run.study;
        let rel = |p: &Path| {
            p.strip_prefix(&study.root)
                .unwrap_or(p)
                .to_string_lossy()
                .replace('\\', "/")
        };
        let power_rows = run.output::<crate::stages::power::Power>();
        let power = match crate::stages::power::plan_for(run)? {
            Some((plan, _)) if !power_rows.is_empty() => Some(PowerSection {
                lines: crate::stages::power::summary_lines(&plan, power_rows),
                figure: figures::power_curves(
                    &run.out().join("report").join("figures"),
                    &crate::stages::power::curves(&plan, power_rows),
                    figures::Print::of(&study.report),
                )?,
            }),
            _ => None,
        };
        let inputs = Inputs {
            study,
            epochs: run.output::<Epochs>(),
            images: run.output::<Transmissions>(),
            fits: &run.output::<Fits>().rows,
            stats: run.output::<StatisticsStage>(),
            power,
            truth: None,
            methods: &run.methods,
            files: run
                .inputs
                .iter()
                .map(|(p, h)| {
                    (
                        rel(p),
                        h.map(|x| x.0.hex()).unwrap_or_else(|| "unreadable".into()),
                    )
                })
                .collect(),
        };
        let truth = match findings::read_truth(&study.root) {
            Some(Ok(t)) => Some(t),
            Some(Err(e)) => {
                runner.warn(format!(
                    "the study's `truth/` folder could not be read, so the report leaves out the comparison with it: {e}"
                ));
                None
            }
            None => None,
        };
        let inputs = Inputs { truth, ..inputs };
        let images = run.output::<Transmissions>();
        write(
            &inputs,
            &|i| images.positions(runner, i).unwrap_or_default(),
            run.out(),
        )
    }

    fn describe(_: &Run) -> Option<String> {
        Some(format!(
            "All analyses were run with satstep {} (cache format {}); the same inputs give the same tables and figures byte for byte, whatever the number of worker threads.",
            env!("CARGO_PKG_VERSION"),
            crate::runner::key::CACHE_FORMAT
        ))
    }
}

/// The cautions every report carries.
pub(crate) const CAUTIONS: &[&str] = &[
    "Research use only: satstep is for research on oximetry methods, not a medical device; its results must not be used for diagnosis or treatment.",
    "Breathing challenges can hurt people. Low-oxygen and oxygen breathing need medical supervision, ethics approval, continuous monitoring and stopping rules set by the study's physician.",
    "Local regulations and the approving ethics committee decide what may be done, not this tool.",
];

/// Published sources of the methods, cited in the methods text.
pub(crate) const REFERENCES: &[&str] = &[
    "Prahl SA (1999). Optical absorption of hemoglobin. Oregon Medical Laser Center, compiled from Gratzer WB and Kollias N. (Molar extinction coefficients of oxy- and deoxyhemoglobin.)",
    "Bates D, Mächler M, Bolker B, Walker S (2015). Fitting linear mixed-effects models using lme4. Journal of Statistical Software 67(1):1–48.",
    "Kuznetsova A, Brockhoff PB, Christensen RHB (2017). lmerTest package: tests in linear mixed effects models. Journal of Statistical Software 82(13):1–26.",
    "Satterthwaite FE (1946). An approximate distribution of estimates of variance components. Biometrics Bulletin 2(6):110–114.",
    "Holm S (1979). A simple sequentially rejective multiple test procedure. Scandinavian Journal of Statistics 6(2):65–70.",
    "Bland JM, Altman DG (2007). Agreement between methods of measurement with multiple observations per individual. Journal of Biopharmaceutical Statistics 17(4):571–582.",
    "Boik RJ (1981). A priori tests in repeated measures designs: effects of nonsphericity. Psychometrika 46(3):241–255.",
    "Matuschek H, Kliegl R, Vasishth S, Baayen H, Bates D (2017). Balancing Type I error and power in linear mixed models. Journal of Memory and Language 94:305–315.",
    "Huber PJ (1964). Robust estimation of a location parameter. Annals of Mathematical Statistics 35(1):73–101.",
    "Severinghaus JW (1979). Simple, accurate equations for human blood O2 dissociation computations. Journal of Applied Physiology 46(3):599–602.",
    "ISO 2533:1975. Standard Atmosphere. International Organization for Standardization.",
];

/// The report's section on the power of a follow-up study.
pub(crate) struct PowerSection {
    /// One sentence per method, kind and contrast: the smallest design.
    pub lines: Vec<String>,
    pub figure: figures::Figure,
}

const POWER_INTRO: &str = "For a follow-up study with this instrument: the power to detect the stated effects, estimated by simulating studies from this pilot's own variance components and analysing each as above. Assumptions, the variances used and the full table are in `power/power.md` and `power/power.csv`.";

pub(crate) struct Inputs<'a> {
    pub study: &'a Study,
    pub epochs: &'a EpochTables,
    pub images: &'a TransmissionTables,
    pub fits: &'a [FitRow],
    pub stats: &'a StatisticsTables,
    /// The follow-up study's power, when the study plans one.
    pub power: Option<PowerSection>,
    /// The simulator's true values, for a simulated study.
    pub truth: Option<findings::Truth>,
    /// The methods text, one paragraph per stage in the stages' order.
    pub methods: &'a [String],
    /// (path relative to the study folder, SHA-256) of every input file.
    pub files: Vec<(String, String)>,
}

/// Writes the report; returns every file written.
/// `positions` reads one capture's profile positions (from the transmissions stage's cache).
fn write(
    inp: &Inputs,
    positions: &dyn Fn(usize) -> Vec<PositionRow>,
    out: &Path,
) -> Result<Vec<PathBuf>> {
    let dir = out.join("report");
    let tdir = dir.join("tables");
    create_folder(&tdir)?;
    let usage = tables::usage(inp.epochs, inp.images, inp.fits);
    let s = inp.study;
    let mut results = vec![
        tables::participants(s, inp.epochs, &usage),
        tables::so2_by_epoch(s, inp.stats),
        tables::contrasts(s, inp.stats),
        tables::variance_components(inp.stats),
        tables::agreement(inp.stats),
    ];
    // By group only where the study records the attribute.
    if !inp.stats.agreement_groups.is_empty() {
        results.push(tables::agreement_by_group(inp.stats));
    }
    if !inp.stats.bias_differences.is_empty() {
        results.push(tables::bias_difference(inp.stats));
    }
    results.extend([
        tables::slope_on_reference(s, inp.stats),
        tables::method_comparison(inp.stats),
        tables::method_agreement(inp.stats),
    ]);
    let quality = vec![
        tables::accounting(s, inp.epochs, &usage, inp.fits),
        tables::data_quality(s, inp.images, inp.fits),
    ];
    let truth = inp
        .truth
        .as_ref()
        .map(|t| findings::against_truth(inp.stats, t));
    let truth_table = truth
        .as_ref()
        .map(|t| tables::truth(t, inp.stats.confidence));
    let mut written = Vec::new();
    for t in results.iter().chain(&quality).chain(&truth_table) {
        // Every table must be one `report: appendix:` can name.
        anyhow::ensure!(
            crate::config::study::REPORT_TABLES.contains(&t.name),
            "internal: report table `{}` is missing from REPORT_TABLES",
            t.name
        );
        written.extend(t.write(&tdir)?);
    }
    let data = data::prepare(s, inp.epochs, positions, inp.fits, inp.stats, inp.images);
    let figs = figures::all(&dir.join("figures"), &data, &s.report)?;
    written.extend(figs.iter().flat_map(|f| f.files.clone()));
    if let Some(p) = &inp.power {
        written.extend(p.figure.files.clone());
    }
    // A pooled analysis has no images: the sites' own reports carry the sheets.
    let qc_files = if inp.study.sites.is_empty() {
        qc::write(&dir, inp, &data.primary, positions)?
    } else {
        Vec::new()
    };
    let parts = Parts {
        qc: !qc_files.is_empty(),
        inp,
        usage: &usage,
        truth: truth.as_deref(),
        truth_table: truth_table.as_ref(),
    };
    written.extend(qc_files);
    let doc = parts.document(&results, &quality, &figs, &data.primary);
    let html = dir.join("report.html");
    write_bytes_atomic(&html, doc.html().as_bytes())?;
    let md = dir.join("report.md");
    write_bytes_atomic(&md, doc.markdown().as_bytes())?;
    written.push(html);
    written.push(md);
    Ok(written)
}

/// What the report's sections are made of, beside the tables and figures.
struct Parts<'a> {
    inp: &'a Inputs<'a>,
    /// Whether quality-control sheets were drawn (not for a spectra table).
    qc: bool,
    usage: &'a [Option<String>],
    truth: Option<&'a [findings::TruthRow]>,
    truth_table: Option<&'a ReportTable>,
}

impl<'a> Parts<'a> {
    /// Study id, acquisition days, the report's date and the tool version.
    /// The date is `report: date:`, else the last session's day.
    fn byline(&self) -> Vec<String> {
        let s = self.inp.study;
        let days: Vec<chrono::NaiveDate> = s
            .subjects
            .iter()
            .flat_map(|x| &x.sessions)
            .map(|x| x.start.date_naive())
            .collect();
        let (first, last) = (days.iter().min(), days.iter().max());
        let mut v = vec![format!("Study `{}`.", s.id)];
        if let (Some(a), Some(b)) = (first, last) {
            v.push(if a == b {
                format!("Data acquired on {a}.")
            } else {
                format!("Data acquired from {a} to {b}.")
            });
        }
        if let Some(d) = s.report.date.as_ref().or(last) {
            v.push(format!(
                "Report dated {d}{}, written by satstep {}.",
                if s.report.date.is_some() {
                    ""
                } else {
                    " (the last session's day; `report: date:` sets it)"
                },
                env!("CARGO_PKG_VERSION")
            ));
        }
        vec![v.join(" ")]
    }

    fn document(
        &self,
        results: &'a [ReportTable],
        quality: &'a [ReportTable],
        figs: &'a [figures::Figure],
        primary: &str,
    ) -> Document<'a> {
        let inp = self.inp;
        let s = inp.study;
        // Tables the study sends to the appendix, else the long ones.
        let in_appendix = |t: &ReportTable| match &s.report.appendix {
            Some(names) => names.iter().any(|n| n == t.name),
            None => t.rows.len() > crate::config::study::ReportSettings::LONG_TABLE_ROWS,
        };
        let mut appendix = Section::new("appendix", "Appendix: long tables");
        let mut summary = Section::new("summary", "Summary of findings");
        let methods: Vec<String> = s.methods.iter().map(|m| m.label.clone()).collect();
        let mut lines = findings::summary(inp.stats, &methods, &inp.stats.adjustment);
        lines.push(self.quality_sentence());
        if let Some(t) = self.truth {
            lines.push(format!(
                "This study is simulated. Against the simulator's true values: {}",
                findings::truth_sentences(t, inp.stats.confidence).join(" ")
            ));
        }
        summary.push(Block::Bullets(lines));
        let mut sections = vec![summary];

        let mut cohort = Section::new("cohort", "Cohort and protocol");
        for p in self.cohort() {
            cohort.push(Block::Prose(p));
        }
        cohort.push(Block::Pre(crate::timeline::show::render_timeline(
            &s.protocol,
        )));
        sections.push(cohort);

        let mut res = Section::new("results", "Results");
        res.push(Block::Prose(format!(
            "Figures of a single method show `{primary}`{}.",
            if s.report.primary.is_some() {
                " (`report: primary:`)"
            } else {
                ""
            }
        )));
        for t in results {
            if in_appendix(t) {
                appendix.push(Block::Table(t));
            } else {
                res.push(Block::Table(t));
            }
        }
        for f in figs.iter().filter(|f| !f.quality) {
            res.push(Block::Figure(f));
        }
        sections.push(res);

        if let (Some(rows), Some(t)) = (self.truth, self.truth_table) {
            let mut sec = Section::new("truth", "Comparison with the simulated truth");
            sec.push(Block::Prose(format!(
                "The study was simulated, so the true SO2 of every vessel is known (`truth/` beside the study file). Per method and vessel kind ({} rows): the subject × epoch means against their true values, and how many of the epoch contrasts' {:.0} % intervals hold the cohort's true change. This checks one study; how often the intervals hold the truth over thousands of simulated studies is the calibration in DEVELOPERS.md.",
                rows.len(),
                inp.stats.confidence * 100.0
            )));
            sec.push(Block::Table(t));
            sections.push(sec);
        }

        if let Some(p) = &inp.power {
            let mut sec = Section::new("power", "Power for a follow-up study");
            sec.push(Block::Prose(POWER_INTRO.into()));
            sec.push(Block::Bullets(p.lines.clone()));
            sec.push(Block::Figure(&p.figure));
            sections.push(sec);
        }

        let mut methods_sec = Section::new("methods", "Methods");
        for p in inp.methods {
            methods_sec.push(Block::Prose(p.clone()));
        }
        methods_sec.push(Block::Prose("References:".into()));
        methods_sec.push(Block::Numbered(
            REFERENCES.iter().map(|r| r.to_string()).collect(),
        ));
        sections.push(methods_sec);

        let mut q = Section::new("quality", "Data quality");
        for t in quality {
            if in_appendix(t) {
                appendix.push(Block::Table(t));
            } else {
                q.push(Block::Table(t));
            }
        }
        for f in figs.iter().filter(|f| f.quality) {
            q.push(Block::Figure(f));
        }
        let fails = self.failures();
        if fails.is_empty() {
            q.push(Block::Prose(
                "Every listed capture was read and registered.".into(),
            ));
        } else {
            q.push(Block::Bullets(fails));
        }
        if self.qc {
            q.push(Block::Link(
                "qc.html".into(),
                "Quality-control sheets: the segments and their flagged positions drawn over every capture (`qc.html`)".into(),
            ));
        }
        sections.push(q);
        if !appendix.blocks.is_empty() {
            sections.push(appendix);
        }

        let mut prov = Section::new("provenance", "Provenance");
        prov.push(Block::Prose(format!(
            "satstep {} · cache format {} · study file `{}`. Per-stage keys, timings and counts are in `manifest.json` beside this folder.",
            env!("CARGO_PKG_VERSION"),
            crate::runner::key::CACHE_FORMAT,
            self.rel(&s.file)
        )));
        prov.push(Block::Files(&inp.files));
        sections.push(prov);

        Document {
            title: s.title.clone(),
            byline: self.byline(),
            cautions: CAUTIONS,
            sections,
        }
    }

    fn cohort(&self) -> Vec<String> {
        let s = self.inp.study;
        let ages: Vec<f64> = s.subjects.iter().filter_map(|x| x.age).collect();
        let female = s
            .subjects
            .iter()
            .filter(|x| x.sex.as_deref() == Some("F"))
            .count();
        let male = s
            .subjects
            .iter()
            .filter(|x| x.sex.as_deref() == Some("M"))
            .count();
        let sessions: usize = s.subjects.iter().map(|x| x.sessions.len()).sum();
        let used = self.usage.iter().filter(|u| u.is_none()).count();
        let mut v = vec![format!(
            "{} subjects ({} female, {} male{}), {} sessions, {} captures listed, {} used in the statistics.",
            s.subjects.len(),
            female,
            male,
            if ages.is_empty() {
                String::new()
            } else {
                format!(
                    "; age {:.0}–{:.0} years",
                    ages.iter().cloned().fold(f64::INFINITY, f64::min),
                    ages.iter().cloned().fold(0.0, f64::max)
                )
            },
            sessions,
            self.usage.len(),
            used
        )];
        let mut grades: BTreeMap<i64, usize> = BTreeMap::new();
        for g in s.subjects.iter().filter_map(|x| x.pigmentation) {
            *grades.entry(g).or_default() += 1;
        }
        if !grades.is_empty() {
            let listed: Vec<String> = grades
                .iter()
                .map(|(g, n)| format!("grade {g}: {n}"))
                .collect();
            let missing = s
                .subjects
                .iter()
                .filter(|x| x.pigmentation.is_none())
                .count();
            v.push(format!(
                "Fundus pigmentation as recorded in the study file: {}{}.",
                listed.join(", "),
                if missing > 0 {
                    format!(", not recorded: {missing}")
                } else {
                    String::new()
                }
            ));
        }
        let mut sites: BTreeMap<&str, usize> = BTreeMap::new();
        for x in s.subjects.iter().filter_map(|x| x.site.as_deref()) {
            *sites.entry(x).or_default() += 1;
        }
        if !sites.is_empty() {
            let listed: Vec<String> = sites.iter().map(|(k, n)| format!("{k}: {n}")).collect();
            v.push(format!(
                "Subjects by recruiting site: {}.",
                listed.join(", ")
            ));
        }
        if !s.sites.is_empty() {
            let listed: Vec<String> = s
                .sites
                .iter()
                .map(|x| {
                    format!(
                        "{} ({} subjects, {} captures; manifest SHA-256 {}…)",
                        x.name,
                        x.subjects,
                        x.captures,
                        &x.manifest_sha256[..12.min(x.manifest_sha256.len())]
                    )
                })
                .collect();
            v.push(format!(
                "Pooled from each site's own run, without images: {}. Per-position figures and quality-control sheets are in the sites' own reports.",
                listed.join("; ")
            ));
        }
        let bands: Vec<String> = s.instrument.bands.iter().map(|b| b.name.clone()).collect();
        v.push(format!(
            "Instrument: {} ({} bands: {}; {} µm per pixel).",
            s.instrument.name,
            bands.len(),
            bands.join(", "),
            s.instrument.pixel_size_um
        ));
        v
    }

    /// Data quality in one sentence: captures used, segment fits without
    /// a value, and the share of joint fits the adequacy test calls misfits.
    fn quality_sentence(&self) -> String {
        use crate::oximetry::segment::Adequacy;
        let used = self.usage.iter().filter(|u| u.is_none()).count();
        let fits = self.inp.fits;
        let without = fits.iter().filter(|r| r.so2.is_none()).count();
        let mut s = format!(
            "Data quality: {used} of {} captures used; {without} of {} segment fits without an SO2",
            self.usage.len(),
            fits.len()
        );
        for m in &self.inp.study.methods {
            let judged: Vec<_> = fits
                .iter()
                .filter(|r| r.method == m.label && r.adequacy.is_some())
                .collect();
            let bad = judged
                .iter()
                .filter(|r| r.adequacy.is_some_and(Adequacy::is_misfit))
                .count();
            if !judged.is_empty() {
                s.push_str(&format!(
                    "; the vessel model of `{}` does not describe the spectra of {bad} of its {} fits ({:.0} %)",
                    m.label,
                    judged.len(),
                    100.0 * bad as f64 / judged.len() as f64
                ));
            }
        }
        s.push_str(" (details under Data quality).");
        s
    }

    fn failures(&self) -> Vec<String> {
        let c = &self.inp.epochs.captures;
        let mut v: Vec<String> = (0..c.len())
            .filter(|i| self.inp.images.status[*i].status.failed())
            .map(|i| {
                format!(
                    "{} {} `{}`: {} ({})",
                    c[i].subject,
                    c[i].session,
                    c[i].capture,
                    self.inp.images.status[i].status,
                    self.inp.images.status[i]
                        .message
                        .clone()
                        .unwrap_or_default()
                )
            })
            .collect();
        for e in &self.inp.study.exclusions.captures {
            v.push(format!("`{}` excluded by the study: {}", e.file, e.reason));
        }
        for subj in &self.inp.study.exclusions.subjects {
            v.push(format!("subject {subj} excluded by the study"));
        }
        v
    }

    fn rel(&self, p: &Path) -> String {
        p.strip_prefix(&self.inp.study.root)
            .unwrap_or(p)
            .to_string_lossy()
            .replace('\\', "/")
    }
}
