//! Fuzzes the TIFF decoder: any bytes must give a raster or an error, never a panic, and
//! never more than the limit's allocation.
#![no_main]

use libfuzzer_sys::fuzz_target;
use modalmap::io::raster::{decode_raster, Limits, RasterFormat};

fuzz_target!(|data: &[u8]| {
    let limits = Limits {
        max_pixels: 1 << 22,
    };
    let _ = decode_raster(
        std::path::Path::new("fuzz.tiff"),
        RasterFormat::Tiff,
        data,
        &limits,
    );
});
