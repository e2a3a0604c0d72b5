//! Row-block kernels: the per-pixel distances of the clustering models computed for
//! [`LANES`] pixels at once, one pixel per lane, so the compiler turns the inner loops into
//! vector instructions.
//!
//! A block of rows is transposed into `d` lanes (`xt[j][l]` = element `j` of row `l`);
//! every kernel then does, lane by lane, exactly the arithmetic of its one-row counterpart
//! in the same order (a sum over `j` from `j = 0`, no fused multiply–add), so the results
//! are bit-identical to the simple versions, which stay in the code as the reference the
//! tests compare against.

/// Pixels per block.
pub const LANES: usize = 8;

/// One value per pixel of a block.
pub type Lane = [f32; LANES];

/// Largest dimension the kernels support: a pixel's features are kept in fixed-size arrays
/// of this length, one value per element map ([`crate::stack::MAX_MAPS`]).
pub const MAX_DIMS: usize = crate::stack::MAX_MAPS;

/// Transposes `rows` (`m × d`, `1 ≤ m ≤ LANES`) into `xt[..d]`; lanes past `m` repeat the
/// last row, so they hold finite values that callers ignore.
#[inline(always)]
pub fn transpose(rows: &[f32], d: usize, xt: &mut [Lane]) {
    let m = rows.len() / d;
    debug_assert!((1..=LANES).contains(&m) && d <= xt.len());
    let xt = &mut xt[..d];
    for l in 0..LANES {
        let row = &rows[l.min(m - 1) * d..][..d];
        for (x, &v) in xt.iter_mut().zip(row) {
            x[l] = v;
        }
    }
}

/// Squared Euclidean distance of each lane's row to `c` (as [`super::kmeans::dist2`]).
#[inline(always)]
pub fn dist2(xt: &[Lane], c: &[f32]) -> Lane {
    let mut acc = [0f32; LANES];
    for (x, &cj) in xt.iter().zip(c) {
        for l in 0..LANES {
            let t = x[l] - cj;
            acc[l] += t * t;
        }
    }
    acc
}

/// Dot product of each lane's row with `w`.
#[inline(always)]
pub fn dot(xt: &[Lane], w: &[f32]) -> Lane {
    let mut acc = [0f32; LANES];
    for (x, &wj) in xt.iter().zip(w) {
        for l in 0..LANES {
            acc[l] += x[l] * wj;
        }
    }
    acc
}

/// Squared Mahalanobis distance ‖L⁻¹(x − μ)‖² of each lane's row, with `inv_chol` the
/// lower triangle of L⁻¹ (`d × d`, row-major), as
/// [`super::gmm::GaussianMixture::mahalanobis2`].
#[inline(always)]
pub fn mahalanobis2(xt: &[Lane], mean: &[f32], inv_chol: &[f32], d: usize) -> Lane {
    let mut diff = [[0f32; LANES]; MAX_DIMS];
    for j in 0..d {
        for l in 0..LANES {
            diff[j][l] = xt[j][l] - mean[j];
        }
    }
    let mut q = [0f32; LANES];
    for i in 0..d {
        let mut y = [0f32; LANES];
        for (j, &a) in inv_chol[i * d..i * d + i + 1].iter().enumerate() {
            for l in 0..LANES {
                y[l] += a * diff[j][l];
            }
        }
        for l in 0..LANES {
            q[l] += y[l] * y[l];
        }
    }
    q
}

/// Index and squared distance of the nearest centre for each lane's row (`centres` is
/// `k × d`); ties go to the lower index, as [`super::kmeans::nearest`].
#[inline(always)]
pub fn nearest(xt: &[Lane], centres: &[f32], d: usize) -> ([usize; LANES], Lane) {
    let mut best = ([0usize; LANES], [f32::INFINITY; LANES]);
    for (j, c) in centres.chunks_exact(d).enumerate() {
        let e = dist2(&xt[..d], c);
        for (l, &e) in e.iter().enumerate() {
            if e < best.1[l] {
                best.0[l] = j;
                best.1[l] = e;
            }
        }
    }
    best
}

/// Calls `f(block_rows, xt)` for consecutive blocks of at most [`LANES`] rows of `data`
/// (`n × d`), with `xt` the block transposed.
#[inline(always)]
pub fn for_each_block(data: &[f32], d: usize, mut f: impl FnMut(&[f32], &[Lane])) {
    let mut xt = [[0f32; LANES]; MAX_DIMS];
    for rows in data.chunks(LANES * d) {
        transpose(rows, d, &mut xt);
        f(rows, &xt[..d]);
    }
}

/// Calls `f(row, lp)` for every row of `data` (`n × d`) with `lp[c]` (`c < k`) the row's
/// score under component `c`, the scores computed a block at a time by
/// `scores(xt, out)` (writing `out[c][l]`).
#[inline(always)]
pub fn for_each_scored_row(
    data: &[f32],
    d: usize,
    k: usize,
    scores: impl Fn(&[Lane], &mut [[f64; LANES]]),
    mut f: impl FnMut(&[f32], &mut [f64]),
) {
    let mut out = vec![[0f64; LANES]; k];
    let mut lp = vec![0f64; k];
    for_each_block(data, d, |rows, xt| {
        scores(xt, &mut out);
        for (l, row) in rows.chunks_exact(d).enumerate() {
            for (p, o) in lp.iter_mut().zip(&out) {
                *p = o[l];
            }
            f(row, &mut lp);
        }
    });
}

/// Responsibilities at or below this are left out of the EM sums (they change nothing
/// that matters and cost a pass over the row).
pub const MIN_RESPONSIBILITY: f64 = 1e-10;

/// Turns a row's scores `lp` (log densities) into its posterior probabilities in place,
/// e^(lpₖ − lse), with 0 for the terms below e⁻⁴⁰ of the largest (see [`NEGLIGIBLE`]);
/// returns `(max, s)` with ln Σ exp(lp) = max + ln s, for a [`LogSum`]. One `exp` per
/// term that matters and none per row: EM's E-step is this and a few sums.
#[inline]
pub fn to_posteriors(lp: &mut [f64]) -> (f64, f64) {
    let max = lp.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mut s = 0.0;
    for v in lp.iter_mut() {
        *v = negligible_or_exp(*v - max);
        s += *v;
    }
    if s != 1.0 {
        let inv = 1.0 / s;
        lp.iter_mut().for_each(|v| *v *= inv);
    }
    (max, s)
}

/// Rows a [`LogSum`] multiplies together before taking one `ln`: each factor s is between
/// 1 and the number of components (at most a few hundred), so a product of 32 stays below
/// 10⁸⁰, far inside the range of an `f64`.
const LN_BATCH: usize = 32;

/// Σ over rows of ln Σ exp(lp) from [`to_posteriors`]'s `(max, s)`: the maxima are added,
/// the s multiplied, and one `ln` taken per [`LN_BATCH`] rows.
#[derive(Debug, Clone, Copy)]
pub struct LogSum {
    sum: f64,
    product: f64,
    pending: usize,
}

impl Default for LogSum {
    fn default() -> Self {
        LogSum {
            sum: 0.0,
            product: 1.0,
            pending: 0,
        }
    }
}

impl LogSum {
    /// Adds one row's ln Σ exp(lp) = max + ln s.
    #[inline]
    pub fn add(&mut self, (max, s): (f64, f64)) {
        self.sum += max;
        self.product *= s;
        self.pending += 1;
        if self.pending == LN_BATCH {
            self.flush();
        }
    }

    fn flush(&mut self) {
        if self.product != 1.0 {
            self.sum += self.product.ln();
        }
        self.product = 1.0;
        self.pending = 0;
    }

    /// The sum so far.
    pub fn total(mut self) -> f64 {
        self.flush();
        self.sum
    }
}

/// The most probable of the scores `lp` (log densities; ties go to the lower index), its
/// posterior probability, and ln Σ exp(lp) (by log-sum-exp, so nothing underflows).
#[inline]
pub fn best_and_log_sum(lp: &[f64]) -> (usize, f64, f64) {
    let mut best = 0;
    for c in 1..lp.len() {
        if lp[c] > lp[best] {
            best = c;
        }
    }
    let max = lp[best];
    let s: f64 = lp.iter().map(|&v| negligible_or_exp(v - max)).sum();
    if s == 1.0 {
        // Every other term is negligible: ln 1 = 0 and e⁰ = 1 exactly.
        return (best, 1.0, max);
    }
    let lse = max + s.ln();
    (best, (lp[best] - lse).exp(), lse)
}

/// Terms of a log-sum-exp more than this below its largest one are left out: e⁻⁴⁰ is
/// 4.2 × 10⁻¹⁸, so with k components they change the sum (which is at least 1, the
/// largest term's e⁰) by less than k × 4.2 × 10⁻¹⁸: under half a unit in its last place
/// (2⁻⁵³ = 1.1 × 10⁻¹⁶) up to 26 components, a few units for the largest counts. Pixels
/// far from all but one phase, most of a field, then cost no `exp` at all.
pub const NEGLIGIBLE: f64 = -40.0;

/// eˣ for x ≤ 0, or 0 where x < [`NEGLIGIBLE`]; e⁰ = 1 without a call.
#[inline]
fn negligible_or_exp(x: f64) -> f64 {
    if x < NEGLIGIBLE {
        0.0
    } else if x == 0.0 {
        1.0
    } else {
        x.exp()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cluster::gmm::GaussianMixture;
    use crate::cluster::kmeans;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// The shortcuts answer what the plain formulas answer, on both sides of their
    /// cut-off, to within a few units in the last place (terms below e⁻⁴⁰ of the largest
    /// are left out), and the batched sum of logs equals the plain sum.
    #[test]
    fn shortcuts_equal_the_plain_formulas() {
        let mut sum = LogSum::default();
        let mut plain_sum = 0.0;
        for i in 0..=40_000 {
            let x = -800.0 + 0.02 * f64::from(i);
            for lp in [[x, 0.0, 2.0 * x], [-3000.0 + x, -3000.0, -3000.5 + x]] {
                let max = lp.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                let lse_plain = max + lp.iter().map(|&v| (v - max).exp()).sum::<f64>().ln();
                let close = |a: f64, b: f64| (a - b).abs() <= 4.0 * f64::EPSILON * b.abs().max(1.0);
                let (best, post, lse) = best_and_log_sum(&lp);
                assert_eq!(lp[best], max);
                assert!(close(lse, lse_plain), "{lp:?}: {lse} against {lse_plain}");
                assert!(close(post, (max - lse_plain).exp()), "{lp:?}");
                let mut r = lp;
                sum.add(to_posteriors(&mut r));
                plain_sum += lse_plain;
                for (&r, &l) in r.iter().zip(&lp) {
                    let plain = (l - lse_plain).exp();
                    let plain = if l - max < NEGLIGIBLE { 0.0 } else { plain };
                    // The plain e^(l − lse) carries lse's rounding, relative |lse|·ε.
                    let tolerance = 4.0 * f64::EPSILON * lse_plain.abs().max(1.0);
                    assert!(
                        (r - plain).abs() <= tolerance,
                        "{lp:?}: {r} against {plain}"
                    );
                }
            }
        }
        let total = sum.total();
        assert!(
            (total - plain_sum).abs() <= 1e-9 * plain_sum.abs(),
            "{total} against {plain_sum}"
        );
    }

    fn rows(n: usize, d: usize, seed: u64) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..n * d).map(|_| rng.random_range(-30.0..30.0)).collect()
    }

    /// Every kernel equals its one-row reference bit for bit, for block sizes 1..=8 and
    /// odd dimensions.
    #[test]
    fn blocks_equal_the_one_row_kernels_bit_for_bit() {
        for d in [1, 3, 10, 17] {
            let k = 5;
            let centres = rows(k, d, 1);
            let w = rows(1, d, 2);
            // A valid mixture: covariances A Aᵀ + I.
            let a = rows(k * d * d, 1, 3);
            let mut cov = vec![0.0f64; k * d * d];
            for c in 0..k {
                for i in 0..d {
                    for j in 0..d {
                        let s: f64 = (0..d)
                            .map(|t| {
                                f64::from(a[c * d * d + i * d + t] * a[c * d * d + j * d + t])
                                    / 100.0
                            })
                            .sum();
                        cov[c * d * d + i * d + j] = s + if i == j { 1.0 } else { 0.0 };
                    }
                }
            }
            let means = centres.iter().map(|&x| f64::from(x)).collect();
            let g = GaussianMixture::new(k, d, vec![0.2; k], means, cov).unwrap();
            for m in 1..=LANES {
                let data = rows(m, d, 10 + m as u64);
                let mut xt = [[0f32; LANES]; MAX_DIMS];
                transpose(&data, d, &mut xt);
                let xt = &xt[..d];
                let (lab, dist) = nearest(xt, &centres, d);
                let dt = dot(xt, &w);
                for l in 0..m {
                    let row = &data[l * d..(l + 1) * d];
                    let (j, e) = kmeans::nearest(row, &centres, d);
                    assert_eq!((lab[l], dist[l].to_bits()), (j, e.to_bits()));
                    let reference: f32 = row.iter().zip(&w).map(|(x, y)| x * y).sum();
                    assert_eq!(dt[l].to_bits(), reference.to_bits());
                    for c in 0..k {
                        let q = g.mahalanobis2_block(c, xt);
                        assert_eq!(q[l].to_bits(), g.mahalanobis2(c, row).to_bits());
                    }
                }
            }
        }
    }
}
