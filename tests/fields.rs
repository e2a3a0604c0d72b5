//! Many fields: `fit` on three synthetic fields, `apply` to eight in four shards, `merge`,
//! against the generator's ground truth; the pooled statistics against scipy; failures.
//!
//! The fields are invented six-mineral rocks from `modalmap::synth::benchmark_rock`
//! (seeded), so every field has its own grains and the true labels are known.

mod common;

use std::path::{Path, PathBuf};

use common::{csv_rows, modalmap};
use modalmap::synth::{benchmark_rock, generate, match_labels, write_folder};

const SIZE: usize = 160;

/// Writes rock `seed` as a maps folder under `dir`; returns the folder and the truth.
fn rock(dir: &Path, seed: u64) -> (PathBuf, Vec<u16>) {
    let (micro, opts) = benchmark_rock(SIZE, seed);
    let field = generate(&micro, &opts).unwrap();
    let p = dir.join(format!("rock{seed:02}"));
    write_folder(&field, &p).unwrap();
    (p, field.truth)
}

fn s(p: &Path) -> String {
    p.display().to_string()
}

fn json(p: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

/// Field statistics as ASTM E562/E1245 write them, against numpy/scipy values
/// (tests/fixtures/stats/make_fixtures.py; includes the worked example of references.md
/// §7: 10, 12, 8, 11, 9 % → mean 10.0, s 1.581, t 2.776, CI ± 1.963, %RA 19.6).
#[test]
fn field_statistics_match_scipy() {
    let fx: serde_json::Value =
        serde_json::from_str(include_str!("fixtures/stats/field_statistics.json")).unwrap();
    for c in fx["cases"].as_array().unwrap() {
        let v: Vec<f64> = c["values"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        let (mean, sd, half, t) = modalmap::phases::mean_ci(&v);
        let close = |a: f64, key: &str| {
            let b = c[key].as_f64().unwrap();
            assert!(
                (a - b).abs() <= 1e-9 * b.abs().max(1.0),
                "{key}: {a} vs {b}"
            );
        };
        close(mean, "mean");
        close(sd, "sd");
        close(t, "t");
        close(half, "half_width");
        close(100.0 * half / mean, "relative_accuracy_pct");
    }
}

#[test]
fn fit_apply_in_shards_and_merge_match_the_truth() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let train: Vec<PathBuf> = (1..=3).map(|k| rock(d, k).0).collect();
    let fields: Vec<(PathBuf, Vec<u16>)> = (4..=11).map(|k| rock(d, k)).collect();
    let model = d.join("model.json");
    let mut args = vec!["fit".to_string()];
    args.extend(train.iter().map(|p| s(p)));
    args.extend(["-o".into(), s(&model)]);
    let refs: Vec<&str> = args.iter().map(String::as_str).collect();
    let r = modalmap(&refs);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let m = json(&model);
    assert_eq!(m["schema"], "modalmap.model/1");
    assert_eq!(m["phases"].as_array().unwrap().len(), 6, "six minerals");
    assert_eq!(m["training"].as_array().unwrap().len(), 3);

    // One machine, all fields; then four shards into another folder.
    let apply = |out: &Path, shard: Option<&str>| {
        let mut a = vec!["apply".to_string(), s(&model)];
        a.extend(fields.iter().map(|f| s(&f.0)));
        a.extend(["-o".into(), s(out)]);
        if let Some(sh) = shard {
            a.extend(["--shard".into(), sh.into(), "--quiet".into()]);
        }
        let refs: Vec<&str> = a.iter().map(String::as_str).collect();
        modalmap(&refs)
    };
    let (all, sharded) = (d.join("all"), d.join("sharded"));
    let r = apply(&all, None);
    assert_eq!(r.code, 0, "{}", r.stderr);
    // Standard error is a pipe here, as in a batch job's log: plain lines, one per field,
    // with the time left once a field is done.
    let lines: Vec<&str> = r.stderr.lines().collect();
    assert!(lines[0].ends_with("labelling 8 fields"), "{}", r.stderr);
    assert_eq!(lines.len(), 9, "{}", r.stderr);
    assert!(
        lines[1].contains(" 1/8 ") && lines[1].contains(": ok; about "),
        "{}",
        r.stderr
    );
    assert!(
        lines[8].contains(" 8/8 ") && lines[8].ends_with("all done"),
        "{}",
        r.stderr
    );
    for i in 1..=4 {
        let r = apply(&sharded, Some(&format!("{i}/4")));
        assert_eq!(r.code, 0, "{}", r.stderr);
        assert_eq!(r.stderr, "", "--quiet");
        let listed = json(&sharded.join(format!("apply-{i}-of-4.json")));
        assert_eq!(listed["fields"].as_array().unwrap().len(), 2);
    }
    let merge = |from: &Path, to: &Path| {
        let r = modalmap(&["merge", &s(from), "-o", &s(to)]);
        assert_eq!(r.code, 0, "{}", r.stderr);
        json(&to.join("summary.json"))
    };
    let one = merge(&all, &d.join("sum-all"));
    let four = merge(&sharded, &d.join("sum-sharded"));
    assert_eq!(one["phases"], four["phases"], "shards change nothing");
    assert_eq!(one["fields"].as_array().unwrap().len(), 8);
    check_spreadsheet_outputs(&d.join("sum-all"), &all, &one);
    // One field has no field-to-field spread: no interval, said as such, not a zero width.
    let first = all.join(fields[0].0.file_name().unwrap());
    let single = merge(&first, &d.join("sum-one"));
    for p in single["phases"].as_array().unwrap() {
        assert!(p["area_fraction_ci95"].is_null(), "{p}");
        assert!(p["relative_accuracy_pct"].is_null(), "{p}");
    }
    // A report of schema 1 (features were called particles) still merges, to the same.
    let old = d.join("old-report");
    std::fs::create_dir(&old).unwrap();
    for e in std::fs::read_dir(&first).unwrap() {
        let e = e.unwrap();
        std::fs::copy(e.path(), old.join(e.file_name())).unwrap();
    }
    let text = std::fs::read_to_string(old.join("report.json")).unwrap();
    assert!(text.contains("\"features\"") && text.contains("modalmap.report/2"));
    let v1 = text
        .replace("\"features\"", "\"particles\"")
        .replace("modalmap.report/2", "modalmap.report/1");
    std::fs::write(old.join("report.json"), v1).unwrap();
    let from_v1 = merge(&old, &d.join("sum-old"));
    assert_eq!(from_v1["phases"], single["phases"]);
    assert!(single["phases"][0]["features"].as_u64().unwrap() > 0);
    let html = std::fs::read_to_string(d.join("sum-one/summary.html")).unwrap();
    assert!(html.contains("undefined (one field)"));
    assert!(
        html.contains("one field: its counting σ is in its report"),
        "{html}"
    );
    let csv = csv_rows(&std::fs::read_to_string(d.join("sum-one/summary.csv")).unwrap());
    let sd = csv[0].iter().position(|c| c == "area_pct_sd").unwrap();
    assert!(
        csv[1..].iter().all(|r| r[sd].is_empty()),
        "no SD of one field"
    );

    // Per model phase: the true area fraction of the truth phase it covers, field by
    // field, against the pooled mean and its interval.
    let k = one["phases"].as_array().unwrap().len();
    let mut truth = vec![Vec::new(); k];
    let mut labelled = vec![Vec::new(); k];
    for (path, t) in &fields {
        let name = path.file_name().unwrap().to_string_lossy().into_owned();
        let img =
            modalmap::io::read_raster(&all.join(&name).join("labels.png"), &Default::default())
                .unwrap();
        let pred: Vec<u16> = img.data.iter().map(|&v| v as u16).collect();
        let map = match_labels(&pred, t);
        let n = t.len() as f64;
        for id in 1..=k {
            let tl = map.get(id).copied().flatten();
            truth[id - 1]
                .push(tl.map_or(0.0, |tl| t.iter().filter(|&&x| x == tl).count() as f64 / n));
            labelled[id - 1].push(pred.iter().filter(|&&x| x as usize == id).count() as f64 / n);
        }
    }
    for (i, p) in one["phases"].as_array().unwrap().iter().enumerate() {
        let mean = p["area_fraction_mean"].as_f64().unwrap();
        let [lo, hi] = [0, 1].map(|j| p["area_fraction_ci95"][j].as_f64().unwrap());
        // The summary's numbers are the field statistics of the labelled fractions.
        let (m, sd, half, _) = modalmap::phases::mean_ci(&labelled[i]);
        assert!(
            (m - mean).abs() < 1e-9 && (sd - p["area_fraction_sd"].as_f64().unwrap()).abs() < 1e-9
        );
        assert!((lo - (m - half).max(0.0)).abs() < 1e-9 && (hi - (m + half)).abs() < 1e-9);
        // And they match the truth within the interval.
        let true_mean = truth[i].iter().sum::<f64>() / truth[i].len() as f64;
        assert!(
            true_mean >= lo && true_mean <= hi && (true_mean - mean).abs() < 0.01,
            "phase {} ({}): truth {true_mean:.4}, pooled {mean:.4} [{lo:.4}, {hi:.4}]",
            p["id"],
            p["name"]
        );
    }
}

#[test]
fn a_bad_field_fails_alone_and_models_are_checked() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let (a, _) = rock(d, 21);
    let (b, _) = rock(d, 22);
    let model = d.join("model.json");
    let r = modalmap(&["fit", &s(&a), "-o", &s(&model), "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    // Refit over an existing model needs --force.
    let r = modalmap(&["fit", &s(&a), "-o", &s(&model)]);
    assert_eq!(r.code, 4, "{}", r.stderr);

    // The sample field has other elements: it fails, the rock is done, exit code 5.
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let out = d.join("out");
    let r = modalmap(&[
        "apply",
        &s(&model),
        &s(&sample),
        &s(&b),
        "-o",
        &s(&out),
        "--quiet",
    ]);
    assert_eq!(r.code, 5, "{}", r.stderr);
    assert!(
        r.stderr.contains("sample-maps") && r.stderr.contains("elements"),
        "{}",
        r.stderr
    );
    let listed = json(&out.join("apply.json"));
    let f = listed["fields"].as_array().unwrap();
    assert_eq!(
        (f[0]["status"].as_str(), f[1]["status"].as_str()),
        (Some("failed"), Some("ok"))
    );
    assert!(out.join("rock22/report.json").is_file() && !out.join("sample-maps").exists());
    let rep = json(&out.join("rock22/report.json"));
    assert_eq!(rep["model"]["schema"], "modalmap.model/1");

    // Options the model fixes are refused.
    let r = modalmap(&[
        "apply",
        &s(&model),
        &s(&b),
        "-o",
        &s(&d.join("o2")),
        "--phases",
        "3",
    ]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("--phases"));
    // A model of another schema version.
    let mut m = json(&model);
    m["schema"] = "modalmap.model/2".into();
    let other = d.join("other.json");
    std::fs::write(&other, m.to_string()).unwrap();
    let r = modalmap(&["apply", &s(&other), &s(&b), "-o", &s(&d.join("o3"))]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("other.json") && r.stderr.contains("modalmap.model/1"));
    // A truncated model file, and one whose phases do not match its clusters.
    let text = std::fs::read_to_string(&model).unwrap();
    std::fs::write(&other, &text[..text.len() / 2]).unwrap();
    let r = modalmap(&["apply", &s(&other), &s(&b), "-o", &s(&d.join("o4"))]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("other.json") && r.stderr.contains("fix: "));
    let mut m = json(&model);
    m["phases"].as_array_mut().unwrap().pop();
    std::fs::write(&other, m.to_string()).unwrap();
    let r = modalmap(&["apply", &s(&other), &s(&b), "-o", &s(&d.join("o5"))]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("inconsistent"), "{}", r.stderr);
    assert!(!d.join("o3").exists() && !d.join("o4").exists() && !d.join("o5").exists());

    // merge refuses a `map` output, and fields of two models.
    let mapped = d.join("mapped");
    let r = modalmap(&["map", &s(&b), "-o", &s(&mapped), "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = modalmap(&["merge", &s(&mapped), "-o", &s(&d.join("s1"))]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    let model2 = d.join("model2.json");
    assert_eq!(
        modalmap(&["fit", &s(&b), "-o", &s(&model2), "--quiet"]).code,
        0
    );
    let out2 = d.join("out2");
    assert_eq!(
        modalmap(&["apply", &s(&model2), &s(&a), "-o", &s(&out2), "--quiet"]).code,
        0
    );
    let r = modalmap(&["merge", &s(&out), &s(&out2), "-o", &s(&d.join("s2"))]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("another model"), "{}", r.stderr);
    assert!(!d.join("s2").exists(), "nothing written");
}

/// A field labelled strip by strip (`apply --stream`, strips of 32 rows with their halo)
/// gets exactly the labels, phase image and numbers of the same field loaded whole.
#[test]
fn streamed_montage_matches_the_in_memory_path() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let (train, _) = rock(d, 31);
    let model = d.join("model.json");
    assert_eq!(
        modalmap(&["fit", &s(&train), "-o", &s(&model), "--quiet"]).code,
        0
    );
    // 360 rows: more than a strip and two halos (115 rows each with these options).
    let (micro, opts) = benchmark_rock(360, 32);
    let big = d.join("big");
    write_folder(&generate(&micro, &opts).unwrap(), &big).unwrap();
    let (whole, strips) = (d.join("whole"), d.join("strips"));
    let r = modalmap(&["apply", &s(&model), &s(&big), "-o", &s(&whole), "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = modalmap(&[
        "apply",
        &s(&model),
        &s(&big),
        "-o",
        &s(&strips),
        "--stream",
        "--strip-rows",
        "32",
        "--quiet",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    for f in ["labels.png", "phase-map.png"] {
        assert_eq!(
            std::fs::read(whole.join("big").join(f)).unwrap(),
            std::fs::read(strips.join("big").join(f)).unwrap(),
            "{f} differs"
        );
    }
    let (a, b) = (
        json(&whole.join("big/report.json")),
        json(&strips.join("big/report.json")),
    );
    assert_eq!(a["unassigned"], b["unassigned"]);
    for (p, q) in a["phases"]
        .as_array()
        .unwrap()
        .iter()
        .zip(b["phases"].as_array().unwrap())
    {
        for key in [
            "pixels",
            "features",
            "area_fraction",
            "area_fraction_ci95",
            "mean",
            "sd",
            "composition_pixels",
            "composition_wt",
            "composition_wt_sd",
        ] {
            assert_eq!(p[key], q[key], "phase {} {key}", p["id"]);
        }
    }
    assert!(b.get("bse").is_none() && b["model"].is_object());
    // The streamed report says what it leaves out and why; the whole field's has it all.
    let page = |dir: &Path| std::fs::read_to_string(dir.join("big/report.html")).unwrap();
    let (whole_html, strips_html) = (page(&whole), page(&strips));
    assert!(
        strips_html.contains("Left out of this report"),
        "streamed page"
    );
    assert!(
        strips_html.contains("labelled strip by strip")
            && !strips_html.contains("<h2>Element maps")
    );
    assert!(
        !whole_html.contains("Left out of this report") && whole_html.contains("<h2>Element maps")
    );
}

/// The same for an HDF5 file with chunked, compressed 2-D datasets (one per element),
/// read a window of rows at a time.
#[test]
fn streamed_hdf5_montage_matches_the_in_memory_path() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let (train, _) = rock(d, 41);
    let model = d.join("model.json");
    assert_eq!(
        modalmap(&["fit", &s(&train), "-o", &s(&model), "--quiet"]).code,
        0
    );
    let (micro, opts) = benchmark_rock(300, 42);
    let field = generate(&micro, &opts).unwrap();
    let (w, h) = (field.stack.width(), field.stack.height());
    let mut b = hdf5_pure::FileBuilder::new();
    for m in field.stack.maps() {
        let v: Vec<u16> = m.counts.iter().map(|&c| c as u16).collect();
        b.create_dataset(&format!("{}_Ka", m.element.symbol))
            .with_u16_data(&v)
            .with_shape(&[h as u64, w as u64])
            .with_chunks(&[32, w as u64])
            .with_deflate(4);
    }
    let file = d.join("montage.h5");
    b.write(&file).unwrap();
    let (whole, strips) = (d.join("whole"), d.join("strips"));
    let r = modalmap(&["apply", &s(&model), &s(&file), "-o", &s(&whole), "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = modalmap(&[
        "apply",
        &s(&model),
        &s(&file),
        "-o",
        &s(&strips),
        "--stream",
        "--strip-rows",
        "40",
        "--quiet",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(
        std::fs::read(whole.join("montage/labels.png")).unwrap(),
        std::fs::read(strips.join("montage/labels.png")).unwrap()
    );
    let (a, b) = (
        json(&whole.join("montage/report.json")),
        json(&strips.join("montage/report.json")),
    );
    for (p, q) in a["phases"]
        .as_array()
        .unwrap()
        .iter()
        .zip(b["phases"].as_array().unwrap())
    {
        assert_eq!(p["pixels"], q["pixels"]);
        assert_eq!(p["composition_wt"], q["composition_wt"]);
    }
}

/// Bad options of the many-field commands exit 2 (or 4 for outputs) before any work.
#[test]
fn many_field_options_are_checked() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let (a, _) = rock(d, 51);
    let model = d.join("model.json");
    assert_eq!(
        modalmap(&["fit", &s(&a), "-o", &s(&model), "--quiet"]).code,
        0
    );
    for (args, code, says) in [
        (vec!["--shard", "5/4"], 2, "--shard"),
        (vec!["--shard", "two/4"], 2, "--shard"),
        (vec!["--jobs", "0"], 2, "--jobs"),
        (vec!["--config", "x.toml"], 2, "--config"),
    ] {
        let mut all = vec![
            "apply".to_string(),
            s(&model),
            s(&a),
            "-o".into(),
            s(&d.join("o")),
        ];
        all.extend(args.iter().map(|x| x.to_string()));
        let refs: Vec<&str> = all.iter().map(String::as_str).collect();
        let r = modalmap(&refs);
        assert_eq!(r.code, code, "{args:?}: {}", r.stderr);
        assert!(
            r.stderr.contains(says) && r.stderr.contains("fix: "),
            "{}",
            r.stderr
        );
    }
    assert!(!d.join("o").exists(), "nothing written");
    // OUT is a file.
    std::fs::write(d.join("file"), "x").unwrap();
    let r = modalmap(&["apply", &s(&model), &s(&a), "-o", &s(&d.join("file"))]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    // merge of a folder without reports; fit of fields with other elements.
    std::fs::create_dir(d.join("empty")).unwrap();
    let r = modalmap(&["merge", &s(&d.join("empty")), "-o", &s(&d.join("sum"))]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("no report.json"));
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let r = modalmap(&["fit", &s(&a), &s(&sample), "-o", &s(&d.join("m2.json"))]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("elements") && !d.join("m2.json").exists());
}

/// merge's files for a spreadsheet and a report: summary.csv in % with an unassigned row
/// (adding up to 100), fields.csv with a row per field and phase (the reports' numbers),
/// the figure, and summary.html with the per-field table linking each field's report.
/// summary-areas.png draws the SVG's figure at twice its size: each phase's bar in its
/// colour (at the SVG's 0.75 opacity on white) as long as its mean area, and white past it.
fn check_area_figure_png(sum: &Path, summary: &serde_json::Value) {
    let svg = std::fs::read_to_string(sum.join("summary-areas.svg")).unwrap();
    let attr = |name: &str| -> f64 {
        let at = svg.find(&format!(" {name}=\"")).unwrap() + name.len() + 3;
        svg[at..].split('"').next().unwrap().parse().unwrap()
    };
    let z = modalmap::fields::AREAS_PNG_ZOOM;
    let bytes = std::fs::read(sum.join("summary-areas.png")).unwrap();
    let mut reader = png::Decoder::new(std::io::Cursor::new(bytes))
        .read_info()
        .unwrap();
    let mut buf = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut buf).unwrap();
    let width = info.width as usize;
    assert_eq!(info.color_type, png::ColorType::Rgb);
    assert_eq!(
        (width, info.height as usize),
        ((attr("width") * z) as usize, (attr("height") * z) as usize)
    );
    // The axis' last tick label is its end; the layout the SVG states: bars from x = 220
    // over 420 units, rows of 34 units from y = 40.
    let scale = svg.rsplit("text-anchor=\"middle\">").next().unwrap();
    let scale: f64 = scale.split('<').next().unwrap().parse().unwrap();
    let at = |x: f64, y: f64| {
        let i = 3 * ((y * z) as usize * width + (x * z) as usize);
        [buf[i], buf[i + 1], buf[i + 2]]
    };
    for (i, p) in summary["phases"].as_array().unwrap().iter().enumerate() {
        let end = 220.0 + 420.0 * (100.0 * p["area_fraction_mean"].as_f64().unwrap() / scale);
        let y = 40.0 + 34.0 * i as f64 + 6.0;
        let fill = modalmap::report::draw::colour(p["id"].as_u64().unwrap() as u16)
            .map(|v| (0.75 * f64::from(v) + 0.25 * 255.0).round() as u8);
        if end - 220.0 >= 4.0 {
            assert_eq!(at((220.0 + end) / 2.0, y), fill, "phase {}", p["id"]);
        }
        assert_eq!(at(end + 3.0, y), [255; 3], "phase {} past its bar", p["id"]);
    }
}

fn check_spreadsheet_outputs(sum: &Path, all: &Path, summary: &serde_json::Value) {
    check_area_figure_png(sum, summary);
    let k = summary["phases"].as_array().unwrap().len();
    let pooled = csv_rows(&std::fs::read_to_string(sum.join("summary.csv")).unwrap());
    let col = |rows: &[Vec<String>], name: &str| rows[0].iter().position(|c| c == name).unwrap();
    assert_eq!(pooled.len(), k + 2, "header, {k} phases, unassigned");
    assert_eq!(pooled[k + 1][1], "unassigned");
    let area = col(&pooled, "area_pct_mean");
    let total: f64 = pooled[1..]
        .iter()
        .map(|r| r[area].parse::<f64>().unwrap())
        .sum();
    assert!(
        (total - 100.0).abs() < 1e-3,
        "pooled areas add up to {total} %"
    );
    assert!(
        pooled[0].contains(&"features".to_string()) && !pooled[0].iter().any(|c| c == "particles")
    );
    assert!(pooled[0]
        .iter()
        .any(|c| c.starts_with("wt_pct_sd_between_fields_")));

    let long = csv_rows(&std::fs::read_to_string(sum.join("fields.csv")).unwrap());
    assert_eq!(
        long.len(),
        1 + 8 * (k + 1),
        "a row per field and phase, and unassigned"
    );
    let (field, id, area) = (
        col(&long, "field"),
        col(&long, "phase_id"),
        col(&long, "area_pct"),
    );
    for f in summary["fields"].as_array().unwrap() {
        let name = f["field"].as_str().unwrap();
        let rows: Vec<&Vec<String>> = long[1..].iter().filter(|r| r[field] == name).collect();
        let sum: f64 = rows.iter().map(|r| r[area].parse::<f64>().unwrap()).sum();
        assert!((sum - 100.0).abs() < 1e-3, "{name}: {sum} %");
        let report = json(&all.join(name).join("report.json"));
        for p in report["phases"].as_array().unwrap() {
            let pid = p["id"].as_u64().unwrap().to_string();
            let row = rows.iter().find(|r| r[id] == pid).unwrap();
            let want = 100.0 * p["area_fraction"].as_f64().unwrap();
            assert!((row[area].parse::<f64>().unwrap() - want).abs() < 1e-4);
        }
    }

    let svg = std::fs::read_to_string(sum.join("summary-areas.svg")).unwrap();
    assert_eq!(
        svg.matches("<circle").count(),
        8 * k,
        "a dot per field and phase"
    );
    let html = std::fs::read_to_string(sum.join("summary.html")).unwrap();
    assert!(
        html.contains("<svg") && html.contains("unassigned"),
        "figure and unassigned row"
    );
    let links: Vec<&str> = html
        .split("<a href=\"")
        .skip(1)
        .map(|h| h.split('"').next().unwrap())
        .collect();
    assert_eq!(links.len(), 8, "a link per field");
    for l in links {
        assert!(!l.starts_with('/'), "relative: {l}");
        assert!(sum.join(l).is_file(), "{l} does not lead to a report");
    }
    assert!(
        html.contains("± SD between fields"),
        "compositions with ± and basis"
    );
}
