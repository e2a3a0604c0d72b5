//! Invented test scenarios for the forward model ([`super::forward`]), and a reader for the
//! label images the tool writes (the `png` crate).

use std::collections::BTreeMap;
use std::path::Path;

use super::forward::{mass_fractions, Phase, Scenario};

/// A phase of given mass fractions.
fn alloy(name: &'static str, wt: &[(&str, f64)]) -> Phase {
    Phase {
        name,
        composition: wt.iter().map(|(e, w)| (e.to_string(), *w)).collect(),
    }
}

/// The brazes' maps (element, counts per pixel at mass fraction 1, continuum per unit Z).
const BRAZE_MAPS: [(&str, f64, f64); 3] =
    [("Ti", 55.0, 0.04), ("Cu", 60.0, 0.04), ("Ag", 50.0, 0.04)];

/// Paints a disc `(cx, cy, r)` of `phase` into a row-major label grid of width `w`.
fn paint_disc(labels: &mut [usize], w: usize, (cx, cy, r): (f64, f64, f64), phase: usize) {
    for (i, l) in labels.iter_mut().enumerate() {
        let (x, y) = ((i % w) as f64, (i / w) as f64);
        if (x - cx).powi(2) + (y - cy).powi(2) <= r * r {
            *l = phase;
        }
    }
}

/// The phases of the steels: Fe–1Mn ferrite, Cr23C6, MnS, Al2O3.
fn steel_phases() -> Vec<Phase> {
    vec![
        alloy("ferrite", &[("Fe", 0.99), ("Mn", 0.01)]),
        Phase {
            name: "Cr23C6",
            composition: mass_fractions(&[("Cr", 23.0), ("C", 6.0)]),
        },
        Phase {
            name: "MnS",
            composition: mass_fractions(&[("Mn", 1.0), ("S", 1.0)]),
        },
        Phase {
            name: "Al2O3",
            composition: mass_fractions(&[("Al", 2.0), ("O", 3.0)]),
        },
    ]
}

/// The steels' maps: (element, counts per pixel at mass fraction 1, continuum per unit Z);
/// light elements weak, their continuum of the same order as a few wt% of signal.
fn steel_maps() -> Vec<(&'static str, f64, f64)> {
    vec![
        ("C", 12.0, 0.03),
        ("O", 12.0, 0.03),
        ("Al", 40.0, 0.03),
        ("S", 45.0, 0.035),
        ("Cr", 55.0, 0.04),
        ("Mn", 55.0, 0.04),
        ("Fe", 60.0, 0.04),
    ]
}

/// Quartz, albite and K-feldspar.
fn felsic_phases() -> Vec<Phase> {
    vec![
        Phase {
            name: "quartz",
            composition: mass_fractions(&[("Si", 1.0), ("O", 2.0)]),
        },
        Phase {
            name: "albite",
            composition: mass_fractions(&[("Na", 1.0), ("Al", 1.0), ("Si", 3.0), ("O", 8.0)]),
        },
        Phase {
            name: "K-feldspar",
            composition: mass_fractions(&[("K", 1.0), ("Al", 1.0), ("Si", 3.0), ("O", 8.0)]),
        },
    ]
}

/// The rocks' maps (element, counts per pixel at mass fraction 1, continuum per unit Z),
/// with Mg or without.
fn rock_maps(mg: bool) -> Vec<(&'static str, f64, f64)> {
    let mut maps = vec![
        ("O", 12.0, 0.03),
        ("Na", 30.0, 0.03),
        ("Al", 40.0, 0.03),
        ("Si", 45.0, 0.03),
        ("K", 50.0, 0.035),
        ("Fe", 60.0, 0.04),
    ];
    if mg {
        maps.insert(2, ("Mg", 35.0, 0.03));
    }
    maps
}

/// A `w × w` grid in four square blocks of side `b`, phases 0 (top left), 1 (top right),
/// 2 (bottom left) and 3.
fn four_blocks(w: usize, b: usize) -> Vec<usize> {
    (0..w * w)
        .map(|i| match ((i % w) / b, (i / w) / b) {
            (0, 0) => 0,
            (1, 0) => 1,
            (0, 1) => 2,
            _ => 3,
        })
        .collect()
}

/// A ferritic steel (an invented scenario): Fe–1Mn matrix with Cr23C6 carbides, MnS and
/// Al2O3 inclusions, mapped for C, O, Al, S, Cr, Mn and Fe.
pub fn steel() -> Scenario {
    let (w, h) = (160usize, 160usize);
    let mut labels = vec![0usize; w * h];
    let mut disc =
        |cx: f64, cy: f64, r: f64, phase: usize| paint_disc(&mut labels, w, (cx, cy, r), phase);
    for (i, (cx, cy)) in [
        (25.0, 25.0),
        (80.0, 20.0),
        (135.0, 30.0),
        (30.0, 130.0),
        (90.0, 140.0),
        (140.0, 120.0),
    ]
    .into_iter()
    .enumerate()
    {
        disc(cx, cy, 9.0 + (i % 2) as f64, 1);
    }
    for (cx, cy) in [(55.0, 60.0), (110.0, 65.0), (60.0, 100.0)] {
        disc(cx, cy, 9.0, 2);
    }
    for (cx, cy) in [(105.0, 100.0), (20.0, 80.0), (140.0, 75.0)] {
        disc(cx, cy, 9.0, 3);
    }
    Scenario::at_15_kv((w, h), labels, steel_phases(), steel_maps(), 11)
}

/// Four minerals in stripes and blocks (an invented scenario): quartz, albite, K-feldspar
/// and magnetite; every phase holds oxygen.
pub fn rock() -> Scenario {
    let mut phases = felsic_phases();
    phases.push(Phase {
        name: "magnetite",
        composition: mass_fractions(&[("Fe", 3.0), ("O", 4.0)]),
    });
    Scenario::at_15_kv(
        (120, 120),
        four_blocks(120, 60),
        phases,
        rock_maps(false),
        12,
    )
}

/// A brazed joint (an invented scenario): a copper substrate crossed by Ag-rich lamellae
/// (Ag–6Cu) 3 px wide, and Ti-rich particles (TiAg, a phase the built-in library lacks)
/// 3–5 px across. Neither the lamellae nor the particles have a pixel 2 px clear of the
/// substrate, so their compositions must be unmixed from its counts; each element has a
/// phase free of it, so every continuum can be measured.
pub fn braze() -> Scenario {
    let (w, h) = (160usize, 130usize);
    let mut labels = vec![0usize; w * h];
    for y in 5..75 {
        for x in 20..140 {
            if x % 9 < 3 {
                labels[y * w + x] = 1;
            }
        }
    }
    for (i, (cx, cy)) in [
        (15.0, 90.0),
        (35.0, 110.0),
        (55.0, 95.0),
        (75.0, 118.0),
        (95.0, 92.0),
        (115.0, 108.0),
        (135.0, 96.0),
        (150.0, 118.0),
        (25.0, 122.0),
        (85.0, 105.0),
    ]
    .into_iter()
    .enumerate()
    {
        let r: f64 = 1.5 + 0.5 * (i % 3) as f64;
        for y in 0..h {
            for x in 0..w {
                if (x as f64 - cx).powi(2) + (y as f64 - cy).powi(2) <= r * r {
                    labels[y * w + x] = 2;
                }
            }
        }
    }
    Scenario::at_15_kv(
        (w, h),
        labels,
        vec![
            alloy("Cu substrate", &[("Cu", 1.0)]),
            alloy("Ag-rich lamellae", &[("Ag", 0.94), ("Cu", 0.06)]),
            Phase {
                name: "TiAg",
                composition: mass_fractions(&[("Ti", 1.0), ("Ag", 1.0)]),
            },
        ],
        BRAZE_MAPS.to_vec(),
        13,
    )
}

/// A granite (an invented scenario): quartz, albite, K-feldspar and biotite
/// (K(Mg,Fe)3AlSi3O10(OH)2, which the built-in library lacks; H not mapped).
pub fn granite() -> Scenario {
    let mut phases = felsic_phases();
    phases.push(Phase {
        name: "biotite",
        composition: mass_fractions(&[
            ("K", 1.0),
            ("Mg", 1.5),
            ("Fe", 1.5),
            ("Al", 1.0),
            ("Si", 3.0),
            ("O", 12.0),
            ("H", 2.0),
        ]),
    });
    Scenario::at_15_kv(
        (120, 120),
        four_blocks(120, 60),
        phases,
        rock_maps(true),
        14,
    )
}

pub fn read_labels(path: &Path) -> Vec<u16> {
    let dec = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(path).unwrap()));
    let mut r = dec.read_info().unwrap();
    let mut buf = vec![0; r.output_buffer_size().unwrap()];
    let info = r.next_frame(&mut buf).unwrap();
    match info.bit_depth {
        png::BitDepth::Sixteen => buf
            .chunks_exact(2)
            .map(|b| u16::from_be_bytes([b[0], b[1]]))
            .collect(),
        _ => buf.iter().map(|&b| u16::from(b)).collect(),
    }
}

/// A ferritic steel (an invented scenario) with few small inclusions: Fe–1Mn matrix,
/// Cr23C6 carbides, MnS and Al2O3 inclusions of 2–3 px radius, the oxide 0.3 % of the
/// field.
pub fn steel_with_inclusions() -> Scenario {
    let (w, h) = (200usize, 200usize);
    let mut labels = vec![0usize; w * h];
    let mut disc =
        |cx: f64, cy: f64, r: f64, phase: usize| paint_disc(&mut labels, w, (cx, cy, r), phase);
    for (cx, cy) in [
        (30.0, 30.0),
        (100.0, 40.0),
        (170.0, 30.0),
        (40.0, 160.0),
        (150.0, 150.0),
    ] {
        disc(cx, cy, 8.0, 1);
    }
    for (cx, cy) in [(70.0, 90.0), (130.0, 100.0), (90.0, 170.0), (180.0, 90.0)] {
        disc(cx, cy, 3.0, 2);
    }
    for (cx, cy) in [
        (20.0, 100.0),
        (60.0, 60.0),
        (110.0, 130.0),
        (160.0, 60.0),
        (60.0, 120.0),
        (140.0, 180.0),
        (100.0, 80.0),
        (20.0, 190.0),
        (190.0, 180.0),
    ] {
        disc(cx, cy, 2.0, 3);
    }
    Scenario::at_15_kv((w, h), labels, steel_phases(), steel_maps(), 21)
}

/// A braze (an invented scenario): a copper substrate (Cu–1Ag) on the left, a eutectic of
/// Ag-rich (Ag–6Cu) and Cu-rich (Cu–6Ag) lamellae 8–10 px wide on the right, and CuTi2
/// particles of 3 px radius in the substrate. The Cu-rich lamellae differ from the
/// substrate by 5 wt% Ag only.
pub fn eutectic_braze() -> Scenario {
    let (w, h) = (180usize, 120usize);
    let labels = (0..w * h)
        .map(|i| {
            let (x, y) = (i % w, i / w);
            let particle = [(20, 20), (45, 60), (25, 100), (50, 95), (15, 60)]
                .iter()
                .any(|&(cx, cy): &(i64, i64)| (x as i64 - cx).pow(2) + (y as i64 - cy).pow(2) <= 9);
            if x < 60 {
                if particle {
                    3
                } else {
                    0
                }
            } else if (x - 60) % 18 < 8 {
                1
            } else {
                2
            }
        })
        .collect();
    Scenario::at_15_kv(
        (w, h),
        labels,
        vec![
            alloy("Cu substrate", &[("Cu", 0.99), ("Ag", 0.01)]),
            alloy("Ag-rich lamellae", &[("Ag", 0.94), ("Cu", 0.06)]),
            alloy("Cu-rich lamellae", &[("Cu", 0.94), ("Ag", 0.06)]),
            Phase {
                name: "CuTi2",
                composition: mass_fractions(&[("Cu", 1.0), ("Ti", 2.0)]),
            },
        ],
        BRAZE_MAPS.to_vec(),
        22,
    )
}

/// A wide field of a felsic rock (an invented scenario): an albite matrix holding quartz
/// and K-feldspar grains, with the X-ray yield falling from +`shading` on the right to
/// −`shading` on the left (0.2: ±20 %).
pub fn shaded_rock(shading: f64) -> Scenario {
    let (w, h) = (200usize, 160usize);
    let mut labels = vec![1usize; w * h];
    let mut disc =
        |cx: f64, cy: f64, r: f64, phase: usize| paint_disc(&mut labels, w, (cx, cy, r), phase);
    for (cx, cy) in [(30.0, 30.0), (100.0, 120.0), (170.0, 40.0), (60.0, 110.0)] {
        disc(cx, cy, 14.0, 0);
    }
    for (cx, cy) in [(100.0, 40.0), (165.0, 125.0), (25.0, 135.0)] {
        disc(cx, cy, 12.0, 2);
    }
    let mut s = Scenario::at_15_kv((w, h), labels, felsic_phases(), rock_maps(false), 31);
    s.shading = shading;
    s
}

/// Per true phase, the found phase holding most of its pixels and that share; and the
/// pixel agreement when each found phase stands for the true phase it overlaps most.
pub fn score(truth: &[usize], k: usize, labels: &[u16]) -> (Vec<(u16, f64)>, f64) {
    let mut table: BTreeMap<(usize, u16), usize> = BTreeMap::new();
    for (&t, &l) in truth.iter().zip(labels) {
        *table.entry((t, l)).or_default() += 1;
    }
    let best = (0..k)
        .map(|t| {
            let total: usize = table.iter().filter(|e| e.0 .0 == t).map(|e| e.1).sum();
            let (l, n) = table
                .iter()
                .filter(|e| e.0 .0 == t && e.0 .1 > 0)
                .map(|e| (e.0 .1, *e.1))
                .max_by_key(|e| e.1)
                .unwrap_or((0, 0));
            (l, n as f64 / total as f64)
        })
        .collect();
    let mut of_label: BTreeMap<u16, (usize, usize)> = BTreeMap::new();
    for (&(t, l), &n) in &table {
        let e = of_label.entry(l).or_insert((t, 0));
        if n > e.1 {
            *e = (t, n);
        }
    }
    let agree: usize = of_label.iter().filter(|e| *e.0 > 0).map(|e| e.1 .1).sum();
    (best, agree as f64 / truth.len() as f64)
}

/// The felsic rock of [`shaded_rock`] without the ramp, acquired as a montage of 2 × 2
/// tiles of 100 × 80 px whose yields differ by up to ±10 % (beam-current drift).
pub fn tiled_rock() -> Scenario {
    let mut s = shaded_rock(0.0);
    s.tiles = Some(((100, 80), vec![1.0, 1.12, 0.9, 1.05]));
    s
}

/// The population area fraction of the Boolean model of [`boolean_steel`]: a point lies in
/// no disc with the probability that a Poisson process of `per_px` centres per pixel has
/// none within `r`, exp(−per_px · π r²) (the Boolean model's coverage, Stoyan, Kendall &
/// Mecke 1987, "Stochastic Geometry and its Applications", ch. 3, from memory).
pub fn boolean_fraction(r: f64, per_px: f64) -> f64 {
    1.0 - (-per_px * std::f64::consts::PI * r * r).exp()
}

/// A steel (an invented scenario) whose carbides are a Boolean model: discs of radius `r`
/// px centred at the points of a seeded Poisson process of `per_px` centres per pixel
/// (drawn over the field widened by `r` on every side, so that discs cut by the edge are
/// there too), in an Fe–1Mn matrix; maps of C, Cr, Mn and Fe. Every field of a seed series
/// is an independent sample of one material whose area fraction is
/// [`boolean_fraction`]`(r, per_px)`.
pub fn boolean_steel(size: usize, r: f64, per_px: f64, seed: u64) -> Scenario {
    use rand::{Rng, SeedableRng};
    use rand_distr::Distribution;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed ^ 0x626f_6f6c);
    let span = size as f64 + 2.0 * r;
    let n = rand_distr::Poisson::new(per_px * span * span)
        .unwrap()
        .sample(&mut rng) as usize;
    let mut labels = vec![0usize; size * size];
    for _ in 0..n {
        let (cx, cy) = (
            rng.random_range(-r..size as f64 + r),
            rng.random_range(-r..size as f64 + r),
        );
        paint_disc(&mut labels, size, (cx, cy, r), 1);
    }
    let phases = steel_phases().into_iter().take(2).collect();
    let maps = vec![
        ("C", 12.0, 0.03),
        ("Cr", 55.0, 0.04),
        ("Mn", 55.0, 0.04),
        ("Fe", 60.0, 0.04),
    ];
    Scenario::at_15_kv((size, size), labels, phases, maps, seed)
}
