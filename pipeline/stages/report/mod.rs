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
pub mod figures;
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
use tables::{ReportTable, html_escape, html_prose, markdown_escape as md};

/// The report stage.
pub(crate) struct Report;

impl Stage for Report {
    const NAME: &'static str = "report";
    /// Version of the report's layout; bump when its output changes.
    const VERSION: u32 = 11;
    const SUMMARY: &'static str = "the paper's tables and figures, report.html and report.md";
    const UPSTREAM: &'static [&'static str] =
        &["epochs", "transmissions", "fits", "statistics", "power"];
    type Output = ();

    fn settings(study: &Study) -> Key {
        let mut k = KeyBuilder::new("report-settings", Self::VERSION);
        k.value("study", &study.portable());
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
    let results = vec![
        tables::participants(s, inp.epochs, &usage),
        tables::so2_by_epoch(s, inp.stats),
        tables::contrasts(s, inp.stats),
        tables::variance_components(inp.stats),
        tables::agreement(inp.stats),
        tables::slope_on_reference(s, inp.stats),
        tables::method_comparison(inp.stats),
        tables::method_agreement(inp.stats),
    ];
    let quality = vec![
        tables::accounting(s, inp.epochs, &usage, inp.fits),
        tables::data_quality(s, inp.images, inp.fits),
    ];
    let mut written = Vec::new();
    for t in results.iter().chain(&quality) {
        written.extend(t.write(&tdir)?);
    }
    let data = data::prepare(s, inp.epochs, positions, inp.fits, inp.stats);
    let figs = figures::all(&dir.join("figures"), &data)?;
    written.extend(figs.iter().flat_map(|f| f.files.clone()));
    if let Some(p) = &inp.power {
        written.extend(p.figure.files.clone());
    }
    let doc = Document {
        inp,
        results: &results,
        quality: &quality,
        figures: &figs,
        usage: &usage,
        primary: &data.primary,
    };
    let html = dir.join("report.html");
    write_bytes_atomic(&html, doc.html().as_bytes())?;
    let md = dir.join("report.md");
    write_bytes_atomic(&md, doc.markdown().as_bytes())?;
    written.push(html);
    written.push(md);
    Ok(written)
}

struct Document<'a> {
    inp: &'a Inputs<'a>,
    results: &'a [ReportTable],
    quality: &'a [ReportTable],
    figures: &'a [figures::Figure],
    usage: &'a [Option<String>],
    primary: &'a str,
}

impl Document<'_> {
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

    fn html(&self) -> String {
        let s = self.inp.study;
        let mut h = String::new();
        h.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
        h.push_str(&format!("<title>{}</title>\n", html_escape(&s.title)));
        h.push_str("<style>\nbody{font-family:'DejaVu Sans',Verdana,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222;line-height:1.45}\nh1{font-size:1.6em;border-bottom:3px solid #0072b2;padding-bottom:.2em}\nh2{font-size:1.25em;margin-top:2em;color:#0072b2}\n.caution{border-left:5px solid #d55e00;background:#fff6ef;padding:.6em 1em;margin:1em 0}\ntable{border-collapse:collapse;margin:1em 0;font-size:.88em}\ncaption{text-align:left;font-style:italic;padding:.3em 0}\nth,td{padding:.25em .6em;border-bottom:1px solid #ddd}\nthead th{border-bottom:2px solid #444;text-align:left}\n.num{text-align:right;font-variant-numeric:tabular-nums}\nfigure{margin:1.5em 0}\nfigure svg{max-width:100%;height:auto}\nfigcaption{font-size:.9em;color:#444}\npre{background:#f6f6f6;padding:.8em;overflow-x:auto;font-size:.85em}\ncode{font-size:.9em}\n</style>\n</head>\n<body>\n");
        h.push_str(&format!(
            "<h1>{}</h1>\n<p>Study <code>{}</code>. Report written by satstep {}.</p>\n",
            html_escape(&s.title),
            html_escape(&s.id),
            env!("CARGO_PKG_VERSION")
        ));
        h.push_str("<div class=\"caution\"><strong>Cautions.</strong><ul>");
        for c in CAUTIONS {
            h.push_str(&format!("<li>{}</li>", html_escape(c)));
        }
        h.push_str("</ul></div>\n");
        // A short contents list of the sections.
        h.push_str("<nav><strong>Contents</strong><ol>");
        let mut sections = vec![("cohort", "Cohort and protocol"), ("results", "Results")];
        if self.inp.power.is_some() {
            sections.push(("power", "Power for a follow-up study"));
        }
        sections.extend([
            ("methods", "Methods"),
            ("quality", "Data quality"),
            ("provenance", "Provenance"),
        ]);
        for (id, title) in sections {
            h.push_str(&format!("<li><a href=\"#{id}\">{title}</a></li>"));
        }
        h.push_str("</ol></nav>\n");
        h.push_str("<h2 id=\"cohort\">Cohort and protocol</h2>\n");
        for p in self.cohort() {
            h.push_str(&format!("<p>{}</p>\n", html_prose(&p)));
        }
        h.push_str(&format!(
            "<pre>{}</pre>\n",
            html_escape(&crate::timeline::show::render_timeline(&s.protocol))
        ));
        h.push_str("<h2 id=\"results\">Results</h2>\n");
        h.push_str(&format!(
            "<p>Figures of a single method show <code>{}</code>.</p>\n",
            html_escape(self.primary)
        ));
        // Tables and figures are numbered in the order they appear.
        let (mut table_no, mut figure_no) = (0, 0);
        for t in self.results {
            table_no += 1;
            h.push_str(&t.html(table_no));
        }
        for f in self.figures {
            figure_no += 1;
            h.push_str(&format!(
                "<figure id=\"fig-{}\">\n{}\n<figcaption><strong>Figure {figure_no}.</strong> {}</figcaption>\n</figure>\n",
                f.name,
                strip_xml_header(&f.svg),
                html_prose(&f.caption)
            ));
        }
        if let Some(p) = &self.inp.power {
            h.push_str("<h2 id=\"power\">Power for a follow-up study</h2>\n");
            h.push_str(&format!("<p>{}</p>\n<ul>\n", html_prose(POWER_INTRO)));
            for l in &p.lines {
                h.push_str(&format!("<li>{}</li>\n", html_prose(l)));
            }
            h.push_str("</ul>\n");
            figure_no += 1;
            h.push_str(&format!(
                "<figure id=\"fig-{}\">\n{}\n<figcaption><strong>Figure {figure_no}.</strong> {}</figcaption>\n</figure>\n",
                p.figure.name,
                strip_xml_header(&p.figure.svg),
                html_prose(&p.figure.caption)
            ));
        }
        h.push_str("<h2 id=\"methods\">Methods</h2>\n");
        for p in self.inp.methods {
            h.push_str(&format!("<p>{}</p>\n", html_prose(p)));
        }
        h.push_str("<h3>References</h3>\n<ol>\n");
        for r in REFERENCES {
            h.push_str(&format!("<li>{}</li>\n", html_escape(r)));
        }
        h.push_str("</ol>\n<h2 id=\"quality\">Data quality</h2>\n");
        for t in self.quality {
            table_no += 1;
            h.push_str(&t.html(table_no));
        }
        let fails = self.failures();
        if fails.is_empty() {
            h.push_str("<p>Every listed capture was read and registered.</p>\n");
        } else {
            h.push_str("<ul>\n");
            for f in &fails {
                h.push_str(&format!("<li>{}</li>\n", html_prose(f)));
            }
            h.push_str("</ul>\n");
        }
        h.push_str("<h2 id=\"provenance\">Provenance</h2>\n");
        h.push_str(&format!(
            "<p>satstep {} · cache format {} · study file <code>{}</code></p>\n",
            env!("CARGO_PKG_VERSION"),
            crate::runner::key::CACHE_FORMAT,
            html_escape(&self.rel(&s.file))
        ));
        h.push_str("<p>Per-stage keys, timings and counts are in <code>manifest.json</code> beside this folder.</p>\n<details><summary>Input files and their SHA-256</summary>\n<table><tbody>\n");
        for (p, k) in &self.inp.files {
            h.push_str(&format!(
                "<tr><td><code>{}</code></td><td><code>{}</code></td></tr>\n",
                html_escape(p),
                k
            ));
        }
        h.push_str("</tbody></table>\n</details>\n</body>\n</html>\n");
        h
    }

    fn rel(&self, p: &Path) -> String {
        p.strip_prefix(&self.inp.study.root)
            .unwrap_or(p)
            .to_string_lossy()
            .replace('\\', "/")
    }

    fn markdown(&self) -> String {
        let s = self.inp.study;
        let mut m = format!(
            "# {}\n\nStudy {}. Report written by satstep {}.\n\n",
            md(&s.title),
            md(&s.id),
            env!("CARGO_PKG_VERSION")
        );
        m.push_str("> **Cautions.**\n");
        for c in CAUTIONS {
            m.push_str(&format!("> - {c}\n"));
        }
        m.push_str("\n## Cohort and protocol\n\n");
        for p in self.cohort() {
            m.push_str(&format!("{}\n\n", md(&p)));
        }
        m.push_str(&format!(
            "```\n{}```\n\n## Results\n\nFigures of a single method show `{}`.\n\n",
            crate::timeline::show::render_timeline(&s.protocol),
            self.primary
        ));
        let (mut table_no, mut figure_no) = (0, 0);
        for t in self.results {
            table_no += 1;
            m.push_str(&format!(
                "**Table {table_no}.** {}\n\n{}\n",
                md(&t.caption),
                t.markdown()
            ));
        }
        for f in self.figures {
            figure_no += 1;
            m.push_str(&format!(
                "![{}](figures/{}.png)\n\n**Figure {figure_no}.** {}\n\n",
                f.name,
                f.name,
                md(&f.caption)
            ));
        }
        if let Some(p) = &self.inp.power {
            m.push_str(&format!(
                "## Power for a follow-up study\n\n{}\n\n",
                md(POWER_INTRO)
            ));
            for l in &p.lines {
                m.push_str(&format!("- {}\n", md(l)));
            }
            figure_no += 1;
            m.push_str(&format!(
                "\n![{}](figures/{}.png)\n\n**Figure {figure_no}.** {}\n\n",
                p.figure.name,
                p.figure.name,
                md(&p.figure.caption)
            ));
        }
        m.push_str("## Methods\n\n");
        for p in self.inp.methods {
            m.push_str(&format!("{}\n\n", md(p)));
        }
        m.push_str("### References\n\n");
        for (i, r) in REFERENCES.iter().enumerate() {
            m.push_str(&format!("{}. {r}\n", i + 1));
        }
        m.push_str("\n## Data quality\n\n");
        for t in self.quality {
            table_no += 1;
            m.push_str(&format!(
                "**Table {table_no}.** {}\n\n{}\n",
                md(&t.caption),
                t.markdown()
            ));
        }
        let fails = self.failures();
        if fails.is_empty() {
            m.push_str("Every listed capture was read and registered.\n\n");
        }
        for f in &fails {
            m.push_str(&format!("- {}\n", md(f)));
        }
        m.push_str(&format!("\n## Provenance\n\nsatstep {} · cache format {} · study file `{}`\n\nPer-stage keys, timings and counts are in `manifest.json` beside this folder.\n", env!("CARGO_PKG_VERSION"), crate::runner::key::CACHE_FORMAT, self.rel(&s.file)));
        m.push_str("\n| input file | SHA-256 |\n|---|---|\n");
        for (p, k) in &self.inp.files {
            m.push_str(&format!("| `{p}` | `{k}` |\n"));
        }
        m
    }
}

/// SVG text without its XML declaration, for inlining in HTML.
fn strip_xml_header(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    }
}
