//! The X-ray yield across a field: a smooth factor on every count of a pixel, as the
//! detector's take-off angle and shadowing make it at low magnification, estimated jointly
//! with the phases' counts and divided out before the final labelling and the
//! compositions.
//!
//! The model is bias-field EM (Wells, Grimson, Kikinis & Jolesz 1996) written for Poisson
//! counts: pixel i of phase k records counts n_ie ~ Poisson(g_i λ_ke), with
//! ln g_i = Σ_j β_j φ_j(x_i, y_i) over the Legendre polynomials of total degree 1 and 2 in
//! the field's coordinates scaled to [−1, 1] (five terms, no constant: the phases keep the
//! field's mean level). The pixel totals n_i = Σ_e n_ie are then Poisson(g_i Λ_k), and the
//! fit alternates the phases' totals Λ_k = Σ n_i / Σ g_i (closed form) with Newton steps
//! on β, on the interior pixels of a first labelling (a pixel whose 3 × 3 neighbourhood
//! holds one phase; boundary pixels mix two). A smooth field of five terms cannot explain a
//! phase away: each phase has its own Λ_k, and only the variation *within* phases informs β.
//!
//! The correction is applied only when it earns its parameters: when BIC (Schwarz 1978)
//! with the log-likelihood gain divided by the totals' dispersion (Pearson χ² per degree of
//! freedom, at least 1: counts vary more than Poisson between pixels of one phase) falls.
//! A field without a gradient keeps a yield of exactly 1.

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

use crate::stack::MapStack;

/// Number of smooth terms.
pub const TERMS: usize = 5;

/// Most interior pixels the fit uses (an even stride through them beyond that).
const FIT_PIXELS: usize = 200_000;

/// Most montage tiles that get a step of their own (beyond that, the smooth field alone,
/// and the result says so).
const MAX_TILES: usize = 1024;

/// The yield is reported as uneven when it strays from 1 by more than this (common
/// practice, no source).
pub const WARN_ABOVE: f64 = 0.05;

/// An estimated X-ray yield across a field.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct YieldField {
    /// Whether the counts were divided by the yield (the field earned its terms).
    pub applied: bool,
    /// Coefficients of ln g on u, v, P₂(u), uv, P₂(v) (u, v the coordinates scaled to
    /// [−1, 1] left to right and top to bottom, across the field or, in a montage with
    /// known tiles, across each tile; P₂(t) = (3t² − 1)/2); all 0 when not applied.
    pub coefficients: [f64; TERMS],
    /// Standard errors of the coefficients (scaled by the dispersion).
    pub standard_errors: [f64; TERMS],
    /// The montage's tile size on the label grid (width, height), when known.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tile_size_px: Option<[f64; 2]>,
    /// The montage's tiles across and down, when known.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tiles: Option<[usize; 2]>,
    /// The yield step of each tile (a factor, tiles across then down, their geometric mean
    /// 1), when the tiles are known and the yield was applied.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub tile_factors: Vec<f64>,
    /// Standard error of the logarithm of each tile factor (tile 0 is the reference).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub tile_factor_log_errors: Vec<f64>,
    /// Lowest yield over the field (1 when not applied).
    pub min: f64,
    /// Highest yield over the field (1 when not applied).
    pub max: f64,
    /// Standard errors of ln g where the yield is lowest and highest (about the relative
    /// standard errors of `min` and `max`; relative to the field's mean level, or to the
    /// first tile's in a montage); 0 when not applied.
    #[serde(default)]
    pub min_max_log_se: [f64; 2],
    /// BIC of the fitted field less BIC of a flat one; negative when applied.
    pub delta_bic: f64,
    /// Dispersion of the pixel totals about the fitted model (Pearson χ² per degree of
    /// freedom).
    pub dispersion: f64,
    /// Interior pixels the fit used.
    pub pixels: usize,
    /// Why there is no estimate, where there is none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub not_estimated: Option<String>,
    /// What the estimate leaves out, where it leaves something out.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
}

/// Where a pixel lies: the field's size and its montage tiles, when known.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Layout {
    width: usize,
    height: usize,
    /// Tile size (width, height) and count (across, down).
    tiles: Option<((f64, f64), (usize, usize))>,
}

impl Layout {
    fn new(width: usize, height: usize, tile_px: Option<(f64, f64)>) -> Layout {
        let tiles = tile_px.map(|(tw, th)| {
            let across = ((width as f64 / tw).ceil() as usize).max(1);
            let down = ((height as f64 / th).ceil() as usize).max(1);
            ((tw, th), (across, down))
        });
        Layout {
            width,
            height,
            tiles,
        }
    }

    fn tile_count(&self) -> usize {
        self.tiles.map_or(1, |(_, (a, d))| a * d)
    }

    /// The pixel's tile and its smooth terms (in the tile's coordinates when the tiles are
    /// known).
    fn locate(&self, x: usize, y: usize) -> (usize, [f64; TERMS]) {
        match self.tiles {
            None => (
                0,
                basis(
                    scaled(x as f64, self.width as f64),
                    scaled(y as f64, self.height as f64),
                ),
            ),
            Some(((tw, th), (across, down))) => {
                let (tx, ty) = (
                    ((x as f64 / tw) as usize).min(across - 1),
                    ((y as f64 / th) as usize).min(down - 1),
                );
                let (x0, y0) = (tx as f64 * tw, ty as f64 * th);
                let (cw, ch) = (
                    tw.min(self.width as f64 - x0),
                    th.min(self.height as f64 - y0),
                );
                (
                    ty * across + tx,
                    basis(scaled(x as f64 - x0, cw), scaled(y as f64 - y0, ch)),
                )
            }
        }
    }
}

impl YieldField {
    /// No estimate, with the reason.
    pub fn not_estimated(reason: &str) -> YieldField {
        YieldField {
            applied: false,
            coefficients: [0.0; TERMS],
            standard_errors: [0.0; TERMS],
            tile_size_px: None,
            tiles: None,
            tile_factors: Vec::new(),
            tile_factor_log_errors: Vec::new(),
            min: 1.0,
            max: 1.0,
            min_max_log_se: [0.0; 2],
            delta_bic: 0.0,
            dispersion: 1.0,
            pixels: 0,
            not_estimated: Some(reason.to_string()),
            note: None,
        }
    }

    fn layout(&self, width: usize, height: usize) -> Layout {
        Layout::new(width, height, self.tile_size_px.map(|[w, h]| (w, h)))
    }

    /// The yield at pixel (x, y) of a `width × height` grid.
    pub fn at(&self, x: usize, y: usize, width: usize, height: usize) -> f64 {
        if !self.applied {
            return 1.0;
        }
        let (tile, phi) = self.layout(width, height).locate(x, y);
        let step = self.tile_factors.get(tile).map_or(0.0, |f| f.ln());
        (phi.iter()
            .zip(&self.coefficients)
            .map(|(p, b)| p * b)
            .sum::<f64>()
            + step)
            .exp()
    }

    /// Whether the yield strays from 1 by more than [`WARN_ABOVE`].
    pub fn uneven(&self) -> bool {
        self.applied && (self.max - 1.0).max(1.0 - self.min) > WARN_ABOVE
    }

    /// Divides every count of every pixel by the yield there.
    pub fn correct(&self, stack: &mut MapStack) {
        if !self.applied {
            return;
        }
        let (w, h) = (stack.width(), stack.height());
        let factor: Vec<f32> = (0..w * h)
            .map(|i| (1.0 / self.at(i % w, i / w, w, h)) as f32)
            .collect();
        stack.scale_pixels(&factor);
    }
}

/// A coordinate from 0 to `n` − 1 scaled to [−1, 1].
fn scaled(x: f64, n: f64) -> f64 {
    if n < 2.0 {
        0.0
    } else {
        2.0 * x / (n - 1.0) - 1.0
    }
}

/// The smooth field's terms at scaled coordinates (u, v).
fn basis(u: f64, v: f64) -> [f64; TERMS] {
    [u, v, 1.5 * u * u - 0.5, u * v, 1.5 * v * v - 0.5]
}

/// A pixel of the fit: its smooth terms, tile, total counts and phase.
struct Sample {
    phi: [f64; TERMS],
    tile: usize,
    total: f64,
    phase: usize,
}

/// The interior pixels of the labelling ([`crate::labels::interior_3x3`]), at most
/// [`FIT_PIXELS`] of them at an even stride.
fn interior_samples(counts: &MapStack, labels: &[u16], k: usize, layout: &Layout) -> Vec<Sample> {
    let (w, h) = (counts.width(), counts.height());
    let inside = |i: usize| {
        usize::from(labels[i]) <= k && crate::labels::interior_3x3(labels, w, i % w, i / w)
    };
    let interior = || {
        (1..h.saturating_sub(1))
            .flat_map(move |y| (1..w.saturating_sub(1)).map(move |x| y * w + x))
            .filter(move |&i| inside(i))
    };
    // Counted first, so that the interior of a large field is never held as a list.
    let stride = interior().count().div_ceil(FIT_PIXELS).max(1);
    interior()
        .step_by(stride)
        .map(|i| {
            let (tile, phi) = layout.locate(i % w, i / w);
            Sample {
                phi,
                tile,
                total: counts.maps().iter().map(|m| f64::from(m.counts[i])).sum(),
                phase: usize::from(labels[i]) - 1,
            }
        })
        .collect()
}

/// The phases' totals given the yield (closed form), and the Poisson log-likelihood of the
/// totals without its constant, Σ n ln(gΛ) − gΛ.
fn totals_and_likelihood(samples: &[Sample], g: &[f64], k: usize) -> (Vec<f64>, f64) {
    let mut num = vec![0.0; k];
    let mut den = vec![0.0; k];
    for (s, &gi) in samples.iter().zip(g) {
        num[s.phase] += s.total;
        den[s.phase] += gi;
    }
    let lambda: Vec<f64> = num
        .iter()
        .zip(&den)
        .map(|(n, d)| if *d > 0.0 { n / d } else { 0.0 })
        .collect();
    let ll = samples
        .iter()
        .zip(g)
        .map(|(s, &gi)| {
            let mu = gi * lambda[s.phase];
            if mu > 0.0 {
                s.total * mu.ln() - mu
            } else {
                0.0
            }
        })
        .sum();
    (lambda, ll)
}

/// ln g of a sample: the smooth terms, then one step per tile after the first (the
/// reference).
fn log_yield(s: &Sample, beta: &DVector<f64>) -> f64 {
    let smooth: f64 = s.phi.iter().zip(beta.iter()).map(|(p, b)| p * b).sum();
    smooth
        + if s.tile > 0 {
            beta[TERMS + s.tile - 1]
        } else {
            0.0
        }
}

/// The gradient and Hessian of the log-likelihood in β. The tile terms are one-hot, so
/// each pixel adds to the smooth block, one smooth–tile column and one diagonal entry.
fn gradient_and_hessian(
    samples: &[Sample],
    g: &[f64],
    lambda: &[f64],
    p: usize,
) -> (DVector<f64>, DMatrix<f64>) {
    let mut grad = DVector::zeros(p);
    let mut h = DMatrix::zeros(p, p);
    for (s, &gi) in samples.iter().zip(g) {
        let mu = gi * lambda[s.phase];
        let r = s.total - mu;
        for a in 0..TERMS {
            grad[a] += s.phi[a] * r;
            for b in 0..TERMS {
                h[(a, b)] += s.phi[a] * s.phi[b] * mu;
            }
        }
        if s.tile > 0 {
            let t = TERMS + s.tile - 1;
            grad[t] += r;
            h[(t, t)] += mu;
            for a in 0..TERMS {
                h[(a, t)] += s.phi[a] * mu;
                h[(t, a)] += s.phi[a] * mu;
            }
        }
    }
    (grad, h)
}

/// Estimates the yield of a field from its counts and a first labelling (`labels`:
/// 0 = none, c + 1 = phase c of `k`). With the montage's tile size known (field metadata
/// `tile_width_px`, `tile_height_px`), each tile gets a step of its own and the smooth
/// terms follow each tile's coordinates.
pub fn estimate(counts: &MapStack, labels: &[u16], k: usize) -> YieldField {
    let (w, h) = (counts.width(), counts.height());
    let mut layout = Layout::new(w, h, counts.tile_px());
    let mut note = None;
    if layout.tile_count() > MAX_TILES {
        note = Some(format!(
            "the montage has {} tiles, more than the {MAX_TILES} that get a yield step of their own: a smooth field across the whole montage was fitted instead",
            layout.tile_count()
        ));
        layout = Layout::new(w, h, None);
    }
    let samples = interior_samples(counts, labels, k, &layout);
    let n = samples.len();
    let p = TERMS + layout.tile_count() - 1;
    if n < 10 * p {
        return YieldField::not_estimated("too few interior pixels to estimate the yield");
    }
    let (_, ll0) = totals_and_likelihood(&samples, &vec![1.0; n], k);
    let mut beta = DVector::zeros(p);
    let mut hessian = DMatrix::identity(p, p);
    for _ in 0..50 {
        let g: Vec<f64> = samples.iter().map(|s| log_yield(s, &beta).exp()).collect();
        let (lambda, _) = totals_and_likelihood(&samples, &g, k);
        let (grad, mut h) = gradient_and_hessian(&samples, &g, &lambda, p);
        // A weak ridge keeps a degenerate grid (one row or column, an empty tile) solvable.
        let ridge = 1e-6 * h.trace().max(1.0) / p as f64;
        for j in 0..p {
            h[(j, j)] += ridge;
        }
        hessian = h.clone();
        let Some(chol) = h.cholesky() else {
            return YieldField::not_estimated("the yield's normal equations are singular");
        };
        let step = chol.solve(&grad);
        beta += &step;
        if step.amax() < 1e-8 {
            break;
        }
    }
    let g: Vec<f64> = samples.iter().map(|s| log_yield(s, &beta).exp()).collect();
    let (lambda, ll) = totals_and_likelihood(&samples, &g, k);
    let phases_used = lambda.iter().filter(|l| **l > 0.0).count();
    let dof = n.saturating_sub(p + phases_used).max(1);
    let chi2: f64 = samples
        .iter()
        .zip(&g)
        .map(|(s, &gi)| {
            let mu = gi * lambda[s.phase];
            if mu > 0.0 {
                (s.total - mu).powi(2) / mu
            } else {
                0.0
            }
        })
        .sum();
    let dispersion = (chi2 / dof as f64).max(1.0);
    let delta_bic = -2.0 * (ll - ll0) / dispersion + p as f64 * (n as f64).ln();
    let covariance = hessian
        .cholesky()
        .map(|c| c.inverse() * dispersion)
        .unwrap_or_else(|| DMatrix::zeros(p, p));
    let se = |j: usize| covariance[(j, j)].max(0.0).sqrt();
    let applied = delta_bic < 0.0;
    let tiles = layout.tiles.map(|(_, (a, d))| [a, d]);
    let mut field = YieldField {
        applied,
        coefficients: std::array::from_fn(|j| if applied { beta[j] } else { 0.0 }),
        standard_errors: std::array::from_fn(se),
        tile_size_px: layout.tiles.map(|((tw, th), _)| [tw, th]),
        tiles,
        tile_factors: Vec::new(),
        tile_factor_log_errors: Vec::new(),
        min: 1.0,
        max: 1.0,
        min_max_log_se: [0.0; 2],
        delta_bic,
        dispersion,
        pixels: n,
        not_estimated: None,
        note,
    };
    if let Some([a, d]) = tiles {
        field.tile_factor_log_errors = (0..a * d)
            .map(|t| if t == 0 { 0.0 } else { se(TERMS + t - 1) })
            .collect();
        if applied {
            // Steps centred so that their geometric mean is 1 (the phases keep the level).
            let steps: Vec<f64> = (0..a * d)
                .map(|t| if t == 0 { 0.0 } else { beta[TERMS + t - 1] })
                .collect();
            let mean = steps.iter().sum::<f64>() / steps.len() as f64;
            field.tile_factors = steps.iter().map(|s| (s - mean).exp()).collect();
        }
    }
    if applied {
        let (lo, hi) = extremes(&field, w, h);
        field.min = lo.0;
        field.max = hi.0;
        // var ln g(x) = φ(x)ᵀ C φ(x), φ the smooth terms and the tile's one-hot term.
        let log_se = |(x, y): (usize, usize)| {
            let (tile, phi) = layout.locate(x, y);
            let mut v = DVector::zeros(p);
            for (j, f) in phi.iter().enumerate() {
                v[j] = *f;
            }
            if tile > 0 {
                v[TERMS + tile - 1] = 1.0;
            }
            (v.transpose() * &covariance * &v)[(0, 0)].max(0.0).sqrt()
        };
        field.min_max_log_se = [log_se(lo.1), log_se(hi.1)];
    }
    field
}

/// Lowest and highest yield over the field: on a grid of up to 65 × 65 points spanning it,
/// or of 9 × 9 points spanning each montage tile, corners included (ln g is a quadratic
/// across each, so this finds the range closely).
/// Returns (value, (x, y)) of the lowest and of the highest.
type Extreme = (f64, (usize, usize));

fn extremes(field: &YieldField, w: usize, h: usize) -> (Extreme, Extreme) {
    let spans: Vec<(usize, usize, usize, usize, usize)> = match field.layout(w, h).tiles {
        None => vec![(0, 0, w, h, 65)],
        Some(((tw, th), (across, down))) => (0..down)
            .flat_map(|ty| {
                (0..across).map(move |tx| {
                    let (x0, y0) = ((tx as f64 * tw) as usize, (ty as f64 * th) as usize);
                    let x1 = (((tx + 1) as f64 * tw) as usize).min(w);
                    let y1 = (((ty + 1) as f64 * th) as usize).min(h);
                    (x0, y0, x1 - x0, y1 - y0, 9)
                })
            })
            .collect(),
    };
    let points = |n: usize, most: usize| -> Vec<usize> {
        let m = n.min(most);
        (0..m)
            .map(|j| if m < 2 { 0 } else { j * (n - 1) / (m - 1) })
            .collect()
    };
    let mut lo = (f64::INFINITY, (0, 0));
    let mut hi = (f64::NEG_INFINITY, (0, 0));
    for (x0, y0, sw, sh, most) in spans {
        for &y in &points(sh, most) {
            for &x in &points(sw, most) {
                let at = (x0 + x, y0 + y);
                let g = field.at(at.0, at.1, w, h);
                if g < lo.0 {
                    lo = (g, at);
                }
                if g > hi.0 {
                    hi = (g, at);
                }
            }
        }
    }
    (lo, hi)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stack::{ElementMap, FieldMetadata};
    use rand::SeedableRng;
    use rand_distr::{Distribution, Poisson};

    /// Two phases in vertical stripes with the yield `ramp(u)`; Poisson counts.
    fn field(ramp: impl Fn(f64) -> f64, seed: u64) -> (MapStack, Vec<u16>) {
        let (w, h) = (120usize, 90usize);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let labels: Vec<u16> = (0..w * h).map(|i| 1 + ((i % w) / 15 % 2) as u16).collect();
        let rates = [[30.0, 5.0], [8.0, 40.0]];
        let maps = ["Fe", "Cr"]
            .iter()
            .enumerate()
            .map(|(e, sym)| ElementMap {
                element: crate::chem::elements::element(sym).unwrap(),
                line: None,
                counts: (0..w * h)
                    .map(|i| {
                        let mu = rates[usize::from(labels[i]) - 1][e]
                            * ramp(scaled((i % w) as f64, w as f64));
                        Poisson::new(mu).unwrap().sample(&mut rng) as f32
                    })
                    .collect(),
                source: sym.to_string(),
            })
            .collect();
        let stack = MapStack::new(
            std::path::Path::new("test"),
            w,
            h,
            maps,
            FieldMetadata::default(),
        )
        .unwrap();
        (stack, labels)
    }

    #[test]
    fn a_linear_ramp_is_found_and_divided_out() {
        let (mut stack, labels) = field(|u| 1.0 + 0.2 * u, 3);
        let y = estimate(&stack, &labels, 2);
        assert!(y.applied, "{y:?}");
        assert!(
            (y.min - 0.8).abs() < 0.02 && (y.max - 1.2).abs() < 0.02,
            "{y:?}"
        );
        // ln(1 + 0.2u) ≈ 0.2u − 0.02u², so the u term carries it: within 3 standard errors.
        assert!((y.coefficients[0] - 0.2027).abs() < 3.0 * y.standard_errors[0] + 0.01);
        y.correct(&mut stack);
        let fe = &stack.maps()[0].counts;
        let w = stack.width();
        let side = |x0: usize| -> f64 {
            let v: Vec<f64> = (0..stack.height())
                .flat_map(|r| (x0..x0 + 15).map(move |x| r * w + x))
                .map(|i| f64::from(fe[i]))
                .collect();
            v.iter().sum::<f64>() / v.len() as f64
        };
        // The first and the last Fe-rich stripe: 0.8 and 1.15 of the yield before.
        let (left, right) = (side(0), side(90));
        assert!((left / right - 1.0).abs() < 0.03, "{left} vs {right}");
    }

    #[test]
    fn a_flat_field_keeps_a_yield_of_one() {
        for seed in 0..5 {
            let (stack, labels) = field(|_| 1.0, seed);
            let y = estimate(&stack, &labels, 2);
            assert!(!y.applied, "seed {seed}: {y:?}");
            assert_eq!((y.min, y.max), (1.0, 1.0));
            assert!(y.dispersion < 1.2, "{y:?}");
        }
    }
}
