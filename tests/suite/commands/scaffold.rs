//! What helps a lab start: the JSON Schemas (checked with Python's
//! `jsonschema` against the demo study, every ready protocol and a
//! segment file), shell completions and manual pages generated from the
//! command line's own definitions, and `init`'s errors.

use std::process::Command;

use crate::common::{repo, satstep};

/// Python with `jsonschema` and `yaml`: `.ci/run` installs both; without
/// them the check is skipped outside CI and fails in CI.
fn python_with_jsonschema() -> bool {
    let ok = Command::new("python3")
        .args(["-c", "import jsonschema, yaml"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    if !ok {
        assert!(
            std::env::var_os("CI").is_none(),
            "python3 with jsonschema and pyyaml is needed for this test in CI; .ci/run installs them"
        );
        eprintln!("skipped: python3 with jsonschema and pyyaml is not installed");
    }
    ok
}

/// Validates each YAML file against the schema; returns Python's report.
fn validate(schema: &std::path::Path, files: &[std::path::PathBuf]) -> (bool, String) {
    // YAML 1.2 (as editors read it) has no timestamp type: date-times
    // stay strings, as satstep reads them.
    let script = "import json, sys, yaml, jsonschema\n\
        class L(yaml.SafeLoader): pass\n\
        L.yaml_implicit_resolvers = {k: [r for r in v if r[0] != 'tag:yaml.org,2002:timestamp'] for k, v in L.yaml_implicit_resolvers.items()}\n\
        schema = json.load(open(sys.argv[1]))\n\
        jsonschema.Draft202012Validator.check_schema(schema)\n\
        v = jsonschema.Draft202012Validator(schema)\n\
        bad = 0\n\
        for f in sys.argv[2:]:\n\
        \x20   for e in v.iter_errors(yaml.load(open(f), Loader=L)):\n\
        \x20       bad += 1\n\
        \x20       print(f, list(e.absolute_path), e.message)\n\
        sys.exit(1 if bad else 0)\n";
    let mut cmd = Command::new("python3");
    cmd.arg("-c").arg(script).arg(schema);
    for f in files {
        cmd.arg(f);
    }
    let o = cmd.output().unwrap();
    (
        o.status.success(),
        String::from_utf8_lossy(&o.stdout).into_owned() + &String::from_utf8_lossy(&o.stderr),
    )
}

#[test]
fn the_schemas_accept_satsteps_own_files_and_catch_a_misspelt_key() {
    if !python_with_jsonschema() {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let write_schema = |which: &str| {
        let o = satstep(tmp.path(), &["schema", which]);
        assert_eq!(o.code, 0, "{}", o.stderr);
        let p = tmp.path().join(format!("{which}.json"));
        std::fs::write(&p, o.stdout).unwrap();
        p
    };
    let study = write_schema("study");
    let protocol = write_schema("protocol");
    let segments = write_schema("segments");
    let (ok, why) = validate(&study, &[repo().join("demo-study/study.yaml")]);
    assert!(ok, "{why}");
    let protocols: Vec<_> = std::fs::read_dir(repo().join("protocols"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    let (ok, why) = validate(&protocol, &protocols);
    assert!(ok, "{why}");
    let seg = tmp.path().join("segments-OD.yaml");
    std::fs::write(
        &seg,
        "eye: OD\nsegments:\n  - id: A1\n    kind: arteriole\n    points: [[1, 2], [30.5, 4]]\n    proposed: {kind_confidence: 0.97, diameter_um: 110.0, odr: 0.41}\n",
    )
    .unwrap();
    let (ok, why) = validate(&segments, std::slice::from_ref(&seg));
    assert!(ok, "{why}");
    // A misspelt key is caught where the readers would refuse it.
    let typo = tmp.path().join("typo.yaml");
    std::fs::write(
        &typo,
        std::fs::read_to_string(repo().join("demo-study/study.yaml"))
            .unwrap()
            .replace("pixel_size_um", "pixel_size"),
    )
    .unwrap();
    let (ok, why) = validate(&study, &[typo]);
    assert!(!ok && why.contains("pixel_size"), "{why}");
}

#[test]
fn completions_and_manual_pages_come_from_the_command_line() {
    let tmp = tempfile::tempdir().unwrap();
    let o = satstep(tmp.path(), &["completions", "bash"]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    for word in [
        "propose",
        "init",
        "--time-from",
        "--name-pattern",
        "--shard",
    ] {
        assert!(o.stdout.contains(word), "bash completions lack {word}");
    }
    let o = satstep(tmp.path(), &["completions", "zsh"]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(o.stdout.contains("#compdef satstep"));
    let man = tmp.path().join("man");
    let o = satstep(tmp.path(), &["manual", "--out", man.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let page = std::fs::read_to_string(man.join("satstep.1")).unwrap();
    assert!(
        page.starts_with(".ie") || page.contains(".TH satstep"),
        "{page}"
    );
    let init = std::fs::read_to_string(man.join("satstep-init.1")).unwrap();
    assert!(init.contains("time\\-from"), "{init}");
    assert!(man.join("satstep-segments-propose.1").is_file());
    // `man` itself reads the page, where it is installed.
    if let Ok(o) = Command::new("man")
        .arg(man.join("satstep-init.1"))
        .env("MANWIDTH", "100")
        .output()
    {
        if o.status.success() {
            let text = String::from_utf8_lossy(&o.stdout);
            assert!(text.contains("--name-pattern"), "{text}");
        }
    }
}

#[test]
fn init_refuses_what_it_cannot_do_and_keeps_a_study_file() {
    let tmp = tempfile::tempdir().unwrap();
    let lab = tmp.path().join("lab");
    std::fs::create_dir_all(lab.join("S1")).unwrap();
    // A capture without a DateTime tag: times must then come from names.
    crate::common::write_capture(&lab, "S1/capture_20260501_091500.tif");
    let o = satstep(tmp.path(), &["init", lab.to_str().unwrap()]);
    assert_eq!(o.code, 1);
    assert!(o.stderr.contains("has no DateTime tag"), "{}", o.stderr);
    assert!(o.stderr.contains("--time-from name"), "{}", o.stderr);
    assert!(!lab.join("study.yaml").exists());
    let o = satstep(
        tmp.path(),
        &[
            "init",
            lab.to_str().unwrap(),
            "--time-from",
            "name",
            "--name-pattern",
            "capture_%Y%m%d_%H%M%S",
            "--utc-offset",
            "+02:00",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr.contains("the instrument is not complete"),
        "{}",
        o.stderr
    );
    let list = std::fs::read_to_string(lab.join("S1/captures-s1.csv")).unwrap();
    assert_eq!(
        list,
        "file,time\ncapture_20260501_091500.tif,2026-05-01T09:15:00+02:00\n"
    );
    // The skeleton names what is missing at its line and column.
    let o = satstep(tmp.path(), &["check", lab.to_str().unwrap()]);
    assert_eq!(o.code, 1);
    assert!(o.stderr.contains("study.yaml:"), "{}", o.stderr);
    // A second `init` keeps the study file.
    std::fs::write(lab.join("study.yaml"), "edited\n").unwrap();
    let o = satstep(tmp.path(), &["init", lab.to_str().unwrap()]);
    assert_eq!(o.code, 1);
    assert_eq!(
        std::fs::read_to_string(lab.join("study.yaml")).unwrap(),
        "edited\n"
    );
    // An unknown protocol name says which exist.
    let o = satstep(
        tmp.path(),
        &[
            "init",
            lab.to_str().unwrap(),
            "--force",
            "--protocol",
            "step-up",
        ],
    );
    assert_eq!(o.code, 1);
    assert!(o.stderr.contains("step-down-hypoxia"), "{}", o.stderr);
}
