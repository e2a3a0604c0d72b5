//! Reference phases and matching: which known phase each mapped phase most resembles.
//!
//! **Library files** (format `modalmap.phases/1`, TOML): a `format` line and one
//! `[[phase]]` table per reference with `name`, either `formula` or `composition` (wt%, any
//! scale, normalised here), and optional `density` (g/cm³) and `group`. The built-in set
//! (`data/reference-phases.toml`) holds common phases of metallurgy, ceramics and geology;
//! files given with `--library` add to it, and an entry with the name of a built-in one
//! replaces it.
//!
//! **Matching.** A reference is compared on the elements that were measured (the mapped
//! ones, plus oxygen when it is computed by stoichiometry): its mass fractions of those
//! elements are renormalised to 1, since the analysis cannot see the rest. The distance is
//! d² = Σ (c_i − r_i)² / (σ_i² + τ_i²), with σ_i the counting uncertainty of the measured
//! fraction and τ_i the tolerance of the method: semi-quantitative analysis is not better
//! than a few per cent, and uncalibrated compositions (every k-factor 1) are off by tens
//! of per cent of the amount. The match quality is the chance that a phase of the
//! reference's composition gives a distance at least this large, P(χ²_ν ≥ d²) with
//! ν = elements − 1 (the fractions sum to 1). Below [`MIN_QUALITY`] there is no match.
//! References that the measured elements cannot tell apart (distances within 1 of the
//! best) are listed as alternatives, and the one with the least unmeasured mass is
//! chosen: with Sn mapped but not O, tin and cassiterite look the same.

use std::collections::BTreeMap;
use std::path::Path;

use serde::{Deserialize, Serialize};
use statrs::distribution::{ChiSquared, ContinuousCDF};

use crate::chem::{element, parse_formula, Composition, ElementInfo};
use crate::error::{Error, Result};

/// The library file format name and version.
pub const FORMAT: &str = "modalmap.phases/1";

/// Matches below this quality are reported as "no match" (common practice, no source: a 1 %
/// significance level).
pub const MIN_QUALITY: f64 = 0.01;

/// A reference must have at least this share of its mass in measured elements to be
/// compared at all (common practice, no source).
pub const MIN_MEASURED_SHARE: f64 = 0.1;

const BUILTIN: &str = include_str!("../data/reference-phases.toml");

/// One reference phase.
#[derive(Debug, Clone, PartialEq)]
pub struct Reference {
    /// Name used in the outputs.
    pub name: String,
    /// Formula, when given as one.
    pub formula: Option<String>,
    /// Composition.
    pub composition: Composition,
    /// Density, g/cm³.
    pub density: Option<f64>,
    /// Free-text group (metal, mineral, ...).
    pub group: Option<String>,
    /// Where the entry came from (`built-in` or a file path).
    pub origin: String,
}

/// A set of reference phases.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Library {
    /// The references.
    pub phases: Vec<Reference>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct LibraryFile {
    format: String,
    #[serde(rename = "phase", default)]
    phases: Vec<EntryFile>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct EntryFile {
    name: String,
    formula: Option<String>,
    composition: Option<BTreeMap<String, f64>>,
    density: Option<f64>,
    group: Option<String>,
}

impl Library {
    /// The built-in starter set.
    pub fn builtin() -> Library {
        Library::parse(BUILTIN, Path::new("built-in reference phases"), "built-in")
            .expect("the built-in library is valid (tested)")
    }

    /// Reads a library file.
    pub fn load(path: &Path) -> Result<Library> {
        let text = crate::guard::read_text(
            path,
            "reference-phase library (--library)",
            crate::guard::MAX_TEXT_BYTES,
        )
        .map_err(|e| Error::options_in(path, e.problem, e.fix))?;
        Library::parse(&text, path, &path.display().to_string())
    }

    /// Parses library text; `path` names it in errors.
    pub fn parse(text: &str, path: &Path, origin: &str) -> Result<Library> {
        let bad = |problem: String, fix: &str| Error::options_in(path, problem, fix);
        let file: LibraryFile = toml::from_str(text).map_err(|e| {
            bad(
                format!("is not a valid reference-phase library: {}", e.message()),
                "write a `format = \"modalmap.phases/1\"` line and [[phase]] tables with name and formula (or composition)",
            )
        })?;
        if file.format != FORMAT {
            return Err(bad(
                format!("has format \"{}\", not \"{FORMAT}\"", file.format),
                "set format = \"modalmap.phases/1\"",
            ));
        }
        let mut phases: Vec<Reference> = Vec::new();
        for (i, e) in file.phases.into_iter().enumerate() {
            let at = format!("phase {} (\"{}\")", i + 1, e.name);
            if e.name.trim().is_empty() {
                return Err(bad(
                    format!("phase {} has an empty name", i + 1),
                    "name every phase",
                ));
            }
            if phases.iter().any(|p| p.name == e.name) {
                return Err(bad(
                    format!("{at} is named twice"),
                    "give every phase its own name",
                ));
            }
            let composition = match (&e.formula, &e.composition) {
                (Some(f), None) => parse_formula(f).map_err(|err| {
                    bad(format!("{at}: {err}"), "write the formula like Cu6Sn5, (Mg0.6Fe0.4)2SiO4 or CaSO4·2H2O")
                })?,
                (None, Some(c)) => composition_from_wt(c).map_err(|p| {
                    bad(format!("{at}: {p}"), "give composition = { El = wt%, ... } with element symbols and positive amounts")
                })?,
                _ => {
                    return Err(bad(
                        format!("{at} needs exactly one of formula and composition"),
                        "give formula = \"...\" or composition = { El = wt%, ... }",
                    ))
                }
            };
            if let Some(d) = e.density {
                if !(d.is_finite() && d > 0.0 && d < 30.0) {
                    return Err(bad(
                        format!("{at}: density {d} g/cm³ is not plausible"),
                        "give the density in g/cm³ (0 to 30)",
                    ));
                }
            }
            phases.push(Reference {
                name: e.name,
                formula: e.formula,
                composition,
                density: e.density,
                group: e.group,
                origin: origin.to_string(),
            });
        }
        Ok(Library { phases })
    }

    /// Adds `other`'s references; one with the name of an existing reference replaces it.
    pub fn extend(&mut self, other: Library) {
        for r in other.phases {
            match self.phases.iter_mut().find(|p| p.name == r.name) {
                Some(p) => *p = r,
                None => self.phases.push(r),
            }
        }
    }

    /// The reference of that name (case-insensitive), if any.
    pub fn find(&self, name: &str) -> Option<&Reference> {
        self.phases
            .iter()
            .find(|p| p.name.eq_ignore_ascii_case(name))
    }
}

/// A composition from element → wt% (any scale).
pub fn composition_from_wt(c: &BTreeMap<String, f64>) -> std::result::Result<Composition, String> {
    if c.is_empty() {
        return Err("the composition is empty".into());
    }
    let mut parts = Vec::new();
    for (sym, &w) in c {
        let e = element(sym).ok_or_else(|| format!("`{sym}` is not an element symbol"))?;
        if !(w.is_finite() && w >= 0.0) {
            return Err(format!("{sym} = {w} is not a non-negative amount"));
        }
        if w > 0.0 {
            parts.push((e, w));
        }
    }
    if parts.is_empty() {
        return Err("every amount is zero".into());
    }
    Ok(Composition::from_mass_fractions(&parts))
}

/// How well a measured phase matches the library.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Match {
    /// The closest reference (`None` below the quality threshold: "no match").
    pub reference: Option<String>,
    /// Its formula, if it has one.
    pub formula: Option<String>,
    /// The closest reference even when it is not a match.
    pub closest: String,
    /// Match quality P(χ²_ν ≥ d²), 0..1.
    pub quality: f64,
    /// d² of the closest reference.
    pub distance2: f64,
    /// Degrees of freedom ν.
    pub dof: usize,
    /// Other references the measured elements cannot tell apart from the chosen one.
    pub alternatives: Vec<String>,
    /// The name to give the phase: the reference when it alone fits, "A or B" when the
    /// data cannot separate several, with the elements that would separate them but were
    /// not mapped; `None` when nothing fits.
    #[serde(default)]
    pub name: Option<String>,
    /// How the name was decided, in words.
    #[serde(default)]
    pub decision: String,
    /// Density of the chosen reference, g/cm³.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub density: Option<f64>,
}

/// Tolerance τ of a measured mass fraction `c` against a reference fraction `r` (both
/// 0..1): 2 % absolute + 5 % of the amount when calibrated, 5 % + 25 % when not (common
/// practice for semi-quantitative EDS, no source). An element the reference lacks is held
/// to the calibrated tolerance either way: no k-factor turns a detected element's counts
/// into nothing, so an unknown factor cannot excuse them.
pub fn tolerance(c: f64, r: f64, calibrated: bool) -> f64 {
    let m = c.max(r);
    if calibrated || r == 0.0 {
        0.02 + 0.05 * m
    } else {
        0.05 + 0.25 * m
    }
}

/// Matches one measured composition. `elements` are the measured elements, `wt` and
/// `wt_sd` their mass fractions and uncertainties in %. `None` when no reference shares
/// enough measured elements to be compared.
pub fn best_match(
    lib: &Library,
    elements: &[ElementInfo],
    wt: &[f64],
    wt_sd: &[f64],
    calibrated: bool,
) -> Option<Match> {
    let total: f64 = wt.iter().sum();
    if total <= 0.0 || elements.len() < 2 {
        return None;
    }
    let c: Vec<f64> = wt.iter().map(|w| w / total).collect();
    let s: Vec<f64> = wt_sd.iter().map(|w| w / total).collect();
    let dof = elements.len() - 1;
    let chi = ChiSquared::new(dof as f64).ok()?;
    let mut scored: Vec<(f64, f64, &Reference)> = lib
        .phases
        .iter()
        .filter_map(|r| {
            let mf = r.composition.mass_fractions();
            let of = |e: &ElementInfo| {
                mf.iter()
                    .filter(|(x, _)| x.symbol == e.symbol)
                    .map(|(_, w)| w)
                    .sum::<f64>()
            };
            let measured: f64 = elements.iter().map(of).sum();
            if measured < MIN_MEASURED_SHARE {
                return None;
            }
            let d2 = elements
                .iter()
                .enumerate()
                .map(|(i, e)| {
                    let ri = of(e) / measured;
                    let tau = tolerance(c[i], ri, calibrated);
                    (c[i] - ri).powi(2) / (s[i] * s[i] + tau * tau)
                })
                .sum::<f64>();
            d2.is_finite().then_some((d2, 1.0 - measured, r))
        })
        .collect();
    scored.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    let best_d2 = scored.first()?.0;
    // Among references within 1 of the best distance, prefer the most fully measured.
    let mut close: Vec<&(f64, f64, &Reference)> =
        scored.iter().filter(|x| x.0 <= best_d2 + 1.0).collect();
    close.sort_by(|a, b| a.1.total_cmp(&b.1).then(a.0.total_cmp(&b.0)));
    let chosen = close[0];
    let quality = 1.0 - chi.cdf(chosen.0);
    let matched = quality >= MIN_QUALITY;
    let candidates: Vec<&Reference> = close.iter().map(|x| x.2).collect();
    let (name, decision) = decide_name(matched, &candidates, elements, quality);
    Some(Match {
        reference: matched.then(|| chosen.2.name.clone()),
        formula: chosen.2.formula.clone(),
        closest: chosen.2.name.clone(),
        quality,
        distance2: chosen.0,
        dof,
        alternatives: close[1..].iter().map(|x| x.2.name.clone()).collect(),
        name,
        decision,
        density: chosen.2.density,
    })
}

/// The phase's name from the candidates that fit within the uncertainty (best first):
/// one alone names the phase; several give "A or B" (at most three, then "…"), with the
/// elements that would separate them but were not measured.
fn decide_name(
    matched: bool,
    candidates: &[&Reference],
    measured: &[ElementInfo],
    quality: f64,
) -> (Option<String>, String) {
    if !matched {
        return (
            None,
            format!(
                "no reference fits (best quality {quality:.3}, under {MIN_QUALITY}): named by its major elements"
            ),
        );
    }
    if candidates.len() == 1 {
        return (
            Some(candidates[0].name.clone()),
            format!("one reference fits within the uncertainty (quality {quality:.2})"),
        );
    }
    let mut unmeasured: Vec<&str> = Vec::new();
    for r in candidates {
        for (e, w) in r.composition.mass_fractions() {
            if w >= 0.01
                && !measured.iter().any(|m| m.symbol == e.symbol)
                && !unmeasured.contains(&e.symbol)
            {
                unmeasured.push(e.symbol);
            }
        }
    }
    let names: Vec<&str> = candidates.iter().take(3).map(|r| r.name.as_str()).collect();
    let mut name = match (names.len(), candidates.len()) {
        (2, _) => format!("{} or {}", names[0], names[1]),
        (_, 3) => format!("{}, {} or {}", names[0], names[1], names[2]),
        _ => format!("{}, {}, {} or others", names[0], names[1], names[2]),
    };
    let why = if unmeasured.is_empty() {
        "the measured composition cannot separate them".to_string()
    } else {
        format!(
            "{} would separate them but {} not mapped",
            unmeasured.join(", "),
            if unmeasured.len() == 1 { "is" } else { "are" }
        )
    };
    if !unmeasured.is_empty() {
        name = format!("{name} ({} not mapped)", unmeasured.join(", "));
    }
    (
        Some(name),
        format!(
            "{} references fit within the uncertainty: {why}",
            candidates.len()
        ),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn els(s: &[&str]) -> Vec<ElementInfo> {
        s.iter().map(|x| element(x).unwrap()).collect()
    }

    #[test]
    fn builtin_library_is_valid_and_has_unique_formulas() {
        let lib = Library::builtin();
        assert!(lib.phases.len() >= 60);
        let mut seen = std::collections::BTreeSet::new();
        for p in &lib.phases {
            if let Some(f) = &p.formula {
                assert!(seen.insert(f.clone()), "{f} twice");
            }
        }
    }

    /// Mass fractions from references.md §6 (computed from the formulas): Cu6Sn5 is
    /// Cu 39.112 wt%, Sn 60.888 wt%.
    #[test]
    fn matches_a_calibrated_intermetallic() {
        let lib = Library::builtin();
        let m = best_match(&lib, &els(&["Cu", "Sn"]), &[39.3, 60.7], &[0.3, 0.3], true).unwrap();
        assert_eq!(m.reference.as_deref(), Some("Cu6Sn5 (eta)"));
        assert!(m.quality > 0.5);
        // 50/50 is neither Cu6Sn5 nor Cu3Sn (61.6 wt% Cu).
        let m = best_match(&lib, &els(&["Cu", "Sn"]), &[50.0, 50.0], &[0.3, 0.3], true).unwrap();
        assert_eq!(m.reference, None, "{m:?}");
    }

    #[test]
    fn unmeasured_elements_make_alternatives() {
        let lib = Library::builtin();
        let m = best_match(
            &lib,
            &els(&["Cu", "Ag", "Sn"]),
            &[0.2, 0.3, 99.5],
            &[0.1, 0.1, 0.2],
            true,
        )
        .unwrap();
        assert_eq!(m.reference.as_deref(), Some("tin"));
        assert!(m.alternatives.iter().any(|a| a == "cassiterite"), "{m:?}");
        // The name says the data cannot tell them apart, and why.
        let name = m.name.as_deref().unwrap();
        assert!(
            name.starts_with("tin") && name.contains("cassiterite"),
            "{name}"
        );
        assert!(
            name.contains("O") && name.ends_with("not mapped)"),
            "{name}"
        );
        assert!(m.decision.contains("would separate them"), "{}", m.decision);
        // With O mapped (and none of it), tin alone fits.
        let m = best_match(
            &lib,
            &els(&["O", "Cu", "Ag", "Sn"]),
            &[0.0, 0.2, 0.3, 99.5],
            &[0.1, 0.1, 0.1, 0.2],
            true,
        )
        .unwrap();
        assert!(m.name.as_deref().unwrap().starts_with("tin"), "{m:?}");
        assert!(!m.name.as_deref().unwrap().contains("cassiterite"), "{m:?}");
    }

    #[test]
    fn library_files_are_checked() {
        let p = Path::new("lab.toml");
        let ok = "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"duplex ferrite\"\ncomposition = { Fe = 68, Cr = 26, Ni = 6 }\n";
        let lib = Library::parse(ok, p, "lab.toml").unwrap();
        assert!((lib.phases[0].composition.mass_fraction_of("Cr") - 0.26).abs() < 1e-12);
        for bad in [
            "format = \"other/1\"\n",
            "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\n",
            "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\nformula = \"Qq2\"\n",
            "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\nformula = \"Fe\"\ncolour = 1\n",
            "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\nformula = \"Fe\"\n[[phase]]\nname = \"x\"\nformula = \"Ni\"\n",
            "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"x\"\ncomposition = { Fe = -1 }\n",
        ] {
            let e = Library::parse(bad, p, "lab.toml").unwrap_err();
            assert!(e.to_string().contains("lab.toml"), "{e}");
        }
    }
}
