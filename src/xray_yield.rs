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

use nalgebra::{SMatrix, SVector};
use serde::{Deserialize, Serialize};

use crate::stack::MapStack;

/// Number of terms of the smooth field.
pub const TERMS: usize = 5;

/// Most interior pixels the fit uses (an even stride through them beyond that).
const FIT_PIXELS: usize = 200_000;

/// The yield is reported as uneven when it strays from 1 by more than this (common
/// practice, no source).
pub const WARN_ABOVE: f64 = 0.05;

/// An estimated X-ray yield across a field.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct YieldField {
    /// Whether the counts were divided by the yield (the smooth field earned its terms).
    pub applied: bool,
    /// Coefficients of ln g on u, v, P₂(u), uv, P₂(v) (u, v the coordinates scaled to
    /// [−1, 1] left to right and top to bottom; P₂(t) = (3t² − 1)/2); all 0 when not applied.
    pub coefficients: [f64; TERMS],
    /// Standard errors of the coefficients (scaled by the dispersion).
    pub standard_errors: [f64; TERMS],
    /// Lowest yield over the field (1 when not applied).
    pub min: f64,
    /// Highest yield over the field (1 when not applied).
    pub max: f64,
    /// BIC of the smooth field less BIC of a flat one; negative when applied.
    pub delta_bic: f64,
    /// Dispersion of the pixel totals about the fitted model (Pearson χ² per degree of
    /// freedom).
    pub dispersion: f64,
    /// Interior pixels the fit used.
    pub pixels: usize,
    /// Why there is no estimate, where there is none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub not_estimated: Option<String>,
}

impl YieldField {
    /// No estimate, with the reason.
    pub fn not_estimated(reason: &str) -> YieldField {
        YieldField {
            applied: false,
            coefficients: [0.0; TERMS],
            standard_errors: [0.0; TERMS],
            min: 1.0,
            max: 1.0,
            delta_bic: 0.0,
            dispersion: 1.0,
            pixels: 0,
            not_estimated: Some(reason.to_string()),
        }
    }

    /// The yield at pixel (x, y) of a `width × height` grid.
    pub fn at(&self, x: usize, y: usize, width: usize, height: usize) -> f64 {
        if !self.applied {
            return 1.0;
        }
        let phi = basis(scaled(x, width), scaled(y, height));
        phi.iter()
            .zip(&self.coefficients)
            .map(|(p, b)| p * b)
            .sum::<f64>()
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

/// A coordinate scaled to [−1, 1].
fn scaled(x: usize, n: usize) -> f64 {
    if n < 2 {
        0.0
    } else {
        2.0 * x as f64 / (n - 1) as f64 - 1.0
    }
}

/// The smooth field's terms at scaled coordinates (u, v).
fn basis(u: f64, v: f64) -> [f64; TERMS] {
    [u, v, 1.5 * u * u - 0.5, u * v, 1.5 * v * v - 0.5]
}

/// A pixel of the fit: its terms, total counts and phase.
struct Sample {
    phi: [f64; TERMS],
    total: f64,
    phase: usize,
}

/// The interior pixels of the labelling (3 × 3 neighbourhood of one phase), at most
/// [`FIT_PIXELS`] of them at an even stride.
fn interior_samples(counts: &MapStack, labels: &[u16], k: usize) -> Vec<Sample> {
    let (w, h) = (counts.width(), counts.height());
    let inside = |i: usize| {
        let l = labels[i];
        l > 0
            && usize::from(l) <= k
            && [
                i - w - 1,
                i - w,
                i - w + 1,
                i - 1,
                i + 1,
                i + w - 1,
                i + w,
                i + w + 1,
            ]
            .iter()
            .all(|&j| labels[j] == l)
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
        .map(|i| Sample {
            phi: basis(scaled(i % w, w), scaled(i / w, h)),
            total: counts.maps().iter().map(|m| f64::from(m.counts[i])).sum(),
            phase: usize::from(labels[i]) - 1,
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

fn yields(samples: &[Sample], beta: &SVector<f64, TERMS>) -> Vec<f64> {
    samples
        .iter()
        .map(|s| SVector::<f64, TERMS>::from(s.phi).dot(beta).exp())
        .collect()
}

/// Estimates the yield of a field from its counts and a first labelling (`labels`:
/// 0 = none, c + 1 = phase c of `k`).
pub fn estimate(counts: &MapStack, labels: &[u16], k: usize) -> YieldField {
    let samples = interior_samples(counts, labels, k);
    let n = samples.len();
    if n < 10 * TERMS {
        return YieldField::not_estimated("too few interior pixels to estimate the yield");
    }
    let (_, ll0) = totals_and_likelihood(&samples, &vec![1.0; n], k);
    let mut beta = SVector::<f64, TERMS>::zeros();
    let mut hessian = SMatrix::<f64, TERMS, TERMS>::identity();
    for _ in 0..50 {
        let g = yields(&samples, &beta);
        let (lambda, _) = totals_and_likelihood(&samples, &g, k);
        let mut grad = SVector::<f64, TERMS>::zeros();
        let mut h = SMatrix::<f64, TERMS, TERMS>::zeros();
        for (s, &gi) in samples.iter().zip(&g) {
            let mu = gi * lambda[s.phase];
            let phi = SVector::<f64, TERMS>::from(s.phi);
            grad += phi * (s.total - mu);
            h += phi * phi.transpose() * mu;
        }
        // A weak ridge keeps a degenerate grid (one row or column) solvable.
        h += SMatrix::<f64, TERMS, TERMS>::identity() * 1e-6 * h.trace().max(1.0);
        hessian = h;
        let Some(chol) = h.cholesky() else {
            return YieldField::not_estimated("the yield's normal equations are singular");
        };
        let step = chol.solve(&grad);
        beta += step;
        if step.amax() < 1e-8 {
            break;
        }
    }
    let g = yields(&samples, &beta);
    let (lambda, ll) = totals_and_likelihood(&samples, &g, k);
    let phases_used = lambda.iter().filter(|l| **l > 0.0).count();
    let dof = n.saturating_sub(TERMS + phases_used).max(1);
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
    let delta_bic = -2.0 * (ll - ll0) / dispersion + TERMS as f64 * (n as f64).ln();
    let covariance = hessian
        .cholesky()
        .map(|c| c.inverse() * dispersion)
        .unwrap_or_else(SMatrix::zeros);
    let applied = delta_bic < 0.0;
    let mut field = YieldField {
        applied,
        coefficients: if applied { beta.into() } else { [0.0; TERMS] },
        standard_errors: std::array::from_fn(|j| covariance[(j, j)].max(0.0).sqrt()),
        min: 1.0,
        max: 1.0,
        delta_bic,
        dispersion,
        pixels: n,
        not_estimated: None,
    };
    if applied {
        let (w, h) = (counts.width(), counts.height());
        let (lo, hi) = extremes(&field, w, h);
        field.min = lo;
        field.max = hi;
    }
    field
}

/// Lowest and highest yield over a grid of at most 65 × 65 points spanning the field,
/// corners included (the field is a quadratic in ln g, so this finds its range closely).
fn extremes(field: &YieldField, w: usize, h: usize) -> (f64, f64) {
    let steps = |n: usize| -> Vec<usize> {
        let m = n.min(65);
        (0..m)
            .map(|j| if m < 2 { 0 } else { j * (n - 1) / (m - 1) })
            .collect()
    };
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for &y in &steps(h) {
        for &x in &steps(w) {
            let g = field.at(x, y, w, h);
            lo = lo.min(g);
            hi = hi.max(g);
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
                        let mu = rates[usize::from(labels[i]) - 1][e] * ramp(scaled(i % w, w));
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
