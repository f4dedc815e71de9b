//! Runs every `sh` block of the worked analyses in notebooks-md/, so the pages cannot rot. Each
//! notebook runs in a fresh folder that sees the repository's `simulations/`, with `ptacorr` on
//! the PATH; every command must succeed, and each `text` block right after a command must appear
//! (line by line, ignoring leading and trailing spaces) in what the command printed. `python`
//! blocks are run by python/tests/test_notebooks.py.

use std::path::{Path, PathBuf};
use std::process::Command;

fn blocks(md: &str) -> Vec<(String, String)> {
    let mut out = Vec::new();
    let mut lines = md.lines();
    while let Some(l) = lines.next() {
        if let Some(lang) = l.strip_prefix("```") {
            let body: Vec<&str> = lines
                .by_ref()
                .take_while(|x| !x.starts_with("```"))
                .collect();
            out.push((lang.trim().to_string(), body.join("\n")));
        }
    }
    out
}

fn run_notebook(path: &Path) {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap();
    let name = path.file_stem().unwrap().to_string_lossy().into_owned();
    let work: PathBuf =
        std::env::temp_dir().join(format!("ptacorr-nb-{}-{name}", std::process::id()));
    let _ = std::fs::remove_dir_all(&work);
    std::fs::create_dir_all(&work).unwrap();
    std::os::unix::fs::symlink(repo.join("simulations"), work.join("simulations")).unwrap();
    let bin_dir = Path::new(env!("CARGO_BIN_EXE_ptacorr")).parent().unwrap();
    let path_var = format!(
        "{}:{}",
        bin_dir.display(),
        std::env::var("PATH").unwrap_or_default()
    );
    let md = std::fs::read_to_string(path).unwrap();
    let bs = blocks(&md);
    let mut ran = 0;
    for (i, (lang, body)) in bs.iter().enumerate() {
        if lang != "sh" {
            continue;
        }
        let o = Command::new("bash")
            .args(["-euo", "pipefail", "-c", body])
            .current_dir(&work)
            .env("PATH", &path_var)
            .output()
            .unwrap();
        let printed = format!(
            "{}{}",
            String::from_utf8_lossy(&o.stdout),
            String::from_utf8_lossy(&o.stderr)
        );
        assert!(
            o.status.success(),
            "{}: `{body}` failed:\n{printed}",
            path.display()
        );
        if let Some((next_lang, expected)) = bs.get(i + 1) {
            if next_lang == "text" {
                for line in expected.lines().map(str::trim).filter(|l| !l.is_empty()) {
                    assert!(
                        printed.lines().any(|p| p.trim() == line),
                        "{}: `{body}` did not print `{line}`; it printed:\n{printed}",
                        path.display()
                    );
                }
            }
        }
        ran += 1;
    }
    // A page of `python` blocks is run by python/tests/test_notebooks.py instead.
    let python = bs.iter().any(|(lang, _)| lang == "python");
    assert!(ran > 0 || python, "{} has no sh blocks", path.display());
    std::fs::remove_dir_all(&work).ok();
}

#[test]
fn every_notebook_runs_as_written() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap()
        .join("notebooks-md");
    let mut pages: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "md"))
        .collect();
    pages.sort();
    assert!(!pages.is_empty());
    for p in pages {
        run_notebook(&p);
    }
}
