//! The README's promises about *successful* runs (the refused ones are in safety.rs):
//! every input file — maps, BSE image, field.toml, configuration, k-factor and library
//! files, the model — is byte for byte the same after map, fit, apply, apply --stream and
//! merge have run; and each command gives the same output when run again, whatever the
//! thread count or the number of fields processed at once.

mod support;

use support::run_ok;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};

/// SHA-256 of every file below `dir`, by path.
fn hashes(dir: &Path) -> BTreeMap<PathBuf, String> {
    let mut out = BTreeMap::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                let digest = Sha256::digest(std::fs::read(&p).unwrap());
                let hex: String = digest.iter().map(|b| format!("{b:02x}")).collect();
                out.insert(p, hex);
            }
        }
    }
    out
}

/// Every file of every output folder, by path relative to `dir`, as bytes.
fn contents(dir: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    hashes(dir)
        .into_keys()
        .map(|p| {
            (
                p.strip_prefix(dir).unwrap().to_path_buf(),
                std::fs::read(&p).unwrap(),
            )
        })
        .collect()
}

fn copy_sample(to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    let from = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    for e in std::fs::read_dir(from).unwrap() {
        let p = e.unwrap().path();
        std::fs::copy(&p, to.join(p.file_name().unwrap())).unwrap();
    }
}

#[test]
fn successful_runs_leave_every_input_unchanged() {
    let tmp = tempfile::tempdir().unwrap();
    let inputs = tmp.path().join("inputs");
    let (a, b) = (inputs.join("field-a"), inputs.join("field-b"));
    copy_sample(&a);
    copy_sample(&b);
    let cfg = inputs.join("run.toml");
    std::fs::write(&cfg, "phases = \"auto:8\"\nseed = 3\n").unwrap();
    let k = inputs.join("k.toml");
    std::fs::write(
        &k,
        "format = \"modalmap.kfactors/1\"\nreference = \"Cu\"\nbeam_kv = 15\n[k]\nCu = 1.0\nAg = 1.1\nSn = 1.05\n",
    )
    .unwrap();
    let lib = inputs.join("lib.toml");
    std::fs::write(
        &lib,
        "format = \"modalmap.phases/1\"\n[[phase]]\nname = \"bronze\"\ncomposition = { Cu = 88, Sn = 12 }\n",
    )
    .unwrap();
    let model = inputs.join("model.json");
    let s = |p: &Path| p.display().to_string();
    let out = tmp.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    let o = |name: &str| s(&out.join(name));
    run_ok(&[
        "fit",
        &s(&a),
        "-o",
        &s(&model),
        "--quiet",
        "--config",
        &s(&cfg),
    ]);
    let before = hashes(&inputs);
    assert!(before.len() >= 14, "{} input files", before.len());

    run_ok(&[
        "map",
        &s(&a),
        "-o",
        &o("map"),
        "--quiet",
        "--config",
        &s(&cfg),
        "--kfactors",
        &s(&k),
        "--library",
        &s(&lib),
    ]);
    run_ok(&[
        "apply",
        &s(&model),
        &s(&a),
        &s(&b),
        "-o",
        &o("apply"),
        "--quiet",
        "--kfactors",
        &s(&k),
        "--library",
        &s(&lib),
    ]);
    run_ok(&[
        "apply",
        &s(&model),
        &s(&a),
        "-o",
        &o("stream"),
        "--quiet",
        "--stream",
    ]);
    run_ok(&["merge", &o("apply"), "-o", &o("summary"), "--quiet"]);
    run_ok(&["fit", &s(&a), &s(&b), "-o", &o("model2.json"), "--quiet"]);

    let after = hashes(&inputs);
    assert_eq!(before, after, "an input file changed or appeared");
}

/// The same output when run again: `apply` with one field at a time or two, `fit` and
/// `apply --stream` twice, and `map` with k-means and the Gaussian mixture on one thread
/// and on two.
#[test]
fn outputs_do_not_depend_on_threads_or_jobs() {
    let tmp = tempfile::tempdir().unwrap();
    let (a, b) = (tmp.path().join("a"), tmp.path().join("b"));
    copy_sample(&a);
    copy_sample(&b);
    let s = |p: &Path| p.display().to_string();
    let o = |name: &str| s(&tmp.path().join(name));

    run_ok(&[
        "fit",
        &s(&a),
        "-o",
        &o("m1.json"),
        "--quiet",
        "--threads",
        "1",
    ]);
    run_ok(&[
        "fit",
        &s(&a),
        "-o",
        &o("m2.json"),
        "--quiet",
        "--threads",
        "2",
    ]);
    assert_eq!(
        std::fs::read(tmp.path().join("m1.json")).unwrap(),
        std::fs::read(tmp.path().join("m2.json")).unwrap(),
        "fit"
    );

    let m = o("m1.json");
    run_ok(&[
        "apply",
        &m,
        &s(&a),
        &s(&b),
        "-o",
        &o("j1"),
        "--quiet",
        "--jobs",
        "1",
    ]);
    run_ok(&[
        "apply",
        &m,
        &s(&a),
        &s(&b),
        "-o",
        &o("j2"),
        "--quiet",
        "--jobs",
        "2",
    ]);
    let strip = |c: BTreeMap<PathBuf, Vec<u8>>| -> BTreeMap<PathBuf, Vec<u8>> {
        // apply.json records the run's own settings (jobs) and output path.
        c.into_iter()
            .filter(|(p, _)| p.file_name().unwrap() != "apply.json")
            .collect()
    };
    let (j1, j2) = (
        strip(contents(&tmp.path().join("j1"))),
        strip(contents(&tmp.path().join("j2"))),
    );
    assert!(j1.len() >= 10, "{} files", j1.len());
    assert!(j1 == j2, "apply --jobs 1 and --jobs 2 differ");

    for run in ["s1", "s2"] {
        run_ok(&["apply", &m, &s(&a), "-o", &o(run), "--quiet", "--stream"]);
    }
    assert!(
        contents(&tmp.path().join("s1/a")) == contents(&tmp.path().join("s2/a")),
        "apply --stream run twice"
    );

    for method in ["kmeans", "gmm"] {
        for t in ["1", "2"] {
            run_ok(&[
                "map",
                &s(&a),
                "-o",
                &o(&format!("{method}{t}")),
                "--quiet",
                "--method",
                method,
                "--threads",
                t,
            ]);
        }
        assert!(
            contents(&tmp.path().join(format!("{method}1")))
                == contents(&tmp.path().join(format!("{method}2"))),
            "map --method {method} on 1 and 2 threads"
        );
    }
}
