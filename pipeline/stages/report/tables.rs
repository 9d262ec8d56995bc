//! The report's tables: built from the stages' results as text cells (the
//! numbers rounded as a paper prints them) and written as CSV, Markdown and
//! LaTeX (booktabs). The unrounded values stay in the stages' own tables.

use crate::stats::summary::{mean, sd};
use crate::timeline::assign::CaptureStatus;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;

use crate::config::study::{Adjustment, Study};
use crate::stages::epochs::EpochTables;
use crate::stages::fits::FitRow;
use crate::stages::statistics::{ARTERIOVENOUS, StatisticsTables};
use crate::stages::transmissions::TransmissionTables;
use crate::stats::agreement::Agreement;
use crate::stats::infer::format_p;
use crate::tables::write_bytes_atomic;

/// A table of text cells with a caption; numeric columns align right.
#[derive(Debug, Clone)]
pub struct ReportTable {
    pub name: &'static str,
    pub caption: String,
    pub columns: Vec<String>,
    pub numeric: Vec<bool>,
    pub rows: Vec<Vec<String>>,
    /// Leading columns that LaTeX sets as a heading over their rows.
    pub groups: usize,
}

impl ReportTable {
    fn new(name: &'static str, caption: impl Into<String>, columns: &[(&str, bool)]) -> Self {
        ReportTable {
            name,
            caption: caption.into(),
            columns: columns.iter().map(|c| c.0.to_string()).collect(),
            numeric: columns.iter().map(|c| c.1).collect(),
            rows: vec![],
            groups: 0,
        }
    }

    /// The first `n` columns head groups of rows in LaTeX.
    fn grouped(mut self, n: usize) -> Self {
        self.groups = n;
        self
    }

    pub fn csv(&self) -> Result<Vec<u8>> {
        let mut w = csv::Writer::from_writer(Vec::new());
        w.write_record(&self.columns)?;
        for r in &self.rows {
            w.write_record(r)?;
        }
        Ok(w.into_inner()?)
    }

    pub fn markdown(&self) -> String {
        let esc = |s: &str| markdown_escape(s).replace('|', "\\|");
        let mut out = format!(
            "| {} |\n|",
            self.columns
                .iter()
                .map(|c| esc(c))
                .collect::<Vec<_>>()
                .join(" | ")
        );
        for n in &self.numeric {
            out.push_str(if *n { "---:|" } else { "---|" });
        }
        out.push('\n');
        for r in &self.rows {
            out.push_str(&format!(
                "| {} |\n",
                r.iter().map(|c| esc(c)).collect::<Vec<_>>().join(" | ")
            ));
        }
        out
    }

    /// A booktabs `table` environment. The file's first lines say what it
    /// needs (`LATEX_PACKAGES`). Leading cells that repeat the row above
    /// are left blank (grouped rows, a little space between groups); a
    /// table wider than the text is scaled to the text width.
    pub fn latex(&self) -> String {
        // The leading `groups` columns become a heading row over their
        // rows (in italics) instead of columns of their own.
        let g = self.groups;
        let shown = g..self.columns.len();
        // Long text (a test's name, a unit) wraps in a ragged column of its
        // own instead of widening the table. A single such column beside
        // at most two others may take more of the page: at 11em the
        // data-quality table's items ran to four lines each, and with three
        // methods the table off the page.
        let wraps = |i: usize| {
            !self.numeric[i]
                && self
                    .rows
                    .iter()
                    .map(|r| r[i].chars().count())
                    .max()
                    .unwrap_or(0)
                    > LATEX_WRAP_CHARS
        };
        let wrapping = shown.clone().filter(|i| wraps(*i)).count();
        let wrap = if shown.len() > 4 {
            "7em"
        } else if wrapping == 1 && shown.len() <= 3 {
            "20em"
        } else {
            "11em"
        };
        let align: String = shown
            .clone()
            .map(|i| {
                if self.numeric[i] {
                    "r".to_string()
                } else if wraps(i) {
                    format!(">{{\\raggedright\\arraybackslash}}p{{{wrap}}}")
                } else {
                    "l".to_string()
                }
            })
            .collect();
        let row = |cells: &[String]| {
            cells
                .iter()
                .map(|c| latex_cell(c))
                .collect::<Vec<_>>()
                .join(" & ")
                + " \\\\\n"
        };
        let mut out = format!(
            "% satstep report table `{}`. Needs, in the preamble: {LATEX_PACKAGES}.\n",
            self.name
        );
        // A long or wide table in a smaller size, so that it stays on one
        // page and within the text width; columns a little closer.
        let heads = if g == 0 {
            0
        } else {
            let mut keys: Vec<&[String]> = self.rows.iter().map(|r| &r[..g]).collect();
            keys.dedup();
            keys.len()
        };
        let lines = self.rows.len() + heads;
        let size = if lines > 3 * LATEX_LONG_ROWS / 2 {
            "\\scriptsize"
        } else if lines > LATEX_LONG_ROWS || shown.len() >= LATEX_WIDE_COLUMNS {
            "\\footnotesize"
        } else {
            "\\small"
        };
        out.push_str(&format!(
            "\\begin{{table}}[htbp]\n\\centering\n{size}\n\\setlength{{\\tabcolsep}}{{4pt}}\n"
        ));
        out.push_str(&format!(
            "\\caption{{{}}}\n\\label{{tab:{}}}\n\\smallskip\n",
            latex_cell(&self.caption),
            self.name
        ));
        out.push_str(&format!(
            "\\sbox0{{%\n\\begin{{tabular}}{{{align}}}\n\\toprule\n"
        ));
        out.push_str(&row(&self.columns[shown.clone()]));
        out.push_str("\\midrule\n");
        let mut previous: Option<&Vec<String>> = None;
        for r in &self.rows {
            let mut cells = r[shown.clone()].to_vec();
            let new_group = g > 0 && previous.is_none_or(|p| p[..g] != r[..g]);
            if new_group {
                if previous.is_some() {
                    out.push_str("\\addlinespace\n");
                }
                out.push_str(&format!(
                    "\\multicolumn{{{}}}{{@{{}}l}}{{\\textit{{{}}}}} \\\\\n",
                    shown.len(),
                    latex_cell(&r[..g].join(", "))
                ));
            } else if let Some(p) = previous {
                // Blank the leading text cells the row shares with the one
                // above (never a number, never the whole row).
                let p = &p[shown.clone()];
                let same = (0..cells.len() - 1)
                    .take_while(|i| !self.numeric[g + *i] && cells[*i] == p[*i])
                    .count();
                if g == 0 && same == 0 && !self.numeric[0] {
                    out.push_str("\\addlinespace\n");
                }
                for c in cells.iter_mut().take(same) {
                    c.clear();
                }
            }
            out.push_str(&row(&cells));
            previous = Some(r);
        }
        out.push_str("\\bottomrule\n\\end{tabular}}%\n");
        out.push_str(
            "\\ifdim\\wd0>\\linewidth\\resizebox{\\linewidth}{!}{\\usebox0}\\else\\usebox0\\fi\n",
        );
        out.push_str("\\end{table}\n");
        out
    }

    /// The table as HTML, its caption numbered `number`.
    pub fn html(&self, number: usize) -> String {
        let mut out = format!(
            "<table id=\"tab-{}\">\n<caption><strong>Table {number}.</strong> {}</caption>\n<thead><tr>",
            self.name,
            html_prose(&self.caption)
        );
        for (c, n) in self.columns.iter().zip(&self.numeric) {
            out.push_str(&format!(
                "<th{}>{}</th>",
                if *n { " class=\"num\"" } else { "" },
                html_escape(c)
            ));
        }
        out.push_str("</tr></thead>\n<tbody>\n");
        for r in &self.rows {
            out.push_str("<tr>");
            for (c, n) in r.iter().zip(&self.numeric) {
                out.push_str(&format!(
                    "<td{}>{}</td>",
                    if *n { " class=\"num\"" } else { "" },
                    html_escape(c)
                ));
            }
            out.push_str("</tr>\n");
        }
        out.push_str("</tbody>\n</table>\n");
        out
    }

    /// Writes `<name>.csv`, `.md` and `.tex` under `dir`.
    pub fn write(&self, dir: &Path) -> Result<Vec<PathBuf>> {
        let mut paths = Vec::new();
        for (ext, bytes) in [
            ("csv", self.csv()?),
            (
                "md",
                format!("{}\n\n{}", self.caption, self.markdown()).into_bytes(),
            ),
            ("tex", self.latex().into_bytes()),
        ] {
            let p = dir.join(format!("{}.{ext}", self.name));
            write_bytes_atomic(&p, &bytes)?;
            paths.push(p);
        }
        Ok(paths)
    }
}

/// The packages the LaTeX tables need, as their header states it.
pub const LATEX_PACKAGES: &str = "\\usepackage{booktabs} \\usepackage{array} \\usepackage{graphicx} (all in any TeX installation; UTF-8 input, the default since 2018)";

/// LaTeX tables with more lines than this (rows and group headings) are
/// set in a smaller size, and smaller still above one and a half times this.
const LATEX_LONG_ROWS: usize = 30;

/// LaTeX tables with this many columns or more are set in a smaller size.
const LATEX_WIDE_COLUMNS: usize = 6;

/// Text columns with a cell longer than this wrap in the LaTeX tables.
const LATEX_WRAP_CHARS: usize = 22;

/// A report cell as LaTeX: escaped, a minus sign (not a hyphen) before a
/// number, and the subscripts of SO2, SpO2, FiO2 and O2.
pub(crate) fn latex_cell(s: &str) -> String {
    let chars: Vec<char> = s.chars().collect();
    let mut minus = String::with_capacity(s.len());
    for (i, ch) in chars.iter().enumerate() {
        let before = i.checked_sub(1).map(|j| chars[j]);
        let after = chars.get(i + 1);
        let starts_number = *ch == '-'
            && after.is_some_and(|c| c.is_ascii_digit() || *c == '.')
            && before.is_none_or(|c| c == ' ' || c == '(' || c == '[');
        minus.push(if starts_number { '−' } else { *ch });
    }
    let escaped = latex_escape(&minus);
    let mut out = String::with_capacity(escaped.len());
    let mut word = String::new();
    let flush = |word: &mut String, out: &mut String| {
        match word.as_str() {
            "SO2" | "SpO2" | "FiO2" | "O2" => {
                out.push_str(&word[..word.len() - 1]);
                out.push_str("\\textsubscript{2}");
            }
            _ => out.push_str(word),
        }
        word.clear();
    };
    for ch in escaped.chars() {
        if ch.is_ascii_alphanumeric() {
            word.push(ch);
        } else {
            flush(&mut word, &mut out);
            out.push(ch);
        }
    }
    flush(&mut word, &mut out);
    out
}

pub(crate) fn latex_escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' | '%' | '$' | '#' | '_' | '{' | '}' => {
                out.push('\\');
                out.push(ch);
            }
            '~' => out.push_str("\\textasciitilde{}"),
            '^' => out.push_str("\\textasciicircum{}"),
            '\\' => out.push_str("\\textbackslash{}"),
            '±' => out.push_str("$\\pm$"),
            '−' => out.push_str("$-$"),
            '×' => out.push_str("$\\times$"),
            'µ' => out.push_str("\\textmu{}"),
            '–' => out.push_str("--"),
            // OT1 fonts print `<` as ¡: set them as math.
            '<' | '>' | '|' => {
                out.push('$');
                out.push(ch);
                out.push('$');
            }
            c if c.is_control() => out.push(' '),
            // Latin letters pdflatex reads as UTF-8 input; anything else
            // (other scripts, symbols) cannot be set without extra fonts,
            // so it is named rather than breaking the compile.
            c if c.is_ascii() || ('\u{a0}'..='\u{17f}').contains(&c) => out.push(c),
            c => out.push_str(&format!("[U+{:04X}]", c as u32)),
        }
    }
    out
}

/// Text from the study (ids, names, titles) for Markdown: HTML's special
/// characters as entities, so that no id becomes markup, and line breaks
/// as spaces, so that no id breaks a table.
pub(crate) fn markdown_escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            c if c.is_control() => out.push(' '),
            c => out.push(c),
        }
    }
    out
}

/// Prose for HTML: escaped, with Markdown's inline code (`x`) rendered as
/// `<code>`, so that no backtick shows (left as is when unbalanced).
pub(crate) fn html_prose(s: &str) -> String {
    let escaped = html_escape(s);
    let parts: Vec<&str> = escaped.split('`').collect();
    if parts.len() % 2 == 0 {
        return escaped;
    }
    parts
        .iter()
        .enumerate()
        .map(|(i, p)| {
            if i % 2 == 1 {
                format!("<code>{p}</code>")
            } else {
                p.to_string()
            }
        })
        .collect()
}

pub(crate) fn html_escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn f(v: f64, digits: usize) -> String {
    if v.is_finite() {
        format!("{v:.digits$}")
    } else {
        "–".into()
    }
}

/// Why a capture did not enter the statistics, or `None` when it did.
pub(crate) fn usage(
    epochs: &EpochTables,
    images: &TransmissionTables,
    fits: &[FitRow],
) -> Vec<Option<String>> {
    let mut with_so2 = vec![false; epochs.captures.len()];
    for f in fits {
        if f.so2.is_some_and(f64::is_finite) {
            with_so2[f.capture_index] = true;
        }
    }
    epochs
        .captures
        .iter()
        .enumerate()
        .map(|(i, c)| {
            // A capture that could not be read or registered says so first.
            if images.status[i].status.failed() {
                Some(images.status[i].status.to_string())
            } else if c.status != CaptureStatus::Steady {
                Some(c.status.to_string())
            } else if !with_so2[i] {
                Some("no segment fitted".into())
            } else {
                None
            }
        })
        .collect()
}

/// The participants and what was used of them, as a paper's first table
/// gives them: count, age, sex, fundus pigmentation, eyes, sessions and
/// captures used.
pub fn participants(study: &Study, epochs: &EpochTables, usage: &[Option<String>]) -> ReportTable {
    use std::collections::BTreeSet;
    let mut t = ReportTable::new(
        "participants",
        "Participants and the captures used of them (attributes as recorded in the study file)",
        &[("characteristic", false), ("value", false)],
    );
    let subjects = &study.subjects;
    let n = subjects.len();
    let mut row = |k: &str, v: String| t.rows.push(vec![k.to_string(), v]);
    row("participants", n.to_string());
    let ages: Vec<f64> = subjects.iter().filter_map(|s| s.age).collect();
    if !ages.is_empty() {
        let (lo, hi) = ages
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |a, x| {
                (a.0.min(*x), a.1.max(*x))
            });
        let missing = n - ages.len();
        row(
            "age (years), mean ± SD (range)",
            format!(
                "{} ± {} ({}–{}){}",
                f(mean(&ages), 1),
                f(sd(&ages), 1),
                f(lo, 0),
                f(hi, 0),
                if missing > 0 {
                    format!(", not recorded for {missing}")
                } else {
                    String::new()
                }
            ),
        );
    }
    let counts = |values: Vec<Option<String>>| {
        let mut c: BTreeMap<String, usize> = BTreeMap::new();
        for v in values {
            *c.entry(v.unwrap_or_else(|| "not recorded".into()))
                .or_default() += 1;
        }
        c.iter()
            .map(|(k, v)| format!("{k}: {v}"))
            .collect::<Vec<_>>()
            .join(", ")
    };
    row(
        "sex",
        counts(subjects.iter().map(|s| s.sex.clone()).collect()),
    );
    row(
        "fundus pigmentation grade",
        counts(
            subjects
                .iter()
                .map(|s| s.pigmentation.map(|g| g.to_string()))
                .collect(),
        ),
    );
    let eyes: BTreeSet<(&str, String)> = subjects
        .iter()
        .flat_map(|s| {
            s.sessions.iter().flat_map(|x| {
                x.eyes
                    .iter()
                    .map(|e| (s.id.as_str(), e.as_str().to_string()))
            })
        })
        .collect();
    row("eyes imaged", eyes.len().to_string());
    row(
        "sessions",
        subjects
            .iter()
            .map(|s| s.sessions.len())
            .sum::<usize>()
            .to_string(),
    );
    let used = usage.iter().filter(|u| u.is_none()).count();
    row(
        "captures used / acquired",
        format!("{used} / {}", epochs.captures.len()),
    );
    let mut per: Vec<f64> = subjects
        .iter()
        .map(|s| {
            epochs
                .captures
                .iter()
                .zip(usage)
                .filter(|(c, u)| c.subject == s.id && u.is_none())
                .count() as f64
        })
        .collect();
    per.sort_by(f64::total_cmp);
    if let (Some(lo), Some(hi)) = (per.first(), per.last()) {
        let mid = if per.len() % 2 == 1 {
            per[per.len() / 2]
        } else {
            (per[per.len() / 2 - 1] + per[per.len() / 2]) / 2.0
        };
        row(
            "captures used per participant, median (range)",
            format!(
                "{} ({}–{})",
                f(mid, if mid.fract() == 0.0 { 0 } else { 1 }),
                f(*lo, 0),
                f(*hi, 0)
            ),
        );
    }
    t
}

/// Captures acquired, used and not used by reason, per subject and epoch.
pub fn accounting(
    study: &Study,
    epochs: &EpochTables,
    usage: &[Option<String>],
    fits: &[FitRow],
) -> ReportTable {
    let mut reasons: Vec<String> = usage.iter().flatten().cloned().collect();
    reasons.sort();
    reasons.dedup();
    let mut cols: Vec<(&str, bool)> = vec![
        ("subject", false),
        ("epoch", false),
        ("acquired", true),
        ("used", true),
    ];
    cols.extend(reasons.iter().map(|r| (r.as_str(), true)));
    // Segment values of used captures left out for their diameter (one per
    // capture and segment, whatever the number of methods).
    let narrow_label = study
        .exclusions
        .min_diameter_um
        .map(|d| format!("segment values < {d} µm"));
    let mut narrow: BTreeMap<(String, String), std::collections::BTreeSet<(usize, &str)>> =
        BTreeMap::new();
    if let Some(d) = study.exclusions.min_diameter_um {
        for r in fits
            .iter()
            .filter(|r| usage[r.capture_index].is_none() && r.below_diameter(d))
        {
            let c = &epochs.captures[r.capture_index];
            narrow
                .entry((
                    c.subject.clone(),
                    c.epoch.clone().unwrap_or_else(|| "(none)".into()),
                ))
                .or_default()
                .insert((r.capture_index, r.segment.as_str()));
        }
    }
    if let Some(l) = &narrow_label {
        cols.push((l.as_str(), true));
    }
    let caption = match study.exclusions.min_diameter_um {
        Some(d) => format!("Captures acquired, used in the statistics, and not used by reason, per subject and epoch; segment values of used captures left out for a diameter below {d} µm"),
        None => "Captures acquired, used in the statistics, and not used by reason, per subject and epoch".to_string(),
    };
    let mut t = ReportTable::new("capture_accounting", caption, &cols);
    let order: Vec<String> = study
        .protocol
        .epochs
        .iter()
        .map(|e| e.name.clone())
        .chain(["(none)".to_string()])
        .collect();
    let mut by: BTreeMap<(String, usize), Vec<&Option<String>>> = BTreeMap::new();
    for (c, u) in epochs.captures.iter().zip(usage) {
        let e = c.epoch.clone().unwrap_or_else(|| "(none)".into());
        let ei = order.iter().position(|x| *x == e).unwrap_or(order.len());
        by.entry((c.subject.clone(), ei)).or_default().push(u);
    }
    let mut total = vec![0usize; 2 + reasons.len() + narrow_label.is_some() as usize];
    for ((s, ei), us) in &by {
        let mut row = vec![
            s.clone(),
            order[*ei].clone(),
            us.len().to_string(),
            us.iter().filter(|u| u.is_none()).count().to_string(),
        ];
        total[0] += us.len();
        total[1] += us.iter().filter(|u| u.is_none()).count();
        for (k, r) in reasons.iter().enumerate() {
            let n = us
                .iter()
                .filter(|u| u.as_deref() == Some(r.as_str()))
                .count();
            total[2 + k] += n;
            row.push(n.to_string());
        }
        if narrow_label.is_some() {
            let n = narrow
                .get(&(s.clone(), order[*ei].clone()))
                .map_or(0, |v| v.len());
            total[2 + reasons.len()] += n;
            row.push(n.to_string());
        }
        t.rows.push(row);
    }
    let mut row = vec!["all".to_string(), "all".to_string()];
    row.extend(total.iter().map(|n| n.to_string()));
    t.rows.push(row);
    t
}

/// Mean ± SD over subjects of the subjects' epoch means, per method and epoch.
pub fn so2_by_epoch(study: &Study, stats: &StatisticsTables) -> ReportTable {
    let mut t = ReportTable::new(
        "so2_by_epoch",
        "SO2 (%) by epoch: mean ± SD over subjects of each subject's mean of steady captures; arteriovenous = arteriolar − venular per capture",
        &[
            ("method", false),
            ("epoch", false),
            ("subjects", true),
            ("arterioles", true),
            ("venules", true),
            (ARTERIOVENOUS, true),
        ],
    )
    .grouped(1);
    for m in &study.methods {
        for e in &study.protocol.epochs {
            let mut n = 0;
            let cells: Vec<String> = ["arteriole", "venule", ARTERIOVENOUS]
                .iter()
                .map(|k| {
                    let v: Vec<f64> = stats
                        .summaries
                        .iter()
                        .filter(|s| {
                            s.method == m.label
                                && s.kind == *k
                                && s.epoch == e.name
                                && s.mean.is_finite()
                        })
                        .map(|s| s.mean)
                        .collect();
                    n = n.max(v.len());
                    if v.is_empty() {
                        return "–".into();
                    }
                    format!("{} ± {}", f(mean(&v), 1), f(sd(&v), 1))
                })
                .collect();
            let mut row = vec![m.label.clone(), e.name.clone(), n.to_string()];
            row.extend(cells);
            t.rows.push(row);
        }
    }
    t
}

pub fn contrasts(study: &Study, stats: &StatisticsTables) -> ReportTable {
    let estimate = format!("estimate ({:.0} % CI)", study.statistics.confidence * 100.0);
    let adj = match study.statistics.adjustment {
        Adjustment::Holm => "p (Holm)",
        Adjustment::None => "p (unadjusted)",
    };
    let mut t = ReportTable::new(
        "contrasts",
        format!(
            "Contrasts of SO2 between epochs (points): mixed model with subject-specific epoch deviations (REML, Satterthwaite df), or the subject-level t test where the model could not carry the contrast (column `test`); {adj} within method and vessel kind"
        ),
        &[
            ("method", false),
            ("kind", false),
            ("contrast", false),
            (estimate.as_str(), true),
            ("df", true),
            ("p", true),
            (adj, true),
            ("test", false),
        ],
    )
    .grouped(2);
    for r in &stats.contrasts {
        let test = &r.result.test;
        t.rows.push(vec![
            r.method.clone(),
            r.kind.clone(),
            test.label.clone(),
            format!(
                "{} ({} to {})",
                f(test.estimate, 2),
                f(test.lower, 2),
                f(test.upper, 2)
            ),
            f(test.df, 1),
            format_p(test.p),
            format_p(r.result.p_adjusted),
            r.result.basis.name().to_string(),
        ]);
    }
    t
}

pub fn variance_components(stats: &StatisticsTables) -> ReportTable {
    let mut t = ReportTable::new(
        "variance_components",
        "Variance components of the epoch models (SO2 points): the SD of each random effect and of the residual, with the number of levels (observations for the residual); `subject:epoch=E` is the subject-specific deviation in epoch E; a component on the boundary is estimated as zero",
        &[
            ("method", false),
            ("kind", false),
            ("group", false),
            ("levels", true),
            ("SD", true),
            ("boundary", false),
        ],
    )
    .grouped(2);
    for r in &stats.variance {
        let c = &r.component;
        t.rows.push(vec![
            r.method.clone(),
            r.kind.clone(),
            c.group.clone(),
            c.levels.to_string(),
            f(c.variance.max(0.0).sqrt(), 2),
            if c.boundary { "yes" } else { "" }.to_string(),
        ]);
    }
    t
}

/// An agreement's cells: captures, subjects, bias, precision, Arms, limits.
fn agreement_cells(a: &Agreement) -> [String; 6] {
    [
        a.n.to_string(),
        a.subjects.to_string(),
        f(a.bias, 2),
        f(a.precision, 2),
        f(a.arms, 2),
        format!("{} to {}", f(a.lower, 2), f(a.upper, 2)),
    ]
}

pub fn agreement(stats: &StatisticsTables) -> ReportTable {
    let mut t = ReportTable::new(
        "agreement",
        "Agreement of capture-mean arteriolar SO2 with the reference SpO2 (points): bias, precision, Arms over captures and the repeated-measures 95 % limits of agreement (Bland & Altman 2007)",
        &[
            ("method", false),
            ("captures", true),
            ("subjects", true),
            ("bias", true),
            ("precision", true),
            ("Arms", true),
            ("limits of agreement", true),
        ],
    )
    .grouped(1);
    for r in &stats.agreement {
        let mut row = vec![r.method.clone()];
        row.extend(agreement_cells(&r.agreement));
        t.rows.push(row);
    }
    t
}

/// The agreement with the reference within each group of the study's
/// `agreement_by` attribute (pigmentation grade by default).
pub fn agreement_by_group(stats: &StatisticsTables) -> ReportTable {
    let attribute = stats
        .agreement_groups
        .first()
        .map_or("pigmentation", |r| r.attribute.as_str());
    let mut t = ReportTable::new(
        "agreement_by_group",
        format!("Agreement of capture-mean arteriolar SO2 with the reference SpO2 (points) within each {attribute} group: bias, precision, Arms and the repeated-measures 95 % limits of agreement"),
        &[
            ("method", false),
            (attribute, false),
            ("captures", true),
            ("subjects", true),
            ("bias", true),
            ("precision", true),
            ("Arms", true),
            ("limits of agreement", true),
        ],
    )
    .grouped(1);
    for r in &stats.agreement_groups {
        let mut row = vec![r.method.clone(), r.group.clone()];
        row.extend(agreement_cells(&r.agreement));
        t.rows.push(row);
    }
    t
}

/// The difference in bias between the highest and lowest group, subjects
/// as the unit.
pub fn bias_difference(stats: &StatisticsTables) -> ReportTable {
    let level = format!("difference ({:.0} % CI)", stats.confidence * 100.0);
    let mut t = ReportTable::new(
        "bias_difference",
        "Difference in bias against the reference between the highest and the lowest group (for pigmentation: the darkest minus the lightest grade), over subjects (each subject's mean difference; Welch's t test)",
        &[
            ("method", false),
            ("groups", false),
            ("subjects", true),
            (level.as_str(), true),
            ("df", true),
            ("p", true),
        ],
    )
    .grouped(1);
    for r in &stats.bias_differences {
        let d = &r.test;
        t.rows.push(vec![
            r.method.clone(),
            format!("{} {} − {}", r.attribute, r.high, r.low),
            format!("{} + {}", r.subjects_high, r.subjects_low),
            format!(
                "{} ({} to {})",
                f(d.difference, 2),
                f(d.lower, 2),
                f(d.upper, 2)
            ),
            f(d.df, 1),
            format_p(d.p),
        ]);
    }
    t
}

/// The slope of retinal SO2 on the reference over subject × epoch means.
pub fn slope_on_reference(study: &Study, stats: &StatisticsTables) -> ReportTable {
    let level = format!("slope ({:.0} % CI)", study.statistics.confidence * 100.0);
    let mut t = ReportTable::new(
        "slope_on_reference",
        "Slope of arteriolar SO2 on the reference SpO2 over subject × epoch means, with a random intercept and slope by subject (subjects are the unit; `model` says when the random slope was dropped)",
        &[
            ("method", false),
            (level.as_str(), true),
            ("df", true),
            ("model", false),
        ],
    )
    .grouped(1);
    for r in &stats.agreement {
        let Some(s) = &r.slope else {
            t.rows
                .push(vec![r.method.clone(), "–".into(), "–".into(), "–".into()]);
            continue;
        };
        t.rows.push(vec![
            r.method.clone(),
            format!(
                "{} ({} to {})",
                f(s.test.estimate, 3),
                f(s.test.lower, 3),
                f(s.test.upper, 3)
            ),
            f(s.test.df, 1),
            if s.formula.contains("0 + spo2") {
                "random slope".to_string()
            } else {
                "random intercept only (slope variance on the boundary)".to_string()
            },
        ]);
    }
    t
}

pub fn method_comparison(stats: &StatisticsTables) -> ReportTable {
    // Methods (and method pairs) as columns, quantities as rows, each with
    // the unit it is computed over: one page however many methods.
    let mut methods: Vec<&str> = Vec::new();
    let mut rows: Vec<(&str, &str, &str)> = Vec::new();
    for r in &stats.comparison {
        if r.quantity.starts_with("change_ratio_") || is_pair(&r.method) {
            continue;
        }
        if !methods.contains(&r.method.as_str()) {
            methods.push(&r.method);
        }
        let key = (r.kind.as_str(), r.quantity.as_str(), r.unit.as_str());
        if !rows.iter().any(|k| k.0 == key.0 && k.1 == key.1) {
            rows.push(key);
        }
    }
    // Kinds together, in the order they first appear.
    let kinds: Vec<&str> = rows.iter().fold(Vec::new(), |mut k, r| {
        if !k.contains(&r.0) {
            k.push(r.0);
        }
        k
    });
    rows.sort_by_key(|r| kinds.iter().position(|k| *k == r.0));
    // What each quantity is computed over, once, for the caption.
    let mut over: Vec<String> = Vec::new();
    for (_, q, unit) in &rows {
        let text = format!("{} over {unit}", quantity_name(q));
        if !over.contains(&text) {
            over.push(text);
        }
    }
    let mut columns: Vec<(&str, bool)> = vec![("kind", false), ("quantity (unit)", false)];
    columns.extend(methods.iter().map(|m| (*m, true)));
    let mut t = ReportTable::new(
        "method_comparison",
        format!(
            "Method comparison on the same cohort, one column per method: repeatability, uncertainty, spread along segments, values outside 0–100 %, response to the SpO2 change (its slope, and the ratio of the measured to the reference change with its interval: below 1 the method shrinks the response); – where a quantity does not apply. Computed over: {}",
            over.join("; ")
        ),
        &columns,
    )
    .grouped(1);
    let find = |m: &str, k: &str, q: &str| {
        stats
            .comparison
            .iter()
            .find(|r| r.method == m && r.kind == k && r.quantity == q)
            .map(|r| r.value)
    };
    for (kind, q, _) in rows {
        let digits = if q.contains("share") || q.contains("slope") || q.contains("ratio") {
            3
        } else if q == "n" || q == "pairs" || q.starts_with("values") {
            0
        } else {
            2
        };
        let quantity = format!("{} ({})", quantity_name(q), unit_of(q));
        let mut cells = vec![kind.to_string(), quantity];
        let mut interval = vec![kind.to_string(), "its interval (subjects)".to_string()];
        for m in &methods {
            let Some(v) = find(m, kind, q) else {
                cells.push("–".into());
                interval.push("–".into());
                continue;
            };
            cells.push(f(v, digits));
            // The change ratio's interval and subject count: a row of their own.
            let at = |x: &str| find(m, kind, x).unwrap_or(f64::NAN);
            interval.push(format!(
                "{} to {} ({})",
                f(at("change_ratio_lower"), 2),
                f(at("change_ratio_upper"), 2),
                f(at("change_ratio_subjects"), 0)
            ));
        }
        t.rows.push(cells);
        if q == "change_ratio" {
            t.rows.push(interval);
        }
    }
    t
}

/// A method-comparison quantity as a paper names it.
fn quantity_name(quantity: &str) -> String {
    match quantity {
        "repeatability_sd" => "repeatability SD".into(),
        "mean_segment_se" => "mean segment SE".into(),
        "share_outside_0_100" => "share outside 0–100 %".into(),
        "slope_change_on_spo2_change" => "slope of change on SpO2 change".into(),
        "along_segment_sd" => "along-segment SD".into(),
        q => q.replace('_', " "),
    }
}

/// The unit of a method-comparison quantity, as a table's row gives it
/// (what it is computed over is in the caption).
fn unit_of(quantity: &str) -> &'static str {
    if quantity.contains("share") {
        "share"
    } else if quantity == "n" || quantity == "pairs" || quantity.starts_with("values") {
        "count"
    } else if quantity.contains("slope") {
        "points per SpO2 point"
    } else if quantity.contains("ratio") {
        "ratio"
    } else {
        "SO2 points"
    }
}

/// A method pair's label in the comparison rows (`A vs B`).
fn is_pair(method: &str) -> bool {
    method.contains(" vs ")
}

/// Agreement between the methods, pair by pair: the bias and the limits of
/// agreement over the segment × capture values both methods have.
pub fn method_agreement(stats: &StatisticsTables) -> ReportTable {
    let mut t = ReportTable::new(
        "method_agreement",
        "Agreement between methods on the same segment fits: bias (first minus second method, SO2 points) and limits of agreement for repeated measures per subject (Bland & Altman 2007)",
        &[
            ("methods", false),
            ("kind", false),
            ("pairs", true),
            ("bias", true),
            ("limits of agreement", true),
        ],
    );
    let mut keys: Vec<(&str, &str)> = Vec::new();
    for r in stats.comparison.iter().filter(|r| is_pair(&r.method)) {
        if !keys.contains(&(r.method.as_str(), r.kind.as_str())) {
            keys.push((&r.method, &r.kind));
        }
    }
    for (m, k) in keys {
        let at = |q: &str| {
            stats
                .comparison
                .iter()
                .find(|r| r.method == m && r.kind == k && r.quantity == q)
                .map_or(f64::NAN, |r| r.value)
        };
        t.rows.push(vec![
            m.to_string(),
            k.to_string(),
            f(at("pairs"), 0),
            f(at("bias"), 2),
            format!("{} to {}", f(at("loa_lower"), 2), f(at("loa_upper"), 2)),
        ]);
    }
    t
}

/// Data quality: flagged profile positions by flag, values outside 0–100 % per method.
pub fn data_quality(study: &Study, images: &TransmissionTables, fits: &[FitRow]) -> ReportTable {
    let mut t = ReportTable::new(
        "data_quality",
        "Data quality: profile positions by flag, segment SO2 values outside 0–100 % (kept in the analysis), and joint multiband fits whose residuals show a misfit of the vessel model",
        &[("item", false), ("count", true), ("of", true)],
    );
    for (k, n) in &images.flag_counts {
        let what = if k == "unflagged" {
            k.clone()
        } else {
            format!("flag {k}")
        };
        t.rows.push(vec![
            format!("profile positions: {what}"),
            n.to_string(),
            images.total_positions().to_string(),
        ]);
    }
    for (kind, [n, r]) in &images.reflex_counts {
        t.rows.push(vec![
            format!("usable {kind} positions with a central light reflex"),
            r.to_string(),
            n.to_string(),
        ]);
    }
    // Without `psf_sd_px`: the eyes whose captures look blurred.
    let weighed: Vec<f64> = images
        .status
        .iter()
        .filter_map(|s| s.blur.as_ref()?.sd_px())
        .collect();
    if !weighed.is_empty() {
        t.rows.push(vec![
            format!(
                "eyes that look blurred (point-spread SD {} px or more)",
                crate::stages::transmissions::BLUR_WARN_PX
            ),
            weighed
                .iter()
                .filter(|sd| **sd >= crate::stages::transmissions::BLUR_WARN_PX)
                .count()
                .to_string(),
            weighed.len().to_string(),
        ]);
    }
    for m in &study.methods {
        let vals: Vec<f64> = fits
            .iter()
            .filter(|r| r.method == m.label)
            .filter_map(|r| r.so2)
            .filter(|v| v.is_finite())
            .collect();
        let out = vals.iter().filter(|v| !(0.0..=100.0).contains(*v)).count();
        t.rows.push(vec![
            format!("{}: SO2 outside 0–100 %", m.label),
            out.to_string(),
            vals.len().to_string(),
        ]);
        let unfitted = fits
            .iter()
            .filter(|r| r.method == m.label && r.so2.is_none())
            .count();
        let judged: Vec<&FitRow> = fits
            .iter()
            .filter(|r| r.method == m.label && r.adequacy.is_some())
            .collect();
        if !judged.is_empty() {
            let misfits = judged
                .iter()
                .filter(|r| {
                    r.adequacy
                        .is_some_and(crate::oximetry::segment::Adequacy::is_misfit)
                })
                .count();
            t.rows.push(vec![
                format!(
                    "{}: fits the vessel model does not describe (misfit, on their own or with their eye{})",
                    m.label,
                    if study.statistics.adequate_only {
                        "; left out of the statistics"
                    } else {
                        "; used and flagged"
                    }
                ),
                misfits.to_string(),
                judged.len().to_string(),
            ]);
            let tied = judged.iter().filter(|r| r.tied_models.is_some()).count();
            if tied > 0 {
                t.rows.push(vec![
                    format!(
                        "{}: fits whose eye's segments could not tell the model chosen from others (`tied_models`; the SE includes their difference)",
                        m.label
                    ),
                    tied.to_string(),
                    judged.len().to_string(),
                ]);
            }
        }
        t.rows.push(vec![
            format!("{}: segments without an SO2", m.label),
            unfitted.to_string(),
            fits.iter()
                .filter(|r| r.method == m.label)
                .count()
                .to_string(),
        ]);
    }
    t
}

/// A simulated study's estimates against the simulator's truth.
pub(crate) fn truth(rows: &[super::findings::TruthRow], confidence: f64) -> ReportTable {
    let mut t = ReportTable::new(
        "truth",
        format!(
            "Estimates against the simulated truth (SO2 points): the subject × epoch means minus their true values (mean and RMS error), the epoch contrasts minus the cohort's true change (mean), and how many of the contrasts' {:.0} % intervals hold the true change (covered)",
            confidence * 100.0
        ),
        &[
            ("method", false),
            ("kind", false),
            ("mean error", true),
            ("RMS error", true),
            ("contrast error", true),
            ("covered", true),
        ],
    )
    .grouped(1);
    for r in rows {
        t.rows.push(vec![
            r.method.clone(),
            r.kind.clone(),
            f(r.means.1, 2),
            f(r.means.2, 2),
            f(r.contrasts.1, 2),
            format!("{} of {}", r.contrasts.2, r.contrasts.0),
        ]);
    }
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn latex_escapes_and_balances() {
        let mut t = ReportTable::new("x", "50 % of a_b & c", &[("a", false), ("b", true)]);
        t.rows.push(vec!["V_01 {x}".into(), "−1.0 ± 2.0".into()]);
        let s = t.latex();
        assert!(s.contains("50 \\% of a\\_b \\& c"));
        assert!(s.contains("V\\_01 \\{x\\} & $-$1.0 $\\pm$ 2.0 \\\\"));
        assert_eq!(
            s.matches('{').count() - s.matches("\\{").count(),
            s.matches('}').count() - s.matches("\\}").count()
        );
    }

    #[test]
    fn user_text_cannot_become_markup() {
        let mut t = ReportTable::new("x", "c", &[("id", false)]);
        t.rows
            .push(vec!["<script>x</script>\n<img onerror=y>".into()]);
        let md = t.markdown();
        assert!(!md.contains('<') && md.contains("&lt;script&gt;"), "{md}");
        assert_eq!(md.lines().count(), 3, "{md}");
        let tex = latex_escape("a < b | c > d, 酸素, café");
        assert_eq!(tex, "a $<$ b $|$ c $>$ d, [U+9178][U+7D20], café");
    }

    #[test]
    fn markdown_has_one_separator_per_column() {
        let mut t = ReportTable::new("x", "c", &[("a", false), ("b", true)]);
        t.rows.push(vec!["p|q".into(), "1".into()]);
        assert_eq!(t.markdown(), "| a | b |\n|---|---:|\n| p\\|q | 1 |\n");
    }
}
