//! Typed errors of the engine. Every input error names the file, and where it has one the line
//! and the field, so the CLI can print `error: tables/P03.csv line 10, column sigma_s: ...`.

use std::path::{Path, PathBuf};

/// Everything that can go wrong in the engine.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// A file could not be read or written.
    #[error("{}: {source}", path.display())]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// A value in an input file is malformed or out of range.
    #[error("{}{}{}: {message}", path.display(), line.map(|l| format!(" line {l}")).unwrap_or_default(), field.as_ref().map(|f| format!(", field {f}")).unwrap_or_default())]
    Input {
        path: PathBuf,
        line: Option<usize>,
        field: Option<String>,
        message: String,
    },
    /// A covariance-like matrix that must be positive definite is not.
    #[error("{what} is not positive definite (Cholesky failed at pivot {pivot}); check the noise model and the timing-model columns for degeneracies")]
    NotPositiveDefinite { what: String, pivot: usize },
    /// A setting passed by the caller is invalid.
    #[error("invalid setting {name}: {message}")]
    Setting { name: String, message: String },
    /// A computation produced a non-finite number.
    #[error("non-finite value in {what}")]
    NonFinite { what: String },
}

/// Longest message of an input error, in characters.
pub const MAX_MESSAGE_CHARS: usize = 600;

/// Result type of the engine.
pub type Result<T> = std::result::Result<T, Error>;

impl Error {
    /// An input error at a file, optionally a line and a field.
    pub fn input(
        path: &Path,
        line: Option<usize>,
        field: Option<&str>,
        message: impl Into<String>,
    ) -> Self {
        // A safety net under the quoting rule (at most ~80 characters of offending text
        // per message, output.rs `quote`): no message grows without bound.
        Error::Input {
            path: path.to_path_buf(),
            line,
            field: field.map(|f| crate::output::truncate(f, 120)),
            message: crate::output::truncate(&message.into(), MAX_MESSAGE_CHARS),
        }
    }

    /// An I/O error at a path.
    pub fn io(path: &Path, source: std::io::Error) -> Self {
        Error::Io {
            path: path.to_path_buf(),
            source,
        }
    }

    /// An invalid caller setting.
    pub fn setting(name: &str, message: impl Into<String>) -> Self {
        Error::Setting {
            name: name.to_string(),
            message: crate::output::truncate(&message.into(), MAX_MESSAGE_CHARS),
        }
    }
}
