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
    // Three subjects of pigmentation grades 1, 2 and 4: no group has two
    // subjects, so there is no agreement by group, and the run says why.
    assert!(
        o.stderr
            .contains("pigmentation group(s) 1, 2, 4 have a single subject"),
        "{}",
        o.stderr
    );
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
    (
        "truth",
        &[
            "method",
            "kind",
            "mean error",
            "RMS error",
            "contrast error",
            "covered",
        ],
    ),
];

const FIGURES: &[&str] = &[
    "time_course",
    "vessel_courses",
    "epoch_change",
    "retinal_vs_reference",
    "bland_altman",
    "along_segment",
    "band_residuals",
    "sensitivity",
    "registration",
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
        // Print resolution, stated in the file: 300 dpi at 174 mm wide.
        let dims = reader.info().pixel_dims.expect("a pHYs chunk");
        assert_eq!(dims.unit, png::Unit::Meter, "{name}");
        assert_eq!(dims.xppu, 11811, "{name}: 300 dpi is 11811 px/m");
        let info = reader.next_frame(&mut buf).unwrap();
        assert_eq!(info.width, 2055, "{name}: 174 mm at 300 dpi");
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
        // Within the page, or the quality-control page beside it.
        assert!(
            href.starts_with('#') || href.starts_with("qc.html\""),
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
    assert!(html.contains("<nav><strong>Contents</strong><ol><li><a href=\"#summary\">"));
    // The summary of findings speaks the contrasts in words with their
    // intervals, the agreement, the data quality and, for this simulated
    // study, the comparison with the truth.
    let summary = html
        .split("<h2 id=\"summary\">")
        .nth(1)
        .and_then(|t| t.split("<h2").next())
        .unwrap();
    for needle in [
        "<li>With <code>multiband</code>, arteriolar SO2 fell by ",
        "from air to low-15 (95 % CI ",
        "Against the reference SpO2, the bias of capture-mean arteriolar SO2 was ",
        "Data quality: ",
        "This study is simulated. Against the simulator's true values: ",
        "the 95 % intervals of the epoch contrasts held the true change in ",
    ] {
        assert!(
            summary.contains(needle),
            "the summary lacks `{needle}`:\n{summary}"
        );
    }
    // The date under the title is the last session's day (not the day the
    // report was written, which would break the same-bytes rule).
    assert!(
        html.contains("Report dated 2026-"),
        "no date under the title"
    );
    // The simulated truth has a section and a table.
    assert!(html.contains("<h2 id=\"truth\">Comparison with the simulated truth</h2>"));
    // Long tables go to the appendix: the variance components here.
    let appendix = html
        .split("<h2 id=\"appendix\">")
        .nth(1)
        .expect("an appendix");
    assert!(
        appendix.contains("Variance components"),
        "variance components in the appendix"
    );
    // The quality-control sheets: one per eye, linked from the report.
    let qc = std::fs::read_to_string(rep.join("qc.html")).unwrap();
    for eye in ["V01_s1_OD", "V02_s1_OD", "V03_s1_OD"] {
        assert!(
            qc.contains(&format!("src=\"qc/{eye}.png\"")),
            "{eye} in qc.html"
        );
        let png = rep.join(format!("qc/{eye}.png"));
        let mut r = png::Decoder::new(std::fs::File::open(&png).unwrap())
            .read_info()
            .unwrap();
        let mut buf = vec![0; r.output_buffer_size()];
        let info = r.next_frame(&mut buf).unwrap();
        // The segments are drawn in the kinds' colours over the fundus.
        let px = &buf[..info.buffer_size()];
        for (kind, rgb) in [("arteriole", [213u8, 94, 0]), ("venule", [0, 114, 178])] {
            let n = px.chunks(3).filter(|p| *p == rgb).count();
            assert!(n > 500, "{eye}: {n} pixels of the {kind} colour");
        }
    }
    browser_screenshot(&rep.join("report.html"), dir.path());
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
    // preamble and fits an article page.
    let names: Vec<&str> = TABLES.iter().map(|(n, _)| *n).collect();
    tables_fit_the_page(&rep, &names, dir.path());
}

/// Renders the report in headless Chromium with every network request
/// refused, and checks the screenshot shows the page: text, the headings'
/// blue and the cautions' vermillion bar. Skipped without Chromium unless
/// SATSTEP_REQUIRE_CHROMIUM is set (`.ci/run` installs Debian's `chromium`).
fn browser_screenshot(html: &Path, dir: &Path) {
    let browser = ["chromium", "chromium-browser", "google-chrome"]
        .into_iter()
        .find(|b| {
            std::process::Command::new(b)
                .arg("--version")
                .output()
                .is_ok_and(|o| o.status.success())
        });
    let Some(browser) = browser else {
        assert!(
            std::env::var("SATSTEP_REQUIRE_CHROMIUM").is_err(),
            "SATSTEP_REQUIRE_CHROMIUM is set but no Chromium is installed"
        );
        return;
    };
    let shot = dir.join("report-screenshot.png");
    let o = std::process::Command::new(browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--hide-scrollbars",
            "--no-first-run",
            // No network: every request goes to a proxy that is not there.
            "--proxy-server=http://127.0.0.1:9",
            "--proxy-bypass-list=<-loopback>",
            "--window-size=1200,2000",
        ])
        .arg(format!(
            "--user-data-dir={}",
            dir.join("browser-profile").display()
        ))
        .arg(format!("--screenshot={}", shot.display()))
        .arg(format!("file://{}", html.display()))
        .output()
        .unwrap();
    assert!(
        shot.is_file(),
        "no screenshot: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let mut r = png::Decoder::new(std::fs::File::open(&shot).unwrap())
        .read_info()
        .unwrap();
    let mut buf = vec![0; r.output_buffer_size()];
    let info = r.next_frame(&mut buf).unwrap();
    let ch = info.color_type.samples();
    let px: Vec<&[u8]> = buf[..info.buffer_size()].chunks(ch).collect();
    let dark = px.iter().filter(|p| p[..3].iter().all(|v| *v < 90)).count();
    let near = |p: &[u8], c: [u8; 3]| p[..3].iter().zip(c).all(|(a, b)| a.abs_diff(b) < 24);
    let blue = px.iter().filter(|p| near(p, [0, 114, 178])).count();
    let vermillion = px.iter().filter(|p| near(p, [213, 94, 0])).count();
    assert!(
        dark * 200 > px.len(),
        "the screenshot shows almost no text ({dark} of {} pixels dark)",
        px.len()
    );
    assert!(
        blue > 500,
        "no blue headings or figure colours in the screenshot ({blue} px)"
    );
    assert!(
        vermillion > 500,
        "no cautions bar in the screenshot ({vermillion} px)"
    );
}

#[test]
fn latex_checker_catches_unbalanced_input() {
    assert!(latex_balanced("\\begin{table}{a}\\end{table}").is_ok());
    assert!(latex_balanced("\\begin{table}{a\\end{table}").is_err());
    assert!(latex_balanced("\\begin{table}\\end{tabular}").is_err());
    assert!(latex_balanced("50 \\% of \\{x\\}").is_ok());
}

/// The `report:` section: each setting changes what it says and only the
/// report reruns; mistakes are errors at their line and column.
#[test]
fn report_settings_do_what_they_say() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    let study = s.join("study.yaml");
    let plain = std::fs::read_to_string(&study).unwrap();
    let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let rep = s.join("results/report");
    let results_of = |html: &str| -> String {
        html.split("<h2 id=\"results\">")
            .nth(1)
            .unwrap()
            .split("<h2")
            .next()
            .unwrap()
            .to_string()
    };
    let html = std::fs::read_to_string(rep.join("report.html")).unwrap();
    assert!(
        results_of(&html).contains("Contrasts of SO2"),
        "contrasts in the results by default"
    );

    let with = |section: &str| {
        let text = plain.replace(
            "\noutput: results",
            &format!("\n{section}\noutput: results"),
        );
        assert_ne!(text, plain, "the study file ends with `output: results`");
        std::fs::write(&study, text).unwrap();
    };
    with(
        "report:\n  primary: two-band\n  figure_width_mm: 85\n  dpi: 600\n  appendix: [contrasts]\n  date: 2026-06-01",
    );
    let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    for stage in ["epochs", "transmissions", "fits", "statistics"] {
        assert!(
            o.stderr.contains(&format!("{stage:<13} up to date")),
            "{stage} reran for a report setting:\n{}",
            o.stderr
        );
    }
    let html = std::fs::read_to_string(rep.join("report.html")).unwrap();
    assert!(html.contains("Report dated 2026-06-01,"), "the date");
    assert!(
        html.contains("Figures of a single method show <code>two-band</code>"),
        "the primary method"
    );
    let svg = std::fs::read_to_string(rep.join("figures/time_course.svg")).unwrap();
    assert!(
        svg.contains("(two-band)"),
        "the figure shows the primary method"
    );
    let appendix = html
        .split("<h2 id=\"appendix\">")
        .nth(1)
        .expect("an appendix");
    assert!(
        appendix.contains("Contrasts of SO2"),
        "contrasts in the appendix"
    );
    assert!(
        !results_of(&html).contains("Contrasts of SO2"),
        "contrasts not in the results"
    );
    // 85 mm at 600 dpi: 2008 px, and 23 622 px per metre in the file.
    let r = png::Decoder::new(std::fs::File::open(rep.join("figures/epoch_change.png")).unwrap())
        .read_info()
        .unwrap();
    assert_eq!(r.info().width, 2008);
    assert_eq!(r.info().pixel_dims.unwrap().xppu, 23622);

    // Mistakes: a table that does not exist, a resolution out of range.
    with("report:\n  appendix: [contrast]\n  dpi: 30");
    let o = satstep(dir.path(), &["check", s.to_str().unwrap()]);
    assert_ne!(o.code, 0);
    let line = plain.lines().count() - 1 + 2;
    assert!(
        o.stderr.contains(&format!("study.yaml:{line}:"))
            && o.stderr
                .contains("`appendix` (a report table) `contrast` is not known")
            && o.stderr.contains("contrasts"),
        "{}",
        o.stderr
    );
    assert!(
        o.stderr
            .contains("`dpi` is a print resolution of 72–1200 dots per inch, found 30"),
        "{}",
        o.stderr
    );
}
