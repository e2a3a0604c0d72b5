//! Refine: from per-pixel scores to a clean label image.
//!
//! Takes [`Features`], a fitted [`Clusters`] model and checked [`RefineParams`]; returns a
//! [`Segmentation`]: one label per pixel (0 = unassigned), the posterior probability of that
//! label, and why pixels were left unassigned.
//!
//! - **Empty pixels** (below the prepare stage's count floor) are unassigned and fixed.
//!   Pixels above the floor may still be mostly void: an *empty pseudo-phase*, a Gaussian
//!   at the transform of zero counts with the phases' noise variance, competes with the
//!   real phases, so a pixel on the rim of a pore goes to the pore if most of its volume is
//!   pore.
//! - **Outliers**: a pixel whose squared Mahalanobis distance to its best phase exceeds
//!   the χ² quantile of the chosen tail probability is unlike every phase (an unmapped
//!   inclusion, a spike) and is left unassigned, *unless* it lies on the mixing curve of
//!   two phases (or a phase and a pore): then it is a mixed boundary pixel and keeps a
//!   phase, so boundaries never become a spurious "boundary phase" or a rim of holes.
//! - **Spatial prior**: iterated conditional modes on a Potts model (Besag 1986) with
//!   4-neighbours weighted 1 and diagonals 1/√2, times the smoothing strength β. Pixels
//!   are updated in four interleaved colour classes (no two 8-neighbours share a class),
//!   so the sweep is parallel and still deterministic. A pixel only considers its most
//!   likely phase and its neighbours' labels.
//! - **Minimum feature size** (optional): connected features smaller than N pixels are
//!   given to the label that borders them most.

use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use statrs::distribution::{ChiSquared, ContinuousCDF};

use crate::cluster::kmeans::dist2;
use crate::cluster::lanes::{self, Lane, LANES};
use crate::cluster::{poisson, Clusters, Scorer};
use crate::error::{Error, Result};
use crate::prepare::{Features, Stabilise};

/// Options of the refine stage.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct RefineParams {
    /// Potts interaction strength β per 4-neighbour (0 switches the spatial prior off).
    pub smoothing: f64,
    /// Tail probability of the χ² outlier test (0 switches it off).
    pub outlier_tail: f64,
    /// Connected features smaller than this many pixels are merged into their surroundings
    /// (0 = keep all).
    pub min_feature_px: usize,
    /// Limit on ICM sweeps.
    pub max_sweeps: usize,
}

impl Default for RefineParams {
    fn default() -> Self {
        RefineParams {
            smoothing: 1.0,
            outlier_tail: 1e-6,
            min_feature_px: 0,
            max_sweeps: 20,
        }
    }
}

/// Checked refine options.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(transparent)]
pub struct ValidRefineParams(RefineParams);

impl RefineParams {
    /// Checks every rule.
    pub fn check(self) -> Result<ValidRefineParams> {
        if !(0.0..=10.0).contains(&self.smoothing) {
            return Err(Error::options(
                format!("smoothing strength {} is out of range", self.smoothing),
                "use a strength from 0 (off) to 10; 1 is the default",
            ));
        }
        if !(0.0..0.5).contains(&self.outlier_tail) {
            return Err(Error::options(
                format!(
                    "outlier tail probability {} is out of range",
                    self.outlier_tail
                ),
                "use a probability from 0 (off) to below 0.5, e.g. 1e-6",
            ));
        }
        if self.max_sweeps > 1000 {
            return Err(Error::options(
                "too many smoothing sweeps",
                "use at most 1000",
            ));
        }
        Ok(ValidRefineParams(self))
    }
}

impl ValidRefineParams {
    /// The options.
    pub fn get(&self) -> &RefineParams {
        &self.0
    }
}

/// A label image.
#[derive(Debug, Clone, PartialEq)]
pub struct Segmentation {
    /// Grid width.
    pub width: usize,
    /// Grid height.
    pub height: usize,
    /// Per pixel: 0 = unassigned, c + 1 = phase c of the model.
    pub labels: Vec<u16>,
    /// Posterior probability of the pixel's label among the phases and the empty
    /// pseudo-phase (0 where unassigned).
    pub confidence: Vec<f32>,
    /// Pixels unassigned as empty (pores, holes, shadow).
    pub empty_pixels: usize,
    /// Pixels unassigned as unlike every phase.
    pub outlier_pixels: usize,
    /// Per pixel: unassigned as unlike every phase (the rest of label 0 is empty).
    pub outliers: Vec<bool>,
    /// Pixels changed by each smoothing sweep.
    pub sweep_changes: Vec<usize>,
    /// Pixels moved by the minimum-feature-size rule.
    pub small_feature_pixels: usize,
    /// Boundary pixels given to the neighbouring phase that fills most of them.
    pub unmixed_pixels: usize,
    /// Labels after the spatial prior but before unmixing: 0 = unassigned, c + 1 = phase c
    /// of the model (never renumbered).
    pub smoothed_labels: Vec<u16>,
}

/// Scores the phases plus the empty pseudo-phase (index k), in the model's own space.
struct FullScorer<'a> {
    inner: Scorer<'a>,
    k: usize,
    space: Space,
    /// The empty pseudo-phase: counts per pixel of each element in a pore.
    empty_counts: Vec<f64>,
    /// Their logarithms (for the Poisson score).
    empty_ln_counts: Vec<f64>,
    empty_point: Vec<f32>,
    empty_log_norm: f64,
}

/// How rows relate to counts.
#[derive(Clone, Copy)]
enum Space {
    /// Rows are counts; phases are Poisson rates.
    Counts,
    /// Rows are transformed counts with (about) this noise variance per dimension.
    Transformed(Stabilise, f64),
}

impl FullScorer<'_> {
    /// ln (w N(row | c)), for the phases and the empty pseudo-phase.
    #[inline]
    fn score(&self, c: usize, row: &[f32]) -> f64 {
        if c < self.k {
            return self.inner.score(c, row);
        }
        match self.space {
            Space::Counts => {
                self.empty_log_norm
                    + row
                        .iter()
                        .zip(self.empty_counts.iter().zip(&self.empty_ln_counts))
                        .map(|(&x, (&l, &ln_l))| f64::from(x) * ln_l - l)
                        .sum::<f64>()
            }
            Space::Transformed(_, var) => {
                self.empty_log_norm - 0.5 * f64::from(dist2(row, &self.empty_point)) / var
            }
        }
    }

    /// [`Self::score`] of a block of rows (`rows`, and `xt` the same rows transposed, see
    /// [`lanes`]) for the phases and the empty pseudo-phase: `out[c][l]`.
    #[inline]
    fn score_block(&self, rows: &[f32], xt: &[Lane], out: &mut [[f64; LANES]]) {
        self.inner.score_block(xt, &mut out[..self.k]);
        let empty = &mut out[self.k];
        match self.space {
            Space::Counts => {
                for (o, row) in empty.iter_mut().zip(rows.chunks_exact(xt.len())) {
                    *o = self.score(self.k, row);
                }
            }
            Space::Transformed(_, var) => {
                let e = lanes::dist2(xt, &self.empty_point);
                for (o, &e) in empty.iter_mut().zip(&e) {
                    *o = self.empty_log_norm - 0.5 * f64::from(e) / var;
                }
            }
        }
    }

    /// Discrepancy of `row` from a point given in counts (χ²-like, d degrees of freedom).
    fn discrepancy_to_counts(&self, row: &[f32], counts: &[f64], scratch: &mut Vec<f32>) -> f64 {
        match self.space {
            Space::Counts => poisson::deviance(row, counts),
            Space::Transformed(st, var) => {
                scratch.clear();
                scratch.extend(counts.iter().map(|&c| st.apply(c as f32)));
                f64::from(dist2(row, scratch)) / var
            }
        }
    }
}

/// Points along the mixing curves of every pair of endpoints (phases and the empty
/// pseudo-phase), in counts: a mixed pixel's expected counts are t·a + (1 − t)·b.
fn mixing_points(ends: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let mut pts = Vec::new();
    for a in 0..ends.len() {
        for b in a + 1..ends.len() {
            for s in 1..20 {
                let t = s as f64 / 20.0;
                pts.push(
                    ends[a]
                        .iter()
                        .zip(&ends[b])
                        .map(|(x, y)| t * x + (1.0 - t) * y)
                        .collect(),
                );
            }
        }
    }
    pts
}

const NEIGHBOURS: [(isize, isize, f64); 8] = [
    (-1, 0, 1.0),
    (1, 0, 1.0),
    (0, -1, 1.0),
    (0, 1, 1.0),
    (-1, -1, std::f64::consts::FRAC_1_SQRT_2),
    (1, -1, std::f64::consts::FRAC_1_SQRT_2),
    (-1, 1, std::f64::consts::FRAC_1_SQRT_2),
    (1, 1, std::f64::consts::FRAC_1_SQRT_2),
];

/// The labels of a pixel's eight neighbours (in [`NEIGHBOURS`] order, those inside the
/// grid and not `skip`), each with its Potts weight.
struct Votes {
    votes: [(u16, f64); 8],
    n: usize,
}

impl Votes {
    /// The votes of the neighbours of pixel (x, y) of a `w × h` label image.
    #[inline]
    fn of(labels: &[u16], (w, h): (usize, usize), (x, y): (usize, usize), skip: u16) -> Votes {
        let mut v = Votes {
            votes: [(0, 0.0); 8],
            n: 0,
        };
        for (dx, dy, wt) in NEIGHBOURS {
            let (xx, yy) = (x as isize + dx, y as isize + dy);
            if xx < 0 || yy < 0 || xx >= w as isize || yy >= h as isize {
                continue;
            }
            let l = labels[yy as usize * w + xx as usize];
            if l != skip {
                v.votes[v.n] = (l, wt);
                v.n += 1;
            }
        }
        v
    }

    /// The votes, in neighbour order.
    #[inline]
    fn all(&self) -> &[(u16, f64)] {
        &self.votes[..self.n]
    }

    /// The summed weight of the neighbours labelled `c`.
    #[inline]
    fn weight(&self, c: u16) -> f64 {
        self.all().iter().filter(|v| v.0 == c).map(|v| v.1).sum()
    }

    /// The distinct labels among the votes, in order of first appearance.
    #[inline]
    fn distinct(&self) -> ([u16; 8], usize) {
        let (mut out, mut n) = ([u16::MAX; 8], 0);
        for &(l, _) in self.all() {
            if !out[..n].contains(&l) {
                out[n] = l;
                n += 1;
            }
        }
        (out, n)
    }
}

/// Marks pixel `i` of a `w × h` grid and its eight neighbours.
#[inline]
fn mark_neighbourhood(marks: &mut [bool], i: usize, (w, h): (usize, usize)) {
    let (x, y) = (i % w, i / w);
    for yy in y.saturating_sub(1)..=(y + 1).min(h - 1) {
        for xx in x.saturating_sub(1)..=(x + 1).min(w - 1) {
            marks[yy * w + xx] = true;
        }
    }
}

/// Sweeps a `w × h` label image in the four colour classes of a 2 × 2 checkerboard (no
/// two 8-neighbours share a class, so each class is decided in parallel and the result
/// does not depend on the thread count). In a sweep, `choose(i, x, y, labels)` gives the
/// new label of every pixel still to be looked at (`None` to keep it); the pixels around a
/// change are looked at again in the next sweep. Stops when a sweep changes nothing or
/// after `max_sweeps`; returns the changes per sweep.
fn sweep_colour_classes<F>(
    labels: &mut [u16],
    (w, h): (usize, usize),
    max_sweeps: usize,
    choose: F,
) -> Vec<usize>
where
    F: Fn(usize, usize, usize, &[u16]) -> Option<u16> + Sync,
{
    let mut dirty = vec![true; w * h];
    let mut changes = Vec::new();
    for _ in 0..max_sweeps {
        let mut next_dirty = vec![false; w * h];
        let mut changed = 0;
        for colour in 0..4usize {
            let (cx, cy) = (colour % 2, colour / 2);
            let current: &[u16] = labels;
            let (dirty, choose) = (&dirty, &choose);
            let updates: Vec<(usize, u16)> = (cy..h)
                .into_par_iter()
                .step_by(2)
                .flat_map_iter(|y| {
                    (cx..w).step_by(2).filter_map(move |x| {
                        let i = y * w + x;
                        if !dirty[i] {
                            return None;
                        }
                        choose(i, x, y, current).map(|l| (i, l))
                    })
                })
                .collect();
            for &(i, l) in &updates {
                labels[i] = l;
                mark_neighbourhood(&mut next_dirty, i, (w, h));
            }
            changed += updates.len();
        }
        changes.push(changed);
        dirty = next_dirty;
        if changed == 0 {
            break;
        }
    }
    changes
}

/// What every step of the refine stage shares: the scorer of the phases and the empty
/// pseudo-phase, their expected counts (the endpoints of mixtures), and the labels that
/// stand for "empty" (k) and "unlike every phase" (k + 1) while the stage runs.
struct Model<'a> {
    fs: FullScorer<'a>,
    /// Expected counts of the phases and, last, of the empty pseudo-phase.
    ends: Vec<Vec<f64>>,
    /// Points along the mixing curves of every pair of endpoints.
    curves: Vec<Vec<f64>>,
    /// Which pairs of endpoints are far enough apart to be unmixed ([`far_pairs`]).
    far: Vec<bool>,
    /// Discrepancy above which a pixel is unlike its best phase.
    outlier_threshold: f64,
    /// Number of phases.
    k: usize,
    /// Whether a pixel next to a clearly different phase is judged by its best mixture
    /// (rows are counts and scores are on the Poisson scale).
    partial_volume: bool,
}

impl<'a> Model<'a> {
    /// The scorer and endpoints of `clusters` for features `f`.
    fn new(f: &Features, clusters: &'a Clusters, p: &RefineParams) -> Model<'a> {
        let (d, k) = (f.dims, clusters.k());
        let st = f.transform.params().stabilise;
        let empty_fraction = f.empty_fraction;
        let (space, empty_counts, empty_log_norm) = if clusters.on_counts() {
            (
                Space::Counts,
                // A pore still picks up a little: stray and scattered X-rays (common
                // practice, no source: 0.05 counts per pixel and element).
                vec![0.05; d],
                if p.smoothing == 0.0 {
                    empty_fraction.ln()
                } else {
                    0.0
                },
            )
        } else {
            let var = clusters.noise_variance().max(1e-6);
            (
                Space::Transformed(st, var),
                vec![0.0; d],
                if p.smoothing == 0.0 {
                    empty_fraction.ln()
                } else {
                    0.0
                } - 0.5 * d as f64 * (2.0 * std::f64::consts::PI * var).ln(),
            )
        };
        let fs = FullScorer {
            inner: clusters.scorer(p.smoothing == 0.0),
            k,
            space,
            empty_point: empty_counts.iter().map(|&c| st.apply(c as f32)).collect(),
            empty_ln_counts: empty_counts.iter().map(|&c: &f64| c.ln()).collect(),
            empty_counts,
            empty_log_norm,
        };
        let outlier_threshold = if p.outlier_tail > 0.0 {
            ChiSquared::new(d as f64).map_or(f64::INFINITY, |c| c.inverse_cdf(1.0 - p.outlier_tail))
        } else {
            f64::INFINITY
        };
        let mut ends: Vec<Vec<f64>> = (0..k)
            .map(|c| match space {
                Space::Counts => clusters.mean(c).to_vec(),
                Space::Transformed(st, _) => clusters
                    .mean(c)
                    .iter()
                    .map(|&m| st.invert(m).max(0.0))
                    .collect(),
            })
            .collect();
        ends.push(fs.empty_counts.clone());
        Model {
            curves: mixing_points(&ends),
            far: far_pairs(&ends),
            ends,
            fs,
            outlier_threshold,
            k,
            partial_volume: matches!(space, Space::Counts),
        }
    }

    /// The label of the empty pseudo-phase while the stage runs.
    fn empty_label(&self) -> u16 {
        self.k as u16
    }

    /// The label of pixels unlike every phase while the stage runs.
    fn outlier_label(&self) -> u16 {
        (self.k + 1) as u16
    }

    /// The most likely label of pixel `i` (features `row`) from its scores `lp` (phases
    /// and the empty pseudo-phase), and its posterior; an empty pixel is empty, and a pixel
    /// unlike its best phase and off every mixing curve is an outlier.
    fn first_label(
        &self,
        f: &Features,
        i: usize,
        row: &[f32],
        lp: &[f32],
        scratch: &mut Vec<f32>,
    ) -> (u16, f32) {
        if !f.mask[i] {
            return (self.empty_label(), 0.0);
        }
        let mut best = 0;
        for c in 1..=self.k {
            if lp[c] > lp[best] {
                best = c;
            }
        }
        let max = lp[best];
        let z: f32 = lp.iter().map(|&v| (v - max).exp()).sum();
        if best < self.k && self.fs.inner.discrepancy(best, row) > self.outlier_threshold {
            let mixed = self.curves.iter().any(|pt| {
                self.fs.discrepancy_to_counts(row, pt, scratch) <= self.outlier_threshold
            });
            if !mixed {
                return (self.outlier_label(), 0.0);
            }
        }
        (best as u16, 1.0 / z)
    }

    /// Scores every pixel: its most likely label, that label's posterior, and the first
    /// labels of the spatial prior. With `smooth_start`, a pixel starts from the label that
    /// best explains it *and* its 3 × 3 neighbourhood (noise-free enough that ICM does not
    /// freeze in islands of wrong labels); without, from its most likely label.
    ///
    /// Rows are processed in bands; a band scores its rows plus one halo row on each side,
    /// so the 3 × 3 start never needs the scores of the whole field at once (they would
    /// take n × (k + 1) floats).
    fn score_pass(&self, f: &Features, smooth_start: bool) -> FirstPass {
        const BAND: usize = 32;
        let (w, h, d, kk) = (f.width, f.height, f.dims, self.k + 1);
        let n = w * h;
        let outlier_label = self.outlier_label();
        let mut pass = FirstPass {
            ml: vec![0u16; n],
            confidence: vec![0f32; n],
            start: vec![0u16; n],
        };
        pass.ml
            .par_chunks_mut(BAND * w)
            .zip(pass.confidence.par_chunks_mut(BAND * w))
            .zip(pass.start.par_chunks_mut(BAND * w))
            .enumerate()
            .for_each_init(
                Vec::new,
                |scratch, (band, ((ml_out, conf_out), start_out))| {
                    let (y0, y1) = (band * BAND, ((band + 1) * BAND).min(h));
                    let (ya, yb) = (y0.saturating_sub(1), (y1 + 1).min(h));
                    let mut local =
                        vec![0.0f32; if smooth_start { (yb - ya) * w * kk } else { kk }];
                    let mut first = Vec::with_capacity((yb - ya) * w);
                    let mut out = vec![[0f64; LANES]; kk];
                    for y in ya..yb {
                        let mut x = 0;
                        let rows = &f.data[y * w * d..(y + 1) * w * d];
                        lanes::for_each_block(rows, d, |block, xt| {
                            self.fs.score_block(block, xt, &mut out);
                            for (l, row) in block.chunks_exact(d).enumerate() {
                                let off = if smooth_start {
                                    ((y - ya) * w + x) * kk
                                } else {
                                    0
                                };
                                let lp = &mut local[off..off + kk];
                                for (p, o) in lp.iter_mut().zip(&out) {
                                    *p = o[l] as f32;
                                }
                                first.push(self.first_label(f, y * w + x, row, lp, scratch));
                                x += 1;
                            }
                        });
                    }
                    let fixed_at = |y: usize, x: usize| {
                        let (l, _) = first[(y - ya) * w + x];
                        !f.mask[y * w + x] || l == outlier_label
                    };
                    let mut acc = vec![0.0f32; kk];
                    let pixels = (y0..y1).flat_map(|y| (0..w).map(move |x| (y, x)));
                    for (j, (y, x)) in pixels.enumerate() {
                        let (l, post) = first[(y - ya) * w + x];
                        ml_out[j] = l;
                        conf_out[j] = post;
                        start_out[j] = l;
                        if smooth_start && !fixed_at(y, x) {
                            acc.iter_mut().for_each(|a| *a = 0.0);
                            for yy in y.saturating_sub(1)..=(y + 1).min(h - 1) {
                                for xx in x.saturating_sub(1)..=(x + 1).min(w - 1) {
                                    if !fixed_at(yy, xx) {
                                        let off = ((yy - ya) * w + xx) * kk;
                                        acc.iter_mut()
                                            .zip(&local[off..off + kk])
                                            .for_each(|(a, s)| *a += s);
                                    }
                                }
                            }
                            start_out[j] =
                                (0..kk).fold(0, |b, c| if acc[c] > acc[b] { c } else { b }) as u16;
                        }
                    }
                },
            );
        pass
    }

    /// The energy (score plus β × the Potts prior) of label `c` for a pixel with features
    /// `row`, neighbour votes `votes` and distinct neighbour labels `nbrs`. Next to a
    /// clearly different phase b, a pixel of phase c may hold some of b: on the Poisson
    /// scale c is judged by its best such mixture.
    fn energy(&self, c: u16, row: &[f32], votes: &Votes, nbrs: &[u16], beta: f64) -> f64 {
        let mut s = self.fs.score(c as usize, row);
        if self.partial_volume {
            let kk = self.k + 1;
            for &b in nbrs {
                if b != c && self.far[c as usize * kk + b as usize] {
                    if let Some(m) = mix_score(row, &self.ends[c as usize], &self.ends[b as usize])
                    {
                        s = s.max(m);
                    }
                }
            }
        }
        s + beta * votes.weight(c)
    }

    /// One ICM decision for pixel `i` at (x, y): among its most likely label `ml` and its
    /// neighbours' labels, the one of highest [`Self::energy`] (ties to the lower label), if
    /// it is not the current one.
    fn icm_choice(
        &self,
        f: &Features,
        labels: &[u16],
        (i, x, y): (usize, usize, usize),
        ml: u16,
        beta: f64,
    ) -> Option<u16> {
        let votes = Votes::of(labels, (f.width, f.height), (x, y), self.outlier_label());
        let (nbrs, nb) = votes.distinct();
        let mut cands = [u16::MAX; 9];
        cands[0] = ml;
        let mut nc = 1;
        for &l in &nbrs[..nb] {
            if !cands[..nc].contains(&l) {
                cands[nc] = l;
                nc += 1;
            }
        }
        let cur = labels[i];
        if nc == 1 && cands[0] == cur {
            return None;
        }
        let row = f.row(i);
        let mut best = (cur, self.energy(cur, row, &votes, &nbrs[..nb], beta));
        for &c in &cands[..nc] {
            if c == cur {
                continue;
            }
            let e = self.energy(c, row, &votes, &nbrs[..nb], beta);
            if e > best.1 || (e == best.1 && c < best.0) {
                best = (c, e);
            }
        }
        (best.0 != cur).then_some(best.0)
    }

    /// Iterated conditional modes on the Potts model (Besag 1986): sweeps until nothing
    /// changes or `max_sweeps`; returns the changes per sweep.
    fn icm(
        &self,
        f: &Features,
        labels: &mut [u16],
        fixed: &[bool],
        ml: &[u16],
        p: &RefineParams,
    ) -> Vec<usize> {
        sweep_colour_classes(
            labels,
            (f.width, f.height),
            p.max_sweeps,
            |i, x, y, current| {
                if fixed[i] {
                    return None;
                }
                self.icm_choice(f, current, (i, x, y), ml[i], p.smoothing)
            },
        )
    }

    /// The posterior of the final label, where smoothing changed it from the most likely.
    fn posteriors(&self, f: &Features, labels: &[u16], ml: &[u16], confidence: &mut [f32]) {
        let k = self.k;
        labels
            .par_iter()
            .zip(ml.par_iter())
            .zip(confidence.par_iter_mut())
            .enumerate()
            .for_each_init(Vec::new, |s, (i, ((&l, &m), conf))| {
                if l != m && (l as usize) <= k && f.mask[i] {
                    let row = f.row(i);
                    s.clear();
                    s.extend((0..=k).map(|c| self.fs.score(c, row)));
                    let max = s.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                    let z: f64 = s.iter().map(|v| (v - max).exp()).sum();
                    *conf = ((s[l as usize] - max).exp() / z) as f32;
                }
            });
    }

    /// The stage's labels (0..k phases, k empty, k + 1 outlier) as the output's (0
    /// unassigned, c + 1 phase c).
    fn output_label(&self, l: u16) -> u16 {
        if l == self.empty_label() || l == self.outlier_label() {
            0
        } else {
            l + 1
        }
    }
}

/// The per-pixel results of the scoring pass.
struct FirstPass {
    /// The most likely label.
    ml: Vec<u16>,
    /// Its posterior.
    confidence: Vec<f32>,
    /// Where the spatial prior starts.
    start: Vec<u16>,
}

/// What the refine stage did, beyond the labels.
struct Steps {
    sweep_changes: Vec<usize>,
    small_feature_pixels: usize,
    unmixed_pixels: usize,
    before_unmixing: Vec<u16>,
}

/// Runs the refine stage.
pub fn refine(f: &Features, clusters: &Clusters, params: &ValidRefineParams) -> Segmentation {
    refine_from(f, clusters, params, None)
}

/// Runs the refine stage starting the spatial prior from an earlier segmentation of the
/// same phases (labels 1..=k), when one is given: after a small update of the model the
/// old labels are a far better start than a fresh one.
pub fn refine_from(
    f: &Features,
    clusters: &Clusters,
    params: &ValidRefineParams,
    start: Option<&Segmentation>,
) -> Segmentation {
    let p = params.get();
    let n = f.width * f.height;
    let m = Model::new(f, clusters, p);
    let start =
        start.filter(|s| s.labels.len() == n && s.labels.iter().all(|&l| (l as usize) <= m.k));

    let t = crate::profile::stage("  refine: scores");
    // The 3 × 3 start is needed only with the prior on and no earlier labels.
    let pass = m.score_pass(f, p.smoothing > 0.0 && start.is_none());
    drop(t);
    let t = crate::profile::stage("  refine: init");
    let fixed: Vec<bool> = (0..n)
        .map(|i| !f.mask[i] || pass.ml[i] == m.outlier_label())
        .collect();
    let FirstPass {
        ml,
        mut confidence,
        start: first_start,
    } = pass;
    let mut labels: Vec<u16> = match start {
        // Earlier labels (1..=k) where the pixel is still a phase pixel.
        Some(st) => {
            drop(first_start);
            (0..n)
                .map(|i| {
                    if fixed[i] || st.labels[i] == 0 {
                        ml[i]
                    } else {
                        st.labels[i] - 1
                    }
                })
                .collect()
        }
        None => first_start,
    };
    drop(t);

    let t = crate::profile::stage("  refine: icm");
    let sweep_changes = if p.smoothing > 0.0 {
        m.icm(f, &mut labels, &fixed, &ml, p)
    } else {
        Vec::new()
    };
    drop(t);
    let t = crate::profile::stage("  refine: unmix");
    // The labels before unmixing decide which components are bands of mixed pixels
    // (`interior_fractions`): unmixing moves exactly those pixels.
    let before_unmixing = labels.clone();
    let unmixed_pixels = if p.smoothing > 0.0 {
        unmix_boundaries(
            f,
            &mut labels,
            &m.ends,
            &fixed,
            m.outlier_label(),
            p.smoothing * 0.25,
        )
    } else {
        0
    };
    drop(t);
    let _t = crate::profile::stage("  refine: finish");
    let small_feature_pixels = if p.min_feature_px > 1 {
        let (w, h) = (f.width, f.height);
        remove_small_features(
            &mut labels,
            w,
            h,
            &fixed,
            p.min_feature_px,
            m.outlier_label(),
        )
    } else {
        0
    };
    m.posteriors(f, &labels, &ml, &mut confidence);
    let steps = Steps {
        sweep_changes,
        small_feature_pixels,
        unmixed_pixels,
        before_unmixing,
    };
    segmentation(&m, f, &labels, confidence, steps)
}

/// The [`Segmentation`] of the stage's final `labels`.
fn segmentation(
    m: &Model,
    f: &Features,
    labels: &[u16],
    mut confidence: Vec<f32>,
    steps: Steps,
) -> Segmentation {
    let out: Vec<u16> = labels.iter().map(|&l| m.output_label(l)).collect();
    for (c, &l) in confidence.iter_mut().zip(&out) {
        if l == 0 {
            *c = 0.0;
        }
    }
    Segmentation {
        width: f.width,
        height: f.height,
        outliers: labels.iter().map(|&l| l == m.outlier_label()).collect(),
        empty_pixels: labels.iter().filter(|&&l| l == m.empty_label()).count(),
        outlier_pixels: labels.iter().filter(|&&l| l == m.outlier_label()).count(),
        labels: out,
        confidence,
        sweep_changes: steps.sweep_changes,
        small_feature_pixels: steps.small_feature_pixels,
        unmixed_pixels: steps.unmixed_pixels,
        smoothed_labels: steps
            .before_unmixing
            .iter()
            .map(|&l| m.output_label(l))
            .collect(),
    }
}

/// Two phases must differ by at least this J divergence (nats per pixel) for boundary
/// pixels between them to be unmixed; closer phases are left to the spatial prior (common
/// practice, no source).
pub const UNMIX_MIN_DIVERGENCE: f64 = 4.0;

/// Which pairs of endpoints (phases and the empty pseudo-phase) differ by at least
/// [`UNMIX_MIN_DIVERGENCE`], as a flat `n × n` table.
fn far_pairs(ends: &[Vec<f64>]) -> Vec<bool> {
    let n = ends.len();
    let mut far = vec![false; n * n];
    for a in 0..n {
        for b in 0..n {
            far[a * n + b] = a != b
                && crate::cluster::simplify::j_divergence(&ends[a], &ends[b])
                    >= UNMIX_MIN_DIVERGENCE;
        }
    }
    far
}

/// Counts `x` (by element) under the mixtures t·a + (1 − t)·b of two endpoints: the
/// Poisson log-likelihood (without the Σ ln x! term) is concave in t, so its slope
/// g′(t) = Σ x(a − b)/m − Σ(a − b) locates the best t.
struct Mixture<'a, X: Fn(usize) -> f64> {
    x: X,
    a: &'a [f64],
    b: &'a [f64],
}

impl<X: Fn(usize) -> f64> Mixture<'_, X> {
    #[inline]
    fn mean(&self, t: f64, e: usize) -> f64 {
        (t * self.a[e] + (1.0 - t) * self.b[e]).max(1e-3)
    }

    #[inline]
    fn slope(&self, t: f64) -> f64 {
        (0..self.a.len())
            .map(|e| ((self.x)(e) / self.mean(t, e) - 1.0) * (self.a[e] - self.b[e]))
            .sum()
    }

    #[inline]
    fn log_likelihood(&self, t: f64) -> f64 {
        (0..self.a.len())
            .map(|e| {
                let m = self.mean(t, e);
                (self.x)(e) * m.ln() - m
            })
            .sum()
    }

    /// Where the slope vanishes between `lo` (slope > 0) and `hi` (slope < 0): twelve
    /// bisections.
    fn root(&self, lo: f64, hi: f64) -> f64 {
        let (mut l, mut r) = (lo, hi);
        for _ in 0..12 {
            let m = 0.5 * (l + r);
            if self.slope(m) > 0.0 {
                l = m;
            } else {
                r = m;
            }
        }
        0.5 * (l + r)
    }

    /// The best t in [lo, hi].
    fn argmax(&self, lo: f64, hi: f64) -> f64 {
        if self.slope(hi) >= 0.0 {
            hi
        } else if self.slope(lo) <= 0.0 {
            lo
        } else {
            self.root(lo, hi)
        }
    }
}

/// The log-likelihood of counts `row` under the best mixture t·a + (1 − t)·b with a the
/// majority, t ∈ [½, 1], or `None` when the best is t = 1 (pure a, which the caller has
/// already scored).
fn mix_score(row: &[f32], a: &[f64], b: &[f64]) -> Option<f64> {
    let m = Mixture {
        x: |e: usize| f64::from(row[e]),
        a,
        b,
    };
    if m.slope(1.0) >= 0.0 {
        return None;
    }
    let t = if m.slope(0.5) <= 0.0 {
        0.5
    } else {
        m.root(0.5, 1.0)
    };
    Some(m.log_likelihood(t))
}

/// Limit on unmixing sweeps (each moves a boundary by at most a pixel).
pub const UNMIX_PASSES: usize = 6;

/// Gives each boundary pixel to the phase that fills most of it.
///
/// A pixel on the boundary of phases a and b records counts from both. The likelihood
/// ratio of *pure* a against *pure* b puts the decision at the point where the two pure
/// phases explain the counts equally badly, which for a phase with a strong characteristic
/// element is well short of half its volume: small particles of such a phase would grow by
/// a rim. Here the data term compares the best mixture t·a + (1 − t)·b with a in the
/// majority (t ≥ ½) against the best with b in the majority (Poisson likelihood, concave
/// in t, maximised by bisection on its slope), and the Potts prior of the neighbours is
/// added as in the smoothing sweeps, so boundaries sit at half volume *and* stay smooth.
/// Only between clearly different phases (including pores); sweeps in four colour classes
/// until nothing changes. Returns the pixels moved.
fn unmix_boundaries(
    f: &Features,
    labels: &mut [u16],
    ends: &[Vec<f64>],
    fixed: &[bool],
    outlier: u16,
    beta: f64,
) -> usize {
    let (w, h, d) = (f.width, f.height, f.dims);
    let planes: Vec<&[f32]> = f
        .counts
        .maps()
        .iter()
        .map(|m| m.counts.as_slice())
        .collect();
    let kk = ends.len();
    let far = far_pairs(ends);
    let changes = sweep_colour_classes(labels, (w, h), UNMIX_PASSES, |i, x, y, current| {
        let a = current[i];
        if fixed[i] || a == outlier {
            return None;
        }
        let votes = Votes::of(current, (w, h), (x, y), outlier);
        if !votes
            .all()
            .iter()
            .any(|v| v.0 != a && far[a as usize * kk + v.0 as usize])
        {
            return None;
        }
        let mut x_e = [0f64; lanes::MAX_DIMS];
        for (x, p) in x_e.iter_mut().zip(&planes) {
            *x = f64::from(p[i]);
        }
        let mut best: Option<(f64, u16)> = None;
        let (partners, np) = votes.distinct();
        for &b in &partners[..np] {
            if b == a || !far[a as usize * kk + b as usize] {
                continue;
            }
            let (la, lb) = majority_scores(&x_e[..d], &ends[a as usize], &ends[b as usize]);
            // No prior across the rim of a pore: the Potts prior shrinks small convex
            // regions, and pores are often only a few pixels across.
            let prior = if a as usize == kk - 1 || b as usize == kk - 1 {
                0.0
            } else {
                beta * (votes.weight(b) - votes.weight(a))
            };
            let delta = lb - la + prior;
            if delta > 0.0 && best.is_none_or(|bb| delta > bb.0) {
                best = Some((delta, b));
            }
        }
        best.map(|(_, b)| b)
    });
    changes.iter().sum()
}

/// The log-likelihoods of counts `x` under the best mixture t·a + (1 − t)·b with a in the
/// majority (t ∈ [½, 1]) and with b in the majority (t ∈ [0, ½]).
fn majority_scores(x: &[f64], pa: &[f64], pb: &[f64]) -> (f64, f64) {
    let m = Mixture {
        x: |e: usize| x[e],
        a: pa,
        b: pb,
    };
    if m.slope(0.5) < 0.0 {
        (m.log_likelihood(0.5), m.log_likelihood(m.argmax(0.0, 0.5)))
    } else {
        (m.log_likelihood(m.argmax(0.5, 1.0)), m.log_likelihood(0.5))
    }
}

/// Gives connected features (8-connected) smaller than `min_px` to the label that borders
/// them most. Returns the number of pixels moved.
fn remove_small_features(
    labels: &mut [u16],
    w: usize,
    h: usize,
    fixed: &[bool],
    min_px: usize,
    outlier: u16,
) -> usize {
    use image::{ImageBuffer, Luma};
    use imageproc::region_labelling::{connected_components, Connectivity};
    let img: ImageBuffer<Luma<u16>, Vec<u16>> =
        ImageBuffer::from_raw(w as u32, h as u32, labels.iter().map(|&l| l + 1).collect())
            .expect("size matches");
    let comp = connected_components(&img, Connectivity::Eight, Luma([0u16]));
    let comp = comp.into_raw();
    let ncomp = comp.iter().copied().max().unwrap_or(0) as usize;
    let mut size = vec![0usize; ncomp + 1];
    for &c in &comp {
        size[c as usize] += 1;
    }
    let mut moved = 0;
    let mut border: std::collections::BTreeMap<u32, Vec<(u16, usize)>> = Default::default();
    for i in 0..w * h {
        let c = comp[i];
        if size[c as usize] >= min_px || fixed[i] {
            continue;
        }
        let (x, y) = (i % w, i / w);
        for yy in y.saturating_sub(1)..=(y + 1).min(h - 1) {
            for xx in x.saturating_sub(1)..=(x + 1).min(w - 1) {
                let j = yy * w + xx;
                if comp[j] != c && labels[j] != outlier {
                    let e = border.entry(c).or_default();
                    match e.iter_mut().find(|(l, _)| *l == labels[j]) {
                        Some(v) => v.1 += 1,
                        None => e.push((labels[j], 1)),
                    }
                }
            }
        }
    }
    let target: std::collections::BTreeMap<u32, u16> = border
        .into_iter()
        .filter_map(|(c, v)| {
            v.into_iter()
                .max_by_key(|&(l, n)| (n, std::cmp::Reverse(l)))
                .map(|(l, _)| (c, l))
        })
        .collect();
    for i in 0..w * h {
        if let Some(&l) = target.get(&comp[i]) {
            if !fixed[i] {
                labels[i] = l;
                moved += 1;
            }
        }
    }
    moved
}

/// Per phase of the model (index c for label c + 1): pixels, and the fraction of them at
/// least two pixels from any other label (their 5 × 5 neighbourhood all carries the same
/// label), on the labels before unmixing. A real phase has an inside; a band of mixed
/// pixels along the boundary of two others is one or two pixels wide and has none.
pub fn interior_fractions(seg: &Segmentation, k: usize) -> Vec<(usize, f64)> {
    let (w, h) = (seg.width, seg.height);
    let labels = &seg.smoothed_labels;
    let mut pixels = vec![0usize; k];
    let mut inside = vec![0usize; k];
    for y in 0..h {
        for x in 0..w {
            let l = labels[y * w + x];
            if l == 0 {
                continue;
            }
            let c = l as usize - 1;
            pixels[c] += 1;
            if x < 2 || y < 2 || x + 2 >= w || y + 2 >= h {
                continue;
            }
            if (y - 2..=y + 2).all(|yy| {
                labels[yy * w + x - 2..=yy * w + x + 2]
                    .iter()
                    .all(|&v| v == l)
            }) {
                inside[c] += 1;
            }
        }
    }
    (0..k)
        .map(|c| {
            (
                pixels[c],
                if pixels[c] > 0 {
                    inside[c] as f64 / pixels[c] as f64
                } else {
                    0.0
                },
            )
        })
        .collect()
}

/// Fewest interior pixels from which a phase's mean is re-estimated (common practice, no
/// source).
pub const MIN_INTERIOR_PIXELS: usize = 20;

/// Per phase of the model: the mean feature row over its interior pixels (all eight
/// neighbours share the label), or `None` with fewer than [`MIN_INTERIOR_PIXELS`].
///
/// Small features of a phase are mostly boundary pixels whose counts mix in their
/// surroundings, so a mixture fitted to all pixels places such a phase part-way towards
/// its neighbours. Its interior pixels are the purest sample of it there is.
pub fn interior_means(f: &Features, seg: &Segmentation, k: usize) -> Vec<Option<Vec<f64>>> {
    let (w, h, d) = (seg.width, seg.height, f.dims);
    let mut sum = vec![0.0f64; k * d];
    let mut count = vec![0usize; k];
    for y in 1..h.saturating_sub(1) {
        for x in 1..w.saturating_sub(1) {
            let l = seg.labels[y * w + x];
            if crate::labels::interior_3x3(&seg.labels, w, x, y) {
                let c = l as usize - 1;
                count[c] += 1;
                for (s, &v) in sum[c * d..(c + 1) * d].iter_mut().zip(f.row(y * w + x)) {
                    *s += f64::from(v);
                }
            }
        }
    }
    (0..k)
        .map(|c| {
            (count[c] >= MIN_INTERIOR_PIXELS).then(|| {
                sum[c * d..(c + 1) * d]
                    .iter()
                    .map(|s| s / count[c] as f64)
                    .collect()
            })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn votes_leave_out_the_edge_and_the_skipped_label() {
        let labels: Vec<u16> = (1..=9).collect();
        let centre = Votes::of(&labels, (3, 3), (1, 1), u16::MAX);
        let got: Vec<u16> = centre.all().iter().map(|v| v.0).collect();
        assert_eq!(got, vec![4, 6, 2, 8, 1, 3, 7, 9], "NEIGHBOURS order");
        let corner = Votes::of(&labels, (3, 3), (0, 0), 5);
        assert_eq!(corner.all(), &[(2, 1.0), (4, 1.0)]);
        let same = [7u16, 7, 3, 7, 0, 3, 3, 7, 7];
        let v = Votes::of(&same, (3, 3), (1, 1), u16::MAX);
        let (distinct, n) = v.distinct();
        assert_eq!(&distinct[..n], &[7, 3]);
        let diag = std::f64::consts::FRAC_1_SQRT_2;
        // 7 left, top, bottom and at two corners; 3 right and at two corners.
        assert!((v.weight(7) - (3.0 + 2.0 * diag)).abs() < 1e-12);
        assert!((v.weight(3) - (1.0 + 2.0 * diag)).abs() < 1e-12);
        assert_eq!(v.weight(9), 0.0);
    }

    #[test]
    fn mark_neighbourhood_stops_at_the_edges() {
        let mut marks = vec![false; 12];
        mark_neighbourhood(&mut marks, 0, (4, 3));
        let on: Vec<usize> = (0..12).filter(|&i| marks[i]).collect();
        assert_eq!(on, vec![0, 1, 4, 5]);
        let mut marks = vec![false; 12];
        mark_neighbourhood(&mut marks, 6, (4, 3));
        assert_eq!(marks.iter().filter(|&&m| m).count(), 9);
    }

    /// A majority filter as the choice: a one-pixel island and a notch go in the first
    /// sweep, the second changes nothing and ends the run, and the result is the same on
    /// one thread and on two.
    #[test]
    fn colour_class_sweeps_stop_when_nothing_changes_and_ignore_threads() {
        let (w, h) = (7, 6);
        let mut start = vec![1u16; w * h];
        start[2 * w + 3] = 2;
        start[w - 1] = 2;
        let run = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let mut labels = start.clone();
            let changes = pool.install(|| {
                sweep_colour_classes(&mut labels, (w, h), 10, |i, x, y, current| {
                    let v = Votes::of(current, (w, h), (x, y), u16::MAX);
                    let (d, n) = v.distinct();
                    let best = d[..n]
                        .iter()
                        .copied()
                        .max_by(|a, b| v.weight(*a).total_cmp(&v.weight(*b)))?;
                    (best != current[i]).then_some(best)
                })
            });
            (labels, changes)
        };
        let (labels, changes) = run(1);
        assert!(labels.iter().all(|&l| l == 1), "{labels:?}");
        assert_eq!(changes, vec![2, 0]);
        assert_eq!(run(2), (labels, changes));
    }

    /// The bisection of [`majority_scores`] and [`mix_score`] against a brute-force search
    /// over t on a grid of 10⁻⁴.
    #[test]
    fn mixture_scores_match_a_grid_search() {
        let (a, b) = ([60.0, 2.0, 10.0], [3.0, 45.0, 10.0]);
        let g = |x: &[f64], t: f64| -> f64 {
            (0..3)
                .map(|e| {
                    let m = (t * a[e] + (1.0 - t) * b[e]).max(1e-3);
                    x[e] * m.ln() - m
                })
                .sum()
        };
        let best = |x: &[f64], lo: f64, hi: f64| -> f64 {
            (0..=10_000)
                .map(|s| g(x, lo + (hi - lo) * f64::from(s) / 1e4))
                .fold(f64::NEG_INFINITY, f64::max)
        };
        for x in [[50.0, 10.0, 9.0], [20.0, 30.0, 12.0], [2.0, 47.0, 8.0]] {
            let (la, lb) = majority_scores(&x, &a, &b);
            assert!((la - best(&x, 0.5, 1.0)).abs() < 1e-3, "{x:?}: a side {la}");
            assert!((lb - best(&x, 0.0, 0.5)).abs() < 1e-3, "{x:?}: b side {lb}");
            let row: Vec<f32> = x.iter().map(|&v| v as f32).collect();
            match mix_score(&row, &a, &b) {
                Some(m) => assert!((m - best(&x, 0.5, 1.0)).abs() < 1e-3, "{x:?}: {m}"),
                // Pure a is the best a-majority mixture.
                None => assert!((g(&x, 1.0) - best(&x, 0.5, 1.0)).abs() < 1e-9),
            }
        }
        // Mostly a: a in the majority explains it better; mostly b: the other way.
        let (la, lb) = majority_scores(&[50.0, 10.0, 9.0], &a, &b);
        assert!(la > lb);
        let (la, lb) = majority_scores(&[2.0, 47.0, 8.0], &a, &b);
        assert!(lb > la);
    }
}
