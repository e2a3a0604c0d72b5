//! Compositions from counts: the k-factor ratio method, calibration on a phase of known
//! composition, oxygen by stoichiometry, and counting-statistics uncertainties.
//!
//! **The ratio method.** Cliff & Lorimer (1975) wrote C_A/C_B = k_AB · I_A/I_B for mass
//! fractions C and net intensities I. With every factor taken relative to one reference
//! element R (k_RR = 1) and the fractions normalised to 1:
//! C_i = k_iR I_i / Σ_j k_jR I_j. This module uses that convention throughout (a factor
//! *multiplies* the intensity). The method was made for thin foils; in a bulk specimen the
//! intensity also depends on the matrix (atomic number, absorption and fluorescence), so the
//! numbers are semi-quantitative unless the matrix is close to that of the calibration
//! phase. Accurate bulk analysis needs standards and ZAF or φ(ρz) corrections.
//!
//! **Background.** Element maps hold gross counts: characteristic X-rays plus the
//! continuum under the peak, which grows in proportion to Z (Kramers 1923). By default
//! the continuum of each element is fitted as a level per unit mean Z over the phases free
//! of it ([`Background`]) and subtracted from every phase; where no phase is free of an
//! element, nothing is subtracted and the report says so. Elements whose net counts stay
//! under Currie's critical level are not detected ([`currie`]): reported with their limit
//! and left out of the normalisation.
//!
//! **Uncertainty.** Counts are Poisson: the sum N of counts over a phase's pixels has
//! variance N. The variances of the gross counts, of the background estimate and of the
//! calibrated factors are carried to the mass and atom fractions by first-order
//! propagation (numerical derivatives of the whole calculation). The result is the
//! counting-statistics part of the uncertainty only (one standard deviation): it says how
//! well the counts pin the numbers down, not how right the ratio method is.

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

use super::ElementInfo;

/// A phase with under this share of the richest phase's counts of an element is taken to
/// be free of it, and its counts to be continuum background (common practice, no source).
pub const FREE_SHARE: f64 = 0.10;

/// ... or if its gross counts, weighted by the k-factors, make under this share of its
/// composition (common practice, no source: about the detection limit of element maps).
pub const FREE_WT: f64 = 0.03;

/// Summed raw counts of each mapped element over the pixels a phase's composition comes
/// from.
#[derive(Debug, Clone, PartialEq)]
pub struct PhaseCounts {
    /// Pixels summed.
    pub pixels: usize,
    /// Sum of counts per mapped element.
    pub sums: Vec<f64>,
    /// Variance of each element's rate (counts per pixel) when the sums are not plain
    /// Poisson counts (unmixed from the neighbours); `None`: Poisson, sums / pixels².
    pub rate_var: Option<Vec<f64>>,
}

impl PhaseCounts {
    fn rate(&self, e: usize) -> f64 {
        self.sums[e] / self.pixels.max(1) as f64
    }

    fn rate_var(&self, e: usize) -> f64 {
        match &self.rate_var {
            Some(v) => v[e],
            None => self.sums[e].max(1.0) / (self.pixels.max(1) as f64).powi(2),
        }
    }
}

/// Sensitivity factors, one per mapped element (`k_iR` of the module docs).
#[derive(Debug, Clone, PartialEq)]
pub struct KFactors {
    /// Factor per mapped element; `NaN` where the element is not quantified from its
    /// counts (oxygen by stoichiometry).
    pub k: Vec<f64>,
    /// Relative standard deviation of each factor (0 for factors given as exact).
    pub rel_sd: Vec<f64>,
    /// Index of the reference element (factor 1).
    pub reference: usize,
}

impl KFactors {
    /// Every factor 1: the apparent, uncalibrated composition.
    pub fn unit(n: usize) -> KFactors {
        KFactors {
            k: vec![1.0; n],
            rel_sd: vec![0.0; n],
            reference: 0,
        }
    }
}

/// How oxygen is obtained.
#[derive(Debug, Clone, PartialEq)]
pub enum Oxygen {
    /// From its map like any element (or absent, if not mapped).
    Measured,
    /// From the other elements' amounts and valences: O atoms = Σ n_i v_i / 2, with anions
    /// (negative valence) taking their share of the cations' charge. Oxygen's own map,
    /// if any, is not used.
    Stoichiometry {
        /// Valence per mapped element (same order as the elements).
        valences: Vec<f64>,
    },
}

/// Relative standard deviation allowed between a phase's counts and the continuum
/// model (level ∝ mean Z) when judging the phase free of an element: the proportionality
/// is Kramers' law for a pure element, and the mass-fraction mean Z of a compound follows
/// it only approximately (common practice, no source).
pub const CONTINUUM_MODEL_REL_SD: f64 = 0.05;

/// Phases judged free of an element support the continuum fit only if their mean atomic
/// numbers differ by this ratio at least, so that the proportionality to Z is really
/// tested (common practice, no source).
pub const CONTINUUM_Z_SPAN: f64 = 1.10;

/// How the continuum under the elements' lines is handled.
#[derive(Debug, Clone, PartialEq)]
pub enum BackgroundRule {
    /// None is subtracted: the maps hold net counts.
    None,
    /// Fitted per element over the phases free of it (only phases marked eligible, whose
    /// sums come from interior pixels, can serve).
    Fit {
        /// Per phase: may serve to fit the continuum.
        eligible: Vec<bool>,
    },
}

/// The continuum under each mapped element's line, as found.
///
/// The continuum (bremsstrahlung) under a line grows in proportion to the atomic number
/// of the material (Kramers 1923); for a compound the mass-fraction mean Z stands for it.
/// Per element, the level per unit Z is fitted over the phases whose counts it explains
/// alone (Poisson counts plus [`CONTINUUM_MODEL_REL_SD`] for the model), iterated with
/// the compositions that set each phase's mean Z.
#[derive(Debug, Clone, PartialEq)]
pub struct Background {
    /// Whether a continuum is subtracted at all (false: the maps hold net counts).
    pub subtracted: bool,
    /// Per mapped element: continuum counts per pixel per unit mean Z, when it could be
    /// measured.
    pub per_z: Vec<Option<f64>>,
    /// Per mapped element: the phases judged free of it, whose counts fixed the level.
    pub free: Vec<Vec<usize>>,
    /// Per mapped element whose level could not be measured (no phase free of it): the
    /// median level of the maps where it could, as an order of magnitude of the continuum
    /// left under its line. It is not subtracted; it widens the element's uncertainty.
    pub unmeasured: Vec<Option<f64>>,
}

impl Background {
    /// No background subtracted.
    pub fn none(n: usize) -> Background {
        Background {
            subtracted: false,
            per_z: vec![None; n],
            free: vec![Vec::new(); n],
            unmeasured: vec![None; n],
        }
    }

    /// Expected continuum counts per pixel of element `e` in a phase of mean Z `zbar`.
    pub fn rate(&self, e: usize, zbar: f64) -> f64 {
        self.per_z[e].map_or(0.0, |c| c * zbar)
    }

    /// Fits the continuum of every element given each phase's mean Z (`k` weighs the
    /// counts for the share test of a lone free phase; `NaN` factors are left out).
    pub fn fit(phases: &[PhaseCounts], eligible: &[bool], zbar: &[f64], k: &[f64]) -> Background {
        let n = k.len();
        let mut per_z = vec![None; n];
        let mut free = vec![Vec::new(); n];
        for e in 0..n {
            if let Some((c, f)) = fit_one(phases, eligible, zbar, k, e) {
                per_z[e] = Some(c);
                free[e] = f;
            }
        }
        // The levels found, for the order of magnitude of those that could not be.
        let mut found: Vec<f64> = per_z.iter().flatten().copied().collect();
        found.sort_by(f64::total_cmp);
        let median = (!found.is_empty()).then(|| {
            let m = found.len() / 2;
            if found.len() % 2 == 1 {
                found[m]
            } else {
                0.5 * (found[m - 1] + found[m])
            }
        });
        let unmeasured = (0..n)
            .map(|e| {
                (per_z[e].is_none() && k[e].is_finite())
                    .then_some(median)
                    .flatten()
            })
            .collect();
        Background {
            subtracted: true,
            per_z,
            free,
            unmeasured,
        }
    }
}

/// Whether phase `p`'s counts of element `e` at mean Z `zbar` are explained by a
/// continuum of `c` counts per pixel per unit Z alone.
fn continuum_alone(p: &PhaseCounts, e: usize, zbar: f64, c: f64) -> bool {
    let n = p.pixels as f64;
    let mu = c * zbar * n;
    let counting = match &p.rate_var {
        None => mu,
        Some(v) => v[e] * n * n,
    };
    let sd = (counting + (CONTINUUM_MODEL_REL_SD * mu).powi(2)).sqrt();
    p.sums[e] - mu <= 3.0 * sd
}

/// The continuum level of element `e` and the phases free of it (see [`Background`]).
fn fit_one(
    phases: &[PhaseCounts],
    eligible: &[bool],
    zbar: &[f64],
    k: &[f64],
    e: usize,
) -> Option<(f64, Vec<usize>)> {
    let cand: Vec<usize> = (0..phases.len())
        .filter(|&p| eligible[p] && phases[p].pixels > 0 && zbar[p] > 0.0)
        .collect();
    if cand.len() < 2 {
        return None; // one phase alone has no reference
    }
    let level = |set: &[usize]| {
        let counts: f64 = set.iter().map(|&p| phases[p].sums[e]).sum();
        let exposure: f64 = set.iter().map(|&p| phases[p].pixels as f64 * zbar[p]).sum();
        counts / exposure
    };
    let lowest = *cand.iter().min_by(|&&a, &&b| {
        (phases[a].rate(e) / zbar[a]).total_cmp(&(phases[b].rate(e) / zbar[b]))
    })?;
    let mut free = vec![lowest];
    let mut c = level(&free);
    for _ in 0..20 {
        let next: Vec<usize> = cand
            .iter()
            .copied()
            .filter(|&p| continuum_alone(&phases[p], e, zbar[p], c))
            .collect();
        if next.is_empty() || next == free {
            break;
        }
        free = next;
        c = level(&free);
    }
    let (zlo, zhi) = free.iter().fold((f64::MAX, 0.0f64), |(lo, hi), &p| {
        (lo.min(zbar[p]), hi.max(zbar[p]))
    });
    if free.len() >= 2 && zhi >= CONTINUUM_Z_SPAN * zlo {
        return Some((c, free));
    }
    // A lone free phase (or several of one mean Z): trusted only if it is clearly poor
    // in the element, else its counts may be the element itself.
    let p = lowest;
    let hi = cand.iter().map(|&q| phases[q].rate(e)).fold(0.0, f64::max);
    let weighted: f64 = (0..k.len())
        .filter(|&j| k[j].is_finite())
        .map(|j| k[j] * phases[p].rate(j))
        .sum();
    let share = if k[e].is_finite() && weighted > 0.0 {
        k[e] * phases[p].rate(e) / weighted
    } else {
        1.0
    };
    let poor = phases[p].rate(e) <= FREE_SHARE * hi || share <= FREE_WT;
    (hi > 0.0 && poor).then(|| (level(&[p]), vec![p]))
}

/// Currie's (1968) critical level and detection limit, in counts, for `b` expected
/// background counts whose estimate has the variance `var_b` (5 % false positives and
/// negatives): with σ₀² = B + var_b, L_C = 1.645 σ₀ and L_D = 2.71 + 3.29 σ₀. A net signal
/// above L_C is detected; L_D is the smallest true signal detected reliably, the limit to
/// report. Paired observations (var_b = B) give Currie's L_C = 2.33 √B and
/// L_D = 2.71 + 4.65 √B.
pub fn currie(b: f64, var_b: f64) -> (f64, f64) {
    let s0 = (b.max(0.0) + var_b.max(0.0)).sqrt();
    (1.645 * s0, 2.71 + 3.29 * s0)
}

/// Composition of one phase over the output elements.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseComposition {
    /// Mass fractions, % (sum 100).
    pub wt: Vec<f64>,
    /// One standard deviation of `wt` from counting statistics, %.
    pub wt_sd: Vec<f64>,
    /// Atom fractions, % (sum 100).
    pub at: Vec<f64>,
    /// One standard deviation of `at`, %.
    pub at_sd: Vec<f64>,
    /// Net counts per pixel after background, per mapped element.
    pub net_rate: Vec<f64>,
    /// Variance of `net_rate` from counting statistics.
    pub net_var: Vec<f64>,
    /// Per output element: detected (net counts above Currie's critical level), or not
    /// tested (no continuum measured for it; oxygen by stoichiometry). An element not
    /// detected has `wt` and `at` 0 and is left out of the normalisation.
    pub detected: Vec<bool>,
    /// Per output element not detected: the detection limit, wt% (Currie's L_D).
    pub limit_wt: Vec<Option<f64>>,
}

/// Compositions of every phase.
#[derive(Debug, Clone, PartialEq)]
pub struct Quantification {
    /// Output elements: the mapped ones, plus oxygen by stoichiometry when not mapped.
    pub elements: Vec<ElementInfo>,
    /// Per phase, in the order given.
    pub phases: Vec<PhaseComposition>,
    /// The continuum as found.
    pub background: Background,
}

/// Everything the calculation needs besides the counts.
#[derive(Debug, Clone, PartialEq)]
pub struct Rules {
    /// Sensitivity factors.
    pub k: KFactors,
    /// Oxygen rule.
    pub oxygen: Oxygen,
    /// Continuum background.
    pub background: BackgroundRule,
}

/// Output elements for `mapped` under an oxygen rule.
pub fn output_elements(mapped: &[ElementInfo], oxygen: &Oxygen) -> Vec<ElementInfo> {
    let mut out = mapped.to_vec();
    if matches!(oxygen, Oxygen::Stoichiometry { .. }) && !out.iter().any(|e| e.symbol == "O") {
        out.push(super::element("O").expect("oxygen is an element"));
    }
    out
}

/// True if element `e` is quantified from its own counts under the rule.
pub fn from_counts(e: &ElementInfo, oxygen: &Oxygen) -> bool {
    !(e.symbol == "O" && matches!(oxygen, Oxygen::Stoichiometry { .. }))
}

/// Mass fractions (sum 1) over `out` from net intensities `net` and factors `k` of the
/// mapped elements. Negative intensities count as zero.
fn mass_fractions(
    mapped: &[ElementInfo],
    out: &[ElementInfo],
    net: &[f64],
    k: &[f64],
    oxygen: &Oxygen,
) -> Vec<f64> {
    let mut mass = vec![0.0; out.len()];
    for (i, e) in mapped.iter().enumerate() {
        if from_counts(e, oxygen) {
            mass[i] = k[i] * net[i].max(0.0);
        }
    }
    if let Oxygen::Stoichiometry { valences } = oxygen {
        let charge: f64 = mapped
            .iter()
            .enumerate()
            .filter(|(_, e)| e.symbol != "O")
            .map(|(i, e)| mass[i] / e.atomic_weight * valences[i])
            .sum();
        let o = out.iter().position(|e| e.symbol == "O").expect("O output");
        mass[o] = (charge / 2.0).max(0.0) * out[o].atomic_weight;
    }
    let total: f64 = mass.iter().sum();
    if total > 0.0 {
        mass.iter_mut().for_each(|m| *m /= total);
    }
    mass
}

fn atom_fractions(out: &[ElementInfo], wt: &[f64]) -> Vec<f64> {
    let moles: Vec<f64> = out
        .iter()
        .zip(wt)
        .map(|(e, w)| w / e.atomic_weight)
        .collect();
    let total: f64 = moles.iter().sum();
    moles
        .iter()
        .map(|m| if total > 0.0 { m / total } else { 0.0 })
        .collect()
}

/// Variance of each element's continuum level per unit Z, from the counts it was fitted
/// to.
fn level_var(phases: &[PhaseCounts], background: &Background, zbar: &[f64]) -> Vec<f64> {
    (0..background.per_z.len())
        .map(|e| {
            let f = &background.free[e];
            let counts: f64 = f.iter().map(|&p| phases[p].sums[e]).sum();
            let exposure: f64 = f.iter().map(|&p| phases[p].pixels as f64 * zbar[p]).sum();
            if exposure > 0.0 {
                counts.max(1.0) / exposure.powi(2)
            } else {
                0.0
            }
        })
        .collect()
}

/// Net intensity (counts per pixel) of every mapped element in every phase, with its
/// variance (the counts' and the continuum level's), given each phase's mean Z.
fn net_rates(
    phases: &[PhaseCounts],
    background: &Background,
    zbar: &[f64],
    lv: &[f64],
) -> Vec<(Vec<f64>, Vec<f64>)> {
    phases
        .iter()
        .enumerate()
        .map(|(p, pc)| {
            let n = pc.sums.len();
            let net: Vec<f64> = (0..n)
                .map(|e| pc.rate(e) - background.rate(e, zbar[p]))
                .collect();
            // A continuum that could not be measured stays in; its likely size (the other
            // maps' level) counts as one standard deviation.
            let var: Vec<f64> = (0..n)
                .map(|e| {
                    let left = background.unmeasured[e].map_or(0.0, |c| c * zbar[p]);
                    pc.rate_var(e) + zbar[p].powi(2) * lv[e] + left * left
                })
                .collect();
            (net, var)
        })
        .collect()
}

/// Per phase and mapped element: detected (above Currie's critical level, with the
/// continuum's own uncertainty: the fit's counts and [`CONTINUUM_MODEL_REL_SD`]), and the
/// detection limit in counts per pixel. A phase judged free of an element does not hold
/// it. Elements without a measured continuum count as detected (not tested) when a
/// continuum is subtracted; on net-count maps any counts are a detection.
fn detection(
    phases: &[PhaseCounts],
    background: &Background,
    zbar: &[f64],
    lv: &[f64],
) -> Vec<Vec<(bool, f64)>> {
    phases
        .iter()
        .enumerate()
        .map(|(p, pc)| {
            (0..pc.sums.len())
                .map(|e| {
                    let n = pc.pixels.max(1) as f64;
                    let tested = !background.subtracted || background.per_z[e].is_some();
                    let b = background.rate(e, zbar[p]) * n;
                    let var_b =
                        (zbar[p] * n).powi(2) * lv[e] + (CONTINUUM_MODEL_REL_SD * b).powi(2);
                    // Unmixed rates: their own variance stands for the counts'.
                    let (lc, ld) = match &pc.rate_var {
                        None => currie(b, var_b),
                        Some(v) => currie(0.0, v[e] * n * n + var_b),
                    };
                    let free = background.free[e].contains(&p);
                    let detected = !tested || (!free && pc.sums[e] - b > lc);
                    (detected, ld / n)
                })
                .collect()
        })
        .collect()
}

/// Net rates with the elements not detected set to 0.
fn detected_only(net: &[f64], det: &[(bool, f64)]) -> Vec<f64> {
    net.iter()
        .zip(det)
        .map(|(&x, &(d, _))| if d { x } else { 0.0 })
        .collect()
}

/// Mass-fraction mean atomic number.
fn mean_z(out: &[ElementInfo], wt: &[f64]) -> f64 {
    out.iter().zip(wt).map(|(e, w)| w * f64::from(e.z)).sum()
}

/// Computes the compositions of all phases.
pub fn quantify(mapped: &[ElementInfo], phases: &[PhaseCounts], rules: &Rules) -> Quantification {
    let out = output_elements(mapped, &rules.oxygen);
    let n = mapped.len();
    let k = &rules.k.k;
    let fractions = |net: &[f64]| mass_fractions(mapped, &out, net, k, &rules.oxygen);
    let fit = |zbar: &[f64]| match &rules.background {
        BackgroundRule::None => Background::none(n),
        BackgroundRule::Fit { eligible } => Background::fit(phases, eligible, zbar, k),
    };
    // Mean Z per phase for the continuum: start from the gross counts, then iterate the
    // continuum, the detections and the compositions together.
    let mut zbar: Vec<f64> = phases
        .iter()
        .map(|p| {
            mean_z(
                &out,
                &fractions(&(0..n).map(|e| p.rate(e)).collect::<Vec<_>>()),
            )
        })
        .collect();
    // Net rates and detections for a continuum fitted at these mean Z (the level's
    // variance computed once for both).
    let evaluate = |zbar: &[f64]| {
        let background = fit(zbar);
        let lv = level_var(phases, &background, zbar);
        let nets = net_rates(phases, &background, zbar, &lv);
        let det = detection(phases, &background, zbar, &lv);
        (background, nets, det)
    };
    let (mut background, mut nets, mut det) = evaluate(&zbar);
    for _ in 0..6 {
        zbar = nets
            .iter()
            .zip(&det)
            .map(|((net, _), d)| mean_z(&out, &fractions(&detected_only(net, d))))
            .collect();
        (background, nets, det) = evaluate(&zbar);
    }
    let compositions = nets
        .into_iter()
        .zip(&det)
        .map(|((net, var), d)| compose(mapped, &out, &net, &var, d, rules))
        .collect();
    Quantification {
        elements: out,
        phases: compositions,
        background,
    }
}

/// One phase's composition from its net rates, their variances and its detections.
fn compose(
    mapped: &[ElementInfo],
    out: &[ElementInfo],
    net: &[f64],
    var: &[f64],
    det: &[(bool, f64)],
    rules: &Rules,
) -> PhaseComposition {
    let n = mapped.len();
    let used = detected_only(net, det);
    let f = |net: &[f64], k: &[f64]| {
        let wt = mass_fractions(mapped, out, net, k, &rules.oxygen);
        let at = atom_fractions(out, &wt);
        (wt, at)
    };
    let (wt, at) = f(&used, &rules.k.k);
    // First-order propagation with central differences, input by input (detected
    // elements only: the others are reported as limits).
    let mut wt_var = vec![0.0; out.len()];
    let mut at_var = vec![0.0; out.len()];
    let mut add = |sd: f64, shifted: &dyn Fn(f64) -> (Vec<f64>, Vec<f64>)| {
        if sd <= 0.0 || !sd.is_finite() {
            return;
        }
        let (wp, ap) = shifted(sd * 1e-3);
        let (wm, am) = shifted(-sd * 1e-3);
        for o in 0..out.len() {
            wt_var[o] += ((wp[o] - wm[o]) / 2e-3).powi(2);
            at_var[o] += ((ap[o] - am[o]) / 2e-3).powi(2);
        }
    };
    for e in (0..n).filter(|&e| det[e].0) {
        add(var[e].sqrt(), &|h| {
            let mut x = used.clone();
            x[e] += h;
            f(&x, &rules.k.k)
        });
        let k_sd = rules.k.k[e] * rules.k.rel_sd[e];
        add(k_sd, &|h| {
            let mut k = rules.k.k.clone();
            k[e] += h;
            f(&used, &k)
        });
    }
    // The limit of an element not detected: its share at a net rate of L_D.
    let limit = |e: usize| {
        let mut x = used.clone();
        x[e] = det[e].1;
        100.0 * f(&x, &rules.k.k).0[e]
    };
    let mut detected = vec![true; out.len()];
    let mut limit_wt = vec![None; out.len()];
    for e in 0..n {
        if !det[e].0 && from_counts(&mapped[e], &rules.oxygen) {
            detected[e] = false;
            limit_wt[e] = Some(limit(e));
        }
    }
    let pct = |v: &[f64]| v.iter().map(|x| 100.0 * x).collect::<Vec<_>>();
    let pct_sd = |v: &[f64]| v.iter().map(|x| 100.0 * x.sqrt()).collect::<Vec<_>>();
    PhaseComposition {
        wt: pct(&wt),
        wt_sd: pct_sd(&wt_var),
        at: pct(&at),
        at_sd: pct_sd(&at_var),
        net_rate: net.to_vec(),
        net_var: var.to_vec(),
        detected,
        limit_wt,
    }
}

/// A phase of known composition used to calibrate the factors.
#[derive(Debug, Clone, PartialEq)]
pub struct Standard {
    /// Net counts per pixel per mapped element, with their variances.
    pub net: Vec<f64>,
    /// Variances of `net`.
    pub var: Vec<f64>,
    /// Known mass fractions per mapped element (any scale).
    pub known: Vec<f64>,
}

/// Why a calibration failed.
#[derive(Debug, Clone, PartialEq)]
pub enum CalibrationError {
    /// These mapped elements (indices) occur in no standard, or in no standard linked to
    /// the others by a shared element.
    NotReached(Vec<usize>),
    /// A standard should contain this element (standard index, element index) but shows
    /// no net counts of it.
    NoCounts(usize, usize),
}

/// Derives factors from standards by weighted least squares on logarithms: for each
/// standard s and element i it contains, ln k_i − a_s = ln(C_si / I_si), weighted by the
/// inverse relative variance of I_si; a_s is the standard's unknown scale. One standard
/// with every element is solved exactly; several standards are linked through shared
/// elements. `quantified` marks the elements that need a factor.
pub fn calibrate(
    standards: &[Standard],
    quantified: &[bool],
) -> Result<KFactors, CalibrationError> {
    let n = quantified.len();
    // Which elements each standard constrains.
    let mut obs: Vec<(usize, usize, f64, f64)> = Vec::new(); // (standard, element, y, weight)
    for (s, st) in standards.iter().enumerate() {
        for (e, &q) in quantified.iter().enumerate() {
            if !q || st.known[e] <= 0.0 {
                continue;
            }
            if st.net[e] <= 0.0 {
                return Err(CalibrationError::NoCounts(s, e));
            }
            let rel_var = st.var[e] / (st.net[e] * st.net[e]) + 1e-10;
            obs.push((s, e, (st.known[e] / st.net[e]).ln(), 1.0 / rel_var));
        }
    }
    // Union–find over elements, linked through standards.
    let mut parent: Vec<usize> = (0..n).collect();
    fn root(p: &mut [usize], mut i: usize) -> usize {
        while p[i] != i {
            p[i] = p[p[i]];
            i = p[i];
        }
        i
    }
    for s in 0..standards.len() {
        let members: Vec<usize> = obs.iter().filter(|o| o.0 == s).map(|o| o.1).collect();
        for w in members.windows(2) {
            let (a, b) = (root(&mut parent, w[0]), root(&mut parent, w[1]));
            parent[a] = b;
        }
    }
    let seen: Vec<bool> = (0..n).map(|e| obs.iter().any(|o| o.1 == e)).collect();
    // Reference: the element with the most weight of evidence.
    let reference = (0..n)
        .filter(|&e| seen[e])
        .max_by(|&a, &b| {
            let w = |e: usize| obs.iter().filter(|o| o.1 == e).map(|o| o.3).sum::<f64>();
            w(a).total_cmp(&w(b)).then(b.cmp(&a))
        })
        .ok_or_else(|| CalibrationError::NotReached((0..n).filter(|&e| quantified[e]).collect()))?;
    let r = root(&mut parent, reference);
    let missing: Vec<usize> = (0..n)
        .filter(|&e| quantified[e] && (!seen[e] || root(&mut parent, e) != r))
        .collect();
    if !missing.is_empty() {
        return Err(CalibrationError::NotReached(missing));
    }
    // Unknowns: ln k for every quantified element except the reference, then a_s.
    let elems: Vec<usize> = (0..n)
        .filter(|&e| quantified[e] && e != reference)
        .collect();
    let used: Vec<usize> = (0..standards.len())
        .filter(|s| obs.iter().any(|o| o.0 == *s))
        .collect();
    let m = elems.len() + used.len();
    let mut ata = DMatrix::<f64>::zeros(m, m);
    let mut atb = DVector::<f64>::zeros(m);
    for &(s, e, y, w) in &obs {
        let mut row = vec![0.0; m];
        if let Some(i) = elems.iter().position(|&x| x == e) {
            row[i] = 1.0;
        }
        let j = elems.len() + used.iter().position(|&x| x == s).expect("used standard");
        row[j] = -1.0;
        for a in 0..m {
            atb[a] += w * row[a] * y;
            for b in 0..m {
                ata[(a, b)] += w * row[a] * row[b];
            }
        }
    }
    let inv = ata
        .try_inverse()
        .ok_or_else(|| CalibrationError::NotReached(elems.clone()))?;
    let x = &inv * atb;
    let mut k = vec![f64::NAN; n];
    let mut rel_sd = vec![0.0; n];
    k[reference] = 1.0;
    for (i, &e) in elems.iter().enumerate() {
        k[e] = x[i].exp();
        rel_sd[e] = inv[(i, i)].max(0.0).sqrt();
    }
    Ok(KFactors {
        k,
        rel_sd,
        reference,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::{element, parse_formula};

    fn els(s: &[&str]) -> Vec<ElementInfo> {
        s.iter().map(|x| element(x).unwrap()).collect()
    }

    /// Cliff–Lorimer worked example (references.md §8, computed there): I_A/I_B = 2.0 and
    /// k_AB = 1.5 give C_A/C_B = 3, so C_A = 0.75 and C_B = 0.25.
    #[test]
    fn ratio_method_worked_example() {
        let mapped = els(&["Cu", "Sn"]);
        let phases = [PhaseCounts {
            rate_var: None,
            pixels: 1000,
            sums: vec![2.0e6, 1.0e6],
        }];
        let rules = Rules {
            k: KFactors {
                k: vec![1.5, 1.0],
                rel_sd: vec![0.0; 2],
                reference: 1,
            },
            oxygen: Oxygen::Measured,
            background: BackgroundRule::None,
        };
        let q = quantify(&mapped, &phases, &rules);
        assert!((q.phases[0].wt[0] - 75.0).abs() < 1e-9);
        assert!((q.phases[0].wt[1] - 25.0).abs() < 1e-9);
    }

    /// Counting uncertainty of a two-element phase: with C_A = I_A/(I_A + I_B) and Poisson
    /// sums N_A, N_B, var C_A = (N_B² N_A + N_A² N_B)/(N_A + N_B)⁴ (first-order
    /// propagation, derived by hand).
    #[test]
    fn counting_uncertainty_matches_the_hand_derivation() {
        let (na, nb) = (400.0f64, 1600.0f64);
        let phases = [PhaseCounts {
            rate_var: None,
            pixels: 10,
            sums: vec![na, nb],
        }];
        let rules = Rules {
            k: KFactors::unit(2),
            oxygen: Oxygen::Measured,
            background: BackgroundRule::None,
        };
        let q = quantify(&els(&["Fe", "Ni"]), &phases, &rules);
        let expected = 100.0 * ((nb * nb * na + na * na * nb) / (na + nb).powi(4)).sqrt();
        assert!((q.phases[0].wt_sd[0] - expected).abs() < 1e-6 * expected);
        assert!((q.phases[0].wt_sd[1] - expected).abs() < 1e-6 * expected);
    }

    /// Oxygen by stoichiometry recovers the formula's oxygen: Al2O3 from Al alone (Al³⁺)
    /// gives Al 52.926 wt%, O 47.074 wt% (references.md §6, computed from the formula).
    #[test]
    fn oxygen_from_valences() {
        let mapped = els(&["Al"]);
        let phases = [PhaseCounts {
            rate_var: None,
            pixels: 100,
            sums: vec![1.0e5],
        }];
        let rules = Rules {
            k: KFactors::unit(1),
            oxygen: Oxygen::Stoichiometry {
                valences: vec![3.0],
            },
            background: BackgroundRule::None,
        };
        let q = quantify(&mapped, &phases, &rules);
        assert_eq!(q.elements[1].symbol, "O");
        assert!((q.phases[0].wt[0] - 52.926).abs() < 0.005);
        assert!((q.phases[0].wt[1] - 47.074).abs() < 0.005);
        assert!((q.phases[0].at[1] - 60.0).abs() < 1e-9);
    }

    /// One standard fixes the factors exactly; a second phase of another composition is then
    /// recovered (synthetic intensities from invented sensitivities).
    #[test]
    fn calibration_on_one_phase_recovers_another() {
        let mapped = els(&["Cu", "Sn"]);
        let sens = [46.0, 38.0];
        let counts = |f: &str| {
            let c = parse_formula(f).unwrap();
            PhaseCounts {
                rate_var: None,
                pixels: 10_000,
                sums: mapped
                    .iter()
                    .zip(sens)
                    .map(|(e, s)| 1e4 * s * c.mass_fraction_of(e.symbol))
                    .collect(),
            }
        };
        let std = counts("Cu6Sn5");
        let known: Vec<f64> = mapped
            .iter()
            .map(|e| parse_formula("Cu6Sn5").unwrap().mass_fraction_of(e.symbol))
            .collect();
        let net: Vec<f64> = (0..2).map(|e| std.rate(e)).collect();
        let var: Vec<f64> = (0..2).map(|e| std.rate_var(e)).collect();
        let k = calibrate(&[Standard { net, var, known }], &[true, true]).unwrap();
        let other = 1 - k.reference;
        assert_eq!(k.rel_sd[k.reference], 0.0);
        assert!(k.rel_sd[other] > 0.0 && k.rel_sd[other] < 0.01);
        let rules = Rules {
            k,
            oxygen: Oxygen::Measured,
            background: BackgroundRule::None,
        };
        let q = quantify(&mapped, &[counts("Cu3Sn")], &rules);
        let truth = parse_formula("Cu3Sn").unwrap().mass_fraction_of("Cu") * 100.0;
        assert!(
            (q.phases[0].wt[0] - truth).abs() < 1e-6,
            "{:?}",
            q.phases[0]
        );
    }

    #[test]
    fn calibration_names_elements_it_cannot_reach() {
        let st = Standard {
            net: vec![10.0, 5.0, 0.0],
            var: vec![0.1, 0.1, 0.1],
            known: vec![0.5, 0.5, 0.0],
        };
        assert_eq!(
            calibrate(std::slice::from_ref(&st), &[true, true, true]),
            Err(CalibrationError::NotReached(vec![2]))
        );
        let bad = Standard {
            known: vec![0.5, 0.5, 0.1],
            ..st
        };
        assert_eq!(
            calibrate(&[bad], &[true, true, true]),
            Err(CalibrationError::NoCounts(0, 2))
        );
    }

    /// Continuum subtraction: phases free of an element fix its level per unit mean Z
    /// (Kramers 1923: the continuum is proportional to Z), which is subtracted from every
    /// phase; a phase's counts of an element it lacks are reported as not detected, with
    /// a limit.
    #[test]
    fn continuum_fitted_over_the_phases_free_of_each_element() {
        // Pure Al, Fe and Ag (Z 13, 26, 47); each phase lacks the other two elements.
        // Counts invented: peaks 60-80 counts per pixel, continuum 0.2 per pixel per unit Z.
        let cont = |z: f64| 0.2 * z;
        let pure = |el: usize, rate: f64, z: f64, n: usize| PhaseCounts {
            rate_var: None,
            pixels: n,
            sums: (0..3)
                .map(|e| n as f64 * (if e == el { rate } else { 0.0 } + cont(z)))
                .collect(),
        };
        let phases = vec![
            pure(1, 80.0, 26.0, 4000),
            pure(2, 60.0, 47.0, 4000),
            pure(0, 70.0, 13.0, 4000),
        ];
        let rules = Rules {
            k: KFactors::unit(3),
            oxygen: Oxygen::Measured,
            background: BackgroundRule::Fit {
                eligible: vec![true; 3],
            },
        };
        let q = quantify(&els(&["Al", "Fe", "Ag"]), &phases, &rules);
        // Al is in no phase but the third: its level is fitted on the first two.
        assert_eq!(q.background.free[0], vec![0, 1]);
        assert!((q.background.per_z[0].unwrap() - 0.2).abs() < 1e-9);
        for (p, el) in [(0, 1), (1, 2), (2, 0)] {
            assert!(
                (q.phases[p].wt[el] - 100.0).abs() < 1e-9,
                "{:?}",
                q.phases[p]
            );
            for e in (0..3).filter(|&e| e != el) {
                assert!(!q.phases[p].detected[e]);
                let lim = q.phases[p].limit_wt[e].unwrap();
                assert!(lim > 0.0 && lim < 5.0, "limit {lim}");
            }
        }
        // A single phase has no reference: nothing is measured, nothing subtracted.
        let one = quantify(
            &els(&["Al", "Fe", "Ag"]),
            &phases[..1],
            &Rules {
                background: BackgroundRule::Fit {
                    eligible: vec![true],
                },
                ..rules.clone()
            },
        );
        assert!(one.background.per_z.iter().all(Option::is_none));
        assert!(one.phases[0].detected.iter().all(|&d| d));
    }

    /// Every phase holds the element (oxygen in a silicate rock): no level can be
    /// measured, so nothing is subtracted and detection is not tested.
    #[test]
    fn no_continuum_invented_when_every_phase_holds_the_element() {
        let phases = vec![
            PhaseCounts {
                rate_var: None,
                pixels: 1000,
                sums: vec![50_000.0, 20_000.0],
            },
            PhaseCounts {
                rate_var: None,
                pixels: 1000,
                sums: vec![45_000.0, 30_000.0],
            },
        ];
        let q = quantify(
            &els(&["O", "Si"]),
            &phases,
            &Rules {
                k: KFactors::unit(2),
                oxygen: Oxygen::Measured,
                background: BackgroundRule::Fit {
                    eligible: vec![true, true],
                },
            },
        );
        assert_eq!(q.background.per_z[0], None);
        assert!(q.phases.iter().all(|p| p.detected[0] && p.wt[0] > 50.0));
    }

    /// Currie (1968), paired observations: L_C = 2.33 √B, L_D = 2.71 + 4.65 √B; the
    /// published formulas at B = 100 counts give L_C = 23.3 and L_D = 49.2.
    #[test]
    fn currie_limits() {
        let (lc, ld) = currie(100.0, 100.0);
        assert!((lc - 23.26).abs() < 0.01, "{lc}");
        assert!((ld - 49.24).abs() < 0.05, "{ld}");
        let (lc0, ld0) = currie(0.0, 0.0);
        assert_eq!(lc0, 0.0);
        assert!((ld0 - 2.71).abs() < 1e-12);
    }
}
