//! Beam-physics advice: how far the electrons and the X-rays of each mapped line reach in
//! each phase, what that means for the pixel size, and whether the beam energy suits the
//! lines.
//!
//! - Electron range: Kanaya & Okayama (1972), with mass-fraction-averaged A and Z for a
//!   compound ([`crate::physics::kanaya_okayama_um`]).
//! - X-ray generation range of a line: Andersen & Hasler (1966), from the line's critical
//!   excitation energy (its absorption edge, [`crate::chem::xray`])
//!   ([`crate::physics::andersen_hasler_um`]).
//! - Overvoltage U = E0/Ec: below 1 the line is not excited at all, below
//!   [`GOOD_OVERVOLTAGE`] it is weak.
//!
//! The X-ray range is roughly the diameter of the volume the signal of one pixel comes
//! from: features smaller than it are blurred into their surroundings whatever the pixel
//! size, and pixels much smaller than it only divide the counts.

use serde::{Deserialize, Serialize};

use crate::chem::xray::{map_line, Family, XrayLine, GOOD_OVERVOLTAGE};
use crate::chem::ElementInfo;
use crate::physics::{andersen_hasler_um, kanaya_okayama_um};

/// Maps are called oversampled when the smallest X-ray range spans at least this many
/// pixels (common practice, no source: two pixels per resolved distance suffice).
pub const OVERSAMPLED_PIXELS: f64 = 4.0;

/// A phase's composition and density as the advisor needs them.
#[derive(Debug, Clone, PartialEq)]
pub struct PhaseInput {
    /// Phase id.
    pub id: u16,
    /// Phase name.
    pub name: String,
    /// Elements and mass fractions (any scale).
    pub composition: Vec<(ElementInfo, f64)>,
    /// Density, g/cm³, and where it came from.
    pub density: Option<(f64, String)>,
}

/// The mapped line of one element.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LineInfo {
    /// Element symbol.
    pub element: String,
    /// Line family's principal line (`Kα`, `Lα`, `Mα`).
    pub line: String,
    /// Whether the line was named with the map or chosen by the beam energy.
    pub named: bool,
    /// Line energy, keV.
    pub energy_kev: f64,
    /// Critical excitation energy (edge), keV.
    pub edge_kev: f64,
    /// Overvoltage E0/Ec.
    pub overvoltage: f64,
}

/// Ranges in one phase.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseRanges {
    /// Phase id.
    pub id: u16,
    /// Density used, g/cm³.
    pub density: f64,
    /// Where the density came from.
    pub density_source: String,
    /// Kanaya–Okayama electron range, µm.
    pub electron_range_um: f64,
    /// Andersen–Hasler X-ray generation range per line of an element present in the phase
    /// (≥ 1 wt%), µm.
    pub xray_range_um: Vec<(String, f64)>,
}

/// The advisor's findings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct Advice {
    /// Beam energy, kV.
    pub beam_kv: Option<f64>,
    /// Pixel size of the labelled grid, µm.
    pub pixel_size_um: Option<f64>,
    /// One entry per mapped element with a tabulated line.
    pub lines: Vec<LineInfo>,
    /// One entry per phase with a density.
    pub phases: Vec<PhaseRanges>,
    /// Suggested binning factor, when the maps are oversampled.
    pub suggested_bin: Option<usize>,
    /// Lowest beam energy that keeps every mapped line at U ≥ 2, kV.
    pub lowest_good_kv: Option<f64>,
    /// Messages for the analyst.
    pub messages: Vec<String>,
}

impl Advice {
    /// The largest X-ray range over phases and lines, µm.
    pub fn largest_xray_range_um(&self) -> Option<f64> {
        self.phases
            .iter()
            .flat_map(|p| p.xray_range_um.iter().map(|r| r.1))
            .filter(|r| *r > 0.0)
            .max_by(f64::total_cmp)
    }
}

/// Density of a phase from its elements when no reference gives one: ideal mixing by
/// volume over the elements that are solid, 1/ρ = Σ w_i/ρ_i. Crude for compounds with
/// light elements (oxides are denser than this), hence marked as an estimate.
pub fn estimated_density(composition: &[(ElementInfo, f64)]) -> Option<f64> {
    let solid: Vec<(f64, f64)> = composition
        .iter()
        .filter_map(|(e, w)| e.density.filter(|d| *d > 0.5).map(|d| (*w, d)))
        .filter(|(w, _)| *w > 0.0)
        .collect();
    let total: f64 = solid.iter().map(|x| x.0).sum();
    (total > 0.0).then(|| total / solid.iter().map(|(w, d)| w / d).sum::<f64>())
}

fn ceil_kv(x: f64) -> f64 {
    x.ceil().max(5.0)
}

/// Runs the advisor. `lines` are the mapped elements with the line named with each map.
pub fn advise(
    mapped: &[(ElementInfo, Option<String>)],
    kv: Option<f64>,
    pixel_size_um: Option<f64>,
    phases: &[PhaseInput],
) -> Advice {
    let mut a = Advice {
        beam_kv: kv,
        pixel_size_um,
        ..Advice::default()
    };
    let Some(kv) = kv else {
        a.messages.push(
            "beam energy unknown: give --kv (or beam_kv in field.toml) for electron and X-ray ranges and line advice"
                .into(),
        );
        return a;
    };
    if kv < 10.0 {
        a.messages.push(format!(
            "at {kv} kV the Kanaya–Okayama electron range is outside its validity (about 10 keV and above); take the ranges as rough"
        ));
    }
    let chosen: Vec<(ElementInfo, XrayLine, bool)> = mapped
        .iter()
        .filter_map(|(e, d)| map_line(e, d.as_deref(), kv).map(|l| (*e, l, d.is_some())))
        .collect();
    for (e, _) in mapped {
        if !chosen.iter().any(|c| c.0.symbol == e.symbol) {
            a.messages.push(format!(
                "{}: no tabulated line of the family named with its map; no range or overvoltage for it",
                e.symbol
            ));
        }
    }
    for (e, l, named) in &chosen {
        a.lines.push(LineInfo {
            element: e.symbol.into(),
            line: l.family.principal().into(),
            named: *named,
            energy_kev: l.energy_kev,
            edge_kev: l.edge_kev,
            overvoltage: l.overvoltage(kv),
        });
        a.messages.extend(excitation_message(e, l, kv));
    }
    a.phases = phases
        .iter()
        .filter_map(|p| phase_ranges(p, &chosen, kv))
        .collect();
    let all: Vec<f64> = a
        .phases
        .iter()
        .flat_map(|p| p.xray_range_um.iter().map(|r| r.1))
        .filter(|r| *r > 0.0)
        .collect();
    let (lo, hi) = (
        all.iter().copied().fold(f64::INFINITY, f64::min),
        all.iter().copied().fold(0.0, f64::max),
    );
    if let Some(px) = pixel_size_um {
        if lo.is_finite() && lo >= OVERSAMPLED_PIXELS * px {
            let bin = (lo / (2.0 * px)).floor() as usize;
            a.suggested_bin = Some(bin);
            a.messages.push(format!(
                "the maps are oversampled: pixels of {px} µm are much smaller than the X-ray generation range ({lo:.2}–{hi:.2} µm), so neighbouring pixels see the same volume; --bin {bin} gives {} × the counts per pixel with no loss of real resolution",
                bin * bin
            ));
        } else if lo.is_finite() {
            a.messages.push(format!(
                "X-ray generation range {lo:.2}–{hi:.2} µm against {px} µm pixels: features smaller than about {hi:.2} µm are blurred into their surroundings"
            ));
        }
    }
    if let Some(max_edge) = chosen.iter().map(|c| c.1.edge_kev).max_by(f64::total_cmp) {
        let need = ceil_kv(GOOD_OVERVOLTAGE * max_edge);
        a.lowest_good_kv = Some(need);
        if need <= kv - 3.0 && hi > 0.0 {
            a.messages
                .push(lower_energy_message(phases, &chosen, need, hi));
        }
    }
    a
}

/// What to say about line `l` of element `e` at `kv`: not excited, or weakly (overvoltage
/// under [`GOOD_OVERVOLTAGE`]), with the energy that excites it well and another line of
/// the element that is well excited, if any.
fn excitation_message(e: &ElementInfo, l: &XrayLine, kv: f64) -> Option<String> {
    let u = l.overvoltage(kv);
    let need = ceil_kv(GOOD_OVERVOLTAGE * l.edge_kev);
    let other = [Family::K, Family::L, Family::M]
        .into_iter()
        .filter(|f| *f != l.family)
        .filter_map(|f| crate::chem::xray::line(e.z, f))
        .filter(|o| o.overvoltage(kv) >= GOOD_OVERVOLTAGE)
        .max_by(|x, y| x.edge_kev.total_cmp(&y.edge_kev));
    let alt = other.map_or(String::new(), |o| {
        format!(
            ", or map its {} line ({:.2} keV)",
            o.family.principal(),
            o.energy_kev
        )
    });
    if u <= 1.0 {
        Some(format!(
            "{} {} is not excited at {kv} kV (edge {:.2} keV): its map holds only background; use at least {need} kV{alt}",
            e.symbol,
            l.family.principal(),
            l.edge_kev
        ))
    } else if u < GOOD_OVERVOLTAGE {
        Some(format!(
            "{} {} is weakly excited at {kv} kV (overvoltage {u:.2}, below {GOOD_OVERVOLTAGE}): few counts, and its intensity changes steeply with the beam energy; {need} kV gives U ≥ {GOOD_OVERVOLTAGE}{alt}",
            e.symbol,
            l.family.principal(),
        ))
    } else {
        None
    }
}

/// The electron range of phase `p` (Kanaya–Okayama, with its mass-fraction mean A and Z)
/// and the X-ray range of each chosen line of an element it holds at 1 wt% or more
/// (Andersen–Hasler); `None` without a density.
fn phase_ranges(
    p: &PhaseInput,
    chosen: &[(ElementInfo, XrayLine, bool)],
    kv: f64,
) -> Option<PhaseRanges> {
    let (rho, source) = p.density.clone()?;
    let total: f64 = p.composition.iter().map(|x| x.1).sum();
    if total <= 0.0 {
        return None;
    }
    let w = |f: &dyn Fn(&ElementInfo) -> f64| {
        p.composition
            .iter()
            .map(|(e, x)| x / total * f(e))
            .sum::<f64>()
    };
    let abar = w(&|e| e.atomic_weight);
    let zbar = w(&|e| f64::from(e.z));
    let ranges = chosen
        .iter()
        .filter(|(e, _, _)| {
            p.composition
                .iter()
                .any(|(x, wt)| x.symbol == e.symbol && wt / total >= 0.01)
        })
        .map(|(e, l, _)| {
            (
                e.symbol.to_string(),
                andersen_hasler_um(kv, l.edge_kev, rho),
            )
        })
        .collect();
    Some(PhaseRanges {
        id: p.id,
        density: rho,
        density_source: source,
        electron_range_um: kanaya_okayama_um(abar, zbar, rho, kv),
        xray_range_um: ranges,
    })
}

/// The advice to map at `need` kV, where every line is still well excited, with the
/// largest X-ray range there beside today's `hi`.
fn lower_energy_message(
    phases: &[PhaseInput],
    chosen: &[(ElementInfo, XrayLine, bool)],
    need: f64,
    hi: f64,
) -> String {
    let new_hi = phases
        .iter()
        .filter_map(|p| p.density.as_ref().map(|d| d.0))
        .flat_map(|rho| {
            chosen
                .iter()
                .map(move |c| andersen_hasler_um(need, c.1.edge_kev, rho))
        })
        .filter(|r| *r > 0.0)
        .fold(0.0, f64::max);
    format!(
        "a lower beam energy would sharpen the maps: at {need} kV every mapped line still has an overvoltage of at least {GOOD_OVERVOLTAGE}, and the largest X-ray range shrinks from {hi:.2} to about {new_hi:.2} µm"
    )
}

/// The phase input for the advisor from mass fractions over `elements`.
pub fn phase_input(
    id: u16,
    name: &str,
    elements: &[ElementInfo],
    wt: &[f64],
    reference_density: Option<(f64, String)>,
) -> PhaseInput {
    let composition: Vec<(ElementInfo, f64)> = elements
        .iter()
        .zip(wt)
        .filter(|(_, w)| **w > 0.0)
        .map(|(e, w)| (*e, *w))
        .collect();
    let density = reference_density.or_else(|| {
        estimated_density(&composition).map(|d| {
            (
                d,
                "estimated from the element densities (ideal mixing; rough for compounds)"
                    .to_string(),
            )
        })
    });
    PhaseInput {
        id,
        name: name.to_string(),
        composition,
        density,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::element;

    fn cu_phase(density: f64) -> PhaseInput {
        PhaseInput {
            id: 1,
            name: "copper".into(),
            composition: vec![(element("Cu").unwrap(), 1.0)],
            density: Some((density, "test".into())),
        }
    }

    /// Andersen–Hasler, Cu K in Cu at 20 keV (Ec 8.979 keV, ρ 8.96): 0.810 µm
    /// (references.md §4, computed from the formula); Kanaya–Okayama Cu at 20 keV
    /// (A 63.546, Z 29, ρ 8.96): 1.4599 µm (§3).
    #[test]
    fn ranges_of_copper_at_20_kv() {
        let cu = element("Cu").unwrap();
        let a = advise(
            &[(cu, Some("Ka".into()))],
            Some(20.0),
            Some(0.1),
            &[cu_phase(8.96)],
        );
        let p = &a.phases[0];
        assert!((p.xray_range_um[0].1 - 0.810).abs() < 0.001, "{p:?}");
        assert!((p.electron_range_um - 1.4599).abs() < 0.001);
        // 0.81 µm over 0.1 µm pixels: oversampled, bin 4.
        assert_eq!(a.suggested_bin, Some(4));
        assert!(a.messages.iter().any(|m| m.contains("oversampled")));
        assert!((a.lines[0].overvoltage - 20.0 / 8.979).abs() < 1e-9);
    }

    #[test]
    fn overvoltage_and_beam_energy_advice() {
        let cu = element("Cu").unwrap();
        let sn = element("Sn").unwrap();
        // Cu Kα at 15 kV: U = 1.67, weak; 18 kV would give U ≥ 2; its L line is an option.
        let a = advise(
            &[(cu, Some("Ka".into()))],
            Some(15.0),
            Some(1.0),
            &[cu_phase(8.96)],
        );
        assert!(
            a.messages
                .iter()
                .any(|m| m.contains("weakly excited") && m.contains("18 kV") && m.contains("Lα")),
            "{:?}",
            a.messages
        );
        // Cu Kα at 8 kV: not excited.
        let a = advise(
            &[(cu, Some("Ka".into()))],
            Some(8.0),
            Some(1.0),
            &[cu_phase(8.96)],
        );
        assert!(a.messages.iter().any(|m| m.contains("not excited")));
        // Sn Lα (L3 3.929 keV) at 25 kV: 8 kV keeps U ≥ 2, so suggest it.
        let tin = PhaseInput {
            composition: vec![(sn, 1.0)],
            ..cu_phase(7.31)
        };
        let a = advise(&[(sn, None)], Some(25.0), Some(1.0), &[tin]);
        assert_eq!(a.lowest_good_kv, Some(8.0));
        assert!(a.messages.iter().any(|m| m.contains("lower beam energy")));
        // No kV: one message saying what to give.
        let a = advise(&[(sn, None)], None, Some(1.0), &[]);
        assert!(a.messages[0].contains("--kv"));
    }

    #[test]
    fn density_estimate_by_ideal_mixing() {
        let cu = element("Cu").unwrap();
        let sn = element("Sn").unwrap();
        let d = estimated_density(&[(cu, 0.5), (sn, 0.5)]).unwrap();
        let (dcu, dsn) = (cu.density.unwrap(), sn.density.unwrap());
        assert!((d - 1.0 / (0.5 / dcu + 0.5 / dsn)).abs() < 1e-9);
        // Oxygen (a gas) is left out.
        let o = element("O").unwrap();
        assert!((estimated_density(&[(cu, 0.8), (o, 0.2)]).unwrap() - dcu).abs() < 1e-9);
    }
}
