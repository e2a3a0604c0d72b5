//! Cluster: group pixels into phases.
//!
//! Takes [`Features`](crate::prepare::Features) and checked
//! [`ClusterParams`](select::ClusterParams); returns a [`Clusters`] model (k-means
//! centroids, a Gaussian or a Poisson mixture) that scores any pixel against every phase.
//! Models are fitted on a seeded sample of the pixels when the field is large, then
//! applied to every pixel in one pass (`refine`). The per-pixel distances run a block of
//! pixels at a time ([`lanes`]), tested bit for bit against the one-row versions.
//!
//! Each method is one file ([`kmeans`], [`gmm`], [`poisson`]) implementing
//! [`PhaseModel`]; this file registers them: [`Method`], [`Clusters`] and [`ScorerKind`]
//! each list them once, and [`each_method!`] dispatches to them. A new method is its own
//! file plus a line in each of those lists.
//!
//! The kernels are our own (a measurement showed linfa 8–17× slower than scikit-learn on
//! this problem; see notebooks-free-docs/architecture.md); tests compare them with
//! linfa-clustering as the reference.

pub mod gmm;
pub mod kmeans;
pub mod lanes;
pub mod model;
pub mod poisson;
pub mod select;
pub mod simplify;

use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

pub use gmm::GaussianMixture;
pub use kmeans::KMeans;
pub use model::{FitOptions, PhaseModel, Scoring, Seed};
pub use poisson::PoissonMixture;

/// Clustering method.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// Mixture of Poisson distributions on the counts themselves (the default).
    Poisson,
    /// k-means: every phase a sphere of the same size in feature space.
    Kmeans,
    /// Gaussian mixture with full covariances.
    Gmm,
}

impl crate::choice::Choice for Method {
    const ALL: &'static [Method] = &[Method::Poisson, Method::Kmeans, Method::Gmm];
    fn name(self) -> &'static str {
        match self {
            Method::Poisson => "poisson",
            Method::Kmeans => "kmeans",
            Method::Gmm => "gmm",
        }
    }
    fn help(self) -> &'static str {
        match self {
            Method::Poisson => {
                "Mixture of Poisson distributions on the counts themselves (the default)"
            }
            Method::Kmeans => "k-means: every phase a sphere of the same size in feature space",
            Method::Gmm => "Gaussian mixture with full covariances",
        }
    }
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

    /// Fits this method's model with `k` phases on `rows`, started from their hard
    /// partition `start` (values `< k`).
    pub fn fit_from_partition(
        self,
        rows: &[f32],
        d: usize,
        start: &[u16],
        k: usize,
        options: &FitOptions,
        rng: &mut ChaCha8Rng,
    ) -> Result<Clusters, String> {
        Ok(match self {
            Method::Poisson => Clusters::Poisson(PhaseModel::fit_from_partition(
                rows, d, start, k, options, rng,
            )?),
            Method::Kmeans => Clusters::Kmeans(PhaseModel::fit_from_partition(
                rows, d, start, k, options, rng,
            )?),
            Method::Gmm => Clusters::Gmm(PhaseModel::fit_from_partition(
                rows, d, start, k, options, rng,
            )?),
        })
    }
}

/// A fitted model that scores pixels against phases. Saved as the method's name beside
/// its model's fields (`{"method": "poisson", "model": {…}}`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "method", rename_all = "snake_case")]
pub enum Clusters {
    /// k-means centroids with one isotropic noise variance for every cluster.
    Kmeans(kmeans::Phases),
    /// A Gaussian mixture.
    Gmm(gmm::Phases),
    /// A Poisson mixture on counts.
    Poisson(poisson::Phases),
}

/// Runs `$body` with `$m` bound to the [`PhaseModel`] inside a [`Clusters`]; with `map`,
/// wraps the result back in the same variant.
macro_rules! each_method {
    ($value:expr, $m:ident => $body:expr) => {
        match $value {
            Clusters::Kmeans($m) => $body,
            Clusters::Gmm($m) => $body,
            Clusters::Poisson($m) => $body,
        }
    };
    (map $value:expr, $m:ident => $body:expr) => {
        match $value {
            Clusters::Kmeans($m) => Clusters::Kmeans($body),
            Clusters::Gmm($m) => Clusters::Gmm($body),
            Clusters::Poisson($m) => Clusters::Poisson($body),
        }
    };
}

/// The scorer of each method, chosen once per pass (an enum, not a trait object, so the
/// per-pixel calls inline).
pub enum ScorerKind<'a> {
    /// k-means.
    Kmeans(kmeans::Scorer),
    /// Gaussian mixture.
    Gmm(<gmm::Phases as PhaseModel>::Scorer<'a>),
    /// Poisson mixture.
    Poisson(<poisson::Phases as PhaseModel>::Scorer<'a>),
}

macro_rules! each_scorer {
    ($value:expr, $s:ident => $body:expr) => {
        match $value {
            ScorerKind::Kmeans($s) => $body,
            ScorerKind::Gmm($s) => $body,
            ScorerKind::Poisson($s) => $body,
        }
    };
}

impl Clusters {
    /// The method that made the model.
    pub fn method(&self) -> Method {
        fn of<M: PhaseModel>(_: &M) -> Method {
            M::METHOD
        }
        each_method!(self, m => of(m))
    }

    /// Number of phases.
    pub fn k(&self) -> usize {
        each_method!(self, m => m.k())
    }

    /// Feature dimensions.
    pub fn d(&self) -> usize {
        each_method!(self, m => m.d())
    }

    /// Whether the model scores raw counts (true) or transformed features.
    pub fn on_counts(&self) -> bool {
        each_method!(self, m => m.on_counts())
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
        each_method!(self, m => m.check_own())
    }

    /// Mean of phase `c` in feature space.
    pub fn mean(&self, c: usize) -> &[f64] {
        let d = self.d();
        each_method!(self, m => &m.means()[c * d..(c + 1) * d])
    }

    /// Rebuilds caches after deserialising.
    pub fn refresh(&mut self) -> Result<(), String> {
        each_method!(self, m => m.refresh())
    }

    /// Expected counts per pixel of each element for phase `c` (means mapped back through
    /// the transform for the models on transformed features).
    pub fn expected_counts(&self, c: usize, st: crate::prepare::Stabilise) -> Vec<f64> {
        if self.on_counts() {
            self.mean(c).to_vec()
        } else {
            self.mean(c)
                .iter()
                .map(|&m| st.invert(m).max(0.0))
                .collect()
        }
    }

    /// The same model with the mean of phase `c` replaced (feature space; rates for the
    /// Poisson mixture).
    pub fn with_mean(&self, c: usize, mean: &[f64]) -> Clusters {
        each_method!(map self, m => m.with_mean(c, mean))
    }

    /// The same model without phase `c` (weights renormalised).
    pub fn without(&self, c: usize) -> Clusters {
        each_method!(map self, m => m.without(c))
    }

    /// The same model with phases `a` and `b` combined into one (at index `a`), with the
    /// pooled weight, mean and (for the mixture) covariance.
    pub fn merged(&self, a: usize, b: usize) -> Clusters {
        let (a, b) = (a.min(b), a.max(b));
        each_method!(map self, m => m.merged(a, b))
    }

    /// A scorer for the hot loops. With `weighted`, scores include the mixing weights
    /// (a Bayes classifier for single pixels); without, they are the phases' likelihoods
    /// alone, as a spatial model wants, where the label prior is the neighbourhood.
    pub fn scorer(&self, weighted: bool) -> Scorer<'_> {
        let kind = match self {
            Clusters::Kmeans(m) => ScorerKind::Kmeans(m.scorer()),
            Clusters::Gmm(m) => ScorerKind::Gmm(m.scorer()),
            Clusters::Poisson(m) => ScorerKind::Poisson(m.scorer()),
        };
        let weights = each_method!(self, m => m.weights());
        let unweight = match (weighted, weights) {
            (false, Some(w)) => w.iter().map(|&x| -x.max(1e-300).ln()).collect(),
            _ => vec![0.0; self.k()],
        };
        Scorer { kind, unweight }
    }

    /// A typical per-dimension noise variance of the phases (for the empty pseudo-phase):
    /// the k-means pooled variance, or the mixture's weighted mean covariance diagonal.
    pub fn noise_variance(&self) -> f64 {
        each_method!(self, m => m.noise_variance())
    }
}

/// Rows of `len` values of `v` without row `c`.
fn drop_rows(v: &[f64], c: usize, len: usize) -> Vec<f64> {
    v.chunks(len)
        .enumerate()
        .filter(|(i, _)| *i != c)
        .flat_map(|(_, r)| r.to_vec())
        .collect()
}

/// `w` scaled to sum to 1.
fn renormalised(w: Vec<f64>) -> Vec<f64> {
    let s: f64 = w.iter().sum();
    w.into_iter().map(|x| x / s).collect()
}

/// Checks that `v` holds `n` finite values.
fn check_len(name: &str, v: &[f64], n: usize) -> Result<(), String> {
    if v.len() != n {
        Err(format!("{name} has {} values, {n} expected", v.len()))
    } else if v.iter().any(|x| !x.is_finite()) {
        Err(format!("{name} holds a value that is not a finite number"))
    } else {
        Ok(())
    }
}

/// Checks mixing weights: `k` finite non-negative values summing to 1.
fn check_weights(w: &[f64], k: usize) -> Result<(), String> {
    check_len("weights", w, k)?;
    if w.iter().any(|&x| x < 0.0) || (w.iter().sum::<f64>() - 1.0).abs() > 1e-3 {
        return Err("the weights are negative or do not sum to 1".to_string());
    }
    Ok(())
}

/// Scores pixels against phases: log density of a row under each phase, and a χ²-like
/// discrepancy for the outlier test.
pub struct Scorer<'a> {
    kind: ScorerKind<'a>,
    /// Added to each phase's score: −ln wₖ to drop the mixing weights, or 0.
    unweight: Vec<f64>,
}

impl Scorer<'_> {
    /// ln (wₖ N(row | phase c)), or ln N(row | phase c) for an unweighted scorer.
    #[inline]
    pub fn score(&self, c: usize, row: &[f32]) -> f64 {
        self.unweight[c] + each_scorer!(&self.kind, s => Scoring::score(s, c, row))
    }

    /// [`Self::score`] of each lane's row of a transposed block (see [`lanes`]) for every
    /// phase: `out[c][l]`; bit-identical to the one-row version.
    #[inline]
    pub fn score_block(&self, xt: &[lanes::Lane], out: &mut [[f64; lanes::LANES]]) {
        each_scorer!(&self.kind, s => Scoring::score_block(s, xt, out));
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
        each_scorer!(&self.kind, s => Scoring::discrepancy(s, c, row))
    }
}

#[cfg(test)]
mod tests {
    use super::lanes::{for_each_block, LANES};
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// One model of each method with `k = 3` phases of `d = 4` elements.
    fn three_models(rng: &mut ChaCha8Rng) -> [Clusters; 3] {
        let (k, d) = (3, 4);
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
        // As after a fit (a model never fitted holds −∞, which JSON cannot hold).
        let mut g = GaussianMixture::new(k, d, weights.clone(), means.clone(), cov).unwrap();
        g.mean_log_likelihood = -12.5;
        let mut p = PoissonMixture::new(k, d, weights, means.clone());
        p.mean_log_likelihood = -8.25;
        [
            Clusters::Kmeans(kmeans::Phases {
                model: KMeans {
                    k,
                    d,
                    centroids: means.clone(),
                    inertia: 0.0,
                    iterations: 0,
                },
                variance: 2.5,
            }),
            Clusters::Gmm(gmm::Phases { model: g }),
            Clusters::Poisson(poisson::Phases { model: p }),
        ]
    }

    /// A saved model keeps the file shape of earlier versions (the method's name beside
    /// the model's fields, k-means's variance beside its centroids) and reads back equal;
    /// the edits the phase-count decision makes leave a model that passes its checks.
    #[test]
    fn saved_shape_and_edits_hold_for_every_method() {
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        for model in three_models(&mut rng) {
            let json: serde_json::Value = serde_json::to_value(&model).unwrap();
            let name = serde_json::to_value(model.method()).unwrap();
            assert_eq!(json["method"], name);
            assert!(json["model"]["k"] == 3, "{json}");
            if model.method() == Method::Kmeans {
                assert_eq!(json["variance"], 2.5);
            }
            let mut back: Clusters = serde_json::from_value(json).unwrap();
            back.refresh().unwrap();
            assert_eq!(back, model);
            for edited in [model.merged(2, 0), model.without(1)] {
                assert_eq!((edited.k(), edited.d()), (2, 4));
                assert_eq!(edited.check(), Ok(()), "{:?}", model.method());
            }
            let moved = model.with_mean(1, &[9.0; 4]);
            assert_eq!(moved.mean(1), &[9.0; 4]);
            assert_eq!(moved.mean(0), model.mean(0));
        }
    }

    /// The block scorer used by the labelling pass equals the one-row scorer bit for bit,
    /// for every model kind, with and without the mixing weights, on blocks of every size.
    #[test]
    fn block_scores_equal_row_scores() {
        let (k, d) = (3, 4);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let rows: Vec<f32> = (0..(2 * LANES + 3) * d)
            .map(|_| rng.random_range(0.0..30.0f32).round())
            .collect();
        let models = three_models(&mut rng);
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
