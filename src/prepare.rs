//! Prepare: turn a field's element maps into the feature matrix that clustering sees.
//!
//! Takes a [`MapStack`] and checked [`PrepareParams`]; returns [`Features`]: a pixel-major
//! matrix (pixels × elements, `f32`), the mask of pixels that take part, the binned counts
//! for statistics, and the [`FeatureTransform`] that made them, which can be replayed on
//! another field.
//!
//! Why these steps, in this order:
//! 1. **Binning** (`--bin N`) sums counts over N × N blocks: still Poisson, N² times the
//!    counts, 1/N the resolution.
//! 2. **Median** denoising (optional) works on counts and keeps edges.
//! 3. **Variance stabilisation**: X-ray counts are Poisson, so a pixel's noise grows with its
//!    level. The Anscombe transform A(x) = 2√(x + 3/8) (Anscombe 1948) gives every element
//!    and every level a noise variance close to 1, so distances between pixels weigh each
//!    element by its noise rather than by its range. No further scaling is applied: scaling
//!    each element to unit variance would blow up the noise of minor elements.
//! 4. **Gaussian** denoising (optional) runs in the stabilised space, where noise is even.
//! 5. **Empty pixels** (pores, holes, shadow) have next to no counts in any map; they are
//!    masked out, never made a phase. The threshold is a fraction of the field's median
//!    total count unless given.

use image::{ImageBuffer, Luma};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::stack::{ElementMap, MapStack};

/// Spatial denoising before clustering.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Denoise {
    /// No denoising.
    None,
    /// Gaussian blur of σ pixels, in the variance-stabilised space.
    Gaussian {
        /// Standard deviation, pixels.
        sigma: f64,
    },
    /// Median over a (2r + 1)² window, on counts.
    Median {
        /// Window radius, pixels.
        radius: usize,
    },
}

impl std::str::FromStr for Denoise {
    type Err = String;
    /// `none`, `gaussian:SIGMA`, `median:RADIUS`.
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        let (kind, arg) = s.split_once(':').unwrap_or((s, ""));
        match kind {
            "none" if arg.is_empty() => Ok(Denoise::None),
            "gaussian" => arg
                .parse::<f64>()
                .map(|sigma| Denoise::Gaussian { sigma })
                .map_err(|_| format!("`{s}`: write gaussian:SIGMA, e.g. gaussian:0.8")),
            "median" => arg
                .parse::<usize>()
                .map(|radius| Denoise::Median { radius })
                .map_err(|_| format!("`{s}`: write median:RADIUS, e.g. median:1")),
            _ => Err(format!(
                "`{s}` is not a denoising method; use none, gaussian:SIGMA or median:RADIUS"
            )),
        }
    }
}

/// The variance-stabilising transform.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Stabilise {
    /// Anscombe (1948): 2√(x + 3/8).
    Anscombe,
    /// Square root: √x (variance 1/4 for Poisson counts).
    Sqrt,
    /// Raw counts (not recommended: bright elements dominate).
    None,
}

impl crate::choice::Choice for Stabilise {
    const ALL: &'static [Stabilise] = &[Stabilise::Anscombe, Stabilise::Sqrt, Stabilise::None];
    fn name(self) -> &'static str {
        match self {
            Stabilise::Anscombe => "anscombe",
            Stabilise::Sqrt => "sqrt",
            Stabilise::None => "none",
        }
    }
    fn help(self) -> &'static str {
        match self {
            Stabilise::Anscombe => "Anscombe (1948): 2√(x + 3/8)",
            Stabilise::Sqrt => "Square root: √x (variance 1/4 for Poisson counts)",
            Stabilise::None => "Raw counts (not recommended: bright elements dominate)",
        }
    }
}

impl Stabilise {
    /// Applies the transform to one count.
    pub fn apply(self, x: f32) -> f32 {
        match self {
            Stabilise::Anscombe => 2.0 * (x + 0.375).sqrt(),
            // A zero count less its dequantisation offset is slightly negative.
            Stabilise::Sqrt => x.max(0.0).sqrt(),
            Stabilise::None => x,
        }
    }

    /// Inverse of [`apply`](Self::apply) (algebraic, not the unbiased inverse).
    pub fn invert(self, y: f64) -> f64 {
        match self {
            Stabilise::Anscombe => (y / 2.0).powi(2) - 0.375,
            Stabilise::Sqrt => y * y,
            Stabilise::None => y,
        }
    }

    /// Poisson noise variance in the transformed space, per unit count level (≈ constant).
    pub fn noise_variance(self) -> f64 {
        match self {
            Stabilise::Anscombe => 1.0,
            Stabilise::Sqrt => 0.25,
            Stabilise::None => f64::NAN,
        }
    }
}

/// How the threshold for empty pixels is set.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(tag = "rule", rename_all = "snake_case")]
pub enum MinCounts {
    /// This fraction of the field's median total counts per pixel.
    Relative {
        /// Fraction of the median.
        fraction: f64,
    },
    /// An absolute total count per (binned) pixel.
    Absolute {
        /// Counts.
        counts: f64,
    },
}

impl MinCounts {
    /// The default: 15 % of the median total (common practice, no source: well below any
    /// real phase's counts and well above a pore's).
    pub const DEFAULT: MinCounts = MinCounts::Relative { fraction: 0.15 };
}

/// Options of the prepare stage, as given.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PrepareParams {
    /// Bin factor (1 = none).
    pub bin: usize,
    /// Denoising.
    pub denoise: Denoise,
    /// Variance-stabilising transform.
    pub stabilise: Stabilise,
    /// Empty-pixel threshold rule.
    pub min_counts: MinCounts,
    /// Spread integer counts by a fixed pseudo-random offset in ±3/8 before the transform,
    /// so that low counts do not form a lattice of identical values that a mixture can
    /// fit with needle-thin components.
    pub dequantise: bool,
}

impl Default for PrepareParams {
    fn default() -> Self {
        PrepareParams {
            bin: 1,
            denoise: Denoise::None,
            stabilise: Stabilise::Anscombe,
            min_counts: MinCounts::DEFAULT,
            dequantise: true,
        }
    }
}

impl PrepareParams {
    /// Checks every rule; the stage only accepts the result.
    pub fn check(self) -> Result<FeatureTransform> {
        if self.bin == 0 || self.bin > 64 {
            return Err(Error::options(
                format!("--bin {} is out of range", self.bin),
                "use a bin factor from 1 (no binning) to 64",
            ));
        }
        match self.denoise {
            Denoise::Gaussian { sigma } if !(sigma > 0.0 && sigma <= 20.0) => {
                return Err(Error::options(
                    format!("gaussian denoising σ = {sigma} is out of range"),
                    "use a σ above 0 and at most 20 pixels, e.g. --denoise gaussian:0.8",
                ))
            }
            Denoise::Median { radius } if radius == 0 || radius > 10 => {
                return Err(Error::options(
                    format!("median radius {radius} is out of range"),
                    "use a radius from 1 to 10 pixels, e.g. --denoise median:1",
                ))
            }
            _ => {}
        }
        match self.min_counts {
            MinCounts::Relative { fraction } if !(0.0..1.0).contains(&fraction) => {
                return Err(Error::options(
                    format!("empty-pixel fraction {fraction} is out of range"),
                    "use a fraction of the median total from 0 to below 1",
                ))
            }
            MinCounts::Absolute { counts } if !(counts >= 0.0 && counts.is_finite()) => {
                return Err(Error::options(
                    format!("--min-counts {counts} is not a count"),
                    "give a total count per pixel of 0 or more",
                ))
            }
            _ => {}
        }
        Ok(FeatureTransform { params: self })
    }
}

/// A checked, serialisable transform: replaying it on another field gives features in the
/// same space.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(transparent)]
pub struct FeatureTransform {
    params: PrepareParams,
}

impl FeatureTransform {
    /// The parameters it was checked from.
    pub fn params(&self) -> &PrepareParams {
        &self.params
    }

    /// The same transform without binning, for counts already on the binned grid.
    pub fn unbinned(&self) -> FeatureTransform {
        FeatureTransform {
            params: PrepareParams {
                bin: 1,
                ..self.params
            },
        }
    }
}

/// What clustering sees.
#[derive(Debug, Clone)]
pub struct Features {
    /// Grid width (after binning).
    pub width: usize,
    /// Grid height (after binning).
    pub height: usize,
    /// Number of feature dimensions (= elements).
    pub dims: usize,
    /// Pixel-major features, `width × height × dims`.
    pub data: Vec<f32>,
    /// True for pixels that take part (not empty).
    pub mask: Vec<bool>,
    /// The counts on the feature grid (binned, not denoised), element-major, for statistics.
    pub counts: MapStack,
    /// The empty-pixel threshold used, total counts per pixel.
    pub min_counts_used: f64,
    /// Share of empty pixels in the whole field (clamped to 0.001..0.5).
    pub empty_fraction: f64,
    /// The transform that made these features.
    pub transform: FeatureTransform,
}

/// Where a window of rows sits in a field too big to prepare whole (a strip of a
/// montage): everything that depends on the whole field, computed beforehand.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WindowContext {
    /// Index on the binned grid of the window's first pixel (its first row × the width).
    pub first_pixel: usize,
    /// The whole field's empty-pixel threshold.
    pub min_counts_used: f64,
    /// The whole field's share of empty pixels.
    pub empty_fraction: f64,
}

impl Features {
    /// Number of pixels on the grid.
    pub fn pixels(&self) -> usize {
        self.width * self.height
    }

    /// The feature row of pixel `i`.
    pub fn row(&self, i: usize) -> &[f32] {
        &self.data[i * self.dims..(i + 1) * self.dims]
    }
}

/// Sums counts over `bin × bin` blocks; a remainder at the right or bottom edge is dropped.
pub fn bin_stack(stack: MapStack, bin: usize) -> Result<MapStack> {
    if bin == 1 {
        return Ok(stack);
    }
    let (w, h) = (stack.width() / bin, stack.height() / bin);
    if w == 0 || h == 0 {
        return Err(Error::options(
            format!(
                "--bin {bin} leaves no pixels of a {}×{} field",
                stack.width(),
                stack.height()
            ),
            "use a smaller bin factor",
        ));
    }
    let sw = stack.width();
    let maps = stack
        .maps()
        .iter()
        .map(|m| {
            let mut out = vec![0.0f32; w * h];
            for (y, row) in out.chunks_mut(w).enumerate() {
                for (x, v) in row.iter_mut().enumerate() {
                    let mut s = 0.0f32;
                    for dy in 0..bin {
                        let base = (y * bin + dy) * sw + x * bin;
                        s += m.counts[base..base + bin].iter().sum::<f32>();
                    }
                    *v = s;
                }
            }
            ElementMap {
                counts: out,
                ..m.clone()
            }
        })
        .collect();
    let mut md = stack.metadata().clone();
    md.pixel_size_um = md.pixel_size_um.map(|p| p * bin as f64);
    md.tile_width_px = md.tile_width_px.map(|t| t / bin as f64);
    md.tile_height_px = md.tile_height_px.map(|t| t / bin as f64);
    MapStack::new(std::path::Path::new("binned field"), w, h, maps, md)
}

fn median_filter(data: &[f32], w: usize, h: usize, r: usize) -> Vec<f32> {
    (0..w * h)
        .into_par_iter()
        .map_init(Vec::new, |win, i| {
            let (x, y) = (i % w, i / w);
            win.clear();
            for yy in y.saturating_sub(r)..=(y + r).min(h - 1) {
                win.extend_from_slice(
                    &data[yy * w + x.saturating_sub(r)..=yy * w + (x + r).min(w - 1)],
                );
            }
            let mid = win.len() / 2;
            *win.select_nth_unstable_by(mid, f32::total_cmp).1
        })
        .collect()
}

fn gaussian(data: Vec<f32>, w: usize, h: usize, sigma: f64) -> Vec<f32> {
    let img: ImageBuffer<Luma<f32>, Vec<f32>> =
        ImageBuffer::from_raw(w as u32, h as u32, data).expect("buffer matches its size");
    imageproc::filter::gaussian_blur_f32(&img, sigma as f32).into_raw()
}

/// A fixed offset in [−3/8, 3/8) for dequantising counts: a SplitMix64 hash of the pixel's
/// key (Steele, Lea & Flood 2014), so the same pixel always gets the same offset whatever
/// the thread count.
fn jitter(key: u64) -> f32 {
    let mut z = key.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^= z >> 31;
    ((z >> 40) as f32 / (1u64 << 24) as f32 - 0.5) * 0.75
}

/// The median of the per-pixel total counts.
pub fn median_total(totals: &[f32]) -> f64 {
    let mut t = totals.to_vec();
    let mid = t.len() / 2;
    f64::from(*t.select_nth_unstable_by(mid, f32::total_cmp).1)
}

/// Runs the prepare stage.
pub fn prepare(stack: MapStack, transform: &FeatureTransform) -> Result<Features> {
    prepare_window(stack, transform, None)
}

/// The share of empty pixels as the refine stage uses it.
pub fn empty_share(empty: usize, n: usize) -> f64 {
    (empty as f64 / n.max(1) as f64).clamp(1e-3, 0.5)
}

/// Runs the prepare stage on a whole field, or with `window` on a window of rows of a
/// bigger one: the threshold and empty share are then the whole field's, and the
/// dequantisation offsets those of the pixels' places in the whole field, so a window
/// gives exactly the features of the same pixels prepared whole.
pub fn prepare_window(
    stack: MapStack,
    transform: &FeatureTransform,
    window: Option<&WindowContext>,
) -> Result<Features> {
    let p = transform.params;
    let counts = bin_stack(stack, p.bin)?;
    let (w, h) = (counts.width(), counts.height());
    let n = w * h;
    let dims = counts.maps().len();

    let mut totals = vec![0.0f32; n];
    for m in counts.maps() {
        for (t, &c) in totals.iter_mut().zip(&m.counts) {
            *t += c;
        }
    }
    let min_counts_used = match (window, p.min_counts) {
        (Some(wc), _) => wc.min_counts_used,
        (None, MinCounts::Relative { fraction }) => fraction * median_total(&totals),
        (None, MinCounts::Absolute { counts }) => counts,
    };
    let mask: Vec<bool> = totals
        .iter()
        .map(|&t| f64::from(t) >= min_counts_used && t > 0.0)
        .collect();
    let empty_fraction = match window {
        Some(wc) => wc.empty_fraction,
        None => empty_share(mask.iter().filter(|m| !**m).count(), n),
    };
    let first_pixel = window.map_or(0, |wc| wc.first_pixel);

    let mut data = vec![0.0f32; n * dims];
    // The feature of pixel `i` with counts `x` of element `z`.
    let transform_one = |z: u32, i: usize, x: f32| {
        if p.dequantise {
            let salt = u64::from(z) << 40;
            p.stabilise
                .apply(x + jitter(salt | (first_pixel + i) as u64))
        } else {
            p.stabilise.apply(x)
        }
    };
    if p.denoise == Denoise::None {
        // Row by row, every element at once: one pass over the matrix.
        let maps = counts.maps();
        data.par_chunks_mut(dims * 4096)
            .enumerate()
            .for_each(|(b, block)| {
                for (r, row) in block.chunks_exact_mut(dims).enumerate() {
                    let i = b * 4096 + r;
                    for (v, m) in row.iter_mut().zip(maps) {
                        *v = transform_one(m.element.z, i, m.counts[i]);
                    }
                }
            });
    }
    // Denoised: plane by plane into the pixel-major matrix, so only one filtered plane is
    // held at a time beside the counts and the matrix.
    for (e, m) in counts.maps().iter().enumerate() {
        let transform_one = |i: usize, x: f32| transform_one(m.element.z, i, x);
        let plane: Vec<f32> = match p.denoise {
            // Filled above, in one pass.
            Denoise::None => break,
            Denoise::Median { radius } => {
                let c = median_filter(&m.counts, w, h, radius);
                c.par_iter()
                    .enumerate()
                    .map(|(i, &x)| transform_one(i, x))
                    .collect()
            }
            Denoise::Gaussian { sigma } => {
                let v: Vec<f32> = m
                    .counts
                    .par_iter()
                    .enumerate()
                    .map(|(i, &x)| transform_one(i, x))
                    .collect();
                gaussian(v, w, h, sigma)
            }
        };
        data.par_chunks_mut(dims)
            .zip(plane.par_iter())
            .for_each(|(row, &v)| row[e] = v);
    }
    Ok(Features {
        width: w,
        height: h,
        dims,
        data,
        mask,
        counts,
        min_counts_used,
        empty_fraction,
        transform: *transform,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::element;
    use crate::stack::FieldMetadata;
    use std::path::Path;

    fn stack(w: usize, h: usize, f: impl Fn(usize, usize) -> f32) -> MapStack {
        let counts = (0..w * h).map(|i| f(i % w, i / w)).collect();
        let m = ElementMap {
            element: element("Fe").unwrap(),
            line: None,
            counts,
            source: "Fe".into(),
        };
        let md = FieldMetadata {
            pixel_size_um: Some(0.5),
            ..Default::default()
        };
        MapStack::new(Path::new("t"), w, h, vec![m], md).unwrap()
    }

    /// Anscombe (1948) values computed from A(x) = 2√(x + 3/8) (references.md §10).
    #[test]
    fn anscombe_values() {
        for (x, a) in [
            (0.0, 1.2247),
            (1.0, 2.3452),
            (4.0, 4.1833),
            (10.0, 6.4420),
            (100.0, 20.0375),
        ] {
            assert!((Stabilise::Anscombe.apply(x) - a).abs() < 1e-4, "{x}");
            assert!((Stabilise::Anscombe.invert(f64::from(a)) - f64::from(x)).abs() < 1e-3);
        }
    }

    /// Zero counts (a minor element in a major phase) shifted by the dequantisation offset
    /// of up to −3/8 still give finite features, with every transform, denoised or not.
    #[test]
    fn features_are_finite_for_zero_counts() {
        let s = stack(16, 16, |x, y| if (x + y) % 3 == 0 { 0.0 } else { 20.0 });
        for stabilise in [Stabilise::Anscombe, Stabilise::Sqrt, Stabilise::None] {
            for denoise in [Denoise::None, Denoise::Gaussian { sigma: 1.0 }] {
                let t = PrepareParams {
                    stabilise,
                    denoise,
                    dequantise: true,
                    min_counts: MinCounts::Absolute { counts: 0.0 },
                    ..PrepareParams::default()
                }
                .check()
                .unwrap();
                let f = prepare(s.clone(), &t).unwrap();
                assert!(
                    f.data.iter().all(|v| v.is_finite()),
                    "{stabilise:?} {denoise:?}"
                );
            }
        }
    }

    #[test]
    fn binning_sums_counts_and_scales_pixel_size() {
        let s = stack(5, 4, |x, y| (x + 10 * y) as f32);
        let b = bin_stack(s.clone(), 2).unwrap();
        assert_eq!((b.width(), b.height()), (2, 2), "remainder column dropped");
        // Block (0,0): 0 + 1 + 10 + 11.
        assert_eq!(b.maps()[0].counts, vec![22.0, 30.0, 102.0, 110.0]);
        assert_eq!(b.metadata().pixel_size_um, Some(1.0));
    }

    #[test]
    fn empty_pixels_are_masked_by_the_relative_rule() {
        // Median total is 40; 15 % of it is 6: the 3-count pixel is empty, the 7 is not.
        let s = stack(4, 1, |x, _| [40.0, 3.0, 7.0, 50.0][x]);
        let t = PrepareParams::default().check().unwrap();
        let f = prepare(s, &t).unwrap();
        assert_eq!(f.mask, vec![true, false, true, true]);
        assert!((f.min_counts_used - 0.15 * 40.0).abs() < 1e-9);
    }

    #[test]
    fn median_keeps_edges_and_removes_spikes() {
        let s = stack(9, 9, |x, y| {
            if (x, y) == (4, 4) {
                100.0
            } else if x < 4 {
                10.0
            } else {
                30.0
            }
        });
        let out = median_filter(&s.maps()[0].counts, 9, 9, 1);
        assert_eq!(out[4 * 9 + 4], 30.0, "spike removed");
        assert_eq!(out[2 * 9 + 3], 10.0, "edge kept");
        assert_eq!(out[2 * 9 + 4], 30.0, "edge kept");
    }

    #[test]
    fn every_bad_parameter_is_refused() {
        let base = PrepareParams::default();
        let bad = [
            PrepareParams { bin: 0, ..base },
            PrepareParams { bin: 65, ..base },
            PrepareParams {
                denoise: Denoise::Gaussian { sigma: 0.0 },
                ..base
            },
            PrepareParams {
                denoise: Denoise::Gaussian { sigma: f64::NAN },
                ..base
            },
            PrepareParams {
                denoise: Denoise::Median { radius: 0 },
                ..base
            },
            PrepareParams {
                min_counts: MinCounts::Relative { fraction: 1.5 },
                ..base
            },
            PrepareParams {
                min_counts: MinCounts::Absolute { counts: -1.0 },
                ..base
            },
        ];
        for p in bad {
            let e = p.check().unwrap_err();
            assert_eq!(e.kind, crate::ErrorKind::Options, "{p:?}");
        }
        assert!("gaussian:x".parse::<Denoise>().is_err());
        assert_eq!(
            "median:2".parse::<Denoise>(),
            Ok(Denoise::Median { radius: 2 })
        );
        assert_eq!("none".parse::<Denoise>(), Ok(Denoise::None));
    }
}
