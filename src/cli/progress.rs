//! Progress on standard error: a spinner or a bar on a terminal; plain lines, each with the
//! time elapsed, when standard error is a file or a pipe (a batch job's log); nothing with
//! `--quiet`.

use std::io::IsTerminal;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use crate::run::FieldOutcome;

enum Mode {
    Quiet,
    Terminal(indicatif::ProgressBar),
    Lines,
}

fn mode(quiet: bool, bar: impl FnOnce() -> indicatif::ProgressBar) -> Mode {
    if quiet {
        Mode::Quiet
    } else if std::io::stderr().is_terminal() {
        Mode::Terminal(bar())
    } else {
        Mode::Lines
    }
}

/// The stages of one command (`map`, `fit`).
pub(super) struct Stages {
    mode: Mode,
    start: Instant,
    last: Mutex<String>,
}

impl Stages {
    pub(super) fn new(quiet: bool) -> Stages {
        Stages {
            mode: mode(quiet, || {
                let s = indicatif::ProgressBar::new_spinner();
                s.enable_steady_tick(Duration::from_millis(120));
                s
            }),
            start: Instant::now(),
            last: Mutex::new(String::new()),
        }
    }

    /// A stage starts (a line only when it differs from the last one).
    pub(super) fn stage(&self, stage: &str) {
        match &self.mode {
            Mode::Quiet => {}
            Mode::Terminal(s) => s.set_message(stage.to_string()),
            Mode::Lines => {
                let mut last = self.last.lock().unwrap_or_else(|e| e.into_inner());
                if *last != stage {
                    eprintln!("[{}] {stage}", duration_text(self.start.elapsed()));
                    *last = stage.to_string();
                }
            }
        }
    }

    pub(super) fn finish(self) {
        if let Mode::Terminal(s) = self.mode {
            s.finish_and_clear();
        }
    }
}

/// The fields of an `apply` batch: a bar with an estimate of the time left on a terminal,
/// one line per finished field otherwise.
pub(super) struct Fields {
    mode: Mode,
    start: Instant,
    total: AtomicUsize,
    done: AtomicUsize,
}

impl Fields {
    pub(super) fn new(quiet: bool) -> Fields {
        Fields {
            mode: mode(quiet, || {
                let b = indicatif::ProgressBar::new(0);
                if let Ok(style) = indicatif::ProgressStyle::with_template(
                    "{bar:30} {pos}/{len} fields, {elapsed} elapsed, {prefix}  {msg}",
                ) {
                    b.set_style(style);
                }
                b
            }),
            start: Instant::now(),
            total: AtomicUsize::new(0),
            done: AtomicUsize::new(0),
        }
    }

    /// The number of fields to label is known.
    pub(super) fn start(&self, fields: usize) {
        self.total.store(fields, Ordering::SeqCst);
        let left = time_left(0, fields, Duration::ZERO);
        match &self.mode {
            Mode::Quiet => {}
            Mode::Terminal(b) => {
                b.set_length(fields as u64);
                b.set_prefix(left);
            }
            Mode::Lines => eprintln!("[0 s] labelling {fields} fields"),
        }
    }

    /// A field goes into a stage (shown on a terminal only: a log gets a line per field).
    pub(super) fn stage(&self, field: &str, stage: &str) {
        if let Mode::Terminal(b) = &self.mode {
            b.set_message(format!("{field}: {stage}"));
        }
    }

    /// A field is finished.
    pub(super) fn done(&self, o: &FieldOutcome) {
        let done = self.done.fetch_add(1, Ordering::SeqCst) + 1;
        let total = self.total.load(Ordering::SeqCst);
        let elapsed = self.start.elapsed();
        let left = time_left(done, total, elapsed);
        match &self.mode {
            Mode::Quiet => {}
            Mode::Terminal(b) => {
                b.set_message(o.field.clone());
                b.set_prefix(left);
                b.inc(1);
            }
            Mode::Lines => eprintln!(
                "[{}] {done}/{total} {}: {}; {left}",
                duration_text(elapsed),
                o.field,
                o.status
            ),
        }
    }

    pub(super) fn finish(self) {
        if let Mode::Terminal(b) = self.mode {
            b.finish_and_clear();
        }
    }
}

/// The time left after `done` of `total` fields in `elapsed`, at the mean pace so far;
/// unknown until the first field is finished.
pub(super) fn time_left(done: usize, total: usize, elapsed: Duration) -> String {
    if done >= total {
        return "all done".into();
    }
    if done == 0 {
        return "time left known after the first field".into();
    }
    let per_field = elapsed.as_secs_f64() / done as f64;
    let left = Duration::from_secs_f64(per_field * (total - done) as f64);
    format!("about {} left", duration_text(left))
}

/// A duration as a person reads it: "42 s", "3 min 05 s", "2 h 07 min".
pub(super) fn duration_text(d: Duration) -> String {
    let s = d.as_secs_f64().round() as u64;
    match s {
        0..=59 => format!("{s} s"),
        60..=3599 => format!("{} min {:02} s", s / 60, s % 60),
        _ => format!("{} h {:02} min", s / 3600, (s % 3600) / 60),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_read_as_a_person_reads_them() {
        assert_eq!(duration_text(Duration::from_millis(400)), "0 s");
        assert_eq!(duration_text(Duration::from_secs(42)), "42 s");
        assert_eq!(duration_text(Duration::from_secs(185)), "3 min 05 s");
        assert_eq!(duration_text(Duration::from_secs(7620)), "2 h 07 min");
    }

    /// The estimate is the mean pace so far times the fields left, never "0 s" before
    /// anything is known.
    #[test]
    fn time_left_follows_the_pace_so_far() {
        let t = |s| Duration::from_secs(s);
        assert_eq!(
            time_left(0, 10, t(30)),
            "time left known after the first field"
        );
        assert_eq!(time_left(2, 10, t(30)), "about 2 min 00 s left");
        assert_eq!(time_left(9, 10, t(90)), "about 10 s left");
        assert_eq!(time_left(10, 10, t(100)), "all done");
    }
}
