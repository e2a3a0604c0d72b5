//! Stage timings for developers: set `MODALMAP_PROFILE=1` and each stage's wall time is
//! printed to standard error. Off by default; never part of a result.

use std::time::Instant;

/// Times a stage from creation to drop.
pub struct Stage {
    name: &'static str,
    start: Instant,
    on: bool,
}

/// Starts timing a stage.
pub fn stage(name: &'static str) -> Stage {
    Stage {
        name,
        start: Instant::now(),
        on: std::env::var_os("MODALMAP_PROFILE").is_some_and(|v| v != "0"),
    }
}

impl Drop for Stage {
    fn drop(&mut self) {
        if self.on {
            eprintln!(
                "[profile] {:<22} {:>9.3} s",
                self.name,
                self.start.elapsed().as_secs_f64()
            );
        }
    }
}
