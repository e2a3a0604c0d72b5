//! Simplifying an automatically chosen model: what BIC over-counts.
//!
//! BIC picks the number of components that best describes the *pixels*, and real maps hold
//! more than pure phases: pixels on boundaries mix two phases (the X-ray generation volume
//! is wider than a pixel), and a phase's counts drift a little across the field. Both earn
//! extra components. Two rules take them out, each judged on the expected counts per pixel
//! with the Poisson model, whatever the clustering method:
//!
//! 1. **Indistinguishable phases merge.** The symmetrised Kullback–Leibler divergence
//!    J(a, b) = KL(a‖b) + KL(b‖a) is the expected log-likelihood ratio by which a single
//!    pixel tells a from b. Below [`MERGE_BELOW`] nats no pixel can be assigned to one of
//!    them with confidence, so they are one phase as far as the maps can tell.
//! 2. **Boundary mixtures dissolve** (decided with the spatial labels, in the pipeline): a
//!    component whose expected counts are a mixture of the others (within
//!    [`MIXTURE_WITHIN`] of deviance) *and* that has almost no interior pixels is a band of
//!    mixed pixels, not a phase. Intermetallics also lie between their elements, which is
//!    why the spatial test is needed as well.

use crate::cluster::poisson::{self, MIN_RATE};
use crate::cluster::Clusters;
use crate::prepare::Stabilise;

/// Merge two phases when a pixel tells them apart by less than this many nats on average
/// (common practice, no source: half a nat each way).
pub const MERGE_BELOW: f64 = 1.0;

/// A phase is "on the mixing line" of two others when its expected counts are within this
/// Poisson deviance of the nearest mixture (same scale as `MERGE_BELOW`).
pub const MIXTURE_WITHIN: f64 = 1.0;

/// Symmetrised Kullback–Leibler divergence between two independent-Poisson phases, nats:
/// Σ (λa − λb) ln(λa / λb).
pub fn j_divergence(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(&x, &y)| {
            let (x, y) = (x.max(MIN_RATE), y.max(MIN_RATE));
            (x - y) * (x / y).ln()
        })
        .sum()
}

/// The nearest mixture of the other endpoints to endpoint `c`: mixing weights π ≥ 0,
/// Σ π = 1, fitted by maximum likelihood (Poisson; EM updates for mixing proportions).
/// Returns (deviance of `c` from the mixture, the weights, one per endpoint, 0 for `c`).
///
/// Pixels on a boundary mix two phases; pixels on the rim of a small particle that touches
/// several grains mix three or more, so the test is against every convex mixture.
pub fn nearest_mixture(c: usize, ends: &[Vec<f64>]) -> Option<(f64, Vec<f64>)> {
    let others: Vec<usize> = (0..ends.len()).filter(|&j| j != c).collect();
    if others.len() < 2 {
        return None;
    }
    let x = &ends[c];
    let d = x.len();
    let mix = |pi: &[f64]| -> Vec<f64> {
        (0..d)
            .map(|e| {
                others
                    .iter()
                    .zip(pi)
                    .map(|(&j, &p)| p * ends[j][e])
                    .sum::<f64>()
                    .max(MIN_RATE)
            })
            .collect()
    };
    let ll = |pi: &[f64]| -> f64 { mix(pi).iter().zip(x).map(|(&m, &xe)| xe * m.ln() - m).sum() };
    // Frank–Wolfe on the simplex (the log-likelihood is concave in π): move towards the
    // vertex with the steepest gradient, with a ternary line search.
    let mut pi = vec![1.0 / others.len() as f64; others.len()];
    for _ in 0..300 {
        let m = mix(&pi);
        let grad: Vec<f64> = others
            .iter()
            .map(|&j| (0..d).map(|e| x[e] * ends[j][e] / m[e] - ends[j][e]).sum())
            .collect();
        let v = (0..grad.len()).fold(0, |b, j| if grad[j] > grad[b] { j } else { b });
        let toward = |g: f64| -> Vec<f64> {
            pi.iter()
                .enumerate()
                .map(|(j, &p)| (1.0 - g) * p + if j == v { g } else { 0.0 })
                .collect()
        };
        let (mut lo, mut hi) = (0.0f64, 1.0f64);
        for _ in 0..40 {
            let (a, b) = (lo + (hi - lo) / 3.0, hi - (hi - lo) / 3.0);
            if ll(&toward(a)) < ll(&toward(b)) {
                lo = a;
            } else {
                hi = b;
            }
        }
        let g = 0.5 * (lo + hi);
        if g < 1e-9 {
            break;
        }
        pi = toward(g);
    }
    let xf: Vec<f32> = x.iter().map(|&v| v as f32).collect();
    let dev = poisson::deviance(&xf, &mix(&pi));
    let mut weights = vec![0.0; ends.len()];
    for (&j, &p) in others.iter().zip(&pi) {
        weights[j] = p;
    }
    Some((dev, weights))
}

/// Describes a mixture's two largest parts, e.g. `62 % [14.5, 17.2] + 38 % pores`.
pub fn describe_mixture(weights: &[f64], ends: &[Vec<f64>], pores: usize) -> String {
    let mut order: Vec<usize> = (0..weights.len()).filter(|&j| weights[j] > 0.0).collect();
    order.sort_by(|&a, &b| weights[b].total_cmp(&weights[a]));
    order
        .iter()
        .take(3)
        .filter(|&&j| weights[j] >= 0.05)
        .map(|&j| {
            format!(
                "{:.0} % {}",
                100.0 * weights[j],
                if j == pores {
                    "pores".to_string()
                } else {
                    fmt_counts(&ends[j])
                }
            )
        })
        .collect::<Vec<_>>()
        .join(" + ")
}

/// A record of one simplification, for the report.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Simplification {
    /// What was done, in words.
    pub action: String,
    /// The divergence or deviance that decided it.
    pub value: f64,
}

/// The two components whose expected counts are closest (smallest J-divergence), with
/// the divergence. Needs k ≥ 2.
pub fn closest_pair(c: &Clusters, st: Stabilise) -> (usize, usize, f64) {
    let k = c.k();
    let ends: Vec<Vec<f64>> = (0..k).map(|i| c.expected_counts(i, st)).collect();
    let mut best: Option<(f64, usize, usize)> = None;
    for a in 0..k {
        for b in a + 1..k {
            let j = j_divergence(&ends[a], &ends[b]);
            if best.is_none_or(|bb| j < bb.0) {
                best = Some((j, a, b));
            }
        }
    }
    let (j, a, b) = best.expect("k ≥ 2");
    (a, b, j)
}

/// Two components whose totals differ by at most this factor may be one phase seen with a
/// different X-ray yield (common practice, no source: ±20 % across a field at low
/// magnification is a ratio of 1.5).
pub const MAX_YIELD_RATIO: f64 = 1.5;

/// The pair of components closest in chemistry once their overall intensities are made
/// equal (each scaled to the geometric mean of the two totals), among pairs whose totals
/// differ by at most [`MAX_YIELD_RATIO`]: (a, b, J-divergence of the scaled counts, ratio
/// of b's total to a's).
pub fn closest_in_chemistry(ends: &[Vec<f64>]) -> Option<(usize, usize, f64, f64)> {
    let total = |v: &[f64]| v.iter().sum::<f64>();
    let mut best: Option<(usize, usize, f64, f64)> = None;
    for a in 0..ends.len() {
        for b in a + 1..ends.len() {
            let ratio = total(&ends[b]) / total(&ends[a]).max(MIN_RATE);
            if !(1.0 / MAX_YIELD_RATIO..=MAX_YIELD_RATIO).contains(&ratio) {
                continue;
            }
            let half = ratio.sqrt();
            let sa: Vec<f64> = ends[a].iter().map(|x| x * half).collect();
            let sb: Vec<f64> = ends[b].iter().map(|x| x / half).collect();
            let j = j_divergence(&sa, &sb);
            if best.is_none_or(|bb| j < bb.2) {
                best = Some((a, b, j, ratio));
            }
        }
    }
    best
}

/// Merges the closest pair while its divergence is below [`MERGE_BELOW`], then the pair
/// closest in chemistry while that divergence, with the overall intensities made equal, is
/// below it too: one phase split by an uneven X-ray yield (the yield itself is then
/// estimated with [`crate::xray_yield`]).
pub fn merge_indistinguishable(mut c: Clusters, st: Stabilise) -> (Clusters, Vec<Simplification>) {
    let mut notes = Vec::new();
    loop {
        if c.k() < 2 {
            break;
        }
        let (a, b, j) = closest_pair(&c, st);
        if j >= MERGE_BELOW {
            break;
        }
        let ends: Vec<Vec<f64>> = [a, b].iter().map(|&i| c.expected_counts(i, st)).collect();
        notes.push(Simplification {
            action: format!(
                "merged two components a single pixel cannot tell apart ({} and {})",
                fmt_counts(&ends[0]),
                fmt_counts(&ends[1])
            ),
            value: j,
        });
        c = c.merged(a, b);
    }
    while c.k() >= 2 {
        let ends: Vec<Vec<f64>> = (0..c.k()).map(|i| c.expected_counts(i, st)).collect();
        let Some((a, b, j, ratio)) = closest_in_chemistry(&ends) else {
            break;
        };
        if j >= MERGE_BELOW {
            break;
        }
        notes.push(Simplification {
            action: format!(
                "merged two components of the same chemistry that differ only in overall intensity ({} and {}, a ratio of {ratio:.2}), as an uneven X-ray yield makes them",
                fmt_counts(&ends[a]),
                fmt_counts(&ends[b])
            ),
            value: j,
        });
        c = c.merged(a, b);
    }
    (c, notes)
}

/// Expected counts as a short string, e.g. `[2.4, 0.3, 40.1]`.
pub fn fmt_counts(v: &[f64]) -> String {
    let parts: Vec<String> = v.iter().map(|x| format!("{x:.1}")).collect();
    format!("[{}]", parts.join(", "))
}
