//! Synthetic fields with ground truth: the bundled sample field, the demo, and the accuracy
//! tests all come from here.
//!
//! A [`Microstructure`] says which phase is at any point of the field (continuous
//! coordinates, in map pixels, corner origin). [`generate`] turns it into what a detector
//! would record:
//! 1. expected counts per element and pixel = Σ (mass fraction × sensitivity) + a continuum
//!    background that grows with the phase's mean atomic number (Kramers: bremsstrahlung
//!    ∝ Z); voids give no counts;
//! 2. a Gaussian blur standing for the X-ray generation volume;
//! 3. Poisson sampling, seeded per element so the result does not depend on threads;
//! 4. optionally a BSE image from each phase's backscatter coefficient (Reuter's η, mixed by
//!    mass fraction) at a finer resolution and with a known drift shift.

use std::path::Path;

use image::{ImageBuffer, Luma};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal, Poisson};
use rayon::prelude::*;

use crate::chem::{element, parse_formula, Composition, ElementInfo};
use crate::error::{Error, Result};
use crate::io::raster::{write_png_u16, Raster};
use crate::io::SIDECAR_NAME;
use crate::physics::eta_compound;
use crate::stack::{ElementMap, FieldMetadata, MapStack};

/// A phase of a synthetic field.
#[derive(Debug, Clone, PartialEq)]
pub struct SynthPhase {
    /// Display name, e.g. `Cu6Sn5`.
    pub name: String,
    /// Its composition.
    pub composition: Composition,
}

impl SynthPhase {
    /// A phase from a chemical formula; panics on a bad formula (generator input is code).
    pub fn formula(formula: &str) -> SynthPhase {
        SynthPhase {
            name: formula.to_string(),
            composition: parse_formula(formula).unwrap_or_else(|e| panic!("synthetic phase: {e}")),
        }
    }
}

type ShapeFn = dyn Fn(f64, f64) -> u16 + Send + Sync;

/// Which phase sits where. `phase_at` returns 0 for a void, else 1 + index into `phases`.
pub struct Microstructure {
    /// The phases, in the order of their truth labels (label = index + 1).
    pub phases: Vec<SynthPhase>,
    shape: Box<ShapeFn>,
}

impl Microstructure {
    /// A microstructure from phases and a function (x, y) → label (0 = void).
    pub fn new(
        phases: Vec<SynthPhase>,
        shape: impl Fn(f64, f64) -> u16 + Send + Sync + 'static,
    ) -> Self {
        Microstructure {
            phases,
            shape: Box::new(shape),
        }
    }

    /// The truth label at a point (map pixel coordinates, corner origin).
    pub fn phase_at(&self, x: f64, y: f64) -> u16 {
        (self.shape)(x, y)
    }

    /// The truth labels sampled at pixel centres.
    pub fn rasterise(&self, width: usize, height: usize) -> Vec<u16> {
        (0..width * height)
            .into_par_iter()
            .map(|i| self.phase_at((i % width) as f64 + 0.5, (i / width) as f64 + 0.5))
            .collect()
    }
}

/// A round or elliptical particle: centre, semi-axes, orientation (radians), label.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Particle {
    /// Centre x.
    pub cx: f64,
    /// Centre y.
    pub cy: f64,
    /// Semi-axis along the orientation.
    pub a: f64,
    /// Semi-axis across it.
    pub b: f64,
    /// Orientation angle, radians.
    pub angle: f64,
    /// Label painted inside.
    pub label: u16,
}

impl Particle {
    /// True if (x, y) lies inside.
    pub fn contains(&self, x: f64, y: f64) -> bool {
        let (s, c) = self.angle.sin_cos();
        let (dx, dy) = (x - self.cx, y - self.cy);
        let u = (dx * c + dy * s) / self.a;
        let v = (-dx * s + dy * c) / self.b;
        u * u + v * v <= 1.0
    }
}

/// Places `count` particles with semi-axes drawn from `[r_min, r_max]` (aspect up to
/// `max_aspect`) at random positions inside `[0, w) × [0, h)` where `allowed` holds.
pub fn scatter_particles(
    rng: &mut ChaCha8Rng,
    count: usize,
    label: u16,
    (r_min, r_max): (f64, f64),
    max_aspect: f64,
    (w, h): (f64, f64),
    allowed: impl Fn(f64, f64) -> bool,
) -> Vec<Particle> {
    let mut out = Vec::with_capacity(count);
    let mut tries = 0;
    while out.len() < count && tries < count * 200 {
        tries += 1;
        let (cx, cy) = (rng.random_range(0.0..w), rng.random_range(0.0..h));
        if !allowed(cx, cy) {
            continue;
        }
        let b = rng.random_range(r_min..=r_max);
        let a = b * rng.random_range(1.0..=max_aspect.max(1.0));
        out.push(Particle {
            cx,
            cy,
            a,
            b,
            angle: rng.random_range(0.0..std::f64::consts::PI),
            label,
        });
    }
    out
}

/// Voronoi grains: `count` seeds at random positions in `[0, w) × [0, h)`, each given a
/// label drawn with probability ∝ `weights` (labels 1..=weights.len()). Returns
/// (x, y, label) per seed; a point belongs to the grain of its nearest seed.
pub fn voronoi_seeds(
    rng: &mut ChaCha8Rng,
    count: usize,
    (w, h): (f64, f64),
    weights: &[f64],
) -> Vec<(f64, f64, u16)> {
    (0..count)
        .map(|_| {
            let label = draw_label(rng, weights);
            (rng.random_range(0.0..w), rng.random_range(0.0..h), label)
        })
        .collect()
}

/// A label 1..=weights.len() drawn with probability ∝ its weight.
fn draw_label(rng: &mut ChaCha8Rng, weights: &[f64]) -> u16 {
    let total: f64 = weights.iter().sum();
    let mut r = rng.random_range(0.0..total);
    for (i, &wt) in weights.iter().enumerate() {
        if r < wt {
            return i as u16 + 1;
        }
        r -= wt;
    }
    weights.len() as u16
}

/// The label of the grain containing (x, y).
pub fn voronoi_label(seeds: &[(f64, f64, u16)], x: f64, y: f64) -> u16 {
    seeds
        .iter()
        .min_by(|a, b| {
            ((a.0 - x).powi(2) + (a.1 - y).powi(2))
                .total_cmp(&((b.0 - x).powi(2) + (b.1 - y).powi(2)))
        })
        .map_or(0, |s| s.2)
}

/// Detector response: counts per pixel per unit mass fraction for each mapped element.
#[derive(Debug, Clone, PartialEq)]
pub struct Detector {
    /// (element, X-ray line, counts per pixel for a pure element).
    pub channels: Vec<(ElementInfo, String, f64)>,
    /// Continuum counts per pixel and channel for a phase of mean Z = 30.
    pub continuum: f64,
    /// σ of the X-ray generation-volume blur, map pixels (0 = none).
    pub blur_sigma_px: f64,
}

impl Detector {
    /// A detector from `(symbol, line, counts for the pure element)` triples.
    pub fn new(channels: &[(&str, &str, f64)], continuum: f64, blur_sigma_px: f64) -> Self {
        Detector {
            channels: channels
                .iter()
                .map(|(s, l, c)| {
                    (
                        element(s).unwrap_or_else(|| panic!("synthetic detector: no element {s}")),
                        l.to_string(),
                        *c,
                    )
                })
                .collect(),
            continuum,
            blur_sigma_px,
        }
    }
}

/// How to render the BSE image.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BseOptions {
    /// BSE pixels per map pixel (the BSE image is round(scale × map size)).
    pub scale: f64,
    /// Drift shift (dx, dy) in map pixels: a feature at map (x, y) appears in the BSE image
    /// at ((x + dx)·scale, (y + dy)·scale).
    pub shift_px: (f64, f64),
    /// Grey level of η = 0 and grey levels per unit η.
    pub offset: f64,
    /// Grey levels per unit η.
    pub gain: f64,
    /// Gaussian noise σ, grey levels.
    pub noise: f64,
}

impl Default for BseOptions {
    fn default() -> Self {
        BseOptions {
            scale: 2.0,
            shift_px: (0.0, 0.0),
            offset: 3000.0,
            gain: 100_000.0,
            noise: 900.0,
        }
    }
}

/// Everything about a synthetic acquisition besides the microstructure.
#[derive(Debug, Clone, PartialEq)]
pub struct SynthOptions {
    /// Width in map pixels.
    pub width: usize,
    /// Height in map pixels.
    pub height: usize,
    /// The detector.
    pub detector: Detector,
    /// Seed for every random draw.
    pub seed: u64,
    /// Metadata recorded with the field.
    pub metadata: FieldMetadata,
    /// Render a BSE image too.
    pub bse: Option<BseOptions>,
}

/// A synthetic field with its ground truth.
pub struct SynthField {
    /// The element maps as a detector would record them.
    pub stack: MapStack,
    /// Truth labels per map pixel: 0 = void, else 1 + phase index.
    pub truth: Vec<u16>,
    /// Phase names, index = label − 1.
    pub phase_names: Vec<String>,
    /// The BSE image, if requested, with the options it was made with.
    pub bse: Option<(Raster, BseOptions)>,
}

fn blur(data: Vec<f32>, width: usize, height: usize, sigma: f64) -> Vec<f32> {
    if sigma <= 0.0 {
        return data;
    }
    let img: ImageBuffer<Luma<f32>, Vec<f32>> =
        ImageBuffer::from_raw(width as u32, height as u32, data).expect("buffer size matches");
    imageproc::filter::gaussian_blur_f32(&img, sigma as f32).into_raw()
}

fn poisson(rng: &mut ChaCha8Rng, lambda: f64) -> f32 {
    if lambda <= 0.0 {
        return 0.0;
    }
    Poisson::new(lambda).map_or(0.0, |d| d.sample(rng) as f32)
}

/// Renders a microstructure through a detector (see the module docs).
pub fn generate(micro: &Microstructure, opts: &SynthOptions) -> Result<SynthField> {
    let (w, h) = (opts.width, opts.height);
    let truth = micro.rasterise(w, h);
    let det = &opts.detector;
    // Per phase: expected counts for each channel (index 0 = void).
    let mut expected: Vec<Vec<f64>> = vec![vec![0.0; det.channels.len()]];
    for p in &micro.phases {
        let zbar = p.composition.mean_z_mass();
        expected.push(
            det.channels
                .iter()
                .map(|(e, _, s)| {
                    p.composition.mass_fraction_of(e.symbol) * s + det.continuum * zbar / 30.0
                })
                .collect(),
        );
    }
    let maps: Vec<ElementMap> = det
        .channels
        .par_iter()
        .enumerate()
        .map(|(ci, (e, line, _))| {
            let lam: Vec<f32> = truth
                .iter()
                .map(|&t| expected[t as usize][ci] as f32)
                .collect();
            let lam = blur(lam, w, h, det.blur_sigma_px);
            let mut rng =
                ChaCha8Rng::seed_from_u64(opts.seed ^ 0x9E37_79B9u64.wrapping_mul(ci as u64 + 1));
            let counts = lam
                .iter()
                .map(|&l| poisson(&mut rng, f64::from(l)))
                .collect();
            ElementMap {
                element: *e,
                line: Some(line.clone()),
                counts,
                source: format!("synthetic {}", e.symbol),
            }
        })
        .collect();
    let stack = MapStack::new(
        Path::new("synthetic field"),
        w,
        h,
        maps,
        opts.metadata.clone(),
    )?;
    let bse = opts
        .bse
        .map(|b| (render_bse(micro, w, h, &b, opts.seed), b));
    Ok(SynthField {
        stack,
        truth,
        phase_names: micro.phases.iter().map(|p| p.name.clone()).collect(),
        bse,
    })
}

/// Checks a yield ramp for [`shade`]: 0 to below 1.
pub fn check_ramp(ramp: f64) -> Result<()> {
    if (0.0..1.0).contains(&ramp) {
        Ok(())
    } else {
        Err(Error::options(
            format!("--yield-ramp {ramp} is out of range"),
            "give a ramp from 0 to below 1, e.g. 0.2 for ±20 %",
        ))
    }
}

/// Gives a synthetic field an uneven X-ray yield that rises linearly from left to right,
/// ±`ramp` about its mean (0.2: 0.8 to 1.2 relative to the middle): every count is kept
/// with probability (1 + ramp · u) / (1 + ramp), u from −1 at the left edge to 1 at the
/// right, so the counts stay Poisson (binomial thinning of a Poisson count is Poisson).
pub fn shade(field: &mut SynthField, ramp: f64, seed: u64) -> Result<()> {
    check_ramp(ramp)?;
    let w = field.stack.width();
    for (m, counts) in field.stack.counts_mut().enumerate() {
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5348_4144_u64.wrapping_mul(m as u64 + 1));
        for (i, c) in counts.iter_mut().enumerate() {
            let u = if w < 2 {
                0.0
            } else {
                2.0 * (i % w) as f64 / (w - 1) as f64 - 1.0
            };
            let keep = (1.0 + ramp * u) / (1.0 + ramp);
            if *c > 0.0 {
                *c = rand_distr::Binomial::new(*c as u64, keep)
                    .map_or(*c, |b| b.sample(&mut rng) as f32);
            }
        }
    }
    Ok(())
}

fn render_bse(micro: &Microstructure, w: usize, h: usize, b: &BseOptions, seed: u64) -> Raster {
    let sf = if b.scale > 0.0 { b.scale } else { 1.0 };
    let (bw, bh) = (
        (w as f64 * sf).round() as usize,
        (h as f64 * sf).round() as usize,
    );
    let etas: Vec<f64> = std::iter::once(0.0)
        .chain(micro.phases.iter().map(|p| eta_compound(&p.composition)))
        .collect();
    // Each BSE pixel integrates its area (4 × 4 sub-samples), as a detector does.
    const SUB: usize = 4;
    let clean: Vec<f32> = (0..bw * bh)
        .into_par_iter()
        .map(|i| {
            let mut eta = 0.0;
            for sy in 0..SUB {
                for sx in 0..SUB {
                    // BSE sample point → map coordinates, inverting (x + dx)·s = u.
                    let u = (i % bw) as f64 + (sx as f64 + 0.5) / SUB as f64;
                    let v = (i / bw) as f64 + (sy as f64 + 0.5) / SUB as f64;
                    eta +=
                        etas[micro.phase_at(u / sf - b.shift_px.0, v / sf - b.shift_px.1) as usize];
                }
            }
            (b.offset + b.gain * eta / (SUB * SUB) as f64) as f32
        })
        .collect();
    let spot = blur(clean, bw, bh, 0.7);
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0xB5E);
    let noise = Normal::new(0.0, b.noise.max(1e-9)).expect("finite sigma");
    let data = spot
        .into_iter()
        .map(|v| {
            (f64::from(v) + noise.sample(&mut rng))
                .clamp(0.0, 65535.0)
                .round() as f32
        })
        .collect();
    Raster {
        width: bw,
        height: bh,
        data,
        format: "synthetic BSE".into(),
    }
}

/// Writes a synthetic field as a maps folder: one 16-bit PNG per element
/// (`<El>_<line>.png`), `BSE.png` if present, and the `field.toml` sidecar.
pub fn write_folder(field: &SynthField, dir: &Path) -> Result<()> {
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::output(dir, format!("cannot be created: {e}"), "check the path"))?;
    let (w, h) = (field.stack.width(), field.stack.height());
    let to_u16 = |v: &[f32]| -> Vec<u16> {
        v.iter()
            .map(|&c| c.round().clamp(0.0, 65535.0) as u16)
            .collect()
    };
    let mut lines = String::new();
    for m in field.stack.maps() {
        let line = m.line.clone().unwrap_or_default();
        let name = if line.is_empty() {
            format!("{}.png", m.element.symbol)
        } else {
            format!("{}_{}.png", m.element.symbol, line)
        };
        write_png_u16(&dir.join(name), w, h, &to_u16(&m.counts))?;
        if !line.is_empty() {
            lines.push_str(&format!("{} = \"{}\"\n", m.element.symbol, line));
        }
    }
    if let Some((bse, _)) = &field.bse {
        write_png_u16(
            &dir.join("BSE.png"),
            bse.width,
            bse.height,
            &to_u16(&bse.data),
        )?;
    }
    let md = field.stack.metadata();
    let mut toml =
        String::from("# Acquisition metadata of this field (modalmap sidecar format).\n");
    for (k, v) in [
        ("pixel_size_um", md.pixel_size_um),
        ("beam_kv", md.beam_kv),
        ("live_time_s", md.live_time_s),
        ("bse_pixel_size_um", md.bse_pixel_size_um),
        ("tile_width_px", md.tile_width_px),
        ("tile_height_px", md.tile_height_px),
    ] {
        if let Some(v) = v {
            toml.push_str(&format!("{k} = {v}\n"));
        }
    }
    if !lines.is_empty() {
        toml.push_str("\n[lines]\n");
        toml.push_str(&lines);
    }
    let p = dir.join(SIDECAR_NAME);
    std::fs::write(&p, toml)
        .map_err(|e| Error::output(&p, format!("could not be written: {e}"), "check the folder"))
}

/// The bundled sample field: a cross-section of an invented lead-free solder joint.
///
/// From the bottom up: a copper pad; a thin, even Cu3Sn layer; a scalloped Cu6Sn5
/// intermetallic layer; the tin-rich solder with Ag3Sn particles (round and needle-like);
/// a few voids (one at the intermetallic interface). Copper, tin and silver are mapped
/// (Cu K, Sn L, Ag L) at counts typical of a short map (tens per pixel). The BSE image is
/// twice as fine and drifted by (2.6, −1.4) map pixels.
pub fn solder_joint() -> (Microstructure, SynthOptions) {
    let (w, h) = (384usize, 288usize);
    let (wf, hf) = (w as f64, h as f64);
    let mut rng = ChaCha8Rng::seed_from_u64(20261202);
    let phases = vec![
        SynthPhase::formula("Sn"),
        SynthPhase::formula("Cu6Sn5"),
        SynthPhase::formula("Cu3Sn"),
        SynthPhase::formula("Cu"),
        SynthPhase::formula("Ag3Sn"),
    ];
    let (sn, cu6sn5, cu3sn, cu, ag3sn) = (1u16, 2u16, 3u16, 4u16, 5u16);
    let pad_top = hf * 0.78;
    let cu3sn_top = pad_top - 5.0;
    // Scallops: half-ellipses of Cu6Sn5 standing on the Cu3Sn layer.
    let mut scallops = Vec::new();
    let mut x = -10.0;
    while x < wf + 10.0 {
        let half_width = rng.random_range(12.0..26.0);
        let height = rng.random_range(8.0..22.0);
        scallops.push((x + half_width, half_width, height));
        x += 2.0 * half_width - rng.random_range(2.0..8.0);
    }
    let imc_top = move |x: f64| -> f64 {
        let bump = scallops
            .iter()
            .map(|&(c, hw, ht)| {
                let u = (x - c) / hw;
                if u.abs() < 1.0 {
                    ht * (1.0 - u * u).sqrt()
                } else {
                    0.0
                }
            })
            .fold(4.0f64, f64::max);
        cu3sn_top - bump
    };
    let imc_top2 = imc_top.clone();
    let in_solder = move |x: f64, y: f64| y < imc_top2(x) - 3.0;
    let mut particles =
        scatter_particles(&mut rng, 70, ag3sn, (1.6, 3.5), 1.5, (wf, hf), &in_solder);
    particles.extend(scatter_particles(
        &mut rng,
        10,
        ag3sn,
        (1.2, 1.8),
        6.0,
        (wf, hf),
        &in_solder,
    ));
    let in_solder2 = in_solder.clone();
    let mut voids = scatter_particles(&mut rng, 4, 0, (4.0, 9.0), 1.3, (wf, hf), move |x, y| {
        in_solder2(x, y) && y > 15.0 && y < hf * 0.6
    });
    let vx = wf * 0.62;
    voids.push(Particle {
        cx: vx,
        cy: imc_top(vx) + 1.0,
        a: 7.0,
        b: 4.5,
        angle: 0.1,
        label: 0,
    });
    let shape = move |x: f64, y: f64| -> u16 {
        if let Some(v) = voids.iter().find(|v| v.contains(x, y)) {
            return v.label;
        }
        if y >= pad_top {
            return cu;
        }
        if y >= cu3sn_top {
            return cu3sn;
        }
        if y >= imc_top(x) {
            return cu6sn5;
        }
        particles
            .iter()
            .find(|p| p.contains(x, y))
            .map_or(sn, |p| p.label)
    };
    let detector = Detector::new(
        &[("Cu", "Ka", 46.0), ("Ag", "La", 34.0), ("Sn", "La", 38.0)],
        1.5,
        1.0,
    );
    let opts = SynthOptions {
        width: w,
        height: h,
        detector,
        seed: 7,
        metadata: FieldMetadata {
            pixel_size_um: Some(0.2),
            beam_kv: Some(15.0),
            live_time_s: Some(480.0),
            ..Default::default()
        },
        bse: Some(BseOptions {
            scale: 2.0,
            shift_px: (2.6, -1.4),
            ..BseOptions::default()
        }),
    };
    (Microstructure::new(phases, shape), opts)
}

/// A jittered grid of sites: one random point per `cell × cell` square, so the nearest
/// site of any point lies in the 5 × 5 cells around it (Voronoi lookups in O(1), for
/// fields of millions of pixels).
pub struct JitteredSites {
    cell: f64,
    cols: usize,
    rows: usize,
    /// (x, y, label, radius) per cell; radius 0 for grain sites.
    sites: Vec<(f64, f64, u16, f64)>,
}

impl JitteredSites {
    /// One site per cell, from `site(corner x, corner y)`, cells visited row by row.
    fn from_cells(
        cell: f64,
        (w, h): (f64, f64),
        mut site: impl FnMut(f64, f64) -> (f64, f64, u16, f64),
    ) -> Self {
        let (cols, rows) = (
            (w / cell).ceil() as usize + 1,
            (h / cell).ceil() as usize + 1,
        );
        let sites = (0..cols * rows)
            .map(|i| site((i % cols) as f64 * cell, (i / cols) as f64 * cell))
            .collect();
        JitteredSites {
            cell,
            cols,
            rows,
            sites,
        }
    }

    /// Grain sites with labels drawn ∝ `weights` (labels 1..).
    pub fn grains(rng: &mut ChaCha8Rng, cell: f64, size: (f64, f64), weights: &[f64]) -> Self {
        Self::from_cells(cell, size, |cx, cy| {
            let label = draw_label(rng, weights);
            (
                cx + rng.random_range(0.0..cell),
                cy + rng.random_range(0.0..cell),
                label,
                0.0,
            )
        })
    }

    /// Round inclusions: in each cell, with probability `p`, a disk of radius in
    /// `[r_min, r_max]` (well inside the cell) labelled `label`.
    pub fn inclusions(
        rng: &mut ChaCha8Rng,
        cell: f64,
        size: (f64, f64),
        p: f64,
        label: u16,
        (r_min, r_max): (f64, f64),
    ) -> Self {
        Self::from_cells(cell, size, |cx, cy| {
            let r = if rng.random_bool(p) {
                rng.random_range(r_min..=r_max)
            } else {
                0.0
            };
            let m = r.min(cell / 2.0);
            (
                cx + m + rng.random_range(0.0..(cell - 2.0 * m).max(1e-9)),
                cy + m + rng.random_range(0.0..(cell - 2.0 * m).max(1e-9)),
                label,
                r,
            )
        })
    }

    fn near(&self, x: f64, y: f64, reach: isize) -> impl Iterator<Item = &(f64, f64, u16, f64)> {
        let (cx, cy) = (
            (x / self.cell).floor() as isize,
            (y / self.cell).floor() as isize,
        );
        (-reach..=reach)
            .flat_map(move |dy| (-reach..=reach).map(move |dx| (cx + dx, cy + dy)))
            .filter(move |&(i, j)| {
                i >= 0 && j >= 0 && (i as usize) < self.cols && (j as usize) < self.rows
            })
            .map(move |(i, j)| &self.sites[j as usize * self.cols + i as usize])
    }

    /// The label of the nearest grain site.
    pub fn grain_at(&self, x: f64, y: f64) -> u16 {
        self.near(x, y, 2)
            .min_by(|a, b| {
                ((a.0 - x).powi(2) + (a.1 - y).powi(2))
                    .total_cmp(&((b.0 - x).powi(2) + (b.1 - y).powi(2)))
            })
            .map_or(0, |s| s.2)
    }

    /// The label of an inclusion covering (x, y), if any.
    pub fn inclusion_at(&self, x: f64, y: f64) -> Option<u16> {
        self.near(x, y, 1)
            .find(|s| s.3 > 0.0 && (s.0 - x).powi(2) + (s.1 - y).powi(2) <= s.3 * s.3)
            .map(|s| s.2)
    }
}

/// A large field for benchmarks: a rock of six minerals in ten mapped elements (quartz,
/// two feldspars, a pyroxene as grains; rutile and magnetite as inclusions) with pores,
/// `size × size` pixels, majors at 10–40 counts per pixel.
pub fn benchmark_rock(size: usize, seed: u64) -> (Microstructure, SynthOptions) {
    let s = size as f64;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let phases = vec![
        SynthPhase::formula("SiO2"),
        SynthPhase::formula("KAlSi3O8"),
        SynthPhase::formula("NaAlSi3O8"),
        SynthPhase::formula("CaMgSi2O6"),
        SynthPhase::formula("TiO2"),
        SynthPhase::formula("Fe3O4"),
    ];
    let grains = JitteredSites::grains(&mut rng, 48.0, (s, s), &[0.35, 0.25, 0.25, 0.15]);
    let rutile = JitteredSites::inclusions(&mut rng, 40.0, (s, s), 0.25, 5, (2.0, 5.0));
    let magnetite = JitteredSites::inclusions(&mut rng, 64.0, (s, s), 0.3, 6, (3.0, 8.0));
    let pores = JitteredSites::inclusions(&mut rng, 128.0, (s, s), 0.3, 0, (3.0, 9.0));
    let shape = move |x: f64, y: f64| -> u16 {
        if pores.inclusion_at(x, y).is_some() {
            return 0;
        }
        magnetite
            .inclusion_at(x, y)
            .or_else(|| rutile.inclusion_at(x, y))
            .unwrap_or_else(|| grains.grain_at(x, y))
    };
    let detector = Detector::new(
        &[
            ("O", "Ka", 30.0),
            ("Na", "Ka", 35.0),
            ("Mg", "Ka", 35.0),
            ("Al", "Ka", 40.0),
            ("Si", "Ka", 40.0),
            ("K", "Ka", 45.0),
            ("Ca", "Ka", 45.0),
            ("Ti", "Ka", 45.0),
            ("Mn", "Ka", 40.0),
            ("Fe", "Ka", 40.0),
        ],
        1.0,
        1.0,
    );
    let opts = SynthOptions {
        width: size,
        height: size,
        detector,
        seed: seed ^ 0xBE7C,
        metadata: FieldMetadata {
            pixel_size_um: Some(0.5),
            beam_kv: Some(15.0),
            live_time_s: Some(1200.0),
            ..Default::default()
        },
        bse: None,
    };
    (Microstructure::new(phases, shape), opts)
}

/// Matches predicted labels to true labels one-to-one by largest overlap (greedy on the
/// confusion matrix, largest cell first); predicted 0 (unassigned) matches true 0 (void).
/// Returns, for each predicted label 0..=max, the true label it stands for, if any.
pub fn match_labels(pred: &[u16], truth: &[u16]) -> Vec<Option<u16>> {
    let kp = pred.iter().copied().max().unwrap_or(0) as usize + 1;
    let kt = truth.iter().copied().max().unwrap_or(0) as usize + 1;
    let mut conf = vec![0usize; kp * kt];
    for (&p, &t) in pred.iter().zip(truth) {
        conf[p as usize * kt + t as usize] += 1;
    }
    let mut pairs: Vec<(usize, usize, usize)> = (1..kp)
        .flat_map(|p| (1..kt).map(move |t| (p, t)))
        .map(|(p, t)| (conf[p * kt + t], p, t))
        .collect();
    pairs.sort_by(|a, b| b.cmp(a));
    let mut map = vec![None; kp];
    let mut used = vec![false; kt];
    map[0] = Some(0);
    used[0] = true;
    for (n, p, t) in pairs {
        if n > 0 && map[p].is_none() && !used[t] {
            map[p] = Some(t as u16);
            used[t] = true;
        }
    }
    map
}

/// Share of pixels whose label, after [`match_labels`], equals the true label.
pub fn agreement(pred: &[u16], truth: &[u16]) -> f64 {
    let map = match_labels(pred, truth);
    let correct = pred
        .iter()
        .zip(truth)
        .filter(|(&p, &t)| map[p as usize] == Some(t))
        .count();
    correct as f64 / pred.len().max(1) as f64
}

/// Generates the bundled sample field (see [`solder_joint`]).
pub fn sample_field() -> Result<SynthField> {
    let (micro, opts) = solder_joint();
    generate(&micro, &opts)
}

/// Synthetic scenarios.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Scenario {
    /// The bundled sample field.
    SolderJoint,
    /// A six-mineral rock in ten elements, for benchmarks.
    BenchmarkRock,
}

impl crate::choice::Choice for Scenario {
    const ALL: &'static [Scenario] = &[Scenario::SolderJoint, Scenario::BenchmarkRock];
    fn name(self) -> &'static str {
        match self {
            Scenario::SolderJoint => "solder-joint",
            Scenario::BenchmarkRock => "benchmark-rock",
        }
    }
    fn help(self) -> &'static str {
        match self {
            Scenario::SolderJoint => "The bundled sample field",
            Scenario::BenchmarkRock => "A six-mineral rock in ten elements, for benchmarks",
        }
    }
}

/// The benchmark rock's settings (all `None` for the solder joint).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct RockKnobs {
    /// Width and height, pixels (2048).
    pub size: Option<usize>,
    /// Seed of the microstructure and counts (2048).
    pub seed: Option<u64>,
    /// An X-ray yield rising left to right by ± this share of its mean.
    pub yield_ramp: Option<f64>,
    /// A BSE image of this many pixels per map pixel.
    pub bse_scale: Option<f64>,
}

/// Writes the synthetic field of `scenario` into the folder `output` (and its true labels
/// as a 16-bit PNG to `truth`); the [`RockKnobs`] set the benchmark rock. Never writes
/// into a field's folder; replaces existing outputs only with `force`.
pub fn write_scenario(
    output: &Path,
    truth: Option<&Path>,
    scenario: Scenario,
    knobs: RockKnobs,
    force: bool,
) -> Result<SynthField> {
    let RockKnobs {
        size,
        seed,
        yield_ramp: ramp,
        bse_scale,
    } = knobs;
    if scenario == Scenario::SolderJoint && knobs != RockKnobs::default() {
        return Err(Error::options(
            "--size, --seed, --yield-ramp and --bse-scale set the benchmark rock; the solder joint is the bundled sample, always the same",
            "leave them out, or add --scenario benchmark-rock",
        ));
    }
    if let Some(s) = bse_scale {
        if !(1.0..=4.0).contains(&s) {
            return Err(Error::options(
                format!("--bse-scale {s} is out of range"),
                "give 1 to 4 BSE pixels per map pixel, e.g. 1.5",
            ));
        }
    }
    let (size, seed) = (size.unwrap_or(2048), seed.unwrap_or(2048));
    if scenario == Scenario::BenchmarkRock && !(16..=20_000).contains(&size) {
        return Err(Error::options(
            format!("--size {size} is out of range"),
            "use 16 to 20000 pixels",
        ));
    }
    if let Some(t) = truth {
        if t.exists() && !force {
            return Err(Error::output(
                t,
                "already exists",
                "choose another file for the true labels, or add --force to replace it",
            ));
        }
        let folder = crate::guard::resolve_output(t)?;
        if let Some(file) = folder.parent().and_then(crate::io::folder::field_file_in) {
            return Err(Error::output(
                t,
                format!(
                    "lies in a field's folder (it holds {file}); synth never writes into a field"
                ),
                "write the true labels outside any field",
            ));
        }
    }
    if let Some(r) = ramp {
        check_ramp(r)?;
    }
    let dir = crate::report::prepare_output(output, force)?;
    let field = match scenario {
        Scenario::SolderJoint => sample_field()?,
        Scenario::BenchmarkRock => {
            let (micro, mut opts) = benchmark_rock(size, seed);
            opts.bse = bse_scale.map(|scale| BseOptions {
                scale,
                shift_px: (2.3, -1.6),
                ..BseOptions::default()
            });
            let mut field = generate(&micro, &opts)?;
            if let Some(r) = ramp {
                shade(&mut field, r, seed)?;
            }
            field
        }
    };
    write_folder(&field, dir.folder())?;
    dir.commit()?;
    if let Some(t) = truth {
        let png = crate::io::raster::encode_png_u16(
            field.stack.width(),
            field.stack.height(),
            &field.truth,
        );
        crate::report::write_file_atomically(t, &png)?;
    }
    Ok(field)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `match_labels` on a hand-built confusion matrix (predicted × true, 0 = void):
    ///   pred 1: 50 of true 2, 10 of true 1;  pred 2: 40 of true 1;  pred 3: 5 of true 2
    ///   pred 0: 7 of true 0.
    /// Greedy on the largest cells: (1, 2) 50 first, then (2, 1) 40; pred 3 has only true 2
    /// left, which is taken, so it stays unmatched; 0 is always 0. Agreement is
    /// (50 + 40 + 7) / 112.
    #[test]
    fn match_labels_on_a_hand_built_confusion_matrix() {
        let mut pred = Vec::new();
        let mut truth = Vec::new();
        for (p, t, n) in [
            (1u16, 2u16, 50),
            (1, 1, 10),
            (2, 1, 40),
            (3, 2, 5),
            (0, 0, 7),
        ] {
            pred.extend(std::iter::repeat_n(p, n));
            truth.extend(std::iter::repeat_n(t, n));
        }
        assert_eq!(
            match_labels(&pred, &truth),
            vec![Some(0), Some(2), Some(1), None]
        );
        assert!((agreement(&pred, &truth) - 97.0 / 112.0).abs() < 1e-12);
    }

    fn tiny() -> (Microstructure, SynthOptions) {
        let phases = vec![SynthPhase::formula("Fe"), SynthPhase::formula("SiO2")];
        let micro = Microstructure::new(phases, |x, _y| {
            if x < 10.0 {
                1
            } else if x < 18.0 {
                2
            } else {
                0
            }
        });
        let opts = SynthOptions {
            width: 20,
            height: 400,
            detector: Detector::new(
                &[("O", "Ka", 30.0), ("Si", "Ka", 40.0), ("Fe", "Ka", 50.0)],
                2.0,
                0.0,
            ),
            seed: 3,
            metadata: FieldMetadata::default(),
            bse: None,
        };
        (micro, opts)
    }

    #[test]
    fn counts_follow_the_stated_model() {
        let (micro, opts) = tiny();
        let f = generate(&micro, &opts).unwrap();
        let fe = f.stack.map("Fe").unwrap();
        let si = f.stack.map("Si").unwrap();
        let mean = |m: &ElementMap, x0: usize, x1: usize| {
            let v: Vec<f64> = (0..400)
                .flat_map(|y| (x0..x1).map(move |x| y * 20 + x))
                .map(|i| f64::from(m.counts[i]))
                .collect();
            v.iter().sum::<f64>() / v.len() as f64
        };
        // Pure Fe: 50 counts + continuum 2 × 26/30. Poisson SE of a mean of 4000 pixels
        // near 52 counts is 0.11, so 0.5 is over 4 SE.
        let fe_expected = 50.0 + 2.0 * 26.0 / 30.0;
        assert!(
            (mean(fe, 0, 10) - fe_expected).abs() < 0.5,
            "{}",
            mean(fe, 0, 10)
        );
        // SiO2: Si 46.744 wt% (references.md §6) × 40 + continuum 2 × Zw/30, Zw 10.805 (§2).
        let si_expected = 0.46744 * 40.0 + 2.0 * 10.805 / 30.0;
        assert!(
            (mean(si, 10, 18) - si_expected).abs() < 0.4,
            "{}",
            mean(si, 10, 18)
        );
        // Voids record nothing.
        assert_eq!(mean(fe, 18, 20), 0.0);
        // Poisson: variance ≈ mean (index of dispersion within 10 %).
        let v: Vec<f64> = (0..400)
            .flat_map(|y| (0..10).map(move |x| y * 20 + x))
            .map(|i| f64::from(fe.counts[i]))
            .collect();
        let m = v.iter().sum::<f64>() / v.len() as f64;
        let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() - 1) as f64;
        assert!((var / m - 1.0).abs() < 0.1, "dispersion {}", var / m);
        assert_eq!(f.truth.iter().filter(|&&t| t == 0).count(), 2 * 400);
    }

    #[test]
    fn same_seed_same_field() {
        let (micro, opts) = tiny();
        let a = generate(&micro, &opts).unwrap();
        let b = generate(&micro, &opts).unwrap();
        assert_eq!(a.stack, b.stack);
        let mut o2 = opts.clone();
        o2.seed = 4;
        let c = generate(&micro, &o2).unwrap();
        assert_ne!(a.stack, c.stack);
    }

    #[test]
    fn bse_follows_the_shift_convention() {
        // A single disk at map (20, 15); with shift (3, -2) and scale 2 its centre must
        // appear in the BSE image at ((20+3)·2, (15-2)·2) = (46, 26) (method-notes.md, "Shift convention").
        let micro = Microstructure::new(
            vec![SynthPhase::formula("Au"), SynthPhase::formula("C")],
            |x, y| {
                if (x - 20.0).powi(2) + (y - 15.0).powi(2) < 16.0 {
                    1
                } else {
                    2
                }
            },
        );
        let opts = SynthOptions {
            width: 40,
            height: 30,
            detector: Detector::new(&[("Au", "La", 10.0)], 0.0, 0.0),
            seed: 1,
            metadata: FieldMetadata::default(),
            bse: Some(BseOptions {
                scale: 2.0,
                shift_px: (3.0, -2.0),
                noise: 1.0,
                ..BseOptions::default()
            }),
        };
        let f = generate(&micro, &opts).unwrap();
        let (bse, _) = f.bse.unwrap();
        let (mut sx, mut sy, mut n) = (0.0, 0.0, 0.0);
        let bright = bse.data.iter().cloned().fold(0.0f32, f32::max) * 0.8;
        for (i, &v) in bse.data.iter().enumerate() {
            if v > bright {
                sx += (i % bse.width) as f64 + 0.5;
                sy += (i / bse.width) as f64 + 0.5;
                n += 1.0;
            }
        }
        assert!(
            (sx / n - 46.0).abs() < 0.3 && (sy / n - 26.0).abs() < 0.3,
            "{} {}",
            sx / n,
            sy / n
        );
    }

    #[test]
    fn sample_field_has_every_phase_and_voids() {
        let f = sample_field().unwrap();
        assert_eq!(f.stack.symbols(), vec!["Cu", "Ag", "Sn"]);
        for label in 0..=5u16 {
            let n = f.truth.iter().filter(|&&t| t == label).count();
            assert!(n > 100, "label {label} has {n} pixels");
        }
    }
}
