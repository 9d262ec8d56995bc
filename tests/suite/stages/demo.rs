//! The simulator writes studies that the rest of the program accepts, with
//! the same bytes whatever the thread count.

use std::collections::BTreeMap;

use crate::common::*;
use satstep::oximetry::odr::within_group_slope;

#[test]
fn same_seed_same_bytes_whatever_the_jobs() {
    let dir = tempfile::tempdir().unwrap();
    let sc = repo().join("tests/fixtures/small-scenario.yaml");
    let a = dir.path().join("a");
    let b = dir.path().join("b");
    let o1 = satstep(
        dir.path(),
        &[
            "--jobs",
            "1",
            "simulate",
            sc.to_str().unwrap(),
            "--out",
            a.to_str().unwrap(),
        ],
    );
    assert_eq!(o1.code, 0, "{}", o1.stderr);
    let o2 = satstep(
        dir.path(),
        &[
            "--jobs",
            "2",
            "simulate",
            sc.to_str().unwrap(),
            "--out",
            b.to_str().unwrap(),
        ],
    );
    assert_eq!(o2.code, 0, "{}", o2.stderr);
    let (ha, hb) = (hashes(&a), hashes(&b));
    assert!(ha.len() > 20, "{ha:?}");
    assert_eq!(ha, hb);
    // The written study is valid as it stands and runs.
    let chk = satstep(dir.path(), &["check", a.to_str().unwrap()]);
    assert_eq!(chk.code, 0, "{}", chk.stderr);
    let run = satstep(dir.path(), &["run", a.to_str().unwrap()]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    // Every capture is a real multi-page 16-bit TIFF with one page per band.
    let tif = a.join("subjects/V01/captures/c001.tif");
    let mut dec = tiff::decoder::Decoder::new(std::fs::File::open(&tif).unwrap()).unwrap();
    let mut pages = 1;
    assert_eq!(dec.dimensions().unwrap(), (96, 96));
    assert_eq!(dec.colortype().unwrap(), tiff::ColorType::Gray(16));
    while dec.more_images() {
        dec.next_image().unwrap();
        pages += 1;
    }
    assert_eq!(pages, 4);
}

#[test]
fn every_scenario_in_the_repository_simulates_into_a_valid_study() {
    // The demo's scenario and the test scenarios.
    let dir = tempfile::tempdir().unwrap();
    for sc in [
        repo().join("demo-study/scenario.yaml"),
        repo().join("tests/fixtures/small-scenario.yaml"),
    ] {
        let out = dir.path().join(sc.parent().unwrap().file_name().unwrap());
        let o = satstep(
            dir.path(),
            &[
                "simulate",
                sc.to_str().unwrap(),
                "--out",
                out.to_str().unwrap(),
            ],
        );
        assert_eq!(o.code, 0, "{}", o.stderr);
        let chk = satstep(dir.path(), &["check", out.to_str().unwrap()]);
        assert_eq!(chk.code, 0, "{}: {}", sc.display(), chk.stderr);
        assert!(chk.stderr.contains("(0 warnings)"), "{}", chk.stderr);
        // `layout:`: the demo's `clear` field has six vessels, every point
        // at least 260 µm + 6 px (27.7 px, printed to 0.1) from the border of its 256 px
        // image; the small scenario's default `crowded` field also has the
        // two branches, and vessels that run nearer the border.
        let seg = std::fs::read_to_string(
            std::fs::read_dir(out.join("subjects"))
                .unwrap()
                .map(|e| e.unwrap().path().join("segments-OD.yaml"))
                .find(|p| p.is_file())
                .unwrap(),
        )
        .unwrap();
        let ids = seg.matches("- id:").count();
        // Branches are named after their vessel with a `b`.
        let has_branch = seg
            .lines()
            .any(|l| l.trim_start().starts_with("- id:") && l.trim_end().ends_with('b'));
        if sc.ends_with("demo-study/scenario.yaml") {
            assert_eq!(ids, 6, "{seg}");
            assert!(!has_branch, "{seg}");
            for line in seg.lines().filter(|l| l.contains("points:")) {
                let nums: Vec<f64> = line
                    .split(|c: char| !(c.is_ascii_digit() || c == '.' || c == '-'))
                    .filter_map(|t| t.parse().ok())
                    .collect();
                assert!(
                    nums.iter().all(|v| (27.6..=256.0 - 27.6).contains(v)),
                    "a point nearer the border than the clear layout allows: {line}"
                );
            }
        } else {
            assert_eq!(ids, 8, "{seg}");
            assert!(has_branch, "{seg}");
        }
        if sc.ends_with("demo-study/scenario.yaml") {
            // The committed study file is exactly what the simulator writes.
            let committed = std::fs::read_to_string(repo().join("demo-study/study.yaml")).unwrap();
            let written = std::fs::read_to_string(out.join("study.yaml")).unwrap();
            assert_eq!(
                committed, written,
                "regenerate demo-study/study.yaml with `satstep simulate`"
            );
        }
    }
}

#[test]
#[ignore = "runs the whole demo study (about 90 s on two cores); .ci/run runs it"]
fn simulated_reference_and_truth_are_physiological() {
    let dir = tempfile::tempdir().unwrap();
    let out = simulated(dir.path(), "demo-study/scenario.yaml", "demo");
    let run = satstep(dir.path(), &["run", out.to_str().unwrap()]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    // The joint fit's SE, through the image stage, matches the scatter of
    // repeated captures' errors against their truth within a factor 1.5
    // (measured: 1.10). The captures' own scatter is 1.72 SE: the
    // simulator varies each vessel's SO2 by 0.7 points SD from capture to
    // capture, which is the vessel's, not the measurement's (the SE is
    // about 0.55 points since neighbours are kept out of the background;
    // before, 0.96 raw and 0.71 on the errors).
    let (raw, err) = se_scatter_ratio(&out, "multiband");
    eprintln!("multiband: capture scatter / SE {raw:.2} (errors {err:.2})");
    assert!((1.0 / 1.5..=1.5).contains(&err), "{raw} {err}");
    // Reference SpO2 of steady captures per epoch (median over subjects).
    let csv = std::fs::read_to_string(out.join("results/epochs/captures.csv")).unwrap();
    let mut by_epoch: BTreeMap<String, Vec<f64>> = BTreeMap::new();
    for l in csv.lines().skip(1) {
        let f: Vec<&str> = l.split(',').collect();
        if f[9] == "steady" && !f[11].is_empty() {
            by_epoch
                .entry(f[6].to_string())
                .or_default()
                .push(f[11].parse().unwrap());
        }
    }
    let median = |v: &mut Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let air = median(by_epoch.get_mut("air").unwrap());
    let low15 = median(by_epoch.get_mut("low-15").unwrap());
    let low12 = median(by_epoch.get_mut("low-12").unwrap());
    // Healthy adults on air read 95–100; FiO2 0.15 at sea level lands in the
    // high 80s to low 90s in published challenge studies (common practice).
    assert!((95.0..=100.0).contains(&air), "{air}");
    assert!((86.0..=93.0).contains(&low15), "{low15}");
    assert!(low12 < low15 - 4.0, "{low12} vs {low15}");
    // Truth: arterioles 92–98 and venules 52–68 on air (cohort means).
    let truth = std::fs::read_to_string(out.join("truth/epoch_means.csv")).unwrap();
    let mean = |epoch: &str, kind: &str| {
        let v: Vec<f64> = truth
            .lines()
            .skip(1)
            .map(|l| l.split(',').collect::<Vec<_>>())
            .filter(|f| f[1] == epoch && f[2] == kind)
            .map(|f| f[3].parse::<f64>().unwrap())
            .collect();
        v.iter().sum::<f64>() / v.len() as f64
    };
    assert!(
        (92.0..=98.0).contains(&mean("air", "arteriole")),
        "{}",
        mean("air", "arteriole")
    );
    assert!(
        (52.0..=68.0).contains(&mean("air", "venule")),
        "{}",
        mean("air", "venule")
    );
    let drop = mean("air", "arteriole") - mean("low-15", "arteriole");
    assert!(
        (5.0..=10.0).contains(&drop),
        "FiO2 0.15 lowers arterioles by about 6–9 points, got {drop}"
    );

    // The demo run writes the whole report.
    for f in [
        "report.html",
        "report.md",
        "tables/contrasts.tex",
        "figures/time_course.png",
        "figures/sensitivity.svg",
    ] {
        assert!(
            out.join("results/report").join(f).is_file(),
            "the demo report lacks {f}"
        );
    }

    // End to end: the mixed-model contrasts from the images land near the
    // true contrasts of the simulation, for every method.
    let truth = std::fs::read_to_string(out.join("truth/contrasts.csv")).unwrap();
    let est = std::fs::read_to_string(out.join("results/statistics/contrasts.csv")).unwrap();
    let mut checked = 0;
    for l in est.lines().skip(1) {
        let f: Vec<&str> = l.split(',').collect();
        let (method, kind, label, e) = (f[0], f[1], f[2], f[3].parse::<f64>().unwrap());
        let t: f64 = truth
            .lines()
            .skip(1)
            .map(|x| x.split(',').collect::<Vec<_>>())
            .find(|x| x[0] == label && x[1] == kind)
            .unwrap()[2]
            .parse()
            .unwrap();
        // Two-band calibration and the model mismatch of the image stage
        // allow a few points; the induced changes are 9 and 28 points.
        let tol = if label.starts_with("recovery") {
            1.5
        } else {
            0.15 * t.abs() + 1.0
        };
        assert!(
            (e - t).abs() <= tol,
            "{method} {kind} {label}: estimated {e:.2}, true {t:.2}"
        );
        checked += 1;
    }
    assert_eq!(checked, 18, "3 methods × 2 kinds × 3 contrasts");
    for f in [
        "transmissions/positions.parquet",
        "transmissions/captures.csv",
        "fits/so2.parquet",
        "statistics/summaries.csv",
        "statistics/agreement.csv",
        "statistics/paired.csv",
        "statistics/methods.csv",
    ] {
        assert!(out.join("results").join(f).is_file(), "{f}");
    }
    // Paired t tests against the baseline see the hypoxic drop in every subject.
    let paired = std::fs::read_to_string(out.join("results/statistics/paired.csv")).unwrap();
    let row = paired
        .lines()
        .find(|l| l.starts_with("multiband,arteriole,low-15,"))
        .unwrap();
    let f: Vec<&str> = row.split(',').collect();
    assert_eq!(f[3], "8");
    assert!(
        f[4].parse::<f64>().unwrap() < -5.0 && f[8].parse::<f64>().unwrap() < 1e-3,
        "{row}"
    );
    // Arteriovenous differences on air are positive (arterioles above venules).
    let sums = std::fs::read_to_string(out.join("results/statistics/summaries.csv")).unwrap();
    let av: Vec<f64> = sums
        .lines()
        .filter(|l| l.starts_with("multiband,arteriovenous,") && l.split(',').nth(3) == Some("air"))
        .map(|l| l.split(',').nth(6).unwrap().parse().unwrap())
        .collect();
    assert_eq!(av.len(), 8);
    assert!(av.iter().all(|d| (15.0..50.0).contains(d)), "{av:?}");
    let methods = std::fs::read_to_string(out.join("results/statistics/methods.csv")).unwrap();
    assert!(
        methods.contains("multiband-pointwise,arteriole,along_segment_sd,"),
        "{methods}"
    );
    assert!(
        methods.contains("two-band vs multiband,arteriole,bias,"),
        "{methods}"
    );
    // Arteriolar SO2 rises with the reference SpO2.
    let ag = std::fs::read_to_string(out.join("results/statistics/agreement.csv")).unwrap();
    let head: Vec<&str> = ag.lines().next().unwrap().split(',').collect();
    let col = head.iter().position(|h| *h == "slope_on_spo2").unwrap();
    for l in ag.lines().skip(1) {
        let slope: f64 = l.split(',').nth(col).unwrap().parse().unwrap();
        assert!((0.5..1.5).contains(&slope), "{l}");
    }

    // The subject is the unit of replication of every epoch contrast: its
    // SE is not below 0.6 × the SE of the same run's paired subject-level
    // analysis, and its df not above 3 × the subjects (before the subject ×
    // epoch terms: SE 0.26 against 1.66, df 466).
    let rows = |p: &str| -> Vec<csv::StringRecord> {
        csv::Reader::from_path(out.join("results/statistics").join(p))
            .unwrap()
            .records()
            .map(Result::unwrap)
            .collect()
    };
    let (contrasts, paired) = (rows("contrasts.csv"), rows("paired.csv"));
    let mut compared = 0;
    for c in &contrasts {
        let (se, df) = (c[4].parse::<f64>().unwrap(), c[5].parse::<f64>().unwrap());
        assert!(df <= 3.0 * 8.0, "{c:?}");
        let epoch = c[2].strip_suffix(" - air").unwrap();
        let p = paired
            .iter()
            .find(|p| p[0] == c[0] && p[1] == c[1] && &p[2] == epoch)
            .unwrap();
        let paired_se: f64 = p[5].parse().unwrap();
        assert!(
            se >= 0.6 * paired_se,
            "{c:?}: SE {se} against the paired {paired_se}"
        );
        compared += 1;
    }
    assert_eq!(compared, 18);
    // The report plans a follow-up study from the demo's own variance
    // components (the scenario's `power:` section): a power table for the
    // two methods it names, at the automatic count of studies, and a section.
    let power = rows("../power/power.csv");
    assert_eq!(
        power.len(),
        4 * 2 * 3,
        "4 designs × 2 methods × 3 contrasts"
    );
    for r in power.iter().filter(|r| &r[9] == "stated") {
        let (n, p, se): (usize, f64, f64) = (
            r[10].parse().unwrap(),
            r[11].parse().unwrap(),
            r[12].parse().unwrap(),
        );
        assert!(n >= 1000 && se <= 0.0159, "{r:?}");
        if (p - 0.8).abs() <= 0.1 {
            assert!(
                se <= 0.01,
                "near the target the Monte Carlo SE is ≤ 1 point: {r:?}"
            );
        }
    }
    let report = std::fs::read_to_string(out.join("results/report/report.md")).unwrap();
    assert!(
        report.contains("## Power for a follow-up study")
            && report.contains("figures/power_curve.png")
            && out.join("results/report/figures/power_curve.png").is_file()
            && out.join("results/power/power.md").is_file(),
        "the demo report has no power section"
    );
    let models = rows("models.csv");
    assert_eq!(models.len(), 6);
    assert!(
        models
            .iter()
            .all(|m| m[2].contains("(0 + dummy(epoch, \"low-12\") | subject)") && &m[4] == "yes"),
        "{models:?}"
    );
}

#[test]
fn one_broken_capture_does_not_stop_the_study() {
    let dir = tempfile::tempdir().unwrap();
    let sc = repo().join("tests/fixtures/small-scenario.yaml");
    let a = dir.path().join("s");
    assert_eq!(
        satstep(
            dir.path(),
            &[
                "simulate",
                sc.to_str().unwrap(),
                "--out",
                a.to_str().unwrap()
            ]
        )
        .code,
        0
    );
    // Truncate one capture of the second subject.
    let bad = a.join("subjects/V02/captures/c003.tif");
    let bytes = std::fs::read(&bad).unwrap();
    std::fs::write(&bad, &bytes[..bytes.len() / 4]).unwrap();
    let run = satstep(dir.path(), &["run", a.to_str().unwrap()]);
    assert_eq!(run.code, 1, "{}", run.stderr);
    assert!(
        run.stderr.contains("1 captures could not be analysed"),
        "{}",
        run.stderr
    );
    assert!(
        run.stderr
            .contains("warning: capture `captures/c003.tif` (error): `"),
        "{}",
        run.stderr
    );
    let caps = std::fs::read_to_string(a.join("results/transmissions/captures.csv")).unwrap();
    let line = caps
        .lines()
        .find(|l| l.starts_with("V02,") && l.contains("captures/c003.tif"))
        .unwrap();
    assert!(line.contains(",error,"), "{line}");
    // Two subjects × 8 captures, one broken.
    assert_eq!(
        caps.lines().filter(|l| l.contains(",ok,")).count(),
        15,
        "{caps}"
    );
    assert!(a.join("results/statistics/contrasts.csv").is_file());
    // Run again: nothing to recompute, and the failure is still reported.
    let again = satstep(dir.path(), &["run", a.to_str().unwrap()]);
    assert_eq!(again.code, 1, "{}", again.stderr);
    assert!(
        again.stderr.contains("transmissions up to date"),
        "{}",
        again.stderr
    );
    assert!(
        again
            .stderr
            .contains("warning: capture `captures/c003.tif` (error)"),
        "{}",
        again.stderr
    );
    let manifest = std::fs::read_to_string(a.join("results/manifest.json")).unwrap();
    assert!(manifest.contains("\"error\": 1"), "{manifest}");
}

/// A subject who comes back for a second visit: the visit is analysed as a
/// second session (same eye and vessels, a day later) and the epoch models
/// gain a session-within-subject intercept; subjects seen once add none.
#[test]
fn a_second_visit_is_a_session_level_in_the_epoch_model() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    // The second visit: the first one's captures and log, a week later.
    let (day1, day2) = ("2026-05-04", "2026-05-11");
    let (v1, v2) = (s.join("subjects/V01"), s.join("subjects/V01-visit2"));
    std::fs::create_dir_all(v2.join("captures")).unwrap();
    for f in std::fs::read_dir(v1.join("captures"))
        .unwrap()
        .map(Result::unwrap)
    {
        std::fs::copy(f.path(), v2.join("captures").join(f.file_name())).unwrap();
    }
    for f in ["captures.csv", "spo2.csv"] {
        let text = std::fs::read_to_string(v1.join(f)).unwrap();
        assert!(text.contains(day1));
        std::fs::write(v2.join(f), text.replace(day1, day2)).unwrap();
    }
    let study = std::fs::read_to_string(s.join("study.yaml")).unwrap();
    let start = study.find("  - id: V01\n").unwrap();
    let first = start + study[start..].find("      - id: s1\n").unwrap();
    let end =
        first + study[first..].find("segments-OD.yaml}\n").unwrap() + "segments-OD.yaml}\n".len();
    let visit = study[first..end]
        .replace("id: s1", "id: s2")
        .replace(day1, day2)
        .replace(
            "subjects/V01/captures.csv",
            "subjects/V01-visit2/captures.csv",
        )
        .replace("subjects/V01/spo2.csv", "subjects/V01-visit2/spo2.csv");
    std::fs::write(
        s.join("study.yaml"),
        format!("{}{visit}{}", &study[..end], &study[end..]),
    )
    .unwrap();
    let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let fits = std::fs::read_to_string(s.join("results/fits/so2.csv")).unwrap();
    assert!(
        fits.lines().any(|l| l.starts_with("V01,s2,OD,")),
        "the second visit is analysed"
    );
    let vc = std::fs::read_to_string(s.join("results/statistics/variance_components.csv")).unwrap();
    let rows: Vec<Vec<&str>> = vc.lines().skip(1).map(|l| l.split(',').collect()).collect();
    let sessions: Vec<&Vec<&str>> = rows.iter().filter(|r| r[2] == "subject:session").collect();
    let models = rows.iter().filter(|r| r[2] == "subject").count();
    assert!(
        models > 0 && sessions.len() == models,
        "one session term per epoch model: {vc}"
    );
    // Three subjects, one of them seen twice: four sessions.
    assert!(
        sessions
            .iter()
            .all(|r| r[3] == "4" && r[4].parse::<f64>().unwrap() >= 0.0),
        "{vc}"
    );
}

/// Settings of the statistics that change what they say: a 90 % interval
/// without adjustment leaves no column named for 95 % or Holm; a minimum
/// diameter takes narrow segment values out of the statistics and counts
/// them; the two-band diameter correction removes ODR's within-capture
/// dependence on diameter and changes the two-band SO2.
#[test]
fn statistics_settings_do_what_they_say() {
    let dir = tempfile::tempdir().unwrap();
    // The runner scenario with a veil that rises towards the red, so that
    // the base model misfits some fits and `adequate_only` has values to
    // leave out (without it, this scenario's fits all pass).
    let scenario = dir.path().join("scenario.yaml");
    std::fs::write(
        &scenario,
        std::fs::read_to_string(repo().join("tests/fixtures/runner-scenario.yaml"))
            .unwrap()
            .replace(
                "protocol: ../../protocols/",
                &format!("protocol: {}/protocols/", repo().display()),
            )
            + "optics: {veil_slope: 0.1}\n",
    )
    .unwrap();
    let s = simulated(dir.path(), scenario.to_str().unwrap(), "s");
    let study = s.join("study.yaml");
    let text = std::fs::read_to_string(&study).unwrap();
    let edit = |from: &str, to: &str| {
        let t = std::fs::read_to_string(&study).unwrap();
        assert!(t.contains(from), "{from}");
        std::fs::write(&study, t.replacen(from, to, 1)).unwrap();
    };
    let run = || {
        let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
        assert_eq!(o.code, 0, "{}", o.stderr);
        o
    };
    let read = |rel: &str| -> (Vec<String>, Vec<csv::StringRecord>) {
        let mut r = csv::Reader::from_path(s.join("results").join(rel)).unwrap();
        (
            r.headers().unwrap().iter().map(String::from).collect(),
            r.records().map(Result::unwrap).collect(),
        )
    };
    let segments = |rows: &[csv::StringRecord]| {
        rows.iter()
            .filter(|r| &r[1] != "arteriovenous")
            .map(|r| r[5].parse::<i64>().unwrap())
            .sum::<i64>()
    };

    // Interval coverage and adjustment.
    edit(
        "output: results",
        "statistics: {confidence: 0.90, adjust: none}\noutput: results",
    );
    let first = run();
    for t in [
        "contrasts.csv",
        "agreement.csv",
        "paired.csv",
        "summaries.csv",
        "variance_components.csv",
        "methods.csv",
        "models.csv",
    ] {
        let (h, _) = read(&format!("statistics/{t}"));
        assert!(
            h.iter()
                .all(|c| !c.contains("95") && !c.to_lowercase().contains("holm")),
            "{t}: {h:?}"
        );
    }
    let (h, rows) = read("statistics/contrasts.csv");
    let col = |n: &str| h.iter().position(|c| c == n).unwrap();
    assert!(
        rows.iter().all(|r| &r[col("confidence")] == "0.9"
            && &r[col("adjustment")] == "none"
            && r[col("p")] == r[col("p_adjusted")]),
        "{rows:?}"
    );
    let report = std::fs::read_to_string(s.join("results/report/tables/contrasts.csv")).unwrap();
    let head = report.lines().next().unwrap();
    assert!(
        head.contains("90 % CI")
            && head.contains("p (unadjusted)")
            && !head.contains("95")
            && !head.contains("Holm"),
        "{head}"
    );
    assert!(
        first.stderr.contains("(90 % CI") && first.stderr.contains("(none)"),
        "{}",
        first.stderr
    );
    let (_, before) = read("statistics/summaries.csv");

    // The agreement by group follows its attribute: by sex (M, M, F) the
    // rows are group M's and the single-subject group is named; `none`
    // drops the breakdown and its warning.
    edit("adjust: none}", "adjust: none, agreement_by: sex}");
    let o = run();
    let (h, rows) = read("statistics/agreement_by_group.csv");
    let (a, g) = (
        h.iter().position(|c| c == "attribute").unwrap(),
        h.iter().position(|c| c == "group").unwrap(),
    );
    assert!(
        !rows.is_empty() && rows.iter().all(|r| &r[a] == "sex" && &r[g] == "M"),
        "{rows:?}"
    );
    assert!(
        o.stderr.contains("sex group(s) F have a single subject"),
        "{}",
        o.stderr
    );
    edit("agreement_by: sex}", "agreement_by: none}");
    let o = run();
    assert!(read("statistics/agreement_by_group.csv").1.is_empty());
    assert!(!o.stderr.contains("single subject"), "{}", o.stderr);
    edit(", agreement_by: none}", "}");

    // A minimum diameter: the median of the measured diameters.
    let (fh, fits) = read("fits/so2.csv");
    let dcol = fh.iter().position(|c| c == "diameter_um").unwrap();
    let mut d: Vec<f64> = fits
        .iter()
        .filter(|r| !r[dcol].is_empty())
        .map(|r| r[dcol].parse::<f64>().unwrap())
        .collect();
    d.sort_by(f64::total_cmp);
    let median = d[d.len() / 2].round();
    edit(
        "output: results",
        &format!("exclusions: {{min_diameter_um: {median}}}\noutput: results"),
    );
    let second = run();
    assert!(
        second
            .stderr
            .lines()
            .any(|l| l.starts_with("statistics") && l.contains("ran")),
        "{}",
        second.stderr
    );
    assert!(
        second
            .stderr
            .lines()
            .any(|l| l.starts_with("fits") && l.contains("up to date")),
        "{}",
        second.stderr
    );
    let (sh, after) = read("statistics/summaries.csv");
    let narrow_col = sh.iter().position(|c| c == "below_min_diameter").unwrap();
    let narrow: i64 = after
        .iter()
        .map(|r| r[narrow_col].parse::<i64>().unwrap())
        .sum();
    assert!(
        segments(&after) < segments(&before) && narrow > 0,
        "segments {} → {}, {narrow} below {median} µm",
        segments(&before),
        segments(&after)
    );
    assert_eq!(
        segments(&before) - segments(&after),
        narrow,
        "every value taken out is counted"
    );
    let accounting =
        std::fs::read_to_string(s.join("results/report/tables/capture_accounting.csv")).unwrap();
    assert!(
        accounting
            .lines()
            .next()
            .unwrap()
            .contains(&format!("segment values < {median} µm")),
        "{accounting}"
    );

    // The two-band diameter correction.
    let two_band_so2 = |rows: &[csv::StringRecord], h: &[String]| -> Vec<String> {
        let c = |n: &str| h.iter().position(|x| x == n).unwrap();
        rows.iter()
            .filter(|r| &r[c("method")] == "two-band")
            .map(|r| r[c("so2")].to_string())
            .collect()
    };
    let plain = two_band_so2(&fits, &fh);
    assert!(text.contains("    isosbestic: b570\n"));
    edit(
        "    isosbestic: b570\n",
        "    isosbestic: b570\n    diameter_correction: true\n",
    );
    run();
    let (fh, fits) = read("fits/so2.csv");
    assert_ne!(
        plain,
        two_band_so2(&fits, &fh),
        "the correction changes the two-band SO2"
    );
    let c = |n: &str| fh.iter().position(|x| x == n).unwrap();
    // Pooled within-capture, within-kind slope of ODR on diameter.
    let slope = |col: usize| {
        let mut groups: BTreeMap<(String, String, String), Vec<(f64, f64)>> = BTreeMap::new();
        for r in fits.iter().filter(|r| {
            &r[c("method")] == "two-band" && !r[col].is_empty() && !r[c("so2")].is_empty()
        }) {
            groups
                .entry((
                    r[c("subject")].to_string(),
                    r[c("capture")].to_string(),
                    r[c("kind")].to_string(),
                ))
                .or_default()
                .push((
                    r[c("diameter_um")].parse().unwrap(),
                    r[col].parse().unwrap(),
                ));
        }
        within_group_slope(&groups.into_values().collect::<Vec<_>>()).unwrap()
    };
    let (raw, corrected) = (slope(c("odr_uncorrected")), slope(c("odr")));
    assert!(
        raw.abs() > 1e-4 && corrected.abs() < 1e-3 * raw.abs(),
        "ODR per µm: {raw} before, {corrected} after the correction"
    );
    let methods = std::fs::read_to_string(s.join("results/report/report.md")).unwrap();
    assert!(
        methods.contains("linear correction of ODR for vessel diameter"),
        "the methods text says what ran"
    );

    // Only adequate fits: the multiband values the statistics lose are
    // exactly the usable misfits of `fits/so2`, on their own or with
    // their eye.
    let (_, before) = read("statistics/summaries.csv");
    let misfits = fits
        .iter()
        .filter(|r| {
            &r[c("method")] == "multiband"
                && ["misfit", "eye-misfit"].contains(&&r[c("adequacy")][..])
                && &r[c("status")] == "steady"
                && !r[c("so2")].is_empty()
                && r[c("diameter_um")].parse::<f64>().unwrap() >= median
        })
        .count() as i64;
    assert!(misfits > 0, "the scenario has misfits to leave out");
    edit("adjust: none}", "adjust: none, adequate_only: true}");
    run();
    let (_, after) = read("statistics/summaries.csv");
    assert_eq!(segments(&before) - segments(&after), misfits);
    let methods = std::fs::read_to_string(s.join("results/report/report.md")).unwrap();
    assert!(methods.contains("misfit of the vessel model, on their own or with the other fits of their eye, were left out of all statistics"));

    // A minimum above every vessel empties the statistics: a warning, not silence.
    edit(
        &format!("min_diameter_um: {median}"),
        "min_diameter_um: 100000",
    );
    let o = run();
    assert!(
        o.stderr.contains(
            "warning: `exclusions.min_diameter_um: 100000` leaves no arteriole value of `multiband`"
        ),
        "{}",
        o.stderr
    );
}

/// `layout: clear` on a field too small to lay its vessels in is an error
/// at the key, with the size it needs.
#[test]
fn a_clear_layout_needs_room() {
    let dir = tempfile::tempdir().unwrap();
    let small = std::fs::read_to_string(repo().join("tests/fixtures/small-scenario.yaml"))
        .unwrap()
        .replace(
            "../../protocols/",
            &format!("{}/protocols/", repo().display()),
        );
    let sc = write(dir.path(), "clear.yaml", &format!("{small}layout: clear\n"));
    let o = satstep(
        dir.path(),
        &[
            "simulate",
            sc.to_str().unwrap(),
            "--out",
            dir.path().join("s").to_str().unwrap(),
        ],
    );
    assert_ne!(o.code, 0);
    let line = small.lines().count() + 1;
    assert!(
        o.stderr.contains(&format!("clear.yaml:{line}:"))
            && o.stderr
                .contains("`layout: clear` keeps vessels 28 px from the border")
            && o.stderr.contains("at least 222 px a side"),
        "{}",
        o.stderr
    );
}
