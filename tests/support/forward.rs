//! An independent forward model of EDS element maps, for tests: it imports nothing from
//! modalmap (no physics, no element data, no writer), so that a test's expected values do
//! not come from the code under test.
//!
//! **What it models**, per pixel and mapped element e, for a phase of mass fractions C:
//! 1. characteristic counts s_e · C_e · m_pe: a sensitivity per element (counts per pixel
//!    at C = 1) times a matrix factor per phase and element (within ±3 %, drawn from the
//!    seed), an effect the tool does not model;
//! 2. the continuum under the line, b_e · Z_eff (Kramers 1923: at a given energy the
//!    continuum is proportional to Z), with b_e per map as a detector records it and Z_eff
//!    the electron-fraction mean Z = Σ C_i Z_i²/A_i / Σ C_i Z_i/A_i (not the mass-fraction
//!    mean the tool uses);
//! 3. the beam's lateral spread: the expected counts blurred by a Gaussian core with a
//!    wider tail (90 % σ = `blur_px`, 10 % σ = 3 · `blur_px`), not the tool's model;
//! 4. an uneven X-ray yield across the field, when asked for (`shading`): every count of
//!    a pixel times 1 + a · (2x / (w − 1) − 1), a linear ramp of ±a from left to right,
//!    as from the detector's take-off angle at low magnification; and, for a montage
//!    (`tiles`), a factor per acquisition tile, as from beam-current drift between tiles
//!    (the tile size is then written to field.toml);
//! 5. channel cross-talk, when asked for (`crosstalk`): a share of one element's
//!    characteristic counts recorded in another element's map, as where a Kβ line lies
//!    inside the window of a neighbour's Kα (Cr Kβ under Mn Kα, Mn Kβ under Fe Kα); the
//!    tool corrects no overlaps;
//! 6. dead time: every count of a pixel scaled by 1 / (1 + τ · total rate);
//! 7. Poisson counting noise.
//!
//! **The BSE image** ([`Scenario::bse`]) is drawn from its own table of backscatter
//! coefficients ([`ETA_20KV`]), not from the polynomial fit the tool predicts with, mixed
//! by mass fraction, on a finer grid with a drift shift, blurred by the beam, passed
//! through a detector response with a slight non-linearity (grey ∝ η^0.85) and given
//! Gaussian noise.
//!
//! **What it leaves out**: absorption and fluorescence beyond the ±3 % factors, peak
//! overlaps other than the cross-talk asked for, the continuum's energy dependence (each
//! map has its own level), escape and sum peaks, charging, topography and channelling
//! contrast in the BSE image.

use std::path::Path;

use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Poisson};

/// Standard atomic weights (IUPAC 2021, from memory) and atomic numbers of the elements
/// the test scenarios use.
pub const ELEMENTS: &[(&str, u32, f64)] = &[
    ("H", 1, 1.008),
    ("C", 6, 12.011),
    ("O", 8, 15.999),
    ("Na", 11, 22.990),
    ("Mg", 12, 24.305),
    ("Al", 13, 26.982),
    ("Si", 14, 28.085),
    ("S", 16, 32.06),
    ("K", 19, 39.098),
    ("Ti", 22, 47.867),
    ("Cr", 24, 51.996),
    ("Mn", 25, 54.938),
    ("Fe", 26, 55.845),
    ("Cu", 29, 63.546),
    ("Ag", 47, 107.87),
];

fn element(symbol: &str) -> (u32, f64) {
    let &(_, z, a) = ELEMENTS
        .iter()
        .find(|e| e.0 == symbol)
        .unwrap_or_else(|| panic!("{symbol} is not in the forward model's table"));
    (z, a)
}

/// Mass fractions of a formula given as (symbol, atoms) pairs.
pub fn mass_fractions(formula: &[(&str, f64)]) -> Vec<(String, f64)> {
    let total: f64 = formula.iter().map(|(s, n)| n * element(s).1).sum();
    formula
        .iter()
        .map(|(s, n)| (s.to_string(), n * element(s).1 / total))
        .collect()
}

/// Electron-fraction mean atomic number.
pub fn z_eff(c: &[(String, f64)]) -> f64 {
    let (num, den) = c.iter().fold((0.0, 0.0), |(a, b), (s, w)| {
        let (z, m) = element(s);
        let z = f64::from(z);
        (a + w * z * z / m, b + w * z / m)
    });
    num / den
}

/// One phase of a scenario.
pub struct Phase {
    /// Name, for messages.
    pub name: &'static str,
    /// Mass fractions.
    pub composition: Vec<(String, f64)>,
}

/// A scenario: phases painted on a grid, and the acquisition.
pub struct Scenario {
    /// Grid size.
    pub width: usize,
    /// Grid size.
    pub height: usize,
    /// Phase index of every pixel.
    pub labels: Vec<usize>,
    /// The phases.
    pub phases: Vec<Phase>,
    /// Mapped elements with their sensitivity (counts per pixel at mass fraction 1) and
    /// their continuum b_e (counts per pixel per unit Z).
    pub maps: Vec<(&'static str, f64, f64)>,
    /// Beam energy, keV.
    pub beam_kv: f64,
    /// Pixel size, µm.
    pub pixel_um: f64,
    /// Core width of the beam spread, pixels.
    pub blur_px: f64,
    /// Dead time per count rate (1 / counts per pixel).
    pub dead_time: f64,
    /// Half the range of the yield's left-to-right ramp (0.2: ±20 %); 0 for none.
    pub shading: f64,
    /// A montage: the tile size (width, height) and each tile's yield factor, tiles
    /// across then down.
    pub tiles: Option<((usize, usize), Vec<f64>)>,
    /// Cross-talk: (source element, receiving map, share of the source's characteristic
    /// counts recorded in the receiving map).
    pub crosstalk: Vec<(&'static str, &'static str, f64)>,
    /// Seed of the matrix factors and the noise.
    pub seed: u64,
}

/// Backscatter coefficients of pure elements at 20 keV and normal incidence, rounded to
/// two decimals as handbook tables of measurements give them (from memory; H, a gas, set
/// to 0 and O to a value interpolated between its neighbours). Deliberately a table, not
/// the polynomial fit of Reuter (1972) the tool predicts with.
pub const ETA_20KV: &[(&str, f64)] = &[
    ("H", 0.00),
    ("C", 0.06),
    ("O", 0.09),
    ("Na", 0.12),
    ("Mg", 0.14),
    ("Al", 0.15),
    ("Si", 0.16),
    ("S", 0.19),
    ("K", 0.22),
    ("Ti", 0.25),
    ("Cr", 0.27),
    ("Mn", 0.28),
    ("Fe", 0.28),
    ("Cu", 0.30),
    ("Ag", 0.40),
];

/// Backscatter coefficient of a composition by [`ETA_20KV`], mixed by mass fraction
/// (Castaing 1951).
pub fn eta(c: &[(String, f64)]) -> f64 {
    c.iter()
        .map(|(s, w)| {
            let e = ETA_20KV
                .iter()
                .find(|e| e.0 == s)
                .unwrap_or_else(|| panic!("{s} is not in the forward model's η table"));
            w * e.1
        })
        .sum()
}

/// How the BSE image of a scenario is acquired.
pub struct BseShot {
    /// BSE pixels per map pixel.
    pub scale: usize,
    /// Drift: a feature at map (x, y) appears at ((x + dx)·scale, (y + dy)·scale).
    pub shift_px: (f64, f64),
    /// Standard deviation of the detector noise, grey levels of 8 bits.
    pub noise: f64,
    /// Extra backscatter coefficient per phase (a phase that holds an element the maps do
    /// not show); empty for none.
    pub extra_eta: Vec<(usize, f64)>,
}

impl Scenario {
    /// A scenario acquired at 15 kV with 0.5 µm pixels, a beam spread of 0.6 pixels and a
    /// dead time of 0.002 per count per pixel (about 12 % at 60 counts per pixel).
    pub fn at_15_kv(
        (width, height): (usize, usize),
        labels: Vec<usize>,
        phases: Vec<Phase>,
        maps: Vec<(&'static str, f64, f64)>,
        seed: u64,
    ) -> Scenario {
        Scenario {
            width,
            height,
            labels,
            phases,
            maps,
            beam_kv: 15.0,
            pixel_um: 0.5,
            blur_px: 0.6,
            dead_time: 0.002,
            shading: 0.0,
            tiles: None,
            crosstalk: Vec::new(),
            seed,
        }
    }

    /// Characteristic counts (before the beam spread) of map `m`'s own element in phase `p`.
    fn characteristic(&self, p: usize, m: usize, matrix: &[Vec<f64>]) -> f64 {
        let (symbol, s, _) = self.maps[m];
        let c = self.phases[p]
            .composition
            .iter()
            .find(|(e, _)| e == symbol)
            .map_or(0.0, |x| x.1);
        s * c * matrix[p][m]
    }

    /// Expected counts (before the beam spread) of map `m` in phase `p`: its element's
    /// characteristic counts, the cross-talk from other maps' elements, the continuum.
    fn expected(&self, p: usize, m: usize, matrix: &[Vec<f64>]) -> f64 {
        let (symbol, _, b) = self.maps[m];
        let leaked: f64 = self
            .crosstalk
            .iter()
            .filter(|x| x.1 == symbol)
            .map(|&(from, _, share)| {
                let source = self
                    .maps
                    .iter()
                    .position(|q| q.0 == from)
                    .unwrap_or_else(|| panic!("cross-talk from {from}, which is not mapped"));
                share * self.characteristic(p, source, matrix)
            })
            .sum();
        self.characteristic(p, m, matrix) + leaked + b * z_eff(&self.phases[p].composition)
    }

    /// The BSE image of the scenario as `shot` acquires it: 8-bit grey levels, width and
    /// height `scale` times the maps'. Each BSE pixel averages 2 × 2 sample points, the
    /// beam blurs it (Gaussian, σ 0.7 BSE px), the detector maps η to grey as
    /// 20 + 480 η^0.85 and adds Gaussian noise.
    pub fn bse(&self, shot: &BseShot) -> (usize, usize, Vec<u8>) {
        let s = shot.scale;
        let (bw, bh) = (self.width * s, self.height * s);
        let etas: Vec<f64> = (0..self.phases.len())
            .map(|p| {
                let extra: f64 = shot
                    .extra_eta
                    .iter()
                    .filter(|e| e.0 == p)
                    .map(|e| e.1)
                    .sum();
                eta(&self.phases[p].composition) + extra
            })
            .collect();
        let phase_at = |x: f64, y: f64| {
            let xi = (x.floor().max(0.0) as usize).min(self.width - 1);
            let yi = (y.floor().max(0.0) as usize).min(self.height - 1);
            self.labels[yi * self.width + xi]
        };
        let clean: Vec<f64> = (0..bw * bh)
            .map(|i| {
                let mut sum = 0.0;
                for (ox, oy) in [(0.25, 0.25), (0.75, 0.25), (0.25, 0.75), (0.75, 0.75)] {
                    let u = (i % bw) as f64 + ox;
                    let v = (i / bw) as f64 + oy;
                    let (x, y) = (
                        u / s as f64 - shot.shift_px.0,
                        v / s as f64 - shot.shift_px.1,
                    );
                    sum += etas[phase_at(x, y)];
                }
                sum / 4.0
            })
            .collect();
        let spread = blur(&clean, bw, bh, 0.7);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(self.seed ^ 0x0062_7365);
        let noise = rand_distr::Normal::new(0.0, shot.noise).unwrap();
        let grey = spread
            .iter()
            .map(|&e| {
                let g = 20.0 + 480.0 * e.max(0.0).powf(0.85) + noise.sample(&mut rng);
                g.round().clamp(0.0, 255.0) as u8
            })
            .collect();
        (bw, bh, grey)
    }

    /// Writes [`Scenario::bse`] as an 8-bit PNG (the `png` crate) to `path`.
    pub fn write_bse(&self, shot: &BseShot, path: &Path) {
        let (w, h, grey) = self.bse(shot);
        let file = std::fs::File::create(path).unwrap();
        let mut enc = png::Encoder::new(file, w as u32, h as u32);
        enc.set_color(png::ColorType::Grayscale);
        enc.set_depth(png::BitDepth::Eight);
        enc.write_header().unwrap().write_image_data(&grey).unwrap();
    }

    /// The matrix factor of every phase and map (within ±3 %, from the seed).
    pub fn matrix(&self) -> Vec<Vec<f64>> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(self.seed ^ 0x6d61_7472_6978);
        self.phases
            .iter()
            .map(|_| {
                self.maps
                    .iter()
                    .map(|_| 1.0 + rng.random_range(-0.03..0.03))
                    .collect()
            })
            .collect()
    }

    /// The composition (mass fractions of the mapped elements) that the ratio method with
    /// exact k-factors and no matrix correction should find in phase `p`: the true one
    /// with each element weighted by its matrix factor, normalised. The tool makes no
    /// matrix correction, so this, not the truth, is what its compositions are held to.
    pub fn apparent(&self, p: usize) -> Vec<(String, f64)> {
        let m = &self.matrix()[p];
        let weighted: Vec<(String, f64)> = self
            .maps
            .iter()
            .zip(m)
            .map(|((symbol, _, _), f)| {
                let c = self.phases[p]
                    .composition
                    .iter()
                    .find(|(e, _)| e == symbol)
                    .map_or(0.0, |x| x.1);
                (symbol.to_string(), c * f)
            })
            .collect();
        let total: f64 = weighted.iter().map(|x| x.1).sum();
        weighted.into_iter().map(|(e, c)| (e, c / total)).collect()
    }

    /// Generates the counts of every map, row-major, in map order.
    pub fn counts(&self) -> Vec<Vec<u16>> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(self.seed);
        let matrix = self.matrix();
        let (w, h) = (self.width, self.height);
        let mut planes: Vec<Vec<f64>> = (0..self.maps.len())
            .map(|m| {
                let ideal: Vec<f64> = self
                    .labels
                    .iter()
                    .map(|&p| self.expected(p, m, &matrix))
                    .collect();
                let core = blur(&ideal, w, h, self.blur_px);
                let tail = blur(&ideal, w, h, 3.0 * self.blur_px);
                core.iter()
                    .zip(&tail)
                    .map(|(a, b)| 0.9 * a + 0.1 * b)
                    .collect()
            })
            .collect();
        for i in 0..w * h {
            let ramp = 2.0 * (i % w) as f64 / (w - 1).max(1) as f64 - 1.0;
            let step = self.tiles.as_ref().map_or(1.0, |((tw, th), f)| {
                let across = w.div_ceil(*tw);
                f[(i / w) / th * across + (i % w) / tw]
            });
            let lit = (1.0 + self.shading * ramp) * step;
            planes.iter_mut().for_each(|p| p[i] *= lit);
            let total: f64 = planes.iter().map(|p| p[i]).sum();
            let live = 1.0 / (1.0 + self.dead_time * total);
            planes.iter_mut().for_each(|p| p[i] *= live);
        }
        planes
            .iter()
            .map(|p| {
                p.iter()
                    .map(|&mu| {
                        if mu <= 0.0 {
                            0
                        } else {
                            let x: f64 = Poisson::new(mu).unwrap().sample(&mut rng);
                            x.min(65535.0) as u16
                        }
                    })
                    .collect()
            })
            .collect()
    }

    /// Writes the maps as 16-bit PNGs (the `png` crate) and a field.toml into `dir`.
    pub fn write(&self, dir: &Path) {
        std::fs::create_dir_all(dir).unwrap();
        for ((symbol, _, _), counts) in self.maps.iter().zip(self.counts()) {
            let file = std::fs::File::create(dir.join(format!("{symbol}_Ka.png"))).unwrap();
            let mut enc = png::Encoder::new(file, self.width as u32, self.height as u32);
            enc.set_color(png::ColorType::Grayscale);
            enc.set_depth(png::BitDepth::Sixteen);
            let mut w = enc.write_header().unwrap();
            let bytes: Vec<u8> = counts.iter().flat_map(|v| v.to_be_bytes()).collect();
            w.write_image_data(&bytes).unwrap();
        }
        std::fs::write(
            dir.join("field.toml"),
            format!(
                "pixel_size_um = {}\nbeam_kv = {}\n{}",
                self.pixel_um,
                self.beam_kv,
                self.tiles
                    .as_ref()
                    .map_or(String::new(), |((tw, th), _)| format!(
                        "tile_width_px = {tw}\ntile_height_px = {th}\n"
                    ))
            ),
        )
        .unwrap();
    }

    /// A k-factor file with the factors a lab would measure on standards here: the
    /// inverse sensitivities (relative to the first map).
    pub fn kfactors(&self) -> String {
        let s0 = self.maps[0].1;
        let mut t = format!(
            "format = \"modalmap.kfactors/1\"\nreference = \"{}\"\nbeam_kv = {}\n[k]\n",
            self.maps[0].0, self.beam_kv
        );
        for (symbol, s, _) in &self.maps {
            t.push_str(&format!("{symbol} = {}\n", s0 / s));
        }
        t
    }
}

/// Separable Gaussian blur with edges clamped.
fn blur(v: &[f64], w: usize, h: usize, sigma: f64) -> Vec<f64> {
    let r = (3.0 * sigma).ceil() as isize;
    let kernel: Vec<f64> = (-r..=r)
        .map(|i| (-(i * i) as f64 / (2.0 * sigma * sigma)).exp())
        .collect();
    let norm: f64 = kernel.iter().sum();
    let pass = |src: &[f64], horizontal: bool| -> Vec<f64> {
        let mut out = vec![0.0; w * h];
        for y in 0..h {
            for x in 0..w {
                let mut acc = 0.0;
                for (j, k) in kernel.iter().enumerate() {
                    let d = j as isize - r;
                    let (xx, yy) = if horizontal {
                        ((x as isize + d).clamp(0, w as isize - 1) as usize, y)
                    } else {
                        (x, (y as isize + d).clamp(0, h as isize - 1) as usize)
                    };
                    acc += k * src[yy * w + xx];
                }
                out[y * w + x] = acc / norm;
            }
        }
        out
    };
    pass(&pass(v, true), false)
}
