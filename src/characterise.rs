//! The composition stage: what each phase is made of and what to call it.
//!
//! Takes the phase table, the labels and the counts of a mapped field; sums each phase's
//! counts over its interior pixels (clear of other phases by the X-ray range when the beam
//! energy and pixel size are known, else by 2 pixels), subtracts the continuum, turns the
//! net counts into mass and atom fractions with k-factors (none, from a file, or calibrated
//! on phases of known composition; [`crate::chem::quant`]), matches each phase against the
//! reference library ([`crate::library`]) and names it, and runs the beam-physics advisor
//! ([`crate::advisor`]). It updates the table in place and returns what the report needs
//! to say about the method.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::advisor::{self, Advice};
use crate::chem::quant::{
    calibrate, from_counts, quantify, BackgroundRule, CalibrationError, KFactors, Oxygen,
    PhaseCounts, Quantification, Rules, Standard,
};
use crate::chem::{element, parse_formula, Composition, ElementInfo};
use crate::error::{Error, Result};
use crate::library::{best_match, composition_from_wt, Library, Match};
use crate::phases::{ClearSums, PhaseTable};
use crate::stack::MapStack;
use crate::unmix::{UnmixSource, MAX_VARIANCE_INFLATION};

/// The k-factor file format name and version.
pub const KFACTOR_FORMAT: &str = "modalmap.kfactors/1";

/// Pixels kept clear of other phases when the X-ray range is unknown (common practice, no
/// source: about twice the blur of a typical map).
pub const DEFAULT_CLEARANCE_PX: usize = 2;

/// Largest clearance used, pixels (beyond it small phases lose every pixel).
pub const MAX_CLEARANCE_PX: usize = 8;

/// A phase is compared with the reference library only if its composition rests on at
/// least this many counts (all elements together): 400 counts give a major element's
/// share to about 5 % (1/√N), the least a name can rest on (common practice, no source).
pub const MIN_MATCH_COUNTS: f64 = 400.0;

/// Oxygen rule as given on the command line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum OxygenMode {
    /// From its map like any other element (or absent when not mapped).
    #[default]
    Measured,
    /// From the other elements and their valences (oxides and silicates).
    Stoichiometry,
}

/// Background rule as given on the command line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum BackgroundMode {
    /// Continuum from the phase poorest in each element, scaled by mean Z.
    #[default]
    PoorestPhase,
    /// No background subtracted (the maps hold net counts).
    None,
}

impl crate::choice::Choice for OxygenMode {
    const ALL: &'static [OxygenMode] = &[OxygenMode::Measured, OxygenMode::Stoichiometry];
    fn name(self) -> &'static str {
        match self {
            OxygenMode::Measured => "measured",
            OxygenMode::Stoichiometry => "stoichiometry",
        }
    }
    fn help(self) -> &'static str {
        match self {
            OxygenMode::Measured => {
                "From its map like any other element (or absent when not mapped)"
            }
            OxygenMode::Stoichiometry => {
                "From the other elements and their valences (oxides and silicates)"
            }
        }
    }
}

impl crate::choice::Choice for BackgroundMode {
    const ALL: &'static [BackgroundMode] = &[BackgroundMode::PoorestPhase, BackgroundMode::None];
    fn name(self) -> &'static str {
        match self {
            BackgroundMode::PoorestPhase => "poorest-phase",
            BackgroundMode::None => "none",
        }
    }
    fn help(self) -> &'static str {
        match self {
            BackgroundMode::PoorestPhase => {
                "Continuum from the phase poorest in each element, scaled by mean Z"
            }
            BackgroundMode::None => "No background subtracted (the maps hold net counts)",
        }
    }
}

/// The composition options as given.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct CompositionOptions {
    /// k-factor file.
    pub kfactors: Option<PathBuf>,
    /// Calibration phases: `ID=COMPOSITION`, `NAME=COMPOSITION` or a library name.
    pub calibrate: Vec<String>,
    /// Oxygen rule.
    pub oxygen: OxygenMode,
    /// Valence overrides `El=N` for oxygen by stoichiometry.
    pub valences: Vec<String>,
    /// Background rule.
    pub background: BackgroundMode,
    /// Extra reference-phase libraries.
    pub libraries: Vec<PathBuf>,
}

/// Which phase a calibration refers to.
#[derive(Debug, Clone, PartialEq)]
enum Selector {
    Id(u16),
    Name(String),
}

#[derive(Debug, Clone, PartialEq)]
struct Calibration {
    spec: String,
    selector: Selector,
    /// Name to give the phase, and its composition.
    name: String,
    composition: Composition,
}

#[derive(Debug, Clone, PartialEq)]
struct KFactorFile {
    path: PathBuf,
    reference: Option<String>,
    beam_kv: Option<f64>,
    k: BTreeMap<String, f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct KFactorToml {
    format: String,
    reference: Option<String>,
    beam_kv: Option<f64>,
    k: BTreeMap<String, f64>,
}

/// Checked composition options.
#[derive(Debug, Clone, PartialEq)]
pub struct ValidCompositionOptions {
    given: CompositionOptions,
    kfile: Option<KFactorFile>,
    calibrations: Vec<Calibration>,
    valences: BTreeMap<String, f64>,
    library: Library,
}

/// Default valences for oxygen by stoichiometry: the usual oxidation state in oxides and
/// silicates, iron as Fe²⁺ as in microprobe oxide totals, halogens as anions (common
/// practice, no source). Override with `--valence`.
pub const DEFAULT_VALENCES: &[(&str, f64)] = &[
    ("H", 1.0),
    ("Li", 1.0),
    ("Be", 2.0),
    ("B", 3.0),
    ("C", 4.0),
    ("F", -1.0),
    ("Na", 1.0),
    ("Mg", 2.0),
    ("Al", 3.0),
    ("Si", 4.0),
    ("P", 5.0),
    ("S", 6.0),
    ("Cl", -1.0),
    ("K", 1.0),
    ("Ca", 2.0),
    ("Sc", 3.0),
    ("Ti", 4.0),
    ("V", 3.0),
    ("Cr", 3.0),
    ("Mn", 2.0),
    ("Fe", 2.0),
    ("Co", 2.0),
    ("Ni", 2.0),
    ("Cu", 2.0),
    ("Zn", 2.0),
    ("Ga", 3.0),
    ("Ge", 4.0),
    ("As", 5.0),
    ("Br", -1.0),
    ("Rb", 1.0),
    ("Sr", 2.0),
    ("Y", 3.0),
    ("Zr", 4.0),
    ("Nb", 5.0),
    ("Mo", 6.0),
    ("Ag", 1.0),
    ("Cd", 2.0),
    ("In", 3.0),
    ("Sn", 4.0),
    ("Sb", 3.0),
    ("I", -1.0),
    ("Cs", 1.0),
    ("Ba", 2.0),
    ("La", 3.0),
    ("Ce", 3.0),
    ("Pr", 3.0),
    ("Nd", 3.0),
    ("Sm", 3.0),
    ("Eu", 3.0),
    ("Gd", 3.0),
    ("Tb", 3.0),
    ("Dy", 3.0),
    ("Ho", 3.0),
    ("Er", 3.0),
    ("Tm", 3.0),
    ("Yb", 3.0),
    ("Lu", 3.0),
    ("Hf", 4.0),
    ("Ta", 5.0),
    ("W", 6.0),
    ("Pb", 2.0),
    ("Bi", 3.0),
    ("Th", 4.0),
    ("U", 4.0),
];

fn parse_composition_text(
    text: &str,
    library: &Library,
) -> std::result::Result<(String, Composition), String> {
    if let Some(r) = library.find(text) {
        return Ok((r.name.clone(), r.composition.clone()));
    }
    if text.contains(':') {
        let mut wt = BTreeMap::new();
        for part in text.split(',') {
            let (el, v) = part
                .split_once(':')
                .ok_or_else(|| format!("`{part}` is not El:wt%"))?;
            let v: f64 = v
                .trim()
                .parse()
                .map_err(|_| format!("`{}` is not a number", v.trim()))?;
            wt.insert(el.trim().to_string(), v);
        }
        return composition_from_wt(&wt).map(|c| (text.to_string(), c));
    }
    let c = parse_formula(text).map_err(|e| e.to_string())?;
    // A formula of a library phase takes the library's name.
    let name = library
        .phases
        .iter()
        .find(|r| r.formula.as_deref() == Some(text))
        .map_or_else(|| text.to_string(), |r| r.name.clone());
    Ok((name, c))
}

impl CompositionOptions {
    /// Reads the files and checks every option.
    pub fn check(&self) -> Result<ValidCompositionOptions> {
        let mut library = Library::builtin();
        for p in &self.libraries {
            library.extend(Library::load(p)?);
        }
        if self.kfactors.is_some() && !self.calibrate.is_empty() {
            return Err(Error::options(
                "--kfactors and --calibrate both given",
                "give k-factors from a file or calibrate on phases of known composition, not both",
            ));
        }
        let kfile = self.kfactors.as_deref().map(read_kfactors).transpose()?;
        let mut calibrations = Vec::new();
        for spec in &self.calibrate {
            let (sel, comp) = spec.split_once('=').unwrap_or((spec, spec));
            let (sel, comp) = (sel.trim(), comp.trim());
            let selector = match sel.parse::<u16>() {
                Ok(id) if id > 0 => Selector::Id(id),
                _ if !sel.is_empty() => Selector::Name(sel.to_string()),
                _ => {
                    return Err(Error::options(
                        format!("--calibrate {spec}: no phase given"),
                        "write --calibrate ID=FORMULA (e.g. 3=Cu6Sn5), NAME=FORMULA, or a library phase name",
                    ))
                }
            };
            let (name, composition) = parse_composition_text(comp, &library).map_err(|p| {
                Error::options(
                    format!("--calibrate {spec}: {p}"),
                    "give a library phase name, a formula such as Cu6Sn5, or wt% such as Cu:39.1,Sn:60.9",
                )
            })?;
            calibrations.push(Calibration {
                spec: spec.clone(),
                selector,
                name,
                composition,
            });
        }
        let mut valences: BTreeMap<String, f64> = DEFAULT_VALENCES
            .iter()
            .map(|(s, v)| (s.to_string(), *v))
            .collect();
        for v in &self.valences {
            let parsed = v.split_once('=').and_then(|(e, n)| {
                let n: f64 = n.trim().parse().ok()?;
                (element(e.trim()).is_some() && n.is_finite()).then(|| (e.trim().to_string(), n))
            });
            let Some((e, n)) = parsed else {
                return Err(Error::options(
                    format!("--valence {v} is not El=N"),
                    "write the element symbol and its valence, e.g. --valence Fe=3 (negative for anions, e.g. S=-2)",
                ));
            };
            valences.insert(e, n);
        }
        Ok(ValidCompositionOptions {
            given: self.clone(),
            kfile,
            calibrations,
            valences,
            library,
        })
    }
}

impl ValidCompositionOptions {
    /// The options as given.
    pub fn options(&self) -> &CompositionOptions {
        &self.given
    }

    /// The files these options read (k-factors, libraries), each with what it is.
    pub fn input_files(&self) -> impl Iterator<Item = (&'static str, &Path)> {
        let g = &self.given;
        g.kfactors
            .iter()
            .map(|p| ("k-factor file", p.as_path()))
            .chain(
                g.libraries
                    .iter()
                    .map(|p| ("reference-phase library", p.as_path())),
            )
    }

    /// The reference library in use.
    pub fn library(&self) -> &Library {
        &self.library
    }
}

fn read_kfactors(path: &Path) -> Result<KFactorFile> {
    let text = crate::guard::read_text(
        path,
        "k-factor file (--kfactors)",
        crate::guard::MAX_TEXT_BYTES,
    )
    .map_err(|e| Error::options_in(path, e.problem, e.fix))?;
    let t: KFactorToml = toml::from_str(&text).map_err(|e| {
        Error::options_in(
            path,
            format!("is not a valid k-factor file: {}", e.message()),
            "write format = \"modalmap.kfactors/1\", optional reference = \"El\" and beam_kv, and a [k] table of El = factor",
        )
    })?;
    if t.format != KFACTOR_FORMAT {
        return Err(Error::options_in(
            path,
            format!("has format \"{}\", not \"{KFACTOR_FORMAT}\"", t.format),
            format!("set format = \"{KFACTOR_FORMAT}\""),
        ));
    }
    for (e, k) in &t.k {
        if element(e).is_none() {
            return Err(Error::options_in(
                path,
                format!("[k] names `{e}`, which is not an element symbol"),
                "use case-sensitive element symbols such as Fe, Si",
            ));
        }
        if !(k.is_finite() && *k > 0.0) {
            return Err(Error::options_in(
                path,
                format!("k-factor of {e} is {k}, not a positive number"),
                "give every factor as a positive number",
            ));
        }
    }
    if let Some(r) = &t.reference {
        if !t.k.contains_key(r) {
            return Err(Error::options_in(
                path,
                format!("reference element {r} has no entry in [k]"),
                format!("add {r} = 1.0 under [k]"),
            ));
        }
    }
    Ok(KFactorFile {
        path: path.to_path_buf(),
        reference: t.reference,
        beam_kv: t.beam_kv,
        k: t.k,
    })
}

/// A calibration phase as used, for the report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationUsed {
    /// Phase id.
    pub id: u16,
    /// The name it was given.
    pub name: String,
    /// As written on the command line.
    pub spec: String,
}

/// What the report says about the compositions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CompositionReport {
    /// `uncalibrated`, `k-factors` or `calibrated`.
    pub basis: String,
    /// One sentence on how the numbers were made.
    pub method: String,
    /// Elements of the compositions.
    pub elements: Vec<String>,
    /// k-factor per element quantified from counts (relative to `reference_element`).
    pub k_factors: BTreeMap<String, f64>,
    /// Relative standard deviation of each factor.
    pub k_factor_rel_sd: BTreeMap<String, f64>,
    /// The element whose factor is 1.
    pub reference_element: Option<String>,
    /// The calibration phases.
    pub calibration: Vec<CalibrationUsed>,
    /// Background handling per mapped element.
    pub background: BTreeMap<String, String>,
    /// Oxygen rule.
    pub oxygen: String,
    /// Pixels kept clear of other phases when summing counts.
    pub clearance_px: usize,
    /// How the phases without interior pixels were unmixed from their neighbours, when
    /// any were.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unmixing: Option<UnmixingReport>,
    /// What the ± values are.
    pub uncertainty: String,
    /// Things to know about these compositions.
    pub notes: Vec<String>,
    /// The options as given (with `options` of the report, enough to rerun).
    pub options: CompositionOptions,
}

/// Mapped elements with the line named with each map.
fn mapped(counts: &MapStack) -> Vec<(ElementInfo, Option<String>)> {
    counts
        .maps()
        .iter()
        .map(|m| (m.element, m.line.clone()))
        .collect()
}

fn unique_names(names: Vec<String>) -> Vec<String> {
    let mut seen: Vec<String> = Vec::new();
    names
        .into_iter()
        .map(|n| {
            let repeats = seen.iter().filter(|s| **s == n).count();
            seen.push(n.clone());
            if repeats > 0 {
                format!("{n} ({})", repeats + 1)
            } else {
                n
            }
        })
        .collect()
}

/// Runs the composition stage on a mapped field (see the module docs).
pub fn characterise(
    table: &mut PhaseTable,
    labels: &[u16],
    width: usize,
    height: usize,
    counts: &MapStack,
    opts: &ValidCompositionOptions,
) -> Result<(CompositionReport, Advice)> {
    let k = table.phases.len();
    // The sums for every clearance come from one pass; computed when first asked for.
    let sums = std::cell::OnceCell::new();
    characterise_with(
        table,
        &mapped(counts),
        counts.metadata(),
        &|clearance| {
            sums.get_or_init(|| {
                let planes: Vec<&[f32]> =
                    counts.maps().iter().map(|m| m.counts.as_slice()).collect();
                ClearSums::over_rows(labels, width, height, &planes, k, 0..height)
            })
            .at(clearance)
        },
        &|wanted: &[bool]| {
            let planes: Vec<&[f32]> = counts.maps().iter().map(|m| m.counts.as_slice()).collect();
            crate::unmix::unmix(labels, width, height, &planes, wanted)
        },
        opts,
    )
}

/// The oxygen rule of the options for the mapped elements `infos`.
fn oxygen_rule(infos: &[ElementInfo], opts: &ValidCompositionOptions) -> Result<Oxygen> {
    Ok(match opts.given.oxygen {
        OxygenMode::Measured => Oxygen::Measured,
        OxygenMode::Stoichiometry => {
            let mut v = Vec::new();
            for e in infos {
                match opts.valences.get(e.symbol) {
                    Some(x) => v.push(*x),
                    None if e.symbol == "O" => v.push(-2.0),
                    None => {
                        return Err(Error::options(
                            format!(
                            "oxygen by stoichiometry needs a valence for {}, which has no default",
                            e.symbol
                        ),
                            format!("give it with --valence {}=N", e.symbol),
                        ))
                    }
                }
            }
            Oxygen::Stoichiometry { valences: v }
        }
    })
}

/// Quantifies summed counts and names the result, with the options' rules.
struct Quantifier<'a> {
    infos: Vec<ElementInfo>,
    oxygen: Oxygen,
    opts: &'a ValidCompositionOptions,
}

impl Quantifier<'_> {
    /// Compositions of the phases' `sums` with factors `kf`; the continuum fitted on the
    /// `eligible` phases (those whose sums come from interior or unmixed pixels).
    fn run(&self, sums: &[PhaseCounts], eligible: &[bool], kf: &KFactors) -> Quantification {
        let background = match self.opts.given.background {
            BackgroundMode::PoorestPhase => BackgroundRule::Fit {
                eligible: eligible.to_vec(),
            },
            BackgroundMode::None => BackgroundRule::None,
        };
        let rules = Rules {
            k: kf.clone(),
            oxygen: self.oxygen.clone(),
            background,
        };
        quantify(&self.infos, sums, &rules)
    }

    /// The closest reference phase of each phase. A phase with too few counts is compared
    /// with no reference: its composition is too uncertain for a name to mean anything.
    fn matches(
        &self,
        q: &Quantification,
        calibrated: bool,
        sums: &[PhaseCounts],
    ) -> Vec<Option<Match>> {
        q.phases
            .iter()
            .zip(sums)
            .map(|(p, s)| {
                (s.sums.iter().sum::<f64>() >= MIN_MATCH_COUNTS)
                    .then(|| {
                        best_match(&self.opts.library, &q.elements, &p.wt, &p.wt_sd, calibrated)
                    })
                    .flatten()
            })
            .collect()
    }
}

/// The clearance (pixels) that keeps the sums half the largest X-ray range away from other
/// phases, within [`DEFAULT_CLEARANCE_PX`]..=[`MAX_CLEARANCE_PX`], and that range; the
/// default and `None` without the beam energy and the pixel size.
fn clearance_for(
    table: &PhaseTable,
    first: &Quantification,
    first_matches: &[Option<Match>],
    lines: &[(ElementInfo, Option<String>)],
    md: &crate::stack::FieldMetadata,
) -> (usize, Option<f64>) {
    let (Some(_), Some(px)) = (md.beam_kv, md.pixel_size_um) else {
        return (DEFAULT_CLEARANCE_PX, None);
    };
    // The closest reference's density, even when it is no match: a first estimate.
    let inputs = advisor_inputs(table, first, first_matches, |m| {
        m.density.map(|d| (d, m.closest.clone()))
    });
    let a = advisor::advise(lines, md.beam_kv, md.pixel_size_um, &inputs);
    let range = a.largest_xray_range_um();
    let clearance = range.map_or(DEFAULT_CLEARANCE_PX, |r| {
        ((r / (2.0 * px)).ceil() as usize).clamp(DEFAULT_CLEARANCE_PX, MAX_CLEARANCE_PX)
    });
    (clearance, range)
}

/// Where the k-factors came from, for the report.
struct KSource {
    kf: KFactors,
    /// `uncalibrated`, `k-factors` or `calibrated`.
    basis: &'static str,
    method: String,
    calibration_used: Vec<CalibrationUsed>,
    /// Calibration phases (table index) and the names they were given.
    forced_names: BTreeMap<usize, String>,
}

/// The k-factors of a k-factor file for the `quantified` elements of `infos`, scaled to
/// its reference element; notes on unmapped entries and a beam energy that differs.
fn kfactors_from_file(
    f: &KFactorFile,
    infos: &[ElementInfo],
    quantified: &[bool],
    md: &crate::stack::FieldMetadata,
    notes: &mut Vec<String>,
) -> Result<KSource> {
    let mut k = vec![f64::NAN; infos.len()];
    for (i, e) in infos.iter().enumerate() {
        if !quantified[i] {
            continue;
        }
        k[i] = *f.k.get(e.symbol).ok_or_else(|| {
            Error::options_in(
                &f.path,
                format!("has no k-factor for {}, which is mapped", e.symbol),
                format!("add {} = factor under [k]", e.symbol),
            )
        })?;
    }
    for e in f.k.keys() {
        if !infos.iter().any(|i| i.symbol == e) {
            notes.push(format!(
                "the k-factor file lists {e}, which is not mapped; ignored"
            ));
        }
    }
    if let (Some(a), Some(b)) = (f.beam_kv, md.beam_kv) {
        if (a - b).abs() > 0.5 {
            notes.push(format!(
                "the k-factors were measured at {a} kV but the maps at {b} kV: k-factors change with the beam energy; measure them at the mapping conditions"
            ));
        }
    }
    let reference = f
        .reference
        .as_deref()
        .and_then(|r| infos.iter().position(|e| e.symbol == r))
        .filter(|&i| quantified[i])
        .unwrap_or_else(|| quantified.iter().position(|&q| q).unwrap_or(0));
    let scale = k[reference];
    k.iter_mut().for_each(|x| *x /= scale);
    Ok(KSource {
        kf: KFactors {
            k,
            rel_sd: vec![0.0; infos.len()],
            reference,
        },
        basis: "k-factors",
        method: format!("k-factors from {}", f.path.display()),
        calibration_used: Vec::new(),
        forced_names: BTreeMap::new(),
    })
}

/// The k-factors calibrated on the phases the options name (`--calibrate`), from the net
/// counts `unit` quantified with unit factors.
fn kfactors_calibrated(
    opts: &ValidCompositionOptions,
    table: &PhaseTable,
    first_matches: &[Option<Match>],
    unit: &Quantification,
    infos: &[ElementInfo],
    quantified: &[bool],
) -> Result<KSource> {
    let mut calibration_used = Vec::new();
    let mut forced_names: BTreeMap<usize, String> = BTreeMap::new();
    let mut standards = Vec::new();
    for c in &opts.calibrations {
        let idx = resolve(&c.selector, table, first_matches)
            .map_err(|(p, fix)| Error::options(format!("--calibrate {}: {p}", c.spec), fix))?;
        if forced_names.contains_key(&idx) {
            return Err(Error::options(
                format!(
                    "--calibrate {}: phase {} is already a calibration phase",
                    c.spec,
                    idx + 1
                ),
                "name each calibration phase once",
            ));
        }
        let net = &unit.phases[idx];
        // Net rates and variances with the current background, unit factors.
        standards.push(Standard {
            net: net.net_rate.clone(),
            var: net.net_var.clone(),
            known: infos
                .iter()
                .map(|e| c.composition.mass_fraction_of(e.symbol))
                .collect(),
        });
        forced_names.insert(idx, c.name.clone());
        calibration_used.push(CalibrationUsed {
            id: table.phases[idx].id,
            name: c.name.clone(),
            spec: c.spec.clone(),
        });
    }
    let kf = calibrate(&standards, quantified).map_err(|e| match e {
        CalibrationError::NotReached(els) => {
            let names: Vec<&str> = els.iter().map(|&i| infos[i].symbol).collect();
            Error::options(
                format!(
                    "the calibration phases give no k-factor for {} (no calibration phase contains it, or none shares an element with the others)",
                    names.join(", ")
                ),
                "add a calibration phase that contains it (repeat --calibrate ID=FORMULA), or give every factor in a --kfactors file",
            )
        }
        CalibrationError::NoCounts(s, e) => Error::options(
            format!(
                "--calibrate {}: the phase should contain {} but shows no net counts of it",
                opts.calibrations[s].spec, infos[e].symbol
            ),
            "check the phase id and formula, and that the line of this element is excited",
        ),
    })?;
    let desc: Vec<String> = calibration_used
        .iter()
        .map(|c| format!("phase {} = {}", c.id, c.name))
        .collect();
    Ok(KSource {
        kf,
        basis: "calibrated",
        method: format!("k-factors calibrated on {}", desc.join(" and ")),
        calibration_used,
        forced_names,
    })
}

/// Unit k-factors: the numbers are shares of the net counts.
fn kfactors_unit(n: usize) -> KSource {
    KSource {
        kf: KFactors::unit(n),
        basis: "uncalibrated",
        method: "uncalibrated: every k-factor 1, so the numbers are shares of the net counts, not concentrations".to_string(),
        calibration_used: Vec::new(),
        forced_names: BTreeMap::new(),
    }
}

/// The name of each phase: a calibration phase keeps the name it was given; others take
/// their match, unless their composition is mixed with their neighbours'; without a
/// reference name, the major elements of the final composition (continuum out, unmixed),
/// not of the raw counts the phase was first named by.
fn phase_names(
    table: &PhaseTable,
    forced_names: &BTreeMap<usize, String>,
    matches: &[Option<Match>],
    clean: &[bool],
    q: &Quantification,
) -> Vec<String> {
    let out_symbols: Vec<String> = q.elements.iter().map(|e| e.symbol.to_string()).collect();
    let names = table
        .phases
        .iter()
        .enumerate()
        .map(|(i, p)| {
            forced_names
                .get(&i)
                .cloned()
                .or_else(|| {
                    matches[i]
                        .as_ref()
                        .filter(|_| clean[i])
                        .and_then(|m| m.name.clone())
                })
                .unwrap_or_else(|| {
                    if clean[i] {
                        crate::phases::name_of(&out_symbols, &q.phases[i].wt)
                    } else {
                        p.name.clone()
                    }
                })
        })
        .collect();
    unique_names(names)
}

/// How the continuum was handled for each mapped element, in words; a note for each
/// element no phase is free of.
fn background_notes(
    infos: &[ElementInfo],
    background: &crate::chem::quant::Background,
    table: &PhaseTable,
    mode: BackgroundMode,
    notes: &mut Vec<String>,
) -> BTreeMap<String, String> {
    infos
        .iter()
        .enumerate()
        .map(|(i, e)| {
            let free: Vec<String> = background.free[i]
                .iter()
                .map(|&b| format!("{} ({})", table.phases[b].id, table.phases[b].name))
                .collect();
            let s = match (mode, background.per_z[i]) {
                (BackgroundMode::None, _) => "none subtracted (--background none)".to_string(),
                (_, Some(c)) => format!(
                    "continuum {c:.4} counts per pixel per unit mean Z (Kramers: proportional to Z), fitted on phase{} {} judged free of {}; elements below Currie's critical level are reported as not detected",
                    if free.len() > 1 { "s" } else { "" },
                    free.join(", "),
                    e.symbol
                ),
                (_, None) => {
                    let size = match background.unmeasured[i] {
                        Some(c) => format!(
                            "; judging by the other maps' continuum ({c:.4} counts per pixel per unit mean Z, their median) it may be of that order, which its ± includes as one standard deviation, so names that differ in {} alone stay open",
                            e.symbol
                        ),
                        None => String::new(),
                    };
                    notes.push(format!(
                        "{}: no phase is free of it (every phase's counts exceed a continuum), so its continuum cannot be measured on this field: none is subtracted, its amounts are over-estimated by the continuum under its line and its detection is not tested{size}{}",
                        e.symbol,
                        if e.symbol == "O" { "; for oxides and silicates, --oxygen stoichiometry avoids this" } else { "" }
                    ));
                    format!(
                        "none subtracted: no phase is free of {} (see the notes)",
                        e.symbol
                    )
                }
            };
            (e.symbol.to_string(), s)
        })
        .collect()
}

/// The oxygen rule in words.
fn oxygen_text(oxygen: &Oxygen, infos: &[ElementInfo]) -> String {
    match oxygen {
        Oxygen::Measured => "from its map, like every other element (when mapped)".to_string(),
        Oxygen::Stoichiometry { valences } => {
            let v: Vec<String> = infos
                .iter()
                .zip(valences)
                .filter(|(e, _)| e.symbol != "O")
                .map(|(e, v)| format!("{} {v:+}", e.symbol))
                .collect();
            format!("by stoichiometry from the valences {}", v.join(", "))
        }
    }
}

/// The advisor's input for each phase of `table` with compositions `q`, the density (and
/// where it came from) of each phase's match given by `density`.
fn advisor_inputs(
    table: &PhaseTable,
    q: &Quantification,
    matches: &[Option<Match>],
    density: impl Fn(&Match) -> Option<(f64, String)>,
) -> Vec<advisor::PhaseInput> {
    table
        .phases
        .iter()
        .zip(&q.phases)
        .zip(matches)
        .map(|((p, c), m)| {
            let rd = m.as_ref().and_then(&density);
            advisor::phase_input(p.id, &p.name, &q.elements, &c.wt, rd)
        })
        .collect()
}

/// The beam-physics advice for the final compositions, with each phase's density from its
/// reference phase when it has one.
fn advice_for(
    table: &PhaseTable,
    q: &Quantification,
    matches: &[Option<Match>],
    lines: &[(ElementInfo, Option<String>)],
    md: &crate::stack::FieldMetadata,
) -> Advice {
    let inputs = advisor_inputs(table, q, matches, |m| {
        m.reference.as_ref()?;
        m.density
            .map(|d| (d, format!("reference phase {}", m.closest)))
    });
    advisor::advise(lines, md.beam_kv, md.pixel_size_um, &inputs)
}

/// The composition stage given the mapped elements with their lines, the field's
/// metadata, and the phases' summed counts for a clearance in pixels (each with whether
/// it came from interior pixels): a field streamed in strips provides the sums itself.
pub fn characterise_with(
    table: &mut PhaseTable,
    lines: &[(ElementInfo, Option<String>)],
    md: &crate::stack::FieldMetadata,
    sums_at: &dyn Fn(usize) -> Vec<(PhaseCounts, bool)>,
    unmix: UnmixSource,
    opts: &ValidCompositionOptions,
) -> Result<(CompositionReport, Advice)> {
    let infos: Vec<ElementInfo> = lines.iter().map(|l| l.0).collect();
    let mut notes = Vec::new();
    let oxygen = oxygen_rule(&infos, opts)?;
    let quantified: Vec<bool> = infos.iter().map(|e| from_counts(e, &oxygen)).collect();
    let calibrated_basis = opts.kfile.is_some() || !opts.calibrations.is_empty();
    let qf = Quantifier {
        infos: infos.clone(),
        oxygen,
        opts,
    };

    // Sums over interior pixels; widen the clearance to half the X-ray range when known.
    let split = |sums: &[(PhaseCounts, bool)]| -> (Vec<PhaseCounts>, Vec<bool>) {
        (
            sums.iter().map(|s| s.0.clone()).collect(),
            sums.iter().map(|s| s.1).collect(),
        )
    };
    let t = crate::profile::stage("  composition: sums");
    let mut sums = sums_at(DEFAULT_CLEARANCE_PX);
    drop(t);
    let (plain, eligible) = split(&sums);
    let first = qf.run(&plain, &eligible, &KFactors::unit(infos.len()));
    let first_matches = qf.matches(&first, false, &plain);
    let (clearance, xray_range_um) = clearance_for(table, &first, &first_matches, lines, md);
    if clearance != DEFAULT_CLEARANCE_PX {
        sums = sums_at(clearance);
    }
    let (mut plain, eligible) = split(&sums);
    let symbols: Vec<&str> = infos.iter().map(|e| e.symbol).collect();
    let t = crate::profile::stage("  composition: unmix");
    let (unmixing, unmix_notes, unmixed) = unmix_thin(
        &mut plain,
        &eligible,
        unmix,
        &Around {
            table,
            pixel_um: md.pixel_size_um,
            xray_range_um,
            clearance,
            symbols: &symbols,
        },
    );
    drop(t);
    notes.extend(unmix_notes);
    // Unmixed phases can show the continuum too.
    let clean: Vec<bool> = eligible
        .iter()
        .zip(&unmixed)
        .map(|(a, b)| *a || *b)
        .collect();

    let source = if let Some(f) = &opts.kfile {
        kfactors_from_file(f, &infos, &quantified, md, &mut notes)?
    } else if !opts.calibrations.is_empty() {
        // Net counts with unit factors on the final sums: what a calibration is fitted to.
        let unit = qf.run(&plain, &clean, &KFactors::unit(infos.len()));
        kfactors_calibrated(opts, table, &first_matches, &unit, &infos, &quantified)?
    } else {
        kfactors_unit(infos.len())
    };
    // Recompute with the (possibly widened) sums and the factors.
    let q = qf.run(&plain, &clean, &source.kf);
    let matches = qf.matches(&q, calibrated_basis, &plain);
    for (p, s) in table.phases.iter().zip(&plain) {
        let total: f64 = s.sums.iter().sum();
        if total < MIN_MATCH_COUNTS {
            notes.push(format!(
                "phase {} ({}): {total:.0} counts in all, too few to compare with the reference phases (at least {MIN_MATCH_COUNTS:.0}); it is named by its major elements",
                p.id, p.name
            ));
        }
    }

    let names = phase_names(table, &source.forced_names, &matches, &clean, &q);
    for (i, p) in table.phases.iter_mut().enumerate() {
        p.name = names[i].clone();
        p.composition = q.phases[i].clone();
        p.composition_pixels = sums[i].0.pixels;
        p.composition_from_interior = sums[i].1;
        p.composition_unmixed = unmixed[i];
        p.reference = matches[i].clone();
        if !clean[i] {
            notes.push(format!(
                "phase {} ({}): no pixel lies {clearance} px clear of other phases, so its composition comes from all its pixels and is mixed with its neighbours",
                p.id, p.name
            ));
        }
    }
    table.composition_elements = q.elements.iter().map(|e| e.symbol.to_string()).collect();
    table.composition_method = source.method.clone();

    let background = background_notes(
        &infos,
        &q.background,
        table,
        opts.given.background,
        &mut notes,
    );
    if !infos.iter().any(|e| e.symbol == "O") && opts.given.oxygen == OxygenMode::Measured {
        notes.push("oxygen is not mapped: compositions cover the mapped elements only; for oxides and silicates use --oxygen stoichiometry".into());
    }
    let kf = &source.kf;
    let report = CompositionReport {
        basis: source.basis.into(),
        method: source.method,
        elements: table.composition_elements.clone(),
        k_factors: infos
            .iter()
            .zip(&kf.k)
            .filter(|(_, k)| k.is_finite())
            .map(|(e, k)| (e.symbol.to_string(), *k))
            .collect(),
        k_factor_rel_sd: infos
            .iter()
            .zip(&kf.k)
            .zip(&kf.rel_sd)
            .filter(|((_, k), _)| k.is_finite())
            .map(|((e, _), s)| (e.symbol.to_string(), *s))
            .collect(),
        reference_element: (source.basis != "uncalibrated")
            .then(|| infos[kf.reference].symbol.to_string()),
        calibration: source.calibration_used,
        background,
        oxygen: oxygen_text(&qf.oxygen, &infos),
        clearance_px: clearance,
        unmixing,
        uncertainty: "± is one standard deviation from counting statistics (Poisson) of the summed counts, the background and the calibration; it leaves out the error of the ratio method itself".into(),
        notes,
        options: opts.given.clone(),
    };
    let _t = crate::profile::stage("  composition: advice");
    let advice = advice_for(table, &q, &matches, lines, md);
    Ok((report, advice))
}

/// The beam spread fitted at the phase boundaries and the phases unmixed with it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct UnmixingReport {
    /// Gaussian σ of the beam's spread, pixels.
    pub sigma_px: f64,
    /// The same in µm, when the pixel size is known.
    pub sigma_um: Option<f64>,
    /// True when σ is only a bound (the end of the range tried).
    pub sigma_is_bound: bool,
    /// The largest X-ray generation range the advisor computed, µm, for comparison.
    pub xray_range_um: Option<f64>,
    /// Weighted residual per degree of freedom (1: the mixing model and Poisson counting
    /// explain the counts; the ± values are scaled up by it where it exceeds 1).
    pub dispersion: f64,
    /// Ids of the phases whose compositions were unmixed.
    pub phases: Vec<u16>,
}

/// What [`unmix_thin`] needs to know of the field besides the counts.
struct Around<'a> {
    table: &'a PhaseTable,
    pixel_um: Option<f64>,
    xray_range_um: Option<f64>,
    clearance: usize,
    symbols: &'a [&'a str],
}

/// Unmixes the phases without interior pixels (`interior` false) from the counts the
/// caller provides (`unmix`): their sums are replaced by the unmixed pure rates where
/// the solve is well conditioned and gives no impossible negative rate. Returns the
/// report, the notes, and per phase whether it was unmixed.
fn unmix_thin(
    plain: &mut [PhaseCounts],
    interior: &[bool],
    unmix: UnmixSource,
    around: &Around,
) -> (Option<UnmixingReport>, Vec<String>, Vec<bool>) {
    let Around {
        table,
        pixel_um: px,
        xray_range_um,
        clearance,
        symbols,
    } = *around;
    let k = plain.len();
    let mut unmixed = vec![false; k];
    let mut notes = Vec::new();
    if interior.iter().all(|&i| i) {
        return (None, notes, unmixed);
    }
    let wanted: Vec<bool> = interior.iter().map(|i| !i).collect();
    let Some(u) = unmix(&wanted) else {
        return (None, notes, unmixed);
    };
    for i in (0..k).filter(|&i| !interior[i]) {
        let p = &table.phases[i];
        if u.inflation[i] > MAX_VARIANCE_INFLATION {
            notes.push(format!(
                "phase {} ({}): unmixing it from its neighbours is ill-conditioned (variance inflation {:.0}, over {MAX_VARIANCE_INFLATION:.0}): its composition comes from all its pixels and is mixed with its neighbours'",
                p.id, p.name, u.inflation[i]
            ));
            continue;
        }
        // A pure rate well below zero is impossible: the label footprint or the beam
        // model does not fit this phase (common practice, no source: 3 standard
        // deviations).
        let negative: Vec<String> = (0..u.rates[i].len())
            .filter(|&e| u.rates[i][e] < -3.0 * u.var[i][e].sqrt())
            .map(|e| {
                format!(
                    "{} {:.2} ± {:.2}",
                    symbols[e],
                    u.rates[i][e],
                    u.var[i][e].sqrt()
                )
            })
            .collect();
        if !negative.is_empty() {
            notes.push(format!(
                "phase {} ({}): unmixing it from its neighbours gives impossible negative rates ({} counts per pixel), so the mixing model does not fit it (too small for its outline to be traced, or a beam spread unlike a Gaussian): its composition comes from all its pixels and is mixed with its neighbours'",
                p.id, p.name, negative.join(", ")
            ));
            continue;
        }
        let n = plain[i].pixels;
        plain[i] = PhaseCounts {
            pixels: n,
            sums: u.rates[i].iter().map(|r| r * n as f64).collect(),
            rate_var: Some(u.var[i].clone()),
        };
        unmixed[i] = true;
    }
    let ids: Vec<u16> = (0..k)
        .filter(|&i| unmixed[i])
        .map(|i| table.phases[i].id)
        .collect();
    if ids.is_empty() {
        return (None, notes, unmixed);
    }
    let list: Vec<String> = ids.iter().map(u16::to_string).collect();
    let sigma = match px {
        Some(px) => format!("σ = {:.2} px = {:.2} µm", u.sigma_px, u.sigma_px * px),
        None => format!("σ = {:.2} px", u.sigma_px),
    };
    let range = xray_range_um.map_or(String::new(), |r| {
        format!("; for comparison, the X-ray range is {r:.2} µm")
    });
    notes.push(format!(
        "phase{} {}: no pixel lies {clearance} px clear of other phases, so {} unmixed from the neighbours' counts (linear mixing with the beam's spread, {sigma}{}, fitted at the phase boundaries{range}; residual per degree of freedom {:.2})",
        if ids.len() > 1 { "s" } else { "" },
        list.join(", "),
        if ids.len() > 1 { "their compositions are" } else { "its composition is" },
        if u.at_grid_edge { ", a bound only" } else { "" },
        u.dispersion
    ));
    let report = UnmixingReport {
        sigma_px: u.sigma_px,
        sigma_um: px.map(|p| u.sigma_px * p),
        sigma_is_bound: u.at_grid_edge,
        xray_range_um,
        dispersion: u.dispersion,
        phases: ids,
    };
    (Some(report), notes, unmixed)
}

/// The phase (index into the table) a calibration selector names.
fn resolve(
    sel: &Selector,
    table: &PhaseTable,
    matches: &[Option<Match>],
) -> std::result::Result<usize, (String, String)> {
    let k = table.phases.len();
    // The phases found, for the message: the user chooses again from these.
    let names: Vec<String> = table
        .phases
        .iter()
        .zip(matches)
        .map(|(p, m)| match m {
            Some(m) => format!("{} ({}, closest {})", p.id, p.name, m.closest),
            None => format!("{} ({})", p.id, p.name),
        })
        .collect();
    match sel {
        Selector::Id(id) => {
            let i = usize::from(*id) - 1;
            if i < k {
                Ok(i)
            } else {
                Err((
                    format!(
                        "there is no phase {id}: the field has {k} phases ({})",
                        names.join("; ")
                    ),
                    format!("give a phase id from 1 to {k}"),
                ))
            }
        }
        Selector::Name(name) => {
            let hits: Vec<usize> = (0..k)
                .filter(|&i| {
                    table.phases[i].name.eq_ignore_ascii_case(name)
                        || matches[i]
                            .as_ref()
                            .is_some_and(|m| m.closest.eq_ignore_ascii_case(name))
                })
                .collect();
            match hits.as_slice() {
                [i] => Ok(*i),
                [] => Err((
                    format!(
                        "no phase is called \"{name}\" (phases: {})",
                        names.join("; ")
                    ),
                    "use the phase id instead, e.g. --calibrate 3=Cu6Sn5".into(),
                )),
                _ => Err((
                    format!(
                        "several phases could be \"{name}\" (phases: {})",
                        names.join("; ")
                    ),
                    "use the phase id instead, e.g. --calibrate 3=Cu6Sn5".into(),
                )),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn infos(symbols: &[&str]) -> Vec<ElementInfo> {
        symbols.iter().map(|s| element(s).unwrap()).collect()
    }

    #[test]
    fn oxygen_by_stoichiometry_takes_the_valences_and_refuses_a_missing_one() {
        let opts = CompositionOptions {
            oxygen: OxygenMode::Stoichiometry,
            valences: vec!["Fe=3".into()],
            ..Default::default()
        }
        .check()
        .unwrap();
        let rule = oxygen_rule(&infos(&["Si", "Fe", "O"]), &opts).unwrap();
        assert_eq!(
            rule,
            Oxygen::Stoichiometry {
                valences: vec![4.0, 3.0, -2.0]
            }
        );
        assert_eq!(
            oxygen_text(&rule, &infos(&["Si", "Fe", "O"])),
            "by stoichiometry from the valences Si +4, Fe +3"
        );
        // Gold has no default valence.
        let err = oxygen_rule(&infos(&["Au", "O"]), &opts).unwrap_err();
        assert!(err.to_string().contains("valence for Au"), "{err}");
        let measured = CompositionOptions::default().check().unwrap();
        assert_eq!(
            oxygen_rule(&infos(&["Au"]), &measured).unwrap(),
            Oxygen::Measured
        );
    }

    #[test]
    fn a_kfactor_file_is_scaled_to_its_reference_and_checked() {
        let file = KFactorFile {
            path: PathBuf::from("k.toml"),
            reference: Some("Fe".into()),
            beam_kv: Some(20.0),
            k: [("Fe", 2.0), ("Si", 3.0), ("Cu", 1.0)]
                .iter()
                .map(|(e, k)| (e.to_string(), *k))
                .collect(),
        };
        let md = crate::stack::FieldMetadata {
            beam_kv: Some(15.0),
            ..Default::default()
        };
        let mut notes = Vec::new();
        let els = infos(&["Si", "Fe", "O"]);
        // Oxygen by stoichiometry: not quantified from counts, so it needs no factor.
        let s = kfactors_from_file(&file, &els, &[true, true, false], &md, &mut notes).unwrap();
        assert_eq!(s.kf.reference, 1);
        assert_eq!(s.kf.k[..2], [1.5, 1.0]);
        assert!(s.kf.k[2].is_nan());
        assert_eq!(s.basis, "k-factors");
        assert!(notes
            .iter()
            .any(|n| n.contains("lists Cu, which is not mapped")));
        assert!(notes
            .iter()
            .any(|n| n.contains("measured at 20 kV but the maps at 15 kV")));
        let err = kfactors_from_file(&file, &els, &[true, true, true], &md, &mut notes)
            .err()
            .unwrap();
        assert!(err.to_string().contains("no k-factor for O"), "{err}");
    }

    #[test]
    fn repeated_names_are_numbered() {
        let names = unique_names(vec!["a".into(), "b".into(), "a".into(), "a".into()]);
        assert_eq!(names, vec!["a", "b", "a (2)", "a (3)"]);
    }
}
