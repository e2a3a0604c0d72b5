//! One error type for the whole library.
//!
//! Every error says *where* (a file or an option), *what* is wrong, and *how to fix it*,
//! because the person reading it is an analyst at an instrument, not the author of this code.
//! The [`ErrorKind`] decides the process exit code, so scripts can tell a bad file from a bad
//! option from a full disk.

use std::fmt;
use std::path::{Path, PathBuf};

/// Exit code of a batch (`apply`) in which some fields failed and the others were done.
pub const PARTIAL_FAILURE_EXIT: u8 = 5;

/// What went wrong, in categories a user (or a batch script) can act on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// An option or configuration value is invalid (exit code 2, as for a command-line typo).
    Options,
    /// An input file or folder cannot be used as it is (exit code 3).
    Input,
    /// An output cannot be written (exit code 4).
    Output,
    /// A bug: an invariant the code relies on did not hold (exit code 70).
    Internal,
}

impl ErrorKind {
    /// The process exit code documented in the README.
    pub fn exit_code(self) -> u8 {
        match self {
            ErrorKind::Options => 2,
            ErrorKind::Input => 3,
            ErrorKind::Output => 4,
            ErrorKind::Internal => 70,
        }
    }
}

/// A failure with its place, its problem and its fix.
#[derive(Debug, Clone, PartialEq)]
pub struct Error {
    /// The category (decides the exit code).
    pub kind: ErrorKind,
    /// The file or folder concerned, if any.
    pub path: Option<PathBuf>,
    /// What is wrong, in one sentence.
    pub problem: String,
    /// What the user can do about it.
    pub fix: String,
}

impl Error {
    fn new(kind: ErrorKind, path: Option<&Path>, problem: String, fix: String) -> Self {
        Error {
            kind,
            path: path.map(Path::to_path_buf),
            problem,
            fix,
        }
    }

    /// A problem with an input file or folder.
    pub fn input(path: &Path, problem: impl Into<String>, fix: impl Into<String>) -> Self {
        Self::new(ErrorKind::Input, Some(path), problem.into(), fix.into())
    }

    /// A problem with an option value (from the command line or a configuration file).
    pub fn options(problem: impl Into<String>, fix: impl Into<String>) -> Self {
        Self::new(ErrorKind::Options, None, problem.into(), fix.into())
    }

    /// A problem with an option that came from a configuration file.
    pub fn options_in(path: &Path, problem: impl Into<String>, fix: impl Into<String>) -> Self {
        Self::new(ErrorKind::Options, Some(path), problem.into(), fix.into())
    }

    /// A problem writing an output.
    pub fn output(path: &Path, problem: impl Into<String>, fix: impl Into<String>) -> Self {
        Self::new(ErrorKind::Output, Some(path), problem.into(), fix.into())
    }

    /// A broken invariant: always a bug in modalmap.
    pub fn internal(problem: impl Into<String>) -> Self {
        Self::new(
            ErrorKind::Internal,
            None,
            problem.into(),
            "this is a bug in modalmap; please report it with the command you ran".into(),
        )
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.path {
            Some(p) => write!(f, "{}: {}", p.display(), self.problem)?,
            None => write!(f, "{}", self.problem)?,
        }
        if !self.fix.is_empty() {
            write!(f, "\n  fix: {}", self.fix)?;
        }
        Ok(())
    }
}

impl std::error::Error for Error {}

/// The library's result type.
pub type Result<T> = std::result::Result<T, Error>;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn display_names_file_problem_and_fix() {
        let e = Error::input(
            Path::new("maps/Fe.png"),
            "is truncated",
            "re-export the map",
        );
        let s = e.to_string();
        assert!(s.starts_with("maps/Fe.png: is truncated"), "{s}");
        assert!(s.contains("fix: re-export the map"), "{s}");
        assert_eq!(e.kind.exit_code(), 3);
    }

    #[test]
    fn exit_codes_are_distinct_and_never_101() {
        let codes = [
            ErrorKind::Options.exit_code(),
            ErrorKind::Input.exit_code(),
            ErrorKind::Output.exit_code(),
            ErrorKind::Internal.exit_code(),
        ];
        for (i, a) in codes.iter().enumerate() {
            assert_ne!(*a, 0);
            assert_ne!(*a, 101, "101 is what a Rust panic exits with");
            for b in &codes[i + 1..] {
                assert_ne!(a, b);
            }
        }
    }
}
