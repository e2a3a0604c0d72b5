//! Test support that imports nothing from modalmap: an independent forward model of
//! element maps ([`forward`]) and the invented scenarios the tests run it on
//! ([`scenarios`]).

#![allow(dead_code)]

pub mod forward;
pub mod scenarios;

/// Runs the built `modalmap` with `args` and panics with its standard error unless it
/// succeeds.
pub fn run_ok(args: &[&str]) -> std::process::Output {
    let r = std::process::Command::new(env!("CARGO_BIN_EXE_modalmap"))
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
