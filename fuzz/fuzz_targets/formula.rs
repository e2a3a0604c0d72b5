//! Fuzzes the chemical-formula parser; a parsed formula's mass fractions must sum to 1.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        if let Ok(c) = modalmap::chem::parse_formula(text) {
            let m = c.molar_mass();
            if m.is_finite() {
                let total: f64 = c.mass_fractions().iter().map(|(_, w)| w).sum();
                assert!(m > 0.0 && (total - 1.0).abs() < 1e-9, "{text}: {total}");
            }
        }
    }
});
