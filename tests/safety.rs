//! Nothing lost, nothing hung: a clumsy or hostile command never deletes or changes an
//! input, never hangs, never aborts, and leaves OUT either as it was or complete, with no
//! temporary or aside folder behind. Every run here has a time limit.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// What a run of the binary produced.
struct Run {
    code: i32,
    stdout: String,
    stderr: String,
}

/// Runs the binary with a time limit; a run that does not end in time fails the test.
fn run_in(dir: &Path, args: &[&str], limit_s: u64) -> Run {
    let mut child = Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .args(args)
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if start.elapsed() > Duration::from_secs(limit_s) {
            child.kill().unwrap();
            child.wait().unwrap();
            panic!("modalmap {args:?} hung (no end after {limit_s} s)");
        }
        std::thread::sleep(Duration::from_millis(10));
    }
    let out = child.wait_with_output().unwrap();
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

fn run(dir: &Path, args: &[&str]) -> Run {
    run_in(dir, args, 60)
}

/// Every file below `root` with its bytes.
fn snapshot(root: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut out = BTreeMap::new();
    let Ok(meta) = std::fs::symlink_metadata(root) else {
        return out;
    };
    if meta.is_file() {
        out.insert(root.to_path_buf(), std::fs::read(root).unwrap());
    } else if meta.is_dir() {
        for e in std::fs::read_dir(root).unwrap() {
            out.extend(snapshot(&e.unwrap().path()));
        }
    }
    out
}

/// Names in `dir` that a run keeps beside its output.
fn leftovers(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains(".modalmap-"))
        .collect()
}

fn mkfifo(p: &Path) {
    let c = std::ffi::CString::new(p.to_str().unwrap()).unwrap();
    // SAFETY: a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
}

/// A small invented field of 64 × 64 pixels in `dir/name`.
fn field(dir: &Path, name: &str) -> PathBuf {
    let f = dir.join(name);
    let r = run(
        dir,
        &[
            "synth",
            "-o",
            f.to_str().unwrap(),
            "--scenario",
            "benchmark-rock",
            "--size",
            "64",
            "--seed",
            "5",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    f
}

/// The checks every refusal must pass: the code, the names in the message, no change to
/// anything under `watched`, no leftovers beside it.
fn refused(
    r: &Run,
    code: i32,
    names: &[&str],
    watched: &Path,
    before: &BTreeMap<PathBuf, Vec<u8>>,
) {
    assert_eq!(r.code, code, "stdout {}\nstderr {}", r.stdout, r.stderr);
    for n in names {
        assert!(r.stderr.contains(n), "message lacks {n:?}: {}", r.stderr);
    }
    assert!(r.stderr.contains("fix:"), "no fix given: {}", r.stderr);
    assert_eq!(&snapshot(watched), before, "the inputs changed");
    assert!(leftovers(watched).is_empty(), "{:?}", leftovers(watched));
}

#[test]
fn force_never_replaces_an_input() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let top = d.join("top");
    std::fs::create_dir(&top).unwrap();
    let f = field(&top, "f");
    std::fs::write(top.join("run.toml"), "seed = 3\n").unwrap();
    std::fs::copy(f.join("Si_Ka.png"), top.join("BSE.png")).unwrap();
    let before = snapshot(&top);
    let fs = f.to_str().unwrap();
    let ts = top.to_str().unwrap();

    // The field as its own output, and its parent as the output.
    let r = run(d, &["map", fs, "-o", fs, "--force"]);
    refused(&r, 2, &["top/f", "field"], &top, &before);
    let r = run(d, &["map", fs, "-o", ts, "--force"]);
    refused(&r, 2, &["top", "field"], &top, &before);
    // A configuration file or BSE image inside OUT (the field elsewhere).
    let h = field(d, "h");
    let hs = h.to_str().unwrap();
    for (flag, file, what) in [
        ("--config", "run.toml", "configuration file"),
        ("--bse", "BSE.png", "BSE image"),
    ] {
        let p = top.join(file);
        let r = run(
            d,
            &["map", hs, "-o", ts, "--force", flag, p.to_str().unwrap()],
        );
        refused(&r, 2, &[what, file], &top, &before);
    }
    // fit onto one of the maps.
    let map = f.join("Fe_Ka.png");
    let r = run(d, &["fit", fs, "-o", map.to_str().unwrap(), "--force"]);
    refused(&r, 2, &["Fe_Ka.png", "field"], &top, &before);
    // --force onto a folder that holds another field: never replaced.
    let g = field(d, "g");
    let g_before = snapshot(&g);
    let r = run(d, &["map", fs, "-o", g.to_str().unwrap(), "--force"]);
    refused(&r, 4, &["holds a field's files"], &g, &g_before);
    assert_eq!(snapshot(&top), before);
}

#[test]
fn apply_and_merge_never_replace_their_inputs() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let fields = d.join("fields");
    std::fs::create_dir(&fields).unwrap();
    let f1 = field(&fields, "f1");
    let model = d.join("model.json");
    let r = run(
        d,
        &[
            "fit",
            f1.to_str().unwrap(),
            "-o",
            model.to_str().unwrap(),
            "--phases",
            "3",
            "--quiet",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let before = snapshot(&fields);
    let (m, f, fs) = (
        model.to_str().unwrap(),
        f1.to_str().unwrap(),
        fields.to_str().unwrap(),
    );
    let r = run(d, &["apply", m, f, "-o", fs, "--force"]);
    refused(&r, 2, &["f1", "field"], &fields, &before);
    // The model inside the field's output.
    let out = d.join("out");
    let r = run(d, &["apply", m, f, "-o", out.to_str().unwrap(), "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let model_in_out = out.join("f1/model.json");
    std::fs::copy(&model, &model_in_out).unwrap();
    let out_before = snapshot(&out);
    let r = run(
        d,
        &[
            "apply",
            model_in_out.to_str().unwrap(),
            f,
            "-o",
            out.to_str().unwrap(),
            "--force",
        ],
    );
    refused(&r, 2, &["model file"], &out, &out_before);
    std::fs::remove_file(&model_in_out).unwrap();
    // merge into the folder it reads.
    let out_before = snapshot(&out);
    let o = out.to_str().unwrap();
    let r = run(d, &["merge", o, "-o", o, "--force"]);
    refused(&r, 2, &["report"], &out, &out_before);
    let inner = out.join("f1").join("summary");
    let r = run(
        d,
        &[
            "merge",
            o,
            "-o",
            out.join("f1").to_str().unwrap(),
            "--force",
        ],
    );
    refused(&r, 2, &["report"], &out, &out_before);
    assert!(!inner.exists());
}

#[test]
fn synth_never_writes_into_a_field_or_a_non_empty_folder() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let f = field(d, "f");
    let before = snapshot(&f);
    for extra in [&[][..], &["--force"][..]] {
        let mut args = vec!["synth", "-o", "f"];
        args.extend_from_slice(extra);
        let r = run(d, &args);
        refused(&r, 4, &["f"], &f, &before);
    }
    let notes = d.join("notes");
    std::fs::create_dir(&notes).unwrap();
    std::fs::write(notes.join("a.txt"), "mine").unwrap();
    let nb = snapshot(&notes);
    let r = run(d, &["synth", "-o", "notes"]);
    refused(&r, 4, &["already holds files", "--force"], &notes, &nb);
    // --truth onto an existing file needs --force.
    std::fs::write(d.join("truth.png"), "keep").unwrap();
    let r = run(d, &["synth", "-o", "new", "--truth", "truth.png"]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    assert_eq!(std::fs::read(d.join("truth.png")).unwrap(), b"keep");
    assert!(!d.join("new").exists());
    // --truth onto a map of a field, even with --force.
    let map = f.join("Fe_Ka.png");
    let r = run(
        d,
        &[
            "synth",
            "-o",
            "new",
            "--truth",
            map.to_str().unwrap(),
            "--force",
        ],
    );
    refused(&r, 4, &["Fe_Ka.png", "field"], &f, &before);
    assert!(!d.join("new").exists());
}

#[test]
fn named_pipes_and_devices_are_refused_without_hanging() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    // A FIFO as a map, as field.toml, as --config, as the model, as a report.
    let f = field(d, "f");
    std::fs::remove_file(f.join("Fe_Ka.png")).unwrap();
    mkfifo(&f.join("Fe_Ka.png"));
    let r = run_in(d, &["inspect", "f"], 20);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(
        r.stderr.contains("Fe_Ka.png") && r.stderr.contains("named pipe"),
        "{}",
        r.stderr
    );

    let g = field(d, "g");
    std::fs::remove_file(g.join("field.toml")).unwrap();
    mkfifo(&g.join("field.toml"));
    let r = run_in(d, &["inspect", "g"], 20);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("field.toml") && r.stderr.contains("named pipe"));

    field(d, "h");
    mkfifo(&d.join("run.toml"));
    let r = run_in(d, &["map", "h", "-o", "o1", "--config", "run.toml"], 20);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("run.toml") && r.stderr.contains("named pipe"));
    let r = run_in(d, &["map", "h", "-o", "o2", "--config", "/dev/zero"], 20);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("/dev/zero") && r.stderr.contains("device"));
    let r = run_in(d, &["apply", "/dev/zero", "h", "-o", "o3"], 20);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stderr.contains("device"));
    assert!(!d.join("o1").exists() && !d.join("o2").exists() && !d.join("o3").exists());
    assert!(leftovers(d).is_empty(), "{:?}", leftovers(d));

    // One such field does not block a batch: the others are labelled, apply.json written.
    let r = run(
        d,
        &["fit", "h", "-o", "model.json", "--phases", "3", "--quiet"],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = run_in(
        d,
        &["apply", "model.json", "f", "h", "-o", "batch", "--quiet"],
        60,
    );
    assert_eq!(r.code, 5, "{}", r.stderr);
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("batch/apply.json")).unwrap()).unwrap();
    let status: Vec<&str> = summary["fields"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["status"].as_str().unwrap())
        .collect();
    assert_eq!(status, ["failed", "ok"]);
}

#[test]
fn merge_walks_symbolic_link_loops_once() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let m = d.join("m");
    std::fs::create_dir(&m).unwrap();
    for l in ["l1", "l2", "l3", "l4"] {
        std::os::unix::fs::symlink(".", m.join(l)).unwrap();
    }
    let r = run_in(d, &["merge", "m", "-o", "s"], 20);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("no report.json found"), "{}", r.stderr);
    assert!(!d.join("s").exists());
}

#[test]
fn a_field_too_large_for_memory_is_refused_before_decoding() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    field(d, "f"); // ten maps of 64 × 64 = 40 960 values
    let before = snapshot(&d.join("f"));
    let r = run(d, &["map", "f", "-o", "out", "--max-pixels", "5000"]);
    refused(
        &r,
        3,
        &["f", "40960 values", "20000 values", "--max-pixels"],
        &d.join("f"),
        &before,
    );
    assert!(!d.join("out").exists());
    let r = run(d, &["inspect", "f", "--max-pixels", "0"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("--max-pixels 0"), "{}", r.stderr);
}

/// A model fitted on a small field, as JSON.
fn model(d: &Path, method: &str) -> serde_json::Value {
    if !d.join("f").exists() {
        field(d, "f");
    }
    let name = format!("{method}.json");
    let r = run(
        d,
        &[
            "fit", "f", "-o", &name, "--force", "--phases", "3", "--method", method, "--quiet",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    serde_json::from_slice(&std::fs::read(d.join(name)).unwrap()).unwrap()
}

#[test]
fn tampered_models_are_refused_before_use() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let mut cases: Vec<(String, serde_json::Value, &str)> = Vec::new();
    for (method, array) in [
        ("poisson", "rates"),
        ("gmm", "means"),
        ("kmeans", "centroids"),
    ] {
        let good = model(d, method);
        let mut short = good.clone();
        short["clusters"]["model"][array]
            .as_array_mut()
            .unwrap()
            .pop();
        cases.push((format!("{method}: {array} one short"), short, array));
    }
    let good = model(d, "poisson");
    let mut twice = good.clone();
    twice["phases"][1]["model_index"] = twice["phases"][0]["model_index"].clone();
    cases.push((
        "two phases, one cluster".into(),
        twice,
        "taken by another phase",
    ));
    let mut zero = good.clone();
    let n = zero["clusters"]["model"]["rates"].as_array().unwrap().len();
    zero["clusters"]["model"]["rates"] = serde_json::json!(vec![0.0; n]);
    cases.push(("all rates 0".into(), zero, "all rates 0"));
    let mut long = good.clone();
    long["phases"][0]["name"] = serde_json::json!("x".repeat(1_000_000));
    cases.push(("a million-character name".into(), long, "longer than 200"));
    let mut frac = good.clone();
    frac["phases"][0]["training_area_fraction"] = serde_json::json!(-3.0);
    cases.push(("negative training fraction".into(), frac, "outside 0 to 1"));
    for (label, value, says) in cases {
        let path = d.join("bad.json");
        std::fs::write(&path, serde_json::to_vec(&value).unwrap()).unwrap();
        let r = run(d, &["apply", "bad.json", "f", "-o", "out-bad"]);
        assert_eq!(r.code, 3, "{label}: {}", r.stderr);
        assert!(
            r.stderr.contains("bad.json")
                && r.stderr.contains("inconsistent")
                && r.stderr.contains(says),
            "{label}: {}",
            r.stderr
        );
        assert!(
            r.stderr.len() < 2000,
            "{label}: the message repeats the file"
        );
        assert!(!d.join("out-bad").exists(), "{label}");
    }
}

#[test]
fn tampered_reports_are_refused_by_merge() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    field(d, "f");
    field(d, "g");
    let r = run(d, &["fit", "f", "-o", "m.json", "--phases", "3", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = run(d, &["apply", "m.json", "f", "g", "-o", "out", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let report = d.join("out/g/report.json");
    let good: serde_json::Value = serde_json::from_slice(&std::fs::read(&report).unwrap()).unwrap();
    let mut negative = good.clone();
    negative["phases"][0]["area_fraction"] = serde_json::json!(-3.0);
    let mut missing = good.clone();
    missing["phases"].as_array_mut().unwrap().pop();
    let mut over = good.clone();
    over["unassigned_fraction"] = serde_json::json!(0.9);
    for (label, value, says) in [
        ("area fraction -3", negative, "outside 0 to 1"),
        ("a phase missing", missing, "lists the phases"),
        ("fractions over 1", over, "more than 1"),
    ] {
        std::fs::write(&report, serde_json::to_vec(&value).unwrap()).unwrap();
        let r = run(d, &["merge", "out", "-o", "summary"]);
        assert_eq!(r.code, 3, "{label}: {}", r.stderr);
        assert!(
            r.stderr.contains("g/report.json") && r.stderr.contains(says),
            "{label}: {}",
            r.stderr
        );
        assert!(!d.join("summary").exists());
    }
}

#[test]
fn a_look_alike_letter_is_named_in_the_report() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let f = field(d, "f");
    // Cyrillic ie (U+0435) for the e of Fe.
    std::fs::rename(f.join("Fe_Ka.png"), f.join("F\u{0435}_Ka.png")).unwrap();
    let r = run(d, &["map", "f", "-o", "out", "--phases", "3"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let report: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("out/report.json")).unwrap()).unwrap();
    let warnings = report["warnings"].to_string();
    assert!(warnings.contains("did you mean Fe?"), "{warnings}");
    assert!(r.stdout.contains("did you mean Fe?"), "{}", r.stdout);
}

#[test]
fn outputs_that_cannot_work_are_refused_before_any_work() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    field(d, "f");
    std::os::unix::fs::symlink("nowhere", d.join("dangling")).unwrap();
    std::os::unix::fs::symlink("loop", d.join("loop")).unwrap();
    for out in ["dangling", "loop"] {
        let r = run(d, &["map", "f", "-o", out, "--phases", "3"]);
        assert_eq!(r.code, 4, "{out}: {}", r.stderr);
        assert!(r.stderr.contains("symbolic link"), "{out}: {}", r.stderr);
    }
    let long = "n".repeat(240);
    let r = run(d, &["map", "f", "-o", &long, "--phases", "3"]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    assert!(r.stderr.contains("shorter name"), "{}", r.stderr);
    assert!(leftovers(d).is_empty(), "{:?}", leftovers(d));
    // `-o new/.` is the folder `new`.
    let r = run(d, &["map", "f", "-o", "new/.", "--phases", "3", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(d.join("new/report.json").is_file());
}

#[test]
fn values_outside_physical_ranges_are_refused_with_the_range() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let f = field(d, "f");
    let r = run(d, &["map", "f", "-o", "o", "--kv", "1e9"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("--kv") && r.stderr.contains("0.1 to 400 kV"),
        "{}",
        r.stderr
    );
    let r = run(d, &["map", "f", "-o", "o", "--bse-pixel-size", "1e9"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("0.0001 to 10000 µm"), "{}", r.stderr);
    std::fs::write(
        f.join("field.toml"),
        "beam_kv = 15\nbse_pixel_size_um = 0.05\n",
    )
    .unwrap();
    let r = run(d, &["map", "f", "-o", "o", "--phases", "3"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("bse_pixel_size_um in") && !r.stderr.contains("--bse-pixel-size"),
        "{}",
        r.stderr
    );
    std::fs::write(f.join("field.toml"), "beam_kv = 1e9\n").unwrap();
    let r = run(d, &["map", "f", "-o", "o"]);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(
        r.stderr.contains("field.toml") && r.stderr.contains("0.1 to 400 kV"),
        "{}",
        r.stderr
    );
    std::fs::write(f.join("field.toml"), "").unwrap();
    let r = run(d, &["map", "f", "-o", "o", "--min-counts", "1e308"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("no non-empty pixels")
            && r.stderr.contains("threshold")
            && r.stderr.contains("--min-counts"),
        "{}",
        r.stderr
    );
    assert!(!d.join("o").exists());
}

#[test]
fn leftovers_of_killed_runs_are_cleaned_and_an_aside_folder_put_back() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    field(d, "f");
    // The state a kill between the commit's two renames leaves: OUT gone, the old results
    // aside, the new ones in a temporary folder. Our own pid is alive, yet the lock is free.
    let pid = std::process::id();
    let aside = d.join(format!(".out.modalmap-old-{pid}"));
    let tmp = d.join(format!(".out.modalmap-tmp-{pid}"));
    std::fs::create_dir(&aside).unwrap();
    std::fs::write(aside.join("earlier.txt"), "old results").unwrap();
    std::fs::create_dir(&tmp).unwrap();
    std::fs::write(tmp.join("half.json"), "{").unwrap();
    std::fs::write(d.join(".out.modalmap-lock"), "pid 1\n").unwrap();
    // Without --force the old results come back and stay.
    let r = run(d, &["map", "f", "-o", "out", "--phases", "3"]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    assert!(r.stderr.contains("already holds files"), "{}", r.stderr);
    assert_eq!(
        std::fs::read_to_string(d.join("out/earlier.txt")).unwrap(),
        "old results"
    );
    assert!(leftovers(d).is_empty(), "{:?}", leftovers(d));
    // Again, with --force: the report says what was put back, and nothing is left over.
    std::fs::rename(d.join("out"), &aside).unwrap();
    let r = run(d, &["map", "f", "-o", "out", "--phases", "3", "--force"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let report = std::fs::read_to_string(d.join("out/report.json")).unwrap();
    assert!(
        report.contains("previous contents were put back"),
        "{report}"
    );
    assert!(!d.join("out/earlier.txt").exists());
    assert!(leftovers(d).is_empty(), "{:?}", leftovers(d));
}

#[test]
fn a_live_run_is_never_disturbed() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    field(d, "f");
    // Hold the lock as a live run would (in any PID namespace: the lock is on the file).
    let lock = std::fs::File::create(d.join(".out.modalmap-lock")).unwrap();
    lock.try_lock().unwrap();
    let live_tmp = d.join(".out.modalmap-tmp-4000000");
    std::fs::create_dir(&live_tmp).unwrap();
    let r = run(d, &["map", "f", "-o", "out", "--phases", "3"]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    assert!(r.stderr.contains("another modalmap run"), "{}", r.stderr);
    assert!(live_tmp.is_dir(), "a live run's folder was removed");
    assert!(!d.join("out").exists());
    drop(lock);
    let r = run(d, &["map", "f", "-o", "out", "--phases", "3", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(!live_tmp.exists(), "a dead run's folder was left");
}

#[test]
fn an_interrupted_apply_resumes() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    for n in ["a", "b", "c"] {
        field(d, n);
    }
    let r = run(d, &["fit", "a", "-o", "m.json", "--phases", "3", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = run(d, &["apply", "m.json", "a", "b", "-o", "out", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let a_before = snapshot(&d.join("out/a"));
    // The whole batch again without --force: a and b are kept, c is labelled.
    let r = run(d, &["apply", "m.json", "a", "b", "c", "-o", "out"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("kept 2 fields"), "{}", r.stdout);
    assert_eq!(snapshot(&d.join("out/a")), a_before);
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("out/apply.json")).unwrap()).unwrap();
    let done: Vec<&str> = summary["fields"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["field"].as_str().unwrap())
        .collect();
    assert_eq!(done, ["c"]);
    assert_eq!(summary["kept"].as_array().unwrap().len(), 2);
    // Outputs of another model are not taken for done.
    let r = run(
        d,
        &["fit", "b", "-o", "m2.json", "--phases", "2", "--quiet"],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = run(d, &["apply", "m2.json", "a", "-o", "out", "--quiet"]);
    assert_eq!(r.code, 5, "{}", r.stderr);
    assert!(r.stderr.contains("already holds files"), "{}", r.stderr);
}

#[test]
fn demo_works_beside_its_output_and_cleans_a_killed_demo() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    // What a killed demo leaves: its working folder beside OUT.
    let stale = d.join(".demo.modalmap-scratch-4000000/sample-maps");
    std::fs::create_dir_all(&stale).unwrap();
    std::fs::write(stale.join("Cu_Ka.png"), "half").unwrap();
    let r = run_in(d, &["demo", "-o", "demo"], 300);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(d.join("demo/report.json").is_file());
    assert!(leftovers(d).is_empty(), "{:?}", leftovers(d));
}
