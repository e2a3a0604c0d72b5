//! Compositions of features too thin to have interior pixels: linear unmixing with the
//! beam's lateral spread.
//!
//! A pixel near a phase boundary holds counts from both sides: the beam spreads and the
//! X-rays come from a volume wider than the pixel. The linear mixing model (Keshava &
//! Mustard 2002) writes pixel i's expected counts of element e as Σ_p a_ip x_pe, where
//! x_pe is phase p's pure count rate and a_ip the share of the signal at i that comes from
//! phase p. Here a_ip is the label image's indicator of p blurred by a Gaussian of width σ
//! (pixel-integrated, truncated at 3σ, edges replicated). For a given σ, each element's
//! pure rates follow by weighted least squares with Poisson variances (weights 1/ŷ,
//! reweighted three times) and their covariance is (AᵀWA)⁻¹, scaled up by the weighted
//! residual per degree of freedom when the counts scatter more than Poisson. σ itself is
//! the value that minimises the weighted residual over all maps: a grid from 0.25 to 4
//! pixels, then a golden-section search between the best point's neighbours.
//!
//! Pixels farther from every boundary than the kernel reaches see one phase only; they
//! enter the normal equations through their per-phase sums, so the cost grows with the
//! boundary length, not the field. Every sum is taken in fixed blocks combined in order:
//! the same answer whatever the thread count.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;
use statrs::function::erf::erf;

/// Beam spreads tried, pixels (a Gaussian σ; 4 px = the widest that 8 px of clearance
/// could have hidden).
pub const SIGMA_GRID_PX: [f64; 9] = [0.25, 0.35, 0.5, 0.7, 1.0, 1.4, 2.0, 2.8, 4.0];

/// A phase's unmixed rates are used only if their variance inflation (the variance of the
/// joint solve over that of a solve for the phase alone) stays under this: above it the
/// phase's signal cannot be told from its neighbours' (the usual collinearity rule of
/// thumb, common practice, no source).
pub const MAX_VARIANCE_INFLATION: f64 = 10.0;

/// Smallest expected count used for a Poisson weight, so that an element absent from a
/// phase does not get an unbounded weight (common practice, no source).
const MIN_EXPECTED: f64 = 0.5;

/// Rows per block of the parallel sums.
const BLOCK_ROWS: usize = 64;

/// The pure count rates of every phase, unmixed.
#[derive(Debug, Clone, PartialEq)]
pub struct Unmixing {
    /// The fitted beam spread, pixels (Gaussian σ).
    pub sigma_px: f64,
    /// Whether σ is at an end of [`SIGMA_GRID_PX`] (only a bound).
    pub at_grid_edge: bool,
    /// `[phase][element]` pure count rate, counts per pixel.
    pub rates: Vec<Vec<f64>>,
    /// `[phase][element]` variance of `rates`.
    pub var: Vec<Vec<f64>>,
    /// Per phase: the largest variance inflation over the elements.
    pub inflation: Vec<f64>,
    /// Weighted residual per degree of freedom over all maps (1 when the model and Poisson
    /// counting explain the counts).
    pub dispersion: f64,
}

/// Pixel-integrated Gaussian of width `sigma` pixels, truncated at 3σ (at least one pixel
/// each side), normalised to 1.
pub fn kernel(sigma: f64) -> Vec<f64> {
    let r = (3.0 * sigma).ceil().max(1.0) as i64;
    let s = sigma * std::f64::consts::SQRT_2;
    let mut k: Vec<f64> = (-r..=r)
        .map(|t| 0.5 * (erf((t as f64 + 0.5) / s) - erf((t as f64 - 0.5) / s)))
        .collect();
    let total: f64 = k.iter().sum();
    k.iter_mut().for_each(|v| *v /= total);
    k
}

/// The label image as components: phases 1..=k are 0..k, unassigned pixels (label 0), when
/// there are any, the extra component k.
struct Components<'a> {
    labels: &'a [u16],
    width: usize,
    height: usize,
    k: usize,
    count: usize,
}

impl Components<'_> {
    fn of(&self, i: usize) -> usize {
        match self.labels[i] {
            0 => self.k,
            l => usize::from(l) - 1,
        }
    }
}

/// The blurred indicators at every pixel within the kernel's reach of a boundary: the
/// pixel indices and, per pixel, one share per component.
fn shares(comp: &Components, kern: &[f64], dist: &[u8]) -> (Vec<usize>, Vec<f32>) {
    let (w, h, c) = (comp.width, comp.height, comp.count);
    let r = kern.len() / 2;
    let near = |i: usize| usize::from(dist[i]) < r;
    let blocks: Vec<(Vec<usize>, Vec<f32>)> = (0..h.div_ceil(BLOCK_ROWS))
        .into_par_iter()
        .map(|b| {
            let rows = b * BLOCK_ROWS..((b + 1) * BLOCK_ROWS).min(h);
            if !rows.clone().any(|y| (0..w).any(|x| near(y * w + x))) {
                return (Vec::new(), Vec::new());
            }
            // Horizontal pass over the block and its halo, one share vector per pixel.
            let top = rows.start.saturating_sub(r);
            let bottom = (rows.end + r).min(h);
            let mut hz = vec![0f32; (bottom - top) * w * c];
            for y in top..bottom {
                for x in 0..w {
                    let out = &mut hz[((y - top) * w + x) * c..][..c];
                    for (t, &g) in kern.iter().enumerate() {
                        let xx = (x + t).saturating_sub(r).min(w - 1);
                        out[comp.of(y * w + xx)] += g as f32;
                    }
                }
            }
            // Vertical pass at the pixels near a boundary (edges replicated).
            let mut idx = Vec::new();
            let mut sh = Vec::new();
            for y in rows {
                for x in 0..w {
                    let i = y * w + x;
                    if !near(i) {
                        continue;
                    }
                    let start = sh.len();
                    sh.resize(start + c, 0f32);
                    for (t, &g) in kern.iter().enumerate() {
                        let yy = (y + t).saturating_sub(r).min(h - 1);
                        let src = &hz[((yy - top) * w + x) * c..][..c];
                        for (o, s) in sh[start..].iter_mut().zip(src) {
                            *o += g as f32 * s;
                        }
                    }
                    idx.push(i);
                }
            }
            (idx, sh)
        })
        .collect();
    let mut idx = Vec::new();
    let mut sh = Vec::new();
    for (i, s) in blocks {
        idx.extend(i);
        sh.extend(s);
    }
    (idx, sh)
}

/// Per component and element, over the pixels out of the kernel's reach: pixels, Σy, Σy².
struct Interior {
    n: Vec<f64>,
    sum: Vec<f64>,
    sum2: Vec<f64>,
}

fn interior(comp: &Components, planes: &[&[f32]], dist: &[u8], r: usize) -> Interior {
    let (c, d) = (comp.count, planes.len());
    let n_px = comp.width * comp.height;
    let blocks: Vec<Interior> = (0..n_px.div_ceil(BLOCK_ROWS * comp.width))
        .into_par_iter()
        .map(|b| {
            let mut s = Interior {
                n: vec![0.0; c],
                sum: vec![0.0; c * d],
                sum2: vec![0.0; c * d],
            };
            let span = b * BLOCK_ROWS * comp.width..((b + 1) * BLOCK_ROWS * comp.width).min(n_px);
            for i in span.filter(|&i| usize::from(dist[i]) >= r) {
                let p = comp.of(i);
                s.n[p] += 1.0;
                for (e, plane) in planes.iter().enumerate() {
                    let y = f64::from(plane[i]);
                    s.sum[p * d + e] += y;
                    s.sum2[p * d + e] += y * y;
                }
            }
            s
        })
        .collect();
    let mut total = Interior {
        n: vec![0.0; c],
        sum: vec![0.0; c * d],
        sum2: vec![0.0; c * d],
    };
    for b in blocks {
        total.n.iter_mut().zip(&b.n).for_each(|(a, x)| *a += x);
        total.sum.iter_mut().zip(&b.sum).for_each(|(a, x)| *a += x);
        total
            .sum2
            .iter_mut()
            .zip(&b.sum2)
            .for_each(|(a, x)| *a += x);
    }
    total
}

/// One element's data at one σ: the shares at the pixels near a boundary (`idx`, `sh`),
/// the sums out of reach, the element's count plane and its index among `d`.
struct ElementData<'a> {
    idx: &'a [usize],
    sh: &'a [f32],
    interior: &'a Interior,
    plane: &'a [f32],
    e: usize,
    d: usize,
}

/// One element's weighted normal equations (AᵀWA, AᵀWy) and weighted residual at the
/// rates `x`, the weights taken from `x` too.
fn normal_equations(data: &ElementData, x: &[f64]) -> (DMatrix<f64>, DVector<f64>, f64) {
    let ElementData {
        idx,
        sh,
        interior,
        plane,
        e,
        d,
    } = *data;
    let c = x.len();
    let chunk = 4096;
    let parts: Vec<(Vec<f64>, Vec<f64>, f64)> = idx
        .par_chunks(chunk)
        .zip(sh.par_chunks(chunk * c))
        .map(|(ii, ss)| {
            let mut m = vec![0.0; c * c];
            let mut b = vec![0.0; c];
            let mut chi2 = 0.0;
            for (&i, a) in ii.iter().zip(ss.chunks_exact(c)) {
                let yhat: f64 = a.iter().zip(x).map(|(&a, x)| f64::from(a) * x).sum();
                let wgt = 1.0 / yhat.max(MIN_EXPECTED);
                let y = f64::from(plane[i]);
                chi2 += wgt * (y - yhat).powi(2);
                for p in 0..c {
                    let ap = wgt * f64::from(a[p]);
                    if ap == 0.0 {
                        continue;
                    }
                    b[p] += ap * y;
                    for q in p..c {
                        m[p * c + q] += ap * f64::from(a[q]);
                    }
                }
            }
            (m, b, chi2)
        })
        .collect();
    let mut m = DMatrix::zeros(c, c);
    let mut b = DVector::zeros(c);
    let mut chi2 = 0.0;
    for (pm, pb, pc) in parts {
        for p in 0..c {
            b[p] += pb[p];
            for q in p..c {
                m[(p, q)] += pm[p * c + q];
            }
        }
        chi2 += pc;
    }
    for p in 0..c {
        for q in 0..p {
            m[(p, q)] = m[(q, p)];
        }
        let (n, s, s2) = (
            interior.n[p],
            interior.sum[p * d + e],
            interior.sum2[p * d + e],
        );
        let wgt = 1.0 / x[p].max(MIN_EXPECTED);
        m[(p, p)] += wgt * n;
        b[p] += wgt * s;
        chi2 += wgt * (s2 - 2.0 * x[p] * s + n * x[p] * x[p]);
    }
    (m, b, chi2)
}

/// One element's solve at one σ: rates, their unscaled covariance diagonal, the variance
/// inflation per component, and the weighted residual.
struct Solved {
    x: Vec<f64>,
    cov: Vec<f64>,
    inflation: Vec<f64>,
    chi2: f64,
}

fn solve_element(data: &ElementData, start: &[f64]) -> Option<Solved> {
    let mut x = start.to_vec();
    let mut last = None;
    for _ in 0..3 {
        let (m, b, _) = normal_equations(data, &x);
        let inv = m.clone().cholesky()?.inverse();
        x = (&inv * &b).iter().copied().collect();
        last = Some((m, inv));
    }
    let (m, inv) = last?;
    let (_, _, chi2) = normal_equations(data, &x);
    let c = x.len();
    Some(Solved {
        cov: (0..c).map(|p| inv[(p, p)]).collect(),
        inflation: (0..c).map(|p| inv[(p, p)] * m[(p, p)]).collect(),
        x,
        chi2,
    })
}

/// Every element solved at one σ, with the total weighted residual.
fn solve_at(
    comp: &Components,
    planes: &[&[f32]],
    dist: &[u8],
    start: &[Vec<f64>],
    sigma: f64,
) -> Option<(Vec<Solved>, f64)> {
    let kern = kernel(sigma);
    let (idx, sh) = shares(comp, &kern, dist);
    let inner = interior(comp, planes, dist, kern.len() / 2);
    let d = planes.len();
    let mut out = Vec::with_capacity(d);
    for (e, plane) in planes.iter().enumerate() {
        let s: Vec<f64> = start.iter().map(|r| r[e]).collect();
        let data = ElementData {
            idx: &idx,
            sh: &sh,
            interior: &inner,
            plane,
            e,
            d,
        };
        out.push(solve_element(&data, &s)?);
    }
    let chi2 = out.iter().map(|s| s.chi2).sum();
    Some((out, chi2))
}

/// Unmixes the phases of a `width × height` label image (labels 1..=k, 0 unassigned) over
/// its count planes. `None` when the image has no boundary, or a phase has no pixel.
pub fn unmix(
    labels: &[u16],
    width: usize,
    height: usize,
    planes: &[&[f32]],
    k: usize,
) -> Option<Unmixing> {
    let dist = crate::phases::boundary_distance(labels, width, height)?;
    let comp = Components {
        labels,
        width,
        height,
        k,
        count: k + usize::from(labels.contains(&0)),
    };
    // Start from each component's mean over all its pixels.
    let all = interior(&comp, planes, &vec![u8::MAX; labels.len()], 0);
    if all.n.contains(&0.0) {
        return None;
    }
    let d = planes.len();
    let start: Vec<Vec<f64>> = (0..comp.count)
        .map(|p| (0..d).map(|e| all.sum[p * d + e] / all.n[p]).collect())
        .collect();
    let residual: Vec<f64> = SIGMA_GRID_PX
        .iter()
        .map(|&s| solve_at(&comp, planes, &dist, &start, s).map_or(f64::INFINITY, |r| r.1))
        .collect();
    let best = (0..residual.len()).min_by(|&a, &b| residual[a].total_cmp(&residual[b]))?;
    let at_grid_edge = best == 0 || best + 1 == SIGMA_GRID_PX.len();
    let sigma = if at_grid_edge {
        SIGMA_GRID_PX[best]
    } else {
        golden_minimum(SIGMA_GRID_PX[best - 1], SIGMA_GRID_PX[best + 1], |s| {
            solve_at(&comp, planes, &dist, &start, s).map_or(f64::INFINITY, |r| r.1)
        })
    };
    let (solved, chi2) = solve_at(&comp, planes, &dist, &start, sigma)?;
    let values = (labels.len() * d) as f64;
    let dispersion = chi2 / (values - (comp.count * d) as f64 - 1.0).max(1.0);
    let scale: Vec<f64> = solved
        .iter()
        .map(|s| (s.chi2 / (labels.len() as f64 - comp.count as f64).max(1.0)).max(1.0))
        .collect();
    Some(Unmixing {
        sigma_px: sigma,
        at_grid_edge,
        rates: (0..k)
            .map(|p| solved.iter().map(|s| s.x[p]).collect())
            .collect(),
        var: (0..k)
            .map(|p| {
                solved
                    .iter()
                    .zip(&scale)
                    .map(|(s, f)| s.cov[p] * f)
                    .collect()
            })
            .collect(),
        inflation: (0..k)
            .map(|p| solved.iter().map(|s| s.inflation[p]).fold(0.0, f64::max))
            .collect(),
        dispersion,
    })
}

/// Steps of the golden-section search: the bracket shrinks to 0.618¹⁶ ≈ 0.0005 of its
/// width in log σ.
const GOLDEN_STEPS: usize = 16;

/// The minimum of `f` between `lo` and `hi` by golden-section search in log σ (Kiefer
/// 1953), for a function with one minimum in the bracket.
fn golden_minimum(lo: f64, hi: f64, f: impl Fn(f64) -> f64) -> f64 {
    let g = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = (lo.ln(), hi.ln());
    let mut c = b - g * (b - a);
    let mut d = a + g * (b - a);
    let (mut fc, mut fd) = (f(c.exp()), f(d.exp()));
    for _ in 0..GOLDEN_STEPS {
        if fc <= fd {
            b = d;
            (d, fd) = (c, fc);
            c = b - g * (b - a);
            fc = f(c.exp());
        } else {
            a = c;
            (c, fc) = (d, fd);
            d = a + g * (b - a);
            fd = f(d.exp());
        }
    }
    (0.5 * (a + b)).exp()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The kernel against the normal distribution's mass per pixel (statrs), truncated
    /// and renormalised.
    #[test]
    fn kernel_is_the_pixel_integrated_gaussian() {
        use statrs::distribution::{ContinuousCDF, Normal};
        let n = Normal::new(0.0, 1.3).unwrap();
        let k = kernel(1.3);
        assert_eq!(k.len(), 2 * 4 + 1);
        let raw: Vec<f64> = (-4..=4)
            .map(|t| n.cdf(t as f64 + 0.5) - n.cdf(t as f64 - 0.5))
            .collect();
        let total: f64 = raw.iter().sum();
        for (a, b) in k.iter().zip(&raw) {
            assert!((a - b / total).abs() < 1e-12);
        }
    }

    /// The blurred indicators against imageproc's separable filter (the same kernel, edges
    /// replicated) applied to each indicator image.
    #[test]
    fn shares_match_the_library_blur() {
        use image::{ImageBuffer, Luma};
        let (w, h) = (37usize, 29usize);
        let labels: Vec<u16> = (0..w * h)
            .map(|i| {
                let (x, y) = (i % w, i / w);
                if (x as i64 - 18).pow(2) + (y as i64 - 14).pow(2) < 30 {
                    2
                } else if x % 11 < 2 {
                    0
                } else {
                    1
                }
            })
            .collect();
        let comp = Components {
            labels: &labels,
            width: w,
            height: h,
            k: 2,
            count: 3,
        };
        let kern = kernel(0.9);
        let dist = crate::phases::boundary_distance(&labels, w, h).unwrap();
        let (idx, sh) = shares(&comp, &kern, &dist);
        assert!(!idx.is_empty());
        let k32: Vec<f32> = kern.iter().map(|&v| v as f32).collect();
        for c in 0..3 {
            let ind: ImageBuffer<Luma<f32>, Vec<f32>> = ImageBuffer::from_raw(
                w as u32,
                h as u32,
                (0..w * h).map(|i| f32::from(comp.of(i) == c)).collect(),
            )
            .unwrap();
            let blurred = imageproc::filter::separable_filter_equal(&ind, &k32).into_raw();
            for (j, &i) in idx.iter().enumerate() {
                assert!((sh[j * 3 + c] - blurred[i]).abs() < 1e-5, "pixel {i}");
            }
            // Out of reach, the library's blur is one-hot too.
            for i in (0..w * h).filter(|i| !idx.contains(i)) {
                let want = f32::from(comp.of(i) == c);
                assert!((blurred[i] - want).abs() < 1e-5, "pixel {i}");
            }
        }
    }

    /// Noise-free counts made by blurring two phases' pure rates with σ = 0.8 px: the fit
    /// finds σ and both pure rates, though the thin phase (2 px stripes) has no pixel
    /// free of its neighbour.
    #[test]
    fn recovers_the_spread_and_pure_rates_of_thin_stripes() {
        let (w, h) = (64usize, 40usize);
        let labels: Vec<u16> = (0..w * h)
            .map(|i| if (i % w) % 9 < 2 { 2 } else { 1 })
            .collect();
        let pure = [[100.0f64, 4.0], [10.0, 80.0]];
        let kern = kernel(0.8);
        let r = kern.len() / 2;
        let planes: Vec<Vec<f32>> = (0..2)
            .map(|e| {
                (0..w * h)
                    .map(|i| {
                        let (x, y) = (i % w, i / w);
                        kern.iter()
                            .enumerate()
                            .map(|(t, g)| {
                                let xx = (x + t).saturating_sub(r).min(w - 1);
                                g * pure[usize::from(labels[y * w + xx]) - 1][e]
                            })
                            .sum::<f64>() as f32
                    })
                    .collect()
            })
            .collect();
        let refs: Vec<&[f32]> = planes.iter().map(|p| p.as_slice()).collect();
        let u = unmix(&labels, w, h, &refs, 2).unwrap();
        assert!((u.sigma_px - 0.8).abs() < 0.08, "{}", u.sigma_px);
        for (p, (got, want)) in u.rates.iter().zip(&pure).enumerate() {
            for (e, (g, w)) in got.iter().zip(want).enumerate() {
                assert!((g - w).abs() / w < 0.02, "phase {p} element {e}: {g}");
            }
        }
        // The naive mean of the thin phase carries its neighbour's counts.
        let naive: f64 = (0..w * h)
            .filter(|&i| labels[i] == 2)
            .map(|i| f64::from(planes[0][i]))
            .sum::<f64>()
            / (0..w * h).filter(|&i| labels[i] == 2).count() as f64;
        assert!(naive > 1.3 * pure[1][0], "{naive}");
    }

    /// The same label image and counts give the same answer on one thread and on two.
    #[test]
    fn independent_of_the_thread_count() {
        let (w, h) = (50usize, 200usize);
        let labels: Vec<u16> = (0..w * h)
            .map(|i| 1 + u16::from((i % w) % 7 < 2) + u16::from((i / w) % 13 == 0))
            .collect();
        let plane: Vec<f32> = (0..w * h)
            .map(|i| (10 * labels[i] as usize + (i * 7919) % 5) as f32)
            .collect();
        let run = |threads| {
            rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap()
                .install(|| unmix(&labels, w, h, &[&plane], 3).unwrap())
        };
        assert_eq!(run(1), run(2));
    }
}
