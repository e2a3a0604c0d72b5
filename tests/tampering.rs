//! Property tests: a model or report file whose parts do not agree (edited by hand, cut,
//! or damaged) is always refused cleanly, as an input error naming the file, before any
//! use; never a panic, never a silently wrong result.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use modalmap::fields::PhaseModel;
use proptest::prelude::*;
use serde_json::Value;

/// Valid models of each method and two valid reports, made once by the binary.
struct Made {
    _dir: tempfile::TempDir,
    models: Vec<Value>,
    reports: Vec<(PathBuf, Value)>,
}

fn made() -> &'static Made {
    static MADE: OnceLock<Made> = OnceLock::new();
    MADE.get_or_init(|| {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        let bin = |args: &[&str]| {
            let s = std::process::Command::new(env!("CARGO_BIN_EXE_modalmap"))
                .args(args)
                .current_dir(d)
                .output()
                .unwrap();
            assert!(s.status.success(), "{}", String::from_utf8_lossy(&s.stderr));
        };
        for (name, seed) in [("f", "5"), ("g", "6")] {
            bin(&[
                "synth",
                "-o",
                name,
                "--scenario",
                "benchmark-rock",
                "--size",
                "48",
                "--seed",
                seed,
            ]);
        }
        let mut models = Vec::new();
        for m in ["poisson", "gmm", "kmeans"] {
            let file = format!("{m}.json");
            bin(&[
                "fit", "f", "-o", &file, "--phases", "3", "--method", m, "--quiet",
            ]);
            models.push(serde_json::from_slice(&std::fs::read(d.join(&file)).unwrap()).unwrap());
        }
        bin(&["apply", "poisson.json", "f", "g", "-o", "out", "--quiet"]);
        let reports = ["f", "g"]
            .iter()
            .map(|n| {
                let p = d.join("out").join(n).join("report.json");
                let v = serde_json::from_slice(&std::fs::read(&p).unwrap()).unwrap();
                (p, v)
            })
            .collect();
        Made {
            _dir: dir,
            models,
            reports,
        }
    })
}

/// One way to make a model inconsistent; `i`, `j` pick places, `n` sizes.
#[derive(Debug, Clone)]
enum Break {
    Shorten(usize),
    Lengthen(usize),
    NegativeWeight(usize),
    SharedCluster(usize, usize),
    ClusterOutOfRange(usize, usize),
    PhaseId(usize, u16),
    LongName(usize, usize),
    ElementRepeated(usize),
    ElementDropped(usize),
    CountChanged(bool, i64),
    Fraction(usize, f64),
}

fn arrays(model: &Value) -> Vec<&'static str> {
    match model["clusters"]["method"].as_str().unwrap() {
        "poisson" => vec!["weights", "rates"],
        "gmm" => vec!["weights", "means", "covariances"],
        _ => vec!["centroids"],
    }
}

fn apply_break(model: &mut Value, b: &Break) {
    let names = arrays(model);
    let k = model["phases"].as_array().unwrap().len();
    let m = &mut model["clusters"]["model"];
    match *b {
        Break::Shorten(i) => {
            m[names[i % names.len()]].as_array_mut().unwrap().pop();
        }
        Break::Lengthen(i) => m[names[i % names.len()]]
            .as_array_mut()
            .unwrap()
            .push(1.0.into()),
        Break::NegativeWeight(i) => {
            if m.get("weights").is_some() {
                m["weights"][i % k] = (-0.5).into();
            } else {
                model["clusters"]["variance"] = (-1.0).into();
            }
        }
        Break::SharedCluster(i, j) => {
            let (i, j) = (i % k, (i + 1 + j % (k - 1)) % k);
            model["phases"][i]["model_index"] = model["phases"][j]["model_index"].clone();
        }
        Break::ClusterOutOfRange(i, extra) => {
            model["phases"][i % k]["model_index"] = (k + extra).into()
        }
        Break::PhaseId(i, id) => {
            let id = if usize::from(id) == i % k + 1 {
                id + 1
            } else {
                id
            };
            model["phases"][i % k]["id"] = id.into();
        }
        Break::LongName(i, n) => model["phases"][i % k]["name"] = "x".repeat(201 + n).into(),
        Break::ElementRepeated(i) => {
            let e = model["elements"].as_array_mut().unwrap();
            let j = i % e.len();
            let other = e[(j + 1) % e.len()].clone();
            e[j] = other;
        }
        Break::ElementDropped(i) => {
            let e = model["elements"].as_array_mut().unwrap();
            e.remove(i % e.len());
        }
        Break::CountChanged(is_k, by) => {
            let key = if is_k { "k" } else { "d" };
            let v = m[key].as_i64().unwrap() + by;
            m[key] = v.max(0).into();
        }
        Break::Fraction(i, f) => model["phases"][i % k]["training_area_fraction"] = f.into(),
    }
}

fn a_break() -> impl Strategy<Value = Break> {
    prop_oneof![
        (0usize..3).prop_map(Break::Shorten),
        (0usize..3).prop_map(Break::Lengthen),
        (0usize..3).prop_map(Break::NegativeWeight),
        (0usize..3, 0usize..3).prop_map(|(i, j)| Break::SharedCluster(i, j)),
        (0usize..3, 0usize..100).prop_map(|(i, e)| Break::ClusterOutOfRange(i, e)),
        (0usize..3, 0u16..300).prop_map(|(i, id)| Break::PhaseId(i, id)),
        (0usize..3, 0usize..100_000).prop_map(|(i, n)| Break::LongName(i, n)),
        (0usize..10).prop_map(Break::ElementRepeated),
        (0usize..10).prop_map(Break::ElementDropped),
        (any::<bool>(), prop_oneof![-3i64..0, 1i64..4])
            .prop_map(|(k, by)| Break::CountChanged(k, by)),
        (0usize..3, prop_oneof![-10.0f64..-1e-3, 1.001f64..50.0])
            .prop_map(|(i, f)| Break::Fraction(i, f)),
    ]
}

fn load(path: &Path) -> modalmap::Result<()> {
    std::panic::catch_unwind(|| PhaseModel::load(path).map(|_| ()))
        .unwrap_or_else(|_| panic!("loading {} panicked", path.display()))
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    #[test]
    fn inconsistent_models_are_always_refused(which in 0usize..3, b in a_break()) {
        let mut model = made().models[which].clone();
        apply_break(&mut model, &b);
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("model.json");
        std::fs::write(&path, serde_json::to_vec(&model).unwrap()).unwrap();
        let e = load(&path).expect_err("an inconsistent model was accepted");
        prop_assert_eq!(e.kind.exit_code(), 3);
        prop_assert_eq!(e.path.as_deref(), Some(path.as_path()));
        prop_assert!(e.to_string().len() < 1000, "the message repeats the file");
    }

    #[test]
    fn inconsistent_reports_are_always_refused(
        which in 0usize..2,
        phase in 0usize..3,
        kind in 0usize..4,
        v in prop_oneof![-1e6f64..-1e-6, 1.000_01f64..1e6],
    ) {
        let m = made();
        let mut reports: Vec<(PathBuf, modalmap::report::Report)> = m
            .reports
            .iter()
            .map(|(p, v)| (p.clone(), serde_json::from_value(v.clone()).unwrap()))
            .collect();
        prop_assert!(modalmap::fields::merge(&reports).is_ok());
        let r = &mut reports[which].1;
        let k = r.phases.len();
        match kind {
            0 => r.phases[phase % k].area_fraction = v,
            1 => r.unassigned_fraction = v,
            2 => { r.phases.remove(phase % k); }
            _ => {
                let id = r.phases[(phase + 1) % k].id;
                r.phases[phase % k].id = id;
            }
        }
        let e = modalmap::fields::merge(&reports).expect_err("an inconsistent report was pooled");
        prop_assert_eq!(e.kind.exit_code(), 3);
        // A phase dropped from the first report shows as a mismatch in the second.
        let named = if kind == 2 { 1 } else { which };
        prop_assert_eq!(e.path.as_deref(), Some(reports[named].0.as_path()));
    }
}

#[test]
fn the_untouched_models_load() {
    let dir = tempfile::tempdir().unwrap();
    for (i, m) in made().models.iter().enumerate() {
        let path = dir.path().join(format!("m{i}.json"));
        std::fs::write(&path, serde_json::to_vec(m).unwrap()).unwrap();
        assert!(load(&path).is_ok(), "model {i}");
    }
}
