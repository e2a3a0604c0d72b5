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
