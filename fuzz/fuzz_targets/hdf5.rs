//! Fuzzes the HDF5 field loader: any bytes must give a field or an error, never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use modalmap::io::raster::Limits;

fuzz_target!(|data: &[u8]| {
    let limits = Limits {
        max_pixels: 1 << 22,
    };
    let _ = modalmap::io::hdf5::load_bytes(std::path::Path::new("fuzz.h5"), data.to_vec(), &limits);
});
