//! Every command line of the README's and the user guide's shell examples that works on the
//! bundled data runs as written, in a scratch folder holding a copy of sample-maps/. Lines
//! that are templates (placeholders such as INPUT or path/to/field) are listed, not run;
//! the test fails if it finds fewer runnable lines than the docs hold today.

use std::path::{Path, PathBuf};
use std::process::Command;

const DOCS: [&str; 2] = ["README.md", "notebooks-free-docs/user-guide.md"];

/// Lines of the fenced `sh` blocks of a Markdown text.
fn shell_lines(markdown: &str) -> Vec<String> {
    let mut lines = Vec::new();
    let mut inside = false;
    for line in markdown.lines() {
        let t = line.trim();
        if t.starts_with("```") {
            inside = !inside && t == "```sh";
            continue;
        }
        if inside && !t.is_empty() {
            lines.push(t.to_string());
        }
    }
    lines
}

/// Splits a shell line into words: double quotes group, `#` outside quotes starts a comment.
fn words(line: &str) -> Vec<String> {
    let (mut out, mut cur, mut quoted, mut any) = (Vec::new(), String::new(), false, false);
    for c in line.chars() {
        match c {
            '"' => {
                quoted = !quoted;
                any = true;
            }
            '#' if !quoted => break,
            c if c.is_whitespace() && !quoted => {
                if any {
                    out.push(std::mem::take(&mut cur));
                    any = false;
                }
            }
            c => {
                cur.push(c);
                any = true;
            }
        }
    }
    if any {
        out.push(cur);
    }
    out
}

/// The modalmap arguments of a documented command, if it is one (`modalmap …` or
/// `cargo run --release -- …`).
fn modalmap_args(w: &[String]) -> Option<Vec<String>> {
    match w {
        [first, rest @ ..] if first == "modalmap" => Some(rest.to_vec()),
        [c, r, rel, dash, rest @ ..]
            if c == "cargo" && r == "run" && rel == "--release" && dash == "--" =>
        {
            Some(rest.to_vec())
        }
        _ => None,
    }
}

/// A template rather than a command: it names files the reader substitutes.
fn is_template(args: &[String]) -> bool {
    args.iter().any(|a| {
        a.chars().any(|c| c.is_ascii_uppercase()) && a.chars().all(|c| !c.is_lowercase())
            || a.starts_with('[')
            || a.contains("path/to")
            || a.starts_with("field")
            || a.contains('*')
            || a.starts_with("survey/")
            || a == "model.json"
            || a == "out" && args.first().is_some_and(|c| c == "merge")
    })
}

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let p = e.unwrap().path();
        std::fs::copy(&p, to.join(p.file_name().unwrap())).unwrap();
    }
}

#[test]
fn the_documented_commands_run_as_written() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let scratch = tempfile::tempdir().unwrap();
    copy_dir(
        &root.join("sample-maps"),
        &scratch.path().join("sample-maps"),
    );
    let (mut ran, mut templates) = (Vec::new(), Vec::new());
    for doc in DOCS {
        let text = std::fs::read_to_string(root.join(doc)).unwrap();
        for line in shell_lines(&text) {
            let Some(args) = modalmap_args(&words(&line)) else {
                continue;
            };
            if is_template(&args) {
                templates.push(format!("{doc}: {line}"));
                continue;
            }
            let out = Command::new(env!("CARGO_BIN_EXE_modalmap"))
                .args(&args)
                .current_dir(scratch.path())
                .output()
                .unwrap();
            assert!(
                out.status.success(),
                "{doc}: `{line}` failed:\n{}",
                String::from_utf8_lossy(&out.stderr)
            );
            ran.push(format!("{doc}: {line}"));
        }
    }
    println!("ran:\n  {}", ran.join("\n  "));
    println!("templates, not run:\n  {}", templates.join("\n  "));
    // The README's main command, its sample regeneration, and the user guide's three
    // calibrations and demo.
    assert!(
        ran.len() >= 6,
        "only {} documented commands ran: {ran:?}",
        ran.len()
    );
    // `synth -o sample-maps` (run above, in the copy) writes the bundled maps again.
    for e in std::fs::read_dir(root.join("sample-maps")).unwrap() {
        let p = e.unwrap().path();
        let again = scratch
            .path()
            .join("sample-maps")
            .join(p.file_name().unwrap());
        assert_eq!(
            std::fs::read(&p).unwrap(),
            std::fs::read(again).unwrap(),
            "{p:?}"
        );
    }
}

#[test]
fn the_shell_reader_splits_like_a_shell() {
    assert_eq!(
        words(r#"modalmap map x --calibrate "Cu6Sn5 (eta)" -o out   # comment"#),
        [
            "modalmap",
            "map",
            "x",
            "--calibrate",
            "Cu6Sn5 (eta)",
            "-o",
            "out"
        ]
    );
    assert!(is_template(&words("map INPUT -o OUT")));
    assert!(!is_template(&words("map sample-maps -o out --force")));
    let md = "text\n```sh\na b\n\n```\n```toml\nc\n```\n";
    assert_eq!(shell_lines(md), ["a b"]);
}

/// The cluster guide shows the Slurm scripts the Slurm test runs, line for line (their
/// header comments aside).
#[test]
fn the_cluster_guide_shows_the_tested_scripts() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let guide = std::fs::read_to_string(root.join("notebooks-free-docs/cluster.md")).unwrap();
    let blocks: Vec<Vec<&str>> = guide
        .split("```bash\n")
        .skip(1)
        .map(|b| b.split("```").next().unwrap().lines().collect())
        .collect();
    for script in ["apply-array.sbatch", "merge.sbatch"] {
        let text = std::fs::read_to_string(root.join("tests/slurm").join(script)).unwrap();
        let lines: Vec<&str> = text
            .lines()
            .filter(|l| !(l.starts_with("# ") || *l == "#"))
            .collect();
        assert!(
            blocks.contains(&lines),
            "cluster.md does not show {script} as it is:\n{}",
            lines.join("\n")
        );
    }
}
