//! The `map` and `demo` commands end to end: outputs, their consistency, atomic writes,
//! options and configuration, and determinism whatever the thread count.

mod common;

use common::{csv_cells, modalmap};
use std::path::{Path, PathBuf};

fn sample() -> String {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("sample-maps")
        .display()
        .to_string()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn report(dir: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(dir.join("report.json")).unwrap()).unwrap()
}

#[test]
fn map_writes_consistent_outputs() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let r = modalmap(&["map", &sample(), "-o", s(&out)]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    for f in ["labels.png", "phase-map.png", "report.json", "phases.csv"] {
        assert!(out.join(f).is_file(), "{f} missing");
    }
    // `map --help` names every kind of file written (element-EL.png for element-Cu.png).
    let help = modalmap(&["map", "--help"]).stdout;
    for e in std::fs::read_dir(&out).unwrap() {
        let name = e.unwrap().file_name().to_string_lossy().into_owned();
        let kind = match name.strip_prefix("element-") {
            Some(_) => "element-EL.png".to_string(),
            None => name.clone(),
        };
        assert!(
            help.contains(&kind),
            "map --help does not name {name}:\n{help}"
        );
    }
    let rep = report(&out);
    assert_eq!(rep["schema"], "modalmap.report/2");
    let phases = rep["phases"].as_array().unwrap();
    assert_eq!(phases.len(), 5, "the sample field has five phases");
    assert_eq!(rep["elements"], serde_json::json!(["Cu", "Ag", "Sn"]));
    // Fractions and unassigned add up to the whole field; ids are 1..=5 by decreasing area.
    let total: f64 = phases
        .iter()
        .map(|p| p["area_fraction"].as_f64().unwrap())
        .sum::<f64>()
        + rep["unassigned_fraction"].as_f64().unwrap();
    assert!((total - 1.0).abs() < 1e-9, "{total}");
    let areas: Vec<f64> = phases
        .iter()
        .map(|p| p["area_fraction"].as_f64().unwrap())
        .collect();
    assert!(areas.windows(2).all(|w| w[0] >= w[1]));
    for (i, p) in phases.iter().enumerate() {
        assert_eq!(p["id"], i + 1);
        let ci = p["area_fraction_ci95"].as_array().unwrap();
        let (lo, hi, a) = (
            ci[0].as_f64().unwrap(),
            ci[1].as_f64().unwrap(),
            p["area_fraction"].as_f64().unwrap(),
        );
        assert!(lo <= a && a <= hi, "{p}");
        let comp: f64 = p["composition_wt"]
            .as_object()
            .unwrap()
            .values()
            .map(|v| v.as_f64().unwrap())
            .sum();
        assert!((comp - 100.0).abs() < 1e-6);
        assert!(p["composition_basis"]
            .as_str()
            .unwrap()
            .contains("uncalibrated"));
    }
    // The label image agrees with the table.
    let labels = modalmap::io::read_raster(&out.join("labels.png"), &Default::default()).unwrap();
    assert_eq!((labels.width, labels.height), (384, 288));
    for p in phases {
        let id = p["id"].as_f64().unwrap() as f32;
        let n = labels.data.iter().filter(|&&v| v == id).count();
        assert_eq!(n as u64, p["pixels"].as_u64().unwrap());
    }
    // The CSV has a header, one row per phase and one for the unassigned pixels; its areas
    // are in % and add up to 100.
    let csv = std::fs::read_to_string(out.join("phases.csv")).unwrap();
    assert_eq!(csv.lines().count(), 7);
    assert!(
        csv.starts_with("id,name,pixels,area_pct,area_pct_ci95_low,area_pct_ci95_high,features,")
    );
    assert!(csv.lines().last().unwrap().starts_with("0,unassigned,"));
    let total: f64 = csv
        .lines()
        .skip(1)
        .map(|row| csv_cells(row)[3].parse::<f64>().unwrap())
        .sum();
    assert!((total - 100.0).abs() < 1e-3, "areas add up to {total} %");
    // Provenance: the hash of every map file, as SHA-256 (FIPS 180-4) of its bytes.
    let inputs = rep["provenance"]["inputs"].as_array().unwrap();
    assert_eq!(inputs.len(), 4, "three maps and the BSE image");
    for i in inputs {
        use sha2::Digest;
        let bytes = std::fs::read(i["path"].as_str().unwrap()).unwrap();
        let hex: String = sha2::Sha256::digest(&bytes)
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect();
        assert_eq!(i["sha256"], hex);
    }
    assert!(rep["cautions"].as_array().unwrap().len() >= 3);
    // The human summary names every phase.
    for p in phases {
        assert!(
            r.stdout.contains(p["name"].as_str().unwrap()),
            "{}",
            r.stdout
        );
    }
    assert!(r.stdout.contains("semi-quantitative"));
}

#[test]
fn output_folder_rules() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("keep.txt"), "mine").unwrap();
    let r = modalmap(&["map", &sample(), "-o", s(&out), "--phases", "5"]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    assert!(
        r.stderr.contains("already holds files") && r.stderr.contains("--force"),
        "{}",
        r.stderr
    );
    assert_eq!(
        std::fs::read_to_string(out.join("keep.txt")).unwrap(),
        "mine",
        "untouched"
    );
    let r = modalmap(&["map", &sample(), "-o", s(&out), "--phases", "5", "--force"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(!out.join("keep.txt").exists() && out.join("report.json").exists());
    // No temporary folders are left beside OUT.
    let leftovers: Vec<PathBuf> = std::fs::read_dir(tmp.path())
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p != &out)
        .collect();
    assert!(leftovers.is_empty(), "{leftovers:?}");
    // OUT that is a file.
    let file = tmp.path().join("afile");
    std::fs::write(&file, "x").unwrap();
    let r = modalmap(&["map", &sample(), "-o", s(&file)]);
    assert_eq!(r.code, 4);
    assert!(r.stderr.contains("is a file"), "{}", r.stderr);
    // A failed run (bad input) leaves no output folder behind.
    let out2 = tmp.path().join("out2");
    let r = modalmap(&["map", s(&tmp.path().join("missing")), "-o", s(&out2)]);
    assert_eq!(r.code, 3);
    assert!(!out2.exists());
    assert_eq!(
        std::fs::read_dir(tmp.path()).unwrap().count(),
        2,
        "only out and afile: no temporary folder left"
    );
}

#[test]
fn config_file_and_flags() {
    let tmp = tempfile::tempdir().unwrap();
    let cfg = tmp.path().join("run.toml");
    std::fs::write(
        &cfg,
        "phases = \"5\"\nseed = 3\nsmoothing = 0.5\nmethod = \"poisson\"\n",
    )
    .unwrap();
    let out = tmp.path().join("out");
    let r = modalmap(&[
        "map",
        &sample(),
        "-o",
        s(&out),
        "--config",
        s(&cfg),
        "--seed",
        "4",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let rep = report(&out);
    assert_eq!(rep["options"]["cluster"]["seed"], 4, "the flag wins");
    assert_eq!(
        rep["options"]["cluster"]["phases"],
        serde_json::json!({"fixed": 5}),
        "from the file"
    );
    assert_eq!(rep["options"]["refine"]["smoothing"], 0.5);
    assert_eq!(rep["phase_count"]["mode"], "fixed");

    // Composition options from the file too, recorded with the report; the library file
    // is an input, hashed into the provenance.
    let lib = tmp.path().join("lab.toml");
    std::fs::write(
        &lib,
        "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"lab bronze\"\ncomposition = { Cu = 88, Sn = 12 }\n",
    )
    .unwrap();
    std::fs::write(
        &cfg,
        format!(
            "calibrate = [\"Cu6Sn5 (eta)\", \"Ag3Sn\"]\nbackground = \"poorest-phase\"\nlibrary = [\"{}\"]\n",
            lib.display()
        ),
    )
    .unwrap();
    let out = tmp.path().join("o3");
    let r = modalmap(&["map", &sample(), "-o", s(&out), "--config", s(&cfg)]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let rep = report(&out);
    assert_eq!(rep["composition"]["basis"], "calibrated");
    assert_eq!(
        rep["composition"]["options"]["calibrate"],
        serde_json::json!(["Cu6Sn5 (eta)", "Ag3Sn"])
    );
    assert!(rep["provenance"]["inputs"]
        .as_array()
        .unwrap()
        .iter()
        .any(|i| i["path"].as_str().unwrap().ends_with("lab.toml")));

    // Bad configuration files: an unknown key, a bad value; the file is named.
    for (text, says) in [
        ("phase = 5\n", "phase"),
        ("method = \"spectral\"\n", "spectral"),
    ] {
        std::fs::write(&cfg, text).unwrap();
        let out = tmp.path().join("bad-config");
        let r = modalmap(&["map", &sample(), "-o", s(&out), "--config", s(&cfg)]);
        assert_eq!(r.code, 2, "{}", r.stderr);
        assert!(
            r.stderr.contains("run.toml") && r.stderr.contains(says),
            "{}",
            r.stderr
        );
        assert!(!out.exists());
    }
}

#[test]
fn bad_option_values_exit_2_before_any_work() {
    let tmp = tempfile::tempdir().unwrap();
    for (args, key) in [
        (vec!["--phases", "0"], "--phases 0"),
        (vec!["--phases", "lots"], "lots"),
        (vec!["--bin", "0"], "--bin 0"),
        (vec!["--smoothing=-1"], "smoothing"),
        (vec!["--denoise", "gaussian:0"], "σ"),
        (vec!["--denoise", "blur"], "blur"),
        (vec!["--pixel-size=-2"], "--pixel-size"),
        (vec!["--min-phase", "0.7"], "minimum phase size"),
    ] {
        let out = tmp.path().join("o");
        let mut a = vec!["map", "/nonexistent-input", "-o", s(&out)];
        a.extend(args.iter());
        let r = modalmap(&a);
        assert_eq!(r.code, 2, "{args:?}: {}", r.stderr);
        assert!(r.stderr.contains(key), "{args:?}: {}", r.stderr);
        assert!(!out.exists());
    }
}

#[test]
fn same_result_whatever_the_thread_count() {
    let tmp = tempfile::tempdir().unwrap();
    let mut reports = Vec::new();
    let mut labels = Vec::new();
    for t in ["1", "2", "4"] {
        let out = tmp.path().join(format!("t{t}"));
        let r = modalmap(&["map", &sample(), "-o", s(&out), "--threads", t]);
        assert_eq!(r.code, 0, "{}", r.stderr);
        reports.push(std::fs::read(out.join("report.json")).unwrap());
        labels.push(std::fs::read(out.join("labels.png")).unwrap());
    }
    assert!(
        reports.windows(2).all(|w| w[0] == w[1]),
        "report.json differs between thread counts"
    );
    assert!(
        labels.windows(2).all(|w| w[0] == w[1]),
        "labels.png differs between thread counts"
    );
}

#[test]
fn demo_maps_the_sample_and_checks_it_against_the_truth() {
    // Without -o the demo writes into a new folder of the system's temporary folder
    // (TMPDIR here) and nothing into the folder it runs in.
    let (here, tmpdir) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let run = std::process::Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .arg("demo")
        .current_dir(here.path())
        .env("TMPDIR", tmpdir.path())
        .output()
        .unwrap();
    let r = common::Run {
        code: run.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&run.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&run.stderr).into_owned(),
    };
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(std::fs::read_dir(here.path()).unwrap().count(), 0);
    let made: Vec<_> = std::fs::read_dir(tmpdir.path())
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    assert_eq!(made.len(), 1, "{made:?}");
    let out = &made[0];
    let name = out.file_name().unwrap().to_str().unwrap();
    assert!(name.starts_with("modalmap-demo-"), "{name}");
    assert!(
        r.stdout.contains(&format!("outputs in {}", out.display())),
        "{}",
        r.stdout
    );
    let line = r
        .stdout
        .lines()
        .find(|l| l.contains("agree with them"))
        .expect(&r.stdout);
    let pct: f64 = line
        .split('%')
        .next()
        .unwrap()
        .split_whitespace()
        .last()
        .unwrap()
        .parse()
        .unwrap();
    // The README says 99.5 % (the demo prints one decimal).
    assert!(pct >= 99.5, "{line}");
    assert_eq!(report(out)["phases"].as_array().unwrap().len(), 5);
    // It says where its maps went (a temporary folder), not that they are in sample-maps/.
    assert!(!r.stdout.contains("those of sample-maps/"), "{}", r.stdout);
    assert!(r.stdout.contains("modalmap synth -o DIR"), "{}", r.stdout);
}

/// `map --calibrate` on the sample field: compositions with uncertainty and method, library
/// names, the advisor's messages, in report.json, phases.csv and the summary. The true
/// compositions are the formulas the sample was generated from (mass fractions from
/// standard atomic weights: Cu3Sn is Cu 61.63 wt%, computed from the formula).
#[test]
fn calibrated_map_reports_compositions_names_and_advice() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let r = modalmap(&[
        "map",
        &sample(),
        "-o",
        s(&out),
        "--calibrate",
        "Cu6Sn5 (eta)",
        "--calibrate",
        "Ag3Sn=Ag3Sn",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let rep = report(&out);
    assert_eq!(rep["composition"]["basis"], "calibrated");
    assert_eq!(
        rep["composition"]["calibration"].as_array().unwrap().len(),
        2
    );
    let names: Vec<&str> = rep["phases"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["name"].as_str().unwrap())
        .collect();
    // Each true phase is the first candidate of a name; where references the mapped
    // elements cannot separate also fit (tin and cassiterite without an O map), the name
    // lists them and says which unmapped element would decide.
    for n in ["tin", "copper", "Cu6Sn5 (eta)", "Cu3Sn (epsilon)", "Ag3Sn"] {
        let name = names
            .iter()
            .find(|x| {
                **x == n || x.starts_with(&format!("{n}, ")) || x.starts_with(&format!("{n} or "))
            })
            .unwrap_or_else(|| panic!("{n} not in {names:?}"));
        assert!(*name == n || name.ends_with("not mapped)"), "{name}");
    }
    assert!(names
        .iter()
        .any(|x| x.starts_with("tin") && x.contains("cassiterite") && x.contains("O")));
    let cu3sn = rep["phases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|p| p["name"] == "Cu3Sn (epsilon)")
        .unwrap();
    let (cu, sd) = (
        cu3sn["composition_wt"]["Cu"].as_f64().unwrap(),
        cu3sn["composition_wt_sd"]["Cu"].as_f64().unwrap(),
    );
    assert!(sd > 0.0 && (cu - 61.63).abs() < 3.0 * sd, "{cu} ± {sd}");
    assert!(cu3sn["match"]["quality"].as_f64().unwrap() > 0.5);
    let at: f64 = cu3sn["composition_at"]
        .as_object()
        .unwrap()
        .values()
        .map(|v| v.as_f64().unwrap())
        .sum();
    assert!((at - 100.0).abs() < 1e-6);
    // The sample is mapped at 15 kV: Cu Kα (edge 8.98 keV) is weakly excited.
    let advice = rep["advisor"]["messages"].as_array().unwrap();
    assert!(advice
        .iter()
        .any(|m| m.as_str().unwrap().contains("Cu Kα is weakly excited")));
    assert!(rep["advisor"]["phases"].as_array().unwrap().len() == 5);
    assert!(rep["cautions"][0].as_str().unwrap().contains("calibrated"));
    let csv = std::fs::read_to_string(out.join("phases.csv")).unwrap();
    let header = csv.lines().next().unwrap();
    for col in ["wt_Cu", "wt_sd_Cu", "at_Sn", "match", "match_quality"] {
        assert!(header.split(',').any(|c| c == col), "{col} in {header}");
    }
    // Every row has the header's columns, and the ECD in µm is the ECD in pixels times
    // the sample's pixel size.
    let cols: Vec<&str> = header.split(',').collect();
    let (px, um) = (
        cols.iter().position(|c| *c == "mean_ecd_px").unwrap(),
        cols.iter().position(|c| *c == "mean_ecd_um").unwrap(),
    );
    let size = rep["pixel_size_um"].as_f64().unwrap();
    for row in csv.lines().skip(1) {
        let f = csv_cells(row);
        assert_eq!(f.len(), cols.len(), "{row}");
        if f[0] == "0" {
            continue; // the unassigned pixels: no features, no ECD
        }
        let (p, u): (f64, f64) = (f[px].parse().unwrap(), f[um].parse().unwrap());
        assert!((u - p * size).abs() < 1e-3 + 1e-3 * u, "{row}");
    }
    assert!(r.stdout.contains("k-factors calibrated on"));
    assert!(r.stdout.contains("beam-physics advice"));
}

/// `--calibrate ID=El:wt,...`: a phase chosen by its id and given as mass fractions in
/// percent. The ids come from an uncalibrated run of the same field (the labels do not
/// depend on the compositions); Cu6Sn5 is Cu 39.11, Sn 60.89 wt% and Ag3Sn Ag 73.16,
/// Sn 26.84 wt% (from the formulas with standard atomic weights). Calibrated so, the
/// Cu3Sn phase must read Cu 61.63 wt% within 3σ, as with the library names above.
#[test]
fn calibration_by_phase_id_and_mass_fractions() {
    let tmp = tempfile::tempdir().unwrap();
    let plain = tmp.path().join("plain");
    let r = modalmap(&["map", &sample(), "-o", s(&plain), "--quiet", "--no-bse"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let id_of = |name: &str| -> String {
        report(&plain)["phases"]
            .as_array()
            .unwrap()
            .iter()
            .find(|p| p["name"].as_str().unwrap().starts_with(name))
            .unwrap_or_else(|| panic!("{name} not found"))["id"]
            .to_string()
    };
    let (eta, ag3sn) = (id_of("Cu6Sn5"), id_of("Ag3Sn"));
    let out = tmp.path().join("out");
    let r = modalmap(&[
        "map",
        &sample(),
        "-o",
        s(&out),
        "--quiet",
        "--no-bse",
        "--calibrate",
        &format!("{eta}=Cu:39.11,Sn:60.89"),
        "--calibrate",
        &format!("{ag3sn}=Ag:73.16,Sn:26.84"),
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let rep = report(&out);
    assert_eq!(rep["composition"]["basis"], "calibrated");
    let ids: Vec<String> = rep["composition"]["calibration"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["id"].to_string())
        .collect();
    assert_eq!(ids, vec![eta, ag3sn]);
    let cu3sn = rep["phases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|p| p["name"].as_str().unwrap().starts_with("Cu3Sn"))
        .unwrap()
        .clone();
    let (cu, sd) = (
        cu3sn["composition_wt"]["Cu"].as_f64().unwrap(),
        cu3sn["composition_wt_sd"]["Cu"].as_f64().unwrap(),
    );
    assert!(sd > 0.0 && (cu - 61.63).abs() < 3.0 * sd, "{cu} ± {sd}");
}
