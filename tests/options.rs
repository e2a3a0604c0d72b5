//! Each option that changes a result, in a successful run, with an assertion on its effect
//! that the option's documentation promises; and exit code 4 when an output cannot be
//! written. Fields come from the independent forward model (tests/support) or the bundled
//! sample.

mod support;

use std::path::Path;

use support::scenarios::{read_labels, steel, steel_with_inclusions};
use support::{map_field, run_ok};

/// Maps `field` into `out` with `extra` options, without a BSE image; returns report.json.
fn map(field: &Path, out: &Path, extra: &[&str]) -> serde_json::Value {
    map_field(field, out, &[extra, &["--no-bse"]].concat()).1
}

/// Sizes of the 8-connected features (same label, label > 0) of a label image.
fn feature_sizes(labels: &[u16], w: usize, h: usize) -> Vec<usize> {
    let mut seen = vec![false; labels.len()];
    let mut sizes = Vec::new();
    for start in 0..labels.len() {
        if seen[start] || labels[start] == 0 {
            continue;
        }
        let (mut stack, mut n) = (vec![start], 0);
        seen[start] = true;
        while let Some(i) = stack.pop() {
            n += 1;
            let (x, y) = ((i % w) as isize, (i / w) as isize);
            for (dx, dy) in (-1..=1).flat_map(|a| (-1..=1).map(move |b| (a, b))) {
                let (xx, yy) = (x + dx, y + dy);
                if xx < 0 || yy < 0 || xx >= w as isize || yy >= h as isize {
                    continue;
                }
                let j = yy as usize * w + xx as usize;
                if !seen[j] && labels[j] == labels[i] {
                    seen[j] = true;
                    stack.push(j);
                }
            }
        }
        sizes.push(n);
    }
    sizes
}

/// `--min-feature N`: no feature of fewer than N pixels is left (8-connected, as the
/// report counts features), where the same field without the option has some.
#[test]
fn min_feature_leaves_no_smaller_feature() {
    let s = steel_with_inclusions();
    let tmp = tempfile::tempdir().unwrap();
    let field = tmp.path().join("field");
    s.write(&field);
    let (w, h) = (s.width, s.height);
    map(&field, &tmp.path().join("plain"), &[]);
    let plain = feature_sizes(&read_labels(&tmp.path().join("plain/labels.png")), w, h);
    let small = plain.iter().filter(|&&n| n < 40).count();
    assert!(
        small > 0,
        "the test field needs features under 40 px: {plain:?}"
    );
    let r = map(&field, &tmp.path().join("min"), &["--min-feature", "40"]);
    let sizes = feature_sizes(&read_labels(&tmp.path().join("min/labels.png")), w, h);
    assert!(
        sizes.iter().all(|&n| n >= 40),
        "features under 40 px left: {:?}",
        sizes.iter().filter(|&&n| n < 40).collect::<Vec<_>>()
    );
    assert_eq!(r["options"]["refine"]["min_feature_px"], 40);
}

/// `--min-counts C`: every pixel whose counts over all maps total less than C is left
/// unassigned (label 0), and those are about all the unassigned pixels.
#[test]
fn min_counts_leaves_the_pixels_below_it_unassigned() {
    let s = steel();
    let tmp = tempfile::tempdir().unwrap();
    let field = tmp.path().join("field");
    s.write(&field);
    let counts = s.counts();
    let totals: Vec<u32> = (0..s.width * s.height)
        .map(|i| counts.iter().map(|m| u32::from(m[i])).sum())
        .collect();
    let mut sorted = totals.clone();
    sorted.sort_unstable();
    // A threshold at the 20th percentile of the totals.
    let c = sorted[sorted.len() / 5];
    let r = map(
        &field,
        &tmp.path().join("out"),
        &["--min-counts", &c.to_string()],
    );
    let labels = read_labels(&tmp.path().join("out/labels.png"));
    let below: Vec<usize> = (0..totals.len()).filter(|&i| totals[i] < c).collect();
    assert!(below.len() > totals.len() / 10, "threshold {c} too low");
    let assigned_below = below.iter().filter(|&&i| labels[i] != 0).count();
    assert_eq!(
        assigned_below,
        0,
        "{assigned_below} of {} pixels under {c} counts were assigned",
        below.len()
    );
    let unassigned = r["unassigned_fraction"].as_f64().unwrap();
    let want = below.len() as f64 / totals.len() as f64;
    assert!(
        unassigned >= want && unassigned <= want + 0.005,
        "unassigned {unassigned:.4}, pixels under the threshold {want:.4}"
    );
}

/// Mass fractions in percent of `phase`'s composition_wt, by element.
fn wt(phase: &serde_json::Value, element: &str) -> f64 {
    phase["composition_wt"][element].as_f64().unwrap_or(0.0)
}

/// `--background none`: the continuum is not subtracted, so elements a phase lacks show up
/// in it (its continuum counts read as composition), and the default's compositions are
/// closer to what the forward model put in.
#[test]
fn background_none_leaves_the_continuum_in_the_compositions() {
    let s = steel();
    let tmp = tempfile::tempdir().unwrap();
    let field = tmp.path().join("field");
    s.write(&field);
    let with = map(&field, &tmp.path().join("default"), &[]);
    let without = map(&field, &tmp.path().join("none"), &["--background", "none"]);
    // Ferrite (the largest phase) holds no C, O, Al, S or Cr.
    let ferrite = |r: &serde_json::Value| {
        r["phases"]
            .as_array()
            .unwrap()
            .iter()
            .max_by(|a, b| {
                a["area_fraction"]
                    .as_f64()
                    .unwrap()
                    .total_cmp(&b["area_fraction"].as_f64().unwrap())
            })
            .unwrap()
            .clone()
    };
    let absent = |p: &serde_json::Value| -> f64 {
        ["C", "O", "Al", "S", "Cr"].iter().map(|e| wt(p, e)).sum()
    };
    let (a, b) = (absent(&ferrite(&with)), absent(&ferrite(&without)));
    println!("wt% of absent elements in ferrite: {a:.2} with the background, {b:.2} without");
    // The forward model puts a continuum of 0.03–0.04 counts per unit Z under the C, O,
    // Al, S and Cr maps (tests/support/scenarios.rs): with ferrite's Z of 26, 0.8–1.0
    // counts each, 4.3 in all, against about 66 counts over every map: 6.5 % of the
    // counts read as absent elements with unit k-factors; the threshold is half of that.
    assert!(
        b > a + 3.0,
        "without the background the ferrite should carry its continuum as C, O, Al, S and \
         Cr: {b:.2} wt% vs {a:.2} wt%"
    );
    let truth: f64 = 100.0 * s.apparent(0).iter().find(|e| e.0 == "Fe").unwrap().1;
    let (fe_with, fe_without) = (wt(&ferrite(&with), "Fe"), wt(&ferrite(&without), "Fe"));
    assert!(
        (fe_with - truth).abs() < (fe_without - truth).abs(),
        "Fe in ferrite: {fe_with:.2} with the background, {fe_without:.2} without, \
         true {truth:.2}"
    );
    assert_eq!(without["composition"]["options"]["background"], "none");
}

/// `--transform`: k-means works in the transform's units, so its centroids, taken back
/// through the inverse transform (√x squared; Anscombe's 2√(x + 3/8) as (c/2)² − 3/8,
/// Anscombe 1948), are the phases' mean counts, which the default model (the Poisson
/// mixture, in counts) holds as its rates: each within 10 % + 0.5 count (the mean of a
/// transform differs from the transform of the mean by Jensen's inequality, about 1/4
/// count for √x; common practice, no source for the margin).
#[test]
fn transform_sets_the_units_kmeans_works_in() {
    let tmp = tempfile::tempdir().unwrap();
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let centres = |method: &str, t: &str, key: &str| -> Vec<Vec<f64>> {
        let model = tmp.path().join(format!("{method}-{t}.json"));
        run_ok(&[
            "fit",
            sample.to_str().unwrap(),
            "-o",
            model.to_str().unwrap(),
            "--method",
            method,
            "--transform",
            t,
            "--quiet",
        ]);
        let m: serde_json::Value = serde_json::from_slice(&std::fs::read(&model).unwrap()).unwrap();
        assert_eq!(m["options"]["prepare"]["stabilise"], t);
        let d = m["clusters"]["model"]["d"].as_u64().unwrap() as usize;
        let flat: Vec<f64> = m["clusters"]["model"][key]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        let c: Vec<Vec<f64>> = flat.chunks(d).map(<[f64]>::to_vec).collect();
        c
    };
    let raw = centres("poisson", "none", "rates");
    for (t, inverse) in [
        ("sqrt", (|c: f64| c * c) as fn(f64) -> f64),
        ("anscombe", |c: f64| (c / 2.0).powi(2) - 0.375),
    ] {
        let back: Vec<Vec<f64>> = centres("kmeans", t, "centroids")
            .iter()
            .map(|c| c.iter().map(|&v| inverse(v)).collect())
            .collect();
        assert_eq!(back.len(), raw.len());
        // Each centroid taken back lies within the margin of a raw centroid, a different
        // one for each.
        let close =
            |b: &[f64], r: &[f64]| b.iter().zip(r).all(|(x, y)| (x - y).abs() <= 0.1 * y + 0.5);
        let mut used = vec![false; raw.len()];
        for b in &back {
            let j = (0..raw.len()).find(|&j| !used[j] && close(b, &raw[j]));
            let j = j.unwrap_or_else(|| {
                panic!("{t}: centroid {b:?} taken back matches none of the raw {raw:?}")
            });
            used[j] = true;
        }
    }
}

/// `--kv`: the beam energy overrides the field's, and sets the overvoltage of every line
/// (E0 / Ec with the K edge of Cu at 8.979 keV, X-ray Data Booklet Table 1-1); at 5 kV Cu
/// K is not excited, and the report says so.
#[test]
fn kv_sets_the_overvoltage_of_every_line() {
    let tmp = tempfile::tempdir().unwrap();
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let r = map(&sample, &tmp.path().join("out"), &["--kv", "5"]);
    assert_eq!(r["beam_kv"].as_f64(), Some(5.0));
    let cu = r["advisor"]["lines"]
        .as_array()
        .unwrap()
        .iter()
        .find(|l| l["element"] == "Cu")
        .unwrap()
        .clone();
    let u = cu["overvoltage"].as_f64().unwrap();
    assert!((u - 5.0 / 8.979).abs() < 1e-3, "Cu K overvoltage {u}");
    let messages = r["advisor"]["messages"].to_string();
    assert!(
        messages.contains("Cu K") && messages.contains("not excited"),
        "{messages}"
    );
    let at_field_kv = map(&sample, &tmp.path().join("default"), &[]);
    assert!(at_field_kv["beam_kv"].as_f64().unwrap() > 10.0);
    assert!(
        !at_field_kv["advisor"]["messages"]
            .to_string()
            .contains("not excited"),
        "{}",
        at_field_kv["advisor"]["messages"]
    );
}

/// A write that fails for want of room (a file-size limit of 64 kB, set by the shell with
/// `ulimit -f`, with SIGXFSZ ignored so that the write returns an error): exit code 4, a
/// message naming the output, and OUT not left half-written.
#[test]
fn a_failed_write_exits_4_and_leaves_no_output() {
    let tmp = tempfile::tempdir().unwrap();
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let out = tmp.path().join("out");
    let script = format!(
        "trap '' XFSZ; ulimit -f 128; exec '{}' map '{}' -o '{}' --quiet",
        env!("CARGO_BIN_EXE_modalmap"),
        sample.display(),
        out.display()
    );
    let r = std::process::Command::new("sh")
        .args(["-c", &script])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&r.stderr);
    assert_eq!(r.status.code(), Some(4), "{err}");
    // The file that could not be written, in the run's working folder beside OUT, and why.
    let named = tmp.path().join(".out.modalmap-tmp-");
    assert!(
        err.contains(named.to_str().unwrap()) && err.contains("could not be written"),
        "the message names no output file: {err}"
    );
    assert!(!err.contains("internal error"), "{err}");
    assert!(!out.exists(), "a half-written output was left: {out:?}");
    let left: Vec<_> = std::fs::read_dir(tmp.path()).unwrap().collect();
    assert!(left.is_empty(), "leftovers: {left:?}");
}
