//! Beam–specimen physics used to predict contrast: the backscatter coefficient.
//!
//! η(Z) for pure elements follows Reuter's polynomial fit (1972) to Heinrich's measurements,
//! valid at normal incidence for beam energies of about 10 keV and above, where η hardly
//! depends on the energy. A compound mixes its elements' coefficients by mass fraction
//! (Castaing's rule, 1951).

use crate::chem::Composition;

/// Backscatter coefficient of a pure element, Reuter (1972):
/// η = −0.0254 + 0.016 Z − 1.86·10⁻⁴ Z² + 8.3·10⁻⁷ Z³.
pub fn eta_element(z: f64) -> f64 {
    -0.0254 + 0.016 * z - 1.86e-4 * z * z + 8.3e-7 * z * z * z
}

/// Backscatter coefficient of a compound by the mass-fraction mixing rule, η = Σ w_i η(Z_i).
pub fn eta_compound(c: &Composition) -> f64 {
    c.mass_fractions()
        .iter()
        .map(|(e, w)| w * eta_element(f64::from(e.z)))
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::parse_formula;

    /// Values of Reuter's polynomial (Reuter 1972, the form quoted in REFERENCES.md §1),
    /// evaluated there to 4 decimals.
    #[test]
    fn reuter_polynomial_values() {
        for (z, eta) in [
            (6.0, 0.0641),
            (13.0, 0.1530),
            (14.0, 0.1644),
            (22.0, 0.2454),
            (26.0, 0.2795),
            (29.0, 0.3024),
            (47.0, 0.4019),
            (79.0, 0.4870),
        ] {
            assert!(
                (eta_element(z) - eta).abs() < 6e-5,
                "Z={z}: {}",
                eta_element(z)
            );
        }
    }

    /// Mass-fraction-mixed η of compounds, REFERENCES.md §2 table (Castaing's rule with
    /// Reuter's η and standard atomic weights, computed there).
    #[test]
    fn compound_eta_by_mass_fraction() {
        for (f, eta) in [
            ("Al2O3", 0.1239),
            ("SiO2", 0.1254),
            ("ZrSiO4", 0.2412),
            ("Cu6Sn5", 0.3700),
            ("TiO2", 0.1836),
        ] {
            let got = eta_compound(&parse_formula(f).unwrap());
            assert!((got - eta).abs() < 1.5e-4, "{f}: {got} vs {eta}");
        }
    }
}
