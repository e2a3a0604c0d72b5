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

use image::{ImageBuffer, Luma};
use imageproc::region_labelling::{connected_components, Connectivity};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, StudentsT};

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
    /// 95 % confidence interval of the area fraction from tile-to-tile variation.
    pub area_fraction_ci95: [f64; 2],
    /// Mean raw counts per pixel, per element (in element order).
    pub mean: Vec<f64>,
    /// Standard deviation of raw counts per pixel, per element.
    pub sd: Vec<f64>,
    /// Apparent composition, % (counts normalised to 100 with every k-factor = 1):
    /// uncalibrated and semi-quantitative.
    pub composition_wt: Vec<f64>,
    /// Number of separate features (8-connected regions).
    pub particles: usize,
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
    /// Element symbols, in the column order of `mean`, `sd`, `composition_wt`.
    pub elements: Vec<String>,
    /// Phases by decreasing area.
    pub phases: Vec<Phase>,
    /// Share of unassigned pixels.
    pub unassigned_fraction: f64,
    /// Tiles across and down used for the confidence intervals.
    pub tiles: [usize; 2],
    /// Two-sided 95 % Student t quantile used (n − 1 degrees of freedom).
    pub t_quantile: f64,
}

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

fn name_of(elements: &[String], comp: &[f64]) -> String {
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
    let (w, h) = (seg.width, seg.height);
    let n = w * h;
    let d = counts.maps().len();
    let elements: Vec<String> = counts.symbols().iter().map(|s| s.to_string()).collect();

    // Per-phase sums over fixed chunks of pixels, added in chunk order (deterministic).
    struct Acc {
        pixels: Vec<usize>,
        sum: Vec<f64>,
        sum2: Vec<f64>,
        conf: Vec<f64>,
    }
    let planes: Vec<&[f32]> = counts.maps().iter().map(|m| m.counts.as_slice()).collect();
    let labels = &seg.labels;
    let confidence = &seg.confidence;
    const CHUNK: usize = 1 << 16;
    let acc = (0..n.div_ceil(CHUNK))
        .into_par_iter()
        .map(|chunk| {
            let mut a = Acc {
                pixels: vec![0; k],
                sum: vec![0.0; k * d],
                sum2: vec![0.0; k * d],
                conf: vec![0.0; k],
            };
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
        .reduce(|mut a, b| {
            a.pixels
                .iter_mut()
                .zip(&b.pixels)
                .for_each(|(x, y)| *x += y);
            a.sum.iter_mut().zip(&b.sum).for_each(|(x, y)| *x += y);
            a.sum2.iter_mut().zip(&b.sum2).for_each(|(x, y)| *x += y);
            a.conf.iter_mut().zip(&b.conf).for_each(|(x, y)| *x += y);
            a
        })
        .expect("at least one pixel");
    let Acc {
        pixels,
        sum,
        sum2,
        conf,
    } = acc;
    let mut order: Vec<usize> = (0..k).filter(|&c| pixels[c] > 0).collect();
    order.sort_by(|&a, &b| pixels[b].cmp(&pixels[a]).then(a.cmp(&b)));
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
    let mut t_quantile = f64::NAN;
    let mut names_seen: Vec<String> = Vec::new();
    let phases = order
        .iter()
        .enumerate()
        .map(|(i, &c)| {
            let id = i as u16 + 1;
            let np = pixels[c] as f64;
            let mean: Vec<f64> = (0..d).map(|e| sum[c * d + e] / np).collect();
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
            let total: f64 = mean.iter().sum();
            let composition_wt: Vec<f64> = mean
                .iter()
                .map(|m| if total > 0.0 { 100.0 * m / total } else { 0.0 })
                .collect();
            let fractions: Vec<f64> = (0..tx * ty)
                .map(|t| tile_counts[t][id as usize] as f64 / tile_px[t] as f64)
                .collect();
            let (_, _, half, tq) = mean_ci(&fractions);
            t_quantile = tq;
            let p = np / n as f64;
            let (lo, hi) = if half.is_finite() {
                ((p - half).max(0.0), (p + half).min(1.0))
            } else {
                (p, p)
            };
            let mut name = name_of(&elements, &composition_wt);
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
                area_fraction_ci95: [lo, hi],
                mean,
                sd,
                composition_wt,
                particles: 0,
                mean_ecd_px: 0.0,
                largest_px: 0,
                mean_confidence: conf[c] / np,
            }
        })
        .collect::<Vec<_>>();
    let mut table = PhaseTable {
        elements,
        phases,
        unassigned_fraction: seg.labels.iter().filter(|&&l| l == 0).count() as f64 / n as f64,
        tiles: [tx, ty],
        t_quantile,
    };
    particle_statistics(&mut table, seg);
    table
}

/// Counts the separate features of each phase and their sizes.
fn particle_statistics(table: &mut PhaseTable, seg: &Segmentation) {
    let img: ImageBuffer<Luma<u16>, Vec<u16>> =
        ImageBuffer::from_raw(seg.width as u32, seg.height as u32, seg.labels.clone())
            .expect("size matches");
    let comp = connected_components(&img, Connectivity::Eight, Luma([0u16])).into_raw();
    let ncomp = comp.iter().copied().max().unwrap_or(0) as usize;
    let mut size = vec![0usize; ncomp + 1];
    let mut phase_of = vec![0u16; ncomp + 1];
    for (i, &c) in comp.iter().enumerate() {
        size[c as usize] += 1;
        phase_of[c as usize] = seg.labels[i];
    }
    for p in &mut table.phases {
        let sizes: Vec<usize> = (1..=ncomp)
            .filter(|&c| phase_of[c] == p.id)
            .map(|c| size[c])
            .collect();
        p.particles = sizes.len();
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

#[cfg(test)]
mod tests {
    use super::*;

    /// ASTM E562 worked example (REFERENCES.md §7, computed there): five fields at 10, 12,
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

    /// Two-sided 95 % t quantiles (REFERENCES.md §7, from scipy): n = 25 tiles → 2.064.
    #[test]
    fn t_quantile_for_25_tiles() {
        let v: Vec<f64> = (0..25).map(|i| f64::from(i % 3)).collect();
        assert!((mean_ci(&v).3 - 2.064).abs() < 1e-3);
    }

    #[test]
    fn names_from_dominant_elements() {
        let el: Vec<String> = ["Cu", "Ag", "Sn"].iter().map(|s| s.to_string()).collect();
        assert_eq!(name_of(&el, &[5.0, 5.0, 90.0]), "Sn-rich");
        assert_eq!(name_of(&el, &[40.0, 4.0, 56.0]), "Sn–Cu");
        assert_eq!(name_of(&el, &[0.0, 0.0, 0.0]), "no counts");
    }
}
