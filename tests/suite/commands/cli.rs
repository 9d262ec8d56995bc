//! Command-line tests: the real binary on real files in a temporary folder,
//! checking exit status and the exact messages a researcher sees.

use std::path::Path;

use crate::common::*;

#[test]
fn every_ready_protocol_parses_and_plans() {
    let dir = repo().join("protocols");
    let mut n = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let p = entry.unwrap().path();
        if p.extension().and_then(|e| e.to_str()) != Some("yaml") {
            continue;
        }
        n += 1;
        let proto = satstep::config::protocol::load_protocol(&p)
            .unwrap_or_else(|f| panic!("{}: {:?}", p.display(), f.sorted()));
        assert!(proto.epochs.len() >= 3, "{}", p.display());
        let starts = proto.planned_starts();
        assert!(starts.windows(2).all(|w| w[1] > w[0]));
        assert!(!proto.contrasts.is_empty());
        let out = satstep(&dir, &["protocol", "show", p.to_str().unwrap()]);
        assert_eq!(out.code, 0, "{}", out.stderr);
        assert!(out.stdout.contains(&format!("protocol `{}`", proto.name)));
    }
    assert!(n >= 3, "at least three ready protocols, found {n}");
}

#[test]
fn protocol_show_prints_cumulative_times_and_altitude() {
    let out = satstep(
        &repo(),
        &["protocol", "show", "protocols/step-down-hypoxia.yaml"],
    );
    assert_eq!(out.code, 0);
    let lines: Vec<&str> = out.stdout.lines().collect();
    assert!(lines[1].contains("epoch") && lines[1].contains("equivalent altitude"));
    // low-15 starts at 10 min, is steady from 15 min, ends at 22 min; FiO2 0.15 ≈ 2 560 m.
    let low = lines.iter().find(|l| l.contains("low-15")).unwrap();
    let cols: Vec<&str> = low.split_whitespace().collect();
    assert_eq!(
        &cols[..6],
        &["2", "low-15", "10min", "15min", "22min", "12min"]
    );
    // 0.15/0.21·713 + 47 = 556.3 mmHg; ISO 2533 inverse: 2555 m.
    assert!(low.ends_with("0.150  2555 m"), "{low}");
    assert!(out.stdout.contains("total 44min; baseline `air`"));
    let hyper = satstep(&repo(), &["protocol", "show", "protocols/hyperoxia.yaml"]);
    assert!(hyper.stdout.contains("none (hyperoxic)"));
    let alt = satstep(
        &repo(),
        &["protocol", "show", "protocols/simulated-altitude.yaml"],
    );
    assert!(alt.stdout.contains("air at 4000 m"), "{}", alt.stdout);
}

#[test]
fn a_protocol_with_many_mistakes_reports_every_one_with_its_position() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "bad.yaml",
        "\
name: broken
epochs:
  - name: air
    gas: air
    duration: 0s
  - name: air
    gas: {o2_fraction: 1.4}
    duration: 5min
    setle: 1min
  - name: low
    gas: {o2_fraction: 0.15}
    duration: 5min
    settle: 6min
contrasts: [\"low - hyper\"]
",
    );
    let out = satstep(dir.path(), &["protocol", "show", p.to_str().unwrap()]);
    assert_eq!(out.code, 1);
    let f = "bad.yaml";
    let expected = [
        format!(
            "error: {}:5:15: `duration` must be longer than zero",
            p.display()
        ),
        format!(
            "error: {}:6:11: epoch name `air` is used twice (first at line 3)",
            p.display()
        ),
        format!(
            "error: {}:7:24: `o2_fraction` 1.4 is outside 0.05–1.0",
            p.display()
        ),
        format!(
            "error: {}:9:5: unknown key `setle` in an epoch\n  hint: did you mean `settle`?",
            p.display()
        ),
        format!(
            "error: {}:13:13: `settle` (6min) must be shorter than the epoch's `duration` (5min)",
            p.display()
        ),
        format!(
            "error: {}:14:13: contrast `low - hyper` names `hyper`, which is not an epoch",
            p.display()
        ),
    ];
    for e in &expected {
        assert!(
            out.stderr.contains(e.as_str()),
            "missing `{e}` in:\n{}",
            out.stderr
        );
    }
    assert!(
        out.stderr
            .contains(&format!("error: `{}` has 6 errors", p.display())),
        "{}",
        out.stderr
    );
    let _ = f;
}

#[test]
fn a_protocol_without_epochs_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(dir.path(), "empty.yaml", "name: nothing\nepochs: []\n");
    let out = satstep(dir.path(), &["protocol", "show", p.to_str().unwrap()]);
    assert_eq!(out.code, 1);
    assert!(
        out.stderr.contains(":2:9: the protocol has no epochs"),
        "{}",
        out.stderr
    );
}

#[test]
fn check_accepts_a_valid_study_and_writes_nothing() {
    let dir = tempfile::tempdir().unwrap();
    small_study(dir.path(), &[("c1.tif", "2026-05-04T09:05:00+02:00")], "");
    let out = satstep(dir.path(), &["check", "."]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(
        out.stderr
            .contains("is valid: 1 subjects, 1 captures, 2 epochs, 1 methods (0 warnings)"),
        "{}",
        out.stderr
    );
    assert!(!dir.path().join("results").exists());
}

#[test]
fn check_reports_five_different_mistakes_with_positions() {
    let dir = tempfile::tempdir().unwrap();
    small_study(
        dir.path(),
        &[
            ("c1.tif", "2026-05-04T09:05:00+02:00"),
            ("c2.tif", "2026-05-04T09:06:00+02:00"),
        ],
        "        switches: {low: 2026-05-04T07:11:00Z}\n",
    );
    // 1: a capture listed twice; 2: a missing capture file; 3: a bad time stamp in the list.
    write(
        dir.path(),
        "S1/captures.csv",
        "file,time\nc1.tif,2026-05-04T09:05:00+02:00\nc1.tif,2026-05-04T09:06:00+02:00\nc9.tif,2026-05-04T09:07:00+02:00\nc2.tif,2026-05-04 09:08\n",
    );
    // 4: a misspelt key; 5: a band that the instrument does not have.
    let study = std::fs::read_to_string(dir.path().join("study.yaml")).unwrap();
    let study = study
        .replace("  pixel_size_um: 10", "  pixel_size_um: 10\n  pixelsize: 3")
        .replace("sensitive: b600", "sensitive: b610");
    write(dir.path(), "study.yaml", &study);
    let out = satstep(dir.path(), &["check", "study.yaml"]);
    assert_eq!(out.code, 1, "{}", out.stderr);
    let expected = [
        "error: study.yaml:6:3: unknown key `pixelsize` in `instrument`\n  hint: did you mean `pixel_size_um`?",
        "error: study.yaml:22:16: band `b610` is not one of the instrument's bands\n  hint: did you mean `b600`?",
        "error: S1/captures.csv:5:8: `time`: `2026-05-04 09:08` is not a date-time",
        "error: S1/captures.csv:3:1: capture `c1.tif` is listed twice (first at S1/captures.csv:2:1)",
        "error: S1/captures.csv:4:1: capture `c9.tif` does not exist",
    ];
    for e in expected {
        assert!(out.stderr.contains(e), "missing `{e}` in:\n{}", out.stderr);
    }
    assert!(out.stderr.contains("has 5 errors"), "{}", out.stderr);
}

#[test]
fn run_places_captures_at_the_boundaries_as_documented() {
    let dir = tempfile::tempdir().unwrap();
    // The switch to `low` was recorded 60 s late (10:11:00 local = 08:11:00Z),
    // written with another UTC offset.
    small_study(
        dir.path(),
        &[
            ("before.tif", "2026-05-04T08:59:59+02:00"), // before the protocol
            ("settle.tif", "2026-05-04T09:01:00+02:00"), // in air's settle window
            ("air-end.tif", "2026-05-04T02:02:00-05:00"), // 09:02:00+02:00, exactly the end of the settle window
            ("late.tif", "2026-05-04T09:10:30+02:00"), // after the planned switch, before the recorded one
            ("switch.tif", "2026-05-04T07:11:00Z"),    // exactly at the recorded switch
            ("low.tif", "2026-05-04T09:15:00+02:00"),  // steady low
            ("after.tif", "2026-05-04T09:21:00+02:00"), // after the end (switch + 10 min)
        ],
        "        switches: {low: 2026-05-04T07:11:00Z}\n",
    );
    let out = satstep(dir.path(), &["run", "."]);
    // The captures are flat 8×8 test images: they cannot be registered, which
    // the run reports (exit 1) after writing every table.
    assert_eq!(out.code, 1, "{}", out.stderr);
    assert!(
        out.stderr
            .contains("3 steady, 2 settling, 2 outside the protocol"),
        "{}",
        out.stderr
    );
    assert!(
        out.stderr.contains("5 captures could not be analysed"),
        "{}",
        out.stderr
    );
    assert!(
        dir.path()
            .join("results/statistics/contrasts.csv")
            .is_file()
    );
    let csv = std::fs::read_to_string(dir.path().join("results/epochs/captures.csv")).unwrap();
    let rows: Vec<Vec<&str>> = csv
        .lines()
        .skip(1)
        .map(|l| l.split(',').collect())
        .collect();
    let get = |name: &str| {
        rows.iter()
            .find(|r| r[3] == name)
            .unwrap_or_else(|| panic!("{name} in\n{csv}"))
            .clone()
    };
    // columns: subject,session,eye,capture,time,t_s,epoch,t_in_epoch_s,o2_fraction,status,exclusion,spo2,...
    assert_eq!(get("before.tif")[9], "outside");
    assert_eq!(
        (get("settle.tif")[6], get("settle.tif")[9]),
        ("air", "settling")
    );
    assert_eq!(
        (get("air-end.tif")[6], get("air-end.tif")[9]),
        ("air", "steady")
    );
    assert_eq!((get("late.tif")[6], get("late.tif")[9]), ("air", "steady"));
    assert_eq!(
        (
            get("switch.tif")[6],
            get("switch.tif")[9],
            get("switch.tif")[7]
        ),
        ("low", "settling", "0.0")
    );
    assert_eq!((get("low.tif")[6], get("low.tif")[9]), ("low", "steady"));
    assert_eq!(get("after.tif")[9], "outside");
    // Reference: lag 20 s, the log drops from 98 to 90 at 660 s.
    assert_eq!(get("air-end.tif")[11], "98.0");
    assert_eq!((get("low.tif")[11], get("low.tif")[14]), ("90.0", "ok"));
    // 630 s + 20 s lag: window 645–655 s, still 98.
    assert_eq!(get("late.tif")[11], "98.0");
    // 660 s + 20 s: window 675–685 s, 90.
    assert_eq!(get("switch.tif")[11], "90.0");
    let spans = std::fs::read_to_string(dir.path().join("results/epochs/spans.csv")).unwrap();
    assert!(
        spans.contains("S1,s1,low,2026-05-04T09:11:00+02:00,660.0,840.0,1260.0,recorded,0.15"),
        "{spans}"
    );
    assert!(dir.path().join("results/epochs/captures.parquet").is_file());
}

#[test]
fn malformed_inputs_never_panic() {
    let cases: &[(&str, &str)] = &[
        ("study.yaml", ""),
        ("study.yaml", "- just\n- a list\n"),
        ("study.yaml", "study: [unclosed\n"),
        ("study.yaml", "study: x\nstudy: y\n"),
        (
            "study.yaml",
            "study: x\nprotocol: {name: p, epochs: {not: a list}}\ninstrument: 3\nsubjects: nope\n",
        ),
        ("study.yaml", "\u{0}\u{1}binary"),
        (
            "protocol.yaml",
            "name: p\nepochs:\n  - name: a\n    gas: {o2_fraction: abc}\n    duration: -5min\n",
        ),
        (
            "protocol.yaml",
            "name: p\nepochs:\n  - name: a\n    gas: [1]\n    duration: 1h2h\n    settle: {x: 1}\n",
        ),
        (
            "protocol.yaml",
            "name: p\nepochs:\n  - &x {name: a, gas: air, duration: 5min}\n  - *x\n",
        ),
        (
            "protocol.yaml",
            "name: p\nepochs:\n  - name: a\n    gas: {altitude_m: 99999}\n    duration: 5min\nreference: {lag: soon, window: 0s}\n",
        ),
        ("S1/captures.csv", "file\nc1.tif\n"),
        ("S1/captures.csv", "file,time\n\"unclosed,2026\n"),
        ("S1/captures.csv", ""),
        (
            "S1/captures.csv",
            "file,time\nc1.tif,2026-13-45T99:00:00Z\n",
        ),
        (
            "S1/spo2.csv",
            "time,spo2\n2026-05-04T09:00:00+02:00,ninety\n",
        ),
        ("S1/spo2.csv", "when,value\n"),
        ("S1/spo2.csv", "time,spo2\nlater,97\n"),
        (
            "S1/segments-OD.yaml",
            "eye: OS\nsegments:\n  - id: A1\n    kind: artery\n    points: [[1]]\n",
        ),
    ];
    for (file, text) in cases {
        let dir = tempfile::tempdir().unwrap();
        small_study(dir.path(), &[("c1.tif", "2026-05-04T09:05:00+02:00")], "");
        write(dir.path(), file, text);
        for verb in ["check", "run"] {
            let out = satstep(dir.path(), &[verb, "."]);
            assert_eq!(
                out.code, 1,
                "{verb} with {file} = {text:?}:\n{}",
                out.stderr
            );
            assert!(
                out.stderr.contains("error: "),
                "{verb} with {file} = {text:?}:\n{}",
                out.stderr
            );
            assert!(
                !out.stderr.contains("panicked"),
                "{verb} with {file} = {text:?}:\n{}",
                out.stderr
            );
        }
    }
}

#[test]
fn a_missing_study_names_the_path_and_how_to_fix_it() {
    let dir = tempfile::tempdir().unwrap();
    let out = satstep(dir.path(), &["check", "nowhere.yaml"]);
    assert_eq!(out.code, 1);
    assert!(
        out.stderr
            .starts_with("error: nowhere.yaml: cannot read the study file: "),
        "{}",
        out.stderr
    );
    assert!(
        out.stderr
            .contains("hint: give the study file, or a folder that holds `study.yaml`")
    );
}

#[test]
fn usage_errors_exit_1_and_help_exits_0() {
    let dir = tempfile::tempdir().unwrap();
    assert_eq!(satstep(dir.path(), &["frobnicate"]).code, 1);
    assert_eq!(satstep(dir.path(), &["--help"]).code, 0);
    assert_eq!(satstep(dir.path(), &["--jobs", "0", "check", "."]).code, 1);
}

#[test]
fn sensitivity_writes_its_table_and_figure() {
    let dir = tempfile::tempdir().unwrap();
    let study = repo().join("demo-study/study.yaml");
    let out = satstep(
        dir.path(),
        &["sensitivity", study.to_str().unwrap(), "--out", "sens"],
    );
    assert_eq!(out.code, 0, "{}", out.stderr);
    let header = |text: &str| {
        text.lines()
            .filter(|l| l.trim_start().starts_with("veil     b506"))
            .count()
    };
    assert_eq!(
        header(&out.stdout),
        2,
        "one table per weighting: {}",
        out.stdout
    );
    assert!(
        out.stdout.contains("weights refitted at each veil")
            && out.stdout.contains("veil-free band combination held")
    );
    let csv = std::fs::read_to_string(dir.path().join("sens/sensitivity.csv")).unwrap();
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(
        lines[0],
        "method,weights,veil,band,centre_nm,so2_error_points"
    );
    assert_eq!(
        lines.len(),
        1 + 2 * 10 * 9,
        "two weightings × ten veils × (eight bands + all bands)"
    );
    assert!(
        lines[1].starts_with("multiband,refitted,0.0,b506,")
            && lines
                .last()
                .unwrap()
                .starts_with("multiband,held,0.9,all bands,"),
        "{} … {}",
        lines[1],
        lines.last().unwrap()
    );
    let svg = std::fs::read_to_string(dir.path().join("sens/sensitivity.svg")).unwrap();
    assert!(
        svg.starts_with("<svg") && svg.contains("all bands") && svg.contains("combination held")
    );
    assert!(
        std::fs::metadata(dir.path().join("sens/sensitivity.png"))
            .unwrap()
            .len()
            > 10_000
    );
    // The pointwise method linearises the veil too.
    let out = satstep(
        dir.path(),
        &[
            "sensitivity",
            study.to_str().unwrap(),
            "--method",
            "multiband-pointwise",
            "--out",
            "pw",
        ],
    );
    assert_eq!(out.code, 0, "{}", out.stderr);
    let csv = std::fs::read_to_string(dir.path().join("pw/sensitivity.csv")).unwrap();
    assert!(
        csv.lines()
            .nth(1)
            .unwrap()
            .starts_with("multiband-pointwise,refitted,0.0,b506,")
    );
    assert_ne!(
        csv.lines()
            .skip(1)
            .map(|l| l.split(',').next_back().unwrap())
            .collect::<Vec<_>>(),
        lines[1..]
            .iter()
            .map(|l| l.split(',').next_back().unwrap())
            .collect::<Vec<_>>()
    );
    // A candidate subset of the bands: its own figures (a single band's
    // error grows when fewer bands share the load).
    let out = satstep(
        dir.path(),
        &[
            "sensitivity",
            study.to_str().unwrap(),
            "--bands",
            "b522,b548,b570,b586,b600",
            "--out",
            "five",
        ],
    );
    assert_eq!(out.code, 0, "{}", out.stderr);
    let five = std::fs::read_to_string(dir.path().join("five/sensitivity.csv")).unwrap();
    assert_eq!(
        five.lines().count(),
        1 + 2 * 10 * 6,
        "two weightings × ten veils × (five bands + all bands)"
    );
    let at = |csv: &str, band: &str| -> f64 {
        csv.lines()
            .find(|l| l.starts_with(&format!("multiband,refitted,0.0,{band},")))
            .unwrap()
            .split(',')
            .next_back()
            .unwrap()
            .parse()
            .unwrap()
    };
    let eight = std::fs::read_to_string(dir.path().join("sens/sensitivity.csv")).unwrap();
    assert!(
        at(&five, "b600") > at(&eight, "b600"),
        "five bands: {}, eight: {}",
        at(&five, "b600"),
        at(&eight, "b600")
    );
    let out = satstep(
        dir.path(),
        &[
            "sensitivity",
            study.to_str().unwrap(),
            "--bands",
            "b548,b570,b6000",
        ],
    );
    assert_eq!(out.code, 1);
    assert!(
        out.stderr
            .contains("`--bands`: `b6000` is not a band of the instrument")
            && out.stderr.contains("did you mean `b600`"),
        "{}",
        out.stderr
    );
    let out = satstep(
        dir.path(),
        &[
            "sensitivity",
            study.to_str().unwrap(),
            "--bands",
            "b548,b570,b600",
        ],
    );
    assert_eq!(out.code, 1);
    assert!(
        out.stderr
            .contains("`--bands` selects 3 bands; `multiband` needs at least 4"),
        "{}",
        out.stderr
    );
    // An operating point the model cannot describe is refused, naming the option.
    for (args, says) in [
        (
            &["--so2", "150"][..],
            "`--so2` is 150; give a value from 0 to 100 percent",
        ),
        (&["--double-pass", "1.2"][..], "`--double-pass` is 1.2"),
        (&["--hb", "nan"][..], "`--hb` is NaN"),
        (&["--diameter=-5"][..], "`--diameter` is -5"),
    ] {
        let mut a = vec!["sensitivity", study.to_str().unwrap()];
        a.extend(args);
        let out = satstep(dir.path(), &a);
        assert_eq!(out.code, 1, "{args:?}: {}", out.stderr);
        assert!(out.stderr.contains(says), "{args:?}: {}", out.stderr);
    }
    // An instrument with too few bands is refused with a reason.
    write(
        dir.path(),
        "two.yaml",
        "name: two\npixel_size_um: 10\nbands:\n  - {name: a, centre_nm: 570, fwhm_nm: 10}\n  - {name: b, centre_nm: 600, fwhm_nm: 10}\n",
    );
    let out = satstep(dir.path(), &["sensitivity", "two.yaml"]);
    assert_eq!(out.code, 1);
    assert!(
        out.stderr
            .contains("the instrument has 2 bands; `multiband` needs at least 4"),
        "{}",
        out.stderr
    );
}

#[test]
fn mixed_writes_the_four_tables_and_matches_the_reference() {
    let dir = tempfile::tempdir().unwrap();
    let data = repo().join("tests/fixtures/mixed-models/sim_nested_balanced.csv");
    let out = satstep(
        dir.path(),
        &[
            "mixed",
            "--data",
            data.to_str().unwrap(),
            "--response",
            "so2",
            "--fixed",
            "epoch",
            "--random",
            "subject",
            "--random",
            "subject:eye",
            "--reference",
            "epoch=air",
            "--contrast",
            "hypoxia - recovery",
            "--contrast",
            "hypoxia - air",
            "--out",
            "fit",
        ],
    );
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(
        out.stdout.contains("F test for `epoch`: F = 175.047"),
        "{}",
        out.stdout
    );
    let read = |f: &str| std::fs::read_to_string(dir.path().join("fit").join(f)).unwrap();
    let fe = read("fixed_effects.csv");
    assert!(fe.starts_with("term,estimate,se,df,t,p,lower,upper,confidence\n"));
    assert!(
        fe.lines()
            .nth(2)
            .unwrap()
            .starts_with("epoch=hypoxia,-7.9983"),
        "{fe}"
    );
    let c = read("contrasts.csv");
    assert!(
        c.lines()
            .next()
            .unwrap()
            .ends_with(",confidence,p_adjusted,adjustment")
    );
    assert!(
        c.lines()
            .nth(1)
            .unwrap()
            .starts_with("hypoxia - recovery,-6.978265"),
        "{c}"
    );
    let vc = read("variance_components.csv");
    assert_eq!(vc.lines().next().unwrap(), "group,variance,sd");
    assert!(
        vc.contains("subject:eye,2.654") && vc.contains("Residual,6.495"),
        "{vc}"
    );
    assert!(
        read("fit.csv").starts_with("n_obs,criterion,method,converged\n180,895.0418"),
        "{}",
        read("fit.csv")
    );
    // Mistakes name what is wrong.
    let bad = satstep(
        dir.path(),
        &[
            "mixed",
            "--data",
            data.to_str().unwrap(),
            "--response",
            "so3",
            "--fixed",
            "epoch",
            "--random",
            "subject",
        ],
    );
    assert_eq!(bad.code, 1);
    assert!(
        bad.stderr.contains("no column `so3` in the header")
            && bad.stderr.contains("did you mean `so2`?"),
        "{}",
        bad.stderr
    );
    let bad = satstep(
        dir.path(),
        &[
            "mixed",
            "--data",
            data.to_str().unwrap(),
            "--response",
            "so2",
            "--fixed",
            "epoch",
            "--random",
            "subject",
            "--contrast",
            "hypoxia - sea",
        ],
    );
    assert!(
        bad.stderr
            .contains("`sea` is not a level of any fixed factor"),
        "{}",
        bad.stderr
    );
}

/// A study with two subjects listing captures of the same names.
fn two_subject_study(dir: &Path) {
    small_study(
        dir,
        &[
            ("c1.tif", "2026-05-04T09:05:00+02:00"),
            ("c2.tif", "2026-05-04T09:16:00+02:00"),
        ],
        "",
    );
    for f in ["captures.csv", "spo2.csv", "segments-OD.yaml"] {
        let text = std::fs::read_to_string(dir.join("S1").join(f)).unwrap();
        write(dir, &format!("S2/{f}"), &text);
    }
    for f in ["c1.tif", "c2.tif"] {
        write_capture(dir, &format!("S2/{f}"));
    }
    let study = std::fs::read_to_string(dir.join("study.yaml")).unwrap();
    let s2 = "  - id: S2\n    sessions:\n      - id: s1\n        start: 2026-05-04T09:00:00+02:00\n        eyes: [OD]\n        captures: S2/captures.csv\n        reference: {file: S2/spo2.csv}\n        segments: {OD: S2/segments-OD.yaml}\nmethods:\n";
    write(dir, "study.yaml", &study.replacen("methods:\n", s2, 1));
}

fn with_exclusion(dir: &Path, file: &str) {
    let study = std::fs::read_to_string(dir.join("study.yaml")).unwrap();
    write(
        dir,
        "study.yaml",
        &format!("{study}exclusions:\n  captures: [{{file: {file}, reason: blink}}]\n"),
    );
}

#[test]
fn an_excluded_capture_is_named_by_its_path_in_the_study_folder() {
    // As the README writes it: relative to the study file's folder. It
    // excludes that capture of that subject and no other.
    let dir = tempfile::tempdir().unwrap();
    two_subject_study(dir.path());
    with_exclusion(dir.path(), "S2/c2.tif");
    // (The tiny flat test captures do not register, so the run ends with 1.)
    let out = satstep(dir.path(), &["run", "."]);
    assert!(out.stderr.contains("1 excluded"), "{}", out.stderr);
    let csv = std::fs::read_to_string(dir.path().join("results/epochs/captures.csv")).unwrap();
    let excluded: Vec<(&str, &str)> = csv
        .lines()
        .filter(|l| l.contains(",excluded,"))
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (f[0], f[3])
        })
        .collect();
    assert_eq!(excluded, [("S2", "c2.tif")], "{csv}");
}

#[test]
fn an_exclusion_that_names_no_capture_or_several_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    two_subject_study(dir.path());
    with_exclusion(dir.path(), "S2/c3.tif");
    let out = satstep(dir.path(), &["check", "."]);
    assert_eq!(out.code, 1, "{}", out.stderr);
    assert!(
        out.stderr
            .contains("excluded capture `S2/c3.tif` is not a listed capture"),
        "{}",
        out.stderr
    );
    assert!(
        out.stderr.contains("did you mean `S2/c1.tif`?")
            || out.stderr.contains("did you mean `S2/c2.tif`?"),
        "{}",
        out.stderr
    );

    // As a capture list writes it, the name is in both subjects' lists.
    let dir = tempfile::tempdir().unwrap();
    two_subject_study(dir.path());
    with_exclusion(dir.path(), "c2.tif");
    let out = satstep(dir.path(), &["check", "."]);
    assert_eq!(out.code, 1, "{}", out.stderr);
    assert!(
        out.stderr.contains(
            "excluded capture `c2.tif` names 2 captures: `S1/c2.tif` (subject S1), `S2/c2.tif` (subject S2)"
        ),
        "{}",
        out.stderr
    );

    // As the list writes it, and only one subject lists it: accepted.
    let dir = tempfile::tempdir().unwrap();
    small_study(dir.path(), &[("c1.tif", "2026-05-04T09:05:00+02:00")], "");
    with_exclusion(dir.path(), "c1.tif");
    let out = satstep(dir.path(), &["check", "."]);
    assert_eq!(out.code, 0, "{}", out.stderr);
}
