//! Small synthetic fields for the unit tests of the stages (synthetic ground truth: each
//! pixel's counts are Poisson draws from its phase's rates).

use rand::SeedableRng;
use rand_distr::{Distribution, Poisson};

use crate::stack::{ElementMap, FieldMetadata, MapStack};

/// A `width × height` field of Fe and Cu maps in vertical bands, one band per entry of
/// `rates` (counts per pixel of Fe, Cu), drawn with `seed`. Returns the stack and the true
/// band (0-based) of every pixel.
pub(crate) fn bands(
    width: usize,
    height: usize,
    rates: &[[f64; 2]],
    seed: u64,
) -> (MapStack, Vec<usize>) {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let truth: Vec<usize> = (0..width * height)
        .map(|i| (i % width) * rates.len() / width)
        .collect();
    let maps = ["Fe", "Cu"]
        .iter()
        .enumerate()
        .map(|(e, symbol)| ElementMap {
            element: crate::chem::element(symbol).unwrap(),
            line: None,
            counts: truth
                .iter()
                .map(|&b| Poisson::new(rates[b][e]).unwrap().sample(&mut rng) as f32)
                .collect(),
            source: format!("{symbol}.png"),
        })
        .collect();
    let stack = MapStack::new(
        std::path::Path::new("bands"),
        width,
        height,
        maps,
        FieldMetadata::default(),
    )
    .unwrap();
    (stack, truth)
}
