mod common;
use modalmap::cluster::select::{ClusterParams, PhaseCount};
use modalmap::cluster::Method;
use modalmap::pipeline::{map_stack, MapOptions};

#[test]
#[ignore]
fn explore_sample() {
    let field = modalmap::synth::sample_field().unwrap();
    for method in [Method::Poisson, Method::Gmm, Method::Kmeans] {
        for phases in [PhaseCount::Fixed(5), PhaseCount::Auto { max: 10 }] {
            let t0 = std::time::Instant::now();
            let o = MapOptions { cluster: ClusterParams { method, phases, ..Default::default() }, ..Default::default() }.check().unwrap();
            let r = map_stack(&field.stack, &o).unwrap();
            let s = common::score(&r.segmentation.labels, &field.truth);
            println!("{method:?} {phases:?} k={} acc={:.4} extra={} {:?}", r.clusters.k(), s.accuracy, s.extra_phases, t0.elapsed());
            for (i, (t, p)) in s.phases.iter().enumerate() {
                println!("   phase {} ({}): true {:.4} pred {:?}", i + 1, field.phase_names[i], t, p);
            }
            for n in &r.simplifications { println!("   {} ({:.3})", n.action, n.value); }
        }
    }
}

#[test]
#[ignore]
fn explore_timing() {
    use modalmap::prepare::prepare;
    let field = modalmap::synth::sample_field().unwrap();
    let o = MapOptions::default().check().unwrap();
    let t0 = std::time::Instant::now();
    let f = prepare(&field.stack, &modalmap::prepare::PrepareParams { stabilise: modalmap::prepare::Stabilise::None, dequantise: false, ..Default::default() }.check().unwrap()).unwrap();
    println!("prepare {:?}", t0.elapsed());
    let t0 = std::time::Instant::now();
    let cp = ClusterParams::default().check().unwrap();
    let fit = modalmap::cluster::select::fit(&f, &cp).unwrap();
    println!("fit {:?} k={}", t0.elapsed(), fit.clusters.k());
    if let modalmap::cluster::Clusters::Poisson { model } = &fit.clusters { println!("iters {}", model.iterations); }
    let t0 = std::time::Instant::now();
    let r = map_stack(&field.stack, &o).unwrap();
    println!("all {:?} {}", t0.elapsed(), r.clusters.k());
}
