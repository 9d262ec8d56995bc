//! The spectra-level input: a study whose transmissions come from a tidy
//! table instead of images runs through the same fits and statistics, and
//! gives the same SO2 as the images it was extracted from.

use std::collections::BTreeMap;
use std::path::Path;

use crate::common::*;

fn records(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let mut r = csv::Reader::from_path(path).unwrap();
    let head = r.headers().unwrap().iter().map(String::from).collect();
    (
        head,
        r.records()
            .map(|x| x.unwrap().iter().map(String::from).collect())
            .collect(),
    )
}

#[test]
fn a_spectra_table_replaces_the_images() {
    let dir = tempfile::tempdir().unwrap();
    let img = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "img");
    let o = satstep(dir.path(), &["run", img.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);

    // The image run's unflagged positions, written as a tidy table.
    let (head, rows) = records(&img.join("results/transmissions/positions.csv"));
    let col = |n: &str| head.iter().position(|h| h == n).unwrap();
    let bands: Vec<(usize, String)> = head
        .iter()
        .enumerate()
        .filter(|(_, h)| h.starts_with("t_"))
        .map(|(i, h)| (i, h[2..].to_string()))
        .collect();
    // With each band's background level: the simulated camera states its
    // gains, so the multiband methods weight the bands by the fundus.
    let mut tidy = String::from(
        "subject,capture,vessel,kind,position,band,transmission,diameter_um,background\n",
    );
    for r in rows.iter().filter(|r| r[col("quality_flags")].is_empty()) {
        for (i, b) in &bands {
            tidy.push_str(&format!(
                "{},{},{},{},{},{b},{},{},{}\n",
                r[col("subject")],
                r[col("capture")],
                r[col("segment")],
                r[col("kind")],
                r[col("position")],
                r[*i],
                r[col("diameter_um")],
                r[col(&format!("background_{b}"))]
            ));
        }
    }
    // The same study without images: capture lists, logs and segments stay.
    let sp = dir.path().join("sp");
    for entry in ["study.yaml", "protocol.yaml"] {
        std::fs::create_dir_all(&sp).unwrap();
        std::fs::copy(img.join(entry), sp.join(entry)).unwrap();
    }
    for s in ["V01", "V02", "V03"] {
        for f in ["captures.csv", "spo2.csv", "segments-OD.yaml"] {
            std::fs::create_dir_all(sp.join("subjects").join(s)).unwrap();
            std::fs::copy(
                img.join("subjects").join(s).join(f),
                sp.join("subjects").join(s).join(f),
            )
            .unwrap();
        }
    }
    let study = std::fs::read_to_string(sp.join("study.yaml"))
        .unwrap()
        .replace("output: results", "spectra: spectra.csv\noutput: results");
    std::fs::write(sp.join("study.yaml"), study).unwrap();
    // Without the background levels the fundus cannot be read: `check`
    // says so, and how to go on.
    let without: String = tidy
        .lines()
        .map(|l| format!("{}\n", &l[..l.rfind(',').unwrap()]))
        .collect();
    std::fs::write(sp.join("spectra.csv"), without).unwrap();
    let o = satstep(dir.path(), &["check", sp.to_str().unwrap()]);
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(
        o.stderr
            .contains("spectra.csv:1:1: method `multiband` weights its bands by the fundus")
            && o.stderr.contains("give the method `weighting: response`"),
        "{}",
        o.stderr
    );
    std::fs::write(sp.join("spectra.csv"), tidy).unwrap();
    let o = satstep(dir.path(), &["run", sp.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(!sp.join("subjects/V01/captures").exists());

    // Same SO2, segment by segment, for every method.
    let so2 = |root: &Path| -> BTreeMap<(String, String, String, String), String> {
        let (h, rows) = records(&root.join("results/fits/so2.csv"));
        let c = |n: &str| h.iter().position(|x| x == n).unwrap();
        rows.iter()
            .map(|r| {
                (
                    (
                        r[c("subject")].clone(),
                        r[c("capture")].clone(),
                        r[c("segment")].clone(),
                        r[c("method")].clone(),
                    ),
                    r[c("so2")].clone(),
                )
            })
            .collect()
    };
    let (a, b) = (so2(&img), so2(&sp));
    let fitted: Vec<_> = a.iter().filter(|(_, v)| !v.is_empty()).collect();
    assert!(fitted.len() > 300, "{}", fitted.len());
    for (k, v) in fitted {
        let w = b
            .get(k)
            .unwrap_or_else(|| panic!("{k:?} missing from the spectra run"));
        let (x, y): (f64, f64) = (v.parse().unwrap(), w.parse().unwrap());
        assert!((x - y).abs() < 1e-6, "{k:?}: images {x}, spectra {y}");
    }
    assert!(sp.join("results/report/report.html").is_file());

    // The same table as Parquet gives the same numbers.
    let (th, trows) = records(&sp.join("spectra.csv"));
    let tc = |n: &str| th.iter().position(|x| x == n).unwrap();
    let text = |n: &str| trows.iter().map(|r| r[tc(n)].clone()).collect::<Vec<_>>();
    let real = |n: &str| {
        trows
            .iter()
            .map(|r| r[tc(n)].parse::<f64>().unwrap())
            .collect::<Vec<_>>()
    };
    let mut pq = satstep::tables::Table::new();
    pq.text("subject", text("subject"))
        .text("capture", text("capture"))
        .text("vessel", text("vessel"))
        .text("kind", text("kind"));
    pq.int(
        "position",
        trows
            .iter()
            .map(|r| r[tc("position")].parse::<i64>().unwrap()),
    )
    .text("band", text("band"));
    pq.real("transmission", real("transmission"))
        .real("diameter_um", real("diameter_um"))
        .real("background", real("background"));
    pq.write(&dir.path().join("pq"), "spectra").unwrap();
    std::fs::copy(
        dir.path().join("pq/spectra.parquet"),
        sp.join("spectra.parquet"),
    )
    .unwrap();
    std::fs::remove_file(sp.join("spectra.csv")).unwrap();
    let study = std::fs::read_to_string(sp.join("study.yaml"))
        .unwrap()
        .replace("spectra: spectra.csv", "spectra: spectra.parquet");
    std::fs::write(sp.join("study.yaml"), study).unwrap();
    let before = so2(&sp);
    let o = satstep(dir.path(), &["run", sp.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr
            .lines()
            .any(|l| l.starts_with("transmissions") && l.contains("ran")),
        "the changed input reruns the transmissions stage: {}",
        o.stderr
    );
    assert_eq!(
        so2(&sp),
        before,
        "Parquet and CSV spectra tables give different SO2"
    );
}

#[test]
fn parquet_spectra_mistakes_are_reported_with_positions() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    let mut t = satstep::tables::Table::new();
    t.text("capture", ["captures/c001.tif"; 3])
        .text("vessel", ["A1"; 3])
        .text("kind", ["arteriole"; 3])
        .int("position", [0, 0, 1]);
    t.text("band", ["b548", "b555", "b548"])
        .real("transmission", [0.8, 0.8, -0.1]);
    t.write(&dir.path().join("pq"), "spectra").unwrap();
    std::fs::copy(
        dir.path().join("pq/spectra.parquet"),
        s.join("spectra.parquet"),
    )
    .unwrap();
    let study = std::fs::read_to_string(s.join("study.yaml"))
        .unwrap()
        .replace(
            "output: results",
            "spectra: spectra.parquet\noutput: results",
        );
    std::fs::write(s.join("study.yaml"), study).unwrap();
    let o = satstep(dir.path(), &["check", s.to_str().unwrap()]);
    assert_eq!(o.code, 1, "{}", o.stderr);
    // Positions as the same table would have as CSV: data row + 1, column number.
    assert!(
        o.stderr.contains(
            "spectra.parquet:3:5: the spectra table: band `b555` is not an instrument band"
        ),
        "{}",
        o.stderr
    );
    assert!(
        o.stderr.contains(
            "spectra.parquet:4:6: the spectra table: transmission `-0.1` is not a positive number"
        ),
        "{}",
        o.stderr
    );
    // A file that is not Parquet is a finding naming it, for check and run alike.
    write(&s, "spectra.parquet", "capture,vessel\nc,A1\n");
    for verb in ["check", "run"] {
        let o = satstep(dir.path(), &[verb, s.to_str().unwrap()]);
        assert_eq!(o.code, 1, "{verb}: {}", o.stderr);
        assert!(
            o.stderr
                .contains("spectra.parquet: cannot read the file as Parquet"),
            "{verb}: {}",
            o.stderr
        );
    }
}

#[test]
fn spectra_table_mistakes_are_reported_with_positions() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    write(
        &s,
        "spectra.csv",
        "capture,vessel,kind,position,band,transmission\n\
         captures/c001.tif,A1,arteriole,0,b548,0.8\n\
         captures/c001.tif,A1,arteriole,0,b555,0.8\n\
         captures/c001.tif,A1,vein,1,b548,0.8\n\
         captures/c001.tif,A1,arteriole,2,b548,high\n",
    );
    let study = std::fs::read_to_string(s.join("study.yaml"))
        .unwrap()
        .replace("output: results", "spectra: spectra.csv\noutput: results");
    std::fs::write(s.join("study.yaml"), study).unwrap();
    let o = satstep(dir.path(), &["check", s.to_str().unwrap()]);
    assert_eq!(o.code, 1, "{}", o.stderr);
    let e = &o.stderr;
    assert!(
        e.contains("spectra.csv:3:34: the spectra table: band `b555` is not an instrument band"),
        "{e}"
    );
    assert!(e.contains("did you mean `b548`"), "{e}");
    assert!(
        e.contains(
            "spectra.csv:4:22: the spectra table: kind `vein` is not `arteriole` or `venule`"
        ),
        "{e}"
    );
    assert!(
        e.contains(
            "spectra.csv:5:39: the spectra table: transmission `high` is not a positive number"
        ),
        "{e}"
    );
    assert!(
        e.contains(
            "is listed for subjects V01, V02, V03; the spectra table needs a `subject` column"
        ) || e.contains("has no row for band(s)"),
        "{e}"
    );
    // A capture no list has, in an otherwise sound table: named with its place.
    let mut rows = String::from("subject,capture,vessel,kind,position,band,transmission\n");
    for b in ["b548", "b570", "b586", "b600"] {
        rows.push_str(&format!("V01,captures/c999.tif,A1,arteriole,0,{b},0.8\n"));
    }
    write(&s, "spectra.csv", &rows);
    let o = satstep(dir.path(), &["check", s.to_str().unwrap()]);
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(
        o.stderr.contains(
            "spectra.csv:2:5: capture `captures/c999.tif` of subject `V01` is not in any capture list"
        ),
        "{}",
        o.stderr
    );
}
