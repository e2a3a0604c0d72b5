//! Fields too big to hold whole (stitched montages): labelled with a saved model strip by
//! strip, in bounded memory, with exactly the labels of the in-memory path.
//!
//! The maps are read a window of rows at a time (8/16-bit grayscale PNG maps, decoded row
//! by row). Two passes:
//! 1. the per-pixel total counts of the whole field (4 bytes a pixel), for the empty-pixel
//!    threshold and the share of empty pixels, which depend on the whole field;
//! 2. strips of rows, each with a halo of rows above and below: the strip and its halo are
//!    prepared (with the whole field's threshold and the dequantisation offsets of the
//!    pixels' places in the field) and labelled; only the strip's own rows are kept. Every
//!    step of the labelling looks only at nearby pixels, and a bounded number of times
//!    (ICM sweeps, unmixing passes), so a halo as wide as the farthest reach of all steps
//!    ([`halo_rows`]) gives each strip row the label it gets in the whole field.
//!
//! The per-phase sums (counts, interior sums for the compositions) are added strip by
//! strip; the label image of the whole field (2 bytes a pixel) is kept for the phase image
//! and the particle count. Memory: about 6 bytes a pixel of the whole field (labels, and
//! the totals of pass 1, freed before pass 2) plus a strip of ~[`STRIP_BYTES`].

use crate::chem::ElementInfo;
use crate::cluster::Clusters;
use crate::error::{Error, Result};
use crate::io::rows::StreamedField;
use crate::map_options::ValidMapOptions;
use crate::phases::{table_from_sums, ClearSums, PhaseSums, PhaseTable, MAX_CLEARANCE};
use crate::prepare::{
    empty_share, median_total, prepare_window, Denoise, MinCounts, WindowContext,
};
use crate::refine::{Segmentation, UNMIX_PASSES};

/// Working memory aimed at for one strip with its halo, bytes.
pub const STRIP_BYTES: usize = 768 << 20;

/// Rows of halo above and below a strip, on the labelling grid, for these options: the
/// reach of the denoising filter, the 3 × 3 start, 4 pixels per ICM sweep (the four colour
/// classes can pass a change on by up to a pixel each), 4 per unmixing pass, the
/// minimum-feature rule, the widest composition clearance, and a margin of 2.
pub fn halo_rows(opts: &ValidMapOptions) -> usize {
    let o = opts.options();
    let denoise = match o.prepare.denoise {
        Denoise::None => 0,
        Denoise::Median { radius } => radius,
        Denoise::Gaussian { sigma } => (4.0 * sigma).ceil() as usize + 1,
    };
    denoise
        + 1
        + 4 * o.refine.max_sweeps
        + 4 * UNMIX_PASSES
        + o.refine.min_feature_px
        + MAX_CLEARANCE
        + 2
}

/// Strip height (rows of the labelling grid) that keeps a strip with its halo near
/// [`STRIP_BYTES`]: 8 bytes per value of the strip (counts and features, both `f32`) plus
/// 40 per pixel (labelling state), as measured (122 bytes a pixel with 10 maps).
pub fn strip_rows(width: usize, elements: usize, halo: usize) -> usize {
    let per_row = width.max(1) * (8 * elements + 40);
    (STRIP_BYTES / per_row).saturating_sub(2 * halo).max(64)
}

/// A streamed field, labelled.
pub struct Streamed {
    /// Phase statistics (ids in the model's order).
    pub table: PhaseTable,
    /// Labels of the whole field (renumbered to phase ids); no posteriors are kept.
    pub segmentation: Segmentation,
    /// Interior sums for the compositions.
    pub clear: ClearSums,
    /// Empty-pixel threshold used.
    pub min_counts_used: f64,
    /// Strips labelled.
    pub strips: usize,
    /// Halo rows used.
    pub halo: usize,
}

/// Labels a field strip by strip with a saved model's clusters (see the module docs).
/// `strip` overrides the strip height (rows of the labelling grid); `progress` hears
/// (strips done, strips in all).
pub fn label_streamed(
    field: &mut StreamedField,
    opts: &ValidMapOptions,
    clusters: &Clusters,
    order: &[usize],
    strip: Option<usize>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Streamed> {
    let p = *opts.options();
    let bin = p.prepare.bin;
    let (gw, gh) = (field.width / bin, field.height / bin);
    if gw == 0 || gh == 0 {
        return Err(Error::input(
            &field.input,
            format!("is smaller than one {bin}×{bin} bin"),
            "bin less",
        ));
    }
    let d = field.lines.len();
    let k = clusters.k();
    let halo = halo_rows(opts);
    let rows = strip.unwrap_or_else(|| strip_rows(gw, d, halo)).max(1);
    let n_strips = gh.div_ceil(rows);
    let transform = opts.transform();

    // Pass 1: per-pixel totals on the labelling grid, for the threshold and empty share.
    let mut totals = vec![0f32; gw * gh];
    for s in 0..n_strips {
        let (c0, c1) = (s * rows, ((s + 1) * rows).min(gh));
        let stack = crate::prepare::bin_stack(field.read(c0 * bin, c1 * bin)?, bin)?;
        for m in stack.maps() {
            for (t, &c) in totals[c0 * gw..c1 * gw].iter_mut().zip(&m.counts) {
                *t += c;
            }
        }
    }
    let min_counts_used = match p.prepare.min_counts {
        MinCounts::Relative { fraction } => fraction * median_total(&totals),
        MinCounts::Absolute { counts } => counts,
    };
    let empty = totals
        .iter()
        .filter(|&&t| !(f64::from(t) >= min_counts_used && t > 0.0))
        .count();
    let empty_fraction = empty_share(empty, gw * gh);
    drop(totals);
    // The sources read forward only: open them again for the second pass.
    field.rewind()?;

    // Pass 2: strips with their halo.
    let mut labels = vec![0u16; gw * gh];
    let mut sums = PhaseSums::new(k, d);
    let mut clear = ClearSums::new(k, d);
    let (mut empty_pixels, mut outlier_pixels) = (0usize, 0usize);
    for s in 0..n_strips {
        let (c0, c1) = (s * rows, ((s + 1) * rows).min(gh));
        // The view starts on an even row: the labelling updates pixels in four colour
        // classes by the parity of their row and column, which must be the field's.
        let (v0, v1) = (c0.saturating_sub(halo) & !1, (c1 + halo).min(gh));
        let view = field.read(v0 * bin, v1 * bin)?;
        let f = prepare_window(
            view,
            &transform,
            Some(&WindowContext {
                first_pixel: v0 * gw,
                min_counts_used,
                empty_fraction,
            }),
        )?;
        let seg = crate::refine::refine(&f, clusters, &opts.refine());
        let core = (c0 - v0) * gw..(c1 - v0) * gw;
        labels[c0 * gw..c1 * gw].copy_from_slice(&seg.labels[core.clone()]);
        let planes: Vec<&[f32]> = f
            .counts
            .maps()
            .iter()
            .map(|m| &m.counts[core.clone()])
            .collect();
        sums.add(&PhaseSums::accumulate(
            &seg.labels[core.clone()],
            &seg.confidence[core.clone()],
            &planes,
            k,
        ));
        let view_planes: Vec<&[f32]> = f
            .counts
            .maps()
            .iter()
            .map(|m| m.counts.as_slice())
            .collect();
        clear.add(&ClearSums::over_rows(
            &seg.labels,
            gw,
            v1 - v0,
            &view_planes,
            k,
            (c0 - v0)..(c1 - v0),
        ));
        for i in core {
            if seg.labels[i] == 0 {
                if seg.outliers[i] {
                    outlier_pixels += 1;
                } else {
                    empty_pixels += 1;
                }
            }
        }
        progress(s + 1, n_strips);
    }
    let mut segmentation = Segmentation {
        width: gw,
        height: gh,
        labels,
        confidence: Vec::new(),
        empty_pixels,
        outlier_pixels,
        outliers: Vec::new(),
        sweep_changes: Vec::new(),
        small_feature_pixels: 0,
        unmixed_pixels: 0,
        smoothed_labels: Vec::new(),
    };
    let infos: Vec<ElementInfo> = field.lines.iter().map(|l| l.0).collect();
    let table = table_from_sums(sums, &mut segmentation, &infos, Some(order));
    Ok(Streamed {
        table,
        segmentation,
        clear,
        min_counts_used,
        strips: n_strips,
        halo,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::map_options::MapOptions;
    use crate::refine::RefineParams;
    use crate::test_fields::bands;

    const RATES: [[f64; 2]; 3] = [[30.0, 4.0], [4.0, 30.0], [17.0, 17.0]];

    /// Every step's reach is in the halo: more ICM sweeps or a larger minimum feature
    /// widen it by their reach, and strips never get shorter than 64 rows.
    #[test]
    fn the_halo_grows_with_each_steps_reach() {
        let with = |max_sweeps, min_feature_px| {
            let o = MapOptions {
                refine: RefineParams {
                    max_sweeps,
                    min_feature_px,
                    ..RefineParams::default()
                },
                ..MapOptions::default()
            };
            halo_rows(&o.check().unwrap())
        };
        assert_eq!(with(6, 4) - with(5, 4), 4, "4 rows per ICM sweep");
        assert_eq!(with(5, 9) - with(5, 4), 5, "the minimum feature's reach");
        assert_eq!(strip_rows(1 << 30, 10, 30), 64);
        let rows = strip_rows(2048, 10, 30);
        assert!((rows + 60) * 2048 * (8 * 10 + 40) <= STRIP_BYTES, "{rows}");
    }

    /// Strips of 16 rows with their halo give every pixel the label of the whole field
    /// labelled at once with the same model, and the same phase areas.
    #[test]
    fn strips_label_like_the_whole_field() {
        let (stack, _) = bands(48, 150, &RATES, 5);
        let opts = MapOptions::default().check().unwrap();
        let fitted = crate::pipeline::map_stack(stack.clone(), &opts).unwrap();
        let order: Vec<usize> = fitted.table.phases.iter().map(|p| p.model_index).collect();
        let whole =
            crate::pipeline::label_with_model(stack.clone(), &opts, &fitted.clusters, &order)
                .unwrap();
        assert!(
            !whole.xray_yield.applied,
            "a flat field: no yield correction"
        );
        let mut field = StreamedField::from_stack(stack, "bands");
        let mut strips_seen = 0;
        let streamed = label_streamed(
            &mut field,
            &opts,
            &fitted.clusters,
            &order,
            Some(16),
            &mut |_, all| strips_seen = all,
        )
        .unwrap();
        assert_eq!(strips_seen, 10);
        assert_eq!(streamed.segmentation.labels, whole.segmentation.labels);
        for (a, b) in streamed.table.phases.iter().zip(&whole.table.phases) {
            assert_eq!(a.pixels, b.pixels, "phase {}", a.id);
        }
    }
}
