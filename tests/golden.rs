//! Golden outputs: what every command writes for the bundled sample field, kept in
//! tests/golden/, so that a refactoring can show it changes no output. A change of
//! behaviour updates these files in its own commit, with the reason.
//!
//! Compared: report.json, model.json, summary.json and phases.csv value by value (strings
//! exactly, the temporary folder's path replaced by `$TMP`; numbers to a relative 1e-9, so
//! that the comparison does not depend on the last bit of a libm function on another
//! machine), and the label images byte for byte.
//!
//! `MODALMAP_BLESS=1 cargo test --test golden` rewrites the files from the current code
//! and then fails, so that a blessing run never passes unseen: review `git diff
//! tests/golden` and commit it.

mod support;

use std::path::{Path, PathBuf};

use serde_json::Value;
use support::run_ok_in;

fn golden_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/golden")
}

fn blessing() -> bool {
    std::env::var("MODALMAP_BLESS").as_deref() == Ok("1")
}

/// Runs the binary in the crate's folder (so that the sample's paths in the provenance
/// are the same relative paths everywhere).
fn modalmap(args: &[&str]) {
    run_ok_in(Path::new(env!("CARGO_MANIFEST_DIR")), args);
}

/// A JSON file with the temporary folder's path replaced by `$TMP`.
fn json_of(path: &Path, tmp: &Path) -> Value {
    let text = std::fs::read_to_string(path).unwrap();
    let tmp = tmp.display().to_string();
    serde_json::from_str(&text.replace(&tmp, "$TMP")).unwrap()
}

/// Differences between `got` and `want` at `at`, numbers to a relative 1e-9.
fn differences(at: &str, got: &Value, want: &Value, out: &mut Vec<String>) {
    match (got, want) {
        (Value::Number(a), Value::Number(b)) => {
            let (a, b) = (a.as_f64().unwrap(), b.as_f64().unwrap());
            if (a - b).abs() > 1e-9 * b.abs().max(1.0) {
                out.push(format!("{at}: {a} (golden {b})"));
            }
        }
        (Value::Array(a), Value::Array(b)) => {
            if a.len() != b.len() {
                out.push(format!("{at}: {} items (golden {})", a.len(), b.len()));
            }
            for (i, (x, y)) in a.iter().zip(b).enumerate() {
                differences(&format!("{at}[{i}]"), x, y, out);
            }
        }
        (Value::Object(a), Value::Object(b)) => {
            for k in a.keys().chain(b.keys()) {
                match (a.get(k), b.get(k)) {
                    (Some(x), Some(y)) => differences(&format!("{at}.{k}"), x, y, out),
                    (Some(_), None) => out.push(format!("{at}.{k}: new")),
                    (None, Some(_)) => out.push(format!("{at}.{k}: missing")),
                    (None, None) => {}
                }
            }
        }
        (a, b) if a == b => {}
        (a, b) => out.push(format!("{at}: {a} (golden {b})")),
    }
}

/// phases.csv as rows of fields, numbers parsed, so that it compares like JSON.
fn csv_value(path: &Path) -> Value {
    let text = std::fs::read_to_string(path).unwrap();
    Value::Array(
        text.lines()
            .map(|l| {
                Value::Array(
                    l.split(',')
                        .map(|f| {
                            f.parse::<f64>()
                                .ok()
                                .and_then(serde_json::Number::from_f64)
                                .map_or(Value::String(f.to_string()), Value::Number)
                        })
                        .collect(),
                )
            })
            .collect(),
    )
}

/// Compares one output with its golden file (or, blessing, writes it); returns the
/// differences found.
fn check(name: &str, path: &Path, tmp: &Path) -> Vec<String> {
    let golden = golden_dir().join(name);
    let ext = path.extension().and_then(|e| e.to_str()).unwrap_or("");
    if blessing() {
        std::fs::create_dir_all(golden_dir()).unwrap();
        match ext {
            "json" => std::fs::write(
                &golden,
                serde_json::to_string_pretty(&json_of(path, tmp)).unwrap() + "\n",
            )
            .unwrap(),
            _ => {
                std::fs::copy(path, &golden).unwrap();
            }
        }
        return Vec::new();
    }
    assert!(
        golden.exists(),
        "{} is missing: run MODALMAP_BLESS=1 cargo test --test golden",
        golden.display()
    );
    let mut out = Vec::new();
    match ext {
        "json" => {
            let want: Value = serde_json::from_slice(&std::fs::read(&golden).unwrap()).unwrap();
            differences(name, &json_of(path, tmp), &want, &mut out);
        }
        "csv" => differences(name, &csv_value(path), &csv_value(&golden), &mut out),
        _ => {
            if std::fs::read(path).unwrap() != std::fs::read(&golden).unwrap() {
                out.push(format!("{name}: the bytes differ"));
            }
        }
    }
    out
}

#[test]
fn every_command_writes_what_it_wrote_before() {
    let tmp = tempfile::tempdir().unwrap();
    let t = tmp.path().canonicalize().unwrap();
    let p = |s: &str| t.join(s).display().to_string();
    let mut diffs = Vec::new();
    let mut compare = |name: &str, file: String| diffs.extend(check(name, Path::new(&file), &t));

    modalmap(&["map", "sample-maps", "-o", &p("map"), "--quiet"]);
    compare("map.report.json", p("map/report.json"));
    compare("map.phases.csv", p("map/phases.csv"));
    compare("map.labels.png", p("map/labels.png"));

    modalmap(&[
        "map",
        "sample-maps",
        "-o",
        &p("kmeans"),
        "--quiet",
        "--no-bse",
        "--method",
        "kmeans",
        "--phases",
        "5",
        "--calibrate",
        "Cu6Sn5 (eta)",
        "--calibrate",
        "Ag3Sn=Ag3Sn",
    ]);
    compare("kmeans.report.json", p("kmeans/report.json"));
    compare("kmeans.labels.png", p("kmeans/labels.png"));

    modalmap(&["fit", "sample-maps", "-o", &p("model.json"), "--quiet"]);
    compare("model.json", p("model.json"));

    modalmap(&[
        "apply",
        &p("model.json"),
        "sample-maps",
        "-o",
        &p("apply"),
        "--quiet",
    ]);
    compare("apply.report.json", p("apply/sample-maps/report.json"));
    compare("apply.labels.png", p("apply/sample-maps/labels.png"));

    modalmap(&[
        "apply",
        &p("model.json"),
        "sample-maps",
        "-o",
        &p("stream"),
        "--quiet",
        "--stream",
    ]);
    compare("stream.report.json", p("stream/sample-maps/report.json"));
    compare("stream.labels.png", p("stream/sample-maps/labels.png"));

    modalmap(&["merge", &p("apply"), "-o", &p("summary"), "--quiet"]);
    compare("summary.json", p("summary/summary.json"));

    assert!(
        !blessing(),
        "golden files rewritten from the current code: review `git diff tests/golden` and commit it"
    );
    assert!(
        diffs.is_empty(),
        "outputs differ from tests/golden:\n{}",
        diffs.join("\n")
    );
}
