//! Cluster: group pixels into phases.
//!
//! Takes [`Features`](crate::prepare::Features) and checked
//! [`ClusterParams`](select::ClusterParams); returns a [`Clusters`] model (k-means
//! centroids, a Gaussian or a Poisson mixture) that scores any pixel against every phase.
//! Models are fitted on a seeded sample of the pixels when the field is large, then
//! applied to every pixel in one pass (`refine`). The per-pixel distances run a block of
//! pixels at a time ([`lanes`]), tested bit for bit against the one-row versions.
//!
//! The kernels are our own (a measurement showed linfa 8–17× slower than scikit-learn on
//! this problem; see notebooks-free-docs/architecture.md); tests compare them with
//! linfa-clustering as the reference.

pub mod gmm;
pub mod kmeans;
pub mod lanes;
pub mod poisson;
pub mod select;
pub mod simplify;

use serde::{Deserialize, Serialize};

pub use gmm::GaussianMixture;
pub use kmeans::KMeans;
pub use poisson::PoissonMixture;

/// Clustering method.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// Mixture of Poisson distributions on the counts themselves (the default).
    Poisson,
    /// k-means: every phase a sphere of the same size in feature space.
    Kmeans,
    /// Gaussian mixture with full covariances.
    Gmm,
}

impl Method {
    /// The method's name in a sentence.
    pub fn describe(self) -> &'static str {
        match self {
            Method::Poisson => "Poisson mixture",
            Method::Kmeans => "k-means",
            Method::Gmm => "Gaussian mixture",
        }
    }
}

/// A fitted model that scores pixels against phases.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "method", rename_all = "snake_case")]
pub enum Clusters {
    /// k-means centroids with one isotropic noise variance for every cluster.
    Kmeans {
        /// The centroids.
        model: KMeans,
        /// Per-dimension noise variance (pooled within-cluster variance).
        variance: f64,
    },
    /// A Gaussian mixture.
    Gmm {
        /// The mixture.
        model: GaussianMixture,
    },
    /// A Poisson mixture on counts.
    Poisson {
        /// The mixture.
        model: PoissonMixture,
    },
}

impl Clusters {
    /// The method that made the model.
    pub fn method(&self) -> Method {
        match self {
            Clusters::Kmeans { .. } => Method::Kmeans,
            Clusters::Gmm { .. } => Method::Gmm,
            Clusters::Poisson { .. } => Method::Poisson,
        }
    }

    /// Number of phases.
    pub fn k(&self) -> usize {
        match self {
            Clusters::Kmeans { model, .. } => model.k,
            Clusters::Gmm { model } => model.k,
            Clusters::Poisson { model } => model.k,
        }
    }

    /// Checks a model read from a file before any use: array lengths agree with `k` and
    /// `d`, every number is finite, weights are non-negative, every component has
    /// counts or a positive variance. Returns what is wrong.
    pub fn check(&self) -> std::result::Result<(), String> {
        let (k, d) = (self.k(), self.d());
        if k == 0 || d == 0 || k > 256 || d > 64 {
            return Err(format!(
                "{k} phases of {d} elements (1 to 256 phases of 1 to 64 elements)"
            ));
        }
        let len = |name: &str, v: &[f64], n: usize| {
            if v.len() != n {
                Err(format!("{name} has {} values, {n} expected", v.len()))
            } else if v.iter().any(|x| !x.is_finite()) {
                Err(format!("{name} holds a value that is not a finite number"))
            } else {
                Ok(())
            }
        };
        let weights = |w: &[f64]| {
            len("weights", w, k)?;
            if w.iter().any(|&x| x < 0.0) || (w.iter().sum::<f64>() - 1.0).abs() > 1e-3 {
                return Err("the weights are negative or do not sum to 1".to_string());
            }
            Ok(())
        };
        match self {
            Clusters::Kmeans { model, variance } => {
                len("centroids", &model.centroids, k * d)?;
                if !(variance.is_finite() && *variance > 0.0) {
                    return Err(format!("the noise variance is {variance}, not positive"));
                }
            }
            Clusters::Gmm { model } => {
                weights(&model.weights)?;
                len("means", &model.means, k * d)?;
                len("covariances", &model.covariances, k * d * d)?;
            }
            Clusters::Poisson { model } => {
                weights(&model.weights)?;
                len("rates", &model.rates, k * d)?;
                for (c, r) in model.rates.chunks_exact(d).enumerate() {
                    if r.iter().any(|&x| x < 0.0) {
                        return Err(format!("phase {} has a negative rate", c + 1));
                    }
                    if r.iter().all(|&x| x <= poisson::MIN_RATE) {
                        return Err(format!(
                            "phase {} has no counts in any element (all rates 0)",
                            c + 1
                        ));
                    }
                }
            }
        }
        Ok(())
    }

    /// Feature dimensions.
    pub fn d(&self) -> usize {
        match self {
            Clusters::Kmeans { model, .. } => model.d,
            Clusters::Gmm { model } => model.d,
            Clusters::Poisson { model } => model.d,
        }
    }

    /// Mean of phase `c` in feature space.
    pub fn mean(&self, c: usize) -> &[f64] {
        let d = self.d();
        match self {
            Clusters::Kmeans { model, .. } => &model.centroids[c * d..(c + 1) * d],
            Clusters::Gmm { model } => &model.means[c * d..(c + 1) * d],
            Clusters::Poisson { model } => &model.rates[c * d..(c + 1) * d],
        }
    }

    /// Rebuilds caches after deserialising.
    pub fn refresh(&mut self) -> Result<(), gmm::GmmError> {
        match self {
            Clusters::Kmeans { .. } => Ok(()),
            Clusters::Gmm { model } => model.refresh(),
            Clusters::Poisson { model } => {
                model.refresh();
                Ok(())
            }
        }
    }

    /// Expected counts per pixel of each element for phase `c` (means mapped back through
    /// the transform for the Gaussian models).
    pub fn expected_counts(&self, c: usize, st: crate::prepare::Stabilise) -> Vec<f64> {
        match self {
            Clusters::Poisson { model } => model.rates[c * model.d..(c + 1) * model.d].to_vec(),
            _ => self
                .mean(c)
                .iter()
                .map(|&m| st.invert(m).max(0.0))
                .collect(),
        }
    }

    /// The same model with the mean of phase `c` replaced (feature space; rates for the
    /// Poisson mixture).
    pub fn with_mean(&self, c: usize, mean: &[f64]) -> Clusters {
        let d = self.d();
        let mut out = self.clone();
        match &mut out {
            Clusters::Kmeans { model, .. } => {
                model.centroids[c * d..(c + 1) * d].copy_from_slice(mean)
            }
            Clusters::Gmm { model } => {
                model.means[c * d..(c + 1) * d].copy_from_slice(mean);
                model.refresh().expect("covariances unchanged");
            }
            Clusters::Poisson { model } => {
                model.rates[c * d..(c + 1) * d].copy_from_slice(mean);
                model.refresh();
            }
        }
        out
    }

    /// The same model without phase `c` (weights renormalised).
    pub fn without(&self, c: usize) -> Clusters {
        fn drop_rows(v: &[f64], c: usize, len: usize) -> Vec<f64> {
            v.chunks(len)
                .enumerate()
                .filter(|(i, _)| *i != c)
                .flat_map(|(_, r)| r.to_vec())
                .collect()
        }
        fn renorm(w: Vec<f64>) -> Vec<f64> {
            let s: f64 = w.iter().sum();
            w.into_iter().map(|x| x / s).collect()
        }
        match self {
            Clusters::Kmeans { model, variance } => {
                let mut m = model.clone();
                m.centroids = drop_rows(&model.centroids, c, model.d);
                m.k -= 1;
                Clusters::Kmeans {
                    model: m,
                    variance: *variance,
                }
            }
            Clusters::Gmm { model } => {
                let mut m = model.clone();
                m.weights = renorm(drop_rows(&model.weights, c, 1));
                m.means = drop_rows(&model.means, c, model.d);
                m.covariances = drop_rows(&model.covariances, c, model.d * model.d);
                m.k -= 1;
                m.refresh().expect("the remaining covariances were valid");
                Clusters::Gmm { model: m }
            }
            Clusters::Poisson { model } => {
                let mut m = model.clone();
                m.weights = renorm(drop_rows(&model.weights, c, 1));
                m.rates = drop_rows(&model.rates, c, model.d);
                m.k -= 1;
                m.refresh();
                Clusters::Poisson { model: m }
            }
        }
    }

    /// The same model with phases `a` and `b` combined into one (at index `a`), with the
    /// pooled weight, mean and (for the mixture) covariance.
    pub fn merged(&self, a: usize, b: usize) -> Clusters {
        let (a, b) = (a.min(b), a.max(b));
        let d = self.d();
        match self {
            Clusters::Kmeans { model, variance } => {
                let mut m = model.clone();
                for j in 0..d {
                    m.centroids[a * d + j] =
                        0.5 * (model.centroids[a * d + j] + model.centroids[b * d + j]);
                }
                Clusters::Kmeans {
                    model: m,
                    variance: *variance,
                }
                .without(b)
            }
            Clusters::Gmm { model } => {
                let mut m = model.clone();
                let (wa, wb) = (model.weights[a], model.weights[b]);
                let w = wa + wb;
                let mean: Vec<f64> = (0..d)
                    .map(|j| (wa * model.means[a * d + j] + wb * model.means[b * d + j]) / w)
                    .collect();
                for i in 0..d {
                    for j in 0..d {
                        let da =
                            (model.means[a * d + i] - mean[i]) * (model.means[a * d + j] - mean[j]);
                        let db =
                            (model.means[b * d + i] - mean[i]) * (model.means[b * d + j] - mean[j]);
                        m.covariances[a * d * d + i * d + j] = (wa
                            * (model.covariances[a * d * d + i * d + j] + da)
                            + wb * (model.covariances[b * d * d + i * d + j] + db))
                            / w;
                    }
                }
                m.means[a * d..(a + 1) * d].copy_from_slice(&mean);
                m.weights[a] = w;
                m.weights[b] = 0.0;
                Clusters::Gmm { model: m }.without(b)
            }
            Clusters::Poisson { model } => {
                let mut m = model.clone();
                let (wa, wb) = (model.weights[a], model.weights[b]);
                for j in 0..d {
                    m.rates[a * d + j] =
                        (wa * model.rates[a * d + j] + wb * model.rates[b * d + j]) / (wa + wb);
                }
                m.weights[a] = wa + wb;
                m.weights[b] = 0.0;
                Clusters::Poisson { model: m }.without(b)
            }
        }
    }

    /// A scorer for the hot loops. With `weighted`, scores include the mixing weights
    /// (a Bayes classifier for single pixels); without, they are the phases' likelihoods
    /// alone, as a spatial model wants, where the label prior is the neighbourhood.
    pub fn scorer(&self, weighted: bool) -> Scorer<'_> {
        let kind = match self {
            Clusters::Kmeans { model, variance } => {
                let var = variance.max(1e-12);
                let d = model.d as f64;
                ScorerKind::Kmeans {
                    centres: model.centres_f32(),
                    d: model.d,
                    inv_var: (1.0 / var) as f32,
                    log_norm: -(model.k as f64).ln()
                        - 0.5 * d * (2.0 * std::f64::consts::PI * var).ln(),
                }
            }
            Clusters::Gmm { model } => ScorerKind::Gmm(model),
            Clusters::Poisson { model } => ScorerKind::Poisson(model),
        };
        let weights: Option<&[f64]> = match self {
            Clusters::Kmeans { .. } => None,
            Clusters::Gmm { model } => Some(&model.weights),
            Clusters::Poisson { model } => Some(&model.weights),
        };
        let unweight = match (weighted, weights) {
            (false, Some(w)) => w.iter().map(|&x| -x.max(1e-300).ln()).collect(),
            _ => vec![0.0; self.k()],
        };
        Scorer { kind, unweight }
    }

    /// A typical per-dimension noise variance of the phases (for the empty pseudo-phase):
    /// the k-means pooled variance, or the mixture's weighted mean covariance diagonal.
    pub fn noise_variance(&self) -> f64 {
        match self {
            Clusters::Kmeans { variance, .. } => *variance,
            Clusters::Gmm { model } => {
                let d = model.d;
                (0..model.k)
                    .map(|c| {
                        let diag: f64 = (0..d)
                            .map(|i| model.covariances[c * d * d + i * d + i])
                            .sum();
                        model.weights[c] * diag / d as f64
                    })
                    .sum()
            }
            Clusters::Poisson { .. } => f64::NAN,
        }
    }
}

/// Scores pixels against phases: log density of a row under each phase, and a χ²-like
/// discrepancy for the outlier test.
pub struct Scorer<'a> {
    kind: ScorerKind<'a>,
    /// Added to each phase's score: −ln wₖ to drop the mixing weights, or 0.
    unweight: Vec<f64>,
}

enum ScorerKind<'a> {
    Kmeans {
        centres: Vec<f32>,
        d: usize,
        inv_var: f32,
        log_norm: f64,
    },
    Gmm(&'a GaussianMixture),
    Poisson(&'a PoissonMixture),
}

impl Scorer<'_> {
    /// ln (wₖ N(row | phase c)), or ln N(row | phase c) for an unweighted scorer.
    #[inline]
    pub fn score(&self, c: usize, row: &[f32]) -> f64 {
        self.unweight[c]
            + match &self.kind {
                ScorerKind::Kmeans { log_norm, .. } => log_norm - 0.5 * self.discrepancy(c, row),
                ScorerKind::Gmm(g) => g.weighted_log_density(c, row),
                ScorerKind::Poisson(m) => m.weighted_log_density(c, row),
            }
    }

    /// [`Self::score`] of each lane's row of a transposed block (see [`lanes`]) for every
    /// phase: `out[c][l]`; bit-identical to the one-row version.
    #[inline]
    pub fn score_block(&self, xt: &[lanes::Lane], out: &mut [[f64; lanes::LANES]]) {
        match &self.kind {
            ScorerKind::Kmeans {
                centres,
                d,
                inv_var,
                log_norm,
            } => {
                for (c, o) in out[..self.unweight.len()].iter_mut().enumerate() {
                    let e = lanes::dist2(xt, &centres[c * d..(c + 1) * d]);
                    for l in 0..lanes::LANES {
                        o[l] = log_norm - 0.5 * f64::from(e[l] * inv_var);
                    }
                }
            }
            ScorerKind::Gmm(g) => g.weighted_log_density_block(xt, out),
            ScorerKind::Poisson(m) => m.weighted_log_density_block(xt, out),
        }
        for (o, &u) in out.iter_mut().zip(&self.unweight) {
            for v in o.iter_mut() {
                *v += u;
            }
        }
    }

    /// Discrepancy of `row` from phase `c`, approximately χ² with d degrees of freedom for
    /// a pixel of that phase: squared Mahalanobis distance, or Poisson deviance.
    #[inline]
    pub fn discrepancy(&self, c: usize, row: &[f32]) -> f64 {
        match &self.kind {
            ScorerKind::Kmeans {
                centres,
                d,
                inv_var,
                ..
            } => f64::from(kmeans::dist2(row, &centres[c * d..(c + 1) * d]) * inv_var),
            ScorerKind::Gmm(g) => f64::from(g.mahalanobis2(c, row)),
            ScorerKind::Poisson(m) => m.deviance(c, row),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::lanes::{for_each_block, LANES};
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// The block scorer used by the labelling pass equals the one-row scorer bit for bit,
    /// for every model kind, with and without the mixing weights, on blocks of every size.
    #[test]
    fn block_scores_equal_row_scores() {
        let (k, d) = (3, 4);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let rows: Vec<f32> = (0..(2 * LANES + 3) * d)
            .map(|_| rng.random_range(0.0..30.0f32).round())
            .collect();
        let means: Vec<f64> = (0..k * d).map(|_| rng.random_range(1.0..25.0)).collect();
        let mut cov = vec![0.0; k * d * d];
        for c in 0..k {
            for i in 0..d {
                for j in 0..d {
                    cov[c * d * d + i * d + j] = if i == j { 3.0 + c as f64 } else { 0.5 };
                }
            }
        }
        let weights = vec![0.5, 0.3, 0.2];
        let models = [
            Clusters::Kmeans {
                model: KMeans {
                    k,
                    d,
                    centroids: means.clone(),
                    inertia: 0.0,
                    iterations: 0,
                },
                variance: 2.5,
            },
            Clusters::Gmm {
                model: GaussianMixture::new(k, d, weights.clone(), means.clone(), cov).unwrap(),
            },
            Clusters::Poisson {
                model: PoissonMixture::new(k, d, weights, means),
            },
        ];
        for model in &models {
            for weighted in [false, true] {
                let scorer = model.scorer(weighted);
                let mut out = vec![[0f64; LANES]; k];
                let mut seen = 0;
                for_each_block(&rows, d, |block, xt| {
                    scorer.score_block(xt, &mut out);
                    for (l, row) in block.chunks_exact(d).enumerate() {
                        for (c, o) in out.iter().enumerate() {
                            assert_eq!(o[l].to_bits(), scorer.score(c, row).to_bits());
                        }
                        seen += 1;
                    }
                });
                assert_eq!(seen, rows.len() / d);
            }
        }
    }
}
