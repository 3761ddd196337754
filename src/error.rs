//! One error type for the library, grouped by who is at fault.
//!
//! Every variant that concerns a file names it; messages say what was expected.

use std::path::{Path, PathBuf};

#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The user's file is unreadable, truncated, of the wrong kind or inconsistent.
    #[error("{}: {problem}", path.display())]
    BadFile { path: PathBuf, problem: String },
    /// A file could not be opened, read or written.
    #[error("{}: {source}", path.display())]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// A Swin V2 checkpoint whose window nothing states: its tensors do not record it, and
    /// neither a `config.json` beside it nor an override gave it. The window asks for it.
    #[error("{}: {problem}", path.display())]
    WindowUnstated { path: PathBuf, problem: String },
    /// An argument or setting the user gave does not fit.
    #[error("{0}")]
    BadArgument(String),
    /// The input is valid but beyond what this machine should attempt.
    #[error("{0}")]
    Limit(String),
    /// A tensor holds NaN or infinite values: the message names where they first appeared.
    #[error("{0}")]
    NonFinite(String),
    /// The run was cancelled between two blocks.
    #[error("cancelled")]
    Cancelled,
    /// A tensor operation failed where it should not: a bug in Mullion.
    #[error("internal error (please report): {0}")]
    Internal(String),
}

pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    pub fn bad_file(path: impl AsRef<Path>, problem: impl Into<String>) -> Self {
        Error::BadFile {
            path: path.as_ref().to_path_buf(),
            problem: problem.into(),
        }
    }
    pub fn io(path: impl AsRef<Path>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.as_ref().to_path_buf(),
            source,
        }
    }
}

impl From<candle_core::Error> for Error {
    fn from(e: candle_core::Error) -> Self {
        Error::Internal(e.to_string())
    }
}
