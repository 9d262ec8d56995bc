//! A study file of any bytes, in a folder whose other files are valid: the
//! study loads, or its findings say where and why.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let path = satstep_fuzz::skeleton().join("study.yaml");
    satstep_fuzz::with_file(&path, bytes, || {
        let (study, findings) = satstep::study::load_study(&path);
        satstep_fuzz::check_findings(&findings, bytes);
        if let Some(s) = study {
            // What the stages key on is computable for any study that loads.
            let _ = s.portable();
        }
    });
});
