//! The Slurm recipe end to end on a real single-node cluster: tests/slurm/run.sh starts
//! munge, slurmctld and slurmd on loopback, runs `fit`, a 4-task array job of
//! `apply --shard`, a dependent `merge` job, one task rerun alone, compares with a
//! single-machine run, and stops
//! everything it started. It needs root and Debian's slurm-wlm and munge, which the test
//! installs when they are missing.

mod common;

#[test]
fn array_job_on_a_real_slurm_cluster_matches_one_machine() {
    common::provide::provide(
        &["munged", "slurmctld", "slurmd", "sbatch", "sinfo"],
        &["slurm-wlm", "munge"],
    );
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/slurm/run.sh");
    let out = std::process::Command::new("bash")
        .arg(script)
        .arg(env!("CARGO_BIN_EXE_modalmap"))
        .output()
        .expect("bash runs");
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        out.status.success(),
        "the Slurm test failed:\n{stdout}\n{stderr}"
    );
    assert!(
        stdout.contains("merged summary equals the single-machine run"),
        "{stdout}"
    );
    assert!(
        stdout.contains("task 2 rerun alone relabelled rock5 and kept rock9"),
        "{stdout}"
    );
}
