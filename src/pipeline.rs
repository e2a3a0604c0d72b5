//! The main job for one field, stage after stage: prepare → cluster → (simplify) → refine
//! → phase statistics. No I/O here: loading and writing belong to `io` and `report`.

use serde::{Deserialize, Serialize};

use crate::cluster::select::{self, ClusterParams, CurvePoint, PhaseCount, ValidClusterParams};
use crate::cluster::simplify::{self, Simplification};
use crate::cluster::{Clusters, Method};
use crate::error::{Error, Result};
use crate::phases::{phase_table, phase_table_in_order, PhaseTable};
use crate::prepare::Features;
use crate::prepare::{prepare, FeatureTransform, PrepareParams, Stabilise};
use crate::refine::{
    interior_fractions, interior_means, refine, refine_from, RefineParams, Segmentation,
    ValidRefineParams,
};
use crate::stack::MapStack;
use crate::xray_yield::YieldField;

/// Every option of `map`, as given (command line and configuration file merged).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct MapOptions {
    /// Prepare stage (the transform is ignored by the Poisson method, which works on counts).
    pub prepare: PrepareParams,
    /// Cluster stage.
    pub cluster: ClusterParams,
    /// Refine stage.
    pub refine: RefineParams,
    /// With an automatic phase count: phases smaller than this share of the pixels are
    /// dissolved into their neighbours.
    pub min_phase_fraction: f64,
}

impl Default for MapOptions {
    fn default() -> Self {
        MapOptions {
            prepare: PrepareParams::default(),
            cluster: ClusterParams::default(),
            refine: RefineParams::default(),
            min_phase_fraction: 2e-4,
        }
    }
}

/// Checked options.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ValidMapOptions {
    transform: FeatureTransform,
    cluster: ValidClusterParams,
    refine: ValidRefineParams,
    min_phase_fraction: f64,
    given: MapOptions,
}

impl MapOptions {
    /// Checks every stage's options; the Poisson method always works on raw counts.
    pub fn check(self) -> Result<ValidMapOptions> {
        let mut prep = self.prepare;
        if self.cluster.method == Method::Poisson {
            prep.stabilise = Stabilise::None;
            prep.dequantise = false;
        }
        if !(0.0..0.5).contains(&self.min_phase_fraction) {
            return Err(Error::options(
                format!(
                    "minimum phase size {} is out of range",
                    self.min_phase_fraction
                ),
                "give a share of the pixels from 0 to below 0.5, e.g. 0.0002",
            ));
        }
        Ok(ValidMapOptions {
            transform: prep.check()?,
            cluster: self.cluster.check()?,
            refine: self.refine.check()?,
            min_phase_fraction: self.min_phase_fraction,
            given: MapOptions {
                prepare: prep,
                ..self
            },
        })
    }
}

impl ValidMapOptions {
    /// The options as they were applied.
    pub fn options(&self) -> &MapOptions {
        &self.given
    }

    /// The checked feature transform.
    pub fn transform(&self) -> FeatureTransform {
        self.transform
    }

    /// The checked refine options.
    pub fn refine(&self) -> ValidRefineParams {
        self.refine
    }
}

/// Everything the main job computes for a field.
#[derive(Debug, Clone)]
pub struct MapResult {
    /// The final model (after simplification).
    pub clusters: Clusters,
    /// BIC per phase count (empty for a fixed count).
    pub curve: Vec<CurvePoint>,
    /// Phases merged or dissolved after BIC, with the reason.
    pub simplifications: Vec<Simplification>,
    /// Labels: 0 = unassigned, else the phase id of the table.
    pub segmentation: Segmentation,
    /// Per-phase statistics.
    pub table: PhaseTable,
    /// Counts on the label grid (binned if asked).
    pub counts: MapStack,
    /// The empty-pixel threshold used, total counts per pixel.
    pub min_counts_used: f64,
    /// Pixels the model was fitted on.
    pub fitted_pixels: usize,
    /// The method whose likelihood chose the phases: the Poisson mixture whatever the
    /// method, when the model was fitted here; the model's own with a saved model.
    pub counted_by: Method,
    /// The X-ray yield across the field, divided out of `counts` where applied.
    pub xray_yield: YieldField,
}

/// Runs the main job on one field.
pub fn map_stack(stack: MapStack, opts: &ValidMapOptions) -> Result<MapResult> {
    map_stack_with_progress(stack, opts, &mut |_| {})
}

/// Runs the main job, telling `progress` the name of each stage as it starts (the command
/// line shows it; the library never prints).
///
/// The phases are counted and a first labelling made ([`choose_phases`]); the X-ray yield
/// across the field is estimated from that labelling ([`crate::xray_yield`]). Where the
/// yield is uneven, or the method is not the one that counted, the model is fitted again
/// from the first labelling on the (corrected) counts before the last labelling.
///
/// With k-means or the Gaussian mixture, the phases are counted (or, with a fixed count,
/// found) with the Poisson mixture, whose likelihood is the one that describes counts, and
/// the chosen method is then fitted from that partition: the Gaussian methods' own BIC
/// splits a large phase along its counting noise, and fitted directly with N components
/// they spend one on a band of boundary pixels or a split matrix and lose a small phase.
/// So the phases do not depend on the method; the method draws the boundaries.
pub fn map_stack_with_progress(
    stack: MapStack,
    opts: &ValidMapOptions,
    progress: &mut dyn FnMut(&str),
) -> Result<MapResult> {
    let p = opts.cluster.get();
    let by_poisson = p.method != Method::Poisson;
    let counting = if by_poisson {
        MapOptions {
            cluster: ClusterParams {
                method: Method::Poisson,
                ..*p
            },
            ..*opts.options()
        }
        .check()?
    } else {
        *opts
    };
    progress("preparing features");
    let t = crate::profile::stage("prepare");
    let f = prepare(stack, &counting.transform)?;
    drop(t);
    let chosen = choose_phases(&f, &counting, progress)?;
    progress("estimating the X-ray yield");
    let t = crate::profile::stage("yield");
    let shading = crate::xray_yield::estimate(&f.counts, &chosen.seg.labels, chosen.clusters.k());
    drop(t);
    if !shading.applied && !by_poisson {
        return Ok(finish(f, chosen, shading, opts, progress));
    }
    let mut counts = into_counts(f);
    shading.correct(&mut counts);
    progress("fitting the phase model");
    let t = crate::profile::stage("prepare");
    let f = prepare(counts, &opts.transform.unbinned())?;
    drop(t);
    let t = crate::profile::stage("fit");
    let k = chosen.clusters.k();
    let first = into_labels(chosen.seg);
    let fit = select::fit_from_labels(&f, &first, k, &opts.cluster)?;
    drop(t);
    let t = crate::profile::stage("refine");
    let seg = refine(&f, &fit.clusters, &opts.refine);
    drop(t);
    drop(first);
    let chosen = Chosen {
        clusters: fit.clusters,
        curve: chosen.curve,
        simplifications: chosen.simplifications,
        seg,
        fitted_pixels: fit.fitted_pixels,
        counted_by: chosen.counted_by,
    };
    Ok(finish(f, chosen, shading, opts, progress))
}

/// The counts of prepared features; the features themselves are freed here, not at the
/// end of the caller's scope.
fn into_counts(f: Features) -> MapStack {
    f.counts
}

/// The labels of a segmentation; the rest of it is freed here.
fn into_labels(seg: Segmentation) -> Vec<u16> {
    seg.labels
}

/// The phases of a field before the last labelling.
struct Chosen {
    clusters: Clusters,
    curve: Vec<CurvePoint>,
    simplifications: Vec<Simplification>,
    /// A first segmentation with `clusters`.
    seg: Segmentation,
    fitted_pixels: usize,
    counted_by: Method,
}

/// Fits the Poisson mixture with spare components ([`select::fit`]; `opts` are the
/// counting options), removes bands of mixed boundary pixels, phases below the size floor
/// and duplicates, merges down to a fixed count, and labels the field once.
fn choose_phases(
    f: &Features,
    opts: &ValidMapOptions,
    progress: &mut dyn FnMut(&str),
) -> Result<Chosen> {
    progress("fitting the phase model");
    let t = crate::profile::stage("fit");
    let fit = select::fit(f, &opts.cluster)?;
    drop(t);
    let st = opts.transform.params().stabilise;
    // Fitted with spare components: simplified.
    let (mut clusters, mut simplifications) = simplify::merge_indistinguishable(fit.clusters, st);
    let min_px = (opts.min_phase_fraction * f.pixels() as f64)
        .ceil()
        .max(1.0) as usize;
    progress("labelling pixels");
    let t = crate::profile::stage("refine");
    let mut seg = refine(f, &clusters, &opts.refine);
    drop(t);
    // Dissolve boundary bands and phases below the size floor, then label again.
    for _ in 0..8 {
        if clusters.k() < 2 {
            break;
        }
        let drop = bands_and_specks(f, &clusters, &seg, st, min_px);
        if drop.is_empty() || drop.len() >= clusters.k() {
            break;
        }
        for (c, note) in drop.into_iter().rev() {
            clusters = clusters.without(c);
            simplifications.push(note);
        }
        seg = refine(f, &clusters, &opts.refine);
    }
    // A fixed count: merge the closest phases until the count asked for remains (fewer
    // is what the data separate; the report says so).
    if let PhaseCount::Fixed(want) = opts.cluster.get().phases {
        if clusters.k() > want {
            while clusters.k() > want {
                let (a, b, j) = simplify::closest_pair(&clusters, st);
                simplifications.push(Simplification {
                    action: format!(
                        "merged the two closest phases ({} and {}) to give the {want} phases asked for",
                        simplify::fmt_counts(&clusters.expected_counts(a, st)),
                        simplify::fmt_counts(&clusters.expected_counts(b, st))
                    ),
                    value: j,
                });
                clusters = clusters.merged(a, b);
            }
            seg = refine(f, &clusters, &opts.refine);
        }
    }
    Ok(Chosen {
        clusters,
        curve: fit.curve,
        simplifications,
        seg,
        fitted_pixels: fit.fitted_pixels,
        counted_by: opts.cluster.get().method,
    })
}

/// The components to dissolve, in ascending order: those below the size floor of `min_px`
/// pixels, and bands of mixed boundary pixels (a mixture of the others with few interior
/// pixels).
fn bands_and_specks(
    f: &Features,
    clusters: &Clusters,
    seg: &Segmentation,
    st: Stabilise,
    min_px: usize,
) -> Vec<(usize, Simplification)> {
    let inside = interior_fractions(seg, clusters.k());
    let mut ends: Vec<Vec<f64>> = (0..clusters.k())
        .map(|c| clusters.expected_counts(c, st))
        .collect();
    ends.push(vec![0.0; f.dims]);
    let mut drop: Vec<(usize, Simplification)> = Vec::new();
    for (c, &(px, interior)) in inside.iter().enumerate() {
        if px < min_px {
            drop.push((
                c,
                Simplification {
                    action: format!(
                        "dissolved a component of {px} pixels, below the size floor of {min_px}"
                    ),
                    value: px as f64,
                },
            ));
        } else if let Some((dev, weights)) = simplify::nearest_mixture(c, &ends) {
            if dev < simplify::MIXTURE_WITHIN && interior < BOUNDARY_INTERIOR {
                drop.push((
                    c,
                    Simplification {
                        action: format!(
                            "dissolved a band of mixed pixels ({} ≈ {}; {:.1} % interior pixels)",
                            simplify::fmt_counts(&ends[c]),
                            simplify::describe_mixture(&weights, &ends, clusters.k()),
                            100.0 * interior
                        ),
                        value: dev,
                    },
                ));
            }
        }
    }
    drop
}

/// Per-phase averaging after a first segmentation: re-estimates each phase from its
/// interior pixels, labels the field again, and computes the phase table.
fn finish(
    f: Features,
    chosen: Chosen,
    xray_yield: YieldField,
    opts: &ValidMapOptions,
    progress: &mut dyn FnMut(&str),
) -> MapResult {
    let Chosen {
        mut clusters,
        curve,
        simplifications,
        mut seg,
        fitted_pixels,
        counted_by,
    } = chosen;
    let means = interior_means(&f, &seg, clusters.k());
    if means.iter().any(Option::is_some) {
        for (c, m) in means.iter().enumerate() {
            if let Some(m) = m {
                clusters = clusters.with_mean(c, m);
            }
        }
        let _t = crate::profile::stage("refine again");
        // Only the labels of the first pass are a start for the second: free the rest
        // before the second pass allocates its own.
        seg.confidence = Vec::new();
        seg.smoothed_labels = Vec::new();
        seg.outliers = Vec::new();
        seg = refine_from(&f, &clusters, &opts.refine, Some(&seg));
    }
    progress("phase statistics");
    let _t = crate::profile::stage("phase table");
    let table = phase_table(&mut seg, &f.counts, clusters.k());
    MapResult {
        clusters,
        curve,
        simplifications,
        segmentation: seg,
        table,
        counts: f.counts,
        min_counts_used: f.min_counts_used,
        fitted_pixels,
        counted_by,
        xray_yield,
    }
}

/// Labels a field with a saved model's clusters (no refit): prepare with the model's
/// options, score and clean up every pixel, and number the phases in the model's order
/// (`order`: model indices in id order), keeping phases absent from this field.
pub fn label_with_model(
    stack: MapStack,
    opts: &ValidMapOptions,
    clusters: &Clusters,
    order: &[usize],
) -> Result<MapResult> {
    let f = prepare(stack, &opts.transform)?;
    if f.dims != clusters.d() {
        return Err(Error::internal(format!(
            "the model has {} dimensions but the field {}",
            clusters.d(),
            f.dims
        )));
    }
    let mut seg = refine(&f, clusters, &opts.refine);
    // The yield of this field, from the model's first labelling; where it is uneven the
    // corrected counts are labelled again.
    let shading = crate::xray_yield::estimate(&f.counts, &seg.labels, clusters.k());
    let f = if shading.applied {
        let mut counts = into_counts(f);
        shading.correct(&mut counts);
        let f = prepare(counts, &opts.transform.unbinned())?;
        seg = refine(&f, clusters, &opts.refine);
        f
    } else {
        f
    };
    let table = phase_table_in_order(&mut seg, &f.counts, clusters.k(), Some(order));
    Ok(MapResult {
        clusters: clusters.clone(),
        curve: Vec::new(),
        simplifications: Vec::new(),
        segmentation: seg,
        table,
        counts: f.counts,
        min_counts_used: f.min_counts_used,
        fitted_pixels: 0,
        counted_by: clusters.method(),
        xray_yield: shading,
    })
}

/// A component with fewer interior pixels (two or more pixels from any other label) than
/// this share is a boundary band, if it is also a mixture of the others (common practice,
/// no source; a five-pixel layer keeps about a fifth of its pixels inside).
pub const BOUNDARY_INTERIOR: f64 = 0.02;

/// The composition stage on a mapped field: compositions, reference names and beam
/// advice ([`crate::characterise`]); updates the result's phase table.
pub fn characterise(
    result: &mut MapResult,
    opts: &crate::characterise::ValidCompositionOptions,
) -> Result<(
    crate::characterise::CompositionReport,
    crate::advisor::Advice,
)> {
    let seg = &result.segmentation;
    crate::characterise::characterise(
        &mut result.table,
        &seg.labels,
        seg.width,
        seg.height,
        &result.counts,
        opts,
    )
}
