//! Mixture of independent Poisson distributions, fitted by EM: the likelihood model that
//! matches how an EDS map is made.
//!
//! A pixel of phase k records, for each element e, a Poisson number of counts with rate
//! λₖₑ. Unlike a Gaussian fitted to (transformed) counts, this is exact at low counts: the
//! 0, 1, 2 … counts of a minor element in a major phase are what a Poisson rate predicts,
//! so a homogeneous phase is never split to mimic its skew or its integer lattice, and BIC
//! compares phase counts on the true noise model.
//!
//! EM (Dempster, Laird & Rubin 1977): responsibilities r ∝ wₖ Πₑ Pois(xₑ | λₖₑ), then
//! λₖₑ = Σ r xₑ / Σ r and wₖ = Σ r / n. Sums in `f64` per fixed chunk, combined in order.

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::kmeans::CHUNK_ROWS;
use super::lanes::{self, Lane, LANES};
use super::model::{check_iterations, Checked, FitOptions, PhaseModel, Scoring};
use super::Method;

/// Smallest rate allowed, counts per pixel: keeps ln λ finite for an element a phase
/// never shows (common practice, no source).
pub const MIN_RATE: f64 = 1e-3;

/// A fitted Poisson mixture.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PoissonMixture {
    /// Components.
    pub k: usize,
    /// Elements.
    pub d: usize,
    /// Mixing weights.
    pub weights: Vec<f64>,
    /// Rates, `k × d`, counts per pixel.
    pub rates: Vec<f64>,
    /// Mean log-likelihood per fitted row (without the Σ ln xₑ! term, which does not
    /// depend on the model).
    pub mean_log_likelihood: f64,
    /// EM iterations run.
    pub iterations: usize,
    /// Whether EM met its tolerance.
    pub converged: bool,
    #[serde(skip)]
    cache: Cache,
}

#[derive(Debug, Clone, Default, PartialEq)]
struct Cache {
    ln_rates: Vec<f32>,
    /// ln wₖ − Σₑ λₖₑ.
    offset: Vec<f64>,
}

/// ln x! for the log-likelihood reported to BIC; Stirling with two correction terms above
/// 20, exact below (common practice, no source).
pub fn ln_factorial(x: f64) -> f64 {
    // The exact sums below 20, computed once (every fit sums ln x! over its rows).
    static SMALL: std::sync::OnceLock<[f64; 20]> = std::sync::OnceLock::new();
    let x = x.max(0.0).round();
    if x < 20.0 {
        let small = SMALL
            .get_or_init(|| std::array::from_fn(|x| (2..=x as u64).map(|i| (i as f64).ln()).sum()));
        small[x as usize]
    } else {
        x * x.ln() - x + 0.5 * (2.0 * std::f64::consts::PI * x).ln() + 1.0 / (12.0 * x)
            - 1.0 / (360.0 * x.powi(3))
    }
}

impl PoissonMixture {
    /// A mixture from weights and rates.
    pub fn new(k: usize, d: usize, weights: Vec<f64>, rates: Vec<f64>) -> Self {
        let mut m = PoissonMixture {
            k,
            d,
            weights,
            rates,
            mean_log_likelihood: f64::NEG_INFINITY,
            iterations: 0,
            converged: false,
            cache: Cache::default(),
        };
        m.refresh();
        m
    }

    /// Rebuilds the cache after editing or deserialising.
    pub fn refresh(&mut self) {
        for r in &mut self.rates {
            *r = r.max(MIN_RATE);
        }
        let d = self.d;
        self.cache = Cache {
            ln_rates: self.rates.iter().map(|&r| r.ln() as f32).collect(),
            offset: (0..self.k)
                .map(|c| {
                    self.weights[c].max(1e-300).ln()
                        - self.rates[c * d..(c + 1) * d].iter().sum::<f64>()
                })
                .collect(),
        };
    }

    /// ln (wₖ Πₑ Pois(xₑ | λₖₑ)) + Σₑ ln xₑ! (that term is shared by all components).
    #[inline]
    pub fn weighted_log_density(&self, c: usize, row: &[f32]) -> f64 {
        let lr = &self.cache.ln_rates[c * self.d..(c + 1) * self.d];
        let s: f32 = row.iter().zip(lr).map(|(x, l)| x * l).sum();
        self.cache.offset[c] + f64::from(s)
    }

    /// Poisson deviance of `row` from component `c`: 2 Σ [x ln(x/λ) − (x − λ)], approximately
    /// χ² with d degrees of freedom for a pixel of that phase.
    pub fn deviance(&self, c: usize, row: &[f32]) -> f64 {
        deviance(row, &self.rates[c * self.d..(c + 1) * self.d])
    }

    /// [`Self::weighted_log_density`] of each lane's row of a transposed block (see
    /// [`lanes`]) for every component: `out[c][l]`; bit-identical to the one-row version.
    #[inline]
    pub fn weighted_log_density_block(&self, xt: &[Lane], out: &mut [[f64; LANES]]) {
        let d = self.d;
        for (c, o) in out[..self.k].iter_mut().enumerate() {
            let s = lanes::dot(xt, &self.cache.ln_rates[c * d..(c + 1) * d]);
            for l in 0..LANES {
                o[l] = self.cache.offset[c] + f64::from(s[l]);
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

    /// Free parameters: k·d rates + (k − 1) weights.
    pub fn n_parameters(&self) -> usize {
        self.k * self.d + self.k - 1
    }

    /// BIC on `n` rows (Schwarz 1978).
    pub fn bic(&self, n: usize) -> f64 {
        super::gmm::bic(self.mean_log_likelihood * n as f64, self.n_parameters(), n)
    }
}

/// Poisson deviance of counts `x` from rates `lambda`.
pub fn deviance(x: &[f32], lambda: &[f64]) -> f64 {
    x.iter()
        .zip(lambda)
        .map(|(&x, &l)| {
            let (x, l) = (f64::from(x), l.max(MIN_RATE));
            if x > 0.0 {
                2.0 * (x * (x / l).ln() - (x - l))
            } else {
                2.0 * l
            }
        })
        .sum()
}

/// Options of an EM fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PoissonParams {
    /// Iteration limit.
    pub max_iter: usize,
    /// Stop when the mean log-likelihood per row improves by less than this.
    pub tol: f64,
}

impl PoissonParams {
    /// Checks every rule: at least one iteration, a non-negative tolerance.
    pub fn check(self) -> Result<Checked<PoissonParams>, String> {
        check_iterations(self.max_iter, self.tol)?;
        Ok(Checked(self))
    }
}

/// EM run to convergence: 300 iterations at most, tolerance 10⁻⁵ in mean log-likelihood
/// per row (common practice, no source).
pub const EM: Checked<PoissonParams> = Checked(PoissonParams {
    max_iter: 300,
    tol: 1e-5,
});

/// A short EM that ranks candidate starts (common practice, no source).
pub const SHORT_EM: Checked<PoissonParams> = Checked(PoissonParams {
    max_iter: 15,
    tol: 1e-4,
});

/// Rates and weights of a hard partition (`labels` values `< k`): the starting point of EM.
pub fn from_labels(data: &[f32], d: usize, labels: &[u16], k: usize) -> PoissonMixture {
    let mut nk = vec![0.0f64; k];
    let mut s = vec![0.0f64; k * d];
    for (row, &l) in data.chunks_exact(d).zip(labels) {
        let l = l as usize;
        nk[l] += 1.0;
        for e in 0..d {
            s[l * d + e] += f64::from(row[e]);
        }
    }
    let n: f64 = nk.iter().sum();
    let weights = nk.iter().map(|&c| (c / n).max(1e-12)).collect();
    let rates = (0..k * d)
        .map(|i| {
            if nk[i / d] > 0.0 {
                s[i] / nk[i / d]
            } else {
                MIN_RATE
            }
        })
        .collect();
    PoissonMixture::new(k, d, weights, rates)
}

/// ln Σₖ wₖ Pois(row | λₖ) summed over `data`, minus Σ ln x! (a true log-likelihood).
fn total_log_likelihood(m: &PoissonMixture, data: &[f32]) -> f64 {
    let d = m.d;
    data.par_chunks(CHUNK_ROWS * d)
        .map(|chunk| {
            let mut ll = 0.0;
            m.for_each_scored_row(chunk, |_, lp| ll += lanes::best_and_log_sum(lp).2);
            ll
        })
        .collect::<Vec<_>>()
        .iter()
        .sum()
}

/// One EM iteration: responsibilities of every row under `m` (E-step), then the rates and
/// weights they imply (M-step). Also returns ln Σₖ wₖ Pois(row | λₖ) + ln x! summed over
/// the rows under `m` (the log-likelihood without the model-free Σ ln x! term).
pub fn em_step(m: &PoissonMixture, data: &[f32]) -> (PoissonMixture, f64) {
    let (k, d) = (m.k, m.d);
    let n = (data.len() / d) as f64;
    let (nk, s, ll) = data
        .par_chunks(CHUNK_ROWS * d)
        .map(|chunk| {
            let mut nk = vec![0.0; k];
            let mut s = vec![0.0; k * d];
            let mut ll = lanes::LogSum::default();
            m.for_each_scored_row(chunk, |row, lp| {
                ll.add(lanes::to_posteriors(lp));
                for (c, &r) in lp.iter().enumerate() {
                    if r > lanes::MIN_RESPONSIBILITY {
                        nk[c] += r;
                        for e in 0..d {
                            s[c * d + e] += r * f64::from(row[e]);
                        }
                    }
                }
            });
            (nk, s, ll.total())
        })
        .collect::<Vec<_>>()
        .into_iter()
        .reduce(|mut a, b| {
            a.0.iter_mut().zip(&b.0).for_each(|(x, y)| *x += y);
            a.1.iter_mut().zip(&b.1).for_each(|(x, y)| *x += y);
            a.2 += b.2;
            a
        })
        .expect("data not empty");
    let weights = nk.iter().map(|&c| (c / n).max(1e-12)).collect();
    let rates = (0..k * d)
        .map(|i| {
            if nk[i / d] > 1e-9 {
                (s[i] / nk[i / d]).max(MIN_RATE)
            } else {
                m.rates[i]
            }
        })
        .collect();
    (PoissonMixture::new(k, d, weights, rates), ll)
}

/// Rows to fit on (`d` values each) with their Σ ln x!, which every fit on them needs and
/// which is worked out once here (a sweep fits the same sample some fifty times).
pub struct Sample<'a> {
    data: &'a [f32],
    d: usize,
    sum_ln_fact: f64,
}

impl<'a> Sample<'a> {
    /// The rows `data`, `d` values each.
    pub fn new(data: &'a [f32], d: usize) -> Sample<'a> {
        let sum_ln_fact = data
            .par_chunks(CHUNK_ROWS * d)
            .map(|c| c.iter().map(|&x| ln_factorial(f64::from(x))).sum::<f64>())
            .collect::<Vec<_>>()
            .iter()
            .sum();
        Sample {
            data,
            d,
            sum_ln_fact,
        }
    }

    /// The rows.
    pub fn rows(&self) -> &'a [f32] {
        self.data
    }
}

/// Refines `start` by EM on `data`. The returned `mean_log_likelihood` includes the
/// −Σ ln x! term, so BIC values computed from it are true ones.
pub fn fit(
    data: &[f32],
    d: usize,
    start: PoissonMixture,
    p: &Checked<PoissonParams>,
) -> PoissonMixture {
    fit_sample(&Sample::new(data, d), start, p)
}

/// [`fit`] on a [`Sample`].
pub fn fit_sample(
    sample: &Sample,
    start: PoissonMixture,
    p: &Checked<PoissonParams>,
) -> PoissonMixture {
    let (data, sum_ln_fact) = (sample.data, sample.sum_ln_fact);
    let n = (data.len() / sample.d) as f64;
    let mut m = start;
    let mut prev = f64::NEG_INFINITY;
    for it in 0..p.max_iter {
        let (mut next, ll) = em_step(&m, data);
        let ll = (ll - sum_ln_fact) / n;
        next.iterations = it + 1;
        let done = (ll - prev).abs() < p.tol;
        prev = ll;
        m = next;
        if done {
            m.converged = true;
            break;
        }
    }
    m.mean_log_likelihood = (total_log_likelihood(&m, data) - sum_ln_fact) / n;
    m
}

/// The Poisson-mixture phases a field is labelled with.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Phases {
    /// The mixture.
    pub model: PoissonMixture,
}

impl PhaseModel for Phases {
    const METHOD: Method = Method::Poisson;
    type Scorer<'a> = &'a PoissonMixture;

    fn k(&self) -> usize {
        self.model.k
    }
    fn d(&self) -> usize {
        self.model.d
    }
    fn means(&self) -> &[f64] {
        &self.model.rates
    }
    fn weights(&self) -> Option<&[f64]> {
        Some(&self.model.weights)
    }
    fn on_counts(&self) -> bool {
        true
    }
    fn check_own(&self) -> Result<(), String> {
        let (k, d) = (self.model.k, self.model.d);
        super::check_weights(&self.model.weights, k)?;
        super::check_len("rates", &self.model.rates, k * d)?;
        for (c, r) in self.model.rates.chunks_exact(d).enumerate() {
            if r.iter().any(|&x| x < 0.0) {
                return Err(format!("phase {} has a negative rate", c + 1));
            }
            if r.iter().all(|&x| x <= MIN_RATE) {
                return Err(format!(
                    "phase {} has no counts in any element (all rates 0)",
                    c + 1
                ));
            }
        }
        Ok(())
    }
    fn refresh(&mut self) -> Result<(), String> {
        self.model.refresh();
        Ok(())
    }
    fn with_mean(&self, c: usize, mean: &[f64]) -> Self {
        let d = self.model.d;
        let mut out = self.clone();
        out.model.rates[c * d..(c + 1) * d].copy_from_slice(mean);
        out.model.refresh();
        out
    }
    fn without(&self, c: usize) -> Self {
        let (m, d) = (&self.model, self.model.d);
        let mut out = m.clone();
        out.weights = super::renormalised(super::drop_rows(&m.weights, c, 1));
        out.rates = super::drop_rows(&m.rates, c, d);
        out.k -= 1;
        out.refresh();
        Phases { model: out }
    }
    /// The pooled weight and the weighted mean rates.
    fn merged(&self, a: usize, b: usize) -> Self {
        let (p, d) = (&self.model, self.model.d);
        let mut m = p.clone();
        let (wa, wb) = (p.weights[a], p.weights[b]);
        for j in 0..d {
            m.rates[a * d + j] = (wa * p.rates[a * d + j] + wb * p.rates[b * d + j]) / (wa + wb);
        }
        m.weights[a] = wa + wb;
        m.weights[b] = 0.0;
        Phases { model: m }.without(b)
    }
    fn noise_variance(&self) -> f64 {
        f64::NAN
    }
    fn scorer(&self) -> &PoissonMixture {
        &self.model
    }
    /// EM from the rates and weights of the partition.
    fn fit_from_partition(
        rows: &[f32],
        d: usize,
        start: &[u16],
        k: usize,
        _options: &FitOptions,
        _rng: &mut rand_chacha::ChaCha8Rng,
    ) -> Result<Self, String> {
        let model = fit(rows, d, from_labels(rows, d, start, k), &EM);
        Ok(Phases { model })
    }
}

impl Scoring for PoissonMixture {
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
        self.deviance(c, row)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_distr::{Distribution, Poisson};

    #[test]
    fn ln_factorial_matches_exact_values() {
        // Exact: ln 5! = ln 120; ln 20! = 42.335616460753485 (from 20! = 2432902008176640000).
        assert!((ln_factorial(5.0) - 120f64.ln()).abs() < 1e-12);
        assert!((ln_factorial(20.0) - 42.335_616_460_753_485).abs() < 1e-9);
        assert!((ln_factorial(19.0) + 20f64.ln() - ln_factorial(20.0)).abs() < 1e-9);
    }

    /// The two fixed EM settings are ones `check` accepts.
    #[test]
    fn fixed_settings_pass_their_checks() {
        assert_eq!(EM.check(), Ok(EM));
        assert_eq!(SHORT_EM.check(), Ok(SHORT_EM));
        assert!(PoissonParams {
            max_iter: 0,
            tol: 1e-5
        }
        .check()
        .is_err());
    }

    #[test]
    fn deviance_is_zero_at_the_rate_and_grows_away() {
        assert!(deviance(&[4.0, 9.0], &[4.0, 9.0]).abs() < 1e-12);
        // 2[x ln(x/λ) − (x − λ)] for x = 0, λ = 3 is 2λ = 6.
        assert!((deviance(&[0.0], &[3.0]) - 6.0).abs() < 1e-12);
        assert!(deviance(&[8.0], &[4.0]) > deviance(&[6.0], &[4.0]));
    }

    #[test]
    fn recovers_rates_of_a_skewed_low_count_mixture() {
        // A big phase with 2 counts of element 1 and a small phase with 6: at these levels a
        // Gaussian is a poor fit, the Poisson mixture is exact.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let mut data = Vec::new();
        let mut labels = Vec::new();
        for i in 0..20_000 {
            let (l, rates) = if i % 20 == 0 {
                (1u16, [6.0, 20.0])
            } else {
                (0u16, [2.0, 30.0])
            };
            for r in rates {
                data.push(Poisson::new(r).unwrap().sample(&mut rng) as f32);
            }
            labels.push(l);
        }
        // Start from a poor partition: halves of the data.
        let init: Vec<u16> = (0..20_000).map(|i| u16::from(i >= 10_000)).collect();
        let start = from_labels(&data, 2, &init, 2);
        let m = fit(
            &data,
            2,
            start,
            &PoissonParams {
                max_iter: 500,
                tol: 1e-9,
            }
            .check()
            .unwrap(),
        );
        let (small, big) = if m.weights[0] < m.weights[1] {
            (0, 1)
        } else {
            (1, 0)
        };
        assert!((m.weights[small] - 0.05).abs() < 0.01, "{:?}", m.weights);
        assert!((m.rates[big * 2] - 2.0).abs() < 0.05, "{:?}", m.rates);
        assert!((m.rates[small * 2 + 1] - 20.0).abs() < 0.5, "{:?}", m.rates);
        let _ = labels;
    }
}
