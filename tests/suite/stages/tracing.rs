//! Starting a study from captures alone: `satstep segments propose` must
//! find the vessels the simulator drew (centre lines within 1 px over at
//! least 90 % of their length, kinds right in at least 90 % of segments),
//! propose nothing on a field without vessels, never overwrite an edited
//! segment file without `--force`; and a study written by `satstep init`
//! with proposed segments must give the SO2 the hand-made segments give.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use yaml_rust2::{Yaml, YamlLoader};

use crate::common::{repo, satstep, simulated};

const SCENARIO: &str = "tests/fixtures/tracing-scenario.yaml";

type Line = Vec<(f64, f64)>;
/// A segment file's segments: (id, kind, points).
type Segments = Vec<(String, String, Line)>;

fn segments(path: &Path) -> Segments {
    let text = std::fs::read_to_string(path).unwrap();
    let doc = &YamlLoader::load_from_str(&text).unwrap()[0];
    doc["segments"]
        .as_vec()
        .map(|v| v.as_slice())
        .unwrap_or_default()
        .iter()
        .map(|s| {
            let pts = s["points"]
                .as_vec()
                .unwrap()
                .iter()
                .map(|p| (num(&p[0]), num(&p[1])))
                .collect();
            (
                s["id"].as_str().unwrap().to_string(),
                s["kind"].as_str().unwrap().to_string(),
                pts,
            )
        })
        .collect()
}

fn num(y: &Yaml) -> f64 {
    y.as_f64().or_else(|| y.as_i64().map(|i| i as f64)).unwrap()
}

fn to_segment(p: (f64, f64), a: (f64, f64), b: (f64, f64)) -> f64 {
    let (vx, vy) = (b.0 - a.0, b.1 - a.1);
    let l2 = vx * vx + vy * vy;
    let u = if l2 > 0.0 {
        (((p.0 - a.0) * vx + (p.1 - a.1) * vy) / l2).clamp(0.0, 1.0)
    } else {
        0.0
    };
    ((p.0 - a.0 - u * vx).powi(2) + (p.1 - a.1 - u * vy).powi(2)).sqrt()
}

fn distance(p: (f64, f64), line: &Line) -> f64 {
    line.windows(2)
        .map(|w| to_segment(p, w[0], w[1]))
        .fold(f64::INFINITY, f64::min)
}

/// Points every 0.5 px along a line.
fn dense(line: &Line) -> Line {
    let mut out = Vec::new();
    for w in line.windows(2) {
        let l = ((w[1].0 - w[0].0).powi(2) + (w[1].1 - w[0].1).powi(2)).sqrt();
        let n = (l / 0.5).ceil().max(1.0) as usize;
        for k in 0..n {
            let f = k as f64 / n as f64;
            out.push((
                w[0].0 + f * (w[1].0 - w[0].0),
                w[0].1 + f * (w[1].1 - w[0].1),
            ));
        }
    }
    out
}

/// The simulator's band offsets (truth/rendering.yaml), px.
fn band_offsets(study: &Path) -> BTreeMap<String, (f64, f64)> {
    let text = std::fs::read_to_string(study.join("truth/rendering.yaml")).unwrap();
    let doc = &YamlLoader::load_from_str(&text).unwrap()[0];
    doc["band_offsets_px"]
        .as_hash()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.as_str().unwrap().to_string(), (num(&v[0]), num(&v[1]))))
        .collect()
}

/// The band a proposal's centre lines are in, from its header.
fn centred_band(path: &Path) -> String {
    let text = std::fs::read_to_string(path).unwrap();
    text.split("centred on band ")
        .nth(1)
        .and_then(|t| t.split(',').next())
        .unwrap()
        .to_string()
}

/// Simulates the tracing study and sets its hand-made segment files aside
/// (returned per subject), as a lab with captures only would have it.
fn study_without_segments(dir: &Path, out: &str) -> (PathBuf, BTreeMap<String, Segments>) {
    let folder = simulated(dir, SCENARIO, out);
    let mut hand = BTreeMap::new();
    for e in std::fs::read_dir(folder.join("subjects")).unwrap() {
        let d = e.unwrap().path();
        let f = d.join("segments-OD.yaml");
        hand.insert(
            d.file_name().unwrap().to_string_lossy().to_string(),
            segments(&f),
        );
        std::fs::remove_file(f).unwrap();
    }
    (folder, hand)
}

#[test]
fn proposed_segments_follow_the_simulated_vessels() {
    let tmp = tempfile::tempdir().unwrap();
    let (study, hand) = study_without_segments(tmp.path(), "study");
    let o = satstep(
        tmp.path(),
        &["segments", "propose", study.to_str().unwrap()],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let offsets = band_offsets(&study);
    let (mut covered, mut total) = (0usize, 0usize);
    let (mut kinds_right, mut proposed) = (0usize, 0usize);
    for (subject, truth) in &hand {
        let file = study
            .join("subjects")
            .join(subject)
            .join("segments-OD.yaml");
        let overlay = std::fs::read(file.with_extension("png")).unwrap();
        assert_eq!(&overlay[1..4], b"PNG", "{subject}: the overlay is a PNG");
        let props = segments(&file);
        // The proposal is where the vessel lies in the band it was
        // centred on: the truth moved by that band's offset.
        let off = offsets[&centred_band(&file)];
        let truth: Vec<(String, Line)> = truth
            .iter()
            .map(|(_, k, l)| {
                (
                    k.clone(),
                    l.iter().map(|p| (p.0 + off.0, p.1 + off.1)).collect(),
                )
            })
            .collect();
        for (_, line) in &truth {
            for p in dense(line) {
                total += 1;
                if props.iter().any(|(_, _, q)| distance(p, q) <= 1.0) {
                    covered += 1;
                }
            }
        }
        for (_, kind, q) in &props {
            proposed += 1;
            let mean = |l: &Line| q.iter().map(|p| distance(*p, l)).sum::<f64>() / q.len() as f64;
            let nearest = truth
                .iter()
                .min_by(|a, b| mean(&a.1).total_cmp(&mean(&b.1)))
                .unwrap();
            if &nearest.0 == kind {
                kinds_right += 1;
            }
        }
    }
    let coverage = covered as f64 / total as f64;
    let kinds = kinds_right as f64 / proposed as f64;
    eprintln!(
        "centre lines within 1 px over {:.1} % of the true length; kinds right {kinds_right} of {proposed}",
        100.0 * coverage
    );
    assert!(coverage >= 0.9, "coverage {coverage}");
    assert!(kinds >= 0.9, "kinds {kinds}");
    assert!(proposed >= hand.values().map(Vec::len).sum::<usize>() * 8 / 10);

    // The run warns that the segments are proposals not yet reviewed.
    let o = satstep(tmp.path(), &["check", study.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr.contains("proposals not yet reviewed"),
        "{}",
        o.stderr
    );

    // An untouched proposal may be proposed again; an edited one is kept
    // unless forced.
    let file = study.join("subjects/V01/segments-OD.yaml");
    let o = satstep(
        tmp.path(),
        &[
            "segments",
            "propose",
            study.to_str().unwrap(),
            "--eye",
            "V01",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let edited = std::fs::read_to_string(&file)
        .unwrap()
        .replace("kind: venule", "kind: arteriole");
    std::fs::write(&file, &edited).unwrap();
    let o = satstep(
        tmp.path(),
        &[
            "segments",
            "propose",
            study.to_str().unwrap(),
            "--eye",
            "V01",
        ],
    );
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(
        o.stderr.contains("was edited after it was proposed"),
        "{}",
        o.stderr
    );
    assert_eq!(std::fs::read_to_string(&file).unwrap(), edited);
    let o = satstep(
        tmp.path(),
        &[
            "segments",
            "propose",
            study.to_str().unwrap(),
            "--eye",
            "V01",
            "--force",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert_ne!(std::fs::read_to_string(&file).unwrap(), edited);
    // A hand-made file (no digest) is kept too.
    std::fs::write(&file, "eye: OD\nsegments: []\n").unwrap();
    let o = satstep(
        tmp.path(),
        &[
            "segments",
            "propose",
            study.to_str().unwrap(),
            "--eye",
            "V01",
        ],
    );
    assert_eq!(o.code, 1);
    assert!(
        o.stderr.contains("was not proposed by satstep"),
        "{}",
        o.stderr
    );
}

#[test]
fn a_field_without_vessels_gets_no_proposal() {
    let tmp = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(repo().join(SCENARIO))
        .unwrap()
        .replace("layout: clear", "layout: none")
        .replace(
            "protocol: ../../protocols/",
            &format!("protocol: {}/protocols/", repo().display()),
        );
    let sc = tmp.path().join("empty.yaml");
    std::fs::write(&sc, text).unwrap();
    let study = tmp.path().join("empty");
    let o = satstep(
        tmp.path(),
        &[
            "simulate",
            sc.to_str().unwrap(),
            "--out",
            study.to_str().unwrap(),
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    for e in std::fs::read_dir(study.join("subjects")).unwrap() {
        std::fs::remove_file(e.unwrap().path().join("segments-OD.yaml")).unwrap();
    }
    let o = satstep(
        tmp.path(),
        &["segments", "propose", study.to_str().unwrap()],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert_eq!(
        o.stderr.matches(": 0 segments proposed").count(),
        4,
        "{}",
        o.stderr
    );
    for e in std::fs::read_dir(study.join("subjects")).unwrap() {
        assert!(segments(&e.unwrap().path().join("segments-OD.yaml")).is_empty());
    }
}

/// Per (subject, capture, kind): the mean SO2 of `method` over segments.
fn capture_means(study: &Path, method: &str) -> BTreeMap<(String, String, String), f64> {
    let mut r = csv::Reader::from_path(study.join("results/fits/so2.csv")).unwrap();
    let h = r.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap();
    let mut acc: BTreeMap<(String, String, String), (f64, usize)> = BTreeMap::new();
    for x in r.records() {
        let x = x.unwrap();
        if &x[col("method")] != method {
            continue;
        }
        if let Ok(v) = x[col("so2")].parse::<f64>() {
            let e = acc
                .entry((
                    x[col("subject")].into(),
                    x[col("capture")].into(),
                    x[col("kind")].into(),
                ))
                .or_default();
            e.0 += v;
            e.1 += 1;
        }
    }
    acc.into_iter()
        .map(|(k, (s, n))| (k, s / n as f64))
        .collect()
}

#[test]
fn a_study_started_with_init_and_proposed_segments_gives_the_hand_made_so2() {
    let tmp = tempfile::tempdir().unwrap();
    // The simulated study with its hand-made segments, run as it is.
    let hand = simulated(tmp.path(), SCENARIO, "hand");
    let o = satstep(
        tmp.path(),
        &["--no-progress", "run", hand.to_str().unwrap()],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    // The lab's folder: each volunteer's captures and oximeter log, nothing else.
    let lab = tmp.path().join("lab");
    for e in std::fs::read_dir(hand.join("subjects")).unwrap() {
        let d = e.unwrap().path();
        let id = d.file_name().unwrap().to_owned();
        let to = lab.join(&id);
        std::fs::create_dir_all(to.join("captures")).unwrap();
        for c in std::fs::read_dir(d.join("captures")).unwrap() {
            let c = c.unwrap().path();
            std::fs::copy(&c, to.join("captures").join(c.file_name().unwrap())).unwrap();
        }
        std::fs::copy(d.join("spo2.csv"), to.join("oximeter.csv")).unwrap();
    }
    // The camera's pixel size and bands come from the captures' own TIFF
    // tags, as the simulator writes them; the protocol is a ready one.
    let o = satstep(
        tmp.path(),
        &[
            "init",
            lab.to_str().unwrap(),
            "--protocol",
            "step-down-hypoxia",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let study = std::fs::read_to_string(lab.join("study.yaml")).unwrap();
    assert!(
        study.contains("reference: {file: V01/oximeter.csv, columns: {time: time, spo2: spo2}}"),
        "{study}"
    );
    assert!(study.contains("pixel_size_um: 12\n"), "{study}");
    assert!(
        study.contains("- {name: b600, centre_nm: 600, fwhm_nm: 8}"),
        "{study}"
    );
    assert!(
        study.contains("    sensitive: b600\n    isosbestic: b570\n"),
        "{study}"
    );
    assert!(!o.stderr.contains("not complete"), "{}", o.stderr);
    // The lab states its camera's band gains from a white target, as the
    // simulated study does (equal), so both weight the bands alike.
    std::fs::write(
        lab.join("study.yaml"),
        study.replace("fwhm_nm: 8}", "fwhm_nm: 8, gain: 1}"),
    )
    .unwrap();
    // Before the proposals, `check` names the missing segment files and how to make them.
    let o = satstep(tmp.path(), &["check", lab.to_str().unwrap()]);
    assert_eq!(o.code, 1);
    assert!(o.stderr.contains("segments propose"), "{}", o.stderr);
    let o = satstep(tmp.path(), &["segments", "propose", lab.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let o = satstep(tmp.path(), &["--no-progress", "run", lab.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    // The capture times came from the files: the same captures in both.
    // Per method: the RMS difference per capture and kind, and the worst
    // difference of a subject's mean over the session, per kind.
    let compare = |method: &str| {
        let (a, b) = (capture_means(&hand, method), capture_means(&lab, method));
        let common: Vec<_> = a.keys().filter(|k| b.contains_key(*k)).collect();
        assert!(
            common.len() * 10 >= a.len() * 9,
            "{method}: {} of {}",
            common.len(),
            a.len()
        );
        let diffs: Vec<f64> = common.iter().map(|k| b[*k] - a[*k]).collect();
        let rms = (diffs.iter().map(|d| d * d).sum::<f64>() / diffs.len() as f64).sqrt();
        let mut by: BTreeMap<(String, String), Vec<f64>> = BTreeMap::new();
        for (k, d) in common.iter().zip(&diffs) {
            by.entry((k.0.clone(), k.2.clone())).or_default().push(*d);
        }
        let worst = by
            .values()
            .map(|v| (v.iter().sum::<f64>() / v.len() as f64).abs())
            .fold(0.0, f64::max);
        eprintln!(
            "init + propose against hand-made segments, {method}: per capture and kind RMS {rms:.2} points over {}; worst subject and kind mean {worst:.2} points",
            diffs.len()
        );
        (rms, worst)
    };
    // Every method within 1 point of the hand-made segments' SO2, per
    // subject and kind over the session and per capture (RMS).
    for method in ["two-band", "multiband-pointwise", "multiband"] {
        let (rms, worst) = compare(method);
        assert!(
            worst < 1.0,
            "{method}: worst subject × kind difference {worst}"
        );
        assert!(rms < 1.0, "{method}: per-capture RMS difference {rms}");
    }
}
