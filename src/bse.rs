//! BSE cross-check: does the segmentation agree with the backscattered-electron contrast?
//!
//! Takes the BSE image, the label image and the phase table; returns a [`BseCheck`].
//! 1. **Geometry.** The BSE image covers the same field of view, usually at a finer
//!    resolution: the scale (BSE pixels per map pixel) comes from the size ratio, and
//!    images whose aspect ratios differ are refused. The image is resampled onto the map
//!    grid by area averaging.
//! 2. **Registration.** Phase correlation (Kuglin & Hines 1975) between the resampled BSE
//!    image and a BSE image *predicted* from the phase map (each phase drawn at its
//!    backscatter coefficient), refined to sub-pixel precision with an upsampled DFT around
//!    the peak (Guizar-Sicairos, Thurman & Fienup 2008). Sign convention (method-notes.md, "Shift convention"):
//!    a feature at map (x, y) appears in the BSE image at ((x + dx)·s, (y + dy)·s). A
//!    registration whose correlation peak does not stand out is not used.
//! 3. **The check.** Per phase, the BSE mean, SD and SE on interior pixels (all eight
//!    neighbours of the same phase), saturated BSE pixels excluded; the Spearman rank
//!    correlation of the means with the predicted coefficients; a linear fit; and every
//!    pair whose measured order contradicts the predicted one, with its likely causes.

use rayon::prelude::*;
use rustfft::num_complex::Complex;
use rustfft::FftPlanner;
use serde::{Deserialize, Serialize};

use crate::chem::{element, Composition};
use crate::error::{Error, Result};
use crate::phases::PhaseTable;
use crate::physics::eta_compound;

/// A BSE image as loaded.
#[derive(Debug, Clone, PartialEq)]
pub struct BseImage {
    /// Width.
    pub width: usize,
    /// Height.
    pub height: usize,
    /// Grey levels, row-major.
    pub data: Vec<f32>,
    /// The grey level of a saturated detector, when the format has one (255, 65535).
    pub saturation: Option<f32>,
    /// Where it came from.
    pub source: String,
}

/// The registration found.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Registration {
    /// Shift (dx, dy) in map pixels (see the module docs for the sign).
    pub shift_px: [f64; 2],
    /// Height of the normalised phase-correlation peak (0..1).
    pub peak: f64,
    /// Ratio of the peak to the highest value more than 3 pixels away from it.
    pub peak_ratio: f64,
    /// Whether the registration was trusted and used.
    pub trusted: bool,
}

/// The BSE statistics of one phase.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseBse {
    /// Phase id.
    pub id: u16,
    /// Mean BSE grey level on the phase's interior pixels.
    pub bse_mean: f64,
    /// Standard deviation.
    pub bse_sd: f64,
    /// Standard error of the mean.
    pub bse_se: f64,
    /// Interior pixels used.
    pub pixels_used: usize,
    /// Backscatter coefficient predicted from the apparent composition (Reuter 1972,
    /// mass-fraction mixing).
    pub eta_predicted: f64,
    /// Mass-fraction-weighted mean atomic number of the apparent composition.
    pub mean_z: f64,
    /// BSE mean minus the linear fit at this phase's η (grey levels; absent when no fit).
    pub fit_residual: Option<f64>,
}

/// A straight line BSE = intercept + slope · η.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Fit {
    /// Intercept, grey levels.
    pub intercept: f64,
    /// Slope, grey levels per unit η.
    pub slope: f64,
    /// Coefficient of determination.
    pub r2: f64,
}

/// A pair of phases whose BSE order contradicts the prediction.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Flag {
    /// The phase predicted darker and the phase predicted brighter.
    pub phases: [u16; 2],
    /// What was found and its likely causes, in words.
    pub message: String,
}

/// The result of the BSE check.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BseCheck {
    /// The BSE image used.
    pub source: String,
    /// BSE pixels per map pixel.
    pub scale: f64,
    /// The registration.
    pub registration: Registration,
    /// Shift (dx, dy) in map pixels as used (zero when the registration was not trusted).
    pub shift_px: [f64; 2],
    /// Share of BSE pixels at the saturation level (excluded).
    pub saturated_fraction: f64,
    /// Per-phase statistics.
    pub phases: Vec<PhaseBse>,
    /// Spearman rank correlation between BSE means and predicted η (three or more phases).
    pub spearman: Option<f64>,
    /// Linear fit of BSE means on predicted η (two or more phases).
    pub fit: Option<Fit>,
    /// Contradictions of the predicted order.
    pub flags: Vec<Flag>,
    /// Things the user should know.
    pub warnings: Vec<String>,
    /// The registered BSE image on the map grid (NaN where it has no data).
    #[serde(skip)]
    pub registered: Vec<f32>,
}

/// The scale (BSE pixels per map pixel) from the two sizes; aspect ratios must agree.
pub fn scale_for(source: &str, map: (usize, usize), bse: (usize, usize)) -> Result<f64> {
    let sx = bse.0 as f64 / map.0 as f64;
    let sy = bse.1 as f64 / map.1 as f64;
    if (sx / sy - 1.0).abs() > 0.01 {
        return Err(Error::input(
            std::path::Path::new(source),
            format!(
                "is {}×{} but the maps are {}×{}: the aspect ratios differ ({:.3} vs {:.3}), so the images do not cover the same field",
                bse.0, bse.1, map.0, map.1, bse.0 as f64 / bse.1 as f64, map.0 as f64 / map.1 as f64
            ),
            "give the BSE image of the same field of view (crop or re-export it), or leave out --bse",
        ));
    }
    Ok(0.5 * (sx + sy))
}

/// Overlaps of the map cells [i + d, i + 1 + d)·s with the BSE pixels along one axis.
fn overlaps(n_map: usize, n_bse: usize, s: f64, d: f64) -> Vec<Vec<(usize, f64)>> {
    (0..n_map)
        .map(|i| {
            let (a, b) = ((i as f64 + d) * s, (i as f64 + 1.0 + d) * s);
            let lo = a.floor().max(0.0) as usize;
            let hi = (b.ceil().max(0.0) as usize).min(n_bse);
            (lo..hi)
                .filter_map(|k| {
                    let w = (b.min(k as f64 + 1.0) - a.max(k as f64)).max(0.0);
                    (w > 0.0).then_some((k, w))
                })
                .collect()
        })
        .collect()
}

/// Area-averages the BSE image onto a `w × h` map grid shifted by (dx, dy) map pixels.
/// Cells less than half covered by valid BSE pixels are NaN.
pub fn resample(bse: &BseImage, w: usize, h: usize, s: f64, (dx, dy): (f64, f64)) -> Vec<f32> {
    let ox = overlaps(w, bse.width, s, dx);
    let oy = overlaps(h, bse.height, s, dy);
    let full = s * s;
    let valid = |v: f32| v.is_finite() && bse.saturation.is_none_or(|sat| v < sat);
    let mut out = vec![f32::NAN; w * h];
    // Rows in parallel: each cell is summed alone, in the same order, whatever the threads.
    out.par_chunks_mut(w.max(1))
        .zip(oy.par_iter())
        .for_each(|(row, ys)| {
            for (cell, xs) in row.iter_mut().zip(&ox) {
                let (mut sum, mut wsum) = (0.0f64, 0.0f64);
                for &(yy, wy) in ys {
                    for &(xx, wx) in xs {
                        let v = bse.data[yy * bse.width + xx];
                        if valid(v) {
                            sum += f64::from(v) * wx * wy;
                            wsum += wx * wy;
                        }
                    }
                }
                if wsum >= 0.5 * full {
                    *cell = (sum / wsum) as f32;
                }
            }
        });
    out
}

fn fft2(data: &mut [Complex<f64>], w: usize, h: usize, inverse: bool) {
    let mut planner = FftPlanner::new();
    let (fw, fh) = if inverse {
        (planner.plan_fft_inverse(w), planner.plan_fft_inverse(h))
    } else {
        (planner.plan_fft_forward(w), planner.plan_fft_forward(h))
    };
    // Rows, then columns through a transposed copy, each line in parallel: every line's
    // transform is the same computation whatever the thread count.
    data.par_chunks_exact_mut(w).for_each(|row| fw.process(row));
    let mut t = vec![Complex::new(0.0, 0.0); w * h];
    t.par_chunks_exact_mut(h).enumerate().for_each(|(x, col)| {
        for (y, c) in col.iter_mut().enumerate() {
            *c = data[y * w + x];
        }
        fh.process(col);
    });
    data.par_chunks_exact_mut(w)
        .enumerate()
        .for_each(|(y, row)| {
            for (x, v) in row.iter_mut().enumerate() {
                *v = t[x * h + y];
            }
        });
}

/// Signed frequency of index k of an n-point DFT.
fn freq(k: usize, n: usize) -> f64 {
    if k <= n / 2 {
        k as f64
    } else {
        k as f64 - n as f64
    }
}

/// Shift d such that `moving(x + d) ≈ reference(x)`, by phase correlation with sub-pixel
/// refinement. NaN pixels are filled with the mean; both images are windowed (Hann).
pub fn phase_correlate(reference: &[f32], moving: &[f32], w: usize, h: usize) -> Registration {
    correlate(reference, moving, w, h, (20, 30))
}

/// [`phase_correlate`] with the sub-pixel grid in steps of 1/`up` pixel, `reach` steps
/// either side of the integer peak.
fn correlate(
    reference: &[f32],
    moving: &[f32],
    w: usize,
    h: usize,
    (up, reach): (usize, usize),
) -> Registration {
    // The Hann window's factors along each axis, tabulated once.
    let hann = |n: usize| -> Vec<f64> {
        (0..n)
            .map(|x| 0.5 - 0.5 * (2.0 * std::f64::consts::PI * (x as f64 + 0.5) / n as f64).cos())
            .collect()
    };
    let (hx, hy) = (hann(w), hann(h));
    let prep = |img: &[f32]| -> Vec<Complex<f64>> {
        let (sum, count) = img
            .iter()
            .filter(|v| v.is_finite())
            .fold((0.0f64, 0usize), |(s, n), &v| (s + f64::from(v), n + 1));
        let mean = sum / count.max(1) as f64;
        img.par_iter()
            .enumerate()
            .map(|(i, &v)| {
                let win = hx[i % w] * hy[i / w];
                let v = if v.is_finite() { f64::from(v) } else { mean };
                Complex::new((v - mean) * win, 0.0)
            })
            .collect()
    };
    let mut fr = prep(reference);
    let mut fm = prep(moving);
    fft2(&mut fr, w, h, false);
    fft2(&mut fm, w, h, false);
    // Whitened cross-power spectrum, weighted towards low frequencies: near the Nyquist
    // limit the two images differ most (pixel-centre sampling of the labels against the
    // detector's area integration, noise), which biases the sub-pixel peak.
    let mut cross: Vec<Complex<f64>> = fm
        .par_iter()
        .zip(&fr)
        .enumerate()
        .map(|(i, (m, r))| {
            let (fx, fy) = (freq(i % w, w) / w as f64, freq(i / w, h) / h as f64);
            let weight = (-(fx * fx + fy * fy) / (LOW_PASS * LOW_PASS)).exp();
            let c = m * r.conj();
            let n = c.norm();
            if n > 1e-12 {
                c / n * weight
            } else {
                Complex::new(0.0, 0.0)
            }
        })
        .collect();
    let spectrum = cross.clone();
    let t = crate::profile::stage("  bse: inverse FFT and peak");
    fft2(&mut cross, w, h, true);
    let n = (w * h) as f64;
    let corr: Vec<f64> = cross.iter().map(|c| c.re / n).collect();
    let best = (0..w * h).fold(0, |b, i| if corr[i] > corr[b] { i } else { b });
    let (px, py) = (best % w, best / w);
    let peak = corr[best];
    let wrap = |d: isize, m: usize| -> isize {
        d.rem_euclid(m as isize)
            .min(m as isize - d.rem_euclid(m as isize))
    };
    let second = (0..w * h)
        .filter(|&i| {
            wrap((i % w) as isize - px as isize, w) > 3
                || wrap((i / w) as isize - py as isize, h) > 3
        })
        .map(|i| corr[i])
        .fold(f64::NEG_INFINITY, f64::max);
    drop(t);
    let _t = crate::profile::stage("  bse: upsampled DFT");
    // Upsampled DFT of the cross-power spectrum on a ±1.5-pixel grid around the peak.
    let (cx, cy) = (freq(px, w), freq(py, h));
    let reach = reach as isize;
    let offs: Vec<f64> = (-reach..=reach).map(|i| i as f64 / up as f64).collect();
    let kx: Vec<f64> = (0..w).map(|k| freq(k, w)).collect();
    let ky: Vec<f64> = (0..h).map(|k| freq(k, h)).collect();
    let tau = 2.0 * std::f64::consts::PI;
    // a[l][u] = Σ_k R(k, l) e^{i2π k (cx + u)/w}, the rotations tabulated once, the rows
    // in parallel (each sum in the same order whatever the threads).
    let twiddles: Vec<Vec<Complex<f64>>> = offs
        .iter()
        .map(|&u| {
            let t = tau * (cx + u) / w as f64;
            kx.iter()
                .map(|&f| Complex::from_polar(1.0, t * f))
                .collect()
        })
        .collect();
    let mut a = vec![Complex::new(0.0, 0.0); h * offs.len()];
    a.par_chunks_mut(offs.len())
        .zip(spectrum.par_chunks(w))
        .for_each(|(out, row)| {
            for (o, tw) in out.iter_mut().zip(&twiddles) {
                let mut s = Complex::new(0.0, 0.0);
                for (r, t) in row.iter().zip(tw) {
                    s += r * t;
                }
                *o = s;
            }
        });
    let mut best_up = (f64::NEG_INFINITY, 0.0, 0.0);
    for &v in &offs {
        let t = tau * (cy + v) / h as f64;
        let rot: Vec<Complex<f64>> = ky
            .iter()
            .map(|&f| Complex::from_polar(1.0, t * f))
            .collect();
        for (ui, &u) in offs.iter().enumerate() {
            let mut s = Complex::new(0.0, 0.0);
            for l in 0..h {
                s += a[l * offs.len() + ui] * rot[l];
            }
            if s.re > best_up.0 {
                best_up = (s.re, u, v);
            }
        }
    }
    let shift = [cx + best_up.1, cy + best_up.2];
    let peak_ratio = if second > 0.0 {
        peak / second
    } else {
        f64::INFINITY
    };
    Registration {
        shift_px: shift,
        peak,
        peak_ratio,
        trusted: peak_ratio >= MIN_PEAK_RATIO,
    }
}

/// Fields with more map pixels than this are registered on a block-averaged pair (common
/// practice, no source: 512² resolves the shift of grains a few pixels across to a few
/// hundredths of a pixel, and its transforms take milliseconds).
pub const REGISTER_PIXELS: usize = 512 * 512;

/// Averages `f × f` blocks of a `w × h` image (a partial block at the right or bottom edge
/// is left out); NaN pixels are skipped, a block of NaN only is NaN.
fn block_mean(img: &[f32], w: usize, h: usize, f: usize) -> (Vec<f32>, usize, usize) {
    let (bw, bh) = (w / f, h / f);
    let mut out = vec![f32::NAN; bw * bh];
    out.par_chunks_mut(bw.max(1))
        .enumerate()
        .for_each(|(by, row)| {
            for (bx, cell) in row.iter_mut().enumerate() {
                let (mut sum, mut n) = (0.0f64, 0usize);
                for y in by * f..(by + 1) * f {
                    for &v in &img[y * w + bx * f..y * w + (bx + 1) * f] {
                        if v.is_finite() {
                            sum += f64::from(v);
                            n += 1;
                        }
                    }
                }
                if n > 0 {
                    *cell = (sum / n as f64) as f32;
                }
            }
        });
    (out, bw, bh)
}

/// Phase correlation of `moving` against `reference` (see [`phase_correlate`]); a field
/// of more than [`REGISTER_PIXELS`] map pixels is registered on block averages of both
/// images (blocks of f × f pixels, f the smallest that brings it under the limit), and the
/// shift scaled back by f: both images' blocks start at the same pixel, so the blocks'
/// own offset cancels. The sub-pixel grid is made f times finer, so that its step stays
/// 1/20 of a map pixel, and spans ±1 block around the integer peak.
pub fn register(reference: &[f32], moving: &[f32], w: usize, h: usize) -> Registration {
    let mut f = 1;
    while (w / f) * (h / f) > REGISTER_PIXELS {
        f += 1;
    }
    if f == 1 {
        return phase_correlate(reference, moving, w, h);
    }
    let (r, bw, bh) = block_mean(reference, w, h, f);
    let (m, _, _) = block_mean(moving, w, h, f);
    // Steps of 1/20 map pixel over ±1 block: the integer peak is within half a block.
    let mut reg = correlate(&r, &m, bw, bh, (20 * f, 20 * f));
    reg.shift_px = [reg.shift_px[0] * f as f64, reg.shift_px[1] * f as f64];
    reg
}

/// Frequency scale (cycles per pixel) of the Gaussian weight on the cross-power spectrum
/// (common practice, no source).
pub const LOW_PASS: f64 = 0.2;

/// A registration is trusted when its peak is at least this many times the next-highest
/// value of the correlation surface (common practice, no source).
pub const MIN_PEAK_RATIO: f64 = 1.5;

/// Predicted η of each phase of the table (index = id − 1) from its apparent composition.
pub fn predicted_eta(table: &PhaseTable) -> Vec<(f64, f64)> {
    table
        .phases
        .iter()
        .map(|p| {
            let parts: Vec<_> = table
                .composition_elements
                .iter()
                .zip(&p.composition.wt)
                .filter(|(_, &w)| w > 0.0)
                .filter_map(|(e, &w)| element(e).map(|el| (el, w)))
                .collect();
            let c = Composition::from_mass_fractions(&parts);
            (eta_compound(&c), c.mean_z_mass())
        })
        .collect()
}

/// Ranks with ties averaged (1-based).
fn ranks(v: &[f64]) -> Vec<f64> {
    let mut idx: Vec<usize> = (0..v.len()).collect();
    idx.sort_by(|&a, &b| v[a].total_cmp(&v[b]));
    let mut r = vec![0.0; v.len()];
    let mut i = 0;
    while i < idx.len() {
        let mut j = i;
        while j + 1 < idx.len() && v[idx[j + 1]] == v[idx[i]] {
            j += 1;
        }
        for &k in &idx[i..=j] {
            r[k] = (i + j) as f64 / 2.0 + 1.0;
        }
        i = j + 1;
    }
    r
}

fn pearson(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let cov: f64 = a.iter().zip(b).map(|(x, y)| (x - ma) * (y - mb)).sum();
    let va: f64 = a.iter().map(|x| (x - ma).powi(2)).sum();
    let vb: f64 = b.iter().map(|y| (y - mb).powi(2)).sum();
    cov / (va * vb).sqrt()
}

/// Spearman's rank correlation: Pearson's correlation of the ranks (ties averaged).
pub fn spearman(a: &[f64], b: &[f64]) -> f64 {
    pearson(&ranks(a), &ranks(b))
}

/// Two phases whose predicted η differ by less than this are not compared (the
/// mass-fraction rule on an apparent composition is not more precise; common practice, no
/// source).
pub const ETA_RESOLUTION: f64 = 0.005;

/// How the BSE image relates to the maps.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Geometry {
    /// Size of the original maps (before binning).
    pub map_size: (usize, usize),
    /// Binning applied to the maps.
    pub bin: usize,
    /// Map and BSE pixel sizes in µm, when both are known: then the scale is their ratio and
    /// the BSE image may cover a larger field than the maps (same top-left corner, before
    /// the shift). Otherwise both cover the same field and the scale is the size ratio.
    pub pixel_sizes_um: Option<(f64, f64)>,
}

/// Runs the check. `labels` are the phase ids on the `w × h` map grid.
pub fn check(
    bse: &BseImage,
    labels: &[u16],
    w: usize,
    h: usize,
    table: &PhaseTable,
    geometry: Geometry,
) -> Result<BseCheck> {
    let per_map_px = match geometry.pixel_sizes_um {
        Some((map_um, bse_um)) => map_um / bse_um,
        None => scale_for(&bse.source, geometry.map_size, (bse.width, bse.height))?,
    };
    let scale = per_map_px * geometry.bin as f64;
    let mut warnings = Vec::new();
    let saturated = bse
        .saturation
        .map_or(0, |s| bse.data.iter().filter(|&&v| v >= s).count());
    let saturated_fraction = saturated as f64 / bse.data.len() as f64;
    if saturated_fraction > 0.001 {
        warnings.push(format!(
            "{:.2} % of the BSE pixels are saturated (at the detector's top level); they are left out — lower the contrast or brightness for the next image",
            100.0 * saturated_fraction
        ));
    }
    let etas = predicted_eta(table);
    let predicted: Vec<f32> = labels
        .iter()
        .map(|&l| {
            if l == 0 {
                0.0
            } else {
                etas[l as usize - 1].0 as f32
            }
        })
        .collect();
    let (registration, shift, registered) =
        register_and_resample(bse, &predicted, (w, h), scale, &mut warnings);
    let mut phases = phase_statistics(labels, &registered, (w, h), table, &etas);
    for p in phases.iter().filter(|p| p.pixels_used < MIN_CHECK_PIXELS) {
        warnings.push(format!(
            "phase {} has only {} interior pixels on the BSE image: left out of the check",
            p.id, p.pixels_used
        ));
    }
    let (xs, ys): (Vec<f64>, Vec<f64>) = phases
        .iter()
        .filter(|p| p.pixels_used >= MIN_CHECK_PIXELS)
        .map(|p| (p.eta_predicted, p.bse_mean))
        .unzip();
    let spearman = (xs.len() >= 3)
        .then(|| spearman(&xs, &ys))
        .filter(|v| v.is_finite());
    let fit = (xs.len() >= 2).then(|| line_fit(&xs, &ys));
    if let Some(f) = fit {
        for p in phases
            .iter_mut()
            .filter(|p| p.pixels_used >= MIN_CHECK_PIXELS)
        {
            p.fit_residual = Some(p.bse_mean - f.intercept - f.slope * p.eta_predicted);
        }
    }
    let flags = contradictions(&phases, table);
    Ok(BseCheck {
        source: bse.source.clone(),
        scale,
        registration,
        shift_px: shift,
        saturated_fraction,
        phases,
        spearman,
        fit,
        flags,
        warnings,
        registered,
    })
}

/// A phase needs this many interior pixels on the BSE image to take part in the check.
const MIN_CHECK_PIXELS: usize = 10;

/// Registers the BSE image (resampled to the map grid at `scale`) on the `predicted`
/// contrast and resamples it once more with the shift found, when the registration is
/// trusted; otherwise it is compared unshifted, with a warning.
fn register_and_resample(
    bse: &BseImage,
    predicted: &[f32],
    (w, h): (usize, usize),
    scale: f64,
    warnings: &mut Vec<String>,
) -> (Registration, [f64; 2], Vec<f32>) {
    let t = crate::profile::stage("  bse: resample");
    let unshifted = resample(bse, w, h, scale, (0.0, 0.0));
    drop(t);
    let t = crate::profile::stage("  bse: register");
    let registration = register(predicted, &unshifted, w, h);
    drop(t);
    let shift = if registration.trusted {
        registration.shift_px
    } else {
        warnings.push(format!(
            "the BSE image could not be registered with confidence (correlation peak only {:.2}× the next one); it is compared unshifted, so boundaries may be misplaced",
            registration.peak_ratio
        ));
        [0.0, 0.0]
    };
    let _t = crate::profile::stage("  bse: resample");
    let registered = if shift == [0.0, 0.0] {
        unshifted
    } else {
        resample(bse, w, h, scale, (shift[0], shift[1]))
    };
    (registration, shift, registered)
}

/// Mean, standard deviation and standard error of the registered BSE image over each
/// phase's interior pixels (its 3 × 3 neighbourhood all the phase's), with its predicted
/// η and mean Z.
fn phase_statistics(
    labels: &[u16],
    registered: &[f32],
    (w, h): (usize, usize),
    table: &PhaseTable,
    etas: &[(f64, f64)],
) -> Vec<PhaseBse> {
    let mut stats = vec![(0usize, 0.0f64, 0.0f64); table.phases.len()];
    for y in 1..h.saturating_sub(1) {
        for x in 1..w.saturating_sub(1) {
            let i = y * w + x;
            let v = registered[i];
            if v.is_finite() && crate::labels::interior_3x3(labels, w, x, y) {
                let s = &mut stats[labels[i] as usize - 1];
                s.0 += 1;
                s.1 += f64::from(v);
                s.2 += f64::from(v) * f64::from(v);
            }
        }
    }
    table
        .phases
        .iter()
        .zip(&stats)
        .zip(etas)
        .map(|((p, &(n, s, s2)), &(eta, z))| {
            let nf = n as f64;
            let mean = if n > 0 { s / nf } else { f64::NAN };
            let sd = if n > 1 {
                ((s2 - nf * mean * mean) / (nf - 1.0)).max(0.0).sqrt()
            } else {
                f64::NAN
            };
            PhaseBse {
                id: p.id,
                bse_mean: mean,
                bse_sd: sd,
                bse_se: sd / nf.sqrt(),
                pixels_used: n,
                eta_predicted: eta,
                mean_z: z,
                fit_residual: None,
            }
        })
        .collect()
}

/// Least-squares line y = intercept + slope · x, with its R² (1 when y does not vary).
fn line_fit(xs: &[f64], ys: &[f64]) -> Fit {
    let n = xs.len() as f64;
    let (mx, my) = (xs.iter().sum::<f64>() / n, ys.iter().sum::<f64>() / n);
    let sxx: f64 = xs.iter().map(|x| (x - mx).powi(2)).sum();
    let sxy: f64 = xs.iter().zip(ys).map(|(x, y)| (x - mx) * (y - my)).sum();
    let slope = if sxx > 0.0 { sxy / sxx } else { 0.0 };
    let intercept = my - slope * mx;
    let ss_res: f64 = xs
        .iter()
        .zip(ys)
        .map(|(x, y)| (y - intercept - slope * x).powi(2))
        .sum();
    let ss_tot: f64 = ys.iter().map(|y| (y - my).powi(2)).sum();
    Fit {
        intercept,
        slope,
        r2: if ss_tot > 0.0 {
            1.0 - ss_res / ss_tot
        } else {
            1.0
        },
    }
}

/// Every pair of usable phases where the one predicted darker (by more than
/// [`ETA_RESOLUTION`]) is measured brighter beyond three standard errors of the difference.
fn contradictions(phases: &[PhaseBse], table: &PhaseTable) -> Vec<Flag> {
    let usable: Vec<&PhaseBse> = phases
        .iter()
        .filter(|p| p.pixels_used >= MIN_CHECK_PIXELS)
        .collect();
    let name = |id: u16| table.phases[id as usize - 1].name.clone();
    let mut flags = Vec::new();
    for a in &usable {
        for b in &usable {
            if b.eta_predicted - a.eta_predicted > ETA_RESOLUTION
                && a.bse_mean - b.bse_mean > 3.0 * (a.bse_se.powi(2) + b.bse_se.powi(2)).sqrt()
            {
                flags.push(Flag {
                    phases: [a.id, b.id],
                    message: format!(
                        "phase {} ({}) is brighter in the BSE image than phase {} ({}) (grey {:.0} vs {:.0}) although its predicted backscatter coefficient is lower ({:.3} vs {:.3}). Likely causes: an element that is not mapped (oxygen, carbon, nitrogen or another light element lowers the real coefficient of the phase that holds it — here phase {}); topography or charging; channelling contrast in crystalline phases; the two phases merged or one of them split by the segmentation; detector saturation.",
                        a.id, name(a.id), b.id, name(b.id), a.bse_mean, b.bse_mean, a.eta_predicted, b.eta_predicted, b.id
                    ),
                });
            }
        }
    }
    flags
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Least squares by hand: x = 1, 2, 3 and y = 2, 4, 5 give slope 3/2, intercept 2/3,
    /// residual sum 1/6 and total sum 14/3, so R² = 1 − 1/28.
    #[test]
    fn line_fit_of_a_hand_worked_example() {
        let f = line_fit(&[1.0, 2.0, 3.0], &[2.0, 4.0, 5.0]);
        assert!((f.slope - 1.5).abs() < 1e-12);
        assert!((f.intercept - 2.0 / 3.0).abs() < 1e-12);
        assert!((f.r2 - (1.0 - 1.0 / 28.0)).abs() < 1e-12);
        let flat = line_fit(&[1.0, 2.0], &[7.0, 7.0]);
        assert_eq!((flat.slope, flat.r2), (0.0, 1.0));
    }

    #[test]
    fn spearman_of_known_rankings() {
        // Perfect agreement, perfect reversal, and the textbook tie example: ranks of
        // [1, 2, 2, 3] are [1, 2.5, 2.5, 4].
        assert!((spearman(&[1.0, 2.0, 3.0], &[10.0, 20.0, 30.0]) - 1.0).abs() < 1e-12);
        assert!((spearman(&[1.0, 2.0, 3.0], &[3.0, 2.0, 1.0]) + 1.0).abs() < 1e-12);
        assert_eq!(ranks(&[1.0, 2.0, 2.0, 3.0]), vec![1.0, 2.5, 2.5, 4.0]);
    }

    #[test]
    fn area_averaging_preserves_the_mean_and_respects_the_shift() {
        // A 4× finer image of a ramp in x: resampling averages 4 × 4 blocks.
        let (w, h, s) = (6usize, 4usize, 4.0);
        let data: Vec<f32> = (0..w * 4 * h * 4).map(|i| (i % (w * 4)) as f32).collect();
        let img = BseImage {
            width: w * 4,
            height: h * 4,
            data,
            saturation: None,
            source: "t".into(),
        };
        let r = resample(&img, w, h, s, (0.0, 0.0));
        assert!(
            (r[0] - 1.5).abs() < 1e-6 && (r[1] - 5.5).abs() < 1e-6,
            "{r:?}"
        );
        // Shifted by half a map pixel: a cell averages BSE columns 2..6.
        let r = resample(&img, w, h, s, (0.5, 0.0));
        assert!((r[0] - 3.5).abs() < 1e-6, "{r:?}");
        assert!(
            (r[w - 1] - 22.5).abs() < 1e-6,
            "half covered: the covered half counts"
        );
        let r = resample(&img, w, h, s, (0.75, 0.0));
        assert!(r[w - 1].is_nan(), "cells mostly off the image are NaN");
    }

    #[test]
    fn aspect_mismatch_is_refused() {
        assert!(scale_for("b.png", (100, 80), (200, 160)).is_ok());
        let e = scale_for("b.png", (100, 80), (200, 200)).unwrap_err();
        assert!(e.problem.contains("aspect ratios differ"), "{e}");
    }
}
