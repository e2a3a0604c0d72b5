//! Gaussian mixture with full covariances, fitted by expectation–maximisation.
//!
//! - Initialised from a k-means partition (as scikit-learn does by default).
//! - Densities through the Cholesky factor of each covariance: with Σ = L Lᵀ, the squared
//!   Mahalanobis distance is ‖L⁻¹(x − μ)‖², and ln|Σ|^(−1/2) = Σ ln (L⁻¹)ᵢᵢ.
//! - Responsibilities by log-sum-exp, so no density underflows.
//! - A small constant added to each covariance's diagonal keeps it positive definite.
//! - Sums in `f64` per fixed-size chunk, combined in chunk order: deterministic whatever
//!   the thread count.

use nalgebra::DMatrix;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::kmeans::CHUNK_ROWS;
use super::lanes::{self, Lane, LANES};
use super::model::{check_iterations, Checked, FitOptions, PhaseModel, Scoring};
use super::Method;

/// Options of an EM fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GmmParams {
    /// Components.
    pub k: usize,
    /// Iteration limit.
    pub max_iter: usize,
    /// Stop when the mean log-likelihood per row improves by less than this.
    pub tol: f64,
    /// Added to every covariance diagonal.
    pub reg_covar: f64,
}

impl GmmParams {
    /// The options the phase models use: 200 iterations, tolerance 10⁻⁴ in mean
    /// log-likelihood per row, 10⁻³ added to each covariance diagonal (common practice,
    /// no source; scikit-learn's defaults are 100, 10⁻³ and 10⁻⁶, for unscaled data).
    pub fn new(k: usize) -> GmmParams {
        GmmParams {
            k,
            max_iter: 200,
            tol: 1e-4,
            reg_covar: 1e-3,
        }
    }

    /// Checks every rule: at least one component, a non-negative finite regularisation.
    pub fn check(self) -> Result<Checked<GmmParams>, String> {
        if self.k == 0 {
            return Err("a Gaussian mixture needs at least one component".into());
        }
        check_iterations(self.max_iter, self.tol)?;
        if !(self.reg_covar.is_finite() && self.reg_covar >= 0.0) {
            return Err(format!(
                "the covariance regularisation {} is not a non-negative number",
                self.reg_covar
            ));
        }
        Ok(Checked(self))
    }
}

/// A fitted mixture.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GaussianMixture {
    /// Components.
    pub k: usize,
    /// Dimensions.
    pub d: usize,
    /// Mixing weights (sum 1).
    pub weights: Vec<f64>,
    /// Means, `k × d`.
    pub means: Vec<f64>,
    /// Covariances, `k × d × d`.
    pub covariances: Vec<f64>,
    /// Mean log-likelihood per fitted row at the end of the fit.
    pub mean_log_likelihood: f64,
    /// EM iterations run.
    pub iterations: usize,
    /// Whether EM met its tolerance.
    pub converged: bool,
    #[serde(skip)]
    cache: Cache,
}

/// Precomputed per-component terms for density evaluation.
#[derive(Debug, Clone, Default, PartialEq)]
struct Cache {
    /// L⁻¹ per component, `k × d × d`, lower triangular (f32 for the hot loop).
    inv_chol: Vec<f32>,
    /// Means as f32.
    means: Vec<f32>,
    /// ln wₖ − d/2 ln 2π + ln |L⁻¹|.
    log_norm: Vec<f64>,
}

/// Why a fit failed, with a hint.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum GmmError {
    /// A covariance matrix lost positive definiteness.
    #[error("component {0}'s covariance is not positive definite (a phase with too few distinct pixels); ask for fewer phases, or use --method kmeans")]
    IllDefinedCovariance(usize),
}

impl GaussianMixture {
    /// A mixture from its parameters (covariances `k × d × d`, row-major).
    pub fn new(
        k: usize,
        d: usize,
        weights: Vec<f64>,
        means: Vec<f64>,
        covariances: Vec<f64>,
    ) -> Result<Self, GmmError> {
        let mut g = GaussianMixture {
            k,
            d,
            weights,
            means,
            covariances,
            mean_log_likelihood: f64::NEG_INFINITY,
            iterations: 0,
            converged: false,
            cache: Cache::default(),
        };
        g.refresh()?;
        Ok(g)
    }

    /// Rebuilds the density cache (call after deserialising or editing parameters).
    pub fn refresh(&mut self) -> Result<(), GmmError> {
        let (k, d) = (self.k, self.d);
        let mut inv_chol = vec![0.0f32; k * d * d];
        let mut log_norm = vec![0.0f64; k];
        for c in 0..k {
            let cov = DMatrix::from_row_slice(d, d, &self.covariances[c * d * d..(c + 1) * d * d]);
            let chol = cov.cholesky().ok_or(GmmError::IllDefinedCovariance(c))?;
            let l = chol.l();
            let linv = l
                .solve_lower_triangular(&DMatrix::identity(d, d))
                .ok_or(GmmError::IllDefinedCovariance(c))?;
            let mut logdet = 0.0;
            for i in 0..d {
                logdet += linv[(i, i)].ln();
                for j in 0..=i {
                    inv_chol[c * d * d + i * d + j] = linv[(i, j)] as f32;
                }
            }
            log_norm[c] = self.weights[c].max(1e-300).ln()
                - 0.5 * d as f64 * (2.0 * std::f64::consts::PI).ln()
                + logdet;
        }
        self.cache = Cache {
            inv_chol,
            means: self.means.iter().map(|&m| m as f32).collect(),
            log_norm,
        };
        Ok(())
    }

    /// Squared Mahalanobis distance of `row` to component `c`.
    #[inline]
    pub fn mahalanobis2(&self, c: usize, row: &[f32]) -> f32 {
        let d = self.d;
        let m = &self.cache.means[c * d..(c + 1) * d];
        let li = &self.cache.inv_chol[c * d * d..(c + 1) * d * d];
        let mut diff = [0.0f32; 64];
        for j in 0..d {
            diff[j] = row[j] - m[j];
        }
        let mut q = 0.0f32;
        for i in 0..d {
            let lrow = &li[i * d..i * d + i + 1];
            let y: f32 = lrow.iter().zip(&diff[..=i]).map(|(a, b)| a * b).sum();
            q += y * y;
        }
        q
    }

    /// [`Self::mahalanobis2`] of each lane's row of a transposed block (see
    /// [`lanes`]); bit-identical to the one-row version.
    #[inline]
    pub fn mahalanobis2_block(&self, c: usize, xt: &[Lane]) -> Lane {
        let d = self.d;
        lanes::mahalanobis2(
            xt,
            &self.cache.means[c * d..(c + 1) * d],
            &self.cache.inv_chol[c * d * d..(c + 1) * d * d],
            d,
        )
    }

    /// ln (wₖ N(row | μₖ, Σₖ)).
    #[inline]
    pub fn weighted_log_density(&self, c: usize, row: &[f32]) -> f64 {
        self.cache.log_norm[c] - 0.5 * f64::from(self.mahalanobis2(c, row))
    }

    /// [`Self::weighted_log_density`] of each lane's row for every component:
    /// `out[c][l]`.
    #[inline]
    pub fn weighted_log_density_block(&self, xt: &[Lane], out: &mut [[f64; LANES]]) {
        for (c, o) in out[..self.k].iter_mut().enumerate() {
            let q = self.mahalanobis2_block(c, xt);
            for l in 0..LANES {
                o[l] = self.cache.log_norm[c] - 0.5 * f64::from(q[l]);
            }
        }
    }

    /// Calls `f(row, lp)` for every row of `data`, `lp[c]` its weighted log density under
    /// component `c` (with [`lanes::best_and_log_sum`], the most probable component, its
    /// posterior and the row's log-likelihood), computed a block of rows at a time.
    pub fn for_each_scored_row(&self, data: &[f32], f: impl FnMut(&[f32], &mut [f64])) {
        lanes::for_each_scored_row(
            data,
            self.d,
            self.k,
            |xt, out| self.weighted_log_density_block(xt, out),
            f,
        );
    }

    /// Number of free parameters: k·d(d+1)/2 + k·d + (k − 1), as in scikit-learn's
    /// `GaussianMixture._n_parameters` for full covariances.
    pub fn n_parameters(&self) -> usize {
        n_parameters(self.k, self.d)
    }

    /// Bayesian information criterion on `n` rows: −2 ln L̂ + p ln n (Schwarz 1978).
    pub fn bic(&self, n: usize) -> f64 {
        bic(self.mean_log_likelihood * n as f64, self.n_parameters(), n)
    }

    /// Most probable component of every row.
    pub fn predict(&self, data: &[f32]) -> Vec<u16> {
        let d = self.d;
        data.par_chunks(CHUNK_ROWS * d)
            .flat_map_iter(|chunk| {
                let mut out = Vec::with_capacity(chunk.len() / d);
                self.for_each_scored_row(chunk, |_, lp| {
                    out.push(lanes::best_and_log_sum(lp).0 as u16)
                });
                out
            })
            .collect()
    }

    /// Mean log-likelihood per row of `data`.
    pub fn score(&self, data: &[f32]) -> f64 {
        let d = self.d;
        let n = data.len() / d;
        let parts: Vec<f64> = data
            .par_chunks(CHUNK_ROWS * d)
            .map(|chunk| {
                let mut ll = 0.0;
                self.for_each_scored_row(chunk, |_, lp| ll += lanes::best_and_log_sum(lp).2);
                ll
            })
            .collect();
        parts.iter().sum::<f64>() / n as f64
    }
}

/// Free parameters of a full-covariance mixture (see [`GaussianMixture::n_parameters`]).
pub fn n_parameters(k: usize, d: usize) -> usize {
    k * d * (d + 1) / 2 + k * d + (k - 1)
}

/// BIC = −2 ln L̂ + p ln n (Schwarz 1978).
pub fn bic(log_likelihood: f64, p: usize, n: usize) -> f64 {
    -2.0 * log_likelihood + p as f64 * (n as f64).ln()
}

/// Sufficient statistics of one chunk.
struct Stats {
    nk: Vec<f64>,
    s1: Vec<f64>,
    s2: Vec<f64>,
    ll: f64,
}

impl Stats {
    fn new(k: usize, d: usize) -> Self {
        Stats {
            nk: vec![0.0; k],
            s1: vec![0.0; k * d],
            s2: vec![0.0; k * d * d],
            ll: 0.0,
        }
    }
    fn add(mut self, o: Stats) -> Stats {
        self.nk.iter_mut().zip(&o.nk).for_each(|(a, b)| *a += b);
        self.s1.iter_mut().zip(&o.s1).for_each(|(a, b)| *a += b);
        self.s2.iter_mut().zip(&o.s2).for_each(|(a, b)| *a += b);
        self.ll += o.ll;
        self
    }
    fn accumulate(&mut self, row: &[f32], c: usize, r: f64, d: usize) {
        self.nk[c] += r;
        let s1 = &mut self.s1[c * d..(c + 1) * d];
        let s2 = &mut self.s2[c * d * d..(c + 1) * d * d];
        for i in 0..d {
            let xi = f64::from(row[i]);
            s1[i] += r * xi;
            let rxi = r * xi;
            for j in 0..=i {
                s2[i * d + j] += rxi * f64::from(row[j]);
            }
        }
    }
}

fn m_step(
    st: &Stats,
    k: usize,
    d: usize,
    n: f64,
    reg: f64,
    previous: Option<&GaussianMixture>,
) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let mut w = vec![0.0; k];
    let mut means = vec![0.0; k * d];
    let mut covs = vec![0.0; k * d * d];
    for c in 0..k {
        let nk = st.nk[c];
        if nk < 1e-6 {
            // An emptied component keeps its previous shape with a negligible weight.
            w[c] = 1e-12;
            if let Some(p) = previous {
                means[c * d..(c + 1) * d].copy_from_slice(&p.means[c * d..(c + 1) * d]);
                covs[c * d * d..(c + 1) * d * d]
                    .copy_from_slice(&p.covariances[c * d * d..(c + 1) * d * d]);
            } else {
                for i in 0..d {
                    covs[c * d * d + i * d + i] = 1.0;
                }
            }
            continue;
        }
        w[c] = nk / n;
        for i in 0..d {
            means[c * d + i] = st.s1[c * d + i] / nk;
        }
        for i in 0..d {
            for j in 0..=i {
                let v = st.s2[c * d * d + i * d + j] / nk - means[c * d + i] * means[c * d + j];
                covs[c * d * d + i * d + j] = v;
                covs[c * d * d + j * d + i] = v;
            }
            covs[c * d * d + i * d + i] += reg;
        }
    }
    let total: f64 = w.iter().sum();
    w.iter_mut().for_each(|x| *x /= total);
    (w, means, covs)
}

/// One EM iteration: responsibilities of every row under `g` (E-step), then the weights,
/// means and covariances they imply (M-step, `reg_covar` added to each diagonal). The
/// returned mixture's `mean_log_likelihood` is that of `g` on `data`, the quantity EM
/// increases.
pub fn em_step(
    g: &GaussianMixture,
    data: &[f32],
    reg_covar: f64,
) -> Result<GaussianMixture, GmmError> {
    let (k, d) = (g.k, g.d);
    let n = (data.len() / d) as f64;
    let st: Stats = data
        .par_chunks(CHUNK_ROWS * d)
        .map(|chunk| {
            let mut s = Stats::new(k, d);
            let mut ll = lanes::LogSum::default();
            g.for_each_scored_row(chunk, |row, lp| {
                ll.add(lanes::to_posteriors(lp));
                for (c, &r) in lp.iter().enumerate() {
                    if r > lanes::MIN_RESPONSIBILITY {
                        s.accumulate(row, c, r, d);
                    }
                }
            });
            s.ll = ll.total();
            s
        })
        .collect::<Vec<_>>()
        .into_iter()
        .reduce(Stats::add)
        .expect("data not empty");
    let (w, m, c) = m_step(&st, k, d, n, reg_covar, Some(g));
    let mut next = GaussianMixture::new(k, d, w, m, c)?;
    next.mean_log_likelihood = st.ll / n;
    Ok(next)
}

/// Fits a mixture by EM, starting from hard `labels` (values `< k`) of the rows of `data`.
pub fn fit(
    data: &[f32],
    d: usize,
    labels: &[u16],
    p: &Checked<GmmParams>,
) -> Result<GaussianMixture, GmmError> {
    let k = p.k;
    let n = (data.len() / d) as f64;
    // Initial M-step from the hard partition.
    let init: Stats = data
        .par_chunks(CHUNK_ROWS * d)
        .zip(labels.par_chunks(CHUNK_ROWS))
        .map(|(chunk, lab)| {
            let mut s = Stats::new(k, d);
            for (row, &l) in chunk.chunks_exact(d).zip(lab) {
                s.accumulate(row, l as usize, 1.0, d);
            }
            s
        })
        .collect::<Vec<_>>()
        .into_iter()
        .reduce(Stats::add)
        .expect("data not empty");
    let (w, m, c) = m_step(&init, k, d, n, p.reg_covar, None);
    let mut g = GaussianMixture::new(k, d, w, m, c)?;
    let mut prev_ll = f64::NEG_INFINITY;
    for it in 0..p.max_iter {
        let mut next = em_step(&g, data, p.reg_covar)?;
        next.iterations = it + 1;
        let ll = next.mean_log_likelihood;
        let done = (ll - prev_ll).abs() < p.tol;
        prev_ll = ll;
        g = next;
        if done {
            g.converged = true;
            break;
        }
    }
    g.mean_log_likelihood = g.score(data);
    Ok(g)
}

/// The Gaussian-mixture phases a field is labelled with.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Phases {
    /// The mixture.
    pub model: GaussianMixture,
}

impl PhaseModel for Phases {
    const METHOD: Method = Method::Gmm;
    type Scorer<'a> = &'a GaussianMixture;

    fn k(&self) -> usize {
        self.model.k
    }
    fn d(&self) -> usize {
        self.model.d
    }
    fn means(&self) -> &[f64] {
        &self.model.means
    }
    fn weights(&self) -> Option<&[f64]> {
        Some(&self.model.weights)
    }
    fn on_counts(&self) -> bool {
        false
    }
    fn check_own(&self) -> Result<(), String> {
        let (k, d) = (self.model.k, self.model.d);
        super::check_weights(&self.model.weights, k)?;
        super::check_len("means", &self.model.means, k * d)?;
        super::check_len("covariances", &self.model.covariances, k * d * d)
    }
    fn refresh(&mut self) -> Result<(), String> {
        self.model.refresh().map_err(|e| e.to_string())
    }
    fn with_mean(&self, c: usize, mean: &[f64]) -> Self {
        let d = self.model.d;
        let mut out = self.clone();
        out.model.means[c * d..(c + 1) * d].copy_from_slice(mean);
        out.model.refresh().expect("covariances unchanged");
        out
    }
    fn without(&self, c: usize) -> Self {
        let (m, d) = (&self.model, self.model.d);
        let mut out = m.clone();
        out.weights = super::renormalised(super::drop_rows(&m.weights, c, 1));
        out.means = super::drop_rows(&m.means, c, d);
        out.covariances = super::drop_rows(&m.covariances, c, d * d);
        out.k -= 1;
        out.refresh().expect("the remaining covariances were valid");
        Phases { model: out }
    }
    /// The pooled weight, mean and covariance (within plus between the two).
    fn merged(&self, a: usize, b: usize) -> Self {
        let (g, d) = (&self.model, self.model.d);
        let mut m = g.clone();
        let (wa, wb) = (g.weights[a], g.weights[b]);
        let w = wa + wb;
        let mean: Vec<f64> = (0..d)
            .map(|j| (wa * g.means[a * d + j] + wb * g.means[b * d + j]) / w)
            .collect();
        for i in 0..d {
            for j in 0..d {
                let da = (g.means[a * d + i] - mean[i]) * (g.means[a * d + j] - mean[j]);
                let db = (g.means[b * d + i] - mean[i]) * (g.means[b * d + j] - mean[j]);
                m.covariances[a * d * d + i * d + j] = (wa
                    * (g.covariances[a * d * d + i * d + j] + da)
                    + wb * (g.covariances[b * d * d + i * d + j] + db))
                    / w;
            }
        }
        m.means[a * d..(a + 1) * d].copy_from_slice(&mean);
        m.weights[a] = w;
        m.weights[b] = 0.0;
        Phases { model: m }.without(b)
    }
    /// The weighted mean of the covariance diagonals.
    fn noise_variance(&self) -> f64 {
        let (g, d) = (&self.model, self.model.d);
        (0..g.k)
            .map(|c| {
                let diag: f64 = (0..d).map(|i| g.covariances[c * d * d + i * d + i]).sum();
                g.weights[c] * diag / d as f64
            })
            .sum()
    }
    fn scorer(&self) -> &GaussianMixture {
        &self.model
    }
    /// EM from the partition.
    fn fit_from_partition(
        rows: &[f32],
        d: usize,
        start: &[u16],
        k: usize,
        _options: &FitOptions,
        _rng: &mut rand_chacha::ChaCha8Rng,
    ) -> Result<Self, String> {
        let p = GmmParams::new(k).check()?;
        let model = fit(rows, d, start, &p).map_err(|e| e.to_string())?;
        Ok(Phases { model })
    }
}

impl Scoring for GaussianMixture {
    #[inline]
    fn score(&self, c: usize, row: &[f32]) -> f64 {
        self.weighted_log_density(c, row)
    }
    #[inline]
    fn score_block(&self, xt: &[Lane], out: &mut [[f64; LANES]]) {
        self.weighted_log_density_block(xt, out)
    }
    #[inline]
    fn discrepancy(&self, c: usize, row: &[f32]) -> f64 {
        f64::from(self.mahalanobis2(c, row))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// BIC check values of references.md §10: parameter counts from scikit-learn 1.9.1's
    /// `_n_parameters` for full covariances, and BIC for N = 1000, ln L̂ = −1234.5, K = 3,
    /// d = 2 (computed there).
    #[test]
    fn parameter_counts_and_bic() {
        for ((k, d), p) in [
            ((1, 1), 2),
            ((2, 2), 11),
            ((3, 2), 17),
            ((4, 3), 39),
            ((5, 4), 74),
        ] {
            assert_eq!(n_parameters(k, d), p, "k={k} d={d}");
        }
        assert!((bic(-1234.5, 17, 1000) - 2586.432).abs() < 1e-3);
    }

    #[test]
    fn recovers_a_known_mixture() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let n01 = Normal::new(0.0f64, 1.0).unwrap();
        let mut data = Vec::new();
        let mut labels = Vec::new();
        // Component 0: mean (0,0), cov [[1, .8],[.8, 1]]; component 1: mean (6, 0), cov diag(.25, 4).
        for i in 0..6000 {
            let (a, b) = (n01.sample(&mut rng), n01.sample(&mut rng));
            if i % 3 == 0 {
                data.extend([(6.0 + 0.5 * a) as f32, (2.0 * b) as f32]);
                labels.push(1);
            } else {
                data.extend([a as f32, (0.8 * a + 0.6 * b) as f32]);
                labels.push(0);
            }
        }
        let g = fit(
            &data,
            2,
            &labels,
            &GmmParams {
                k: 2,
                max_iter: 100,
                tol: 1e-8,
                reg_covar: 1e-6,
            }
            .check()
            .unwrap(),
        )
        .unwrap();
        assert!((g.weights[1] - 1.0 / 3.0).abs() < 0.02, "{:?}", g.weights);
        assert!((g.covariances[1] - 0.8).abs() < 0.06, "{:?}", g.covariances);
        assert!(
            (g.covariances[4 + 3] - 4.0).abs() < 0.3,
            "{:?}",
            g.covariances
        );
        assert!(g.converged);
        let pred = g.predict(&data);
        let agree = pred.iter().zip(&labels).filter(|(a, b)| a == b).count();
        assert!(agree as f64 / 6000.0 > 0.995);
    }
}
