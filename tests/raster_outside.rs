//! The PNG/TIFF reader against files it did not write: every image in tests/fixtures/raster
//! was written by Pillow or tifffile (one PNG, the Adam7-interlaced one, by hand with
//! Python's zlib; see tests/fixtures/raster/make_fixtures.py). For each file listed in
//! tests/fixtures/raster/expected.txt, `read_raster` must give a 24 × 16 image whose every
//! pixel equals the file's formula, recomputed here. The files cover 8/16-bit PNG (also
//! interlaced and maximum zlib level), and TIFF with LZW, Deflate, PackBits, big-endian byte
//! order, several strips, partial tiles, horizontal and floating-point predictors, and
//! uint8/uint16/uint32/float32 samples. All files are checked before the test fails, and
//! the failure lists every file that was wrong and why.

use std::path::{Path, PathBuf};

use modalmap::io::raster::probe_size;
use modalmap::io::{read_raster, Limits};

const WIDTH: usize = 24;
const HEIGHT: usize = 16;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/raster")
        .join(name)
}

// The formulas of make_fixtures.py, for column x and row y.
fn u8_formula(x: usize, y: usize) -> f32 {
    ((7 * x + 13 * y) % 50) as f32
}
fn u16_formula(x: usize, y: usize) -> f32 {
    (((7 * x + 13 * y) % 50) * 1000 + x) as f32
}
fn f32_formula(x: usize, y: usize) -> f32 {
    ((3 * x + 5 * y) % 20) as f32 / 4.0
}
fn u32_formula(x: usize, y: usize) -> f32 {
    // Up to 26 810 383, above 2^24: the reader's u32 → f32 conversion rounds, and so does
    // this one, the same way (to nearest).
    let v = ((x + 24 * y) * 70_001) as u32;
    v as f32
}

/// A pixel formula of make_fixtures.py.
type Formula = fn(usize, usize) -> f32;

/// The formula and the format string `read_raster` reports for a formula name of
/// expected.txt and the file's extension.
fn formula(name: &str, file: &str) -> Option<(Formula, String)> {
    let png = file.to_ascii_lowercase().ends_with(".png");
    let (f, bits, kind): (Formula, u32, &str) = match name {
        "u8" => (u8_formula, 8, "integer"),
        "u16" => (u16_formula, 16, "integer"),
        "f32" => (f32_formula, 32, "float"),
        "u32" => (u32_formula, 32, "integer"),
        _ => return None,
    };
    let format = if png {
        format!("{bits}-bit PNG")
    } else {
        format!("{bits}-bit {kind} TIFF")
    };
    Some((f, format))
}

/// The `(file, dtype, formula)` lines of expected.txt.
fn expected() -> Vec<(String, String, String)> {
    let path = fixture("expected.txt");
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("{}: cannot be read: {e}", path.display()));
    let mut out = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let fields: Vec<&str> = line.split_whitespace().collect();
        assert_eq!(
            fields.len(),
            3,
            "expected.txt line {}: `{line}` is not `filename dtype formula`",
            i + 1
        );
        out.push((
            fields[0].to_string(),
            fields[1].to_string(),
            fields[2].to_string(),
        ));
    }
    out
}

/// What is wrong with one file, or `None` when it reads back exactly.
fn check(file: &str, dtype: &str, formula_name: &str) -> Option<String> {
    let Some((f, want_format)) = formula(formula_name, file) else {
        return Some(format!(
            "expected.txt names an unknown formula `{formula_name}`"
        ));
    };
    let r = match read_raster(&fixture(file), &Limits::default()) {
        Ok(r) => r,
        Err(e) => return Some(format!("not read ({dtype}): {e}")),
    };
    let mut problems = Vec::new();
    if (r.width, r.height) != (WIDTH, HEIGHT) {
        problems.push(format!(
            "size {}×{}, want {WIDTH}×{HEIGHT}",
            r.width, r.height
        ));
    }
    if r.data.len() != r.width * r.height {
        problems.push(format!(
            "{} values for {}×{} pixels",
            r.data.len(),
            r.width,
            r.height
        ));
    }
    if r.format != want_format {
        problems.push(format!("format `{}`, want `{want_format}`", r.format));
    }
    if problems.is_empty() {
        let mut wrong = 0usize;
        let mut first = Vec::new();
        for y in 0..HEIGHT {
            for x in 0..WIDTH {
                let got = r.data[y * WIDTH + x];
                let want = f(x, y);
                // Exact: every formula value is what the file holds, converted to f32.
                if got.to_bits() != want.to_bits() {
                    wrong += 1;
                    if first.len() < 5 {
                        first.push(format!("(x {x}, y {y}) = {got}, want {want}"));
                    }
                }
            }
        }
        if wrong > 0 {
            problems.push(format!(
                "{wrong} of {} pixels differ from the {formula_name} formula, first: {}",
                WIDTH * HEIGHT,
                first.join("; ")
            ));
        }
    }
    if problems.is_empty() {
        None
    } else {
        Some(format!(
            "{dtype}, read as `{}`: {}",
            r.format,
            problems.join("; ")
        ))
    }
}

#[test]
fn files_written_by_pillow_and_tifffile_read_back_exactly() {
    let files = expected();
    assert!(
        files.len() >= 15,
        "expected.txt lists only {} files",
        files.len()
    );
    let mut failures = Vec::new();
    for (file, dtype, formula_name) in &files {
        if let Some(why) = check(file, dtype, formula_name) {
            failures.push(format!("{file}: {why}"));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} outside-written fixtures failed:\n  {}",
        failures.len(),
        files.len(),
        failures.join("\n  ")
    );
}

#[test]
fn tiled_and_lzw_tiffs_have_the_right_size() {
    for file in ["tf_u16_tiles.tif", "tf_u16_lzw.tif"] {
        let path = fixture(file);
        let (w, h) = probe_size(&path, &Limits::default())
            .unwrap_or_else(|e| panic!("{file}: header not read: {e}"));
        assert_eq!((w, h), (WIDTH as u64, HEIGHT as u64), "{file}: probed size");
        let r = read_raster(&path, &Limits::default())
            .unwrap_or_else(|e| panic!("{file}: not read: {e}"));
        assert_eq!((r.width, r.height), (WIDTH, HEIGHT), "{file}: decoded size");
        assert_eq!(r.data.len(), WIDTH * HEIGHT, "{file}: number of values");
    }
}
