//! Helpers shared by the integration tests: run the real binary, build small
//! studies on disk.
#![allow(dead_code)]

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

pub struct Output {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

/// Runs `satstep` with `args` in `dir`, without colour or progress bars.
pub fn satstep(dir: &Path, args: &[&str]) -> Output {
    run_in(Command::new(env!("CARGO_BIN_EXE_satstep")).args(args), dir)
}

/// Runs `cmd` in `dir` without colour, and collects what it said.
pub fn run_in(cmd: &mut Command, dir: &Path) -> Output {
    let out = cmd
        .current_dir(dir)
        .env("NO_COLOR", "1")
        .output()
        .expect("the command runs");
    Output {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Simulates the scenario at `scenario` (relative to the repository) into
/// `dir/out` and returns that folder.
pub fn simulated(dir: &Path, scenario: &str, out: &str) -> PathBuf {
    let sc = repo().join(scenario);
    let folder = dir.join(out);
    let o = satstep(
        dir,
        &[
            "simulate",
            sc.to_str().unwrap(),
            "--out",
            folder.to_str().unwrap(),
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    folder
}

pub fn write(dir: &Path, rel: &str, text: &str) -> PathBuf {
    let p = dir.join(rel);
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    std::fs::write(&p, text).unwrap();
    p
}

/// A tiny real two-band 16-bit TIFF.
pub fn write_capture(dir: &Path, rel: &str) {
    let p = dir.join(rel);
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    let page: Vec<u16> = (0..64u16).map(|i| 1000 + i).collect();
    satstep::simulate::render::write_tiff(&p, 8, 8, &[page.clone(), page]).unwrap();
}

pub const PROTOCOL: &str = "\
name: two-step
epochs:
  - name: air
    gas: air
    duration: 10min
    settle: 2min
  - name: low
    gas: {o2_fraction: 0.15}
    duration: 10min
    settle: 3min
contrasts: [\"low - air\"]
reference: {probe_site: finger, lag: 20s, window: 10s, stability_limit: 3}
";

/// A valid one-subject study in `dir`, with the given capture list body
/// (lines `file,time`), and its capture files.
pub fn small_study(dir: &Path, captures: &[(&str, &str)], switches: &str) {
    write(dir, "protocol.yaml", PROTOCOL);
    let mut list = String::from("file,time\n");
    for (f, t) in captures {
        list.push_str(&format!("{f},{t}\n"));
        write_capture(dir, &format!("S1/{f}"));
    }
    write(dir, "S1/captures.csv", &list);
    let mut log = String::from("time,spo2\n");
    let start = chrono::DateTime::parse_from_rfc3339("2026-05-04T09:00:00+02:00").unwrap();
    for s in -30..1500 {
        let v = if s < 660 { 98 } else { 90 };
        log.push_str(&format!(
            "{},{}\n",
            (start + chrono::Duration::seconds(s)).to_rfc3339(),
            v
        ));
    }
    write(dir, "S1/spo2.csv", &log);
    write(
        dir,
        "S1/segments-OD.yaml",
        "eye: OD\nsegments:\n  - id: A1\n    kind: arteriole\n    points: [[1, 1], [6, 6]]\n",
    );
    write(
        dir,
        "study.yaml",
        &format!(
            "\
study: small
title: a small study
protocol: protocol.yaml
instrument:
  pixel_size_um: 10
  bands:
    - {{name: b570, centre_nm: 570, fwhm_nm: 10}}
    - {{name: b600, centre_nm: 600, fwhm_nm: 10}}
subjects:
  - id: S1
    sessions:
      - id: s1
        start: 2026-05-04T09:00:00+02:00
        eyes: [OD]
{switches}        captures: S1/captures.csv
        reference: {{file: S1/spo2.csv}}
        segments: {{OD: S1/segments-OD.yaml}}
methods:
  - method: two-band
    sensitive: b600
    isosbestic: b570
    calibration: {{mode: fixed, intercept: 125, slope: -110}}
"
        ),
    );
}

/// SHA-256 of every file under `root`, by relative path, leaving out the
/// relative paths that start with any of `skip`.
pub fn hashes_except(root: &Path, skip: &[&str]) -> BTreeMap<String, String> {
    use sha2::{Digest, Sha256};
    let mut out = BTreeMap::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            let rel = p.strip_prefix(root).unwrap().to_string_lossy().into_owned();
            if skip.iter().any(|s| rel.starts_with(s)) {
                continue;
            }
            if p.is_dir() {
                stack.push(p);
            } else {
                out.insert(
                    rel,
                    format!("{:x}", Sha256::digest(std::fs::read(&p).unwrap())),
                );
            }
        }
    }
    out
}

pub fn hashes(root: &Path) -> BTreeMap<String, String> {
    hashes_except(root, &[])
}

/// A CSV file's rows by column name.
pub fn records(path: &Path) -> Vec<BTreeMap<String, String>> {
    let mut r = csv::Reader::from_path(path).unwrap();
    let head: Vec<String> = r.headers().unwrap().iter().map(String::from).collect();
    r.records()
        .map(|x| {
            head.iter()
                .cloned()
                .zip(x.unwrap().iter().map(String::from))
                .collect()
        })
        .collect()
}

/// How a method's reported SO2 standard errors compare with the scatter of
/// repeated captures of the same vessel in the same epoch: the pooled SD of
/// SO2 within subject × segment × epoch (steady captures, fits whose SE is
/// below 5 points: a broken fit's SE says so by itself), over the RMS of
/// their SEs. Returns (ratio on SO2, ratio on SO2 − truth): the first is
/// what a lab can compute; the second leaves out the simulator's true
/// capture-to-capture change (0.7 points).
pub fn se_scatter_ratio(study: &Path, method: &str) -> (f64, f64) {
    let truth = true_so2(study);
    // Per subject × segment × epoch: (SO2, SO2 − truth, SE) of each capture.
    type Key = (String, String, String);
    let mut groups: BTreeMap<Key, Vec<(f64, f64, f64)>> = BTreeMap::new();
    for r in records(&study.join("results/fits/so2.csv")) {
        if r["method"] != method
            || r["status"] != "steady"
            || r["so2"].is_empty()
            || r["so2_se"].is_empty()
        {
            continue;
        }
        let (v, se): (f64, f64) = (r["so2"].parse().unwrap(), r["so2_se"].parse().unwrap());
        let Some(t) = truth_of(&truth, &r) else {
            continue;
        };
        if se < 5.0 {
            groups
                .entry((
                    r["subject"].clone(),
                    r["segment"].clone(),
                    r["epoch"].clone(),
                ))
                .or_default()
                .push((v, v - t, se));
        }
    }
    let (mut ss_raw, mut ss_err, mut ss_se, mut df) = (0.0, 0.0, 0.0, 0.0);
    for g in groups.values().filter(|g| g.len() > 1) {
        let n = g.len() as f64;
        let (m_raw, m_err) = (
            g.iter().map(|x| x.0).sum::<f64>() / n,
            g.iter().map(|x| x.1).sum::<f64>() / n,
        );
        ss_raw += g.iter().map(|x| (x.0 - m_raw).powi(2)).sum::<f64>();
        ss_err += g.iter().map(|x| (x.1 - m_err).powi(2)).sum::<f64>();
        ss_se += g.iter().map(|x| x.2 * x.2).sum::<f64>() * (n - 1.0) / n;
        df += n - 1.0;
    }
    assert!(df > 20.0, "{method}: too few repeated captures");
    let se = (ss_se / df).sqrt();
    ((ss_raw / df).sqrt() / se, (ss_err / df).sqrt() / se)
}

/// A simulated study's true SO2 by (subject, capture, segment), from `truth/`.
/// The true SO2 of a `fits/so2` row `r`, from [`true_so2`].
pub fn truth_of(
    truth: &BTreeMap<(String, String, String), f64>,
    r: &BTreeMap<String, String>,
) -> Option<f64> {
    truth
        .get(&(
            r["subject"].clone(),
            r["capture"].clone(),
            r["segment"].clone(),
        ))
        .copied()
}

pub fn true_so2(study: &Path) -> BTreeMap<(String, String, String), f64> {
    records(&study.join("truth/captures.csv"))
        .into_iter()
        .map(|r| {
            (
                (
                    r["subject"].clone(),
                    r["capture"].clone(),
                    r["segment"].clone(),
                ),
                r["so2"].parse().unwrap(),
            )
        })
        .collect()
}

/// With a TeX engine installed (`.ci/run` installs one and sets
/// SATSTEP_REQUIRE_TEX): the report tables `names` under `report`
/// compile under their stated preamble, each fits the text width of an
/// article page at its natural size (the test document makes a table that
/// would be scaled down say so) and none runs over a page. Works in `dir`.
pub fn tables_fit_the_page(report: &Path, names: &[&str], dir: &Path) {
    let have_tex = std::process::Command::new("pdflatex")
        .arg("--version")
        .output()
        .is_ok();
    assert!(
        have_tex || std::env::var("SATSTEP_REQUIRE_TEX").is_err(),
        "SATSTEP_REQUIRE_TEX is set but pdflatex is not installed"
    );
    if !have_tex {
        return;
    }
    let mut doc = String::from(
        "\\documentclass{article}\n\\usepackage{booktabs}\n\\usepackage{array}\n\\usepackage{graphicx}\n\\renewcommand{\\resizebox}[3]{\\typeout{satstep: table scaled}#3}\n\\begin{document}\n",
    );
    for name in names {
        doc.push_str(&format!(
            "\\input{{{}}}\n\\clearpage\n",
            report.join(format!("tables/{name}.tex")).display()
        ));
    }
    doc.push_str("\\end{document}\n");
    let tex = dir.join("tables.tex");
    std::fs::write(&tex, doc).unwrap();
    let st = std::process::Command::new("pdflatex")
        .args(["-interaction=nonstopmode", "-halt-on-error"])
        .arg(&tex)
        .current_dir(dir)
        .output()
        .unwrap();
    assert!(
        st.status.success(),
        "{}",
        String::from_utf8_lossy(&st.stdout)
    );
    let log = std::fs::read_to_string(dir.join("tables.log")).unwrap();
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
    let pages = log
        .split("Output written on ")
        .nth(1)
        .and_then(|t| t.split('(').nth(1))
        .and_then(|t| t.split(' ').next())
        .and_then(|n| n.parse::<usize>().ok());
    assert_eq!(pages, Some(names.len()), "{log}");
}
