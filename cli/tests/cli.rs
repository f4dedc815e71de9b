//! The `ptacorr` binary as a user meets it: exit codes, messages, and files written.

use std::path::{Path, PathBuf};
use std::process::Command;

fn ptacorr() -> Command {
    Command::new(env!("CARGO_BIN_EXE_ptacorr"))
}

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap()
        .to_path_buf()
}

fn temp(name: &str) -> PathBuf {
    ptacorr::testing::temp_path(&format!("cli-{name}"))
}

fn read_tree(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                out.push((
                    p.strip_prefix(dir).unwrap().display().to_string(),
                    std::fs::read(&p).unwrap(),
                ));
            }
        }
    }
    out.sort();
    out
}

#[test]
fn same_seed_same_bytes() {
    let scen = repo().join("simulations/quiet.toml");
    let (a, b) = (temp("seed-a"), temp("seed-b"));
    for d in [&a, &b] {
        let st = ptacorr()
            .arg("simulate")
            .arg(&scen)
            .arg("--out")
            .arg(d)
            .args(["--seed", "9"])
            .status()
            .unwrap();
        assert!(st.success());
    }
    let (ta, tb) = (read_tree(&a), read_tree(&b));
    assert!(ta.len() > 40, "release files: {}", ta.len());
    assert!(ta == tb, "two runs with seed 9 differ");
    let c = temp("seed-c");
    ptacorr()
        .arg("simulate")
        .arg(&scen)
        .arg("--out")
        .arg(&c)
        .args(["--seed", "10"])
        .status()
        .unwrap();
    assert!(
        read_tree(&c) != ta,
        "a different seed gave the same release"
    );
    for d in [a, b, c] {
        std::fs::remove_dir_all(d).ok();
    }
}

#[test]
fn bad_input_exits_nonzero_with_a_located_message_and_no_output() {
    let rel = temp("bad-rel");
    let st = ptacorr()
        .arg("simulate")
        .arg(repo().join("simulations/quiet.toml"))
        .arg("--out")
        .arg(&rel)
        .status()
        .unwrap();
    assert!(st.success());
    let csv = rel.join("residuals/P03.csv");
    let text = std::fs::read_to_string(&csv).unwrap();
    let mut lines: Vec<&str> = text.lines().collect();
    lines[9] = "55100.0,1e-7,abc,1400.0,KRK-L";
    std::fs::write(&csv, lines.join("\n") + "\n").unwrap();
    let out = temp("bad-out");
    let o = ptacorr()
        .arg("correlate")
        .arg(&rel)
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("P03.csv line 10, field sigma_s: \"abc\" is not a number"),
        "{err}"
    );
    assert!(!out.exists(), "a failed run left output behind");
    std::fs::remove_dir_all(rel).ok();
}

#[test]
fn demo_runs_and_names_its_folder() {
    let out = temp("demo");
    let o = ptacorr()
        .arg("demo")
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains(&out.display().to_string()), "{text}");
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("correlate/summary.json")).unwrap())
            .unwrap();
    assert_eq!(summary["n_pulsars"], 40);
    assert_eq!(summary["n_pairs"], 780);
    // The demo's background is strong by design: a clear Hellings-Downs detection.
    assert!(summary["patterns"]["hd"]["snr"].as_f64().unwrap() > 5.0);
    // It ends with the figure and the report, and says where they are.
    for f in [
        "figures/angular-correlation.png",
        "report/report.md",
        "report/report.html",
        "report/tables.tex",
    ] {
        assert!(out.join(f).is_file(), "demo did not write {f}");
        assert!(text.contains(&out.join(f.split('/').next().unwrap()).display().to_string()));
    }
    // The report regenerates byte for byte from the same folder.
    let again = temp("demo-report-again");
    let st = ptacorr()
        .arg("report")
        .arg(out.join("correlate"))
        .arg("--out")
        .arg(&again)
        .status()
        .unwrap();
    assert!(st.success());
    assert_eq!(
        std::fs::read(again.join("report.md")).unwrap(),
        std::fs::read(out.join("report/report.md")).unwrap()
    );
    std::fs::remove_dir_all(again).ok();
    std::fs::remove_dir_all(out).ok();
}

#[test]
fn null_and_inject_folders_plot_and_gather_into_one_report() {
    let rel = temp("chain-rel");
    let st = ptacorr()
        .arg("simulate")
        .arg(repo().join("simulations/quiet.toml"))
        .arg("--out")
        .arg(&rel)
        .args(["--seed", "4"])
        .status()
        .unwrap();
    assert!(st.success());
    let (cor, nul, inj, rep) = (
        temp("chain-cor"),
        temp("chain-null"),
        temp("chain-inj"),
        temp("chain-rep"),
    );
    let ok = |args: &[&std::ffi::OsStr]| {
        let o = ptacorr().args(args).output().unwrap();
        assert!(
            o.status.success(),
            "{args:?}: {}",
            String::from_utf8_lossy(&o.stderr)
        );
        String::from_utf8_lossy(&o.stdout).into_owned()
    };
    ok(&[
        "correlate".as_ref(),
        rel.as_os_str(),
        "--out".as_ref(),
        cor.as_os_str(),
    ]);
    let text = ok(&[
        "null".as_ref(),
        rel.as_os_str(),
        "--method".as_ref(),
        "simulate".as_ref(),
        "--trials".as_ref(),
        "300".as_ref(),
        "--out".as_ref(),
        nul.as_os_str(),
    ]);
    assert!(text.contains("assume the noise model"), "{text}");
    ok(&[
        "inject".as_ref(),
        rel.as_os_str(),
        "--amplitudes".as_ref(),
        "0,1e-14".as_ref(),
        "--realizations".as_ref(),
        "40".as_ref(),
        "--null-trials".as_ref(),
        "200".as_ref(),
        "--out".as_ref(),
        inj.as_os_str(),
    ]);
    for d in [&cor, &nul, &inj] {
        ok(&[
            "plot".as_ref(),
            d.as_os_str(),
            "--format".as_ref(),
            "png".as_ref(),
        ]);
    }
    ok(&[
        "report".as_ref(),
        cor.as_os_str(),
        nul.as_os_str(),
        inj.as_os_str(),
        "--out".as_ref(),
        rep.as_os_str(),
    ]);
    let md = std::fs::read_to_string(rep.join("report.md")).unwrap();
    for needle in [
        "null-distribution",
        "injection-recovery",
        "angular-correlation",
        "one-sided",
    ] {
        assert!(md.contains(needle), "report lacks {needle}");
    }
    for d in [rel, cor, nul, inj, rep] {
        std::fs::remove_dir_all(d).ok();
    }
}

/// `ptacorr null ... | head`: the reader of standard output is gone before the command prints.
/// POSIX write(2): a write to a pipe with no reader fails with EPIPE (the Rust runtime ignores
/// SIGPIPE, so the write returns the error, which `println!` turns into a panic). The read end
/// is closed before the command starts, so every print meets the closed pipe. The command must
/// not panic, must write its files and must exit as it would have.
#[test]
fn a_closed_standard_output_ends_the_printing_not_the_run() {
    let (rel, nul) = (temp("pipe-rel"), temp("pipe-null"));
    let closed = || {
        let (reader, writer) = std::io::pipe().unwrap();
        drop(reader);
        writer
    };
    let quiet = repo().join("simulations/quiet.toml");
    let runs: [(&[&std::ffi::OsStr], &Path, &str); 2] = [
        (
            &["simulate".as_ref(), quiet.as_os_str(), "--out".as_ref()],
            &rel,
            "release.toml",
        ),
        (
            &[
                "null".as_ref(),
                rel.as_os_str(),
                "--method".as_ref(),
                "phase".as_ref(),
                "--trials".as_ref(),
                "20".as_ref(),
                "--out".as_ref(),
            ],
            &nul,
            "null.json",
        ),
    ];
    for (args, out, file) in runs {
        let o = ptacorr()
            .args(args)
            .arg(out)
            .stdout(closed())
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(o.status.success(), "{args:?}: {:?}\n{err}", o.status);
        assert!(!err.contains("panicked"), "{args:?}: {err}");
        assert!(out.join(file).is_file(), "{args:?} wrote no {file}");
    }
    for d in [rel, nul] {
        std::fs::remove_dir_all(d).ok();
    }
}
