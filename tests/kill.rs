//! A run killed midway leaves OUT as it was, and the next run cleans up after it.

use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

fn temp_dirs(parent: &Path) -> Vec<String> {
    std::fs::read_dir(parent)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains("modalmap-tmp"))
        .collect()
}

/// A 640 × 640 field and an OUT holding an earlier result, in a temporary folder.
fn setup() -> (tempfile::TempDir, std::path::PathBuf, std::path::PathBuf) {
    let tmp = tempfile::tempdir().unwrap();
    let field = tmp.path().join("field");
    let (micro, opts) = modalmap::synth::benchmark_rock(640, 3);
    let f = modalmap::synth::generate(&micro, &opts).unwrap();
    modalmap::synth::write_folder(&f, &field).unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("earlier-result.txt"), "keep me").unwrap();
    (tmp, field, out)
}

/// `map FIELD -o OUT --force --quiet` with more arguments.
fn map_command(field: &Path, out: &Path, extra: &[&str]) -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_modalmap"));
    c.args([
        "map",
        field.to_str().unwrap(),
        "-o",
        out.to_str().unwrap(),
        "--force",
        "--quiet",
    ])
    .args(extra);
    c
}

/// Everything a run keeps beside OUT (temporary, aside and lock files).
fn leftovers(parent: &Path) -> Vec<String> {
    std::fs::read_dir(parent)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains(".modalmap-"))
        .collect()
}

#[test]
fn killed_run_leaves_out_untouched() {
    let (tmp, field, out) = setup();
    let mut child = map_command(&field, &out, &["--threads", "1"])
        .spawn()
        .unwrap();
    // Wait until the run is writing into its temporary folder, then kill it.
    let start = Instant::now();
    while temp_dirs(tmp.path()).is_empty() {
        assert!(
            start.elapsed() < Duration::from_secs(30),
            "the run never started its output"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    std::thread::sleep(Duration::from_millis(300));
    let finished_early = child.try_wait().unwrap().is_some();
    child.kill().unwrap();
    child.wait().unwrap();
    assert!(
        !finished_early,
        "the run finished before it could be killed; use a larger field"
    );

    let names: Vec<String> = std::fs::read_dir(&out)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(names, vec!["earlier-result.txt"], "OUT changed");
    assert_eq!(
        std::fs::read_to_string(out.join("earlier-result.txt")).unwrap(),
        "keep me"
    );
    assert_eq!(
        temp_dirs(tmp.path()).len(),
        1,
        "the killed run's temporary folder is there"
    );

    // The next run replaces OUT and removes the dead run's temporary folder.
    let ok = map_command(&field, &out, &["--phases", "6"])
        .status()
        .unwrap();
    assert!(ok.success());
    assert!(out.join("report.json").is_file() && !out.join("earlier-result.txt").exists());
    assert!(
        leftovers(tmp.path()).is_empty(),
        "{:?}",
        leftovers(tmp.path())
    );
}

/// Every file below `root` with its bytes.
fn snapshot(root: &Path) -> std::collections::BTreeMap<std::path::PathBuf, Vec<u8>> {
    let mut out = std::collections::BTreeMap::new();
    if let Ok(rd) = std::fs::read_dir(root) {
        for e in rd {
            let p = e.unwrap().path();
            if p.is_dir() {
                out.extend(snapshot(&p));
            } else {
                out.insert(p.clone(), std::fs::read(&p).unwrap());
            }
        }
    }
    out
}

/// SIGINT, SIGTERM and SIGHUP at many points of a run: the run removes its temporary
/// folder and lock and exits with 128 + the signal; OUT is as before (or complete, if the
/// run had finished). SIGKILL cannot be caught: the next run cleans up after it.
#[test]
fn signals_at_any_point_leave_out_as_before_or_complete() {
    let (tmp, field, out) = setup();
    let before = snapshot(&out);
    let cases = [
        (libc::SIGINT, 0),
        (libc::SIGTERM, 150),
        (libc::SIGHUP, 600),
        (libc::SIGINT, 1500),
        (libc::SIGTERM, 2500),
        (libc::SIGKILL, 300),
        (libc::SIGKILL, 1800),
    ];
    let mut interrupted = 0;
    for (sig, delay_ms) in cases {
        let mut child = map_command(&field, &out, &["--phases", "6", "--threads", "1"])
            .spawn()
            .unwrap();
        let start = Instant::now();
        while temp_dirs(tmp.path()).is_empty() && child.try_wait().unwrap().is_none() {
            assert!(
                start.elapsed() < Duration::from_secs(30),
                "no output started"
            );
            std::thread::sleep(Duration::from_millis(2));
        }
        std::thread::sleep(Duration::from_millis(delay_ms));
        // SAFETY: signalling our own child process.
        unsafe { libc::kill(child.id() as i32, sig) };
        let status = child.wait().unwrap();
        use std::os::unix::process::ExitStatusExt;
        let finished = status.code() == Some(0);
        if finished {
            // The run ended before the signal: OUT is complete and replaced.
            assert!(
                out.join("report.json").is_file(),
                "signal {sig} at {delay_ms} ms"
            );
            std::fs::remove_dir_all(&out).unwrap();
            std::fs::create_dir(&out).unwrap();
            std::fs::write(out.join("earlier-result.txt"), "keep me").unwrap();
        } else {
            interrupted += 1;
            assert_eq!(
                snapshot(&out),
                before,
                "signal {sig} at {delay_ms} ms: OUT changed"
            );
            if sig == libc::SIGKILL {
                assert_eq!(status.signal(), Some(libc::SIGKILL));
            } else {
                assert_eq!(
                    status.code(),
                    Some(128 + sig),
                    "signal {sig} at {delay_ms} ms"
                );
                let left: Vec<String> = std::fs::read_dir(tmp.path())
                    .unwrap()
                    .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
                    .filter(|n| n.contains(".modalmap-"))
                    .collect();
                assert!(
                    left.is_empty(),
                    "signal {sig} at {delay_ms} ms left {left:?}"
                );
            }
        }
    }
    assert!(
        interrupted >= 4,
        "too few runs were interrupted ({interrupted})"
    );
    // After the SIGKILLs, one more run recovers and leaves nothing behind.
    let ok = map_command(&field, &out, &["--phases", "6"])
        .status()
        .unwrap();
    assert!(ok.success());
    assert!(out.join("report.json").is_file());
    assert!(
        leftovers(tmp.path()).is_empty(),
        "{:?}",
        leftovers(tmp.path())
    );
}
