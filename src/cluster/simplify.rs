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
//!    component whose expected counts lie on the mixing line of two others (within
//!    [`MIXTURE_WITHIN`] of deviance) *and* that has almost no interior pixels is a band of
//!    mixed pixels, not a phase. Intermetallics also lie on the line between their
//!    elements, which is why the spatial test is needed as well.

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

/// The nearest point of the mixing lines of all pairs of `ends` other than `c` itself:
/// (deviance, a, b, t) with the mixture t·a + (1 − t)·b.
pub fn nearest_mixture(c: usize, ends: &[Vec<f64>]) -> Option<(f64, usize, usize, f64)> {
    let x: Vec<f32> = ends[c].iter().map(|&v| v as f32).collect();
    let mut best: Option<(f64, usize, usize, f64)> = None;
    for a in 0..ends.len() {
        for b in a + 1..ends.len() {
            if a == c || b == c {
                continue;
            }
            for s in 1..40 {
                let t = s as f64 / 40.0;
                let m: Vec<f64> = ends[a].iter().zip(&ends[b]).map(|(p, q)| t * p + (1.0 - t) * q).collect();
                let dev = poisson::deviance(&x, &m);
                if best.is_none_or(|bb| dev < bb.0) {
                    best = Some((dev, a, b, t));
                }
            }
        }
    }
    best
}

/// A record of one simplification, for the report.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Simplification {
    /// What was done, in words.
    pub action: String,
    /// The divergence or deviance that decided it.
    pub value: f64,
}

/// Merges the closest pair while its divergence is below [`MERGE_BELOW`].
pub fn merge_indistinguishable(mut c: Clusters, st: Stabilise) -> (Clusters, Vec<Simplification>) {
    let mut notes = Vec::new();
    loop {
        let k = c.k();
        if k < 2 {
            break;
        }
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
        if j >= MERGE_BELOW {
            break;
        }
        notes.push(Simplification {
            action: format!("merged two components a single pixel cannot tell apart ({} and {})", fmt_counts(&ends[a]), fmt_counts(&ends[b])),
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
