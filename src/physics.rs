//! Beam–specimen physics: the backscatter coefficient (to predict BSE contrast) and the
//! electron and X-ray ranges (to judge spatial resolution).
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

/// Electron range in µm, Kanaya & Okayama (1972): R = 0.0276 A E0^1.67 / (Z^0.889 ρ), with
/// A in g/mol, E0 in keV, ρ in g/cm³ (valid above about 10 keV). For a compound use
/// mass-fraction-averaged A and Z.
pub fn kanaya_okayama_um(a: f64, z: f64, rho: f64, e0_kev: f64) -> f64 {
    0.0276 * a * e0_kev.powf(1.67) / (z.powf(0.889) * rho)
}

/// X-ray generation range in µm, Andersen & Hasler (1966): R = 0.064 (E0^1.68 − Ec^1.68) / ρ,
/// with Ec the critical excitation (edge) energy of the line, keV, and ρ in g/cm³. Zero
/// when the beam cannot excite the line (E0 ≤ Ec).
pub fn andersen_hasler_um(e0_kev: f64, ec_kev: f64, rho: f64) -> f64 {
    if e0_kev <= ec_kev {
        return 0.0;
    }
    0.064 * (e0_kev.powf(1.68) - ec_kev.powf(1.68)) / rho
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::parse_formula;

    /// Values of Reuter's polynomial (Reuter 1972, the form quoted in references.md §1),
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

    /// Mass-fraction-mixed η of compounds, references.md §2 table (Castaing's rule with
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

    /// Kanaya–Okayama ranges computed from the published formula with the exponents 1.67
    /// and 0.889 (references.md §3, computed there; A: standard atomic weights; ρ: C 2.26,
    /// Al 2.70, Cu 8.96, Au 19.30 as pinned there).
    #[test]
    fn kanaya_okayama_check_values() {
        let cases = [
            (12.011, 6.0, 2.26, [1.3951, 4.4394, 8.7377]),
            (26.9815384, 13.0, 2.70, [1.3192, 4.1979, 8.2625]),
            (63.546, 29.0, 8.96, [0.4588, 1.4599, 2.8735]),
            (196.966570, 79.0, 19.30, [0.2709, 0.8619, 1.6965]),
        ];
        for (a, z, rho, want) in cases {
            for (e0, r) in [10.0, 20.0, 30.0].into_iter().zip(want) {
                let got = kanaya_okayama_um(a, z, rho, e0);
                assert!((got - r).abs() < 5e-4, "Z={z} E0={e0}: {got} vs {r}");
            }
        }
    }

    /// Andersen–Hasler X-ray ranges (references.md §4, computed there with edge energies of
    /// the X-ray Data Booklet): Cu K in Cu at 20 and 30 keV, Al K in Al at 15 and 20 keV,
    /// Fe K in Fe at 20 keV, Si K in Si at 15 keV, Cu L3 in Cu at 10 keV.
    #[test]
    fn andersen_hasler_check_values() {
        for (e0, ec, rho, want) in [
            (20.0, 8.979, 8.96, 0.810),
            (30.0, 8.979, 8.96, 1.880),
            (15.0, 1.5596, 2.70, 2.192),
            (20.0, 1.5596, 2.70, 3.585),
            (20.0, 7.112, 7.874, 1.027),
            (15.0, 1.839, 2.33, 2.522),
            (10.0, 0.9327, 8.96, 0.3355),
        ] {
            let got = andersen_hasler_um(e0, ec, rho);
            assert!(
                (got - want).abs() < 1.5e-3,
                "E0={e0} Ec={ec}: {got} vs {want}"
            );
        }
        assert_eq!(
            andersen_hasler_um(5.0, 8.979, 8.96),
            0.0,
            "below the edge nothing is excited"
        );
    }
}
