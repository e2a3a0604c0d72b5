//! Fitting a model to a field's features, with a fixed phase count or one chosen by BIC.

use serde::{Deserialize, Serialize};

use super::kmeans;
use super::model::{FitOptions, Seed};
use super::poisson::{self, PoissonMixture, Sample, EM, SHORT_EM};
use super::{Clusters, Method};
use crate::error::{Error, Result};
use crate::prepare::Features;

/// How many phases to look for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum PhaseCount {
    /// Exactly this many.
    Fixed(usize),
    /// Chosen by BIC among 1..=max.
    Auto {
        /// Largest count tried.
        max: usize,
    },
}

impl std::str::FromStr for PhaseCount {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        if s == "auto" {
            return Ok(PhaseCount::Auto { max: AUTO_MAX });
        }
        if let Some(m) = s.strip_prefix("auto:") {
            return m
                .parse()
                .map(|max| PhaseCount::Auto { max })
                .map_err(|_| format!("`{s}`: write auto or auto:MAX, e.g. auto:12"));
        }
        s.parse()
            .map(PhaseCount::Fixed)
            .map_err(|_| format!("`{s}` is not a phase count; give a number or `auto`"))
    }
}

/// Options of the cluster stage.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ClusterParams {
    /// Method.
    pub method: Method,
    /// Phase count.
    pub phases: PhaseCount,
    /// Seed of every random choice.
    pub seed: u64,
    /// k-means restarts.
    pub n_init: usize,
    /// Largest number of pixels the model is fitted on (a seeded sample beyond that).
    pub sample_size: usize,
}

impl Default for ClusterParams {
    fn default() -> Self {
        ClusterParams {
            method: Method::Poisson,
            phases: PhaseCount::Auto { max: AUTO_MAX },
            seed: 1,
            n_init: 4,
            sample_size: 200_000,
        }
    }
}

/// Checked cluster options.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(transparent)]
pub struct ValidClusterParams(ClusterParams);

impl ValidClusterParams {
    /// The options.
    pub fn get(&self) -> &ClusterParams {
        &self.0
    }
}

impl ClusterParams {
    /// Checks every rule.
    pub fn check(self) -> Result<ValidClusterParams> {
        match self.phases {
            PhaseCount::Fixed(k) if !(1..=64).contains(&k) => {
                return Err(Error::options(
                    format!("--phases {k} is out of range"),
                    "ask for 1 to 64 phases, or --phases auto",
                ))
            }
            PhaseCount::Auto { max } if !(2..=32).contains(&max) => {
                return Err(Error::options(
                    format!("auto phase count up to {max} is out of range"),
                    "use auto:MAX with MAX from 2 to 32",
                ))
            }
            _ => {}
        }
        if self.n_init == 0 || self.n_init > 100 {
            return Err(Error::options(
                format!("{} k-means restarts is out of range", self.n_init),
                "use 1 to 100 restarts",
            ));
        }
        if self.sample_size < 1000 {
            return Err(Error::options(
                format!(
                    "a fitting sample of {} pixels is too small",
                    self.sample_size
                ),
                "fit on at least 1000 pixels",
            ));
        }
        Ok(ValidClusterParams(self))
    }
}

/// One point of the phase-count curve.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CurvePoint {
    /// Phases.
    pub k: usize,
    /// BIC of the mixture with k components on the fitting sample.
    pub bic: f64,
}

/// A fitted model with how it was chosen.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Fit {
    /// The model.
    pub clusters: Clusters,
    /// BIC per phase count (empty for a fixed count).
    pub curve: Vec<CurvePoint>,
    /// Pixels the model was fitted on.
    pub fitted_pixels: usize,
}

/// The pixels that take part, sampled (seeded) down to `max`, in ascending order.
fn fitting_pixels(f: &Features, max: usize, seed: Seed) -> Vec<usize> {
    let active: Vec<usize> = (0..f.pixels()).filter(|&i| f.mask[i]).collect();
    kmeans::sample_rows(active.len(), max, seed)
        .into_iter()
        .map(|j| active[j])
        .collect()
}

/// The rows of the pixels that take part, sampled (seeded) down to `max`.
pub fn fitting_rows(f: &Features, max: usize, seed: Seed) -> Vec<f32> {
    let mut rows = Vec::new();
    for i in fitting_pixels(f, max, seed) {
        rows.extend_from_slice(f.row(i));
    }
    rows
}

/// Fits the chosen method's model with `k` phases, started from a labelling of the same
/// field (`labels`: 0 = none, c + 1 = phase c), on the fitting sample. The phase count and
/// the starting partition come from elsewhere (the Poisson mixture's count, see
/// [`crate::pipeline`]); the model is this method's own: k-means runs Lloyd's iterations
/// from the phases' mean features, the Gaussian mixture runs EM from the partition. A
/// phase with fewer than 2d + 2 rows in the sample gets that many of its pixels from the
/// whole field (its centre and covariance need them).
pub fn fit_from_labels(
    f: &Features,
    labels: &[u16],
    k: usize,
    params: &ValidClusterParams,
) -> Result<Fit> {
    let p = params.get();
    let d = f.dims;
    let labelled = |i: usize| f.mask[i] && labels[i] > 0 && usize::from(labels[i]) <= k;
    let mut pick: Vec<usize> = fitting_pixels(f, p.sample_size, Seed(p.seed))
        .into_iter()
        .filter(|&i| labelled(i))
        .collect();
    // Every phase needs a few rows for its centre and covariance.
    let floor = 2 * d + 2;
    let mut sampled = vec![0usize; k];
    for &i in &pick {
        sampled[usize::from(labels[i]) - 1] += 1;
    }
    let sample_len = pick.len();
    for (c, &have) in sampled.iter().enumerate() {
        if have < floor {
            let extra: Vec<usize> = (0..f.pixels())
                .filter(|&i| labelled(i) && usize::from(labels[i]) == c + 1)
                .filter(|i| pick[..sample_len].binary_search(i).is_err())
                .take(floor - have)
                .collect();
            pick.extend(extra);
        }
    }
    let mut rows = Vec::with_capacity(pick.len() * d);
    let mut start = Vec::with_capacity(pick.len());
    for &i in &pick {
        rows.extend_from_slice(f.row(i));
        start.push(labels[i] - 1);
    }
    if start.is_empty() {
        return Err(Error::internal(
            "no labelled pixels to start the model from",
        ));
    }
    let n = start.len();
    let options = FitOptions { n_init: p.n_init };
    let clusters = p
        .method
        .fit_from_partition(&rows, d, &start, k, &options, &mut Seed(p.seed).refit())
        .map_err(|e| {
            Error::options(
                format!("the {} with {k} phases failed: {e}", p.method.describe()),
                "ask for fewer phases (--phases), or use another --method",
            )
        })?;
    Ok(Fit {
        clusters,
        curve: Vec::new(),
        fitted_pixels: n,
    })
}

fn distinct_rows(rows: &[f32], d: usize, at_least: usize) -> bool {
    let mut seen: Vec<&[f32]> = Vec::new();
    for r in rows.chunks_exact(d) {
        if !seen.contains(&r) {
            seen.push(r);
            if seen.len() >= at_least {
                return true;
            }
        }
    }
    false
}

/// Rows a candidate start is ranked on at most: its short EM runs on every m-th row of the
/// fitting sample, m chosen so that at most this many remain (common practice, no source:
/// a ranking needs the candidates' relative likelihoods, not their final rates, and
/// 50 000 pixels resolve a phase of 0.1 % with 50 of them). Only the winner then runs on
/// the whole sample.
pub const RANKING_ROWS: usize = 50_000;

/// Every m-th row of `rows` (`d` values each), m the smallest step leaving at most
/// `max` rows.
fn every_mth_row(rows: &[f32], d: usize, max: usize) -> Vec<f32> {
    let n = rows.len() / d;
    let step = n.div_ceil(max).max(1);
    rows.chunks_exact(d)
        .step_by(step)
        .flatten()
        .copied()
        .collect()
}

/// Ranks candidate starting mixtures by a short EM on `ranking` (a thinned copy of
/// `sample`); only the winner runs to convergence, on the whole `sample`.
fn best_of(
    ranking: &Sample,
    sample: &Sample,
    starts: impl Iterator<Item = PoissonMixture>,
) -> PoissonMixture {
    let best = starts
        .map(|start| poisson::fit_sample(ranking, start, &SHORT_EM))
        .reduce(|a, b| {
            if b.mean_log_likelihood > a.mean_log_likelihood {
                b
            } else {
                a
            }
        })
        .expect("n_init ≥ 1");
    poisson::fit_sample(sample, best, &EM)
}

/// A starting mixture from centres in √counts: each row goes to its nearest centre.
fn start_from_centres(rows: &[f32], root: &[f32], d: usize, centres: &[f32]) -> PoissonMixture {
    let k = centres.len() / d;
    let labels: Vec<u16> = root
        .chunks_exact(d)
        .map(|r| kmeans::nearest(r, centres, d).0 as u16)
        .collect();
    poisson::from_labels(rows, d, &labels, k)
}

/// Greedy growth (in the spirit of Verbeek, Vlassis & Kröse 2003, from memory): the
/// mixture with k + 1 phases starts from the one with k plus a new phase seeded where the
/// current phases explain the data worst (a draw ∝ D² in √counts, as in k-means++); the
/// best of `n_init` such seeds after EM is kept. Each step starts near a good solution, so
/// the BIC curve is smooth and cheap to compute.
fn grow_poisson(
    ranking: &Sample,
    sample: &Sample,
    d: usize,
    prev: &PoissonMixture,
    p: &ClusterParams,
) -> PoissonMixture {
    use rand::Rng;
    let rows = sample.rows();
    let root: Vec<f32> = rows.iter().map(|&x| x.max(0.0).sqrt()).collect();
    let old: Vec<f32> = prev.rates.iter().map(|&r| r.sqrt() as f32).collect();
    let d2: Vec<f64> = root
        .chunks_exact(d)
        .map(|r| f64::from(kmeans::nearest(r, &old, d).1))
        .collect();
    let total: f64 = d2.iter().sum();
    let mut rng = Seed(p.seed).growth(prev.k);
    let starts = (0..p.n_init).map(|_| {
        let mut target = rng.random_range(0.0..total.max(f64::MIN_POSITIVE));
        let pick = d2
            .iter()
            .position(|&v| {
                target -= v;
                target < 0.0
            })
            .unwrap_or(d2.len() - 1);
        let mut centres = old.clone();
        centres.extend_from_slice(&root[pick * d..(pick + 1) * d]);
        start_from_centres(rows, &root, d, &centres)
    });
    // Collected first: the draws must not depend on how the candidates are evaluated.
    let starts: Vec<PoissonMixture> = starts.collect();
    best_of(ranking, sample, starts.into_iter())
}

/// Components fitted beyond a fixed phase count N at least: the spares go to boundary
/// bands and duplicates that are removed afterwards (common practice, no source: bands
/// along two or three kinds of boundary).
pub const SPARE_COMPONENTS: usize = 3;

/// The largest count `auto` tries.
pub const AUTO_MAX: usize = 10;

/// Finds the phases of a field with the Poisson mixture, whatever `params.method`: the
/// BIC sweep of greedily grown mixtures. The other methods are fitted afterwards from the
/// resulting partition with [`fit_from_labels`].
pub fn fit(f: &Features, params: &ValidClusterParams) -> Result<Fit> {
    let p = params.get();
    let rows = fitting_rows(f, p.sample_size, Seed(p.seed));
    let d = f.dims;
    let n = rows.len() / d;
    let need = match p.phases {
        PhaseCount::Fixed(k) => k,
        PhaseCount::Auto { .. } => 1,
    };
    if n == 0 {
        let none = f
            .counts
            .maps()
            .iter()
            .all(|m| m.counts.iter().all(|&c| c == 0.0));
        return Err(if none {
            Error::options(
                "the field has no non-empty pixels: every map is zero everywhere",
                "check the export: the maps must hold the counts of each pixel",
            )
        } else {
            Error::options(
                format!(
                    "the field has no non-empty pixels: none has as many total counts as the \
                     empty-pixel threshold ({:.4e}), so every pixel was taken for a pore",
                    f.min_counts_used
                ),
                "lower --min-counts (or leave it out: the default is 15 % of the median total)",
            )
        });
    }
    if !distinct_rows(&rows, d, need) {
        return Err(Error::options(
            format!(
                "the field has {n} non-empty pixels with fewer than {need} distinct values, \
                 so {need} phases cannot be told apart"
            ),
            "ask for fewer phases, or lower --min-counts if real phases were masked as empty",
        ));
    }
    // A fixed count N is fitted like the automatic one, with spare components (BIC
    // chooses among N..=max(N + SPARE_COMPONENTS, the automatic count's largest)), so
    // that a band of mixed boundary pixels or a duplicate takes a spare one and is
    // removed afterwards instead of taking one of the N phases; where the automatic count
    // finds N phases, N gives the same model.
    let (lo, max) = match p.phases {
        PhaseCount::Fixed(k) => (k, (k + SPARE_COMPONENTS).max(AUTO_MAX)),
        PhaseCount::Auto { max } => (1, max),
    };
    let mut curve = Vec::new();
    let mut best: Option<(f64, PoissonMixture)> = None;
    let sample = Sample::new(&rows, d);
    let thinned = every_mth_row(&rows, d, RANKING_ROWS);
    let ranking = Sample::new(&thinned, d);
    let mut m = poisson::fit_sample(&sample, poisson::from_labels(&rows, d, &vec![0; n], 1), &EM);
    for k in 1..=max.min(n) {
        if k > 1 {
            if !distinct_rows(&rows, d, k) {
                break;
            }
            m = grow_poisson(&ranking, &sample, d, &m, p);
        }
        let b = m.bic(n);
        curve.push(CurvePoint { k, bic: b });
        if k >= lo && best.as_ref().is_none_or(|(bb, _)| b < *bb) {
            best = Some((b, m.clone()));
        }
    }
    let (_, model) = best.ok_or_else(|| Error::internal("no phase count could be fitted"))?;
    let clusters = Clusters::Poisson(poisson::Phases { model });
    Ok(Fit {
        clusters,
        curve,
        fitted_pixels: n,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::map_options::MapOptions;
    use crate::prepare::prepare;
    use crate::stack::MapStack;
    use crate::test_fields::bands;

    const RATES: [[f64; 2]; 3] = [[40.0, 5.0], [5.0, 40.0], [22.0, 22.0]];

    fn features(seed: u64) -> Features {
        let (stack, _) = bands(60, 40, &RATES, seed);
        prepare(stack, &MapOptions::default().check().unwrap().transform()).unwrap()
    }

    fn params(phases: PhaseCount) -> ValidClusterParams {
        ClusterParams {
            phases,
            ..ClusterParams::default()
        }
        .check()
        .unwrap()
    }

    #[test]
    fn phase_counts_parse_as_written_in_the_docs() {
        assert_eq!("auto".parse(), Ok(PhaseCount::Auto { max: AUTO_MAX }));
        assert_eq!("auto:12".parse(), Ok(PhaseCount::Auto { max: 12 }));
        assert_eq!("5".parse(), Ok(PhaseCount::Fixed(5)));
        assert!("auto:x"
            .parse::<PhaseCount>()
            .unwrap_err()
            .contains("auto:MAX"));
        assert!("five"
            .parse::<PhaseCount>()
            .unwrap_err()
            .contains("not a phase count"));
    }

    /// The fitting sample: seeded, in ascending order, without repeats, capped at `max`.
    #[test]
    fn candidates_are_ranked_on_evenly_spread_rows() {
        let rows: Vec<f32> = (0..20).map(|v| v as f32).collect(); // 10 rows of 2
        let firsts = |t: Vec<f32>| t.chunks_exact(2).map(|r| r[0]).collect::<Vec<_>>();
        assert_eq!(firsts(every_mth_row(&rows, 2, 4)), [0.0, 6.0, 12.0, 18.0]);
        assert_eq!(
            firsts(every_mth_row(&rows, 2, 5)),
            [0.0, 4.0, 8.0, 12.0, 16.0]
        );
        assert_eq!(every_mth_row(&rows, 2, 10), rows);
        assert_eq!(every_mth_row(&rows, 2, 50), rows);
    }

    #[test]
    fn the_fitting_sample_is_seeded_sorted_and_capped() {
        let f = features(1);
        let a = fitting_pixels(&f, 500, Seed(7));
        assert_eq!(a, fitting_pixels(&f, 500, Seed(7)));
        assert_ne!(a, fitting_pixels(&f, 500, Seed(8)));
        assert_eq!(a.len(), 500);
        assert!(a.windows(2).all(|p| p[0] < p[1]));
        assert_eq!(fitting_pixels(&f, 1 << 20, Seed(7)).len(), f.pixels());
    }

    /// Three Poisson populations: the BIC curve is lowest at three, and the fitted rates
    /// are the generator's (synthetic ground truth) within 5 %.
    #[test]
    fn the_automatic_count_finds_three_poisson_populations() {
        let f = features(2);
        let fit = fit(&f, &params(PhaseCount::Auto { max: 6 })).unwrap();
        let best = fit
            .curve
            .iter()
            .min_by(|a, b| a.bic.total_cmp(&b.bic))
            .unwrap();
        assert_eq!(best.k, 3, "{:?}", fit.curve);
        for rate in RATES {
            let near = (0..fit.clusters.k()).any(|c| {
                let m = fit.clusters.mean(c);
                (0..2).all(|e| (m[e] - rate[e]).abs() < 0.05 * rate[e])
            });
            assert!(near, "no component near {rate:?}");
        }
    }

    /// A fixed count fits the same populations, and a count the data cannot hold (more
    /// phases than distinct pixel values) is refused with advice.
    #[test]
    fn a_fixed_count_fits_and_an_impossible_one_is_refused() {
        let f = features(3);
        assert!(fit(&f, &params(PhaseCount::Fixed(3))).unwrap().clusters.k() >= 3);
        let (stack, _) = bands(20, 20, &[[9.0, 9.0]], 4);
        let maps = stack
            .maps()
            .iter()
            .map(|m| crate::stack::ElementMap {
                counts: vec![9.0; 400],
                ..m.clone()
            })
            .collect();
        let flat = MapStack::new(
            std::path::Path::new("flat"),
            20,
            20,
            maps,
            Default::default(),
        )
        .unwrap();
        let flat = prepare(flat, &MapOptions::default().check().unwrap().transform()).unwrap();
        let e = fit(&flat, &params(PhaseCount::Fixed(2))).unwrap_err();
        assert!(e.to_string().contains("cannot be told apart"), "{e}");
    }
}
