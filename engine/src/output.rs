//! Atomic output: every file is written to a temporary name in its folder and renamed into place,
//! so an interrupted or failed run never leaves a partial file behind.

use crate::error::{Error, Result};
use std::io::Write;
use std::path::{Path, PathBuf};

/// Create `dir` (and parents) if it does not exist.
pub fn ensure_dir(dir: &Path) -> Result<()> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))
}

/// Write `bytes` to `path` atomically (temporary sibling, fsync, rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = path.parent().filter(|p| !p.as_os_str().is_empty());
    if let Some(d) = dir {
        ensure_dir(d)?;
    }
    let tmp = temporary_name(path);
    let result = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if let Err(e) = result {
        let _ = std::fs::remove_file(&tmp);
        return Err(Error::io(path, e));
    }
    Ok(())
}

/// Write a value as pretty JSON (with a final newline), atomically.
pub fn write_json<T: serde::Serialize>(path: &Path, value: &T) -> Result<()> {
    let mut text = serde_json::to_string_pretty(value).map_err(|e| Error::NonFinite {
        what: format!("{} ({e})", path.display()),
    })?;
    text.push('\n');
    write_atomic(path, text.as_bytes())
}

fn temporary_name(path: &Path) -> PathBuf {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.{}.tmp", std::process::id()))
}

/// Format a float so that it reads back to the same f64 (shortest round-trip form).
pub fn fmt_f64(x: f64) -> String {
    format!("{x:?}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn atomic_write_leaves_only_the_final_file() {
        let dir = std::env::temp_dir().join(format!("ptacorr-output-{}", std::process::id()));
        let path = dir.join("a.txt");
        write_atomic(&path, b"hello").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"hello");
        let names: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 1, "temporary file left behind: {names:?}");
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn floats_round_trip() {
        for x in [1.0e-30, -0.1, 4.333333333333333, 12345.678] {
            assert_eq!(fmt_f64(x).parse::<f64>().unwrap(), x);
        }
    }
}
