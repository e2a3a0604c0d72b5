//! The phase-count decision: how many phases a field holds, and why.
//!
//! The Poisson mixture is fitted with spare components and its BIC curve swept
//! ([`select::fit`]); components a single pixel cannot tell apart are merged
//! ([`simplify::merge_indistinguishable`]); the field is labelled, and bands of mixed
//! boundary pixels and components below the size floor are dissolved and the field labelled
//! again, until none is left; a fixed count then merges the closest phases down to the
//! count asked for. The result is one [`Decision`] record that the report prints as it is.

use serde::{Deserialize, Serialize};

use crate::cluster::select::{self, CurvePoint, PhaseCount};
use crate::cluster::simplify::{self, Simplification};
use crate::cluster::{Clusters, Method};
use crate::error::Result;
use crate::map_options::ValidMapOptions;
use crate::prepare::{Features, Stabilise};
use crate::refine::{interior_fractions, refine, Segmentation};

/// How the phase count of a field was reached.
#[derive(Debug, Clone, PartialEq)]
pub struct Decision {
    /// The count asked for.
    pub asked: PhaseCount,
    /// BIC per candidate count (empty with a saved model).
    pub curve: Vec<CurvePoint>,
    /// Components merged or dissolved after BIC, with the reason.
    pub simplifications: Vec<Simplification>,
    /// The method whose likelihood chose the count, where it is not the one that
    /// labelled the pixels.
    pub counted_with: Option<Method>,
    /// Pixels the final model was fitted on (0 with a saved model).
    pub fitted_pixels: usize,
}

/// The report's account of a [`Decision`] (the `phase_count` of report.json).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseCountReport {
    /// `auto` or `fixed`.
    pub mode: String,
    /// Phases found.
    pub phases: usize,
    /// BIC per candidate count (auto only).
    pub curve: Vec<CurvePoint>,
    /// Count with the lowest BIC (auto only).
    pub bic_minimum: Option<usize>,
    /// Components merged or dissolved after BIC.
    pub simplifications: Vec<Simplification>,
    /// The method whose likelihood and BIC chose the count, where it is not the method
    /// that labelled the pixels (with k-means or the Gaussian mixture the phases are found
    /// with the Poisson mixture, then the method is fitted from its phases).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub counted_with: Option<Method>,
}

impl Decision {
    /// The decision behind a field labelled with a saved model: the model's count, no
    /// curve and no simplification here.
    pub fn saved_model(asked: PhaseCount) -> Decision {
        Decision {
            asked,
            curve: Vec::new(),
            simplifications: Vec::new(),
            counted_with: None,
            fitted_pixels: 0,
        }
    }

    /// The phase count of the lowest BIC in the sweep, if there was one.
    pub fn bic_minimum(&self) -> Option<usize> {
        self.curve
            .iter()
            .min_by(|a, b| a.bic.total_cmp(&b.bic))
            .map(|c| c.k)
    }

    /// The account for the report, with `found` phases in the final table.
    pub fn report(&self, found: usize) -> PhaseCountReport {
        let auto = matches!(self.asked, PhaseCount::Auto { .. });
        PhaseCountReport {
            mode: if auto { "auto".into() } else { "fixed".into() },
            phases: found,
            curve: self.curve.clone(),
            bic_minimum: self.bic_minimum(),
            simplifications: self.simplifications.clone(),
            counted_with: self.counted_with,
        }
    }

    /// A warning when `auto` found its lowest BIC at the largest count tried and about as
    /// many phases remain (`found`): the count may be held down by the limit.
    pub fn held_at_largest(&self, found: usize) -> Option<String> {
        let auto = matches!(self.asked, PhaseCount::Auto { .. });
        let max = self.curve.iter().map(|c| c.k).max()?;
        (auto && self.bic_minimum()? == max && found + 1 >= max).then(|| format!(
            "the phase count may be limited by the largest count tried: BIC was lowest at {max} components, the most tried, and {found} phases remain; try --phases auto:{}",
            max + 4
        ))
    }

    /// A warning when a fixed count asked for more phases than the data separate.
    pub fn short_of_asked(&self, found: usize) -> Option<String> {
        match self.asked {
            PhaseCount::Fixed(want) if found < want => Some(format!(
                "{want} phases were asked for but the data separate only {found}: the others were bands of mixed boundary pixels, components too small to keep, or duplicates a single pixel cannot tell apart (see the simplifications); check the BSE image for a phase the maps cannot show"
            )),
            _ => None,
        }
    }
}

/// The phases of a field and a first labelling with them.
pub struct Counted {
    /// How the count was reached.
    pub decision: Decision,
    /// The model after the simplifications.
    pub clusters: Clusters,
    /// A first segmentation with `clusters`.
    pub seg: Segmentation,
}

/// A component with fewer interior pixels (two or more pixels from any other label) than
/// this share is a boundary band, if it is also a mixture of the others (common practice,
/// no source; a five-pixel layer keeps about a fifth of its pixels inside).
pub const BOUNDARY_INTERIOR: f64 = 0.02;

/// Rounds of dissolving bands and specks and labelling again (common practice, no
/// source; one or two are the rule).
const DISSOLVE_ROUNDS: usize = 8;

/// Fits the Poisson mixture with spare components ([`select::fit`]; `opts` are the
/// counting options), removes bands of mixed boundary pixels, phases below the size floor
/// and duplicates, merges down to a fixed count, and labels the field once.
pub fn decide(
    f: &Features,
    opts: &ValidMapOptions,
    progress: &mut dyn FnMut(&str),
) -> Result<Counted> {
    progress("fitting the phase model");
    let t = crate::profile::stage("fit");
    let fit = select::fit(f, opts.cluster())?;
    drop(t);
    let st = opts.transform().params().stabilise;
    // Fitted with spare components: simplified.
    let (mut clusters, mut simplifications) = simplify::merge_indistinguishable(fit.clusters, st);
    let min_px = (opts.min_phase_fraction() * f.pixels() as f64)
        .ceil()
        .max(1.0) as usize;
    progress("labelling pixels");
    let t = crate::profile::stage("refine");
    let mut seg = refine(f, &clusters, &opts.refine());
    drop(t);
    // Dissolve boundary bands and phases below the size floor, then label again.
    for _ in 0..DISSOLVE_ROUNDS {
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
        seg = refine(f, &clusters, &opts.refine());
    }
    let asked = opts.cluster().get().phases;
    if let PhaseCount::Fixed(want) = asked {
        if clusters.k() > want {
            clusters = merge_down_to(clusters, want, st, &mut simplifications);
            seg = refine(f, &clusters, &opts.refine());
        }
    }
    Ok(Counted {
        decision: Decision {
            asked,
            curve: fit.curve,
            simplifications,
            counted_with: None,
            fitted_pixels: fit.fitted_pixels,
        },
        clusters,
        seg,
    })
}

/// A fixed count: merges the closest phases until `want` remain (fewer is what the data
/// separate; the report says so), noting each merge.
fn merge_down_to(
    mut clusters: Clusters,
    want: usize,
    st: Stabilise,
    notes: &mut Vec<Simplification>,
) -> Clusters {
    while clusters.k() > want {
        let (a, b, j) = simplify::closest_pair(&clusters, st);
        notes.push(Simplification {
            action: format!(
                "merged the two closest phases ({} and {}) to give the {want} phases asked for",
                simplify::fmt_counts(&clusters.expected_counts(a, st)),
                simplify::fmt_counts(&clusters.expected_counts(b, st))
            ),
            value: j,
        });
        clusters = clusters.merged(a, b);
    }
    clusters
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

#[cfg(test)]
mod tests {
    use super::*;

    fn decision(asked: PhaseCount, ks: &[(usize, f64)]) -> Decision {
        Decision {
            asked,
            curve: ks.iter().map(|&(k, bic)| CurvePoint { k, bic }).collect(),
            ..Decision::saved_model(asked)
        }
    }

    /// The BIC minimum is the lowest point; `auto` at its largest count warns only when
    /// about as many phases remain; the report's mode follows what was asked.
    #[test]
    fn the_limit_warning_needs_the_minimum_at_the_last_count() {
        let auto = PhaseCount::Auto { max: 4 };
        let falling = decision(auto, &[(1, 90.0), (2, 50.0), (3, 40.0), (4, 35.0)]);
        assert_eq!(falling.bic_minimum(), Some(4));
        assert!(falling.held_at_largest(4).unwrap().contains("auto:8"));
        assert!(falling.held_at_largest(3).is_some());
        assert_eq!(
            falling.held_at_largest(2),
            None,
            "two phases left: not held"
        );
        let turning = decision(auto, &[(1, 90.0), (2, 30.0), (3, 40.0), (4, 45.0)]);
        assert_eq!(turning.bic_minimum(), Some(2));
        assert_eq!(turning.held_at_largest(4), None);
        let fixed = decision(
            PhaseCount::Fixed(4),
            falling
                .curve
                .as_slice()
                .iter()
                .map(|c| (c.k, c.bic))
                .collect::<Vec<_>>()
                .as_slice(),
        );
        assert_eq!(
            fixed.held_at_largest(4),
            None,
            "a fixed count is not held by auto's limit"
        );
        assert_eq!(fixed.report(4).mode, "fixed");
        assert_eq!(falling.report(4).mode, "auto");
        assert_eq!(Decision::saved_model(auto).bic_minimum(), None);
    }

    #[test]
    fn a_fixed_count_warns_when_fewer_phases_are_found() {
        let d = Decision::saved_model(PhaseCount::Fixed(5));
        assert!(d
            .short_of_asked(3)
            .unwrap()
            .starts_with("5 phases were asked for but the data separate only 3"));
        assert_eq!(d.short_of_asked(5), None);
        assert_eq!(
            Decision::saved_model(PhaseCount::Auto { max: 10 }).short_of_asked(1),
            None
        );
    }
}
