//! Sensor layouts: the same simulated study written as one TIFF page per
//! band and as one frame holding the bands as a grid of tiles must give the
//! same SO2; a tiled layout that does not fit the instrument or the frames
//! is refused with the place to fix it.

use crate::common::{repo, satstep};

/// The runner scenario (three subjects, four bands), with `layout` added
/// to its instrument when given.
fn scenario(dir: &std::path::Path, name: &str, layout: Option<&str>) -> std::path::PathBuf {
    let text = std::fs::read_to_string(repo().join("tests/fixtures/runner-scenario.yaml"))
        .unwrap()
        .replace(
            "protocol: ../../protocols/",
            &format!("protocol: {}/protocols/", repo().display()),
        );
    let text = match layout {
        Some(l) => text.replace("  bands:\n", &format!("  layout: {l}\n  bands:\n")),
        None => text,
    };
    let path = dir.join(format!("{name}.yaml"));
    std::fs::write(&path, text).unwrap();
    path
}

/// `satstep simulate SC --out DIR/OUT`.
fn simulate(dir: &std::path::Path, sc: &std::path::Path, out: &str) -> crate::common::Output {
    let folder = dir.join(out);
    satstep(
        dir,
        &[
            "simulate",
            sc.to_str().unwrap(),
            "--out",
            folder.to_str().unwrap(),
        ],
    )
}

fn run(dir: &std::path::Path, sc: &std::path::Path, out: &str) -> std::path::PathBuf {
    let folder = dir.join(out);
    let o = simulate(dir, sc, out);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let o = satstep(dir, &["--no-progress", "run", folder.to_str().unwrap()]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    folder
}

fn so2(folder: &std::path::Path) -> Vec<(String, Option<f64>)> {
    let mut r = csv::Reader::from_path(folder.join("results/fits/so2.csv")).unwrap();
    let h = r.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap();
    let key = ["subject", "capture", "segment", "method"].map(col);
    let v = col("so2");
    r.records()
        .map(|x| {
            let x = x.unwrap();
            (
                key.iter().map(|k| &x[*k]).collect::<Vec<_>>().join("/"),
                x[v].parse().ok(),
            )
        })
        .collect()
}

#[test]
fn pages_and_tiles_give_the_same_so2() {
    let tmp = tempfile::tempdir().unwrap();
    let pages = run(tmp.path(), &scenario(tmp.path(), "pages", None), "pages");
    let tiles = run(
        tmp.path(),
        &scenario(tmp.path(), "tiles", Some("{grid: {columns: 2, rows: 2}}")),
        "tiles",
    );
    // The tiled study's captures really are single frames of 2 × 2 tiles.
    let study = std::fs::read_to_string(tiles.join("study.yaml")).unwrap();
    assert!(
        study.contains("layout: {grid: {columns: 2, rows: 2}}"),
        "{study}"
    );
    let tif = tiles.join("subjects/V01/captures/c001.tif");
    let mut dec = tiff::decoder::Decoder::new(std::fs::File::open(&tif).unwrap()).unwrap();
    assert_eq!(dec.dimensions().unwrap(), (320, 320));
    assert!(!dec.more_images());
    let (a, b) = (so2(&pages), so2(&tiles));
    assert_eq!(a.len(), b.len());
    let mut compared = 0;
    for ((ka, va), (kb, vb)) in a.iter().zip(&b) {
        assert_eq!(ka, kb);
        match (va, vb) {
            (Some(x), Some(y)) => {
                assert!((x - y).abs() <= 0.1, "{ka}: {x} from pages, {y} from tiles");
                compared += 1;
            }
            (None, None) => {}
            _ => panic!("{ka}: {va:?} from pages, {vb:?} from tiles"),
        }
    }
    assert!(compared > 100, "{compared}");
    // The methods text says how the captures were read.
    let report = std::fs::read_to_string(tiles.join("results/report/report.md")).unwrap();
    assert!(report.contains("as a 2 × 2 grid of equal tiles"));
}

#[test]
fn a_tiled_layout_that_does_not_fit_is_refused() {
    let tmp = tempfile::tempdir().unwrap();
    // Three rectangles for four bands: an error at the key, with its line.
    let sc = scenario(
        tmp.path(),
        "short",
        Some("{tiles: [[0, 0, 80, 80], [80, 0, 80, 80], [0, 80, 80, 80]]}"),
    );
    let o = simulate(tmp.path(), &sc, "short");
    assert_ne!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr.contains("short.yaml:15:")
            && o.stderr
                .contains("`tiles` lists 3 rectangles; the instrument has 4 bands"),
        "{}",
        o.stderr
    );
    // A grid too small for the bands.
    let sc = scenario(tmp.path(), "small", Some("{grid: {columns: 3, rows: 1}}"));
    let o = simulate(tmp.path(), &sc, "small");
    assert_ne!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr
            .contains("room for 3 tiles; the instrument has 4 bands"),
        "{}",
        o.stderr
    );
}

/// A study whose captures are pages but whose instrument says tiles (here
/// each tile the whole page, so the segments still lie inside): every
/// capture fails with the reason, the study still runs to its report.
#[test]
fn pages_read_as_tiles_fail_capture_by_capture_with_the_reason() {
    let tmp = tempfile::tempdir().unwrap();
    let folder = tmp.path().join("s");
    let o = simulate(tmp.path(), &scenario(tmp.path(), "pages", None), "s");
    assert_eq!(o.code, 0, "{}", o.stderr);
    let study = folder.join("study.yaml");
    let text = std::fs::read_to_string(&study).unwrap().replace(
        "  bands:\n",
        "  layout: {tiles: [[0, 0, 160, 160], [0, 0, 160, 160], [0, 0, 160, 160], [0, 0, 160, 160]]}\n  bands:\n",
    );
    std::fs::write(&study, text).unwrap();
    let o = satstep(
        tmp.path(),
        &["--no-progress", "run", folder.to_str().unwrap()],
    );
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(
        o.stderr
            .contains("has 4 pages; with the instrument's tiled `layout` a capture is one frame"),
        "{}",
        o.stderr
    );
    assert!(folder.join("results/report/report.html").is_file());
}
