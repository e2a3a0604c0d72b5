//! Calibration of the uncertainties the report prints, against many independent fields of
//! one material from the independent forward model (tests/support): a steel whose carbides
//! are a Boolean model of discs, so that the population area fraction is known in closed
//! form and every seed is an independent sample of the material.
//!
//! Thresholds, fixed before measuring (the criteria):
//! - a 95 % interval must contain the population area fraction in 90–99 % of the fields
//!   (fewer: intervals too narrow, the report overstates its precision; more: too wide);
//! - composition z-scores, (reported − expected) / reported σ over every detected element
//!   of every phase and field, must have an RMS within [0.5, 1.5] (outside, the printed ±
//!   is at least a factor 1.5 too small or 2 too large);
//! - merge's 95 % interval over batches of five fields, likewise 90–99 % coverage.
//!
//! The expected composition is the forward model's `apparent` one (the truth weighted by
//! its ±3 % matrix factors: the tool makes no matrix correction and says so).

mod support;

use support::run_ok;

use std::path::{Path, PathBuf};

use support::scenarios::{boolean_fraction, boolean_steel};

/// Field size, disc radius and centres per pixel: about 20 % carbide (common practice,
/// no source: a typical modal fraction, discs large enough to be interior-rich).
const SIZE: usize = 128;
const RADIUS: f64 = 5.0;
const PER_PX: f64 = 0.00284;

fn json(path: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap()
}

/// Writes `n` fields (seeds 1000..) under `dir`, fits a model on the first and applies it
/// to all with the k-factors; returns the output folder of each field.
fn labelled_fields(dir: &Path, n: usize) -> Vec<PathBuf> {
    let fields: Vec<PathBuf> = (0..n)
        .map(|i| {
            let f = dir.join(format!("fields/f{i:03}"));
            boolean_steel(SIZE, RADIUS, PER_PX, 1000 + i as u64).write(&f);
            f
        })
        .collect();
    let k = dir.join("k.toml");
    std::fs::write(&k, boolean_steel(SIZE, RADIUS, PER_PX, 1000).kfactors()).unwrap();
    let model = dir.join("model.json");
    run_ok(&[
        "fit",
        fields[0].to_str().unwrap(),
        "-o",
        model.to_str().unwrap(),
        "--quiet",
    ]);
    let out = dir.join("out");
    let mut args = vec!["apply", model.to_str().unwrap()];
    args.extend(fields.iter().map(|f| f.to_str().unwrap()));
    args.extend([
        "-o",
        out.to_str().unwrap(),
        "--kfactors",
        k.to_str().unwrap(),
        "--no-bse",
        "--quiet",
    ]);
    run_ok(&args);
    (0..n).map(|i| out.join(format!("f{i:03}"))).collect()
}

/// The report entry of the phase richest (`richest`) or poorest in Cr: the carbide or
/// the matrix.
fn by_chromium(report: &serde_json::Value, richest: bool) -> serde_json::Value {
    let cr = |p: &serde_json::Value| p["composition_wt"]["Cr"].as_f64().unwrap_or(0.0);
    let phases = report["phases"].as_array().unwrap().iter();
    if richest {
        phases.max_by(|a, b| cr(a).total_cmp(&cr(b)))
    } else {
        phases.min_by(|a, b| cr(a).total_cmp(&cr(b)))
    }
    .unwrap()
    .clone()
}

/// The carbide's report entry.
fn carbide(report: &serde_json::Value) -> serde_json::Value {
    by_chromium(report, true)
}

fn coverage(hits: usize, n: usize, what: &str) {
    let share = hits as f64 / n as f64;
    eprintln!("{what}: {hits} of {n} intervals cover the population value ({share:.3})");
    assert!(
        (0.90..=0.99).contains(&share),
        "{what}: {hits} of {n} 95 % intervals cover the population value"
    );
}

#[test]
fn printed_uncertainties_are_calibrated() {
    let tmp = tempfile::tempdir().unwrap();
    let n = 250;
    let outs = labelled_fields(tmp.path(), n);
    let population = boolean_fraction(RADIUS, PER_PX);
    let scenario = boolean_steel(SIZE, RADIUS, PER_PX, 1000);

    // Area intervals of each field.
    let reports: Vec<serde_json::Value> =
        outs.iter().map(|o| json(&o.join("report.json"))).collect();
    let hits = reports
        .iter()
        .filter(|r| {
            let ci = &carbide(r)["area_fraction_ci95"];
            let (lo, hi) = (ci[0].as_f64().unwrap(), ci[1].as_f64().unwrap());
            (lo..=hi).contains(&population)
        })
        .count();
    coverage(hits, n, "area of one field");

    // Composition z-scores.
    let mut z = Vec::new();
    let mut by_element = std::collections::BTreeMap::new();
    for r in &reports {
        for (phase, entry) in [(0usize, by_chromium(r, false)), (1, carbide(r))] {
            let apparent = scenario.apparent(phase);
            for (el, c) in &apparent {
                if *c < 0.005 || entry["composition_wt"][el.as_str()].is_null() {
                    continue;
                }
                let got = entry["composition_wt"][el.as_str()].as_f64().unwrap();
                let sd = entry["composition_wt_sd"][el.as_str()].as_f64().unwrap();
                z.push((got - 100.0 * c) / sd);
                by_element
                    .entry(format!("{phase}:{el}"))
                    .or_insert_with(Vec::new)
                    .push((got - 100.0 * c) / sd);
            }
        }
    }
    for (el, v) in &by_element {
        let m = v.iter().sum::<f64>() / v.len() as f64;
        let r = (v.iter().map(|x| x * x).sum::<f64>() / v.len() as f64).sqrt();
        eprintln!(
            "  phase:element {el}: mean z {m:.3}, RMS {r:.3} over {}",
            v.len()
        );
    }
    let rms = (z.iter().map(|v| v * v).sum::<f64>() / z.len() as f64).sqrt();
    let mean = z.iter().sum::<f64>() / z.len() as f64;
    eprintln!(
        "composition z-scores: {} values, RMS {rms:.3}, mean {mean:.3}",
        z.len()
    );
    assert!(z.len() >= n, "{} z-scores", z.len());
    assert!(
        (0.5..=1.5).contains(&rms),
        "composition z-scores: RMS {rms:.3}, mean {mean:.3}"
    );

    // merge over batches of five fields.
    let batches = n / 5;
    let mut hits = 0;
    for b in 0..batches {
        let summary = tmp.path().join(format!("summary{b}"));
        let mut args = vec!["merge"];
        args.extend(outs[5 * b..5 * b + 5].iter().map(|o| o.to_str().unwrap()));
        args.extend(["-o", summary.to_str().unwrap(), "--quiet"]);
        run_ok(&args);
        let s = json(&summary.join("summary.json"));
        let p = s["phases"]
            .as_array()
            .unwrap()
            .iter()
            .find(|p| p["name"] == carbide(&reports[5 * b])["name"])
            .unwrap()
            .clone();
        let ci = &p["area_fraction_ci95"];
        if (ci[0].as_f64().unwrap()..=ci[1].as_f64().unwrap()).contains(&population) {
            hits += 1;
        }
    }
    coverage(hits, batches, "merge of five fields");
}
