//! The phase count the user asks for, against fields from the independent forward model
//! (tests/support): `--phases N` with the true N must find every true phase and do at
//! least as well as the automatic count.
//!
//! Thresholds, fixed before measuring: a true phase is found when one phase of the result
//! holds more than half of its pixels, a different one for each true phase (the issue's
//! criterion); pixel agreement with N given no worse than the automatic count's by more
//! than 0.001 (one pixel in a thousand: what changing the count may cost at ties).

mod support;

use std::path::Path;

use support::map_field;
use support::scenarios::{eutectic_braze, score, steel_with_inclusions};

/// Maps the field with `phases` and returns the labels and report.json.
fn map(field: &Path, out: &Path, phases: &str) -> (Vec<u16>, serde_json::Value) {
    map_with(field, out, phases, "poisson")
}

/// Maps the field with `phases` and `method`.
fn map_with(field: &Path, out: &Path, phases: &str, method: &str) -> (Vec<u16>, serde_json::Value) {
    map_field(
        field,
        out,
        &["--no-bse", "--phases", phases, "--method", method],
    )
}

#[test]
fn the_true_phase_count_finds_every_phase_and_matches_auto() {
    for s in [steel_with_inclusions(), eutectic_braze()] {
        let tmp = tempfile::tempdir().unwrap();
        let field = tmp.path().join("field");
        s.write(&field);
        let k = s.phases.len();
        let (auto_labels, _) = map(&field, &tmp.path().join("auto"), "auto");
        let (fixed_labels, report) = map(&field, &tmp.path().join("fixed"), &k.to_string());
        let (auto_best, auto_agree) = score(&s.labels, k, &auto_labels);
        let (best, agree) = score(&s.labels, k, &fixed_labels);
        let names: Vec<&str> = s.phases.iter().map(|p| p.name).collect();
        assert_eq!(
            report["phases"].as_array().unwrap().len(),
            k,
            "{names:?}: {report:#}"
        );
        let mut ids: Vec<u16> = best.iter().map(|b| b.0).collect();
        ids.sort_unstable();
        ids.dedup();
        assert_eq!(
            ids.len(),
            k,
            "{names:?}: two true phases share a found phase: {best:?}"
        );
        for ((name, (_, share)), (_, auto_share)) in names.iter().zip(&best).zip(&auto_best) {
            assert!(
                *share > 0.5,
                "{name}: {share:.3} of its pixels in one phase (auto {auto_share:.3})"
            );
        }
        assert!(
            agree >= auto_agree - 0.001,
            "{names:?}: pixel agreement {agree:.4} with --phases {k}, {auto_agree:.4} with auto"
        );
    }
}

/// Asked for more phases than the field holds, the result keeps only what the data
/// separate (no phase spent on a band of boundary pixels or on noise) and the report says
/// so in its warnings.
#[test]
fn more_phases_than_the_field_holds_are_refused_with_a_warning() {
    let s = steel_with_inclusions();
    let tmp = tempfile::tempdir().unwrap();
    let field = tmp.path().join("field");
    s.write(&field);
    let (labels, report) = map(&field, &tmp.path().join("out"), "7");
    let found = report["phases"].as_array().unwrap().len();
    let (best, _) = score(&s.labels, s.phases.len(), &labels);
    assert!(best.iter().all(|b| b.1 > 0.5), "{best:?}");
    assert!(found < 7, "{found} phases: {report:#}");
    assert!(
        report["warnings"].to_string().contains(&format!(
            "7 phases were asked for but the data separate only {found}"
        )),
        "{:#}",
        report["warnings"]
    );
}

/// The automatic count does not depend on the method: k-means and the Gaussian mixture
/// find the same phases as the default on the test fields (every true phase held more
/// than half by its own phase, as above) and on the bundled sample (the same count, and
/// pixel agreement with the default's labels of at least 0.99: the methods may still draw
/// boundaries a little differently, common practice, no source).
#[test]
fn the_automatic_count_does_not_depend_on_the_method() {
    for s in [steel_with_inclusions(), eutectic_braze()] {
        let tmp = tempfile::tempdir().unwrap();
        let field = tmp.path().join("field");
        s.write(&field);
        let k = s.phases.len();
        for method in ["kmeans", "gmm"] {
            let (labels, report) = map_with(&field, &tmp.path().join(method), "auto", method);
            let names: Vec<&str> = s.phases.iter().map(|p| p.name).collect();
            assert_eq!(
                report["phases"].as_array().unwrap().len(),
                k,
                "{method} on {names:?}: {:#}",
                report["phase_count"]
            );
            assert_eq!(report["phase_count"]["counted_with"], "poisson");
            let (best, _) = score(&s.labels, k, &labels);
            let mut ids: Vec<u16> = best.iter().map(|b| b.0).collect();
            ids.sort_unstable();
            ids.dedup();
            assert_eq!(ids.len(), k, "{method} on {names:?}: {best:?}");
            assert!(
                best.iter().all(|b| b.1 > 0.5),
                "{method} on {names:?}: {best:?}"
            );
        }
    }
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let tmp = tempfile::tempdir().unwrap();
    let (reference, report) = map_with(&sample, &tmp.path().join("poisson"), "auto", "poisson");
    let k = report["phases"].as_array().unwrap().len();
    assert!(report["phase_count"].get("counted_with").is_none());
    for method in ["kmeans", "gmm"] {
        let (labels, report) = map_with(&sample, &tmp.path().join(method), "auto", method);
        assert_eq!(report["phases"].as_array().unwrap().len(), k, "{method}");
        let truth: Vec<usize> = reference.iter().map(|&l| usize::from(l)).collect();
        let (best, agree) = score(&truth, k + 1, &labels);
        assert!(
            agree >= 0.99,
            "{method}: agreement {agree:.4} with the default ({best:?})"
        );
    }
}
