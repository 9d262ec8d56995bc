//! What the fuzz targets share: a small simulated study to mutate, and the
//! properties every reader's findings must have whatever the input.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use satstep::config::diag::Findings;
use satstep::console::{Level, Printer};

/// A study folder of this process's own, simulated once from
/// `fuzz/skeleton.yaml` (one volunteer, small images).
pub fn skeleton() -> &'static Path {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = std::env::temp_dir()
            .join("satstep-fuzz")
            .join(std::process::id().to_string());
        let _ = std::fs::remove_dir_all(&dir);
        let scenario = Path::new(env!("CARGO_MANIFEST_DIR")).join("skeleton.yaml");
        let quiet = Printer::new(Level::Quiet, true);
        satstep::commands::simulate::simulate(&scenario, &dir, &quiet)
            .expect("the skeleton study simulates");
        // A spectra table for the tables target, and the study file that names it.
        let study = std::fs::read_to_string(dir.join("study.yaml")).expect("study file");
        std::fs::write(
            dir.join("study-spectra.yaml"),
            format!("{study}\nspectra: spectra.csv\n"),
        )
        .expect("spectra study file");
        std::fs::write(dir.join("spectra.csv"), SPECTRA_SEED).expect("spectra table");
        dir
    })
}

/// Two positions of one capture in the skeleton's four bands.
pub const SPECTRA_SEED: &str = "capture,vessel,kind,position,band,transmission,diameter_um
captures/c001.tif,a1,arteriole,0,b548,0.81,110
captures/c001.tif,a1,arteriole,0,b570,0.78,110
captures/c001.tif,a1,arteriole,0,b586,0.86,110
captures/c001.tif,a1,arteriole,0,b600,0.95,110
captures/c001.tif,v1,venule,1,b548,0.74,140
captures/c001.tif,v1,venule,1,b570,0.70,140
captures/c001.tif,v1,venule,1,b586,0.80,140
captures/c001.tif,v1,venule,1,b600,0.90,140
";

/// What every finding must be, whatever the input: a message, a hint that
/// says something when there is one, a place that names a file, and no
/// Rust debug formatting (unless the input itself held that text, which a
/// message may quote).
pub fn check_findings(findings: &Findings, input: &[u8]) {
    let input = String::from_utf8_lossy(input);
    for f in findings.sorted() {
        let text = format!("{}: {}", f.location(), f.message);
        assert!(!f.message.trim().is_empty(), "empty message at {text}");
        assert!(!f.file.as_os_str().is_empty(), "no file for {text}");
        let hint = f.hint.as_deref().unwrap_or("");
        if f.hint.is_some() {
            assert!(!hint.trim().is_empty(), "empty hint for {text}");
            let end = hint.trim_end().trim_end_matches(':');
            assert!(
                !end.ends_with("one of"),
                "hint lists nothing: {hint} ({text})"
            );
        }
        for debug in DEBUG_FORMS {
            if !input.contains(debug) {
                assert!(
                    !text.contains(debug) && !hint.contains(debug),
                    "debug formatting reaches the user: {text} / {hint}"
                );
            }
        }
    }
}

/// What Rust's `{:?}` of the errors the readers meet looks like.
const DEBUG_FORMS: &[&str] = &[
    "Os { code",
    "Custom { kind",
    "Error { kind",
    "kind: NotFound",
    "kind: InvalidData",
    "ParseIntError {",
    "ParseFloatError {",
    "Utf8Error {",
    "Some(",
    "None)",
];

/// Writes `bytes` to `path`, runs `f`, and puts the file's earlier content
/// back, so that one input never leaks into the next.
pub fn with_file<T>(path: &Path, bytes: &[u8], f: impl FnOnce() -> T) -> T {
    let before = std::fs::read(path).ok();
    std::fs::write(path, bytes).expect("write the fuzz input");
    let out = f();
    match before {
        Some(b) => std::fs::write(path, b).expect("restore the file"),
        None => std::fs::remove_file(path).expect("remove the fuzz input"),
    }
    out
}
