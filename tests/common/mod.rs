//! Helpers shared by the integration tests: scoring a segmentation against ground truth.

#![allow(dead_code)]

pub mod fields;
pub mod provide;

/// Agreement of predicted labels with true labels (both 0 = void/unassigned).
pub struct Score {
    /// Fraction of pixels whose matched label equals the truth.
    pub accuracy: f64,
    /// For each true phase (index = label − 1): (true area fraction, predicted area
    /// fraction of its matched phase), or None if no predicted phase holds more than half
    /// of its pixels (a phase is not "found" by a few overlapping pixels).
    pub phases: Vec<(f64, Option<f64>)>,
    /// Predicted phases with no true phase matched to them.
    pub extra_phases: usize,
    /// Predicted label → true label.
    pub mapping: Vec<(u16, u16)>,
}

/// Matches predicted to true labels (`synth::match_labels`) and scores the result.
pub fn score(pred: &[u16], truth: &[u16]) -> Score {
    assert_eq!(pred.len(), truth.len());
    let map_p: Vec<Option<usize>> = modalmap::synth::match_labels(pred, truth)
        .into_iter()
        .map(|m| m.map(usize::from))
        .collect();
    let kp = map_p.len();
    let kt = *truth.iter().max().unwrap() as usize + 1;
    let n = pred.len() as f64;
    let correct = pred
        .iter()
        .zip(truth)
        .filter(|(&p, &t)| map_p[p as usize] == Some(t as usize))
        .count();
    let count = |v: &[u16], l: usize| v.iter().filter(|&&x| x as usize == l).count() as f64 / n;
    let recall = |p: usize, t: usize| {
        let of_t = truth.iter().filter(|&&x| x as usize == t).count();
        let hit = pred
            .iter()
            .zip(truth)
            .filter(|(&a, &b)| a as usize == p && b as usize == t)
            .count();
        hit as f64 / of_t.max(1) as f64
    };
    let phases = (1..kt)
        .map(|t| {
            let p = (1..kp).find(|&p| map_p[p] == Some(t) && recall(p, t) > 0.5);
            (count(truth, t), p.map(|p| count(pred, p)))
        })
        .collect();
    let mapping = (0..kp)
        .filter_map(|p| map_p[p].map(|t| (p as u16, t as u16)))
        .collect();
    Score {
        accuracy: correct as f64 / n,
        phases,
        extra_phases: (1..kp)
            .filter(|&p| map_p[p].is_none() && pred.iter().any(|&x| x as usize == p))
            .count(),
        mapping,
    }
}

/// What a run of the binary produced.
pub struct Run {
    /// Exit code (−1 if killed by a signal).
    pub code: i32,
    /// Standard output.
    pub stdout: String,
    /// Standard error.
    pub stderr: String,
}

/// Runs the built `modalmap` binary with `args`.
pub fn modalmap(args: &[&str]) -> Run {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_modalmap"))
        .args(args)
        .output()
        .expect("binary runs");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// The cells of one CSV row (RFC 4180 quoting: a quoted cell may hold commas and `""`).
pub fn csv_cells(row: &str) -> Vec<String> {
    let (mut cells, mut cell, mut quoted) = (Vec::new(), String::new(), false);
    let mut chars = row.chars().peekable();
    while let Some(c) = chars.next() {
        match (c, quoted) {
            ('"', true) if chars.peek() == Some(&'"') => {
                cell.push('"');
                chars.next();
            }
            ('"', _) => quoted = !quoted,
            (',', false) => cells.push(std::mem::take(&mut cell)),
            _ => cell.push(c),
        }
    }
    cells.push(cell);
    cells
}

/// The rows of a CSV text, as [`csv_cells`].
pub fn csv_rows(text: &str) -> Vec<Vec<String>> {
    text.lines().map(csv_cells).collect()
}
