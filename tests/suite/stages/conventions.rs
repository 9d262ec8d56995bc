//! The data conventions of every stage table, as an analyst meets them
//! (DEVELOPERS.md, "Table formats"): missing values null or empty, never
//! `NaN`; times as timestamps with a time zone in Parquet and ISO 8601 with
//! an offset in CSV; `termination` a code from a fixed set with its detail
//! beside it; one spelling for a standard error; no column that shadows a
//! pandas attribute. pyarrow and pandas read every table
//! (`tests/scripts/read_tables.py`); `.ci/run` installs them and sets
//! `SATSTEP_REQUIRE_PYARROW=1`, so that CI never skips that half.

use std::process::Command;

use crate::common::*;

/// Every code `fits/so2.termination` may hold.
const TERMINATIONS: &[&str] = &[
    "odr",
    "no-optical-density",
    "no-diameter",
    "pointwise",
    "not-fitted",
    "too-few-positions",
    "no-two-point-calibration",
    "small-gradient",
    "small-step",
    "small-cost-change",
    "zero-residual",
    "max-iterations",
    "no-progress",
    "non-finite",
];

#[test]
fn every_stage_table_follows_the_data_conventions() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let results = s.join("results");

    let mut tables = 0;
    for stage in std::fs::read_dir(&results).unwrap() {
        let stage = stage.unwrap().path();
        if !stage.is_dir() {
            continue;
        }
        for f in std::fs::read_dir(&stage).unwrap() {
            let f = f.unwrap().path();
            if f.extension().is_none_or(|e| e != "csv") || stage.ends_with("report") {
                continue;
            }
            tables += 1;
            let text = std::fs::read_to_string(&f).unwrap();
            let head = text.lines().next().unwrap();
            for name in head.split(',') {
                assert!(
                    !["flags", "std_error", "index", "values", "shape"].contains(&name),
                    "{}: column `{name}`",
                    f.display()
                );
            }
            for (n, line) in text.lines().enumerate() {
                for cell in line.split(',') {
                    assert!(
                        !["NaN", "nan", "inf", "-inf", "NA"].contains(&cell),
                        "{}:{}: a missing value spelled `{cell}`",
                        f.display(),
                        n + 1
                    );
                }
            }
        }
    }
    assert!(tables >= 12, "{tables} stage tables");

    let fits = records(&results.join("fits/so2.csv"));
    for r in &fits {
        assert!(
            TERMINATIONS.contains(&r["termination"].as_str()),
            "termination `{}`",
            r["termination"]
        );
    }
    // The detail is there when the code alone does not say enough, and
    // only then.
    assert!(fits.iter().any(|r| r["termination"] == "pointwise"
        && r["termination_detail"].contains("positions converged")));
    assert!(
        fits.iter()
            .filter(|r| r["termination"] == "odr")
            .all(|r| r["termination_detail"].is_empty())
    );
    // Times keep the offset they were recorded with in CSV.
    for r in records(&results.join("epochs/captures.csv")) {
        let t = chrono::DateTime::parse_from_rfc3339(&r["time"]).unwrap();
        assert_eq!(t.offset().local_minus_utc(), 3600, "{}", r["time"]);
    }

    let have_pyarrow = Command::new("python3")
        .args(["-c", "import pyarrow, pandas"])
        .status()
        .is_ok_and(|s| s.success());
    if !have_pyarrow {
        assert!(
            std::env::var("SATSTEP_REQUIRE_PYARROW").is_err(),
            "SATSTEP_REQUIRE_PYARROW is set but python3 cannot import pyarrow and pandas"
        );
        eprintln!("pyarrow or pandas not installed: the Python half of the check was not run");
        return;
    }
    let o = run_in(
        Command::new("python3")
            .arg(repo().join("tests/scripts/read_tables.py"))
            .arg(&results),
        dir.path(),
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert_eq!(
        o.stdout.trim(),
        format!("tables {tables}"),
        "problems pyarrow and pandas found:\n{}",
        o.stdout
    );
}
