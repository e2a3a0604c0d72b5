//! Loader tests: every format and bit depth round-trips, and HDF5 files written by h5py
//! (tests/fixtures/hdf5/make_fixtures.py) read back exactly.

use std::path::{Path, PathBuf};

use modalmap::io::raster::{write_png_u16, write_png_u8, write_tiff, TiffData};
use modalmap::io::{load_field, BseSource, Limits};

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/hdf5")
        .join(name)
}

// The formulas of make_fixtures.py.
fn fe(x: usize, y: usize) -> f32 {
    ((7 * x + 13 * y) % 50) as f32
}
fn si(x: usize, y: usize) -> f32 {
    ((3 * x + 5 * y) % 20) as f32 / 4.0
}
fn o(x: usize, y: usize) -> f32 {
    ((x * y) % 9) as f32
}
fn grid(f: fn(usize, usize) -> f32) -> Vec<f32> {
    (0..16)
        .flat_map(|y| (0..24).map(move |x| f(x, y)))
        .collect()
}

#[test]
fn h5py_group_layout_reads_back_exactly() {
    let field = load_field(&fixture("group_layout.h5"), &Limits::default()).unwrap();
    let s = &field.stack;
    assert_eq!((s.width(), s.height()), (24, 16));
    assert_eq!(s.symbols(), vec!["O", "Si", "Fe"], "ordered by Z");
    assert_eq!(s.map("Fe").unwrap().counts, grid(fe), "uint16, contiguous");
    assert_eq!(
        s.map("Si").unwrap().counts,
        grid(si),
        "float32, gzip + shuffle"
    );
    assert_eq!(s.map("O").unwrap().counts, grid(o), "uint8, lzf");
    assert_eq!(s.map("Fe").unwrap().line.as_deref(), Some("Ka"));
    let md = s.metadata();
    assert_eq!(md.pixel_size_um, Some(0.5));
    assert_eq!(md.beam_kv, Some(20.0), "integer attribute accepted");
    assert_eq!(md.live_time_s, Some(120.0));
    assert!(
        field.skipped.iter().any(|k| k.name == "maps/SE"),
        "{:?}",
        field.skipped
    );
    assert_eq!(
        field.bse,
        Some(BseSource::Hdf5 {
            file: fixture("group_layout.h5"),
            dataset: "bse".into()
        })
    );
}

#[test]
fn h5py_stack_layout_reads_back_exactly() {
    let field = load_field(&fixture("stack_layout.h5"), &Limits::default()).unwrap();
    let s = &field.stack;
    assert_eq!(s.symbols(), vec!["O", "Si", "Fe"]);
    assert_eq!(s.map("Fe").unwrap().counts, grid(fe));
    assert_eq!(s.map("Si").unwrap().counts, grid(si));
    assert_eq!(s.map("O").unwrap().counts, grid(o));
    assert_eq!(s.metadata().pixel_size_um, Some(1.25));
}

#[test]
fn h5py_broken_files_are_refused_with_reasons() {
    let cases = [
        ("mismatched_sizes.h5", "is 24×8 but"),
        ("nan_values.h5", "NaN at pixel (x=5, y=3)"),
        ("no_maps.h5", "contains no element maps"),
        (
            "stack_without_elements.h5",
            "no string-array attribute `elements`",
        ),
        (
            "attr_wrong_type.h5",
            "attribute `pixel_size_um` is not a number",
        ),
        // Valid files whose maps sit behind links, which the reader cannot follow: the
        // message says so (not "damaged").
        ("soft_link.h5", "soft or external link"),
        ("external_link.h5", "soft or external links are not read"),
    ];
    for (name, key) in cases {
        let e = load_field(&fixture(name), &Limits::default()).unwrap_err();
        assert!(e.to_string().contains(key), "{name}: {e}");
        assert_eq!(e.kind.exit_code(), 3, "{name}");
    }
}

#[test]
fn hdf5_limits_are_checked_before_reading() {
    let e = load_field(&fixture("group_layout.h5"), &Limits { max_pixels: 100 }).unwrap_err();
    assert!(e.problem.contains("above the limit"), "{e}");
}

#[test]
fn folder_of_every_format_round_trips() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let (w, h) = (24, 16);
    let fe16: Vec<u16> = grid(fe).iter().map(|&v| v as u16 * 1000).collect();
    let o8: Vec<u8> = grid(o).iter().map(|&v| v as u8).collect();
    let si32: Vec<f32> = grid(si);
    let cu32: Vec<u32> = (0..(w * h) as u32).map(|i| i * 70_001).collect();
    write_png_u16(&d.join("Fe_Ka.png"), w, h, &fe16).unwrap();
    write_png_u8(&d.join("O.png"), w, h, &o8).unwrap();
    write_tiff(&d.join("Si K.tif"), w, h, TiffData::F32(&si32)).unwrap();
    write_tiff(&d.join("Cu-La.tiff"), w, h, TiffData::U32(&cu32)).unwrap();
    write_tiff(&d.join("Mg.tif"), w, h, TiffData::U16(&fe16)).unwrap();
    write_tiff(&d.join("Na.tif"), w, h, TiffData::U8(&o8)).unwrap();
    write_png_u8(&d.join("SE.png"), w, h, &o8).unwrap();
    write_png_u8(&d.join("bse_fine.png"), w, h, &o8).unwrap();
    std::fs::write(d.join("notes.txt"), "x").unwrap();
    std::fs::write(
        d.join("field.toml"),
        "pixel_size_um = 0.1\n[lines]\nO = \"Ka\"\n",
    )
    .unwrap();

    let field = load_field(d, &Limits::default()).unwrap();
    let s = &field.stack;
    assert_eq!(s.symbols(), vec!["O", "Na", "Mg", "Si", "Fe", "Cu"]);
    let want16: Vec<f32> = fe16.iter().map(|&v| f32::from(v)).collect();
    let want8: Vec<f32> = o8.iter().map(|&v| f32::from(v)).collect();
    assert_eq!(s.map("Fe").unwrap().counts, want16);
    assert_eq!(s.map("Mg").unwrap().counts, want16);
    assert_eq!(s.map("O").unwrap().counts, want8);
    assert_eq!(s.map("Na").unwrap().counts, want8);
    assert_eq!(s.map("Si").unwrap().counts, si32);
    let cu: Vec<f32> = cu32.iter().map(|&v| v as f32).collect();
    assert_eq!(s.map("Cu").unwrap().counts, cu);
    assert_eq!(s.map("Fe").unwrap().line.as_deref(), Some("Ka"));
    assert_eq!(
        s.map("O").unwrap().line.as_deref(),
        Some("Ka"),
        "from field.toml"
    );
    assert_eq!(s.map("Cu").unwrap().line.as_deref(), Some("La"));
    assert_eq!(s.metadata().pixel_size_um, Some(0.1));
    let skipped: Vec<&str> = field.skipped.iter().map(|k| k.name.as_str()).collect();
    assert_eq!(skipped, vec!["SE.png", "bse_fine.png", "notes.txt"]);
    assert_eq!(field.bse, Some(BseSource::File(d.join("bse_fine.png"))));
    assert_eq!(field.files.len(), 6);
}

#[test]
fn all_zero_map_is_a_warning_not_an_error() {
    let dir = tempfile::tempdir().unwrap();
    write_png_u8(&dir.path().join("Fe.png"), 4, 4, &[0; 16]).unwrap();
    write_png_u8(&dir.path().join("Si.png"), 4, 4, &[3; 16]).unwrap();
    let field = load_field(dir.path(), &Limits::default()).unwrap();
    assert!(field
        .warnings
        .iter()
        .any(|w| w.contains("Fe map") && w.contains("zero everywhere")));
}

#[test]
fn sample_maps_are_what_the_generator_makes() {
    // The committed sample field must be reproducible from its generator (README says how).
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let loaded = load_field(&dir, &Limits::default()).unwrap();
    let made = modalmap::synth::sample_field().unwrap();
    for m in made.stack.maps() {
        let got = loaded.stack.map(m.element.symbol).unwrap();
        assert_eq!(
            got.counts, m.counts,
            "{} differs: regenerate with `modalmap synth -o sample-maps`",
            m.element.symbol
        );
    }
    assert_eq!(loaded.stack.metadata(), made.stack.metadata());
}

#[test]
fn h5py_bse_dataset_reads_back_exactly() {
    let field = load_field(&fixture("group_layout.h5"), &Limits::default()).unwrap();
    let bse = modalmap::io::load_bse(field.bse.as_ref().unwrap(), &Limits::default()).unwrap();
    assert_eq!((bse.width, bse.height), (24, 16));
    let want: Vec<f32> = grid(fe).iter().map(|v| v * 10.0).collect();
    assert_eq!(bse.data, want);
    assert_eq!(
        bse.saturation,
        Some(65535.0),
        "uint16 dataset: the top level is saturation"
    );
}

#[test]
fn hdf5_from_bytes_equals_from_file() {
    let p = fixture("stack_layout.h5");
    let a = load_field(&p, &Limits::default()).unwrap();
    let b =
        modalmap::io::hdf5::load_bytes(&p, std::fs::read(&p).unwrap(), &Limits::default()).unwrap();
    assert_eq!(a.stack, b.stack);
    let e = modalmap::io::hdf5::load_bytes(
        &p,
        b"\x89HDF\r\n\x1a\n garbage".to_vec(),
        &Limits::default(),
    )
    .unwrap_err();
    assert!(e.problem.contains("not a readable HDF5"), "{e}");
}

/// Found by the HDF5 fuzz target (fuzz/fuzz_targets/hdf5.rs): a dataset whose float type
/// claims 16 449 532 bytes per value made the reader allocate 3 GB. It must be refused
/// before any data is read, from a file and from bytes alike.
#[test]
fn regression_fuzz_oversized_element_type() {
    let p = fixture("fuzz-oversized-chunks.h5");
    let limits = Limits {
        max_pixels: 1 << 22,
    };
    let e = modalmap::io::hdf5::load_bytes(&p, std::fs::read(&p).unwrap(), &limits).unwrap_err();
    assert!(e.problem.contains("16449532 bytes"), "{e}");
    assert!(load_field(&p, &limits).is_err());
}

/// Found by the HDF5 fuzz target: a chunk record pointing past the end of the file made the
/// reader size a 4 GB buffer. It must be refused before any data is read.
#[test]
fn regression_fuzz_chunk_beyond_the_file() {
    let p = fixture("fuzz-chunk-beyond-file.h5");
    let limits = Limits {
        max_pixels: 1 << 22,
    };
    let e = modalmap::io::hdf5::load_bytes(&p, std::fs::read(&p).unwrap(), &limits).unwrap_err();
    assert!(e.problem.contains("beyond the end of the file"), "{e}");
    assert!(load_field(&p, &limits).is_err());
}
