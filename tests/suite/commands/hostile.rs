//! Mistaken and hostile inputs: each is said, at `check`, with its place,
//! and none panics or is taken silently.

use std::path::Path;
use std::process::Command;

use crate::common::*;

fn study(dir: &Path) {
    small_study(
        dir,
        &[
            ("c1.tif", "2026-05-04T09:05:00+02:00"),
            ("c2.tif", "2026-05-04T09:16:00+02:00"),
        ],
        "",
    );
}

fn edit(dir: &Path, file: &str, from: &str, to: &str) {
    let text = std::fs::read_to_string(dir.join(file)).unwrap();
    assert!(text.contains(from), "`{from}` not in {file}");
    write(dir, file, &text.replacen(from, to, 1));
}

fn check(dir: &Path) -> Output {
    satstep(dir, &["check", "."])
}

fn says(o: &Output, what: &str) {
    assert!(
        o.stderr.contains(what),
        "expected `{what}` in:\n{}",
        o.stderr
    );
}

/// `check` refuses the study and says `what`.
fn refused(dir: &Path, what: &str) -> Output {
    let o = check(dir);
    assert_eq!(o.code, 1, "{}", o.stderr);
    says(&o, what);
    o
}

#[test]
fn a_byte_order_mark_is_not_content() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    let text = std::fs::read_to_string(dir.path().join("study.yaml")).unwrap();
    write(dir.path(), "study.yaml", &format!("\u{feff}{text}"));
    let o = check(dir.path());
    assert_eq!(o.code, 0, "{}", o.stderr);
}

#[test]
fn a_file_that_is_not_utf8_is_named_with_the_place() {
    let dir = tempfile::tempdir().unwrap();
    // Switches name the protocol's epochs: they must not each fail too.
    small_study(
        dir.path(),
        &[("c1.tif", "2026-05-04T09:05:00+02:00")],
        "        switches: {low: 2026-05-04T07:11:00Z}\n",
    );
    let mut bytes = std::fs::read(dir.path().join("protocol.yaml")).unwrap();
    // A Latin-1 "é" in a comment on the second line.
    let at = bytes.iter().position(|b| *b == b'\n').unwrap() + 1;
    bytes.splice(at..at, b"# caf\xe9\n".iter().copied());
    std::fs::write(dir.path().join("protocol.yaml"), bytes).unwrap();
    let o = refused(
        dir.path(),
        "protocol.yaml:2:6: the protocol file is not UTF-8 text",
    );
    says(&o, "save the file as UTF-8");
    assert!(!o.stderr.contains("expected one of \n"), "{}", o.stderr);
    // One root cause, one finding: the protocol's, not one per switch.
    assert_eq!(o.stderr.matches("error:").count(), 2, "{}", o.stderr);
}

#[test]
fn impossible_spo2_values_are_errors_and_zeros_are_counted_dropouts() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    let log = std::fs::read_to_string(dir.path().join("S1/spo2.csv")).unwrap();
    let mut lines: Vec<String> = log.lines().map(String::from).collect();
    for (i, v) in [(5, "150"), (6, "-5"), (7, "inf"), (8, "0"), (9, "NaN")] {
        let t = lines[i].split(',').next().unwrap().to_string();
        lines[i] = format!("{t},{v}");
    }
    write(dir.path(), "S1/spo2.csv", &(lines.join("\n") + "\n"));
    let o = check(dir.path());
    assert_eq!(o.code, 1, "{}", o.stderr);
    for (line, v) in [(6, "150"), (7, "-5"), (8, "inf")] {
        says(&o, &format!("spo2.csv:{line}:27: SpO2 `{v}` is impossible"));
    }
    says(&o, "1 SpO2 values of 0 were taken as dropouts");
    assert!(!o.stderr.contains("`NaN` is impossible"), "{}", o.stderr);
}

#[test]
fn an_absurd_lag_or_window_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    edit(dir.path(), "protocol.yaml", "lag: 20s", "lag: 99999999999h");
    let o = check(dir.path());
    assert_eq!(o.code, 1, "{}", o.stderr);
    says(
        &o,
        "is longer than 10min: no pulse oximeter lags the blood by that much",
    );
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    edit(dir.path(), "protocol.yaml", "window: 10s", "window: 2h");
    refused(dir.path(), "`window` of 2h is longer than 10min");
}

#[test]
fn empty_lists_are_said() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    write(dir.path(), "S1/captures.csv", "file,time\n");
    refused(
        dir.path(),
        "study.yaml:15:19: the session lists no captures",
    );

    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    write(dir.path(), "S1/segments-OD.yaml", "eye: OD\nsegments: []\n");
    let o = check(dir.path());
    assert_eq!(o.code, 0, "{}", o.stderr);
    says(
        &o,
        "segments-OD.yaml:2:11: the segment file lists no segments: this eye gives no values",
    );
}

#[test]
fn a_segment_without_length_or_far_off_the_image_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    edit(
        dir.path(),
        "S1/segments-OD.yaml",
        "[[1, 1], [6, 6]]",
        "[[3, 3], [3, 3]]",
    );
    refused(
        dir.path(),
        "the segment has no length: all its points are the same",
    );

    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    edit(
        dir.path(),
        "S1/segments-OD.yaml",
        "[[1, 1], [6, 6]]",
        "[[1, 1], [1000000000, 6]]",
    );
    let o = check(dir.path());
    assert_eq!(o.code, 1, "{}", o.stderr);
    says(
        &o,
        "the segment reaches (1000000000, 6), far outside the captures (8 × 8 px)",
    );
}

#[test]
fn an_output_that_is_a_file_fails_at_check() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    write(dir.path(), "taken", "a file\n");
    let text = std::fs::read_to_string(dir.path().join("study.yaml")).unwrap();
    write(dir.path(), "study.yaml", &format!("{text}output: taken\n"));
    refused(dir.path(), "is a file, not a folder");
}

#[test]
fn a_study_folder_whose_name_is_not_utf8_is_an_error_not_a_panic() {
    use std::os::unix::ffi::OsStrExt;
    let dir = tempfile::tempdir().unwrap();
    let odd = dir.path().join(std::ffi::OsStr::from_bytes(b"st\xffudy"));
    std::fs::create_dir(&odd).unwrap();
    study(&odd);
    let arg = odd.join("study.yaml");
    for verb in ["check", "run"] {
        let o = Command::new(env!("CARGO_BIN_EXE_satstep"))
            .arg(verb)
            .arg(&arg)
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(1), "{verb}: {stderr}");
        assert!(
            stderr.contains("is not valid UTF-8 text"),
            "{verb}: {stderr}"
        );
    }
}

#[test]
fn a_name_with_a_line_break_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    edit(dir.path(), "S1/segments-OD.yaml", "id: A1", "id: \"A\\n1\"");
    refused(
        dir.path(),
        "segments-OD.yaml:3:9: `id` contains a line break or another control character",
    );
}
