//! Kernel benchmarks: the machine's streaming read bandwidth, one k-means assignment pass
//! (the cost of a Lloyd iteration), one Gaussian-mixture EM iteration, one Poisson-mixture
//! EM iteration, and the labelling pass (most probable phase of every pixel), on 1, 4 and
//! 16 Mpixel × 5, 10, 20 dimensions × k = 4, 8, 16.
//!
//!     cargo bench --bench kernels                      # the whole grid (about 40 min)
//!     MODALMAP_BENCH_PIXELS=1 cargo bench --bench kernels   # only the 1-Mpixel rows
//!     python3 benches/kernel_table.py                  # the table for performance.md
//!
//! Each benchmark declares the bytes of data it reads, so criterion prints the achieved
//! bandwidth; `kernel_table.py` divides it by the measured read bandwidth.
//!
//! Data: `k_true = 8` Gaussian blobs in d dimensions (seeded), f32, pixel-major, as the
//! pipeline holds features. Models start from seeded rows of the data, so every run does
//! the same arithmetic.

use std::hint::black_box;
use std::time::Duration;

use criterion::{
    criterion_group, criterion_main, BenchmarkId, Criterion, SamplingMode, Throughput,
};
use modalmap::cluster::gmm::{self, GaussianMixture};
use modalmap::cluster::kmeans;
use modalmap::cluster::poisson::{self, PoissonMixture};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal, Poisson};
use rayon::prelude::*;

const DIMS: [usize; 3] = [5, 10, 20];
const KS: [usize; 3] = [4, 8, 16];
const ROWS_PER_SEED: usize = 1 << 16;

fn pixel_counts() -> Vec<usize> {
    let all = [1usize, 4, 16];
    match std::env::var("MODALMAP_BENCH_PIXELS") {
        Ok(v) => v
            .split(',')
            .filter_map(|s| s.trim().parse().ok())
            .filter(|m| all.contains(m))
            .map(|m| m << 20)
            .collect(),
        Err(_) => all.iter().map(|m| m << 20).collect(),
    }
}

/// `n` rows of `d` values from 8 classes: `class_params` draws each class's `d`
/// parameters (seed `seed`), `value(rng, class, param)` one value. Block `b` of rows is
/// seeded `block_seed + b`, so generation runs in parallel and does not depend on the
/// thread count.
fn class_rows(
    n: usize,
    d: usize,
    (seed, block_seed): (u64, u64),
    class_params: impl Fn(&mut ChaCha8Rng) -> f64,
    value: impl Fn(&mut ChaCha8Rng, usize, f64) -> f32 + Sync,
) -> Vec<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let params: Vec<f64> = (0..8 * d).map(|_| class_params(&mut rng)).collect();
    let mut data = vec![0f32; n * d];
    data.par_chunks_mut(ROWS_PER_SEED * d)
        .enumerate()
        .for_each(|(b, block)| {
            let mut rng = ChaCha8Rng::seed_from_u64(block_seed + b as u64);
            for row in block.chunks_exact_mut(d) {
                let c = rng.random_range(0..8);
                for (j, x) in row.iter_mut().enumerate() {
                    *x = value(&mut rng, c, params[c * d + j]);
                }
            }
        });
    data
}

/// Rows from 8 well-separated Gaussian blobs (means 0..40, sd 1..3).
fn gaussian_rows(n: usize, d: usize) -> Vec<f32> {
    let unit = Normal::new(0.0f32, 1.0).unwrap();
    class_rows(
        n,
        d,
        (11, 1000),
        |rng| rng.random_range(0.0..40.0),
        |rng, c, mean| mean as f32 + (1.0 + (c % 3) as f32) * unit.sample(rng),
    )
}

/// Counts from 8 Poisson phases with rates 0.5..40 per pixel and element.
fn count_rows(n: usize, d: usize) -> Vec<f32> {
    class_rows(
        n,
        d,
        (12, 2000),
        |rng| rng.random_range(0.5..40.0),
        |rng, _, rate| Poisson::new(rate).unwrap().sample(rng) as f32,
    )
}

/// `k` seeded rows of `data` as starting centres.
fn seeded_rows(data: &[f32], d: usize, k: usize) -> Vec<f32> {
    let n = data.len() / d;
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    (0..k)
        .flat_map(|_| {
            let r = rng.random_range(0..n);
            data[r * d..(r + 1) * d].to_vec()
        })
        .collect()
}

fn start_gmm(data: &[f32], d: usize, k: usize) -> GaussianMixture {
    let means = seeded_rows(data, d, k)
        .iter()
        .map(|&x| f64::from(x))
        .collect();
    let mut cov = vec![0.0; k * d * d];
    for c in 0..k {
        for i in 0..d {
            cov[c * d * d + i * d + i] = 4.0;
        }
    }
    GaussianMixture::new(k, d, vec![1.0 / k as f64; k], means, cov).unwrap()
}

fn start_poisson(data: &[f32], d: usize, k: usize) -> PoissonMixture {
    let rates = seeded_rows(data, d, k)
        .iter()
        .map(|&x| f64::from(x) + 0.5)
        .collect();
    PoissonMixture::new(k, d, vec![1.0 / k as f64; k], rates)
}

fn configure(
    g: &mut criterion::BenchmarkGroup<'_, criterion::measurement::WallTime>,
    bytes: usize,
) {
    g.sampling_mode(SamplingMode::Flat)
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3))
        .throughput(Throughput::Bytes(bytes as u64));
}

/// Streaming read with both cores: the bound every pass over the data meets. 1 GiB is
/// beyond every cache of the machine (DRAM bandwidth); 32 MiB stays in its last-level
/// cache, as the 1-Mpixel kernel data do. Sixteen independent lanes per accumulator, so
/// the sum vectorises.
fn bandwidth(c: &mut Criterion) {
    let mut g = c.benchmark_group("bandwidth");
    for (name, bytes) in [("read_1GiB", 1usize << 30), ("read_32MiB", 32 << 20)] {
        let n = bytes / 4;
        let data: Vec<f32> = (0..n).into_par_iter().map(|i| (i % 7) as f32).collect();
        configure(&mut g, bytes);
        g.bench_function(name, |b| {
            b.iter(|| {
                let s: f32 = data
                    .par_chunks(1 << 18)
                    .map(|chunk| {
                        let mut acc = [0f32; 16];
                        for v in chunk.chunks_exact(16) {
                            for l in 0..16 {
                                acc[l] += v[l];
                            }
                        }
                        acc.iter().sum::<f32>()
                    })
                    .sum();
                black_box(s)
            })
        });
    }
    g.finish();
}

fn label(n: usize, d: usize, k: usize) -> String {
    format!("{}Mpx/d{d}/k{k}", n >> 20)
}

/// One benchmark group over the grid: for every pixel count and dimension, `data(n, d)`
/// rows, and for every k a model `start(rows, d, k)` that `pass(model, rows, k)` runs one
/// pass with.
fn iteration_grid<M>(
    c: &mut Criterion,
    group: &str,
    data: fn(usize, usize) -> Vec<f32>,
    start: impl Fn(&[f32], usize, usize) -> M,
    pass: impl Fn(&M, &[f32], usize),
) {
    for n in pixel_counts() {
        for d in DIMS {
            let rows = data(n, d);
            let mut g = c.benchmark_group(group);
            configure(&mut g, n * d * 4);
            for k in KS {
                let model = start(&rows, d, k);
                g.bench_with_input(BenchmarkId::from_parameter(label(n, d, k)), &k, |b, &k| {
                    b.iter(|| pass(&model, &rows, k))
                });
            }
            g.finish();
        }
    }
}

fn kmeans_iteration(c: &mut Criterion) {
    iteration_grid(
        c,
        "kmeans_iteration",
        gaussian_rows,
        seeded_rows,
        |centres, rows, k| {
            black_box(kmeans::assign_pass(rows, centres.len() / k, centres, k));
        },
    );
}

fn gmm_iteration(c: &mut Criterion) {
    iteration_grid(
        c,
        "gmm_em_iteration",
        gaussian_rows,
        start_gmm,
        |g, rows, _| {
            black_box(gmm::em_step(g, rows, 1e-6).unwrap());
        },
    );
}

fn poisson_iteration(c: &mut Criterion) {
    iteration_grid(
        c,
        "poisson_em_iteration",
        count_rows,
        start_poisson,
        |m, rows, _| {
            black_box(poisson::em_step(m, rows));
        },
    );
}

/// The labelling pass of `apply` without its spatial steps: the most probable phase of
/// every pixel (d = 10, the bench's middle case).
fn labelling_pass(c: &mut Criterion) {
    let d = 10;
    for n in pixel_counts() {
        let data = gaussian_rows(n, d);
        let mut g = c.benchmark_group("label_pass");
        configure(&mut g, n * d * 4);
        for k in KS {
            let km = kmeans::KMeans {
                k,
                d,
                centroids: seeded_rows(&data, d, k)
                    .iter()
                    .map(|&x| f64::from(x))
                    .collect(),
                inertia: 0.0,
                iterations: 0,
            };
            g.bench_with_input(BenchmarkId::new("kmeans", label(n, d, k)), &k, |b, _| {
                b.iter(|| black_box(km.predict(&data)))
            });
            let gm = start_gmm(&data, d, k);
            g.bench_with_input(BenchmarkId::new("gmm", label(n, d, k)), &k, |b, _| {
                b.iter(|| black_box(gm.predict(&data)))
            });
        }
        g.finish();
    }
}

criterion_group!(
    kernels,
    bandwidth,
    kmeans_iteration,
    gmm_iteration,
    poisson_iteration,
    labelling_pass
);
criterion_main!(kernels);
