//! Our k-means and Gaussian-mixture kernels against linfa-clustering 0.8, a general-purpose
//! reference implementation from crates.io: on well-separated data both must find the same
//! partition, and ours must fit at least as well (inertia no higher, log-likelihood no
//! lower, within a small tolerance).

use linfa::prelude::*;
use linfa_clustering::{GaussianMixtureModel, KMeans as LinfaKMeans};
use modalmap::cluster::gmm::{self, GaussianMixture, GmmParams};
use modalmap::cluster::kmeans::{self, KMeansParams};
use ndarray::Array2;
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

/// Four blobs in 3-D of unequal sizes and shapes, far apart.
fn blobs() -> (Vec<f32>, Array2<f64>) {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(77);
    let n01 = Normal::new(0.0f64, 1.0).unwrap();
    let specs: [([f64; 3], [f64; 3], usize); 4] = [
        ([0.0, 0.0, 0.0], [1.0, 0.5, 0.7], 2500),
        ([12.0, 0.0, 3.0], [0.6, 1.5, 0.5], 800),
        ([0.0, 14.0, -4.0], [1.2, 1.0, 2.0], 400),
        ([10.0, 12.0, 10.0], [0.5, 0.5, 0.5], 300),
    ];
    let mut rows = Vec::new();
    for (mean, sd, n) in specs {
        for _ in 0..n {
            let a = n01.sample(&mut rng);
            for j in 0..3 {
                // A shared term makes the blobs correlated (tilted ellipsoids).
                rows.push(mean[j] + sd[j] * (0.6 * n01.sample(&mut rng) + 0.8 * a));
            }
        }
    }
    let f32s = rows.iter().map(|&v| v as f32).collect();
    let arr = Array2::from_shape_vec((rows.len() / 3, 3), rows).unwrap();
    (f32s, arr)
}

/// Fraction of points on which two labelings agree after the best one-to-one matching.
fn agreement(a: &[usize], b: &[usize]) -> f64 {
    let pred: Vec<u16> = a.iter().map(|&x| x as u16 + 1).collect();
    let truth: Vec<u16> = b.iter().map(|&x| x as u16 + 1).collect();
    modalmap::synth::agreement(&pred, &truth)
}

fn inertia(data: &Array2<f64>, centres: &Array2<f64>) -> f64 {
    data.rows()
        .into_iter()
        .map(|r| {
            centres
                .rows()
                .into_iter()
                .map(|c| {
                    r.iter()
                        .zip(c.iter())
                        .map(|(x, y)| (x - y).powi(2))
                        .sum::<f64>()
                })
                .fold(f64::INFINITY, f64::min)
        })
        .sum()
}

#[test]
fn kmeans_matches_linfa() {
    let (rows, arr) = blobs();
    let ours = kmeans::fit(
        &rows,
        3,
        &KMeansParams {
            k: 4,
            n_init: 4,
            max_iter: 300,
            tol: 1e-6,
        }
        .check()
        .unwrap(),
        modalmap::cluster::Seed(5),
    );
    let ds = DatasetBase::from(arr.clone());
    let theirs = LinfaKMeans::params(4)
        .n_runs(4)
        .tolerance(1e-6)
        .max_n_iterations(300)
        .fit(&ds)
        .unwrap();
    let their_labels: Vec<usize> = theirs.predict(&arr).to_vec();
    let our_labels: Vec<usize> = ours.predict(&rows).iter().map(|&l| l as usize).collect();
    assert_eq!(agreement(&our_labels, &their_labels), 1.0, "same partition");
    let our_centres = Array2::from_shape_vec((4, 3), ours.centroids.clone()).unwrap();
    let (i_ours, i_theirs) = (
        inertia(&arr, &our_centres),
        inertia(&arr, theirs.centroids()),
    );
    assert!(
        i_ours <= i_theirs * 1.0001,
        "inertia {i_ours} vs linfa {i_theirs}"
    );
}

#[test]
fn gaussian_mixture_matches_linfa() {
    let (rows, arr) = blobs();
    let km = kmeans::fit(
        &rows,
        3,
        &KMeansParams {
            k: 4,
            n_init: 4,
            max_iter: 300,
            tol: 1e-6,
        }
        .check()
        .unwrap(),
        modalmap::cluster::Seed(5),
    );
    let ours = gmm::fit(
        &rows,
        3,
        &km.predict(&rows),
        &GmmParams {
            k: 4,
            max_iter: 500,
            tol: 1e-8,
            reg_covar: 1e-6,
        }
        .check()
        .unwrap(),
    )
    .unwrap();
    let ds = DatasetBase::from(arr.clone());
    let theirs = GaussianMixtureModel::params(4)
        .n_runs(1)
        .tolerance(1e-8)
        .max_n_iterations(500)
        .reg_covariance(1e-6)
        .fit(&ds)
        .unwrap();
    let their_labels: Vec<usize> = theirs.predict(&arr).to_vec();
    let our_labels: Vec<usize> = ours.predict(&rows).iter().map(|&l| l as usize).collect();
    assert!(
        agreement(&our_labels, &their_labels) >= 0.999,
        "same partition"
    );
    // linfa's fitted parameters, scored with the same log-likelihood code as ours.
    let as_theirs = GaussianMixture::new(
        4,
        3,
        theirs.weights().to_vec(),
        theirs.means().iter().copied().collect(),
        theirs.covariances().iter().copied().collect(),
    )
    .unwrap();
    let (ll_ours, ll_theirs) = (ours.score(&rows), as_theirs.score(&rows));
    assert!(
        ll_ours >= ll_theirs - 1e-3,
        "log-likelihood {ll_ours} vs linfa {ll_theirs}"
    );
    // And the mixtures themselves agree: each of our means has a linfa mean within 0.05.
    for m in ours.means.chunks(3) {
        let near = theirs
            .means()
            .rows()
            .into_iter()
            .any(|t| t.iter().zip(m).all(|(a, b)| (a - b).abs() < 0.05));
        assert!(
            near,
            "mean {m:?} has no match in linfa's {:?}",
            theirs.means()
        );
    }
}
