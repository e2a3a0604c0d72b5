//! k-means (Lloyd's algorithm) with k-means++ seeding (Arthur & Vassilvitskii 2007) and
//! seeded restarts.
//!
//! Data are `f32` rows (pixel-major); sums are accumulated in `f64` per fixed-size chunk
//! and combined in chunk order, so the result is the same whatever the thread count.

use rand::seq::index::sample as sample_indices;
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::lanes::{self, Lane, LANES};
use super::model::{check_iterations, Checked, FitOptions, PhaseModel, Scoring, Seed};
use super::Method;

/// Rows per parallel work unit. Fixed, so reductions do not depend on the thread count.
pub const CHUNK_ROWS: usize = 4096;

/// Options of a k-means fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct KMeansParams {
    /// Number of clusters.
    pub k: usize,
    /// Independent seeded restarts; the lowest inertia wins.
    pub n_init: usize,
    /// Iteration limit per restart.
    pub max_iter: usize,
    /// Stop when the summed squared centre shift falls below `tol` × the mean feature
    /// variance (the convention of scikit-learn's KMeans).
    pub tol: f64,
}

impl KMeansParams {
    /// The options of a fit from a partition or from k-means++ seeds, as the phase
    /// models use them: 300 iterations, tolerance 10⁻⁴ (scikit-learn's defaults).
    pub fn new(k: usize, n_init: usize) -> KMeansParams {
        KMeansParams {
            k,
            n_init,
            max_iter: 300,
            tol: 1e-4,
        }
    }

    /// Checks every rule: at least one cluster and one restart, a finite tolerance.
    pub fn check(self) -> Result<Checked<KMeansParams>, String> {
        if self.k == 0 || self.n_init == 0 {
            return Err(format!(
                "k-means with {} clusters and {} restarts; both must be at least 1",
                self.k, self.n_init
            ));
        }
        check_iterations(self.max_iter, self.tol)?;
        Ok(Checked(self))
    }
}

/// A fitted k-means model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KMeans {
    /// Number of clusters.
    pub k: usize,
    /// Feature dimensions.
    pub d: usize,
    /// Centroids, `k × d`, row-major.
    pub centroids: Vec<f64>,
    /// Sum of squared distances of the fitted rows to their centroid.
    pub inertia: f64,
    /// Lloyd iterations of the winning restart.
    pub iterations: usize,
}

/// Squared Euclidean distance between an `f32` row and an `f32` centre.
#[inline]
pub fn dist2(a: &[f32], b: &[f32]) -> f32 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// Index and squared distance of the nearest centre (`centres` is `k × d`, `f32`).
#[inline]
pub fn nearest(row: &[f32], centres: &[f32], d: usize) -> (usize, f32) {
    let mut best = (0, f32::INFINITY);
    for (j, c) in centres.chunks_exact(d).enumerate() {
        let e = dist2(row, c);
        if e < best.1 {
            best = (j, e);
        }
    }
    best
}

/// What one assignment pass over the rows finds.
#[derive(Debug, Clone, PartialEq)]
pub struct Assignment {
    /// Per cluster, the sum of its rows (`k × d`).
    pub sums: Vec<f64>,
    /// Rows per cluster.
    pub counts: Vec<f64>,
    /// Sum of squared distances of the rows to their nearest centre.
    pub inertia: f64,
}

/// One assignment pass (the cost of a Lloyd iteration): every row to its nearest centre
/// (`centres` is `k × d`), with per-cluster sums, counts and the inertia.
pub fn assign_pass(data: &[f32], d: usize, centres: &[f32], k: usize) -> Assignment {
    let parts: Vec<Assignment> = data
        .par_chunks(CHUNK_ROWS * d)
        .map(|chunk| {
            let mut p = Assignment {
                sums: vec![0.0; k * d],
                counts: vec![0.0; k],
                inertia: 0.0,
            };
            lanes::for_each_block(chunk, d, |rows, xt| {
                let (near, dist) = lanes::nearest(xt, centres, d);
                for (l, row) in rows.chunks_exact(d).enumerate() {
                    let j = near[l];
                    p.counts[j] += 1.0;
                    p.inertia += f64::from(dist[l]);
                    for (s, &x) in p.sums[j * d..(j + 1) * d].iter_mut().zip(row) {
                        *s += f64::from(x);
                    }
                }
            });
            p
        })
        .collect();
    parts
        .into_iter()
        .reduce(|mut a, b| {
            a.sums.iter_mut().zip(&b.sums).for_each(|(x, y)| *x += y);
            a.counts
                .iter_mut()
                .zip(&b.counts)
                .for_each(|(x, y)| *x += y);
            a.inertia += b.inertia;
            a
        })
        .expect("at least one chunk")
}

/// k-means++ seeding, greedy form: each new centre is the best of 2 + ⌊ln k⌋ candidates
/// drawn with probability ∝ D(x)² (Arthur & Vassilvitskii 2007; the greedy trials are what
/// scikit-learn does by default).
pub fn kmeans_plus_plus(data: &[f32], d: usize, k: usize, rng: &mut ChaCha8Rng) -> Vec<f32> {
    let n = data.len() / d;
    let trials = 2 + (k as f64).ln().floor() as usize;
    let mut centres = Vec::with_capacity(k * d);
    let first = rng.random_range(0..n);
    centres.extend_from_slice(&data[first * d..(first + 1) * d]);
    let mut closest: Vec<f32> = data
        .par_chunks_exact(d)
        .map(|r| dist2(r, &centres[..d]))
        .collect();
    for _ in 1..k {
        let total: f64 = closest.iter().map(|&v| f64::from(v)).sum();
        let mut best: Option<(f64, usize, Vec<f32>)> = None;
        for _ in 0..trials {
            let cand = if total > 0.0 {
                let mut target = rng.random_range(0.0..total);
                let mut pick = n - 1;
                for (i, &v) in closest.iter().enumerate() {
                    target -= f64::from(v);
                    if target < 0.0 {
                        pick = i;
                        break;
                    }
                }
                pick
            } else {
                rng.random_range(0..n)
            };
            let c = &data[cand * d..(cand + 1) * d];
            let new_closest: Vec<f32> = data
                .par_chunks_exact(d)
                .zip(&closest)
                .map(|(r, &old)| old.min(dist2(r, c)))
                .collect();
            let pot: f64 = new_closest.iter().map(|&v| f64::from(v)).sum();
            if best.as_ref().is_none_or(|b| pot < b.0) {
                best = Some((pot, cand, new_closest));
            }
        }
        let (_, cand, new_closest) = best.expect("at least one trial");
        centres.extend_from_slice(&data[cand * d..(cand + 1) * d]);
        closest = new_closest;
    }
    centres
}

fn mean_variance(data: &[f32], d: usize) -> f64 {
    let n = (data.len() / d) as f64;
    let mut s = vec![0.0f64; d];
    let mut s2 = vec![0.0f64; d];
    for row in data.chunks_exact(d) {
        for j in 0..d {
            let x = f64::from(row[j]);
            s[j] += x;
            s2[j] += x * x;
        }
    }
    (0..d).map(|j| s2[j] / n - (s[j] / n).powi(2)).sum::<f64>() / d as f64
}

fn lloyd(
    data: &[f32],
    d: usize,
    mut centres: Vec<f32>,
    p: &KMeansParams,
    tol: f64,
    rng: &mut ChaCha8Rng,
) -> KMeans {
    let k = p.k;
    let mut iterations = 0;
    let mut last_inertia = f64::INFINITY;
    for it in 0..p.max_iter {
        iterations = it + 1;
        let part = assign_pass(data, d, &centres, k);
        last_inertia = part.inertia;
        let mut shift = 0.0f64;
        let mut new = centres.clone();
        for j in 0..k {
            if part.counts[j] > 0.0 {
                for t in 0..d {
                    new[j * d + t] = (part.sums[j * d + t] / part.counts[j]) as f32;
                }
            } else {
                // An empty cluster restarts on a random row (seeded).
                let r = rng.random_range(0..data.len() / d);
                new[j * d..(j + 1) * d].copy_from_slice(&data[r * d..(r + 1) * d]);
            }
            shift += f64::from(dist2(
                &new[j * d..(j + 1) * d],
                &centres[j * d..(j + 1) * d],
            ));
        }
        centres = new;
        if shift <= tol {
            // Inertia of the final centres.
            last_inertia = assign_pass(data, d, &centres, k).inertia;
            break;
        }
    }
    KMeans {
        k,
        d,
        centroids: centres.iter().map(|&c| f64::from(c)).collect(),
        inertia: last_inertia,
        iterations,
    }
}

/// Fits k-means to `data` (`n × d` rows). `n` must be at least `k`.
pub fn fit(data: &[f32], d: usize, p: &Checked<KMeansParams>, seed: Seed) -> KMeans {
    let tol = p.tol * mean_variance(data, d);
    let mut best: Option<KMeans> = None;
    for run in 0..p.n_init {
        let mut rng = seed.restart(run);
        let init = kmeans_plus_plus(data, d, p.k, &mut rng);
        let m = lloyd(data, d, init, p, tol, &mut rng);
        if best.as_ref().is_none_or(|b| m.inertia < b.inertia) {
            best = Some(m);
        }
    }
    best.expect("n_init ≥ 1")
}

/// Runs Lloyd's iterations from the given centres (`k × d`, `p.k` rows); `p.n_init` is
/// not used. An emptied cluster restarts on a row drawn from `rng`.
pub fn fit_from(
    data: &[f32],
    d: usize,
    centres: Vec<f32>,
    p: &Checked<KMeansParams>,
    rng: &mut ChaCha8Rng,
) -> KMeans {
    debug_assert_eq!(centres.len(), p.k * d);
    let tol = p.tol * mean_variance(data, d);
    lloyd(data, d, centres, p, tol, rng)
}

impl KMeans {
    /// Centroids as `f32` for the hot loops.
    pub fn centres_f32(&self) -> Vec<f32> {
        self.centroids.iter().map(|&c| c as f32).collect()
    }

    /// Nearest-centroid labels of `data` rows.
    pub fn predict(&self, data: &[f32]) -> Vec<u16> {
        let c = self.centres_f32();
        let d = self.d;
        data.par_chunks(CHUNK_ROWS * d)
            .flat_map_iter(|chunk| {
                let mut out = Vec::with_capacity(chunk.len() / d);
                lanes::for_each_block(chunk, d, |rows, xt| {
                    let near = lanes::nearest(xt, &c, d).0;
                    out.extend(near[..rows.len() / d].iter().map(|&j| j as u16));
                });
                out
            })
            .collect()
    }
}

/// A seeded subset of `n` row indices of size at most `max`, in ascending order.
pub fn sample_rows(n: usize, max: usize, seed: Seed) -> Vec<usize> {
    if n <= max {
        return (0..n).collect();
    }
    let mut idx = sample_indices(&mut seed.sampling(), n, max).into_vec();
    idx.sort_unstable();
    idx
}

/// The k-means phases a field is labelled with: the centroids, and one isotropic noise
/// variance for every cluster (the pooled within-cluster variance), which makes the
/// distances scores.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Phases {
    /// The centroids.
    pub model: KMeans,
    /// Per-dimension noise variance.
    pub variance: f64,
}

impl PhaseModel for Phases {
    const METHOD: Method = Method::Kmeans;
    type Scorer<'a> = Scorer;

    fn k(&self) -> usize {
        self.model.k
    }
    fn d(&self) -> usize {
        self.model.d
    }
    fn means(&self) -> &[f64] {
        &self.model.centroids
    }
    fn weights(&self) -> Option<&[f64]> {
        None
    }
    fn on_counts(&self) -> bool {
        false
    }
    fn check_own(&self) -> Result<(), String> {
        super::check_len(
            "centroids",
            &self.model.centroids,
            self.model.k * self.model.d,
        )?;
        if !(self.variance.is_finite() && self.variance > 0.0) {
            return Err(format!(
                "the noise variance is {}, not positive",
                self.variance
            ));
        }
        Ok(())
    }
    fn refresh(&mut self) -> Result<(), String> {
        Ok(())
    }
    fn with_mean(&self, c: usize, mean: &[f64]) -> Self {
        let d = self.model.d;
        let mut out = self.clone();
        out.model.centroids[c * d..(c + 1) * d].copy_from_slice(mean);
        out
    }
    fn without(&self, c: usize) -> Self {
        let mut out = self.clone();
        out.model.centroids = super::drop_rows(&self.model.centroids, c, self.model.d);
        out.model.k -= 1;
        out
    }
    fn merged(&self, a: usize, b: usize) -> Self {
        let d = self.model.d;
        let mut out = self.clone();
        for j in 0..d {
            out.model.centroids[a * d + j] =
                0.5 * (self.model.centroids[a * d + j] + self.model.centroids[b * d + j]);
        }
        out.without(b)
    }
    fn noise_variance(&self) -> f64 {
        self.variance
    }
    fn scorer(&self) -> Scorer {
        let var = self.variance.max(1e-12);
        let d = self.model.d as f64;
        Scorer {
            centres: self.model.centres_f32(),
            d: self.model.d,
            inv_var: (1.0 / var) as f32,
            log_norm: -(self.model.k as f64).ln()
                - 0.5 * d * (2.0 * std::f64::consts::PI * var).ln(),
        }
    }
    /// Lloyd's iterations from the mean features of each part of the partition.
    fn fit_from_partition(
        rows: &[f32],
        d: usize,
        start: &[u16],
        k: usize,
        options: &FitOptions,
        rng: &mut ChaCha8Rng,
    ) -> Result<Self, String> {
        let mut size = vec![0.0f64; k];
        let mut sums = vec![0.0f64; k * d];
        for (row, &c) in rows.chunks_exact(d).zip(start) {
            size[usize::from(c)] += 1.0;
            for (s, &x) in sums[usize::from(c) * d..].iter_mut().zip(row) {
                *s += f64::from(x);
            }
        }
        let mut centres = vec![0.0f32; k * d];
        for c in 0..k {
            for t in 0..d {
                centres[c * d + t] = (sums[c * d + t] / size[c].max(1.0)) as f32;
            }
        }
        let p = KMeansParams::new(k, options.n_init).check()?;
        let model = fit_from(rows, d, centres, &p, rng);
        let variance = model.inertia / (start.len() * d) as f64;
        Ok(Phases { model, variance })
    }
}

/// Scores of a k-means model: an isotropic Gaussian of the pooled variance around each
/// centroid, with equal weights.
pub struct Scorer {
    centres: Vec<f32>,
    d: usize,
    inv_var: f32,
    log_norm: f64,
}

impl Scoring for Scorer {
    #[inline]
    fn score(&self, c: usize, row: &[f32]) -> f64 {
        self.log_norm - 0.5 * self.discrepancy(c, row)
    }
    #[inline]
    fn score_block(&self, xt: &[Lane], out: &mut [[f64; LANES]]) {
        let d = self.d;
        for (c, o) in out[..self.centres.len() / d].iter_mut().enumerate() {
            let e = lanes::dist2(xt, &self.centres[c * d..(c + 1) * d]);
            for l in 0..LANES {
                o[l] = self.log_norm - 0.5 * f64::from(e[l] * self.inv_var);
            }
        }
    }
    #[inline]
    fn discrepancy(&self, c: usize, row: &[f32]) -> f64 {
        let d = self.d;
        f64::from(dist2(row, &self.centres[c * d..(c + 1) * d]) * self.inv_var)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};

    pub(crate) fn blobs(centres: &[[f32; 2]], per: usize, sd: f32, seed: u64) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let noise = Normal::new(0.0f32, sd).unwrap();
        let mut v = Vec::new();
        for c in centres {
            for _ in 0..per {
                v.push(c[0] + noise.sample(&mut rng));
                v.push(c[1] + noise.sample(&mut rng));
            }
        }
        v
    }

    #[test]
    fn finds_separated_blobs() {
        let centres = [[0.0, 0.0], [10.0, 0.0], [0.0, 10.0]];
        let data = blobs(&centres, 500, 1.0, 1);
        let m = fit(
            &data,
            2,
            &KMeansParams {
                k: 3,
                n_init: 3,
                max_iter: 100,
                tol: 1e-6,
            }
            .check()
            .unwrap(),
            Seed(9),
        );
        for c in centres {
            let near = m.centroids.chunks(2).any(|m| {
                (m[0] - f64::from(c[0])).abs() < 0.2 && (m[1] - f64::from(c[1])).abs() < 0.2
            });
            assert!(near, "{c:?} not found in {:?}", m.centroids);
        }
        let labels = m.predict(&data);
        for b in 0..3 {
            let l = labels[b * 500];
            assert!(labels[b * 500..(b + 1) * 500].iter().all(|&x| x == l));
        }
    }

    #[test]
    fn same_result_with_one_or_many_threads() {
        let data = blobs(&[[0.0, 0.0], [3.0, 1.0], [1.0, 4.0]], 7000, 1.2, 2);
        let p = KMeansParams {
            k: 3,
            n_init: 2,
            max_iter: 50,
            tol: 1e-8,
        }
        .check()
        .unwrap();
        let one = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap()
            .install(|| fit(&data, 2, &p, Seed(4)));
        let four = rayon::ThreadPoolBuilder::new()
            .num_threads(4)
            .build()
            .unwrap()
            .install(|| fit(&data, 2, &p, Seed(4)));
        assert_eq!(one, four);
    }

    #[test]
    fn sample_rows_is_seeded_sorted_and_unique() {
        let a = sample_rows(1000, 100, Seed(5));
        assert_eq!(a, sample_rows(1000, 100, Seed(5)));
        assert_ne!(a, sample_rows(1000, 100, Seed(6)));
        assert!(a.windows(2).all(|w| w[0] < w[1]));
        assert_eq!(sample_rows(50, 100, Seed(5)), (0..50).collect::<Vec<_>>());
    }
}
