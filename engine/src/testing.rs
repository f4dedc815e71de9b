//! Temporary folders for the tests of every crate of the workspace (engine unit tests, the
//! CLI's and the checks crate's integration tests, the figure fixtures): one helper, so every
//! test names its folders the same way. Not part of the analysis API.

use std::path::PathBuf;

/// `ptacorr-<name>-<process id>` under the system temporary folder, removed if it exists and
/// not created (for commands that create their output folder themselves).
pub fn temp_path(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ptacorr-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    d
}

/// [`temp_path`], created empty.
pub fn temp_dir(name: &str) -> PathBuf {
    let d = temp_path(name);
    std::fs::create_dir_all(&d).expect("create a temporary folder");
    d
}
