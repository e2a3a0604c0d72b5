//! The binary on good and bad inputs: exit codes and messages that name the file, the
//! problem and the fix. Never a panic (exit 101), never a silent success on bad data.

mod common;

use common::{modalmap, Run};
use std::path::Path;

use modalmap::io::raster::{write_png_rgb, write_png_u16, write_png_u8, write_tiff, TiffData};

/// Asserts a clean failure: the exit code, and every key phrase in the message.
fn assert_refused(r: &Run, code: i32, keys: &[&str]) {
    assert_eq!(r.code, code, "exit code; stderr:\n{}", r.stderr);
    assert!(!r.stderr.contains("panicked"), "panic:\n{}", r.stderr);
    // The message is on its own lines (after any progress lines of the stages run).
    assert!(
        r.stderr.starts_with("error: ") || r.stderr.contains("\nerror: "),
        "{}",
        r.stderr
    );
    assert!(r.stderr.contains("fix: "), "no fix offered:\n{}", r.stderr);
    for k in keys {
        assert!(r.stderr.contains(k), "missing `{k}` in:\n{}", r.stderr);
    }
}

fn inspect(dir: &Path) -> Run {
    modalmap(&["inspect", dir.to_str().unwrap()])
}

fn good_map(dir: &Path, name: &str) {
    write_png_u16(&dir.join(name), 8, 6, &[12; 48]).unwrap();
}

#[test]
fn inspect_reports_the_sample_field() {
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let r = modalmap(&["inspect", sample.to_str().unwrap()]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stdout.contains("384 × 288 pixels, 3 element maps"),
        "{}",
        r.stdout
    );
    assert!(
        r.stdout.contains("BSE.png: backscattered-electron image"),
        "{}",
        r.stdout
    );
    let j = modalmap(&["inspect", "--json", sample.to_str().unwrap()]);
    let v: serde_json::Value = serde_json::from_str(&j.stdout).unwrap();
    let els: Vec<&str> = v["elements"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["element"].as_str().unwrap())
        .collect();
    assert_eq!(els, vec!["Cu", "Ag", "Sn"]);
    assert_eq!(v["metadata"]["pixel_size_um"], 0.2);
}

#[test]
fn low_counts_are_warned_with_poisson_reasoning() {
    let dir = tempfile::tempdir().unwrap();
    write_png_u8(&dir.path().join("Fe.png"), 10, 10, &[2; 100]).unwrap();
    let r = inspect(dir.path());
    assert_eq!(r.code, 0);
    assert!(
        r.stdout.contains("Fe reaches only 2 counts"),
        "{}",
        r.stdout
    );
    assert!(
        r.stdout.contains("Poisson noise is √N = 1.4 counts"),
        "{}",
        r.stdout
    );
}

/// Every warning of `inspect` fires when its condition holds and stays quiet when it does
/// not: a weak one-map field with holes and no metadata gets all six (thresholds in
/// src/inspect.rs: 5 counts at the 99th percentile, 20 counts per pixel on average, 0.1 %
/// empty pixels; common practice, no source); the sample field, whose pores are 0.4 % of
/// its pixels, only the one about empty pixels.
#[test]
fn inspect_warnings_fire_exactly_when_their_condition_holds() {
    let dir = tempfile::tempdir().unwrap();
    let counts: Vec<u8> = (0..100).map(|i| if i % 20 == 0 { 0 } else { 3 }).collect();
    write_png_u8(&dir.path().join("Fe.png"), 10, 10, &counts).unwrap();
    let warnings = |p: &Path| -> Vec<String> {
        let r = modalmap(&["inspect", "--json", p.to_str().unwrap()]);
        assert_eq!(r.code, 0, "{}", r.stderr);
        let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
        let w = v["warnings"].as_array().unwrap();
        w.iter().map(|s| s.as_str().unwrap().to_string()).collect()
    };
    let weak = warnings(dir.path()).join("\n");
    for key in [
        "Fe reaches only 3 counts",
        "average 2.9 counts per pixel",
        "5.00 % of pixels have no counts",
        "pixel size unknown",
        "beam energy unknown",
        "only one element map",
    ] {
        assert!(weak.contains(key), "`{key}` not warned: {weak}");
    }
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let w = warnings(&sample);
    assert_eq!(w.len(), 1, "{w:?}");
    assert!(w[0].starts_with("0.40 % of pixels have no counts"), "{w:?}");
}

#[test]
fn missing_and_wrong_kind_of_input() {
    let dir = tempfile::tempdir().unwrap();
    let r = modalmap(&["inspect", dir.path().join("nope").to_str().unwrap()]);
    assert_refused(&r, 3, &["nope", "cannot be opened"]);

    good_map(dir.path(), "Fe.png");
    let r = modalmap(&["inspect", dir.path().join("Fe.png").to_str().unwrap()]);
    assert_refused(&r, 3, &["Fe.png", "single image", "folder"]);

    std::fs::write(dir.path().join("notes.txt"), "hello").unwrap();
    let r = modalmap(&["inspect", dir.path().join("notes.txt").to_str().unwrap()]);
    assert_refused(&r, 3, &["notes.txt", "neither a folder nor an HDF5 file"]);
}

#[test]
fn empty_folder_and_folder_without_maps() {
    let dir = tempfile::tempdir().unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["no element maps", "folder is empty"],
    );
    write_png_u8(&dir.path().join("SE.png"), 4, 4, &[1; 16]).unwrap();
    std::fs::write(dir.path().join("readme.txt"), "x").unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["no element maps", "SE.png", "Fe.png"],
    );
}

#[test]
fn maps_of_different_sizes() {
    let dir = tempfile::tempdir().unwrap();
    good_map(dir.path(), "Fe.png");
    write_png_u16(&dir.path().join("Si.png"), 16, 12, &[3; 192]).unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["Si.png", "16×12", "Fe.png is 8×6", "share one size"],
    );
}

#[test]
fn duplicate_elements() {
    let dir = tempfile::tempdir().unwrap();
    good_map(dir.path(), "Fe.png");
    write_tiff(&dir.path().join("Fe_Ka.tif"), 8, 6, TiffData::U16(&[1; 48])).unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["two maps of Fe", "Fe.png", "Fe_Ka.tif"],
    );
}

#[test]
fn corrupt_and_truncated_files() {
    let dir = tempfile::tempdir().unwrap();
    good_map(dir.path(), "Fe.png");
    let bytes = std::fs::read(dir.path().join("Fe.png")).unwrap();
    std::fs::write(dir.path().join("Fe.png"), &bytes[..bytes.len() / 2]).unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["Fe.png", "not a readable PNG", "export it again"],
    );

    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("Si.tif"), b"this is not a tiff at all").unwrap();
    assert_refused(&inspect(dir.path()), 3, &["Si.tif", "not a readable TIFF"]);

    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("O.png"), b"").unwrap();
    assert_refused(&inspect(dir.path()), 3, &["O.png", "not a readable PNG"]);

    let dir = tempfile::tempdir().unwrap();
    write_tiff(
        &dir.path().join("Si.tif"),
        64,
        64,
        TiffData::U16(&[9; 4096]),
    )
    .unwrap();
    let bytes = std::fs::read(dir.path().join("Si.tif")).unwrap();
    std::fs::write(dir.path().join("Si.tif"), &bytes[..bytes.len() - 3000]).unwrap();
    assert_refused(&inspect(dir.path()), 3, &["Si.tif", "not a readable TIFF"]);
}

#[test]
fn colour_images_say_how_to_fix() {
    let dir = tempfile::tempdir().unwrap();
    write_png_rgb(&dir.path().join("Fe.png"), 4, 4, &[9; 48]).unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["Fe.png", "RGB colour PNG", "grayscale"],
    );

    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("Cu.tif");
    let f = std::fs::File::create(&p).unwrap();
    let mut enc = tiff::encoder::TiffEncoder::new(f).unwrap();
    enc.write_image::<tiff::encoder::colortype::RGB8>(2, 2, &[1u8; 12])
        .unwrap();
    drop(enc);
    assert_refused(&inspect(dir.path()), 3, &["Cu.tif", "RGB colour TIFF"]);
}

#[test]
fn nan_inf_and_negative_float_maps() {
    for (bad, key) in [
        (f32::NAN, "NaN"),
        (f32::INFINITY, "infinite"),
        (-3.0, "negative value (-3)"),
    ] {
        let dir = tempfile::tempdir().unwrap();
        let mut v = vec![1.0f32; 48];
        v[13] = bad;
        write_tiff(&dir.path().join("Ti.tif"), 8, 6, TiffData::F32(&v)).unwrap();
        assert_refused(
            &inspect(dir.path()),
            3,
            &["Ti.tif", key, "pixel (x=5, y=1)"],
        );
    }
}

/// A valid PNG whose header claims `w × h`: the IHDR chunk rewritten with a correct CRC
/// (PNG specification, ISO/IEC 15948, §5.3: CRC-32 over chunk type and data).
fn png_claiming(path: &Path, w: u32, h: u32) {
    write_png_u8(path, 2, 2, &[1; 4]).unwrap();
    let mut b = std::fs::read(path).unwrap();
    b[16..20].copy_from_slice(&w.to_be_bytes());
    b[20..24].copy_from_slice(&h.to_be_bytes());
    let crc = crc32fast::hash(&b[12..29]);
    b[29..33].copy_from_slice(&crc.to_be_bytes());
    std::fs::write(path, b).unwrap();
}

#[test]
fn absurd_dimensions_fail_fast() {
    let dir = tempfile::tempdir().unwrap();
    png_claiming(&dir.path().join("Fe.png"), 60_000, 60_000);
    assert_refused(
        &inspect(dir.path()),
        3,
        &["Fe.png", "60000×60000", "above the limit", "--max-pixels"],
    );
    // Raising the limit gets past the size check, and the missing data is then reported.
    let r = modalmap(&[
        "inspect",
        "--max-pixels",
        "4000000000",
        dir.path().to_str().unwrap(),
    ]);
    assert_refused(&r, 3, &["Fe.png", "not a readable PNG"]);
}

#[test]
fn bad_sidecar_is_named() {
    let dir = tempfile::tempdir().unwrap();
    good_map(dir.path(), "Fe.png");
    std::fs::write(dir.path().join("field.toml"), "pixel_size = 0.2\n").unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["field.toml", "pixel_size", "allowed keys"],
    );
    std::fs::write(dir.path().join("field.toml"), "pixel_size_um = -1\n").unwrap();
    assert_refused(
        &inspect(dir.path()),
        3,
        &["field.toml", "pixel_size_um = -1"],
    );
    std::fs::write(dir.path().join("field.toml"), "[lines]\nFE = \"K\"\n").unwrap();
    assert_refused(&inspect(dir.path()), 3, &["field.toml", "`FE`"]);
}

#[test]
fn all_zero_map_warns_and_succeeds() {
    let dir = tempfile::tempdir().unwrap();
    good_map(dir.path(), "Fe.png");
    write_png_u8(&dir.path().join("Cr.png"), 8, 6, &[0; 48]).unwrap();
    let r = inspect(dir.path());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stdout.contains("Cr map") && r.stdout.contains("zero everywhere"),
        "{}",
        r.stdout
    );
}

#[test]
fn truncated_hdf5_is_refused() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/hdf5/group_layout.h5");
    let bytes = std::fs::read(src).unwrap();
    let dir = tempfile::tempdir().unwrap();
    for cut in [bytes.len() / 2, 600, 8] {
        let p = dir.path().join(format!("cut{cut}.h5"));
        std::fs::write(&p, &bytes[..cut]).unwrap();
        let r = modalmap(&["inspect", p.to_str().unwrap()]);
        assert_refused(&r, 3, &[&format!("cut{cut}.h5")]);
    }
}

/// An HDF5 stack written height × width × element (as image libraries hold colour
/// planes) is refused with the transpose it needs, not only "the plane count differs".
#[test]
fn an_hdf5_stack_stored_pixels_first_gets_the_transpose_hint() {
    use hdf5_pure::AttrValue;
    let dir = tempfile::tempdir().unwrap();
    let (h, w, e) = (6u64, 5u64, 3u64);
    let data: Vec<f32> = (0..h * w * e).map(|i| (i % 7) as f32).collect();
    let mut b = hdf5_pure::FileBuilder::new();
    b.create_dataset("maps")
        .with_f32_data(&data)
        .with_shape(&[h, w, e])
        .set_attr(
            "elements",
            AttrValue::StringArray(vec!["Fe".into(), "Cu".into(), "Sn".into()]),
        );
    let file = dir.path().join("stack.h5");
    b.write(&file).unwrap();
    let r = modalmap(&["inspect", file.to_str().unwrap()]);
    assert_refused(
        &r,
        3,
        &[
            "stack.h5",
            "6 × 5 × 3",
            "height × width × element",
            "np.moveaxis(a, -1, 0)",
        ],
    );
}

#[test]
fn bad_option_values_exit_2() {
    let r = modalmap(&["inspect", "--max-pixels", "lots", "x"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    let r = modalmap(&["frobnicate"]);
    assert_eq!(r.code, 2);
}

/// `modalmap inspect … | head`: a reader that goes away ends the program quietly (killed by
/// SIGPIPE, as any Unix tool), not with "internal error … Broken pipe".
#[test]
fn a_closed_pipe_is_a_quiet_exit() {
    use std::os::unix::process::ExitStatusExt;
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .args(["inspect", sample.to_str().unwrap()])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take()); // the reader is gone before anything is written
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.is_empty(), "{stderr}");
    assert_eq!(out.status.signal(), Some(libc::SIGPIPE), "{:?}", out.status);
}

/// A configuration file takes the natural TOML type: `phases = 3` as well as `"3"`.
#[test]
fn config_numbers_may_be_written_as_numbers() {
    let tmp = tempfile::tempdir().unwrap();
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    for value in ["3", "\"3\""] {
        let cfg = tmp.path().join("run.toml");
        std::fs::write(&cfg, format!("phases = {value}\n")).unwrap();
        let out = tmp.path().join(format!("out{}", value.len()));
        let r = modalmap(&[
            "map",
            sample.to_str().unwrap(),
            "-o",
            out.to_str().unwrap(),
            "--config",
            cfg.to_str().unwrap(),
            "--quiet",
            "--no-bse",
        ]);
        assert_eq!(r.code, 0, "phases = {value}: {}", r.stderr);
        let rep: serde_json::Value =
            serde_json::from_slice(&std::fs::read(out.join("report.json")).unwrap()).unwrap();
        assert_eq!(
            rep["phases"].as_array().unwrap().len(),
            3,
            "phases = {value}"
        );
    }
    std::fs::write(tmp.path().join("bad.toml"), "phases = 2.5\n").unwrap();
    let r = modalmap(&[
        "map",
        sample.to_str().unwrap(),
        "-o",
        tmp.path().join("o").to_str().unwrap(),
        "--config",
        tmp.path().join("bad.toml").to_str().unwrap(),
    ]);
    assert_refused(&r, 2, &["bad.toml"]);
}

/// `synth` refuses the options its scenario ignores instead of dropping them.
#[test]
fn synth_refuses_what_it_would_ignore() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("s");
    for extra in [["--seed", "7"], ["--size", "64"]] {
        let mut args = vec!["synth", "-o", out.to_str().unwrap()];
        args.extend(extra);
        let r = modalmap(&args);
        assert_refused(&r, 2, &[extra[0], "--scenario benchmark-rock"]);
        assert!(!out.exists());
    }
}

/// `auto` that chooses the largest count it was allowed says so: the sample has five
/// phases, `auto:3` cannot find them all.
#[test]
fn auto_at_its_maximum_is_remarked() {
    let tmp = tempfile::tempdir().unwrap();
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let out = tmp.path().join("out");
    let r = modalmap(&[
        "map",
        sample.to_str().unwrap(),
        "-o",
        out.to_str().unwrap(),
        "--phases",
        "auto:3",
        "--no-bse",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("try --phases auto:7"), "{}", r.stdout);
    let rep: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("report.json")).unwrap()).unwrap();
    assert!(rep["warnings"].to_string().contains("largest count tried"));
}

/// A calibration that names a phase the field does not have lists the phases found.
#[test]
fn a_wrong_calibration_phase_lists_the_phases_found() {
    let tmp = tempfile::tempdir().unwrap();
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let r = modalmap(&[
        "map",
        sample.to_str().unwrap(),
        "-o",
        tmp.path().join("o").to_str().unwrap(),
        "--calibrate",
        "9=Cu3Sn",
        "--no-bse",
    ]);
    assert_refused(&r, 2, &["--calibrate 9=Cu3Sn", "no phase 9", "1 (", "5 ("]);
    assert!(!tmp.path().join("o").exists());
}
