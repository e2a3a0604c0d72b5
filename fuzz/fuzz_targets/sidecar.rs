//! Fuzzes the field.toml reader.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        let _ = modalmap::io::FieldSidecar::parse(std::path::Path::new("field.toml"), text);
    }
});
