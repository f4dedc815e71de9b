//! Issue 9.8: every artefact of a fixed seed is byte-identical across runs and thread counts.
//! One chain of commands (simulate, correlate, a simulated null, an injection campaign, noise
//! estimation of two pulsars, a common-process fit (and one with the joint red-noise fit), the
//! figure of each folder in SVG, PNG and PDF, and the report) runs twice, once with
//! RAYON_NUM_THREADS=1 and once with 2, and every file written is compared byte for byte
//! (the `.lock` file, empty, is the one file left out: it is the folder lock, not an output).

use std::path::{Path, PathBuf};
use std::process::Command;

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap()
        .to_path_buf()
}

/// Every file under `dir` (relative name, bytes), sorted by name.
fn read_tree(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else if p.file_name().is_some_and(|n| n != ".lock") {
                let name = p.strip_prefix(dir).unwrap().display().to_string();
                out.push((name, std::fs::read(&p).unwrap()));
            }
        }
    }
    out.sort();
    out
}

/// The whole chain into `root` with `threads` rayon threads.
fn chain(root: &Path, threads: &str) {
    let _ = std::fs::remove_dir_all(root);
    std::fs::create_dir_all(root).unwrap();
    let run = |args: &[&str]| {
        let o = Command::new(env!("CARGO_BIN_EXE_ptacorr"))
            .args(args)
            .current_dir(root)
            .env("RAYON_NUM_THREADS", threads)
            .output()
            .unwrap();
        assert!(
            o.status.success(),
            "{args:?} ({threads} threads): {}",
            String::from_utf8_lossy(&o.stderr)
        );
    };
    let scenario = repo().join("simulations/quiet.toml");
    run(&[
        "simulate",
        scenario.to_str().unwrap(),
        "--out",
        "rel",
        "--seed",
        "4",
    ]);
    run(&["correlate", "rel", "--out", "cor"]);
    run(&[
        "null", "rel", "--method", "simulate", "--trials", "300", "--seed", "7", "--out", "nul",
    ]);
    run(&[
        "inject",
        "rel",
        "--amplitudes",
        "0,1e-14",
        "--realizations",
        "40",
        "--null-trials",
        "200",
        "--seed",
        "9",
        "--out",
        "inj",
    ]);
    // Noise estimation of two pulsars (short chains: the bytes matter here, not the
    // posterior), whose figures (one per pulsar) join the others.
    run(&[
        "noise",
        "rel",
        "--shard",
        "1/20",
        "--starts",
        "2",
        "--chains",
        "2",
        "--warmup",
        "40",
        "--draws",
        "30",
        "--max-draws",
        "60",
        "--seed",
        "5",
        "--out",
        "noi",
    ]);
    run(&[
        "common",
        "rel",
        "--frequencies",
        "5",
        "--index-points",
        "9",
        "--draws",
        "50",
        "--out",
        "com",
    ]);
    // The joint red-noise fit (NUTS chains in parallel): its draws must not depend on threads.
    run(&[
        "common",
        "rel",
        "--frequencies",
        "5",
        "--index-points",
        "5",
        "--draws",
        "10",
        "--joint-red",
        "--joint-red-draws",
        "30",
        "--joint-red-warmup",
        "30",
        "--joint-red-chains",
        "2",
        "--out",
        "cjr",
    ]);
    for dir in ["cor", "nul", "inj", "noi", "com"] {
        for format in ["svg", "png", "pdf"] {
            let out = format!("fig-{dir}-{format}");
            run(&["plot", dir, "--format", format, "--out", &out]);
        }
    }
    run(&["report", "cor", "nul", "inj", "noi", "com", "--out", "rep"]);
}

#[test]
fn every_artefact_is_byte_identical_across_runs_and_thread_counts() {
    let base = std::env::temp_dir().join(format!("ptacorr-determinism-{}", std::process::id()));
    let (a, b) = (base.join("one-thread"), base.join("two-threads"));
    chain(&a, "1");
    chain(&b, "2");
    let (ta, tb) = (read_tree(&a), read_tree(&b));
    let names = |t: &[(String, Vec<u8>)]| t.iter().map(|x| x.0.clone()).collect::<Vec<_>>();
    assert_eq!(names(&ta), names(&tb), "the two runs wrote different files");
    let pdfs = ta.iter().filter(|(n, _)| n.ends_with(".pdf")).count();
    // correlate draws two figures (angular correlation, per-frequency), null and inject one,
    // noise one per pulsar (two), common two (amplitude posterior, credible regions).
    assert_eq!(pdfs, 8, "one PDF per figure");
    let differ: Vec<&str> = ta
        .iter()
        .zip(&tb)
        .filter(|(x, y)| x.1 != y.1)
        .map(|(x, _)| x.0.as_str())
        .collect();
    assert!(
        differ.is_empty(),
        "{} of {} files differ between 1 and 2 threads: {differ:?}",
        differ.len(),
        ta.len()
    );
    std::fs::remove_dir_all(&base).ok();
}
