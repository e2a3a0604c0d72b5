//! Outside programs a test drives (Chromium, Slurm) are provided by the test itself: when
//! one is missing, Debian's packages are installed with apt-get (as root, the README's
//! fresh machine), once, under a lock so two tests never run apt-get together. No test
//! skips itself: without root or apt-get it fails and says what to install.

use std::process::Command;

fn present(command: &str) -> bool {
    Command::new("sh")
        .args(["-c", &format!("command -v {command}")])
        .output()
        .is_ok_and(|o| o.status.success())
}

/// Makes sure every one of `commands` is on the PATH, installing `packages` if not.
pub fn provide(commands: &[&str], packages: &[&str]) {
    if commands.iter().all(|c| present(c)) {
        return;
    }
    let lock = std::fs::File::create(std::env::temp_dir().join("modalmap-tests-apt.lock"))
        .expect("a lock file in the temporary folder");
    lock.lock().expect("the apt lock of the tests");
    if commands.iter().all(|c| present(c)) {
        return;
    }
    let root = Command::new("id")
        .arg("-u")
        .output()
        .is_ok_and(|o| String::from_utf8_lossy(&o.stdout).trim() == "0");
    assert!(
        root && present("apt-get"),
        "this test needs {} (Debian packages {}); install them, or run the tests as root on Debian so they install themselves",
        commands.join(", "),
        packages.join(" ")
    );
    eprintln!("installing {} for this test (apt-get)", packages.join(" "));
    let update = Command::new("apt-get")
        .args(["update", "-qq"])
        .status()
        .expect("apt-get runs");
    assert!(update.success(), "apt-get update failed");
    let install = Command::new("apt-get")
        .args(["install", "-y", "-qq"])
        .args(packages)
        .env("DEBIAN_FRONTEND", "noninteractive")
        .status()
        .expect("apt-get runs");
    assert!(
        install.success() && commands.iter().all(|c| present(c)),
        "apt-get could not install {}",
        packages.join(" ")
    );
}
