//! Fault tests: a `null` run stopped part-way by SIGINT, SIGTERM or SIGKILL resumes from its
//! checkpoints and ends byte for byte equal to an uninterrupted run; a full disk (a small tmpfs,
//! only when running as root) leaves the earlier output intact and no stray files.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn ptacorr() -> Command {
    Command::new(env!("CARGO_BIN_EXE_ptacorr"))
}

fn temp(name: &str) -> PathBuf {
    ptacorr::testing::temp_path(&format!("faults-{name}"))
}

/// A small fictional array whose time-domain null trials take a few milliseconds each, so a
/// run of a few hundred trials is long enough to interrupt between checkpoints.
const SCENARIO: &str = r#"
[array]
title = "Fault-test array (fictional)"
n_pulsars = 6
start_mjd = 56000.0
span_years = 6.0
cadence_days = 7.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

[white]
sigma_us = [0.3, 1.0]
efac = [1.0, 1.1]

[background]
log10_amplitude = -14.3

[simulation]
n_frequencies = 20
span_factor = 2
"#;

fn release(name: &str) -> PathBuf {
    let base = temp(name);
    std::fs::create_dir_all(&base).unwrap();
    let scen = base.join("s.toml");
    std::fs::write(&scen, SCENARIO).unwrap();
    let rel = base.join("rel");
    let st = ptacorr()
        .args([
            "simulate".as_ref(),
            scen.as_os_str(),
            "--out".as_ref(),
            rel.as_os_str(),
        ])
        .status()
        .unwrap();
    assert!(st.success());
    base
}

fn null_cmd(rel: &Path, out: &Path) -> Command {
    null_seeded(rel, out, "5")
}

fn null_seeded(rel: &Path, out: &Path, seed: &str) -> Command {
    let mut c = ptacorr();
    c.args(["null".as_ref(), rel.as_os_str()])
        .args([
            "--method",
            "simulate",
            "--time-domain",
            "--trials",
            "800",
            "--seed",
            seed,
        ])
        .arg("--out")
        .arg(out)
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    c
}

fn chunks(out: &Path) -> usize {
    std::fs::read_dir(out.join(".partial"))
        .map(|d| {
            d.flatten()
                .filter(|e| e.file_name().to_string_lossy().starts_with("chunk-"))
                .count()
        })
        .unwrap_or(0)
}

fn files(out: &Path) -> Vec<(String, Vec<u8>)> {
    let mut v: Vec<(String, Vec<u8>)> = ["null.json", "trials.csv", "manifest.json"]
        .iter()
        .map(|f| {
            (
                f.to_string(),
                std::fs::read(out.join(f)).unwrap_or_default(),
            )
        })
        .collect();
    v.sort();
    v
}

/// Start a run, wait for its first checkpoints, send `signal`, then resume to the end; the
/// result must equal `reference`. Returns whether the signal arrived mid-run.
fn interrupt_and_resume(
    rel: &Path,
    out: &Path,
    signal: i32,
    reference: &[(String, Vec<u8>)],
) -> bool {
    let mut child = null_cmd(rel, out).spawn().unwrap();
    let start = Instant::now();
    while chunks(out) < 2 && start.elapsed() < Duration::from_secs(60) {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        std::thread::sleep(Duration::from_millis(5));
    }
    let mid_run = child.try_wait().unwrap().is_none();
    // SAFETY: signalling our own child process by its id.
    unsafe { libc::kill(child.id() as i32, signal) };
    let o = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!err.contains("panicked"), "{err}");
    if mid_run {
        assert!(
            !o.status.success(),
            "signal {signal}: the run exited 0 part-way"
        );
        if signal != libc::SIGKILL {
            assert!(err.contains("interrupt"), "signal {signal}: {err}");
        }
        assert!(chunks(out) >= 1, "signal {signal}: no checkpoints kept");
        assert!(
            !out.join("manifest.json").exists(),
            "a partial run wrote a complete-looking set"
        );
    } else {
        println!("signal {signal}: the run finished before the signal (machine fast); resume checked only");
    }
    let o = null_cmd(rel, out).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        files(out) == reference,
        "signal {signal}: the resumed run differs from the uninterrupted one"
    );
    let stray: Vec<String> = std::fs::read_dir(out)
        .unwrap()
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".tmp") || n.starts_with(".staging") || n == ".partial")
        .collect();
    assert!(stray.is_empty(), "{stray:?}");
    mid_run
}

#[test]
fn interrupted_null_runs_resume_to_the_same_bytes() {
    let base = release("signals");
    let rel = base.join("rel");
    let reference_dir = base.join("ref");
    let o = null_cmd(&rel, &reference_dir).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let reference = files(&reference_dir);
    let mut mid = 0;
    for (name, sig) in [
        ("int", libc::SIGINT),
        ("term", libc::SIGTERM),
        ("kill", libc::SIGKILL),
    ] {
        mid += interrupt_and_resume(&rel, &base.join(name), sig, &reference) as usize;
    }
    println!("{mid} of 3 signals arrived mid-run");
    std::fs::remove_dir_all(&base).ok();
}

#[test]
fn a_second_run_into_a_busy_folder_is_refused() {
    let base = release("busy");
    let rel = base.join("rel");
    let out = base.join("out");
    let mut first = null_cmd(&rel, &out).spawn().unwrap();
    let start = Instant::now();
    while !out.join(".lock").exists() && start.elapsed() < Duration::from_secs(60) {
        std::thread::sleep(Duration::from_millis(5));
    }
    let o = null_seeded(&rel, &out, "6").output().unwrap();
    let still_running = first.try_wait().unwrap().is_none();
    let err = String::from_utf8_lossy(&o.stderr);
    if still_running {
        assert!(!o.status.success());
        assert!(err.contains("in use by another ptacorr run"), "{err}");
    } else {
        println!("the first run ended before the second started; lock refusal not exercised here");
    }
    assert!(first.wait().unwrap().success());
    std::fs::remove_dir_all(&base).ok();
}

#[test]
fn a_full_disk_leaves_the_earlier_output_intact() {
    // SAFETY: geteuid has no preconditions.
    if unsafe { libc::geteuid() } != 0 {
        println!("SKIPPED full-disk test: needs root to mount a small tmpfs");
        return;
    }
    let base = release("disk");
    let rel = base.join("rel");
    let mnt = base.join("mnt");
    std::fs::create_dir_all(&mnt).unwrap();
    let mounted = Command::new("mount")
        .args(["-t", "tmpfs", "-o", "size=256k", "tmpfs"])
        .arg(&mnt)
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    if !mounted {
        println!("SKIPPED full-disk test: mount -t tmpfs is not permitted here");
        std::fs::remove_dir_all(&base).ok();
        return;
    }
    let out = mnt.join("cor");
    let correlate = |extra: &[&str]| {
        ptacorr()
            .args([
                "correlate".as_ref(),
                rel.as_os_str(),
                "--out".as_ref(),
                out.as_os_str(),
            ])
            .args(extra)
            .output()
            .unwrap()
    };
    assert!(correlate(&[]).status.success());
    let read = |d: &Path| -> Vec<(String, Vec<u8>)> {
        let mut v: Vec<_> = std::fs::read_dir(d)
            .unwrap()
            .flatten()
            // The lock file holds the pid of the last run, so it is left out.
            .filter(|e| e.file_name() != ".lock")
            .map(|e| {
                (
                    e.file_name().to_string_lossy().into_owned(),
                    std::fs::read(e.path()).unwrap_or_default(),
                )
            })
            .collect();
        v.sort();
        v
    };
    let before = read(&out);
    // Fill the disk, leaving a few hundred bytes.
    let filler = mnt.join("filler");
    let _ = std::fs::write(&filler, vec![0u8; 400 * 1024]);
    let o = correlate(&["--frequencies", "7"]);
    let after = read(&out);
    let _ = Command::new("umount").arg(&mnt).status();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "a full disk went unnoticed");
    assert!(!err.contains("panicked"), "{err}");
    if after != before {
        let names = |v: &[(String, Vec<u8>)]| v.iter().map(|f| f.0.clone()).collect::<Vec<_>>();
        panic!(
            "a failed write changed the earlier output: {:?} -> {:?}",
            names(&before),
            names(&after)
        );
    }
    std::fs::remove_dir_all(&base).ok();
}
