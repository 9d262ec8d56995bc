//! A capture of any bytes: four bands of one size, or an error for that
//! capture alone; never a panic or unbounded memory.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let path = satstep_fuzz::skeleton().join("fuzz.tif");
    satstep_fuzz::with_file(
        &path,
        bytes,
        || match satstep::images::ingest::read_capture(&path, 4, None) {
            Ok(img) => {
                assert_eq!(img.bands.len(), 4);
                for b in &img.bands {
                    assert_eq!(b.len(), img.width * img.height);
                    assert!(b.iter().all(|v| v.is_finite()));
                }
            }
            Err(e) => {
                let text = e.to_string();
                assert!(text.contains("fuzz.tif"), "the error names no file: {text}");
                assert!(
                    !text.contains("Error {") && !text.contains("Os {"),
                    "{text}"
                );
            }
        },
    );
});
