//! One error type for the whole library.
//!
//! Every failure is carried up to `main`, which prints it once and picks the
//! exit code from its kind (SPEC: 2 for bad usage or bad input). Messages name
//! the file they are about, because the user usually has dozens of shards and
//! needs to know which one is broken.

use std::fmt;
use std::path::Path;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ErrorKind {
    /// Wrong command line (conflicting or malformed options).
    Usage,
    /// An input file is missing, unreadable or does not follow the layout.
    Input,
    /// Writing a report failed (missing directory, full disk, ...).
    Output,
}

#[derive(Debug, Clone)]
pub struct Error {
    pub kind: ErrorKind,
    pub message: String,
}

pub type Result<T> = std::result::Result<T, Error>;

impl Error {
    pub fn usage(message: impl Into<String>) -> Error {
        Error {
            kind: ErrorKind::Usage,
            message: message.into(),
        }
    }

    /// An input problem about one file: the message starts with its path.
    pub fn input(path: &Path, message: impl fmt::Display) -> Error {
        Error {
            kind: ErrorKind::Input,
            message: format!("{}: {}", path.display(), message),
        }
    }

    pub fn output(path: &Path, message: impl fmt::Display) -> Error {
        Error {
            kind: ErrorKind::Output,
            message: format!("{}: {}", path.display(), message),
        }
    }

    /// The process exit code that SPEC assigns to this error.
    pub fn exit_code(&self) -> i32 {
        2
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for Error {}
