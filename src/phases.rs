//! Phase statistics: what a materials report needs of each phase.
//!
//! Takes the [`Segmentation`] and the counts on the feature grid; returns a [`PhaseTable`]
//! with phases ordered by decreasing area (ties by model order), and the relabelled image.
//!
//! **Area fraction and its confidence interval.** The area fraction is the phase's share
//! of all pixels of the field (unassigned pixels included, so fractions and the unassigned
//! fraction add up to 1). Its uncertainty comes from tile-to-tile variation: the field is
//! cut into a grid of equal tiles, each tile's fraction is one observation, and the 95 %
//! interval is p ± t₀.₉₇₅,ₙ₋₁ · s / √n — the field-to-field statistic of quantitative
//! metallography (ASTM E562 and E1245) applied to sub-fields. It measures how uniform the
//! field is, not the counting noise of the pixels; for a statement about the material, pool
//! several fields (`merge`).

use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, StudentsT};

use crate::chem::quant::{
    quantify, BackgroundRule, KFactors, Oxygen, PhaseComposition, PhaseCounts, Rules,
};
use crate::chem::ElementInfo;
use crate::labels::boundary_distance;
use crate::refine::Segmentation;
use crate::stack::MapStack;

/// Statistics of one phase.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Phase {
    /// Phase id in the outputs (1 = largest).
    pub id: u16,
    /// Name from its dominant elements (until a reference library names it).
    pub name: String,
    /// Index of the phase in the fitted model.
    pub model_index: usize,
    /// Pixels of the phase.
    pub pixels: usize,
    /// Share of all field pixels, 0..1.
    pub area_fraction: f64,
    /// 95 % confidence interval of the area fraction from tile-to-tile variation; `None`
    /// when the field is too small to cut into two tiles (see [`tiling`]).
    pub area_fraction_ci95: Option<[f64; 2]>,
    /// Mean raw counts per pixel, per element (in element order).
    pub mean: Vec<f64>,
    /// Standard deviation of raw counts per pixel, per element.
    pub sd: Vec<f64>,
    /// Composition over the table's `composition_elements`: at first the apparent one
    /// (mean counts normalised, every k-factor 1); the composition stage
    /// (`pipeline::characterise`) replaces it.
    pub composition: PhaseComposition,
    /// Pixels the composition was summed over.
    pub composition_pixels: usize,
    /// False when no pixel of the phase lies clear of its neighbours, so its composition
    /// comes from all its pixels and is mixed with theirs.
    pub composition_from_interior: bool,
    /// True when the phase has no interior pixels and its composition was unmixed from its
    /// neighbours' (linear mixing with the beam's spread, [`crate::unmix`]).
    pub composition_unmixed: bool,
    /// The closest reference phase, once matched.
    pub reference: Option<crate::library::Match>,
    /// Number of separate features (8-connected regions).
    pub features: usize,
    /// Mean equivalent-circle diameter of the features, pixels.
    pub mean_ecd_px: f64,
    /// Largest feature, pixels.
    pub largest_px: usize,
    /// Mean posterior probability of the label over the phase's pixels.
    pub mean_confidence: f64,
}

/// The table of phases.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseTable {
    /// Element symbols, in the column order of `mean` and `sd`.
    pub elements: Vec<String>,
    /// Element symbols of the compositions (the mapped ones, plus oxygen when it is
    /// computed by stoichiometry).
    pub composition_elements: Vec<String>,
    /// How the compositions were obtained.
    pub composition_method: String,
    /// Phases by decreasing area.
    pub phases: Vec<Phase>,
    /// Share of unassigned pixels.
    pub unassigned_fraction: f64,
    /// Tiles across and down used for the confidence intervals.
    pub tiles: [usize; 2],
    /// Two-sided 95 % Student t quantile used (n − 1 degrees of freedom).
    pub t_quantile: f64,
}

/// The composition method before the composition stage runs.
pub const APPARENT: &str =
    "apparent: counts of all the phase's pixels normalised to 100 %, every k-factor 1, no background subtracted (uncalibrated)";

/// Number of tiles across and down: 5 × 5 when every tile keeps at least 10 × 10 pixels,
/// fewer for small fields (common practice, no source).
pub fn tiling(w: usize, h: usize) -> [usize; 2] {
    let t = |n: usize| (n / 10).clamp(1, 5);
    [t(w), t(h)]
}

/// Mean, sample SD and 95 % half-width (Student t) of `values`.
pub fn mean_ci(values: &[f64]) -> (f64, f64, f64, f64) {
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    if values.len() < 2 {
        return (mean, 0.0, f64::NAN, f64::NAN);
    }
    let s = (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let t = StudentsT::new(0.0, 1.0, n - 1.0).map_or(f64::NAN, |d| d.inverse_cdf(0.975));
    (mean, s, t * s / n.sqrt(), t)
}

/// A phase's name from its major elements: "El-rich" over 75 %, else up to three
/// elements of 15 % or more, largest first.
pub fn name_of(elements: &[String], comp: &[f64]) -> String {
    let mut order: Vec<usize> = (0..comp.len()).collect();
    order.sort_by(|&a, &b| comp[b].total_cmp(&comp[a]).then(a.cmp(&b)));
    if comp.is_empty() || comp[order[0]] <= 0.0 {
        return "no counts".into();
    }
    if comp[order[0]] >= 75.0 {
        return format!("{}-rich", elements[order[0]]);
    }
    let major: Vec<&str> = order
        .iter()
        .take(3)
        .filter(|&&i| comp[i] >= 15.0)
        .map(|&i| elements[i].as_str())
        .collect();
    major.join("–")
}

/// Computes the table and renumbers the labels (1 = largest phase; 0 stays unassigned).
pub fn phase_table(seg: &mut Segmentation, counts: &MapStack, k: usize) -> PhaseTable {
    phase_table_in_order(seg, counts, k, None)
}

/// As [`phase_table`], but with `fixed` (model indices in id order, as a saved model
/// numbers its phases) every phase keeps its id, including those with no pixel in this
/// field (area 0), so that fields labelled with one model can be pooled phase by phase.
pub fn phase_table_in_order(
    seg: &mut Segmentation,
    counts: &MapStack,
    k: usize,
    fixed: Option<&[usize]>,
) -> PhaseTable {
    let planes: Vec<&[f32]> = counts.maps().iter().map(|m| m.counts.as_slice()).collect();
    let sums = PhaseSums::accumulate(&seg.labels, &seg.confidence, &planes, k);
    let infos: Vec<ElementInfo> = counts.maps().iter().map(|m| m.element).collect();
    table_from_sums(sums, seg, &infos, fixed)
}

/// Per-phase sums of counts over pixels, which add up over the strips of a field too big
/// to hold whole. Labels are model labels (1..=k, 0 unassigned).
#[derive(Debug, Clone, PartialEq)]
pub struct PhaseSums {
    k: usize,
    d: usize,
    pixels: Vec<usize>,
    sum: Vec<f64>,
    sum2: Vec<f64>,
    conf: Vec<f64>,
}

impl PhaseSums {
    /// No pixel yet.
    pub fn new(k: usize, d: usize) -> PhaseSums {
        PhaseSums {
            k,
            d,
            pixels: vec![0; k],
            sum: vec![0.0; k * d],
            sum2: vec![0.0; k * d],
            conf: vec![0.0; k],
        }
    }

    /// Adds another set of sums.
    pub fn add(&mut self, b: &PhaseSums) {
        self.pixels
            .iter_mut()
            .zip(&b.pixels)
            .for_each(|(x, y)| *x += y);
        self.sum.iter_mut().zip(&b.sum).for_each(|(x, y)| *x += y);
        self.sum2.iter_mut().zip(&b.sum2).for_each(|(x, y)| *x += y);
        self.conf.iter_mut().zip(&b.conf).for_each(|(x, y)| *x += y);
    }

    /// Sums over `labels` with their posteriors and the count planes (one per element),
    /// over fixed chunks of pixels added in chunk order (deterministic).
    pub fn accumulate(labels: &[u16], confidence: &[f32], planes: &[&[f32]], k: usize) -> Self {
        let n = labels.len();
        let d = planes.len();
        const CHUNK: usize = 1 << 16;
        (0..n.div_ceil(CHUNK))
            .into_par_iter()
            .map(|chunk| {
                let mut a = PhaseSums::new(k, d);
                for i in chunk * CHUNK..((chunk + 1) * CHUNK).min(n) {
                    let l = labels[i];
                    if l == 0 {
                        continue;
                    }
                    let c = l as usize - 1;
                    a.pixels[c] += 1;
                    a.conf[c] += f64::from(confidence[i]);
                    for (e, p) in planes.iter().enumerate() {
                        let v = f64::from(p[i]);
                        a.sum[c * d + e] += v;
                        a.sum2[c * d + e] += v * v;
                    }
                }
                a
            })
            .collect::<Vec<_>>()
            .into_iter()
            .fold(PhaseSums::new(k, d), |mut a, b| {
                a.add(&b);
                a
            })
    }
}

/// Builds the table from the sums and renumbers `seg`'s labels (see
/// [`phase_table_in_order`]); `elements` are the mapped elements.
pub fn table_from_sums(
    sums: PhaseSums,
    seg: &mut Segmentation,
    elements: &[ElementInfo],
    fixed: Option<&[usize]>,
) -> PhaseTable {
    let (w, h) = (seg.width, seg.height);
    let n = w * h;
    let PhaseSums {
        k,
        d,
        pixels,
        sum,
        sum2,
        conf,
    } = sums;
    let infos = elements;
    let elements: Vec<String> = infos.iter().map(|e| e.symbol.to_string()).collect();
    let order: Vec<usize> = match fixed {
        Some(f) => f.to_vec(),
        None => {
            let mut order: Vec<usize> = (0..k).filter(|&c| pixels[c] > 0).collect();
            order.sort_by(|&a, &b| pixels[b].cmp(&pixels[a]).then(a.cmp(&b)));
            order
        }
    };
    let mut new_id = vec![0u16; k + 1];
    for (i, &c) in order.iter().enumerate() {
        new_id[c + 1] = i as u16 + 1;
    }
    for l in seg.labels.iter_mut() {
        *l = new_id[*l as usize];
    }

    let [tx, ty] = tiling(w, h);
    let kk = order.len();
    let mut tile_counts = vec![vec![0usize; kk + 1]; tx * ty];
    let mut tile_px = vec![0usize; tx * ty];
    for y in 0..h {
        let ti = (y * ty / h) * tx;
        for x in 0..w {
            let t = ti + x * tx / w;
            tile_px[t] += 1;
            tile_counts[t][seg.labels[y * w + x] as usize] += 1;
        }
    }
    // The apparent composition: every k-factor 1, no background, all pixels.
    let phase_counts: Vec<PhaseCounts> = order
        .iter()
        .map(|&c| PhaseCounts {
            rate_var: None,
            pixels: pixels[c],
            sums: sum[c * d..(c + 1) * d].to_vec(),
        })
        .collect();
    let apparent = quantify(
        infos,
        &phase_counts,
        &Rules {
            k: KFactors::unit(d),
            oxygen: Oxygen::Measured,
            background: BackgroundRule::None,
        },
    );
    let mut t_quantile = f64::NAN;
    let mut names_seen: Vec<String> = Vec::new();
    let phases = order
        .iter()
        .enumerate()
        .map(|(i, &c)| {
            let id = i as u16 + 1;
            let np = pixels[c] as f64;
            let mean: Vec<f64> = (0..d).map(|e| sum[c * d + e] / np.max(1.0)).collect();
            let sd: Vec<f64> = (0..d)
                .map(|e| {
                    if np > 1.0 {
                        ((sum2[c * d + e] - np * mean[e] * mean[e]) / (np - 1.0))
                            .max(0.0)
                            .sqrt()
                    } else {
                        0.0
                    }
                })
                .collect();
            let composition = apparent.phases[i].clone();
            let fractions: Vec<f64> = (0..tx * ty)
                .map(|t| tile_counts[t][id as usize] as f64 / tile_px[t] as f64)
                .collect();
            let (_, _, half, tq) = mean_ci(&fractions);
            t_quantile = tq;
            let p = np / n as f64;
            let ci = half
                .is_finite()
                .then(|| [(p - half).max(0.0), (p + half).min(1.0)]);
            let mut name = name_of(&elements, &composition.wt);
            let repeats = names_seen.iter().filter(|s| **s == name).count();
            names_seen.push(name.clone());
            if repeats > 0 {
                name = format!("{name} ({})", repeats + 1);
            }
            Phase {
                id,
                name,
                model_index: c,
                pixels: pixels[c],
                area_fraction: p,
                area_fraction_ci95: ci,
                mean,
                sd,
                composition,
                composition_pixels: pixels[c],
                composition_from_interior: false,
                composition_unmixed: false,
                reference: None,
                features: 0,
                mean_ecd_px: 0.0,
                largest_px: 0,
                mean_confidence: if np > 0.0 { conf[c] / np } else { 0.0 },
            }
        })
        .collect::<Vec<_>>();
    let mut table = PhaseTable {
        composition_elements: elements.clone(),
        composition_method: APPARENT.into(),
        elements,
        phases,
        unassigned_fraction: seg.labels.iter().filter(|&&l| l == 0).count() as f64 / n as f64,
        tiles: [tx, ty],
        t_quantile,
    };
    particle_statistics(&mut table, seg);
    table
}

/// Fewest interior pixels a composition is summed over before falling back to all of the
/// phase's pixels (common practice, no source).
pub const MIN_COMPOSITION_PIXELS: usize = 25;

/// Largest clearance for which [`ClearSums`] keeps sums.
pub const MAX_CLEARANCE: usize = 8;

/// Per-phase sums of counts by clearance: for r = 0..=[`MAX_CLEARANCE`], the pixels of each
/// phase with no other label within r pixels (chessboard distance; r = 0 is every pixel)
/// and their summed counts. They add up over the strips of a field too big to hold whole.
#[derive(Debug, Clone, PartialEq)]
pub struct ClearSums {
    k: usize,
    d: usize,
    /// `[r][phase]` pixels.
    pixels: Vec<Vec<usize>>,
    /// `[r][phase × d + element]` summed counts.
    sums: Vec<Vec<f64>>,
}

impl ClearSums {
    /// Nothing summed yet.
    pub fn new(k: usize, d: usize) -> ClearSums {
        ClearSums {
            k,
            d,
            pixels: vec![vec![0; k]; MAX_CLEARANCE + 1],
            sums: vec![vec![0.0; k * d]; MAX_CLEARANCE + 1],
        }
    }

    /// Adds another set.
    pub fn add(&mut self, o: &ClearSums) {
        for r in 0..=MAX_CLEARANCE {
            self.pixels[r]
                .iter_mut()
                .zip(&o.pixels[r])
                .for_each(|(a, b)| *a += b);
            self.sums[r]
                .iter_mut()
                .zip(&o.sums[r])
                .for_each(|(a, b)| *a += b);
        }
    }

    /// Sums over the pixels of `rows` of a `width × height` label image (labels 1..=k) and
    /// its count planes; the clearance looks at the whole image, so rows far enough from
    /// its top and bottom edges get the same answer as in a bigger image.
    pub fn over_rows(
        labels: &[u16],
        width: usize,
        height: usize,
        planes: &[&[f32]],
        k: usize,
        rows: std::ops::Range<usize>,
    ) -> ClearSums {
        let dist = boundary_distance(labels, width, height);
        let d = planes.len();
        // Sums by exact clearance, in fixed blocks of rows combined in order (the same
        // result whatever the thread count) …
        let blocks: Vec<std::ops::Range<usize>> = rows
            .clone()
            .step_by(64)
            .map(|y| y..(y + 64).min(rows.end))
            .collect();
        let exact = blocks
            .par_iter()
            .map(|block| {
                let mut s = ClearSums::new(k, d);
                for i in block.start * width..block.end * width {
                    let l = labels[i];
                    if l == 0 {
                        continue;
                    }
                    let c = l as usize - 1;
                    let clear = dist
                        .as_ref()
                        .map_or(MAX_CLEARANCE, |d| usize::from(d[i]).min(MAX_CLEARANCE));
                    s.pixels[clear][c] += 1;
                    for (e, p) in planes.iter().enumerate() {
                        s.sums[clear][c * d + e] += f64::from(p[i]);
                    }
                }
                s
            })
            .reduce_with(|mut a, b| {
                a.add(&b);
                a
            })
            .unwrap_or_else(|| ClearSums::new(k, d));
        // … then a pixel clear by r counts for every radius up to r.
        let mut s = exact;
        for r in (0..MAX_CLEARANCE).rev() {
            let (lower, upper) = s.pixels.split_at_mut(r + 1);
            lower[r]
                .iter_mut()
                .zip(&upper[0])
                .for_each(|(a, b)| *a += b);
            let (lower, upper) = s.sums.split_at_mut(r + 1);
            lower[r]
                .iter_mut()
                .zip(&upper[0])
                .for_each(|(a, b)| *a += b);
        }
        s
    }

    /// Each phase's counts with clearance `radius` (at most [`MAX_CLEARANCE`]), or over all
    /// its pixels when fewer than [`MIN_COMPOSITION_PIXELS`] are that clear; the flag says
    /// which.
    pub fn at(&self, radius: usize) -> Vec<(PhaseCounts, bool)> {
        let r = radius.min(MAX_CLEARANCE);
        let d = self.d;
        (0..self.k)
            .map(|c| {
                let (rr, interior) = if self.pixels[r][c] >= MIN_COMPOSITION_PIXELS {
                    (r, true)
                } else {
                    (0, false)
                };
                (
                    PhaseCounts {
                        rate_var: None,
                        pixels: self.pixels[rr][c],
                        sums: self.sums[rr][c * d..(c + 1) * d].to_vec(),
                    },
                    interior,
                )
            })
            .collect()
    }
}

/// Summed counts of each phase (label 1..=k) over its interior: pixels with no other label
/// (unassigned included) within `radius` pixels (chessboard distance). A phase with fewer
/// than [`MIN_COMPOSITION_PIXELS`] such pixels is summed over all its pixels; the flag says
/// which.
pub fn interior_counts(
    labels: &[u16],
    width: usize,
    height: usize,
    counts: &MapStack,
    k: usize,
    radius: usize,
) -> Vec<(PhaseCounts, bool)> {
    let planes: Vec<&[f32]> = counts.maps().iter().map(|m| m.counts.as_slice()).collect();
    ClearSums::over_rows(labels, width, height, &planes, k, 0..height).at(radius)
}

/// Counts the separate features of each phase and their sizes.
fn particle_statistics(table: &mut PhaseTable, seg: &Segmentation) {
    let comps = component_sizes(&seg.labels, seg.width, seg.height);
    for p in &mut table.phases {
        let sizes: Vec<usize> = comps.iter().filter(|c| c.0 == p.id).map(|c| c.1).collect();
        p.features = sizes.len();
        p.largest_px = sizes.iter().copied().max().unwrap_or(0);
        p.mean_ecd_px = if sizes.is_empty() {
            0.0
        } else {
            sizes
                .iter()
                .map(|&a| 2.0 * (a as f64 / std::f64::consts::PI).sqrt())
                .sum::<f64>()
                / sizes.len() as f64
        };
    }
}

/// The 8-connected features of a label image (label 0 is background): (label, pixels) of
/// each, in the raster order of their first pixel.
///
/// One pass over the rows with a union–find over provisional feature numbers, holding only
/// the previous row's numbers: memory grows with the number of features, not the pixels,
/// so a montage of 10⁸ pixels does not need the 4-byte-per-pixel component image of a
/// general labelling routine (`imageproc::region_labelling`, which the tests compare with).
pub fn component_sizes(labels: &[u16], w: usize, h: usize) -> Vec<(u16, usize)> {
    fn root(parent: &mut [u32], mut i: u32) -> u32 {
        while parent[i as usize] != i {
            let p = parent[i as usize];
            parent[i as usize] = parent[p as usize];
            i = p;
        }
        i
    }
    let mut parent: Vec<u32> = Vec::new();
    let mut size: Vec<usize> = Vec::new();
    let mut label_of: Vec<u16> = Vec::new();
    let mut prev = vec![u32::MAX; w];
    let mut cur = vec![u32::MAX; w];
    for y in 0..h {
        for x in 0..w {
            let l = labels[y * w + x];
            cur[x] = u32::MAX;
            if l == 0 {
                continue;
            }
            // Neighbours already seen with the same label: W, NW, N, NE.
            let mut id = u32::MAX;
            let seen = |id: &mut u32, other: u32, parent: &mut Vec<u32>| {
                if other == u32::MAX {
                    return;
                }
                let b = root(parent, other);
                if *id == u32::MAX {
                    *id = b;
                } else {
                    let a = root(parent, *id);
                    if a != b {
                        // The smaller number (earlier first pixel) stays the root.
                        let (lo, hi) = if a < b { (a, b) } else { (b, a) };
                        parent[hi as usize] = lo;
                        *id = lo;
                    }
                }
            };
            if x > 0 && labels[y * w + x - 1] == l {
                seen(&mut id, cur[x - 1], &mut parent);
            }
            if y > 0 {
                for xx in x.saturating_sub(1)..(x + 2).min(w) {
                    if labels[(y - 1) * w + xx] == l {
                        seen(&mut id, prev[xx], &mut parent);
                    }
                }
            }
            if id == u32::MAX {
                id = parent.len() as u32;
                parent.push(id);
                size.push(0);
                label_of.push(l);
            }
            size[id as usize] += 1;
            cur[x] = id;
        }
        std::mem::swap(&mut prev, &mut cur);
    }
    // Sizes onto the roots, in the order of the roots' first pixels.
    let n = parent.len();
    let mut total = vec![0usize; n];
    for (i, &s) in size.iter().enumerate() {
        let r = root(&mut parent, i as u32) as usize;
        total[r] += s;
    }
    (0..n)
        .filter(|&i| parent[i] == i as u32)
        .map(|i| (label_of[i], total[i]))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use image::{ImageBuffer, Luma};

    /// ASTM E562 worked example (references.md §7, computed there): five fields at 10, 12,
    /// 8, 11, 9 % give mean 10.0, s 1.581, t 2.776, 95 % CI ± 1.963, %RA 19.6.
    #[test]
    fn student_t_interval_matches_the_worked_example() {
        let (m, s, half, t) = mean_ci(&[10.0, 12.0, 8.0, 11.0, 9.0]);
        assert!((m - 10.0).abs() < 1e-12);
        assert!((s - 1.581).abs() < 1e-3);
        assert!((t - 2.776).abs() < 1e-3);
        assert!((half - 1.963).abs() < 1e-3);
        assert!((100.0 * half / m - 19.6).abs() < 0.05);
    }

    /// Two-sided 95 % t quantiles (references.md §7, from scipy): n = 25 tiles → 2.064.
    #[test]
    fn t_quantile_for_25_tiles() {
        let v: Vec<f64> = (0..25).map(|i| f64::from(i % 3)).collect();
        assert!((mean_ci(&v).3 - 2.064).abs() < 1e-3);
    }

    /// A 12 × 12 field: phase 1 on the left 6 columns, phase 2 on the right; counts equal
    /// the column index. With radius 2, columns 0..=3 and 8..=11 are interior.
    #[test]
    fn interior_counts_keep_clear_of_boundaries() {
        let (w, h) = (12, 12);
        let labels: Vec<u16> = (0..w * h).map(|i| if i % w < 6 { 1 } else { 2 }).collect();
        let counts: Vec<f32> = (0..w * h).map(|i| (i % w) as f32).collect();
        let stack = MapStack::new(
            std::path::Path::new("t"),
            w,
            h,
            vec![crate::stack::ElementMap {
                element: crate::chem::element("Fe").unwrap(),
                line: None,
                counts,
                source: "t".into(),
            }],
            Default::default(),
        )
        .unwrap();
        let r = interior_counts(&labels, w, h, &stack, 2, 2);
        assert_eq!(r[0].0.pixels, 4 * h);
        assert_eq!(r[0].0.sums[0], 6.0 * h as f64);
        assert_eq!(r[1].0.sums[0], (8 + 9 + 10 + 11) as f64 * h as f64);
        assert!(r[0].1 && r[1].1);
        // A radius wider than the phase: fall back to all pixels, and say so.
        let r = interior_counts(&labels, w, h, &stack, 2, 7);
        assert_eq!(r[0].0.pixels, 6 * h);
        assert!(!r[0].1);
    }

    /// Feature counts and sizes against imageproc's connected-component labelling
    /// (8-connected, background 0) on random label images of a few labels.
    #[test]
    fn features_match_imageproc() {
        use imageproc::region_labelling::{connected_components, Connectivity};
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        for (w, h, k) in [
            (1, 1, 1),
            (7, 1, 2),
            (1, 9, 2),
            (37, 23, 3),
            (64, 64, 2),
            (50, 40, 5),
        ] {
            let labels: Vec<u16> = (0..w * h).map(|_| rng.random_range(0..=k)).collect();
            let img: ImageBuffer<Luma<u16>, Vec<u16>> =
                ImageBuffer::from_raw(w as u32, h as u32, labels.clone()).unwrap();
            let comp = connected_components(&img, Connectivity::Eight, Luma([0u16])).into_raw();
            let n = comp.iter().copied().max().unwrap_or(0) as usize;
            let mut want: Vec<(u16, usize)> = (1..=n)
                .map(|c| {
                    let px: Vec<usize> = (0..w * h).filter(|&i| comp[i] as usize == c).collect();
                    (labels[px[0]], px.len())
                })
                .collect();
            let mut got = component_sizes(&labels, w, h);
            want.sort();
            got.sort();
            assert_eq!(got, want, "{w}×{h}, {k} labels");
        }
    }

    #[test]
    fn names_from_dominant_elements() {
        let el: Vec<String> = ["Cu", "Ag", "Sn"].iter().map(|s| s.to_string()).collect();
        assert_eq!(name_of(&el, &[5.0, 5.0, 90.0]), "Sn-rich");
        assert_eq!(name_of(&el, &[40.0, 4.0, 56.0]), "Sn–Cu");
        assert_eq!(name_of(&el, &[0.0, 0.0, 0.0]), "no counts");
    }
}
