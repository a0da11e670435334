//! Error types of the library. Every user-facing failure names what went wrong and where
//! (file, line, key) in one line; the binary prints it and exits non-zero.
//!
//! Internal contract breaks (wrong buffer lengths between our own modules) are bugs and panic;
//! they never come from user input.

use std::path::{Path, PathBuf};

/// Result alias used across the crate.
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// Everything that can go wrong while reading a job, its inputs, or writing its outputs.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// An input file (job, point cloud, mesh, image) is malformed. `message` says where inside
    /// the file (line, element, byte offset) when that is known.
    #[error("{}: {message}", path.display())]
    Input { path: PathBuf, message: String },
    /// The job is well-formed but physically or technically impossible (z <= 0, pitch <= 0...).
    #[error("job {}: {message}", path.display())]
    Job { path: PathBuf, message: String },
    /// A valid input that this tool does not handle (a PLY encoding, a glTF extension...).
    #[error("{}: unsupported: {message}", path.display())]
    Unsupported { path: PathBuf, message: String },
    /// An operating-system error on a file.
    #[error("{}: {source}", path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    /// The run was interrupted on request (Ctrl-C); the message says how to continue.
    #[error("{0}")]
    Interrupted(String),
}

impl Error {
    /// Malformed input at `path`.
    pub fn input(path: impl AsRef<Path>, message: impl Into<String>) -> Self {
        Error::Input {
            path: path.as_ref().to_path_buf(),
            message: message.into(),
        }
    }
    /// Impossible job at `path`.
    pub fn job(path: impl AsRef<Path>, message: impl Into<String>) -> Self {
        Error::Job {
            path: path.as_ref().to_path_buf(),
            message: message.into(),
        }
    }
    /// Valid but unsupported input at `path`.
    pub fn unsupported(path: impl AsRef<Path>, message: impl Into<String>) -> Self {
        Error::Unsupported {
            path: path.as_ref().to_path_buf(),
            message: message.into(),
        }
    }
    /// I/O failure on `path`.
    pub fn io(path: impl AsRef<Path>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.as_ref().to_path_buf(),
            source,
        }
    }
}
