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

#[test]
fn killed_run_leaves_out_untouched() {
    let tmp = tempfile::tempdir().unwrap();
    let field = tmp.path().join("field");
    let (micro, opts) = modalmap::synth::benchmark_rock(640, 3);
    let f = modalmap::synth::generate(&micro, &opts).unwrap();
    modalmap::synth::write_folder(&f, &field).unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("earlier-result.txt"), "keep me").unwrap();

    let mut child = Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .args([
            "map",
            field.to_str().unwrap(),
            "-o",
            out.to_str().unwrap(),
            "--force",
            "--quiet",
            "--threads",
            "1",
        ])
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
    let ok = Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .args([
            "map",
            field.to_str().unwrap(),
            "-o",
            out.to_str().unwrap(),
            "--force",
            "--quiet",
            "--phases",
            "6",
        ])
        .status()
        .unwrap();
    assert!(ok.success());
    assert!(out.join("report.json").is_file() && !out.join("earlier-result.txt").exists());
    assert!(
        temp_dirs(tmp.path()).is_empty(),
        "{:?}",
        temp_dirs(tmp.path())
    );
}
