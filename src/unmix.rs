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
//! the value that minimises the weighted residual summed over the maps: a grid from 0.25
//! to 4 pixels, then a golden-section search between the best point's neighbours, on a
//! fixed sample of the boundary pixels.
//!
//! Only the boundary pixels within reach of the phases to unmix are modelled; pixels
//! farther from every boundary than the kernel reaches see one phase only and enter the
//! normal equations through their per-phase sums, so the cost grows with the length of
//! those phases' boundaries, not with the field. Every sum is taken in fixed blocks
//! combined in order: the same answer whatever the thread count.

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

/// What computes the unmixing on demand, given per phase whether to unmix it (the caller
/// holds the counts: in memory, or read again from a streamed field).
pub type UnmixSource<'a> = &'a dyn Fn(&[bool]) -> Option<Unmixing>;

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

/// Whether pixel `i` is in a sample of one pixel in `stride`: a fixed hash of the index,
/// so the same pixels whatever the thread count.
fn sampled(i: usize, stride: u64) -> bool {
    stride <= 1 || ((i as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15) >> 40).is_multiple_of(stride)
}

/// The blurred indicators at the pixels within the kernel's reach of a boundary (one in
/// `stride` of them, within `focus` when given): the pixel indices and, per pixel, one
/// share per component.
fn shares(
    comp: &Components,
    kern: &[f64],
    dist: &[u8],
    stride: u64,
    focus: Option<&[bool]>,
) -> (Vec<usize>, Vec<f32>) {
    let (w, h, c) = (comp.width, comp.height, comp.count);
    let r = kern.len() / 2;
    let near =
        |i: usize| usize::from(dist[i]) < r && sampled(i, stride) && focus.is_none_or(|f| f[i]);
    if stride > 1 {
        return sparse_shares(comp, kern, near);
    }
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
    concat(blocks)
}

/// The blocks' pixel indices and shares, in block order.
fn concat(blocks: Vec<(Vec<usize>, Vec<f32>)>) -> (Vec<usize>, Vec<f32>) {
    let mut idx = Vec::new();
    let mut sh = Vec::new();
    for (i, s) in blocks {
        idx.extend(i);
        sh.extend(s);
    }
    (idx, sh)
}

/// [`shares`] at a sparse sample of pixels: each pixel's shares summed over its window
/// directly, cheaper than a separable pass over every row when few pixels are wanted.
fn sparse_shares(
    comp: &Components,
    kern: &[f64],
    keep: impl Fn(usize) -> bool + Sync,
) -> (Vec<usize>, Vec<f32>) {
    let (w, h, c) = (comp.width, comp.height, comp.count);
    let r = kern.len() / 2;
    let blocks: Vec<(Vec<usize>, Vec<f32>)> = (0..h.div_ceil(BLOCK_ROWS))
        .into_par_iter()
        .map(|b| {
            let (mut idx, mut sh) = (Vec::new(), Vec::new());
            for y in b * BLOCK_ROWS..((b + 1) * BLOCK_ROWS).min(h) {
                for x in (0..w).filter(|&x| keep(y * w + x)) {
                    let mut out = vec![0f32; c];
                    for (ty, &gy) in kern.iter().enumerate() {
                        let yy = (y + ty).saturating_sub(r).min(h - 1);
                        for (tx, &gx) in kern.iter().enumerate() {
                            let xx = (x + tx).saturating_sub(r).min(w - 1);
                            out[comp.of(yy * w + xx)] += (gy * gx) as f32;
                        }
                    }
                    idx.push(y * w + x);
                    sh.extend(out);
                }
            }
            (idx, sh)
        })
        .collect();
    concat(blocks)
}

/// Per component and element, over the pixels out of the kernel's reach: pixels, Σy, Σy².
#[derive(Clone)]
struct Interior {
    n: Vec<f64>,
    sum: Vec<f64>,
    sum2: Vec<f64>,
}

impl Interior {
    fn zero(c: usize, d: usize) -> Interior {
        Interior {
            n: vec![0.0; c],
            sum: vec![0.0; c * d],
            sum2: vec![0.0; c * d],
        }
    }

    fn add(&mut self, o: &Interior) {
        self.n.iter_mut().zip(&o.n).for_each(|(a, x)| *a += x);
        self.sum.iter_mut().zip(&o.sum).for_each(|(a, x)| *a += x);
        self.sum2.iter_mut().zip(&o.sum2).for_each(|(a, x)| *a += x);
    }
}

/// [`Interior`] sums by distance to the nearest boundary, from one pass: bucket t holds the
/// pixels at distance t (the last bucket, at [`REACH`] or more), so the pixels out of
/// reach of a kernel of radius r are the buckets from r on.
struct ByDistance {
    buckets: Vec<Interior>,
}

/// The largest kernel radius, pixels (3σ for the widest σ tried).
const REACH: usize = 12;

impl ByDistance {
    fn new(comp: &Components, planes: &[&[f32]], dist: &[u8]) -> ByDistance {
        let (c, d) = (comp.count, planes.len());
        let n_px = comp.width * comp.height;
        let block = BLOCK_ROWS * comp.width;
        let blocks: Vec<Vec<Interior>> = (0..n_px.div_ceil(block))
            .into_par_iter()
            .map(|b| {
                let mut s = vec![Interior::zero(c, d); REACH + 1];
                for i in b * block..((b + 1) * block).min(n_px) {
                    let (t, p) = (usize::from(dist[i]).min(REACH), comp.of(i));
                    s[t].n[p] += 1.0;
                    for (e, plane) in planes.iter().enumerate() {
                        let y = f64::from(plane[i]);
                        s[t].sum[p * d + e] += y;
                        s[t].sum2[p * d + e] += y * y;
                    }
                }
                s
            })
            .collect();
        let mut buckets = vec![Interior::zero(c, d); REACH + 1];
        for b in blocks {
            buckets.iter_mut().zip(&b).for_each(|(a, x)| a.add(x));
        }
        ByDistance { buckets }
    }

    /// The pixels at distance `r` or more.
    fn from(&self, r: usize) -> Interior {
        let mut total = self.buckets[REACH].clone();
        for t in (r.min(REACH)..REACH).rev() {
            total.add(&self.buckets[t]);
        }
        total
    }
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
    /// Pixels each sampled pixel near a boundary stands for.
    zone_weight: f64,
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
        zone_weight,
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
                let wgt = zone_weight / yhat.max(MIN_EXPECTED);
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

/// What every solve reads: the components, the counts, the distances to the nearest
/// boundary and the sums out of reach by distance.
struct Field<'a> {
    comp: Components<'a>,
    planes: &'a [&'a [f32]],
    dist: Vec<u8>,
    by_distance: ByDistance,
    /// The pixels within [`REACH`] of a phase to unmix: the only ones near a boundary
    /// that are modelled (elsewhere a phase's interior speaks for it).
    focus: Vec<bool>,
}

/// Pixels near a boundary the search for σ uses at most (a sample of them, each standing
/// for the ones left out); the final solve uses them all (common practice, no source: σ
/// is one number, and 50 000 pixels fix it to a few per cent).
const SIGMA_FIT_PIXELS: usize = 50_000;

/// Every element solved at one σ over one in `stride` of the pixels near a boundary,
/// with the total weighted residual and the pixels it covers.
fn solve_at(
    field: &Field,
    start: &[Vec<f64>],
    sigma: f64,
    stride: u64,
) -> Option<(Vec<Solved>, f64, f64)> {
    let Field {
        comp,
        planes,
        dist,
        by_distance,
        focus,
    } = field;
    let kern = kernel(sigma);
    let (idx, sh) = shares(comp, &kern, dist, stride, Some(focus));
    let inner = by_distance.from(kern.len() / 2);
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
            zone_weight: stride as f64,
        };
        out.push(solve_element(&data, &s)?);
    }
    let chi2 = out.iter().map(|s| s.chi2).sum();
    let used = idx.len() as f64 * stride as f64 + inner.n.iter().sum::<f64>();
    Some((out, chi2, used))
}

/// Unmixes the phases of a `width × height` label image (labels 1..=k, 0 unassigned) over
/// its count planes, modelling the pixels near a boundary within [`REACH`] of the phases
/// marked in `wanted` (per phase). `None` when the image has no boundary, or a phase has
/// no pixel.
pub fn unmix(
    labels: &[u16],
    width: usize,
    height: usize,
    planes: &[&[f32]],
    wanted: &[bool],
) -> Option<Unmixing> {
    let k = wanted.len();
    let t = crate::profile::stage("    unmix: setup");
    let dist = crate::labels::boundary_distance(labels, width, height)?;
    let comp = Components {
        labels,
        width,
        height,
        k,
        count: k + usize::from(labels.contains(&0)),
    };
    let focus = near_phases(labels, width, height, wanted);
    let by_distance = ByDistance::new(&comp, planes, &dist);
    // Start from each component's mean over all its pixels.
    let all = by_distance.from(0);
    if all.n.contains(&0.0) {
        return None;
    }
    let d = planes.len();
    let start: Vec<Vec<f64>> = (0..comp.count)
        .map(|p| (0..d).map(|e| all.sum[p * d + e] / all.n[p]).collect())
        .collect();
    let zone = dist
        .iter()
        .zip(&focus)
        .filter(|&(&t, &f)| usize::from(t) < REACH && f)
        .count();
    let stride = zone.div_ceil(SIGMA_FIT_PIXELS).max(1) as u64;
    drop(t);
    let field = Field {
        comp,
        planes,
        dist,
        by_distance,
        focus,
    };
    let residual_at = |s: f64| solve_at(&field, &start, s, stride).map_or(f64::INFINITY, |r| r.1);
    let t = crate::profile::stage("    unmix: σ grid");
    let residual: Vec<f64> = SIGMA_GRID_PX.iter().map(|&s| residual_at(s)).collect();
    drop(t);
    let t = crate::profile::stage("    unmix: golden");
    let best = (0..residual.len()).min_by(|&a, &b| residual[a].total_cmp(&residual[b]))?;
    let at_grid_edge = best == 0 || best + 1 == SIGMA_GRID_PX.len();
    let sigma = if at_grid_edge {
        SIGMA_GRID_PX[best]
    } else {
        golden_minimum(
            SIGMA_GRID_PX[best - 1],
            SIGMA_GRID_PX[best + 1],
            residual_at,
        )
    };
    drop(t);
    let _t = crate::profile::stage("    unmix: final");
    let (solved, chi2, used) = solve_at(&field, &start, sigma, 1)?;
    let comp = &field.comp;
    // Degrees of freedom over the pixels the residual covers.
    let dof = (used - comp.count as f64).max(1.0);
    let dispersion = chi2 / (dof * d as f64);
    let scale: Vec<f64> = solved.iter().map(|s| (s.chi2 / dof).max(1.0)).collect();
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

/// The pixels within [`REACH`] (chessboard distance) of a pixel of a phase marked in
/// `wanted`.
fn near_phases(labels: &[u16], width: usize, height: usize, wanted: &[bool]) -> Vec<bool> {
    use image::{ImageBuffer, Luma};
    use imageproc::distance_transform::{distance_transform, Norm};
    let of = |l: u16| l > 0 && wanted[usize::from(l) - 1];
    let img: ImageBuffer<Luma<u8>, Vec<u8>> = ImageBuffer::from_raw(
        width as u32,
        height as u32,
        labels
            .iter()
            .map(|&l| if of(l) { 255 } else { 0 })
            .collect(),
    )
    .expect("size matches");
    if !labels.iter().any(|&l| of(l)) {
        return vec![false; labels.len()];
    }
    distance_transform(&img, Norm::LInf)
        .into_raw()
        .into_iter()
        .map(|d| usize::from(d) <= REACH)
        .collect()
}

/// Steps of the golden-section search: the bracket shrinks to 0.618¹² ≈ 0.003 of its
/// width in log σ.
const GOLDEN_STEPS: usize = 12;

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

    /// Components of a label image (unassigned pixels a component when present), the
    /// kernel for `sigma` and the distances to the boundaries.
    fn setup(
        labels: &[u16],
        (w, h): (usize, usize),
        k: usize,
        sigma: f64,
    ) -> (Components<'_>, Vec<f64>, Vec<u8>) {
        let comp = Components {
            labels,
            width: w,
            height: h,
            k,
            count: k + usize::from(labels.contains(&0)),
        };
        let dist = crate::labels::boundary_distance(labels, w, h).unwrap();
        (comp, kernel(sigma), dist)
    }

    /// The sampled shares, summed over each window directly, equal the separable ones.
    #[test]
    fn sparse_shares_equal_the_separable_ones() {
        let (w, h) = (40usize, 30usize);
        let labels: Vec<u16> = (0..w * h)
            .map(|i| 1 + u16::from((i % w + i / w) % 7 < 2))
            .collect();
        let (comp, kern, dist) = setup(&labels, (w, h), 2, 1.2);
        let (all_idx, all_sh) = shares(&comp, &kern, &dist, 1, None);
        let (idx, sh) = shares(&comp, &kern, &dist, 3, None);
        assert!(!idx.is_empty() && idx.len() < all_idx.len());
        for (j, i) in idx.iter().enumerate() {
            let k = all_idx.iter().position(|a| a == i).unwrap();
            for c in 0..2 {
                assert!((sh[j * 2 + c] - all_sh[k * 2 + c]).abs() < 1e-5);
            }
        }
    }

    /// The widest kernel reaches exactly [`REACH`] pixels: the sums by distance cover it.
    #[test]
    fn the_widest_kernel_reaches_reach() {
        let widest = SIGMA_GRID_PX[SIGMA_GRID_PX.len() - 1];
        assert_eq!(kernel(widest).len() / 2, REACH);
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
        let (comp, kern, dist) = setup(&labels, (w, h), 2, 0.9);
        let (idx, sh) = shares(&comp, &kern, &dist, 1, None);
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
        let u = unmix(&labels, w, h, &refs, &[false, true]).unwrap();
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
                .install(|| unmix(&labels, w, h, &[&plane], &[false, true, false]).unwrap())
        };
        assert_eq!(run(1), run(2));
    }
}
