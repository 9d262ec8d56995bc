//! Beyond one process: a run split into shards (`run --shard I/N`), the
//! Slurm scripts that schedule them (`cluster slurm`; the run under a real
//! Slurm is `tests/cluster/slurm-check`, started by `.ci/slurm`), and the
//! pooled analysis of several sites' runs (`pool`).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use crate::common::{satstep, simulated};

/// Every file a run wrote, by path, except what records when and how it
/// ran (the manifests) and the cache.
fn outputs(results: &Path) -> BTreeMap<String, Vec<u8>> {
    fn walk(root: &Path, dir: &Path, out: &mut BTreeMap<String, Vec<u8>>) {
        for e in std::fs::read_dir(dir).unwrap().flatten() {
            let p = e.path();
            let rel = p
                .strip_prefix(root)
                .unwrap()
                .to_string_lossy()
                .replace('\\', "/");
            if rel == "cache" || rel == "manifests" || rel == "manifest.json" || rel == "cluster" {
                continue;
            }
            if p.is_dir() {
                walk(root, &p, out);
            } else {
                out.insert(rel, std::fs::read(&p).unwrap());
            }
        }
    }
    let mut out = BTreeMap::new();
    walk(results, results, &mut out);
    out
}

/// The item cache entries of one stage.
fn items(results: &Path, stage: &str) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(results.join("cache/items").join(stage))
        .map(|d| {
            d.flatten()
                .map(|e| e.file_name().to_string_lossy().to_string())
                .filter(|n| n.ends_with(".bin"))
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap().flatten() {
        let p = e.path();
        if p.is_dir() {
            copy_dir(&p, &to.join(e.file_name()));
        } else {
            std::fs::copy(&p, to.join(e.file_name())).unwrap();
        }
    }
}

#[test]
fn three_concurrent_shards_and_a_final_run_equal_a_plain_run_byte_for_byte() {
    let tmp = tempfile::tempdir().unwrap();
    let plain = simulated(tmp.path(), "tests/fixtures/sites-scenario.yaml", "plain");
    let sharded = tmp.path().join("sharded");
    copy_dir(&plain, &sharded);
    let o = satstep(
        tmp.path(),
        &["--no-progress", "run", plain.to_str().unwrap()],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);

    // The three shards at once, as separate processes on one cache folder.
    let children: Vec<_> = (1..=3)
        .map(|i| {
            Command::new(env!("CARGO_BIN_EXE_satstep"))
                .args(["--no-progress", "--jobs", "1", "run"])
                .arg(&sharded)
                .args(["--shard", &format!("{i}/3")])
                .env("NO_COLOR", "1")
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::piped())
                .spawn()
                .unwrap()
        })
        .collect();
    let mut per_shard = Vec::new();
    for (i, c) in children.into_iter().enumerate() {
        let out = c.wait_with_output().unwrap();
        let err = String::from_utf8_lossy(&out.stderr).to_string();
        assert_eq!(out.status.code(), Some(0), "shard {}: {err}", i + 1);
        assert!(err.contains(&format!("shard {}/3 done", i + 1)), "{err}");
        // A shard writes no table, no report and no manifest.
        assert!(!sharded.join("results/manifest.json").exists());
        assert!(!sharded.join("results/statistics").exists());
        per_shard.push(err);
    }
    // Together the shards computed every capture once: the same items as
    // the plain run, none twice (each shard's count adds up to the whole).
    let whole = items(&plain.join("results"), "transmissions");
    assert!(whole.len() > 20, "{}", whole.len());
    assert_eq!(items(&sharded.join("results"), "transmissions"), whole);
    assert_eq!(
        items(&sharded.join("results"), "fits"),
        items(&plain.join("results"), "fits")
    );
    let computed: usize = per_shard
        .iter()
        .map(|e| {
            let line = e.lines().find(|l| l.starts_with("transmissions")).unwrap();
            let n = line.split(" captures: ").nth(1).unwrap();
            n.split(' ').next().unwrap().parse::<usize>().unwrap()
        })
        .sum();
    assert_eq!(computed, whole.len(), "{per_shard:?}");
    assert!(
        per_shard.iter().all(|e| !e.contains(": 0 computed")),
        "every shard has captures of its own: {per_shard:?}"
    );

    // The final plain run finds every item cached and writes what the plain run wrote.
    let o = satstep(
        tmp.path(),
        &["--no-progress", "run", sharded.to_str().unwrap()],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr.contains(&format!(
            "{n} captures: 0 computed, {n} from the cache",
            n = whole.len()
        )),
        "{}",
        o.stderr
    );
    let (a, b) = (
        outputs(&plain.join("results")),
        outputs(&sharded.join("results")),
    );
    assert!(a.len() > 30, "{}", a.len());
    assert_eq!(a.keys().collect::<Vec<_>>(), b.keys().collect::<Vec<_>>());
    for (k, v) in &a {
        assert!(
            b[k] == *v,
            "`{k}` differs between the plain and the sharded run"
        );
    }

    // A rerun of one shard is idempotent: everything it owns is cached.
    let o = satstep(
        tmp.path(),
        &[
            "--no-progress",
            "run",
            sharded.to_str().unwrap(),
            "--shard",
            "2/3",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(o.stderr.contains(" 0 computed"), "{}", o.stderr);
}

#[test]
fn a_shard_that_is_not_one_is_refused() {
    let tmp = tempfile::tempdir().unwrap();
    for bad in ["0/3", "4/3", "3", "a/b", "1/0"] {
        let o = satstep(tmp.path(), &["run", "nowhere", "--shard", bad]);
        assert_eq!(o.code, 1, "{bad}");
        assert!(
            o.stderr.contains("write `I/N` with 1 ≤ I ≤ N"),
            "{bad}: {}",
            o.stderr
        );
    }
}

#[test]
fn slurm_scripts_run_the_shards_as_an_array_and_the_final_run_after_them() {
    let tmp = tempfile::tempdir().unwrap();
    let study = simulated(tmp.path(), "tests/fixtures/sites-scenario.yaml", "study");
    let o = satstep(
        tmp.path(),
        &[
            "cluster",
            "slurm",
            study.to_str().unwrap(),
            "--shards",
            "5",
            "--partition",
            "short",
            "--mem",
            "3G",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let dir = study.join("results/cluster");
    let shards = std::fs::read_to_string(dir.join("shards.sbatch")).unwrap();
    let finish = std::fs::read_to_string(dir.join("finish.sbatch")).unwrap();
    let submit = std::fs::read_to_string(dir.join("submit.sh")).unwrap();
    assert!(shards.starts_with("#!/bin/bash\n"));
    for line in [
        "#SBATCH --array=1-5",
        "#SBATCH --partition=short",
        "#SBATCH --mem=3G",
        "#SBATCH --cpus-per-task=2",
        "--shard \"${SLURM_ARRAY_TASK_ID}/5\"",
    ] {
        assert!(shards.contains(line), "{line} in\n{shards}");
    }
    // The time request is estimated (not given): whole minutes.
    assert!(shards.contains("#SBATCH --time=00:"), "{shards}");
    assert!(
        !finish.contains("--shard") && finish.contains(" run '"),
        "{finish}"
    );
    assert!(
        submit.contains("--dependency=afterok:\"$shards\""),
        "{submit}"
    );
    assert!(o.stdout.contains("submit.sh"), "{}", o.stdout);
    // The scripts are valid shell.
    for f in ["shards.sbatch", "finish.sbatch", "submit.sh"] {
        let o = Command::new("bash")
            .arg("-n")
            .arg(dir.join(f))
            .output()
            .unwrap();
        assert!(
            o.status.success(),
            "{f}: {}",
            String::from_utf8_lossy(&o.stderr)
        );
    }
}

/// The simulated study file with only some subjects (and a site for each,
/// when `sites` names one), written beside it as `name.yaml`.
fn study_with(folder: &Path, name: &str, keep: &[&str], sites: &BTreeMap<&str, &str>) -> PathBuf {
    let text = std::fs::read_to_string(folder.join("study.yaml")).unwrap();
    let (head, rest) = text.split_once("subjects:\n").unwrap();
    let (body, tail) = rest.split_once("methods:\n").unwrap();
    let mut out = format!("{head}subjects:\n");
    for block in format!("\n{body}")
        .split("\n  - id: ")
        .filter(|b| !b.trim().is_empty())
    {
        let id = block.lines().next().unwrap().trim();
        if keep.contains(&id) {
            out.push_str(&format!("  - id: {id}\n"));
            if let Some(site) = sites.get(id) {
                out.push_str(&format!("    site: {site}\n"));
            }
            out.push_str(block.split_once('\n').unwrap().1);
            out.push('\n');
        }
    }
    out.push_str("methods:\n");
    out.push_str(&tail.replace("output: results", &format!("output: results-{name}")));
    let p = folder.join(format!("{name}.yaml"));
    std::fs::write(&p, out).unwrap();
    p
}

/// (method, kind, contrast) → (estimate, se, df, test).
type Contrasts = BTreeMap<(String, String, String), (f64, f64, f64, String)>;

/// `statistics/contrasts.csv`.
fn contrasts(results: &Path) -> Contrasts {
    let mut r = csv::Reader::from_path(results.join("statistics/contrasts.csv")).unwrap();
    let h = r.headers().unwrap().clone();
    let col = |n: &str| {
        h.iter()
            .position(|x| x == n)
            .unwrap_or_else(|| panic!("{n}"))
    };
    r.records()
        .map(|rec| {
            let rec = rec.unwrap();
            let f = |n: &str| rec[col(n)].parse::<f64>().unwrap_or(f64::NAN);
            (
                (
                    rec[col("method")].to_string(),
                    rec[col("kind")].to_string(),
                    rec[col("contrast")].to_string(),
                ),
                (
                    f("estimate"),
                    f("se"),
                    f("df"),
                    rec[col("test")].to_string(),
                ),
            )
        })
        .collect()
}

#[test]
fn pooling_two_sites_gives_the_single_run_with_a_site_term() {
    let tmp = tempfile::tempdir().unwrap();
    let folder = simulated(tmp.path(), "tests/fixtures/sites-scenario.yaml", "study");
    let site = BTreeMap::from([
        ("V01", "north"),
        ("V02", "north"),
        ("V03", "south"),
        ("V04", "south"),
    ]);
    let all = study_with(&folder, "all", &["V01", "V02", "V03", "V04"], &site);
    let north = study_with(&folder, "north", &["V01", "V02"], &BTreeMap::new());
    let south = study_with(&folder, "south", &["V03", "V04"], &BTreeMap::new());
    for s in [&all, &north, &south] {
        let o = satstep(tmp.path(), &["--no-progress", "run", s.to_str().unwrap()]);
        assert_eq!(o.code, 0, "{}: {}", s.display(), o.stderr);
    }
    let pooled = tmp.path().join("pooled");
    let o = satstep(
        tmp.path(),
        &[
            "--no-progress",
            "pool",
            &format!("north={}", folder.join("results-north").display()),
            &format!("south={}", folder.join("results-south").display()),
            "--out",
            pooled.to_str().unwrap(),
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);

    // The single run's epoch model carries the site, as a fixed effect.
    let single = contrasts(&folder.join("results-all"));
    let pooled_c = contrasts(&pooled);
    assert!(single.len() >= 6, "{single:?}");
    assert_eq!(
        single.keys().collect::<Vec<_>>(),
        pooled_c.keys().collect::<Vec<_>>()
    );
    for (k, a) in &single {
        let b = &pooled_c[k];
        assert_eq!(a.3, b.3, "{k:?}: test used");
        for (x, y, what) in [(a.0, b.0, "estimate"), (a.1, b.1, "se"), (a.2, b.2, "df")] {
            assert!(
                (x - y).abs() <= 1e-6 * x.abs().max(1.0),
                "{k:?} {what}: single {x} pooled {y}"
            );
        }
    }
    for dir in [folder.join("results-all"), pooled.clone()] {
        let models = std::fs::read_to_string(dir.join("statistics/models.csv")).unwrap();
        assert!(
            models.contains("so2 ~ epoch + site + (1 | subject)"),
            "{models}"
        );
    }
    let north =
        std::fs::read_to_string(folder.join("results-north/statistics/models.csv")).unwrap();
    assert!(!north.contains("site"), "{north}");
    // The two-band method was recalibrated on the pooled cohort: its SO2
    // equal the single run's, not the sites' own.
    let so2 = |p: &Path| std::fs::read_to_string(p.join("fits/so2.csv")).unwrap();
    assert_eq!(
        so2(&pooled).lines().count(),
        so2(&folder.join("results-all")).lines().count()
    );

    // Provenance: the pooled manifest names both sites' manifests by hash.
    let manifest: serde_json::Value =
        serde_json::from_slice(&std::fs::read(pooled.join("manifest.json")).unwrap()).unwrap();
    let sites = manifest["study"]["sites"].as_array().unwrap();
    assert_eq!(sites.len(), 2);
    for (s, name) in sites.iter().zip(["north", "south"]) {
        assert_eq!(s["name"], name);
        let dir = folder.join(format!("results-{name}"));
        let want: String = {
            use sha2::Digest;
            sha2::Sha256::digest(std::fs::read(dir.join("manifest.json")).unwrap())
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect()
        };
        assert_eq!(s["manifest_sha256"], want.as_str());
    }
    let report = std::fs::read_to_string(pooled.join("report/report.md")).unwrap();
    assert!(report.contains("pooled the 2 sites' own runs"), "{report}");
    assert!(
        report.contains("Subjects by recruiting site: north: 2, south: 2."),
        "{report}"
    );
    assert!(
        report.contains("Pooled from each site's own run, without images: north (2 subjects"),
        "{report}"
    );
    assert!(!pooled.join("report/qc.html").exists());
    // No per-position figure without the sites' positions.
    assert!(!pooled.join("report/figures/along_segment.svg").exists());
}

#[test]
fn sites_that_ran_different_settings_are_not_pooled() {
    let tmp = tempfile::tempdir().unwrap();
    let folder = simulated(tmp.path(), "tests/fixtures/sites-scenario.yaml", "study");
    let north = study_with(&folder, "north", &["V01", "V02"], &BTreeMap::new());
    let south = study_with(&folder, "south", &["V03", "V04"], &BTreeMap::new());
    // The south site calibrated its two-band method against another venous SO2.
    let text = std::fs::read_to_string(&south).unwrap();
    assert!(text.contains("venule_so2: 60"));
    std::fs::write(&south, text.replace("venule_so2: 60", "venule_so2: 55")).unwrap();
    for s in [&north, &south] {
        let o = satstep(tmp.path(), &["--no-progress", "run", s.to_str().unwrap()]);
        assert_eq!(o.code, 0, "{}", o.stderr);
    }
    let o = satstep(
        tmp.path(),
        &[
            "pool",
            &format!("north={}", folder.join("results-north").display()),
            &format!("south={}", folder.join("results-south").display()),
            "--out",
            tmp.path().join("pooled").to_str().unwrap(),
        ],
    );
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(o.stderr.contains("differ in the methods"), "{}", o.stderr);
    assert!(o.stderr.contains("venule_so2"), "{}", o.stderr);
    assert!(
        o.stderr.contains("60") && o.stderr.contains("55"),
        "{}",
        o.stderr
    );
}

#[test]
fn a_site_for_some_subjects_only_is_an_error() {
    let tmp = tempfile::tempdir().unwrap();
    let folder = simulated(tmp.path(), "tests/fixtures/sites-scenario.yaml", "study");
    let partial = study_with(
        &folder,
        "partial",
        &["V01", "V02", "V03"],
        &BTreeMap::from([("V01", "north")]),
    );
    let o = satstep(tmp.path(), &["check", partial.to_str().unwrap()]);
    assert_eq!(o.code, 1, "{}", o.stderr);
    for id in ["V02", "V03"] {
        assert!(
            o.stderr.contains(&format!(
                "subject `{id}` has no `site`, but subject `V01` has one"
            )),
            "{}",
            o.stderr
        );
    }
    assert!(o.stderr.contains("partial.yaml:"), "{}", o.stderr);
}
