//! The library's typed error. Every variant carries enough context (file,
//! row, column, sample, feature) for one clear line at the CLI edge.

use std::path::{Path, PathBuf};

/// Process exit codes, documented in the README.
pub mod exit_code {
    pub const OK: i32 = 0;
    /// Bad input data or a bad combination of options.
    pub const BAD_INPUT: i32 = 2;
    /// Reading or writing failed (disk full, permission, vanished file).
    pub const IO: i32 = 3;
    /// Stopped by SIGINT/SIGTERM; checkpoints are consistent.
    pub const INTERRUPTED: i32 = 130;
    /// A bug: an internal invariant did not hold.
    pub const INTERNAL: i32 = 70;
}

#[derive(Debug, thiserror::Error)]
pub enum RiffleError {
    /// The content of an input file is not what was expected.
    #[error("{path}: {place}: {message}")]
    BadInput {
        path: PathBuf,
        /// Where in the file: "row 12, column 'S3'", "footer", "sample 'S7'"...
        place: String,
        message: String,
    },
    /// Options that cannot work (alone or together).
    #[error("{0}")]
    BadOptions(String),
    /// An operating-system I/O failure on a named file.
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("interrupted by a signal; partial outputs were removed, rerun the same command")]
    Interrupted,
    #[error("internal error: {0}")]
    Internal(String),
}

impl RiffleError {
    pub fn bad_input(path: &Path, place: impl Into<String>, message: impl Into<String>) -> Self {
        RiffleError::BadInput {
            path: path.to_path_buf(),
            place: place.into(),
            message: message.into(),
        }
    }

    pub fn io(path: &Path, source: std::io::Error) -> Self {
        RiffleError::Io {
            path: path.to_path_buf(),
            source,
        }
    }

    pub fn options(message: impl Into<String>) -> Self {
        RiffleError::BadOptions(message.into())
    }

    pub fn exit_code(&self) -> i32 {
        match self {
            RiffleError::BadInput { .. } | RiffleError::BadOptions(_) => exit_code::BAD_INPUT,
            RiffleError::Io { .. } => exit_code::IO,
            RiffleError::Interrupted => exit_code::INTERRUPTED,
            RiffleError::Internal(_) => exit_code::INTERNAL,
        }
    }
}

pub type Result<T, E = RiffleError> = std::result::Result<T, E>;

/// Attach a path to a raw `std::io::Result`.
pub trait IoContext<T> {
    fn at(self, path: &Path) -> Result<T>;
}

impl<T> IoContext<T> for std::io::Result<T> {
    fn at(self, path: &Path) -> Result<T> {
        self.map_err(|e| RiffleError::io(path, e))
    }
}
