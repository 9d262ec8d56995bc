//! The files a study names besides itself: the capture list, the SpO2 log
//! (CSV), a segment file (YAML) and a spectra table (CSV), one at a time,
//! chosen by the first byte; the rest of the study stays valid.
#![no_main]

use libfuzzer_sys::fuzz_target;

const FILES: &[(&str, &str)] = &[
    ("study.yaml", "subjects/V01/captures.csv"),
    ("study.yaml", "subjects/V01/spo2.csv"),
    ("study.yaml", "subjects/V01/segments-OD.yaml"),
    ("study-spectra.yaml", "spectra.csv"),
];

fuzz_target!(|input: &[u8]| {
    let Some((&which, bytes)) = input.split_first() else {
        return;
    };
    let (study, file) = FILES[usize::from(which) % FILES.len()];
    let dir = satstep_fuzz::skeleton();
    satstep_fuzz::with_file(&dir.join(file), bytes, || {
        let (_, findings) = satstep::study::load_study(&dir.join(study));
        satstep_fuzz::check_findings(&findings, bytes);
    });
});
