//! The report: every table and figure it names exists and parses, PNGs
//! decode and are not blank, LaTeX is balanced (and compiles when a TeX
//! engine is installed), the HTML carries only embedded resources, and the
//! cautions, methods and provenance are there.

use std::path::{Path, PathBuf};

use crate::common::*;

fn run_study(dir: &Path) -> PathBuf {
    let sc = repo().join("tests/fixtures/runner-scenario.yaml");
    let s = dir.join("s");
    assert_eq!(
        satstep(
            dir,
            &[
                "simulate",
                sc.to_str().unwrap(),
                "--out",
                s.to_str().unwrap()
            ]
        )
        .code,
        0
    );
    let o = satstep(dir, &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(o.stderr.contains("report        ran"), "{}", o.stderr);
    s.join("results/report")
}

const TABLES: &[(&str, &[&str])] = &[
    ("participants", &["characteristic", "value"]),
    (
        "capture_accounting",
        &["subject", "epoch", "acquired", "used", "settling"],
    ),
    (
        "so2_by_epoch",
        &[
            "method",
            "epoch",
            "subjects",
            "arterioles",
            "venules",
            "arteriovenous",
        ],
    ),
    (
        "contrasts",
        &[
            "method",
            "kind",
            "contrast",
            "estimate (95 % CI)",
            "df",
            "p",
            "p (Holm)",
        ],
    ),
    (
        "variance_components",
        &["method", "kind", "group", "levels", "SD"],
    ),
    (
        "agreement",
        &[
            "method",
            "captures",
            "subjects",
            "bias",
            "precision",
            "Arms",
            "limits of agreement",
        ],
    ),
    (
        "slope_on_reference",
        &["method", "slope (95 % CI)", "df", "model"],
    ),
    (
        "method_comparison",
        &[
            "kind",
            "quantity (unit)",
            "two-band",
            "multiband",
            "multiband-pointwise",
        ],
    ),
    (
        "method_agreement",
        &["methods", "kind", "pairs", "bias", "limits of agreement"],
    ),
    ("data_quality", &["item", "count", "of"]),
];

const FIGURES: &[&str] = &[
    "time_course",
    "epoch_change",
    "retinal_vs_reference",
    "bland_altman",
    "along_segment",
    "band_residuals",
    "sensitivity",
];

/// Checks that braces and environments nest.
fn latex_balanced(tex: &str) -> Result<(), String> {
    let mut depth = 0i64;
    let mut prev = ' ';
    for ch in tex.chars() {
        if prev != '\\' {
            match ch {
                '{' => depth += 1,
                '}' => depth -= 1,
                _ => {}
            }
        }
        if depth < 0 {
            return Err("a `}` closes nothing".into());
        }
        prev = if prev == '\\' && ch == '\\' { ' ' } else { ch };
    }
    if depth != 0 {
        return Err(format!("{depth} unclosed braces"));
    }
    let mut envs = Vec::new();
    for part in tex.split("\\begin{").skip(1) {
        envs.push(part.split('}').next().unwrap().to_string());
    }
    let ends: Vec<String> = tex
        .split("\\end{")
        .skip(1)
        .map(|p| p.split('}').next().unwrap().to_string())
        .collect();
    let mut sorted_b = envs.clone();
    let mut sorted_e = ends.clone();
    sorted_b.sort();
    sorted_e.sort();
    if sorted_b != sorted_e {
        return Err(format!("environments {envs:?} closed by {ends:?}"));
    }
    Ok(())
}

#[test]
fn the_report_is_complete_and_self_contained() {
    let dir = tempfile::tempdir().unwrap();
    let rep = run_study(dir.path());

    for (name, cols) in TABLES {
        let csv = rep.join(format!("tables/{name}.csv"));
        let mut r =
            csv::Reader::from_path(&csv).unwrap_or_else(|e| panic!("{}: {e}", csv.display()));
        let head: Vec<String> = r.headers().unwrap().iter().map(String::from).collect();
        for c in *cols {
            assert!(
                head.iter().any(|h| h == c),
                "{name}: no column `{c}` in {head:?}"
            );
        }
        let rows: Vec<csv::StringRecord> = r.records().map(|x| x.unwrap()).collect();
        assert!(!rows.is_empty(), "{name} is empty");
        assert!(rows.iter().all(|x| x.len() == head.len()));
        let tex = std::fs::read_to_string(rep.join(format!("tables/{name}.tex"))).unwrap();
        latex_balanced(&tex).unwrap_or_else(|e| panic!("{name}.tex: {e}\n{tex}"));
        assert!(
            tex.contains("\\toprule") && tex.contains("\\midrule") && tex.contains("\\bottomrule")
        );
        let md = std::fs::read_to_string(rep.join(format!("tables/{name}.md"))).unwrap();
        let lines: Vec<&str> = md.lines().filter(|l| l.starts_with('|')).collect();
        assert_eq!(lines.len(), rows.len() + 2, "{name}.md");
        let bars = |l: &str| l.replace("\\|", "").matches('|').count();
        assert!(
            lines.iter().all(|l| bars(l) == head.len() + 1),
            "{name}.md has ragged rows"
        );
    }
    // The contrasts of the step-down protocol are all there, per method and kind.
    let contrasts = std::fs::read_to_string(rep.join("tables/contrasts.csv")).unwrap();
    assert_eq!(contrasts.lines().count(), 1 + 3 * 2 * 3, "{contrasts}");

    for name in FIGURES {
        let png = rep.join(format!("figures/{name}.png"));
        let dec = png::Decoder::new(
            std::fs::File::open(&png).unwrap_or_else(|e| panic!("{}: {e}", png.display())),
        );
        let mut reader = dec.read_info().unwrap();
        let mut buf = vec![0; reader.output_buffer_size()];
        let info = reader.next_frame(&mut buf).unwrap();
        let px = &buf[..info.buffer_size()];
        let ch = info.color_type.samples();
        let non_white = px
            .chunks(ch)
            .filter(|p| p.iter().take(3).any(|v| *v < 200))
            .count();
        let total = px.len() / ch;
        assert!(
            info.width >= 600 && info.height >= 300,
            "{name}: {}×{}",
            info.width,
            info.height
        );
        assert!(
            non_white * 100 > total,
            "{name}.png is nearly blank ({non_white} of {total} pixels drawn)"
        );
        let mut colours: Vec<&[u8]> = px.chunks(ch).collect();
        colours.sort();
        colours.dedup();
        assert!(
            colours.len() > 20,
            "{name}.png has only {} colours",
            colours.len()
        );
        let svg = std::fs::read_to_string(rep.join(format!("figures/{name}.svg"))).unwrap();
        assert!(
            svg.contains("<svg") && svg.contains("<text"),
            "{name}.svg has no text"
        );
    }
    let svg = std::fs::read_to_string(rep.join("figures/time_course.svg")).unwrap();
    assert!(
        svg.contains("SO2 (%)") && svg.contains("time (min)"),
        "axis labels with units"
    );

    let html = std::fs::read_to_string(rep.join("report.html")).unwrap();
    // Namespace names of inline SVG are identifiers, not resources.
    let html = html
        .replace("xmlns=\"http://www.w3.org/2000/svg\"", "")
        .replace("xmlns:xlink=\"http://www.w3.org/1999/xlink\"", "");
    for bad in [
        "src=", "<link", "<script", "@import", "url(", "http://", "https://",
    ] {
        assert!(
            !html.contains(bad),
            "report.html refers outside itself: `{bad}`"
        );
    }
    for href in html.split("href=\"").skip(1) {
        assert!(
            href.starts_with('#'),
            "report.html links out: {}",
            &href[..40.min(href.len())]
        );
    }
    assert_eq!(html.matches("<figure").count(), FIGURES.len());
    assert_eq!(html.matches("<svg").count(), FIGURES.len());
    for needle in [
        "Research use only",
        "medical supervision",
        "ethics committee",
        "Methods",
        "Satterthwaite",
        "Bland JM, Altman DG (2007)",
        "Data quality",
        "Provenance",
        "subjects/V01/captures/c001.tif",
        "Fundus pigmentation as recorded in the study file: grade",
        "subject-specific deviation in every epoch",
    ] {
        assert!(html.contains(needle), "report.html lacks `{needle}`");
    }
    // A document: a contents list, tables and figures numbered in order,
    // and Markdown's inline code rendered (no backtick shows in the text;
    // the protocol's timeline in <pre> is shown as it is).
    assert!(html.contains("<nav><strong>Contents</strong><ol><li><a href=\"#cohort\">"));
    for n in 1..=TABLES.len() {
        assert!(
            html.contains(&format!("<strong>Table {n}.</strong>")),
            "Table {n}"
        );
    }
    for n in 1..=FIGURES.len() {
        assert!(
            html.contains(&format!("<strong>Figure {n}.</strong>")),
            "Figure {n}"
        );
    }
    let text: String = html
        .split("<pre>")
        .enumerate()
        .map(|(i, part)| {
            if i == 0 {
                part
            } else {
                part.split("</pre>").nth(1).unwrap_or("")
            }
        })
        .collect();
    assert!(!text.contains('`'), "a literal backtick in report.html");
    assert!(html.contains("<code>test</code>"), "inline code rendered");

    let md = std::fs::read_to_string(rep.join("report.md")).unwrap();
    for link in md.split("](").skip(1) {
        let target = link.split(')').next().unwrap();
        assert!(
            rep.join(target).is_file(),
            "report.md links to missing `{target}`"
        );
    }
    assert!(md.contains("Research use only"));

    // The participants table counts the fixture's three subjects and
    // gives their ages and sexes as the study file records them.
    let people = std::fs::read_to_string(rep.join("tables/participants.csv")).unwrap();
    assert!(people.contains("\nparticipants,3\n"), "{people}");
    assert!(
        people.contains("\"age (years), mean ± SD (range)\","),
        "{people}"
    );
    assert!(people.contains("\neyes imaged,3\n"), "{people}");

    // Every LaTeX table states its preamble, sets minus signs and
    // subscripts, and groups repeated method names.
    let contrasts = std::fs::read_to_string(rep.join("tables/contrasts.tex")).unwrap();
    assert!(contrasts.starts_with(
        "% satstep report table `contrasts`. Needs, in the preamble: \\usepackage{booktabs}"
    ));
    assert!(contrasts.contains("SO\\textsubscript{2}"), "{contrasts}");
    assert!(contrasts.contains("& $-$"), "{contrasts}");
    assert!(
        !contrasts.contains("& -"),
        "a hyphen for a minus: {contrasts}"
    );
    assert_eq!(
        contrasts.matches("\\textit{multiband, arteriole}").count(),
        1,
        "method and kind head their group once: {contrasts}"
    );
    assert!(
        !contrasts.contains("\nmultiband &"),
        "no method column: {contrasts}"
    );

    // With a TeX engine installed (`.ci/run` installs one and sets
    // SATSTEP_REQUIRE_TEX), every table compiles under the stated
    // preamble and fits the text width of an article page.
    let have_tex = std::process::Command::new("pdflatex")
        .arg("--version")
        .output()
        .is_ok();
    assert!(
        have_tex || std::env::var("SATSTEP_REQUIRE_TEX").is_err(),
        "SATSTEP_REQUIRE_TEX is set but pdflatex is not installed"
    );
    if have_tex {
        // Every table fits the text width at its natural size: the test
        // document makes a table that would be scaled down say so.
        let mut doc = String::from(
            "\\documentclass{article}\n\\usepackage{booktabs}\n\\usepackage{array}\n\\usepackage{graphicx}\n\\renewcommand{\\resizebox}[3]{\\typeout{satstep: table scaled}#3}\n\\begin{document}\n",
        );
        for (name, _) in TABLES {
            doc.push_str(&format!(
                "\\input{{{}}}\n\\clearpage\n",
                rep.join(format!("tables/{name}.tex")).display()
            ));
        }
        doc.push_str("\\end{document}\n");
        let tex = dir.path().join("tables.tex");
        std::fs::write(&tex, doc).unwrap();
        let st = std::process::Command::new("pdflatex")
            .args(["-interaction=nonstopmode", "-halt-on-error"])
            .arg(&tex)
            .current_dir(dir.path())
            .output()
            .unwrap();
        assert!(
            st.status.success(),
            "{}",
            String::from_utf8_lossy(&st.stdout)
        );
        let log = std::fs::read_to_string(dir.path().join("tables.log")).unwrap();
        // A table wider than the text is scaled to it (a table that still
        // overflows, or is taller than the page, is a failure).
        for complaint in [
            "Overfull \\hbox",
            "Overfull \\vbox",
            "Float too large",
            "satstep: table scaled",
        ] {
            assert!(
                !log.contains(complaint),
                "{complaint} in the tables:\n{log}"
            );
        }
        // One page per table: none runs over a page.
        let pages = log
            .split("Output written on ")
            .nth(1)
            .and_then(|t| t.split('(').nth(1))
            .and_then(|t| t.split(' ').next())
            .and_then(|n| n.parse::<usize>().ok());
        assert_eq!(pages, Some(TABLES.len()), "{log}");
    }
}

#[test]
fn latex_checker_catches_unbalanced_input() {
    assert!(latex_balanced("\\begin{table}{a}\\end{table}").is_ok());
    assert!(latex_balanced("\\begin{table}{a\\end{table}").is_err());
    assert!(latex_balanced("\\begin{table}\\end{tabular}").is_err());
    assert!(latex_balanced("50 \\% of \\{x\\}").is_ok());
}
