//! X-ray lines and absorption edges: which line a map was built from, its energy, and the
//! critical excitation energy (the edge) the beam must exceed to produce it.
//!
//! The table (`data/xray-lines.csv`) holds, for Be to U, the K, L3 and M5 edges of the
//! X-ray Data Booklet (LBNL, Table 1-1) and the Kα1, Lα1 and Mα1 line energies of its
//! Table 1-2 (Bearden 1967). The tests check every value against the independent tables
//! of the xraydb package (Elam, Ravel & Sieber 2002).

use std::sync::OnceLock;

use super::ElementInfo;

/// A family of characteristic lines, named by the shell the vacancy is in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Family {
    /// K lines (edge K).
    K,
    /// L lines (the strong Lα from the L3 edge).
    L,
    /// M lines (the strong Mα from the M5 edge).
    M,
}

impl Family {
    /// The family's name as analysts write it.
    pub fn name(self) -> &'static str {
        match self {
            Family::K => "K",
            Family::L => "L",
            Family::M => "M",
        }
    }

    /// The principal line of the family, e.g. `Kα`.
    pub fn principal(self) -> &'static str {
        match self {
            Family::K => "Kα",
            Family::L => "Lα",
            Family::M => "Mα",
        }
    }
}

/// One line of one element.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct XrayLine {
    /// The line family.
    pub family: Family,
    /// Energy of the principal line (Kα1, Lα1 or Mα1), keV.
    pub energy_kev: f64,
    /// Critical excitation energy: the K, L3 or M5 absorption edge, keV.
    pub edge_kev: f64,
}

impl XrayLine {
    /// Overvoltage ratio U = E0 / Ec at beam energy `kv`.
    pub fn overvoltage(&self, kv: f64) -> f64 {
        kv / self.edge_kev
    }
}

/// One row of the table: edges and lines in eV, `NaN` where not tabulated.
#[derive(Debug, Clone, Copy)]
struct Row {
    z: u32,
    edges: [f64; 3],
    lines: [f64; 3],
}

const TABLE: &str = include_str!("../../data/xray-lines.csv");

fn table() -> &'static [Row] {
    static ROWS: OnceLock<Vec<Row>> = OnceLock::new();
    ROWS.get_or_init(|| {
        TABLE
            .lines()
            .filter(|l| !l.starts_with('#') && !l.starts_with('z'))
            .map(|l| {
                let f: Vec<&str> = l.split(',').collect();
                let num = |i: usize| f[i].parse::<f64>().unwrap_or(f64::NAN);
                Row {
                    z: f[0].parse().expect("data/xray-lines.csv: atomic number"),
                    edges: [num(2), num(3), num(4)],
                    lines: [num(5), num(6), num(7)],
                }
            })
            .collect()
    })
}

/// The tabulated line of `family` for element number `z`, if any.
pub fn line(z: u32, family: Family) -> Option<XrayLine> {
    let row = table().iter().find(|r| r.z == z)?;
    let i = family as usize;
    let (edge, energy) = (row.edges[i], row.lines[i]);
    (edge.is_finite() && energy.is_finite()).then(|| XrayLine {
        family,
        energy_kev: energy / 1000.0,
        edge_kev: edge / 1000.0,
    })
}

/// The family a line designation such as `Ka`, `Kα1`, `L`, `La1`, `Mα` belongs to.
pub fn family_of(designation: &str) -> Option<Family> {
    match designation.chars().next()? {
        'K' => Some(Family::K),
        'L' => Some(Family::L),
        'M' => Some(Family::M),
        _ => None,
    }
}

/// Overvoltage at and above which a line is well excited (common practice, no source:
/// microanalysis texts advise U ≥ 2 for useful intensity).
pub const GOOD_OVERVOLTAGE: f64 = 2.0;

/// The line a map of `element` was most likely built from: the family named by
/// `designation` when there is one, else the highest-energy family (K, then L, then M)
/// that the beam excites with an overvoltage of at least [`GOOD_OVERVOLTAGE`], else the
/// family with the highest overvoltage (common practice, no source).
pub fn map_line(element: &ElementInfo, designation: Option<&str>, kv: f64) -> Option<XrayLine> {
    if let Some(f) = designation.and_then(family_of) {
        return line(element.z, f);
    }
    let all: Vec<XrayLine> = [Family::K, Family::L, Family::M]
        .into_iter()
        .filter_map(|f| line(element.z, f))
        .collect();
    all.iter()
        .find(|l| l.overvoltage(kv) >= GOOD_OVERVOLTAGE)
        .or_else(|| {
            all.iter()
                .max_by(|a, b| a.overvoltage(kv).total_cmp(&b.overvoltage(kv)))
        })
        .copied()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::element;

    /// X-ray Data Booklet Tables 1-1 and 1-2 (references.md §4): Cu K edge 8979 eV,
    /// Kα1 8047.78 eV; Cu L3 932.7 eV; Sn L3 3929 eV, Lα1 3443.98 eV.
    #[test]
    fn booklet_values() {
        let close = |a: f64, b: f64| (a - b).abs() < 1e-9;
        let cu = line(29, Family::K).unwrap();
        assert!(close(cu.edge_kev, 8.979) && close(cu.energy_kev, 8.04778));
        assert!(close(line(29, Family::L).unwrap().edge_kev, 0.9327));
        let sn = line(50, Family::L).unwrap();
        assert!(close(sn.edge_kev, 3.929) && close(sn.energy_kev, 3.44398));
        assert!(line(8, Family::L).is_none());
        assert!(line(29, Family::M).is_none());
    }

    #[test]
    fn the_line_a_map_was_built_from() {
        let cu = element("Cu").unwrap();
        // Named on the map: L even at 20 kV.
        assert_eq!(map_line(&cu, Some("La"), 20.0).unwrap().family, Family::L);
        // Unnamed: K at 20 kV (U = 2.2), L at 10 kV (K would be unexcited).
        assert_eq!(map_line(&cu, None, 20.0).unwrap().family, Family::K);
        assert_eq!(map_line(&cu, None, 10.0).unwrap().family, Family::L);
        // Gold at 20 kV: L3 11.9 keV gives U 1.7, so Mα (M5 2.2 keV).
        let au = element("Au").unwrap();
        assert_eq!(map_line(&au, None, 20.0).unwrap().family, Family::M);
        assert_eq!(family_of("Kα1"), Some(Family::K));
        assert_eq!(family_of("x"), None);
    }
}
