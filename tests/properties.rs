//! Property tests: loaders and the formula parser never panic on arbitrary or mutated
//! input, and valid stacks and formulas round-trip.

use std::path::Path;

use modalmap::chem::{element, parse_formula};
use modalmap::io::raster::{write_png_u16, write_tiff, TiffData};
use modalmap::io::{load_field, Limits};
use proptest::prelude::*;

fn limits() -> Limits {
    Limits {
        max_pixels: 1 << 20,
    }
}

/// Loading never panics; it returns a field or an error naming the problem.
fn load_never_panics(dir: &Path) {
    match std::panic::catch_unwind(|| load_field(dir, &limits())) {
        Ok(Ok(_)) => {}
        Ok(Err(e)) => assert!(!e.problem.is_empty() && !e.fix.is_empty()),
        Err(_) => panic!("loader panicked"),
    }
}

fn valid_files(dir: &Path) -> Vec<(String, Vec<u8>)> {
    write_png_u16(
        &dir.join("Fe.png"),
        9,
        7,
        &(0..63).map(|i| i * 100).collect::<Vec<u16>>(),
    )
    .unwrap();
    write_tiff(
        &dir.join("Si.tif"),
        9,
        7,
        TiffData::F32(&(0..63).map(|i| i as f32 * 0.5).collect::<Vec<f32>>()),
    )
    .unwrap();
    let h5 = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/hdf5/group_layout.h5");
    vec![
        ("Fe.png".into(), std::fs::read(dir.join("Fe.png")).unwrap()),
        ("Si.tif".into(), std::fs::read(dir.join("Si.tif")).unwrap()),
        ("x.h5".into(), std::fs::read(h5).unwrap()),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 96, ..ProptestConfig::default() })]

    #[test]
    fn random_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..2048), which in 0usize..3) {
        let dir = tempfile::tempdir().unwrap();
        let name = ["Fe.png", "Si.tif", "x.h5"][which];
        std::fs::write(dir.path().join(name), &bytes).unwrap();
        if which == 2 {
            load_never_panics(&dir.path().join(name));
        } else {
            load_never_panics(dir.path());
        }
    }

    #[test]
    fn mutated_files_never_panic(which in 0usize..3, cut in 0.0f64..1.0, flips in proptest::collection::vec((0.0f64..1.0, any::<u8>()), 0..6)) {
        let src = tempfile::tempdir().unwrap();
        let files = valid_files(src.path());
        let (name, mut bytes) = files[which].clone();
        for (at, x) in flips {
            let i = ((bytes.len() - 1) as f64 * at) as usize;
            bytes[i] ^= x;
        }
        bytes.truncate(((bytes.len() as f64) * (0.5 + cut / 2.0)) as usize);
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join(&name), &bytes).unwrap();
        if which == 2 {
            load_never_panics(&dir.path().join(&name));
        } else {
            load_never_panics(dir.path());
        }
    }

    #[test]
    fn valid_stacks_round_trip(w in 1usize..24, h in 1usize..24, n in 1usize..4, seed in any::<u64>()) {
        let dir = tempfile::tempdir().unwrap();
        let symbols = ["Mg", "Si", "Fe"];
        let mut want = Vec::new();
        for (e, sym) in symbols.iter().take(n).enumerate() {
            let v: Vec<u16> = (0..w * h).map(|i| ((i as u64).wrapping_mul(seed | 1).wrapping_add(e as u64 * 7919) % 65536) as u16).collect();
            if e % 2 == 0 {
                write_png_u16(&dir.path().join(format!("{sym}.png")), w, h, &v).unwrap();
            } else {
                write_tiff(&dir.path().join(format!("{sym}_Ka.tif")), w, h, TiffData::U16(&v)).unwrap();
            }
            want.push((sym.to_string(), v));
        }
        let f = load_field(dir.path(), &limits()).unwrap();
        prop_assert_eq!((f.stack.width(), f.stack.height()), (w, h));
        for (sym, v) in want {
            let got: Vec<u16> = f.stack.map(&sym).unwrap().counts.iter().map(|&c| c as u16).collect();
            prop_assert_eq!(got, v);
        }
    }

    #[test]
    fn formula_parser_never_panics(s in "\\PC{0,24}") {
        let _ = parse_formula(&s);
    }

    #[test]
    fn generated_formulas_round_trip(parts in proptest::collection::vec((0usize..8, 1u32..40), 1..5)) {
        let symbols = ["H", "C", "O", "Na", "Al", "Si", "Fe", "Zr"];
        let text: String = parts.iter().map(|(e, n)| format!("{}{}", symbols[*e], n)).collect();
        let c = parse_formula(&text).unwrap();
        for (e, _) in &parts {
            let want: u32 = parts.iter().filter(|(x, _)| x == e).map(|(_, n)| n).sum();
            let got = c.atoms.iter().find(|(el, _)| el.symbol == symbols[*e]).unwrap().1;
            prop_assert_eq!(got, f64::from(want));
        }
        // Mass fractions sum to 1 and follow the atomic weights.
        let w: f64 = c.mass_fractions().iter().map(|(_, w)| w).sum();
        prop_assert!((w - 1.0).abs() < 1e-12);
        let m: f64 = parts.iter().map(|(e, n)| element(symbols[*e]).unwrap().atomic_weight * f64::from(*n)).sum();
        prop_assert!((c.molar_mass() - m).abs() < 1e-9 * m);
    }
}
