//! The stage runner: what reruns when something changes, byte-identical
//! results whatever `--jobs`, an interrupted run resumed, corrupt cache
//! entries recomputed. Uses a simulated study of 33 captures.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use crate::common::*;

/// Everything but the cache and the manifests (which hold times).
const VOLATILE: &[&str] = &["cache", "manifest"];

const SCENARIO: &str = "tests/fixtures/runner-scenario.yaml";

fn run(dir: &Path, study: &Path, extra: &[&str]) -> Output {
    let mut args: Vec<&str> = vec!["run", study.to_str().unwrap()];
    args.extend(extra);
    let o = satstep(dir, &args);
    assert_eq!(o.code, 0, "{}", o.stderr);
    o
}

/// The status line the runner printed for `stage`.
fn line<'a>(o: &'a Output, stage: &str) -> &'a str {
    o.stderr
        .lines()
        .find(|l| l.starts_with(&format!("{stage:<13} ")))
        .unwrap_or_else(|| panic!("no line for `{stage}` in\n{}", o.stderr))
}

fn edit(path: &Path, from: &str, to: &str) {
    let text = std::fs::read_to_string(path).unwrap();
    assert!(text.contains(from), "{from:?} not in {}", path.display());
    std::fs::write(path, text.replacen(from, to, 1)).unwrap();
}

#[test]
fn only_what_changed_reruns() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), SCENARIO, "s");
    let first = run(dir.path(), &s, &[]);
    for st in ["epochs", "transmissions", "fits", "statistics", "report"] {
        assert!(
            line(&first, st).contains("ran (no earlier result)"),
            "{}",
            first.stderr
        );
    }
    let before = hashes_except(&s.join("results"), VOLATILE);

    // Nothing changed: every stage is up to date and nothing is rewritten.
    let t0 = Instant::now();
    let second = run(dir.path(), &s, &[]);
    for st in ["epochs", "transmissions", "fits", "statistics", "report"] {
        assert!(
            line(&second, st).contains("up to date"),
            "{}",
            second.stderr
        );
    }
    assert!(
        t0.elapsed() < Duration::from_secs(60),
        "a no-change run recomputed something"
    );
    assert_eq!(before, hashes_except(&s.join("results"), VOLATILE));

    // A statistics setting: only statistics runs.
    let study = s.join("study.yaml");
    edit(
        &study,
        "output: results",
        "statistics: {confidence: 0.9}\noutput: results",
    );
    let third = run(dir.path(), &s, &[]);
    for st in ["epochs", "transmissions", "fits"] {
        assert!(line(&third, st).contains("up to date"), "{}", third.stderr);
    }
    assert!(
        line(&third, "statistics").contains("ran (settings changed)"),
        "{}",
        third.stderr
    );
    assert!(third.stderr.contains("(90 % CI"), "{}", third.stderr);
    assert!(
        line(&third, "report").contains("`statistics` changed"),
        "{}",
        third.stderr
    );
    let contrasts = std::fs::read_to_string(s.join("results/report/tables/contrasts.csv")).unwrap();
    assert!(
        contrasts.lines().next().unwrap().contains("90 % CI"),
        "{contrasts}"
    );

    // A method setting: fits and statistics run, images do not.
    edit(&study, "huber_scale: 1.5", "huber_scale: 2.0");
    let fourth = run(dir.path(), &s, &[]);
    assert!(
        line(&fourth, "transmissions").contains("up to date"),
        "{}",
        fourth.stderr
    );
    assert!(
        line(&fourth, "fits").contains("ran (settings changed)"),
        "{}",
        fourth.stderr
    );
    assert!(
        line(&fourth, "statistics").contains("ran (`fits` changed)"),
        "{}",
        fourth.stderr
    );

    // One capture's content: that capture alone is analysed again.
    let tif = s.join("subjects/V02/captures/c005.tif");
    let img = satstep::images::ingest::read_capture(&tif, 4, None).unwrap();
    let pages: Vec<Vec<u16>> = img
        .bands
        .iter()
        .map(|b| b.iter().map(|v| (*v as u16).saturating_add(3)).collect())
        .collect();
    satstep::simulate::render::write_tiff(&tif, img.width, img.height, &pages).unwrap();
    let fifth = run(dir.path(), &s, &[]);
    assert!(
        line(&fifth, "epochs").contains("up to date"),
        "{}",
        fifth.stderr
    );
    assert!(
        line(&fifth, "transmissions")
            .contains("ran (input files changed): 33 captures: 1 computed, 32 from the cache"),
        "{}",
        fifth.stderr
    );

    // --force reruns a stage (and what depends on it) without its item cache.
    let forced = run(dir.path(), &s, &["--force", "fits"]);
    assert!(
        line(&forced, "transmissions").contains("up to date"),
        "{}",
        forced.stderr
    );
    assert!(
        line(&forced, "fits").contains("ran (forced with --force)"),
        "{}",
        forced.stderr
    );
    assert!(
        line(&forced, "fits").contains("0 from the cache"),
        "{}",
        forced.stderr
    );
    assert!(
        line(&forced, "statistics").contains("up to date"),
        "same fits, same statistics: {}",
        forced.stderr
    );

    // A deleted output table is restored from the cache.
    std::fs::remove_file(s.join("results/fits/so2.csv")).unwrap();
    let sixth = run(dir.path(), &s, &[]);
    assert!(
        line(&sixth, "fits").contains("up to date: rewrote 1 missing or altered output files"),
        "{}",
        sixth.stderr
    );
    assert!(s.join("results/fits/so2.csv").is_file());
}

/// Keys depend on what the study says and what its files hold, not on how
/// its path was typed or where its folder lies.
#[test]
fn a_study_typed_otherwise_or_moved_is_up_to_date() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), SCENARIO, "s");
    run(dir.path(), Path::new("s"), &[]);
    let before = hashes_except(&s.join("results"), VOLATILE);
    let moved = dir.path().join("elsewhere/s2");
    std::fs::create_dir_all(moved.parent().unwrap()).unwrap();
    for (cwd, study) in [
        (dir.path().to_path_buf(), s.clone()),
        (s.clone(), PathBuf::from(".")),
        (s.join("subjects"), PathBuf::from("../study.yaml")),
    ] {
        let o = run(&cwd, &study, &[]);
        for st in ["epochs", "transmissions", "fits", "statistics", "report"] {
            assert!(line(&o, st).contains("up to date"), "{}", o.stderr);
        }
    }
    std::fs::rename(&s, &moved).unwrap();
    for (cwd, study) in [
        (dir.path().to_path_buf(), moved.clone()),
        (moved.clone(), PathBuf::from(".")),
    ] {
        let o = run(&cwd, &study, &[]);
        for st in ["epochs", "transmissions", "fits", "statistics", "report"] {
            assert!(line(&o, st).contains("up to date"), "{}", o.stderr);
        }
    }
    assert_eq!(before, hashes_except(&moved.join("results"), VOLATILE));
}

#[test]
fn results_are_identical_whatever_the_jobs() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (
        simulated(dir.path(), SCENARIO, "a"),
        simulated(dir.path(), SCENARIO, "b"),
    );
    run(dir.path(), &a, &["--jobs", "1"]);
    run(dir.path(), &b, &["--jobs", "2"]);
    let (ha, hb) = (
        hashes_except(&a.join("results"), VOLATILE),
        hashes_except(&b.join("results"), VOLATILE),
    );
    assert!(ha.len() >= 16, "{ha:?}");
    assert_eq!(ha, hb);
}

#[test]
fn a_killed_run_resumes_to_the_same_results() {
    let dir = tempfile::tempdir().unwrap();
    let (whole, killed) = (
        simulated(dir.path(), SCENARIO, "whole"),
        simulated(dir.path(), SCENARIO, "killed"),
    );
    run(dir.path(), &whole, &[]);

    // Start on one thread, kill -9 once some captures are in the cache.
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_satstep"))
        .args(["--jobs", "1", "run", killed.to_str().unwrap()])
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let items = killed.join("results/cache/items/transmissions");
    let t0 = Instant::now();
    // Finished entries only (`.bin`; a write in flight is a hidden temporary file).
    let finished = || {
        std::fs::read_dir(&items)
            .map(|d| {
                d.filter(|e| {
                    e.as_ref()
                        .unwrap()
                        .path()
                        .extension()
                        .is_some_and(|x| x == "bin")
                })
                .count()
            })
            .unwrap_or(0)
    };
    while finished() < 4 {
        assert!(
            t0.elapsed() < Duration::from_secs(120),
            "no capture was cached"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    child.kill().unwrap();
    child.wait().unwrap();
    assert!(
        !killed.join("results/manifest.json").exists(),
        "the run finished before it was killed"
    );

    let resumed = run(dir.path(), &killed, &[]);
    let l = line(&resumed, "transmissions");
    let hits: usize = l
        .split(" computed, ")
        .nth(1)
        .unwrap()
        .split(' ')
        .next()
        .unwrap()
        .parse()
        .unwrap();
    assert!(hits >= 4, "{l}");
    assert_eq!(
        hashes_except(&whole.join("results"), VOLATILE),
        hashes_except(&killed.join("results"), VOLATILE)
    );
}

#[test]
fn a_corrupt_cache_entry_is_a_warning_and_is_recomputed() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), SCENARIO, "s");
    run(dir.path(), &s, &[]);
    let before = hashes_except(&s.join("results"), VOLATILE);
    let cache = s.join("results/cache");
    let first_file = |d: PathBuf| {
        std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().path())
            .min()
            .unwrap()
    };
    // The transmissions stage's stored result, and one capture's entry: one
    // truncated, one overwritten with text.
    let stage_entry = first_file(cache.join("results/transmissions"));
    let bytes = std::fs::read(&stage_entry).unwrap();
    std::fs::write(&stage_entry, &bytes[..bytes.len() / 2]).unwrap();
    let item = first_file(cache.join("items/transmissions"));
    std::fs::write(&item, "not a cache entry").unwrap();

    let o = run(dir.path(), &s, &[]);
    assert!(
        o.stderr.contains(&format!(
            "warning: cache entry `{}` is unusable (checksum mismatch",
            stage_entry.display()
        )),
        "{}",
        o.stderr
    );
    assert!(
        o.stderr.contains(&format!(
            "warning: cache entry `{}` is unusable (not a satstep cache entry",
            item.display()
        )),
        "{}",
        o.stderr
    );
    assert!(
        line(&o, "transmissions").contains(
            "ran (its cached result was unusable): 33 captures: 1 computed, 32 from the cache"
        ),
        "{}",
        o.stderr
    );
    assert_eq!(before, hashes_except(&s.join("results"), VOLATILE));
    let manifest = std::fs::read_to_string(s.join("results/manifest.json")).unwrap();
    assert!(
        manifest.contains("is unusable"),
        "the manifest keeps the warnings"
    );
}

#[test]
fn the_manifest_says_what_was_run_on_what() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), SCENARIO, "s");
    run(dir.path(), &s, &[]);
    let m: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(s.join("results/manifest.json")).unwrap())
            .unwrap();
    assert_eq!(m["tool"], "satstep");
    assert_eq!(m["version"], env!("CARGO_PKG_VERSION"));
    assert_eq!(m["study"]["id"], "test-runner");
    assert_eq!(m["seeds"]["simulation"], "11");
    let inputs = m["inputs"].as_array().unwrap();
    // Study, protocol, per subject: capture list, log, segments; 33 captures.
    assert_eq!(inputs.len(), 2 + 3 * 3 + 33, "{inputs:?}");
    assert!(
        inputs
            .iter()
            .all(|f| f["sha256"].as_str().unwrap().len() == 64)
    );
    let stages: Vec<&str> = m["stages"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["stage"].as_str().unwrap())
        .collect();
    assert_eq!(
        stages,
        [
            "epochs",
            "transmissions",
            "fits",
            "statistics",
            "power",
            "report"
        ]
    );
    assert_eq!(m["captures"]["listed"], 33);
    assert_eq!(m["captures"]["not_used"]["settling"], 9);
    assert_eq!(m["exit_status"], 0);
    // One manifest per run is kept.
    run(dir.path(), &s, &[]);
    let kept = std::fs::read_dir(s.join("results/manifests"))
        .unwrap()
        .count();
    assert_eq!(kept, 2);
}
