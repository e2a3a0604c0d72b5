//! Test support that imports nothing from modalmap: an independent forward model of
//! element maps ([`forward`]) and the invented scenarios the tests run it on
//! ([`scenarios`]).

#![allow(dead_code)]

pub mod forward;
pub mod scenarios;

/// Runs the built `modalmap` with `args` and panics with its standard error unless it
/// succeeds.
pub fn run_ok(args: &[&str]) -> std::process::Output {
    run_ok_in(std::path::Path::new("."), args)
}

/// [`run_ok`] in the working folder `dir`.
pub fn run_ok_in(dir: &std::path::Path, args: &[&str]) -> std::process::Output {
    let r = std::process::Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap();
    assert!(
        r.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&r.stderr)
    );
    r
}

/// Reads an output's report.json.
pub fn report(out: &std::path::Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(out.join("report.json")).unwrap()).unwrap()
}

/// Runs `modalmap map FIELD -o OUT --quiet` with `extra` options (it must succeed) and
/// returns the labels and report.json it wrote.
pub fn map_field(
    field: &std::path::Path,
    out: &std::path::Path,
    extra: &[&str],
) -> (Vec<u16>, serde_json::Value) {
    let mut args = vec![
        "map",
        field.to_str().unwrap(),
        "-o",
        out.to_str().unwrap(),
        "--quiet",
    ];
    args.extend_from_slice(extra);
    run_ok(&args);
    (scenarios::read_labels(&out.join("labels.png")), report(out))
}
