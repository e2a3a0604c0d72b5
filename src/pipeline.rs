//! The main job for one field, stage after stage: prepare → phase count (fit, simplify,
//! refine; [`crate::phase_count`]) → X-ray yield → refit → refine → phase statistics.
//! No I/O here: loading and writing belong to `io` and `report`.

use crate::cluster::select::{self, ClusterParams};
use crate::cluster::{Clusters, Method};
use crate::error::{Error, Result};
pub use crate::map_options::{MapOptions, ValidMapOptions};
use crate::phase_count::{self, Counted, Decision};
use crate::phases::{phase_table, phase_table_in_order, PhaseTable};
use crate::prepare::prepare;
use crate::prepare::Features;
use crate::refine::{interior_means, refine, refine_from, Segmentation};
use crate::stack::MapStack;
use crate::xray_yield::YieldField;

/// Everything the main job computes for a field.
#[derive(Debug, Clone)]
pub struct MapResult {
    /// The final model (after simplification).
    pub clusters: Clusters,
    /// How the phase count was reached.
    pub decision: Decision,
    /// Labels: 0 = unassigned, else the phase id of the table.
    pub segmentation: Segmentation,
    /// Per-phase statistics.
    pub table: PhaseTable,
    /// Counts on the label grid (binned if asked).
    pub counts: MapStack,
    /// The empty-pixel threshold used, total counts per pixel.
    pub min_counts_used: f64,
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
/// The phases are counted and a first labelling made ([`phase_count::decide`]); the X-ray yield
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
    let p = opts.cluster().get();
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
    let f = prepare(stack, &counting.transform())?;
    drop(t);
    let mut chosen = phase_count::decide(&f, &counting, progress)?;
    if by_poisson {
        chosen.decision.counted_with = Some(Method::Poisson);
    }
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
    let f = prepare(counts, &opts.transform().unbinned())?;
    drop(t);
    let t = crate::profile::stage("fit");
    let k = chosen.clusters.k();
    let first = into_labels(chosen.seg);
    let fit = select::fit_from_labels(&f, &first, k, opts.cluster())?;
    drop(t);
    let t = crate::profile::stage("refine");
    let seg = refine(&f, &fit.clusters, &opts.refine());
    drop(t);
    drop(first);
    let chosen = Counted {
        decision: Decision {
            fitted_pixels: fit.fitted_pixels,
            ..chosen.decision
        },
        clusters: fit.clusters,
        seg,
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

/// Per-phase averaging after a first segmentation: re-estimates each phase from its
/// interior pixels, labels the field again, and computes the phase table.
fn finish(
    f: Features,
    chosen: Counted,
    xray_yield: YieldField,
    opts: &ValidMapOptions,
    progress: &mut dyn FnMut(&str),
) -> MapResult {
    let Counted {
        decision,
        mut clusters,
        mut seg,
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
        seg = refine_from(&f, &clusters, &opts.refine(), Some(&seg));
    }
    progress("phase statistics");
    let _t = crate::profile::stage("phase table");
    let table = phase_table(&mut seg, &f.counts, clusters.k());
    MapResult {
        clusters,
        decision,
        segmentation: seg,
        table,
        counts: f.counts,
        min_counts_used: f.min_counts_used,
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
    let f = prepare(stack, &opts.transform())?;
    if f.dims != clusters.d() {
        return Err(Error::internal(format!(
            "the model has {} dimensions but the field {}",
            clusters.d(),
            f.dims
        )));
    }
    let mut seg = refine(&f, clusters, &opts.refine());
    // The yield of this field, from the model's first labelling; where it is uneven the
    // corrected counts are labelled again.
    let shading = crate::xray_yield::estimate(&f.counts, &seg.labels, clusters.k());
    let f = if shading.applied {
        let mut counts = into_counts(f);
        shading.correct(&mut counts);
        let f = prepare(counts, &opts.transform().unbinned())?;
        seg = refine(&f, clusters, &opts.refine());
        f
    } else {
        f
    };
    let table = phase_table_in_order(&mut seg, &f.counts, clusters.k(), Some(order));
    Ok(MapResult {
        clusters: clusters.clone(),
        decision: Decision::saved_model(opts.cluster().get().phases),
        segmentation: seg,
        table,
        counts: f.counts,
        min_counts_used: f.min_counts_used,
        xray_yield: shading,
    })
}

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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_fields::bands;

    const RATES: [[f64; 2]; 3] = [[30.0, 4.0], [4.0, 30.0], [17.0, 17.0]];

    /// Share of pixels whose phase is the true band, each phase taken as the band most of
    /// its pixels lie in.
    fn agreement(labels: &[u16], truth: &[usize], k: usize) -> f64 {
        let mut votes = vec![vec![0usize; RATES.len()]; k + 1];
        for (&l, &t) in labels.iter().zip(truth) {
            votes[usize::from(l)][t] += 1;
        }
        let right: usize = votes[1..].iter().map(|v| v.iter().max().unwrap()).sum();
        right as f64 / labels.len() as f64
    }

    /// Every method counts the phases with the Poisson mixture and then draws its own
    /// boundaries: three bands are found as three phases by each, with the count recorded
    /// as made by the Poisson mixture for the other two.
    #[test]
    fn each_method_finds_the_three_bands() {
        let (stack, truth) = bands(60, 48, &RATES, 6);
        for method in [Method::Poisson, Method::Kmeans, Method::Gmm] {
            let mut o = MapOptions::default();
            o.cluster.method = method;
            let r = map_stack(stack.clone(), &o.check().unwrap()).unwrap();
            assert_eq!(r.table.phases.len(), 3, "{method:?}");
            let a = agreement(&r.segmentation.labels, &truth, 3);
            assert!(a > 0.98, "{method:?}: {a}");
            let by_poisson = (method != Method::Poisson).then_some(Method::Poisson);
            assert_eq!(r.decision.counted_with, by_poisson, "{method:?}");
        }
    }

    /// A saved model labels a new field of the same material in its own phase order, and
    /// keeps a phase the new field lacks in the table, with no pixels.
    #[test]
    fn a_saved_model_keeps_its_order_and_its_absent_phases() {
        let (train, _) = bands(60, 48, &RATES, 7);
        let opts = MapOptions::default().check().unwrap();
        let fitted = map_stack(train, &opts).unwrap();
        let order: Vec<usize> = fitted.table.phases.iter().map(|p| p.model_index).collect();
        let (two, truth) = bands(40, 48, &RATES[..2], 8);
        let r = label_with_model(two, &opts, &fitted.clusters, &order).unwrap();
        assert_eq!(r.table.phases.len(), 3);
        let ids: Vec<usize> = r.table.phases.iter().map(|p| p.model_index).collect();
        assert_eq!(ids, order);
        let empty: Vec<usize> = r.table.phases.iter().map(|p| p.pixels).collect();
        assert_eq!(empty.iter().filter(|&&n| n == 0).count(), 1, "{empty:?}");
        assert!(agreement(&r.segmentation.labels, &truth, 3) > 0.98);
    }
}
