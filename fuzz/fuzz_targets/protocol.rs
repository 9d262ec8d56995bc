//! A protocol file of any bytes (BOM, not UTF-8, anything): a protocol or
//! findings that say where and why.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let path = satstep_fuzz::skeleton().join("protocol-fuzz.yaml");
    satstep_fuzz::with_file(&path, bytes, || {
        if let Err(findings) = satstep::config::protocol::load_protocol(&path) {
            satstep_fuzz::check_findings(&findings, bytes);
        }
    });
});
