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

#[path = "accuracy.rs"]
#[allow(dead_code)]
mod acc;

#[test]
#[ignore]
fn explore_duplex_image() {
    let field = acc::duplex();
    let o = MapOptions { cluster: ClusterParams { phases: PhaseCount::Auto { max: 8 }, ..Default::default() }, ..Default::default() }.check().unwrap();
    let r = map_stack(&field.stack, &o).unwrap();
    let w = field.stack.width();
    let h = field.stack.height();
    let s = common::score(&r.segmentation.labels, &field.truth);
    let map: std::collections::HashMap<u16, u16> = s.mapping.iter().cloned().collect();
    let mut rgb = vec![0u8; w * h * 3 * 2];
    for y in 0..h { for x in 0..w {
        let t = field.truth[y * w + x];
        let p = map.get(&r.segmentation.labels[y * w + x]).copied().unwrap_or(9);
        let col = |l: u16| modalmap::report::draw::colour(l);
        let i = (y * 2 * w + x) * 3;
        rgb[i..i + 3].copy_from_slice(&col(t));
        let j = (y * 2 * w + w + x) * 3;
        rgb[j..j + 3].copy_from_slice(&if p == t { col(p) } else { [255, 0, 0] });
    }}
    modalmap::io::raster::write_png_rgb(std::path::Path::new("/tmp/duplex.png"), 2 * w, h, &rgb).unwrap();
    println!("acc {}", s.accuracy);
}
