//! A corpus of broken and hostile inputs, generated here (nothing committed but the h5py
//! fixtures it mutates). For every case the binary must either succeed (mutations that
//! still decode are valid data) or fail cleanly: a documented exit code (2 options, 3 input,
//! 4 output; never 101, a panic, nor 70, a bug), a message naming the file with the
//! problem and its fix, no output folder left behind, and the inputs byte-identical.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use common::modalmap;
use modalmap::io::raster::{write_png_rgb, write_png_u16, write_png_u8, write_tiff, TiffData};

/// What a case may end with.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Expect {
    /// This exit code.
    Fails(i32),
    /// Success (the damage left valid data), or a clean failure as a bad input (exit 3)
    /// whose message names the damaged file.
    Either,
}

struct Case {
    name: String,
    input: PathBuf,
    extra: Vec<String>,
    out: PathBuf,
    expect: Expect,
    /// Text the error message must contain (a file name), when it fails.
    names: Vec<String>,
}

/// A valid field: Fe, Si, O maps of two phases (32 × 24, 16-bit PNG).
fn good_field(dir: &Path) {
    std::fs::create_dir_all(dir).unwrap();
    let (w, h) = (32usize, 24usize);
    let phase = |i: usize| (i % w) < 16;
    let mk = |a: u16, b: u16, seed: usize| -> Vec<u16> {
        (0..w * h)
            .map(|i| if phase(i) { a } else { b } + ((i * 7 + seed) % 5) as u16)
            .collect()
    };
    write_png_u16(&dir.join("Fe.png"), w, h, &mk(40, 5, 1)).unwrap();
    write_png_u16(&dir.join("Si.png"), w, h, &mk(4, 30, 2)).unwrap();
    write_png_u16(&dir.join("O.png"), w, h, &mk(10, 20, 3)).unwrap();
}

fn hash_tree(root: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    use sha2::Digest;
    let mut out = BTreeMap::new();
    if root.is_file() {
        out.insert(
            root.to_path_buf(),
            sha2::Sha256::digest(std::fs::read(root).unwrap()).to_vec(),
        );
        return out;
    }
    if let Ok(rd) = std::fs::read_dir(root) {
        for e in rd {
            let p = e.unwrap().path();
            out.extend(hash_tree(&p));
        }
    }
    out
}

/// Cuts a file: `keep` ≥ 1 is a byte count, below 1 a fraction of the length.
fn truncate(p: &Path, keep: f64) {
    let b = std::fs::read(p).unwrap();
    let n = if keep >= 1.0 {
        keep as usize
    } else {
        (b.len() as f64 * keep) as usize
    };
    assert!(n < b.len(), "cut {keep} keeps all of {}", p.display());
    std::fs::write(p, &b[..n]).unwrap();
}

fn flip(p: &Path, at: f64) {
    let mut b = std::fs::read(p).unwrap();
    let i = ((b.len() - 1) as f64 * at) as usize;
    b[i] ^= 0x5A;
    std::fs::write(p, b).unwrap();
}

fn hdf5_fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/hdf5")
        .join(name)
}

fn corpus(root: &Path) -> Vec<Case> {
    let mut cases = Vec::new();
    let mut n = 0;
    let mut case = |name: &str,
                    expect: Expect,
                    names: &[&str],
                    extra: &[&str],
                    make: &dyn Fn(&Path) -> PathBuf| {
        n += 1;
        let dir = root.join(format!("case{n:03}"));
        std::fs::create_dir_all(&dir).unwrap();
        let input = make(&dir);
        cases.push(Case {
            name: name.to_string(),
            input,
            extra: extra.iter().map(|s| s.to_string()).collect(),
            out: dir.join("out"),
            expect,
            names: names.iter().map(|s| s.to_string()).collect(),
        });
    };
    let field = |d: &Path| -> PathBuf {
        let f = d.join("field");
        good_field(&f);
        f
    };
    // Truncated PNG, TIFF and HDF5 files at many places.
    for keep in [0.0, 8.0, 20.0, 33.0, 50.0, 0.3, 0.6, 0.9] {
        case(
            &format!("PNG cut at {keep} bytes"),
            Expect::Fails(3),
            &["Fe.png"],
            &[],
            &move |d| {
                let f = field(d);
                truncate(&f.join("Fe.png"), keep);
                f
            },
        );
    }
    for keep in [0.0, 4.0, 8.0, 60.0, 0.5, 0.8] {
        case(
            &format!("TIFF cut at {keep} bytes"),
            Expect::Fails(3),
            &["Si.tif"],
            &[],
            &move |d| {
                let f = field(d);
                std::fs::remove_file(f.join("Si.png")).unwrap();
                write_tiff(&f.join("Si.tif"), 32, 24, TiffData::U16(&[7; 768])).unwrap();
                truncate(&f.join("Si.tif"), keep);
                f
            },
        );
    }
    for keep in [0.0, 8.0, 100.0, 0.2, 0.5, 0.8] {
        case(
            &format!("HDF5 cut at {keep} bytes"),
            Expect::Fails(3),
            &["cut.h5"],
            &[],
            &move |d| {
                let p = d.join("cut.h5");
                std::fs::copy(hdf5_fixture("group_layout.h5"), &p).unwrap();
                truncate(&p, keep);
                p
            },
        );
    }
    // Bit flips: the file may still decode (then it is valid data) or must fail cleanly.
    for at in [0.0, 0.02, 0.1, 0.3, 0.5, 0.9, 0.999] {
        case(
            &format!("PNG byte flipped at {at}"),
            Expect::Either,
            &["Fe.png"],
            &[],
            &move |d| {
                let f = field(d);
                flip(&f.join("Fe.png"), at);
                f
            },
        );
        case(
            &format!("HDF5 byte flipped at {at}"),
            Expect::Either,
            &["x.h5"],
            &[],
            &move |d| {
                let p = d.join("x.h5");
                std::fs::copy(hdf5_fixture("group_layout.h5"), &p).unwrap();
                flip(&p, at);
                p
            },
        );
    }
    for at in [0.0, 0.01, 0.2, 0.6, 0.95] {
        case(
            &format!("TIFF byte flipped at {at}"),
            Expect::Either,
            &["Si.tif"],
            &[],
            &move |d| {
                let f = field(d);
                std::fs::remove_file(f.join("Si.png")).unwrap();
                write_tiff(&f.join("Si.tif"), 32, 24, TiffData::U16(&[7; 768])).unwrap();
                flip(&f.join("Si.tif"), at);
                f
            },
        );
    }
    // Wrong contents for the extension.
    case(
        "TIFF bytes named .png",
        Expect::Fails(3),
        &["Fe.png"],
        &[],
        &|d| {
            let f = field(d);
            write_tiff(&f.join("Fe.png"), 32, 24, TiffData::U16(&[7; 768])).unwrap();
            f
        },
    );
    case(
        "PNG bytes named .tif",
        Expect::Fails(3),
        &["Si.tif"],
        &[],
        &|d| {
            let f = field(d);
            std::fs::rename(f.join("Si.png"), f.join("Si.tif")).unwrap();
            f
        },
    );
    case(
        "JPEG magic in a .png",
        Expect::Fails(3),
        &["O.png"],
        &[],
        &|d| {
            let f = field(d);
            std::fs::write(
                f.join("O.png"),
                [0xFF, 0xD8, 0xFF, 0xE0, 0, 16, b'J', b'F', b'I', b'F'],
            )
            .unwrap();
            f
        },
    );
    case(
        "text in an .h5",
        Expect::Fails(3),
        &["notes.h5"],
        &[],
        &|d| {
            let p = d.join("notes.h5");
            std::fs::write(&p, "these are my notes, not a field").unwrap();
            p
        },
    );
    // Absurd declared sizes.
    for (w, h) in [
        (60_000u32, 60_000u32),
        (1, 4_000_000_000),
        (100_000, 100_000),
    ] {
        case(
            &format!("PNG declaring {w}×{h}"),
            Expect::Fails(3),
            &["Fe.png"],
            &[],
            &move |d| {
                let f = field(d);
                let p = f.join("Fe.png");
                let mut b = std::fs::read(&p).unwrap();
                b[16..20].copy_from_slice(&w.to_be_bytes());
                b[20..24].copy_from_slice(&h.to_be_bytes());
                let crc = crc32fast::hash(&b[12..29]);
                b[29..33].copy_from_slice(&crc.to_be_bytes());
                std::fs::write(&p, b).unwrap();
                f
            },
        );
    }
    // Colour and other non-grayscale images.
    case("RGB PNG", Expect::Fails(3), &["Fe.png"], &[], &|d| {
        let f = field(d);
        write_png_rgb(&f.join("Fe.png"), 32, 24, &[50; 32 * 24 * 3]).unwrap();
        f
    });
    for (label, color, channels) in [
        ("RGBA PNG", png::ColorType::Rgba, 4usize),
        ("gray+alpha PNG", png::ColorType::GrayscaleAlpha, 2),
        ("palette PNG", png::ColorType::Indexed, 1),
    ] {
        case(label, Expect::Fails(3), &["Fe.png"], &[], &move |d| {
            let f = field(d);
            let file = std::fs::File::create(f.join("Fe.png")).unwrap();
            let mut enc = png::Encoder::new(std::io::BufWriter::new(file), 32, 24);
            enc.set_color(color);
            enc.set_depth(png::BitDepth::Eight);
            if color == png::ColorType::Indexed {
                enc.set_palette(vec![0u8, 0, 0, 255, 255, 255]);
            }
            let mut w = enc.write_header().unwrap();
            w.write_image_data(&vec![1u8; 32 * 24 * channels]).unwrap();
            w.finish().unwrap();
            f
        });
    }
    case("RGB TIFF", Expect::Fails(3), &["Si.tif"], &[], &|d| {
        let f = field(d);
        std::fs::remove_file(f.join("Si.png")).unwrap();
        let file = std::fs::File::create(f.join("Si.tif")).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(file).unwrap();
        enc.write_image::<tiff::encoder::colortype::RGB8>(32, 24, &[9u8; 32 * 24 * 3])
            .unwrap();
        f
    });
    // Structure of the folder.
    case("empty folder", Expect::Fails(3), &["empty"], &[], &|d| {
        let p = d.join("empty");
        std::fs::create_dir(&p).unwrap();
        p
    });
    case(
        "only unknown symbols",
        Expect::Fails(3),
        &["odd"],
        &[],
        &|d| {
            let p = d.join("odd");
            std::fs::create_dir(&p).unwrap();
            write_png_u8(&p.join("Xx.png"), 4, 4, &[1; 16]).unwrap();
            write_png_u8(&p.join("SE.png"), 4, 4, &[1; 16]).unwrap();
            write_png_u8(&p.join("fe.png"), 4, 4, &[1; 16]).unwrap();
            p
        },
    );
    case(
        "maps of different sizes",
        Expect::Fails(3),
        &["Si.png"],
        &[],
        &|d| {
            let f = field(d);
            write_png_u16(&f.join("Si.png"), 16, 12, &[3; 192]).unwrap();
            f
        },
    );
    case(
        "more element maps than the kernels take",
        Expect::Fails(3),
        &["65 element maps"],
        &[],
        &|d| {
            let f = d.join("field");
            std::fs::create_dir_all(&f).unwrap();
            let symbols = "Be B C N O F Na Mg Al Si P S Cl K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn \
                           Ga Ge As Se Br Rb Sr Y Zr Nb Mo Ru Rh Pd Ag Cd In Sn Sb Te I Cs Ba \
                           La Ce Pr Nd Sm Eu Gd Tb Dy Ho Er Tm Yb Lu Hf Ta W";
            for (i, el) in symbols.split_whitespace().enumerate() {
                let v: Vec<u16> = (0..64).map(|p| ((p * 7 + i) % 11) as u16).collect();
                write_png_u16(&f.join(format!("{el}.png")), 8, 8, &v).unwrap();
            }
            f
        },
    );
    case(
        "duplicate element",
        Expect::Fails(3),
        &["Fe.png", "Fe_Ka.tif"],
        &[],
        &|d| {
            let f = field(d);
            write_tiff(&f.join("Fe_Ka.tif"), 32, 24, TiffData::U16(&[7; 768])).unwrap();
            f
        },
    );
    for (label, bad) in [
        ("NaN", f32::NAN),
        ("+Inf", f32::INFINITY),
        ("-Inf", f32::NEG_INFINITY),
        ("negative", -1.0),
    ] {
        case(
            &format!("{label} in a float map"),
            Expect::Fails(3),
            &["Ti.tif"],
            &[],
            &move |d| {
                let f = field(d);
                let mut v = vec![3.0f32; 768];
                v[100] = bad;
                write_tiff(&f.join("Ti.tif"), 32, 24, TiffData::F32(&v)).unwrap();
                f
            },
        );
    }
    case(
        "1-pixel maps",
        Expect::Fails(2),
        &["1 non-empty pixels"],
        &[],
        &|d| {
            let p = d.join("tiny");
            std::fs::create_dir(&p).unwrap();
            write_png_u8(&p.join("Fe.png"), 1, 1, &[9]).unwrap();
            write_png_u8(&p.join("Si.png"), 1, 1, &[9]).unwrap();
            p
        },
    );
    case(
        "all-zero stack",
        Expect::Fails(2),
        &["non-empty pixels"],
        &[],
        &|d| {
            let p = d.join("zeros");
            std::fs::create_dir(&p).unwrap();
            write_png_u8(&p.join("Fe.png"), 8, 8, &[0; 64]).unwrap();
            write_png_u8(&p.join("Si.png"), 8, 8, &[0; 64]).unwrap();
            p
        },
    );
    case(
        "single element",
        Expect::Either,
        &["Fe.png"],
        &["--phases", "2"],
        &|d| {
            let f = field(d);
            std::fs::remove_file(f.join("Si.png")).unwrap();
            std::fs::remove_file(f.join("O.png")).unwrap();
            f
        },
    );
    case(
        "more phases than distinct pixels",
        Expect::Fails(2),
        &["cannot be told apart"],
        &["--phases", "5"],
        &|d| {
            let p = d.join("two");
            std::fs::create_dir(&p).unwrap();
            let v: Vec<u8> = (0..64).map(|i| if i % 2 == 0 { 10 } else { 40 }).collect();
            write_png_u8(&p.join("Fe.png"), 8, 8, &v).unwrap();
            p
        },
    );
    case(
        "BSE of another aspect ratio",
        Expect::Fails(3),
        &["wide.png"],
        &[],
        &|d| {
            let f = field(d);
            write_png_u8(&d.join("wide.png"), 300, 100, &[9; 30_000]).unwrap();
            f
        },
    );
    // Outputs that cannot be written.
    case("OUT is a file", Expect::Fails(4), &["out"], &[], &|d| {
        std::fs::write(d.join("out"), "not a folder").unwrap();
        field(d)
    });
    case(
        "OUT below a file",
        Expect::Fails(4),
        &["blocker"],
        &[],
        &|d| {
            std::fs::write(d.join("blocker"), "x").unwrap();
            field(d)
        },
    );
    case(
        "OUT not empty, no --force",
        Expect::Fails(4),
        &["out", "--force"],
        &[],
        &|d| {
            std::fs::create_dir(d.join("out")).unwrap();
            std::fs::write(d.join("out").join("old.txt"), "keep me").unwrap();
            field(d)
        },
    );
    // Configuration and metadata files.
    for (label, text, key) in [
        (
            "config with a syntax error",
            "phases = \"auto\n",
            "run.toml",
        ),
        ("config with an unknown key", "phase = 3\n", "phase"),
        ("config with a wrong type", "bin = \"two\"\n", "run.toml"),
        ("config with a bad method", "method = \"magic\"\n", "magic"),
    ] {
        case(
            label,
            Expect::Fails(2),
            &[key],
            &["--config", "CONFIG"],
            &move |d| {
                std::fs::write(d.join("run.toml"), text).unwrap();
                field(d)
            },
        );
    }
    for (label, text, key) in [
        (
            "field.toml with a syntax error",
            "pixel_size_um = [\n",
            "field.toml",
        ),
        (
            "field.toml with an unknown key",
            "pixelsize = 1\n",
            "pixelsize",
        ),
        (
            "field.toml with a zero pixel size",
            "pixel_size_um = 0\n",
            "pixel_size_um",
        ),
    ] {
        case(label, Expect::Fails(3), &[key], &[], &move |d| {
            let f = field(d);
            std::fs::write(f.join("field.toml"), text).unwrap();
            f
        });
    }
    // Bad option values.
    for (label, args) in [
        ("zero phases", vec!["--phases", "0"]),
        ("bin 0", vec!["--bin", "0"]),
        ("threads 5000", vec!["--threads", "5000"]),
        ("median radius 0", vec!["--denoise", "median:0"]),
    ] {
        case(label, Expect::Fails(2), &[args[0]], &args, &|d| field(d));
    }
    // Malformed k-factor and reference-library files, and impossible calibrations.
    let k_ok = "format = \"modalmap.kfactors/1\"\n[k]\nFe = 1.0\nSi = 1.2\nO = 2.0\n";
    for (label, file, text, names) in [
        (
            "k-factor file not TOML",
            "k.toml",
            "format = [",
            vec!["k.toml"],
        ),
        (
            "k-factor file of another format",
            "k.toml",
            "format = \"x/1\"\n[k]\nFe = 1\n",
            vec!["k.toml", "format"],
        ),
        (
            "k-factor file missing a mapped element",
            "k.toml",
            "format = \"modalmap.kfactors/1\"\n[k]\nFe = 1.0\nSi = 1.2\n",
            vec!["k.toml", "O"],
        ),
        (
            "negative k-factor",
            "k.toml",
            "format = \"modalmap.kfactors/1\"\n[k]\nFe = -1.0\nSi = 1.2\nO = 2\n",
            vec!["k.toml", "Fe"],
        ),
        (
            "k-factor for a non-element",
            "k.toml",
            "format = \"modalmap.kfactors/1\"\n[k]\nXx = 1.0\n",
            vec!["k.toml", "Xx"],
        ),
        (
            "k-factor reference without a factor",
            "k.toml",
            "format = \"modalmap.kfactors/1\"\nreference = \"Ni\"\n[k]\nFe = 1.0\n",
            vec!["k.toml", "Ni"],
        ),
    ] {
        case(
            label,
            Expect::Fails(2),
            &names,
            &["--kfactors", &format!("DIR/{file}")],
            &move |d| {
                std::fs::write(d.join(file), text).unwrap();
                field(d)
            },
        );
    }
    for (label, text, names) in [
        ("library file not TOML", "[[phase]", vec!["lib.toml"]),
        ("library without format", "[[phase]]\nname = \"x\"\nformula = \"Fe\"\n", vec!["lib.toml"]),
        ("library with a bad formula", "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\nformula = \"Fe2(\"\n", vec!["lib.toml", "Fe2("]),
        ("library entry with formula and composition", "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\nformula = \"Fe\"\ncomposition = { Fe = 1 }\n", vec!["lib.toml", "exactly one"]),
        ("library with an absurd density", "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\nformula = \"Fe\"\ndensity = 900\n", vec!["lib.toml", "density"]),
    ] {
        case(label, Expect::Fails(2), &names, &["--library", "DIR/lib.toml"], &move |d| {
            std::fs::write(d.join("lib.toml"), text).unwrap();
            field(d)
        });
    }
    for (label, args, names) in [
        (
            "calibration on a phase that does not exist",
            vec!["--calibrate", "9=Fe2SiO4"],
            vec!["phase 9"],
        ),
        (
            "calibration with a bad formula",
            vec!["--calibrate", "1=Qq2"],
            vec!["Qq2"],
        ),
        (
            "calibration that leaves elements without a factor",
            vec!["--calibrate", "1=Fe"],
            vec!["Si"],
        ),
        (
            "calibration on an unknown phase name",
            vec!["--calibrate", "unobtainium=Fe"],
            vec!["unobtainium"],
        ),
        (
            "calibration and k-factor file together",
            vec!["--calibrate", "1=Fe2SiO4", "--kfactors", "DIR/k.toml"],
            vec!["--kfactors"],
        ),
        (
            "malformed valence",
            vec!["--oxygen", "stoichiometry", "--valence", "Fe=x"],
            vec!["Fe=x"],
        ),
    ] {
        case(label, Expect::Fails(2), &names, &args, &move |d| {
            std::fs::write(d.join("k.toml"), k_ok).unwrap();
            field(d)
        });
    }
    case(
        "valid k-factor file",
        Expect::Fails(0),
        &[],
        &["--kfactors", "DIR/k.toml", "--oxygen", "stoichiometry"],
        &move |d| {
            std::fs::write(d.join("k.toml"), k_ok).unwrap();
            field(d)
        },
    );
    // Odd but valid paths.
    case(
        "spaces and non-ASCII in the path",
        Expect::Fails(0),
        &[],
        &[],
        &|d| {
            let f = d.join("mes cartes ñandú");
            good_field(&f);
            f
        },
    );
    case(
        "nonexistent input",
        Expect::Fails(3),
        &["nowhere"],
        &[],
        &|d| d.join("nowhere"),
    );
    case(
        "a single image as input",
        Expect::Fails(3),
        &["Fe.png"],
        &[],
        &|d| field(d).join("Fe.png"),
    );
    for (name, key) in [
        ("mismatched_sizes.h5", "24×8"),
        ("nan_values.h5", "NaN"),
        ("no_maps.h5", "no element maps"),
        ("stack_without_elements.h5", "elements"),
    ] {
        case(
            &format!("h5py fixture {name}"),
            Expect::Fails(3),
            &[key],
            &[],
            &move |d| {
                let p = d.join(name);
                std::fs::copy(hdf5_fixture(name), &p).unwrap();
                p
            },
        );
    }
    cases
}

#[test]
fn every_hostile_input_fails_cleanly_and_leaves_the_inputs_alone() {
    let tmp = tempfile::tempdir().unwrap();
    let cases = corpus(tmp.path());
    assert!(cases.len() >= 60, "{} cases", cases.len());
    let mut report = Vec::new();
    for c in &cases {
        let dir = c.out.parent().unwrap();
        let before = hash_tree(&c.input);
        let out = if c.name == "OUT below a file" {
            dir.join("blocker").join("out")
        } else {
            c.out.clone()
        };
        let out_before = hash_tree(&out);
        let mut args: Vec<String> = vec![
            "map".into(),
            c.input.display().to_string(),
            "-o".into(),
            out.display().to_string(),
            "--quiet".into(),
        ];
        if !c.extra.iter().any(|a| a == "--phases") {
            args.extend(["--phases".into(), "2".into()]);
        }
        for a in &c.extra {
            args.push(if a == "CONFIG" {
                dir.join("run.toml").display().to_string()
            } else if let Some(name) = a.strip_prefix("DIR/") {
                dir.join(name).display().to_string()
            } else {
                a.clone()
            });
        }
        if c.name == "BSE of another aspect ratio" {
            args.push("--bse".into());
            args.push(dir.join("wide.png").display().to_string());
        }
        let refs: Vec<&str> = args.iter().map(String::as_str).collect();
        let r = modalmap(&refs);
        report.push(format!("{:<45} exit {}", c.name, r.code));
        assert!(
            r.code != 101 && r.code != 70 && !r.stderr.contains("panicked"),
            "{}: exit {}\n{}",
            c.name,
            r.code,
            r.stderr
        );
        match c.expect {
            Expect::Fails(0) => assert_eq!(r.code, 0, "{}: {}", c.name, r.stderr),
            Expect::Fails(code) => assert_eq!(r.code, code, "{}: {}", c.name, r.stderr),
            Expect::Either => assert!([0, 3].contains(&r.code), "{}: exit {}", c.name, r.code),
        }
        if r.code != 0 {
            assert!(
                (r.stderr.starts_with("error: ") || r.stderr.contains("\nerror: "))
                    && r.stderr.contains("fix: "),
                "{}: {}",
                c.name,
                r.stderr
            );
            for name in &c.names {
                assert!(
                    r.stderr.contains(name.as_str()),
                    "{}: `{name}` not in\n{}",
                    c.name,
                    r.stderr
                );
            }
            // Nothing written: OUT is as it was before the run.
            assert_eq!(hash_tree(&out), out_before, "{}: output changed", c.name);
        } else {
            assert!(out.join("report.json").is_file(), "{}", c.name);
        }
        assert_eq!(hash_tree(&c.input), before, "{}: the input changed", c.name);
        // No temporary folder is left beside OUT.
        if let Some(parent) = out.parent().filter(|p| p.is_dir()) {
            let tmp_left = std::fs::read_dir(parent)
                .unwrap()
                .filter_map(|e| e.ok())
                .any(|e| e.file_name().to_string_lossy().contains("modalmap-tmp"));
            assert!(!tmp_left, "{}: temporary folder left", c.name);
        }
    }
    println!("{}", report.join("\n"));
}
