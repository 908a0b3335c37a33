//! Errors of every stage, each naming the file, frame, key and value it is about.
//!
//! The binary maps them to exit codes with [`Error::exit_code`]: 2 for bad input or usage
//! (the user must change something), 1 for a check or fit that did not pass.
use std::path::PathBuf;

/// Result alias used across the crate.
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// Every error modegram reports.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// A setup or scenario key with an unusable value.
    #[error("{file}: key `{key}` = {value}: {reason}")]
    Setup {
        file: String,
        key: String,
        value: String,
        reason: String,
    },
    /// A TOML file that does not parse (syntax, unknown key, wrong type).
    #[error("{file}: {message}")]
    Parse { file: String, message: String },
    /// A frame file or a frame inside it that cannot be used.
    #[error("{}{}: {reason}", file.display(), frame.map(|f| format!(", frame {f}")).unwrap_or_default())]
    Frame {
        file: PathBuf,
        frame: Option<usize>,
        reason: String,
    },
    /// Reading or writing a file failed.
    #[error("{}: {source}", path.display())]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// An output that exists already and `--force` was not given.
    #[error("{}: exists already; pass --force to overwrite it", path.display())]
    Exists { path: PathBuf },
    /// Any other input that cannot be used (arrays of the wrong shape, empty folders, ...).
    #[error("{0}")]
    Input(String),
    /// A check that failed (exit status 1).
    #[error("check failed: {0}")]
    CheckFailed(String),
    /// A fit or solve that did not converge (exit status 1).
    #[error("did not converge: {0}")]
    NotConverged(String),
}

impl Error {
    /// Exit status for the binary: 1 for failed checks and fits, 2 for everything else.
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::CheckFailed(_) | Error::NotConverged(_) => 1,
            _ => 2,
        }
    }

    /// Shorthand for [`Error::Setup`].
    pub fn setup(
        file: impl Into<String>,
        key: impl Into<String>,
        value: impl std::fmt::Display,
        reason: impl Into<String>,
    ) -> Self {
        Error::Setup {
            file: file.into(),
            key: key.into(),
            value: value.to_string(),
            reason: reason.into(),
        }
    }

    /// Shorthand for [`Error::Frame`].
    pub fn frame(
        file: impl Into<PathBuf>,
        frame: Option<usize>,
        reason: impl Into<String>,
    ) -> Self {
        Error::Frame {
            file: file.into(),
            frame,
            reason: reason.into(),
        }
    }

    /// Shorthand for [`Error::Io`].
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }
}
