//! The YAML reader on any text: a tree or findings, never a panic, a hang
//! or unbounded memory (aliases and document size are bounded).
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;

fuzz_target!(|text: &str| {
    if let Err(findings) = satstep::config::yaml::parse(Path::new("fuzz.yaml"), text) {
        let mut all = satstep::config::diag::Findings::new();
        for f in findings {
            all.error(&f.file, f.mark, f.message).hint = f.hint;
        }
        satstep_fuzz::check_findings(&all, text.as_bytes());
    }
});
