//! Chemistry: element data, chemical formulas, mass and atom fractions, X-ray lines, and
//! compositions from counts (k-factors, calibration, oxygen by stoichiometry).
//!
//! Takes element symbols and formula strings; returns element data and compositions.
//! Everything here is a fact about matter, not about images, so the pipeline stages and the
//! synthetic-field generator share it.

pub mod elements;
pub mod formula;
pub mod quant;
pub mod xray;

pub use elements::{element, is_element_symbol, ElementInfo};
pub use formula::{parse_formula, Composition};
