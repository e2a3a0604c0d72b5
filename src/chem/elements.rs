//! Element data: symbol, atomic number, standard atomic weight, density.
//!
//! The values come from the `mendeleev` crate (standard atomic weights as published by
//! CIAAW/IUPAC; interval elements such as H, C, O use the conventional value). The crate
//! predates the 2021 and 2024 revisions for a few elements (Al 26.9815385 vs 26.9815384,
//! Zr 91.224 vs 91.222): differences below 3 parts in 10^5, far below anything an EDS map
//! resolves. The tests compare a table of CIAAW values against this module.

use mendeleev::Element;

/// What the pipeline needs to know about one chemical element.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ElementInfo {
    /// Case-sensitive symbol, e.g. `Se` (selenium); `SE` is not an element.
    pub symbol: &'static str,
    /// Atomic number Z.
    pub z: u32,
    /// Standard atomic weight, g/mol (conventional value for interval elements).
    pub atomic_weight: f64,
    /// Density of the element in its usual solid form, g/cm3, if known.
    pub density: Option<f64>,
}

/// Looks up an element by its exact, case-sensitive symbol.
///
/// Only elements up to uranium (Z ≤ 92) are accepted: nothing heavier is mapped by EDS in a
/// materials laboratory, and refusing them keeps file names such as `Np.png` from turning
/// into a map by accident.
pub fn element(symbol: &str) -> Option<ElementInfo> {
    Element::iter()
        .find(|e| e.symbol() == symbol)
        .filter(|e| e.atomic_number() <= 92)
        .map(|e| ElementInfo {
            symbol: e.symbol(),
            z: e.atomic_number(),
            atomic_weight: f64::from(e.atomic_weight()),
            density: e.density().map(|d| d.0),
        })
}

/// True if `symbol` is exactly an element symbol (case-sensitive).
pub fn is_element_symbol(symbol: &str) -> bool {
    element(symbol).is_some()
}

/// Looks up an element by atomic number.
pub fn element_by_z(z: u32) -> Option<ElementInfo> {
    Element::iter()
        .find(|e| e.atomic_number() == z)
        .and_then(|e| element(e.symbol()))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Standard atomic weights: CIAAW/IUPAC, "Standard atomic weights of the elements 2021",
    /// Pure Appl. Chem. 94 (2022) 573-600, conventional values for interval elements; Zr from
    /// the 2024 revision. The tolerance (0.003 g/mol) covers the crate's older values for Al,
    /// Mn, Zr and Au (see the module docs).
    #[test]
    fn atomic_weights_match_ciaaw() {
        let table = [
            ("H", 1, 1.008),
            ("C", 6, 12.011),
            ("N", 7, 14.007),
            ("O", 8, 15.999),
            ("Na", 11, 22.98976928),
            ("Mg", 12, 24.305),
            ("Al", 13, 26.9815384),
            ("Si", 14, 28.085),
            ("P", 15, 30.973761998),
            ("S", 16, 32.06),
            ("K", 19, 39.0983),
            ("Ca", 20, 40.078),
            ("Ti", 22, 47.867),
            ("Cr", 24, 51.9961),
            ("Mn", 25, 54.938043),
            ("Fe", 26, 55.845),
            ("Ni", 28, 58.6934),
            ("Cu", 29, 63.546),
            ("Zn", 30, 65.38),
            ("Zr", 40, 91.222),
            ("Ag", 47, 107.8682),
            ("Sn", 50, 118.710),
            ("Au", 79, 196.966570),
            ("Pb", 82, 207.2),
        ];
        for (sym, z, w) in table {
            let e = element(sym).unwrap_or_else(|| panic!("{sym} missing"));
            assert_eq!(e.z, z, "{sym}");
            assert!(
                (e.atomic_weight - w).abs() < 0.003,
                "{sym}: {} vs CIAAW {w}",
                e.atomic_weight
            );
        }
    }

    /// Densities, g/cm3 at 20 °C: X-ray Data Booklet Table 5-2 (from the CRC Handbook, 80th
    /// ed.) for Al, Si, Fe, Ni, Cu; the crate's values may differ in the third figure, so the
    /// check is at 2 %.
    #[test]
    fn densities_match_handbook() {
        for (sym, rho) in [
            ("Al", 2.6989),
            ("Si", 2.3325),
            ("Fe", 7.874),
            ("Ni", 8.90),
            ("Cu", 8.96),
        ] {
            let d = element(sym).unwrap().density.unwrap();
            assert!((d - rho).abs() / rho < 0.02, "{sym}: {d} vs {rho}");
        }
    }

    #[test]
    fn symbols_are_case_sensitive() {
        assert!(is_element_symbol("Se"));
        assert!(!is_element_symbol("SE"));
        assert!(!is_element_symbol("BSE"));
        assert!(!is_element_symbol("bse"));
        assert!(!is_element_symbol("fe"));
        assert!(!is_element_symbol(""));
        assert!(is_element_symbol("U"));
        assert!(!is_element_symbol("Np"), "transuranics are refused");
        assert_eq!(element_by_z(26).unwrap().symbol, "Fe");
    }
}
