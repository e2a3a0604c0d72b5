//! What a phase model is, what a kernel's options must pass, and where its random numbers
//! come from.
//!
//! Each clustering method lives in its own file (kmeans.rs, gmm.rs, poisson.rs): its
//! kernel, its checked options, and [`PhaseModel`] for what it saves. `cluster/mod.rs`
//! registers the methods in [`super::Method`], [`super::Clusters`] and the scorer; it is the
//! only place that lists them. The shape follows linfa's `Fit`/`Predict` and its
//! `ParamGuard`/valid-parameters split, with our own names.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::lanes::{Lane, LANES};
use super::Method;

/// How a model scores pixels in the hot loops. Every score is the log density of a row
/// under a phase, with the phase's mixing weight where the model has one.
pub trait Scoring {
    /// ln (w_c p(row | phase c)).
    fn score(&self, c: usize, row: &[f32]) -> f64;
    /// [`Self::score`] of each lane's row of a transposed block (see
    /// [`super::lanes`]) for every phase: `out[c][l]`; bit-identical to the one-row
    /// version.
    fn score_block(&self, xt: &[Lane], out: &mut [[f64; LANES]]);
    /// Discrepancy of `row` from phase `c`, approximately χ² with d degrees of freedom for
    /// a pixel of that phase.
    fn discrepancy(&self, c: usize, row: &[f32]) -> f64;
}

impl<T: Scoring + ?Sized> Scoring for &T {
    #[inline]
    fn score(&self, c: usize, row: &[f32]) -> f64 {
        T::score(*self, c, row)
    }
    #[inline]
    fn score_block(&self, xt: &[Lane], out: &mut [[f64; LANES]]) {
        T::score_block(*self, xt, out)
    }
    #[inline]
    fn discrepancy(&self, c: usize, row: &[f32]) -> f64 {
        T::discrepancy(*self, c, row)
    }
}

/// A fitted model of a field's phases: what the labelling, the phase-count decision and a
/// saved model need of every method.
pub trait PhaseModel: Clone + Sized {
    /// The method.
    const METHOD: Method;
    /// The model's scorer, borrowed from it or built from it.
    type Scorer<'a>: Scoring
    where
        Self: 'a;

    /// Phases.
    fn k(&self) -> usize;
    /// Feature dimensions (elements).
    fn d(&self) -> usize;
    /// The phase means in the model's own space, `k × d` row-major: counts per pixel for
    /// a model on counts, transformed features otherwise.
    fn means(&self) -> &[f64];
    /// Mixing weights, where the model has them.
    fn weights(&self) -> Option<&[f64]>;
    /// Whether the model scores raw counts (true) or transformed features.
    fn on_counts(&self) -> bool;
    /// Checks the method's own arrays of a model read from a file; `k` and `d` are
    /// checked by the caller. Returns what is wrong.
    fn check_own(&self) -> Result<(), String>;
    /// Rebuilds caches after reading from a file.
    fn refresh(&mut self) -> Result<(), String>;
    /// The same model with the mean of phase `c` replaced (in the model's own space).
    fn with_mean(&self, c: usize, mean: &[f64]) -> Self;
    /// The same model without phase `c` (weights renormalised).
    fn without(&self, c: usize) -> Self;
    /// The same model with phases `a < b` combined into one at index `a`.
    fn merged(&self, a: usize, b: usize) -> Self;
    /// A typical per-dimension noise variance of the phases, for the empty pseudo-phase
    /// of a model on transformed features (NaN for a model on counts).
    fn noise_variance(&self) -> f64;
    /// The scorer for the hot loops.
    fn scorer(&self) -> Self::Scorer<'_>;
    /// Fits the model with `k` phases on `rows` (`n × d`), started from their hard
    /// partition `start` (values `< k`).
    fn fit_from_partition(
        rows: &[f32],
        d: usize,
        start: &[u16],
        k: usize,
        options: &FitOptions,
        rng: &mut ChaCha8Rng,
    ) -> Result<Self, String>;
}

/// Options every method's fit from a partition may use.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitOptions {
    /// k-means restarts (used where a method restarts).
    pub n_init: usize,
}

/// Kernel options that passed their checks: only a kernel's own `check` makes one, so a
/// kernel never runs with an iteration limit of 0 or a negative tolerance.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Checked<P>(pub(super) P);

impl<P> std::ops::Deref for Checked<P> {
    type Target = P;
    fn deref(&self) -> &P {
        &self.0
    }
}

/// Checks an iteration limit and a tolerance shared by the kernels.
pub(super) fn check_iterations(max_iter: usize, tol: f64) -> Result<(), String> {
    if max_iter == 0 {
        return Err("the iteration limit is 0; allow at least one iteration".into());
    }
    if !(tol.is_finite() && tol >= 0.0) {
        return Err(format!("the tolerance {tol} is not a non-negative number"));
    }
    Ok(())
}

/// The user's seed, and a generator for each random choice made from it. Each choice has
/// its own stream (restart 0 of k-means and a fit from a partition both start from the
/// seed itself), so adding a draw in one place does not move another's.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Seed(pub u64);

impl Seed {
    /// The sample of pixels a model is fitted on.
    pub fn sampling(self) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(self.0 ^ 0x005A_3B1E)
    }

    /// Restart `run` of k-means from k-means++ seeds.
    pub fn restart(self, run: usize) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(
            self.0
                .wrapping_add((run as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15)),
        )
    }

    /// The new component of the growth step from `k` phases to `k + 1`.
    pub fn growth(self, k: usize) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(self.0 ^ (k as u64).wrapping_mul(0x9E37_79B9))
    }

    /// A fit from a partition (an emptied k-means cluster restarts on a row drawn here).
    pub fn refit(self) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(self.0)
    }

    /// The windows cut from each field for a model fitted on several fields.
    pub fn windows(self) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(self.0 ^ 0x6669_7421)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;

    /// Each use draws its own stream: no two of them start alike, and each is the same
    /// on every call.
    #[test]
    fn streams_are_distinct_and_repeatable() {
        let s = Seed(7);
        let mut first: Vec<u64> = [
            s.sampling(),
            s.restart(1),
            s.growth(2),
            s.refit(),
            s.windows(),
        ]
        .into_iter()
        .map(|mut r| r.random())
        .collect();
        assert_eq!(first[3], s.refit().random::<u64>());
        assert_eq!(
            first[3],
            s.restart(0).random::<u64>(),
            "restart 0 is the seed itself"
        );
        first.sort_unstable();
        first.dedup();
        assert_eq!(first.len(), 5);
    }

    #[test]
    fn iteration_checks_refuse_zero_and_bad_tolerances() {
        assert!(check_iterations(1, 0.0).is_ok());
        assert!(check_iterations(0, 1e-4)
            .unwrap_err()
            .contains("iteration limit"));
        assert!(check_iterations(10, -1.0).is_err());
        assert!(check_iterations(10, f64::NAN).is_err());
    }
}
