//! Geometry of a label image (labels 0 = unassigned, 1..=k phases): which pixels are
//! interior to their phase and how far each pixel is from a phase boundary. Used by the
//! refinement, the phase statistics, the X-ray yield, the unmixing and the BSE check.

use image::{ImageBuffer, Luma};
use rayon::prelude::*;

/// Whether pixel (x, y) of a `width`-wide label image is interior: it and its eight
/// neighbours hold the same non-zero label. The caller keeps (x, y) one pixel off the edge.
pub fn interior_3x3(labels: &[u16], width: usize, x: usize, y: usize) -> bool {
    let l = labels[y * width + x];
    l != 0
        && (y - 1..=y + 1).all(|yy| {
            labels[yy * width + x - 1..=yy * width + x + 1]
                .iter()
                .all(|&m| m == l)
        })
}

/// Chessboard distance of every pixel of a `width × height` label image to the nearest
/// boundary pixel (one with another label among its 8 neighbours), capped at 255: a pixel
/// at distance r has no other label within r pixels. `None` when the image holds one label.
pub fn boundary_distance(labels: &[u16], width: usize, height: usize) -> Option<Vec<u8>> {
    use imageproc::distance_transform::{distance_transform, Norm};
    let mut boundary = vec![0u8; width * height];
    boundary
        .par_chunks_mut(width)
        .enumerate()
        .for_each(|(y, row)| {
            for (x, b) in row.iter_mut().enumerate() {
                let l = labels[y * width + x];
                let differs = (y.saturating_sub(1)..(y + 2).min(height)).any(|yy| {
                    (x.saturating_sub(1)..(x + 2).min(width)).any(|xx| labels[yy * width + xx] != l)
                });
                if differs {
                    *b = 255;
                }
            }
        });
    if !boundary.iter().any(|&v| v > 0) {
        return None;
    }
    let img: ImageBuffer<Luma<u8>, Vec<u8>> =
        ImageBuffer::from_raw(width as u32, height as u32, boundary).expect("size matches");
    Some(distance_transform(&img, Norm::LInf).into_raw())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two phases split by a vertical edge at x = 4, with one stray pixel of phase 2.
    fn two_phases() -> (Vec<u16>, usize, usize) {
        let (w, h) = (9, 7);
        let mut labels: Vec<u16> = (0..w * h).map(|i| if i % w < 4 { 1 } else { 2 }).collect();
        labels[5 * w + 1] = 2;
        (labels, w, h)
    }

    #[test]
    fn interior_pixels_have_eight_neighbours_of_their_label() {
        let (labels, w, _) = two_phases();
        assert!(interior_3x3(&labels, w, 2, 2));
        assert!(!interior_3x3(&labels, w, 3, 2), "next to the edge");
        assert!(interior_3x3(&labels, w, 6, 3));
        assert!(!interior_3x3(&labels, w, 2, 4), "next to the stray pixel");
        let mut unassigned = labels.clone();
        unassigned.iter_mut().for_each(|l| *l = 0);
        assert!(
            !interior_3x3(&unassigned, w, 2, 2),
            "label 0 is never interior"
        );
    }

    /// The distance transform agrees with the definition computed by brute force: the
    /// chessboard distance to the nearest pixel with another label among its neighbours.
    #[test]
    fn boundary_distance_is_the_chessboard_distance_to_the_nearest_boundary() {
        let (labels, w, h) = two_phases();
        let boundary: Vec<(usize, usize)> = (0..w * h)
            .map(|i| (i % w, i / w))
            .filter(|&(x, y)| {
                (y.saturating_sub(1)..(y + 2).min(h)).any(|yy| {
                    (x.saturating_sub(1)..(x + 2).min(w))
                        .any(|xx| labels[yy * w + xx] != labels[y * w + x])
                })
            })
            .collect();
        let got = boundary_distance(&labels, w, h).unwrap();
        for y in 0..h {
            for x in 0..w {
                let want = boundary
                    .iter()
                    .map(|&(bx, by)| bx.abs_diff(x).max(by.abs_diff(y)))
                    .min()
                    .unwrap();
                assert_eq!(usize::from(got[y * w + x]), want, "pixel ({x}, {y})");
            }
        }
        assert!(
            boundary_distance(&[3; 12], 4, 3).is_none(),
            "one label, no boundary"
        );
    }
}
