//! A whole simulated study whose optics step outside the base vessel model
//! (a veil that rises towards the red), run with the base model and with
//! `model: auto` side by side: the base model's fits are flagged and its
//! contrasts shrink; `auto` chooses extensions and gets both closer to the
//! truth. The study file's `model:` is checked against what the bands can
//! identify. On a scene whose fundus shapes the double pass, `auto` says
//! in which eye its segments could not tell two extensions apart, and
//! more bands resolve them; with those bands the backscatter extension
//! corrects a blood backscatter that follows the albedo. Band gains that
//! read the fundus backwards are warned of.

use std::collections::BTreeMap;

use crate::common::*;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

#[test]
fn auto_model_recovers_what_a_wavelength_dependent_veil_hides() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/optics-veil-scenario.yaml", "s");
    let study = s.join("study.yaml");
    let text = std::fs::read_to_string(&study).unwrap();
    assert!(text.contains("  - method: multiband-pointwise\n    loss: huber\n"));
    let rendering = std::fs::read_to_string(s.join("truth/rendering.yaml")).unwrap();
    assert!(
        rendering.contains("optics: {veil_slope: 0.06,"),
        "{rendering}"
    );

    // Extensions the bands cannot separate are refused, at the line.
    let bad = text.replace(
        "  - method: multiband-pointwise\n    loss: huber\n",
        "  - method: multiband\n    label: mb-bs\n    model: [veil-slope, backscatter-spectrum]\n",
    );
    std::fs::write(&study, &bad).unwrap();
    let o = satstep(dir.path(), &["check", s.to_str().unwrap()]);
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(
        o.stderr.contains("study.yaml:")
            && o.stderr
                .contains("cannot separate `veil-slope+backscatter-spectrum` from SO2")
            && o.stderr.contains("these bands support `veil-slope`"),
        "{}",
        o.stderr
    );

    // Beside them, the two-band method calibrated three ways: two points
    // from the cohort (the scenario's), across subjects leaving each out,
    // and within each subject.
    let good = text.replace(
        "  - method: multiband-pointwise\n    loss: huber\n",
        "  - method: multiband\n    label: multiband-auto\n    model: auto\n\
         \x20 - method: two-band\n    label: two-band-within\n    sensitive: b600\n    isosbestic: b570\n    calibration: {mode: within-subject}\n\
         \x20 - method: two-band\n    label: two-band-regression\n    sensitive: b600\n    isosbestic: b570\n    calibration: {mode: regression}\n",
    );
    std::fs::write(&study, &good).unwrap();
    let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    // The base model's misfits reach the console, naming the method and
    // how many misfit only with their eye.
    assert!(
        o.stderr
            .contains("`multiband`: the vessel model does not describe the spectra")
            && o.stderr.contains("`model: auto`")
            && o.stderr.contains("with the other segments of their eye"),
        "{}",
        o.stderr
    );
    assert!(
        !o.stderr.contains("`multiband-auto`: the vessel model"),
        "{}",
        o.stderr
    );
    // These captures are sharp, and weighed so (measured: 0.00–0.27 px).
    assert!(!o.stderr.contains("look blurred"), "{}", o.stderr);
    for r in records(&s.join("results/transmissions/captures.csv")) {
        if let Ok(sd) = r["blur_sd_px"].parse::<f64>() {
            eprintln!("sharp captures weighed at {sd:.2} px");
            assert!(sd < 0.5, "{sd}");
        }
    }

    let truth = true_so2(&s);
    let fits = records(&s.join("results/fits/so2.csv"));
    let of = |method: &str| -> (f64, f64, BTreeMap<String, usize>) {
        let rows: Vec<&BTreeMap<String, String>> = fits
            .iter()
            .filter(|r| r["method"] == method && !r["so2"].is_empty())
            .collect();
        let errors: Vec<f64> = rows
            .iter()
            .filter_map(|r| {
                let t = truth_of(&truth, r)?;
                Some(r["so2"].parse::<f64>().unwrap() - t)
            })
            .collect();
        // On their own or with their eye.
        let misfit = rows
            .iter()
            .filter(|r| r["adequacy"] == "misfit" || r["adequacy"] == "eye-misfit")
            .count() as f64
            / rows.len() as f64;
        let mut models = BTreeMap::new();
        for r in &rows {
            *models.entry(r["model"].clone()).or_default() += 1;
        }
        (median(errors), misfit, models)
    };
    let (base_err, base_misfit, base_models) = of("multiband");
    let (auto_err, auto_misfit, auto_models) = of("multiband-auto");
    eprintln!(
        "base: median error {base_err:+.2}, misfits {:.1} %, {base_models:?}",
        base_misfit * 100.0
    );
    eprintln!(
        "auto: median error {auto_err:+.2}, misfits {:.1} %, {auto_models:?}",
        auto_misfit * 100.0
    );
    // Measured: base +7.9 points, every fit a misfit: 89.3 % on their own,
    // the rest (of the three short branch segments A3b and V1b, whose own
    // test has too few positions) with their eye; auto +0.2 with none, the
    // veil slope in every fit. (With the bands weighted by their response
    // alone, base +8.7 with 92 % on their own, part of them the
    // weighting's own misfits, and auto −1.4. On this scene rendered
    // without the veil slope the base model's median error is −0.03
    // points, with 0.8 % misfits on their own and no eye a misfit.)
    assert!(base_misfit >= 0.9, "{base_misfit}");
    // Some of them only with their eye: the short branch segments.
    assert!(
        fits.iter()
            .any(|r| r["method"] == "multiband" && r["adequacy"] == "eye-misfit")
    );
    assert!(base_err > 5.0, "{base_err}");
    assert!(auto_misfit < 0.1, "{auto_misfit}");
    assert!(auto_err.abs() < 0.6 * base_err, "{auto_err} vs {base_err}");
    assert_eq!(base_models.keys().collect::<Vec<_>>(), ["base"]);
    let extended: usize = auto_models
        .iter()
        .filter(|(k, _)| *k != "base")
        .map(|(_, n)| n)
        .sum();
    assert!(
        extended as f64 >= 0.8 * auto_models.values().sum::<usize>() as f64,
        "{auto_models:?}"
    );
    assert!(
        auto_models.keys().all(|k| !k.contains("backscatter")),
        "{auto_models:?}"
    );

    // The induced contrasts: the base model's shrink, auto's come closer.
    let truth_c = true_contrasts(&s);
    let contrasts = records(&s.join("results/statistics/contrasts.csv"));
    let off = |method: &str| contrasts_off(&s, method);
    // Measured: base 0.76–0.87 of the truth (mean |ratio − 1| 0.18);
    // auto 0.96–1.02 (mean 0.023), with one model per eye. Three subjects
    // measure a change of 8.6 points to about ±1.3 (the 95 % interval of
    // auto's venular low-15 contrast; it read 0.93 with the bands
    // weighted by their response alone): one contrast's 5 % is at the edge
    // of what this study can resolve, so the 5 % is asked of the mean, and
    // each induced change must lie in its interval.
    let base_off = off("multiband");
    assert!(base_off > 0.08, "{base_off}");
    let auto_off = off("multiband-auto");
    assert!(auto_off < 0.05, "auto: {auto_off}");
    for r in contrasts.iter().filter(|r| r["method"] == "multiband-auto") {
        let Some(t) = truth_c
            .get(&(r["contrast"].clone(), r["kind"].clone()))
            .filter(|t| t.abs() > 3.0)
        else {
            continue;
        };
        let (lo, hi): (f64, f64) = (r["lower"].parse().unwrap(), r["upper"].parse().unwrap());
        assert!((lo..=hi).contains(t), "auto: {t} outside {r:?}");
    }

    // Two-band: classical calibration (ODR regressed on SpO2, inverted)
    // keeps the induced changes whole, within subjects and across them.
    // Measured: within-subject 0.95–1.01 of the truth, across subjects
    // 0.98–1.06; regressing SpO2 on ODR instead gave 0.70 and 0.46.
    for m in ["two-band", "two-band-within", "two-band-regression"] {
        let o = off(m);
        assert!(o < 0.08, "{m}: {o}");
    }
    // Each calibration line is written with its slope's standard error:
    // one for the cohort's two points, one per subject otherwise.
    let cal = records(&s.join("results/fits/calibration.csv"));
    for (m, lines) in [
        ("two-band", 1),
        ("two-band-within", 3),
        ("two-band-regression", 3),
    ] {
        let mine: Vec<_> = cal.iter().filter(|r| r["method"] == m).collect();
        assert_eq!(mine.len(), lines, "{m}: {cal:?}");
        for r in mine {
            let (b, se): (f64, f64) = (r["slope"].parse().unwrap(), r["slope_se"].parse().unwrap());
            assert!(b < 0.0 && se > 0.0 && se < b.abs() / 2.0, "{m}: {r:?}");
        }
    }
    // The method comparison gives each method's ratio of measured to
    // reference change with its interval (here the arterioles', whose
    // truth follows SpO2 closely).
    let comparison = records(&s.join("results/statistics/methods.csv"));
    let q = |m: &str, quantity: &str| -> f64 {
        comparison
            .iter()
            .find(|r| r["method"] == m && r["kind"] == "arteriole" && r["quantity"] == quantity)
            .unwrap_or_else(|| panic!("{m} {quantity}"))["value"]
            .parse()
            .unwrap()
    };
    for m in ["two-band", "two-band-within", "multiband", "multiband-auto"] {
        let (r, lo, hi) = (
            q(m, "change_ratio"),
            q(m, "change_ratio_lower"),
            q(m, "change_ratio_upper"),
        );
        eprintln!("{m}: change ratio {r:.3} ({lo:.3} to {hi:.3})");
        assert!(lo < r && r < hi, "{m}");
        assert!((q(m, "change_ratio_subjects") - 3.0).abs() < 1e-12);
    }
    assert!(q("multiband", "change_ratio") < q("multiband-auto", "change_ratio"));
    let report = std::fs::read_to_string(s.join("results/report/report.md")).unwrap();
    assert!(
        report.contains("change ratio"),
        "the comparison table shows the ratio"
    );

    // `satstep mixed` takes the run's own `fits/so2.csv`: `--where` picks
    // the rows, and rows without an SO2 are left out and counted.
    let so2 = s.join("results/fits/so2.csv");
    let chosen: Vec<&BTreeMap<String, String>> = fits
        .iter()
        .filter(|r| {
            r["method"] == "two-band" && r["kind"] == "arteriole" && r["status"] == "steady"
        })
        .collect();
    let empty = chosen.iter().filter(|r| r["so2"].is_empty()).count();
    assert!(empty > 0, "the table has segments without an SO2");
    let args = |filter: &str| {
        vec![
            "mixed".to_string(),
            "--data".into(),
            so2.to_str().unwrap().into(),
            "--response".into(),
            "so2".into(),
            "--fixed".into(),
            "epoch".into(),
            "--random".into(),
            "subject".into(),
            "--random".into(),
            "subject:segment".into(),
            "--where".into(),
            filter.into(),
            "--where".into(),
            "kind=arteriole".into(),
            "--where".into(),
            "status=steady".into(),
        ]
    };
    let run = |filter: &str| {
        let a = args(filter);
        satstep(
            dir.path(),
            &a.iter().map(String::as_str).collect::<Vec<_>>(),
        )
    };
    let o = run("method=two-band");
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr
            .contains(&format!("keeps {} of {} rows", chosen.len(), fits.len()))
            && o.stderr.contains(&format!(
                "left out {empty} of {} rows with a missing value ({empty} in `so2`)",
                chosen.len()
            )),
        "{}",
        o.stderr
    );
    assert!(
        o.stdout
            .contains(&format!("{} observations", chosen.len() - empty)),
        "{}",
        o.stdout
    );
    let o = run("metod=two-band");
    assert_eq!(o.code, 1);
    assert!(
        o.stderr.contains("no column `metod`") && o.stderr.contains("did you mean `method`?"),
        "{}",
        o.stderr
    );

    // The methods text says how the model was chosen and how the two-band
    // lines were calibrated.
    assert!(report.contains("Schwarz's information criterion"));
    assert!(report.contains("The base model was kept where its fits described the eye"));
    assert!(report.contains("tested together"));
    assert!(report.contains("calibrated within each subject by classical calibration"));

    // The SE of a chosen model includes the uncertainty of the choice, so
    // it matches the scatter of repeated captures (measured: 1.00, on
    // SO2 − truth 0.81; 1.68 before the choice was counted).
    let (raw, err) = se_scatter_ratio(&s, "multiband-auto");
    eprintln!("multiband-auto: capture scatter / SE {raw:.2} (errors {err:.2})");
    assert!((1.0 / 1.5..=1.5).contains(&raw), "{raw} {err}");
}

/// Per (method, kind): the median of SO2 minus the truth, and per kind the
/// median relative diameter error of the joint multiband fits, in %.
fn errors_against_truth(
    study: &std::path::Path,
    results: &str,
) -> (BTreeMap<(String, String), f64>, BTreeMap<String, f64>) {
    let truth: BTreeMap<(String, String, String), (f64, f64)> =
        records(&study.join("truth/captures.csv"))
            .into_iter()
            .map(|r| {
                (
                    (
                        r["subject"].clone(),
                        r["capture"].clone(),
                        r["segment"].clone(),
                    ),
                    (r["so2"].parse().unwrap(), r["diameter_um"].parse().unwrap()),
                )
            })
            .collect();
    let mut so2: BTreeMap<(String, String), Vec<f64>> = BTreeMap::new();
    let mut diam: BTreeMap<String, Vec<f64>> = BTreeMap::new();
    for r in records(&study.join(results).join("fits/so2.csv")) {
        let Some((t, d)) = truth.get(&(
            r["subject"].clone(),
            r["capture"].clone(),
            r["segment"].clone(),
        )) else {
            continue;
        };
        let Ok(v) = r["so2"].parse::<f64>() else {
            continue;
        };
        so2.entry((r["method"].clone(), r["kind"].clone()))
            .or_default()
            .push(v - t);
        if r["method"] == "multiband" {
            let m: f64 = r["diameter_um"].parse().unwrap();
            diam.entry(r["kind"].clone())
                .or_default()
                .push(100.0 * (m / d - 1.0));
        }
    }
    (
        so2.into_iter().map(|(k, v)| (k, median(v))).collect(),
        diam.into_iter().map(|(k, v)| (k, median(v))).collect(),
    )
}

/// Blurred captures (σ = 1.5 px) with a central reflex on the arterioles:
/// with the instrument's `psf_sd_px` the profiles are fitted through the
/// blur, the diameters come out within 5 % of the truth (without it, the
/// arterioles' are well over 5 % too wide), the reflex is flagged on
/// arteriolar positions and not on venular ones, and what the reflex
/// leaves in arteriolar SO2 (against the same blurred study rendered
/// without it) is under 1.5 points for every method.
#[test]
fn blurred_captures_are_measured_through_the_point_spread_function() {
    let dir = tempfile::tempdir().unwrap();
    let with = simulated(
        dir.path(),
        "tests/fixtures/optics-blur-scenario.yaml",
        "reflex",
    );
    let scenario = std::fs::read_to_string(repo().join("tests/fixtures/optics-blur-scenario.yaml"))
        .unwrap()
        .replace(
            "optics: {psf_px: 1.5, reflex: 0.4}",
            "optics: {psf_px: 1.5}",
        )
        .replace(
            "../../protocols",
            repo().join("protocols").to_str().unwrap(),
        );
    let plain_scenario = write(dir.path(), "plain.yaml", &scenario);
    let plain = simulated(dir.path(), plain_scenario.to_str().unwrap(), "plain");
    let text = std::fs::read_to_string(with.join("study.yaml")).unwrap();
    assert!(text.contains("  psf_sd_px: 1.5\n"), "{text}");

    // A blur too wide to fit is refused at its line.
    let wide = with.join("wide.yaml");
    std::fs::write(&wide, text.replace("psf_sd_px: 1.5", "psf_sd_px: 9")).unwrap();
    let o = satstep(dir.path(), &["check", wide.to_str().unwrap()]);
    assert_eq!(o.code, 1);
    assert!(
        o.stderr.contains("wide.yaml:") && o.stderr.contains("`psf_sd_px` must be from 0 to 5"),
        "{}",
        o.stderr
    );
    std::fs::remove_file(&wide).unwrap();
    // The same study without the PSF, its results beside.
    let sharp = with.join("study-sharp.yaml");
    std::fs::write(
        &sharp,
        text.replace("  psf_sd_px: 1.5\n", "")
            .replace("output: results", "output: results-sharp"),
    )
    .unwrap();
    for s in [with.clone(), plain.clone(), sharp.clone()] {
        let o = satstep(dir.path(), &["--no-progress", "run", s.to_str().unwrap()]);
        assert_eq!(o.code, 0, "{}", o.stderr);
        // The reflex reaches the console where a two-band method reads ODR,
        // and the report's data-quality table counts it.
        let warned = o.stderr.contains("a central light reflex was found on")
            && o.stderr.contains("the two-band ODR of `two-band`");
        assert_eq!(warned, s != plain, "{}", o.stderr);
        // Only the run that does not know of the blur is told of it.
        let blurred = o.stderr.contains("the captures look blurred")
            && o.stderr.contains("`instrument: psf_sd_px`");
        assert_eq!(blurred, s == sharp, "{}", o.stderr);
    }
    // It is weighed on each eye's reference capture. Measured: 1.53–1.56
    // px against the 1.5 rendered.
    let weighed: Vec<f64> = records(&with.join("results-sharp/transmissions/captures.csv"))
        .iter()
        .filter(|r| !r["blur_sd_px"].is_empty())
        .map(|r| r["blur_sd_px"].parse().unwrap())
        .collect();
    eprintln!("blur weighed without the setting: {weighed:.2?} px");
    assert_eq!(weighed.len(), 3, "one per eye");
    assert!(
        weighed.iter().all(|sd| (sd - 1.5).abs() < 0.3),
        "{weighed:?}"
    );
    // And the report's data-quality table counts the eyes.
    let md = std::fs::read_to_string(with.join("results-sharp/report/report.md")).unwrap();
    let row = md
        .lines()
        .find(|l| l.contains("eyes that look blurred"))
        .unwrap_or_else(|| panic!("no blur row in the data-quality table"));
    assert!(row.replace(' ', "").ends_with("|3|3|"), "{row}");
    let report = std::fs::read_to_string(with.join("results/report/report.html")).unwrap();
    assert!(
        report.contains("usable arteriole positions with a central light reflex"),
        "the data-quality table counts the reflex"
    );
    let (so2_with, diam_with) = errors_against_truth(&with, "results");
    let (so2_plain, _) = errors_against_truth(&plain, "results");
    let (_, diam_sharp) = errors_against_truth(&with, "results-sharp");
    eprintln!("diameter error, %: with the PSF {diam_with:.2?}; without {diam_sharp:.2?}");
    for kind in ["arteriole", "venule"] {
        assert!(diam_with[kind].abs() < 5.0, "{kind}: {diam_with:?}");
    }
    assert!(diam_sharp["arteriole"] > 8.0, "{diam_sharp:?}");

    // The reflex: flagged where it is, on arterioles only.
    let positions = records(&with.join("results/transmissions/positions.csv"));
    let share = |kind: &str| {
        let p: Vec<_> = positions
            .iter()
            .filter(|r| r["kind"] == kind && r["quality_flags"].is_empty())
            .collect();
        p.iter().filter(|r| r["central_reflex"] == "yes").count() as f64 / p.len() as f64
    };
    let (a, v) = (share("arteriole"), share("venule"));
    eprintln!(
        "reflex found on {:.0} % of arteriolar and {:.1} % of venular positions",
        a * 100.0,
        v * 100.0
    );
    // Measured: 88 % and 0 % (60 % of arteriolar positions by the
    // position test alone, before a segment showing it on a quarter of its
    // positions was marked whole).
    assert!(a > 0.8 && v < 0.02, "{a} {v}");

    for method in ["multiband", "multiband-pointwise", "two-band"] {
        let key = (method.to_string(), "arteriole".to_string());
        let left = so2_with[&key] - so2_plain[&key];
        eprintln!(
            "{method}, arterioles: median error {:+.2} with the reflex, {:+.2} without: {left:+.2} points from the reflex",
            so2_with[&key], so2_plain[&key]
        );
        assert!(left.abs() < 1.5, "{method}: {left}");
    }
}

#[test]
fn band_gains_that_read_the_fundus_backwards_are_warned_of() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/sites-scenario.yaml", "g");
    let o = satstep(dir.path(), &["--no-progress", "run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(!o.stderr.contains("stated `gain`s"), "{}", o.stderr);
    // The simulator's fundus (a sigmoid near 590 nm, melanin by grade) is
    // 2.7–3.3 times as bright at 610 as at 560 nm; each segment reads it
    // so, within the image noise (measured 2.52–3.64).
    let rises: Vec<f64> = records(&s.join("results/fits/so2.csv"))
        .iter()
        .filter(|r| r["method"] == "multiband" && !r["fundus_rise"].is_empty())
        .map(|r| r["fundus_rise"].parse().unwrap())
        .collect();
    assert!(rises.len() > 20, "{}", rises.len());
    let (lo, hi) = rises
        .iter()
        .fold((f64::INFINITY, 0.0f64), |a, v| (a.0.min(*v), a.1.max(*v)));
    eprintln!("fundus read at 610 over 560 nm: {lo:.2}–{hi:.2}");
    assert!(lo > 2.2 && hi < 4.0, "{lo} {hi}");
    // Gains stated as if the camera were thirty times as sensitive at
    // 616 nm as at 506 (the simulated camera is flat): the fundus reads
    // darker towards the red, and the run says the gains are wrong.
    let study = s.join("study.yaml");
    let mut text = std::fs::read_to_string(&study).unwrap();
    for c in [506, 548, 570, 586, 600, 616] {
        let gain = ((c as f64 - 506.0) / 30.0).exp();
        text = text.replace(
            &format!("centre_nm: {c}, fwhm_nm: 8, gain: 1}}"),
            &format!("centre_nm: {c}, fwhm_nm: 8, gain: {gain:.3}}}"),
        );
    }
    assert!(!text.contains("gain: 1}"), "{text}");
    std::fs::write(&study, text).unwrap();
    let o = satstep(dir.path(), &["--no-progress", "run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr.contains(
            "`multiband`: through the bands' stated `gain`s the fundus behind the vessels reads"
        ) && o.stderr.contains("not its inverse"),
        "{}",
        o.stderr
    );
    let manifest = std::fs::read_to_string(s.join("results/manifest.json")).unwrap();
    assert!(manifest.contains("stated `gain`s"), "{manifest}");
}

/// The simulated study's true induced changes, by contrast and kind.
fn true_contrasts(study: &std::path::Path) -> BTreeMap<(String, String), f64> {
    records(&study.join("truth/contrasts.csv"))
        .into_iter()
        .map(|r| {
            (
                (r["contrast"].clone(), r["kind"].clone()),
                r["so2_change"].parse().unwrap(),
            )
        })
        .collect()
}

/// The mean over the four induced changes larger than 3 points of
/// |measured / true − 1| for `method`.
fn contrasts_off(study: &std::path::Path, method: &str) -> f64 {
    let truth = true_contrasts(study);
    let ratios: Vec<f64> = records(&study.join("results/statistics/contrasts.csv"))
        .iter()
        .filter(|r| r["method"] == method)
        .filter_map(|r| {
            let t = truth.get(&(r["contrast"].clone(), r["kind"].clone()))?;
            (t.abs() > 3.0).then(|| r["estimate"].parse::<f64>().unwrap() / t)
        })
        .collect();
    assert_eq!(ratios.len(), 4, "{method}");
    eprintln!("{method}: measured / true change {ratios:.3?}");
    ratios.iter().map(|q| (q - 1.0).abs()).sum::<f64>() / 4.0
}

/// Per subject and kind of `method`'s fits in `study`: the median of SO2
/// minus the truth, the median SE, and the models the eye's segments
/// could not tell apart.
type PerEye = BTreeMap<(String, String), (f64, f64, String)>;

fn per_eye(study: &std::path::Path, method: &str) -> PerEye {
    let truth = true_so2(study);
    type Errors = (Vec<f64>, Vec<f64>, String);
    let mut groups: BTreeMap<(String, String), Errors> = BTreeMap::new();
    for r in records(&study.join("results/fits/so2.csv")) {
        if r["method"] != method || r["so2"].is_empty() {
            continue;
        }
        let Some(t) = truth_of(&truth, &r) else {
            continue;
        };
        let g = groups
            .entry((r["subject"].clone(), r["kind"].clone()))
            .or_default();
        g.0.push(r["so2"].parse::<f64>().unwrap() - t);
        g.1.push(r["so2_se"].parse().unwrap());
        g.2 = r["tied_models"].clone();
    }
    groups
        .into_iter()
        .map(|(k, (e, se, tied))| (k, (median(e), median(se), tied)))
        .collect()
}

/// Whether `tied` (a `tied_models` cell) ties the veil slope with the
/// fundus slope, two extensions neither of which contains the other.
fn rivals_tied(tied: &str) -> bool {
    let names: Vec<&str> = tied.split(", ").collect();
    names.contains(&"veil-slope") && names.contains(&"fundus-slope")
}

/// The fundus-effect scenario fixture, its protocol path made absolute so
/// that a test may write variants of it anywhere.
fn fundus_scenario() -> String {
    std::fs::read_to_string(repo().join("tests/fixtures/optics-fundus-scenario.yaml"))
        .unwrap()
        .replace(
            "../../protocols/",
            &format!("{}/", repo().join("protocols").display()),
        )
}

/// `scenario` with three bands added below 500 nm, where blood absorbs
/// far more and its albedo changes far more between bands.
fn with_blue_bands(scenario: &str) -> String {
    scenario.replace(
        "  bands:\n",
        "  bands:\n    - {name: b450, centre_nm: 450, fwhm_nm: 8}\n    - {name: b470, centre_nm: 470, fwhm_nm: 8}\n    - {name: b490, centre_nm: 490, fwhm_nm: 8}\n",
    )
}

/// Simulates `scenario` as study `name` in `dir`, puts `methods` (study
/// file lines) in place of the multiband-pointwise method, and runs it;
/// returns the study folder and the run's console.
fn simulate_and_run(
    dir: &std::path::Path,
    name: &str,
    scenario: &str,
    methods: &str,
) -> (std::path::PathBuf, String) {
    let file = write(dir, &format!("{name}.yaml"), scenario);
    let s = simulated(dir, file.to_str().unwrap(), name);
    let study = s.join("study.yaml");
    let text = std::fs::read_to_string(&study).unwrap().replace(
        "  - method: multiband-pointwise\n    loss: huber\n",
        methods,
    );
    std::fs::write(&study, text).unwrap();
    let o = satstep(dir, &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    (s, o.stderr)
}

const AUTO: &str = "  - method: multiband\n    label: multiband-auto\n    model: auto\n";

#[test]
fn auto_says_when_an_eyes_segments_cannot_tell_its_extensions_apart() {
    let dir = tempfile::tempdir().unwrap();
    let scenario = fundus_scenario();
    // Eight bands: the fundus reflectance, which enters the double pass,
    // is what the scene adds to the base model.
    let (s, stderr) = simulate_and_run(dir.path(), "s", &scenario, AUTO);
    let rendering = std::fs::read_to_string(s.join("truth/rendering.yaml")).unwrap();
    assert!(rendering.contains("fundus_exponent: 0.3,"), "{rendering}");
    let base = per_eye(&s, "multiband");
    let auto = per_eye(&s, "multiband-auto");
    for (k, (e, se, tied)) in &auto {
        eprintln!(
            "{k:?}: base {:+.2}, auto {e:+.2} (SE {se:.2}; tied: {tied})",
            base[k].0
        );
    }
    // Measured: base −4.3 to −10.4 points in every eye and kind.
    assert!(base.values().all(|(e, ..)| *e < -3.0), "{base:?}");
    // Measured: auto within 0.2 points in two eyes (the fundus slope);
    // in the third (a dark fundus, veil 0.3) the veil slope by the
    // summed criterion, −2.3 / −5.3 points, where the segments could not
    // tell it from the fundus slope: the SE, 1.46 / 2.77 (0.67 / 1.29 by
    // the criterion alone), covers the error to within 2 SE, and the run
    // names the eye.
    let mut rival_eyes = Vec::new();
    for ((subject, kind), (e, se, tied)) in &auto {
        if rivals_tied(tied) {
            rival_eyes.push(subject.clone());
            assert!(e.abs() < 2.0 * se, "{subject} {kind}: {e} vs SE {se}");
        } else {
            assert!(e.abs() < 2.0, "{subject} {kind}: {e} ({tied})");
        }
    }
    rival_eyes.dedup();
    assert!(!rival_eyes.is_empty(), "{auto:?}");
    assert!(
        stderr.contains("`multiband-auto`: in ")
            && stderr.contains("the segments could not tell the vessel model chosen from others")
            && rival_eyes
                .iter()
                .all(|s| stderr.contains(&format!("{s} s1 OD: `"))),
        "{stderr}"
    );
    // The base model's induced changes come out too large; auto's within
    // 5 % on average (measured: base 1.08–1.13, auto 0.94–1.05).
    assert!(contrasts_off(&s, "multiband") > 0.08);
    assert!(contrasts_off(&s, "multiband-auto") < 0.05);
    let report = std::fs::read_to_string(s.join("results/report/report.md")).unwrap();
    assert!(report.contains("the standard errors then weighed the models left alike"));
    // Three methods' rows and the tied fits' keep the data-quality table
    // on one page (with its item column 11em wide it ran 59 pt over).
    tables_fit_the_page(&s.join("results/report"), &["data_quality"], dir.path());
    // The data-quality table counts the tied fits (measured: all 253, each eye tied).
    let tied = records(&s.join("results/fits/so2.csv"))
        .iter()
        .filter(|r| r["method"] == "multiband-auto" && !r["tied_models"].is_empty())
        .count();
    assert!(tied > 0);
    assert!(
        report.contains(&format!(
            "multiband-auto: fits whose eye's segments could not tell the model chosen from others (`tied_models`; the SE includes their difference) | {tied} |"
        )),
        "{report}"
    );

    // Three bands more, below 500 nm, where blood's absorption changes
    // far more: auto takes the fundus slope in every eye, within 2 points
    // (measured: −0.9 to +1.0), and no eye ties the two slopes.
    let (w, _) = simulate_and_run(dir.path(), "w", &with_blue_bands(&scenario), AUTO);
    for (k, (e, se, tied)) in per_eye(&w, "multiband-auto") {
        eprintln!("eleven bands, {k:?}: auto {e:+.2} (SE {se:.2}; tied: {tied})");
        assert!(e.abs() < 2.0 && !rivals_tied(&tied), "{k:?}: {e} ({tied})");
    }
}

#[test]
fn blue_bands_let_the_backscatter_extension_correct_images() {
    // A blood backscatter that follows the albedo (scale 0.4), through
    // the eight bands and three more below 500 nm. Eight bands cannot
    // separate the extension from SO2 (`check` refuses it; see
    // `auto_model_recovers_what_a_wavelength_dependent_veil_hides`).
    let dir = tempfile::tempdir().unwrap();
    let scenario = fundus_scenario().replace(
        "optics: {fundus_exponent: 0.3}",
        "optics: {backscatter_scale: 0.4}",
    );
    let methods = "  - method: multiband\n    label: multiband-backscatter\n    model: backscatter-spectrum\n";
    let (s, _) = simulate_and_run(dir.path(), "s", &with_blue_bands(&scenario), methods);
    let rendering = std::fs::read_to_string(s.join("truth/rendering.yaml")).unwrap();
    assert!(rendering.contains("backscatter_scale: 0.4,"), "{rendering}");
    let base = per_eye(&s, "multiband");
    let ext = per_eye(&s, "multiband-backscatter");
    for (k, (e, se, _)) in &ext {
        eprintln!(
            "{k:?}: base {:+.2}, extension {e:+.2} (SE {se:.2})",
            base[k].0
        );
    }
    // Measured: base +1.05 to +1.99 points in every eye and kind (on the
    // eight bands alone +1.8 to +3.1), the extension +0.14 to +0.66.
    assert!(base.values().all(|(e, ..)| *e > 0.8), "{base:?}");
    assert!(ext.values().all(|(e, ..)| e.abs() < 1.0), "{ext:?}");
    // Contrasts within 5 % on average (measured 0.94–1.01).
    assert!(contrasts_off(&s, "multiband-backscatter") < 0.05);
}
