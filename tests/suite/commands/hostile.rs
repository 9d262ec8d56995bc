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
    // A few dropouts pass without a word; a log mostly without values is said.
    assert!(
        !o.stderr.contains("were taken as dropouts\n"),
        "{}",
        o.stderr
    );
    let blank: Vec<String> = lines
        .iter()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                l.clone()
            } else {
                format!("{},NaN", l.split(',').next().unwrap())
            }
        })
        .collect();
    write(dir.path(), "S1/spo2.csv", &(blank.join("\n") + "\n"));
    let o = check(dir.path());
    assert_eq!(o.code, 0, "{}", o.stderr);
    says(
        &o,
        "samples have no SpO2 value (empty, NaN, `-` or 0) and were taken as dropouts",
    );
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

/// Runs `satstep` with `args` in `dir` as a user who owns none of it: as
/// `nobody` through `setpriv` when the tests run as root (root passes every
/// permission check), else as the test's own user. The binary is copied
/// into `dir`, which the other user can reach.
fn satstep_unprivileged(dir: &Path, args: &[&str]) -> Output {
    use std::os::unix::fs::PermissionsExt;
    let bin = dir.join("satstep-bin");
    std::fs::copy(env!("CARGO_BIN_EXE_satstep"), &bin).unwrap();
    std::fs::set_permissions(dir, std::fs::Permissions::from_mode(0o755)).unwrap();
    let root = Command::new("id").arg("-u").output().unwrap().stdout == b"0\n";
    let mut cmd = if root {
        let mut c = Command::new("setpriv");
        c.args(["--reuid=65534", "--regid=65534", "--clear-groups", "--"])
            .arg(&bin);
        c
    } else {
        Command::new(&bin)
    };
    run_in(cmd.args(args), dir)
}

/// The environment's errors name the path and what was being done, and
/// exit with the documented status 2; no Rust debug output reaches the user.
fn environment_error(o: &Output, cause: &str, path: &str) {
    assert_eq!(o.code, 2, "{}", o.stderr);
    says(o, cause);
    // The error line and its cause chain, up to the cause.
    let at = o.stderr.find(cause).unwrap();
    let block = &o.stderr[o.stderr[..at].rfind("error:").unwrap_or(0)..at];
    assert!(block.contains(path), "the path is not named: {}", o.stderr);
    for debug in ["Os {", "kind:", "Custom {", "Error {"] {
        assert!(!o.stderr.contains(debug), "debug output: {}", o.stderr);
    }
}

#[test]
fn a_results_folder_that_cannot_be_written_is_named() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().unwrap();
    study(dir.path());
    let results = dir.path().join("results");
    std::fs::create_dir(&results).unwrap();
    std::fs::set_permissions(&results, std::fs::Permissions::from_mode(0o555)).unwrap();
    let o = satstep_unprivileged(dir.path(), &["run", "."]);
    environment_error(&o, "Permission denied", "results/");
}

/// A full disk wherever it strikes: over the whole results folder, and over
/// the report's figures at sizes that run out in different files (an SVG,
/// a PNG written through the plotting library).
#[test]
fn a_full_disk_is_named_with_the_path() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    let figures = s.join("results/report/figures");
    std::fs::create_dir_all(&figures).unwrap();
    let results = s.join("results");
    for (folder, size) in [
        (&results, "24k"),
        (&figures, "8k"),
        (&figures, "60k"),
        (&figures, "120k"),
        (&figures, "240k"),
    ] {
        // A small file system over the folder, in a mount namespace of the
        // test's own (unprivileged user namespaces allow it without root).
        let script = format!(
            "mount -t tmpfs -o size={size} tmpfs '{}' && exec '{}' run .",
            folder.display(),
            env!("CARGO_BIN_EXE_satstep")
        );
        let o = run_in(
            Command::new("unshare").args([
                "--user",
                "--map-root-user",
                "--mount",
                "sh",
                "-c",
                &script,
            ]),
            &s,
        );
        environment_error(&o, "No space left on device", "results/");
    }
}

#[test]
fn band_gains_are_all_or_none_and_the_fundus_weighting_needs_them() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    study(d);
    let (b570, b600) = (
        "{name: b570, centre_nm: 570, fwhm_nm: 10}",
        "{name: b600, centre_nm: 600, fwhm_nm: 10}",
    );
    // Gains are relative: one band's alone means nothing.
    edit(
        d,
        "study.yaml",
        b570,
        "{name: b570, centre_nm: 570, fwhm_nm: 10, gain: 1.2}",
    );
    let o = refused(
        d,
        "study.yaml:8:7: band `b600` has no `gain`, though `b570` has one",
    );
    says(&o, "give every band its `gain`, or none");
    edit(
        d,
        "study.yaml",
        b600,
        "{name: b600, centre_nm: 600, fwhm_nm: 10, gain: 0}",
    );
    let o = refused(d, "study.yaml:8:");
    says(&o, "`gain`");
    edit(d, "study.yaml", "gain: 0}", "gain: 0.9}");
    // A multiband method over four bands: with every gain given, the
    // fundus weighting is the default and may be named.
    edit(
        d,
        "study.yaml",
        "    - {name: b600",
        "    - {name: b586, centre_nm: 586, fwhm_nm: 10, gain: 1}\n    - {name: b548, centre_nm: 548, fwhm_nm: 10, gain: 1}\n    - {name: b600",
    );
    let text = std::fs::read_to_string(d.join("study.yaml")).unwrap();
    write(
        d,
        "study.yaml",
        &format!("{text}  - method: multiband\n    weighting: fundus\n"),
    );
    let o = check(d);
    assert_eq!(o.code, 0, "{}", o.stderr);
    // Without the gains it cannot be done, and `check` says how to fix it.
    let text = std::fs::read_to_string(d.join("study.yaml"))
        .unwrap()
        .replace(", gain: 1.2}", "}")
        .replace(", gain: 0.9}", "}")
        .replace(", gain: 1}", "}");
    write(d, "study.yaml", &text);
    let o = refused(
        d,
        "`weighting: fundus` needs every band's `gain`, and the instrument does not give them all",
    );
    says(&o, "or use `weighting: response`");
    // `response` is always possible.
    edit(d, "study.yaml", "weighting: fundus", "weighting: response");
    assert_eq!(check(d).code, 0);
}
