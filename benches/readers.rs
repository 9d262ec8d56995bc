//! Reading a spectra table: `satstep check` (whole process) on a study
//! whose spectra table has 125 000 to 1 000 000 rows, as CSV and as Parquet
//! (the Parquet reader is the peer: its cost is polars'). Reading must be
//! linear in the rows: each doubling should about double the CSV time.
//! The study is the stage-runner test scenario (33 captures), simulated
//! first; positions are repeated along each segment to reach the row
//! count. Run with `cargo bench --bench readers`.

// A benchmark reports on stdout.
#![allow(clippy::print_stdout)]

use std::path::Path;
use std::process::Command;
use std::time::Instant;

use satstep::tables::Table;

/// Writes `dir/spectra.{csv,parquet}` with about `rows` rows.
fn spectra(study: &satstep::study::Study, dir: &Path, rows: usize) -> usize {
    let bands: Vec<&str> = study
        .instrument
        .bands
        .iter()
        .map(|b| b.name.as_str())
        .collect();
    let mut items = Vec::new();
    for subject in &study.subjects {
        for session in &subject.sessions {
            for c in &session.captures {
                for seg in session.vessels.get(&c.eye).into_iter().flatten() {
                    items.push((
                        subject.id.as_str(),
                        c.listed.as_str(),
                        seg.id.as_str(),
                        seg.kind.as_str(),
                    ));
                }
            }
        }
    }
    let per = rows.div_ceil(items.len() * bands.len());
    let mut cols: [Vec<String>; 5] = Default::default();
    let (mut pos, mut t, mut d) = (Vec::new(), Vec::new(), Vec::new());
    for (s, c, v, k) in &items {
        for p in 0..per {
            for (b, name) in bands.iter().enumerate() {
                for (col, val) in cols.iter_mut().zip([s, c, v, k, name]) {
                    col.push(val.to_string());
                }
                pos.push(p as i64);
                t.push(0.70 + 0.02 * b as f64 + 1e-4 * (p % 97) as f64);
                d.push(100.0 + (p % 13) as f64);
            }
        }
    }
    let n = pos.len();
    let mut table = Table::new();
    table
        .text("subject", &cols[0])
        .text("capture", &cols[1])
        .text("vessel", &cols[2])
        .text("kind", &cols[3])
        .int("position", pos)
        .text("band", &cols[4])
        .real("transmission", t)
        .real("diameter_um", d);
    table.write(dir, "spectra").unwrap();
    n
}

fn check(study_file: &Path) -> f64 {
    let t0 = Instant::now();
    let o = Command::new(env!("CARGO_BIN_EXE_satstep"))
        .args(["check", "-q"])
        .arg(study_file)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    t0.elapsed().as_secs_f64()
}

fn main() {
    let dir = tempfile::tempdir().unwrap();
    let scenario =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner-scenario.yaml");
    let s = dir.path().join("s");
    let o = Command::new(env!("CARGO_BIN_EXE_satstep"))
        .args(["simulate", "-q"])
        .arg(&scenario)
        .arg("--out")
        .arg(&s)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let (study, findings) = satstep::study::load_study(&s.join("study.yaml"));
    let study = study.unwrap_or_else(|| panic!("{findings:?}"));
    let text = std::fs::read_to_string(s.join("study.yaml")).unwrap();
    for ext in ["csv", "parquet"] {
        std::fs::write(
            s.join(format!("study-{ext}.yaml")),
            text.replace(
                "output: results",
                &format!("spectra: spectra.{ext}\noutput: results"),
            ),
        )
        .unwrap();
    }
    println!("spectra table, `satstep check` whole process (33 captures, 4 bands)");
    println!(
        "{:>9}  {:>9}  {:>9}  {:>12}",
        "rows", "CSV", "Parquet", "CSV µs/row"
    );
    for rows in [125_000, 250_000, 500_000, 1_000_000] {
        let n = spectra(&study, &s, rows);
        let csv = check(&s.join("study-csv.yaml"));
        let pq = check(&s.join("study-parquet.yaml"));
        println!(
            "{n:>9}  {csv:>7.2} s  {pq:>7.2} s  {:>12.2}",
            csv / n as f64 * 1e6
        );
    }
}
