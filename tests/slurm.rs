//! The Slurm recipe end to end on a real single-node cluster: tests/slurm/run.sh starts
//! munge, slurmctld and slurmd on loopback, runs `fit`, a 4-task array job of
//! `apply --shard`, a dependent `merge` job, compares with a single-machine run, and stops
//! everything it started. It needs root and Debian's slurm-wlm and munge (`.ci/run`
//! installs them). Without them the test fails and says why; set MODALMAP_SKIP_SLURM=1 to
//! skip it knowingly on a machine without Slurm.

#[test]
fn array_job_on_a_real_slurm_cluster_matches_one_machine() {
    if std::env::var_os("MODALMAP_SKIP_SLURM").is_some() {
        eprintln!("SKIPPED: the Slurm test (MODALMAP_SKIP_SLURM is set)");
        return;
    }
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
        "the Slurm test failed (set MODALMAP_SKIP_SLURM=1 only on a machine without Slurm):\n{stdout}\n{stderr}"
    );
    assert!(
        stdout.contains("merged summary equals the single-machine run"),
        "{stdout}"
    );
}
