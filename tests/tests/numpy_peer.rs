//! ptacorr against the independent NumPy peer in tests/reference/ (written from the published
//! formulas, sharing no code with the engine): summary.json and pairs.csv must agree to 1e-8
//! relative on simulated arrays, in the peer's Woodbury ("naive": one basis column per ECORR
//! epoch), fast (ECORR folded in by Sherman-Morrison, NumPy's CSV reader) and dense forms.

use ptacorr::analysis::{correlate, CorrelateSettings};
use ptacorr::release::read_release;
use ptacorr_checks::{numpy_python, simulate_release, temp_dir};
use std::ffi::OsString;
use std::path::{Path, PathBuf};
use std::process::Command;

fn reference(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("reference")
        .join(file)
}

fn run(py: &Path, args: &[OsString]) -> String {
    let o = Command::new(py).args(args).output().expect("python runs");
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(o.status.success(), "{args:?} failed:\n{text}");
    text
}

fn check(scenario: &str, seed: u64, k: usize, form: Option<&str>, name: &str) {
    let py = numpy_python();
    let dir = temp_dir(name);
    let rel_dir = dir.join("release");
    simulate_release(scenario, &rel_dir, seed);
    let rel = read_release(&rel_dir).unwrap();
    let settings = CorrelateSettings {
        n_frequencies: k,
        ..Default::default()
    };
    let ours = dir.join("ours");
    let peer = dir.join("peer");
    correlate(&rel, &settings)
        .unwrap()
        .write(&ours, &rel, &settings)
        .unwrap();
    let mut args: Vec<OsString> = vec![
        reference("ptacorr_ref.py").into(),
        rel_dir.into(),
        "--out".into(),
        peer.clone().into(),
        "--frequencies".into(),
        k.to_string().into(),
    ];
    if let Some(f) = form {
        args.push(f.into());
    }
    run(&py, &args);
    let out = run(
        &py,
        &[
            reference("compare.py").into(),
            ours.into(),
            peer.into(),
            // The agreement docs/conventions.md promises for two implementations of it.
            "--rtol".into(),
            "1e-8".into(),
        ],
    );
    eprintln!("{out}");
    std::fs::remove_dir_all(&dir).ok();
}

const SMALL: &str = r#"
[array]
title = "Peer check (fictional)"
n_pulsars = 6
start_mjd = 57000.0
span_years = 5.0
cadence_days = 45.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

[[backend]]
name = "MRL-UHF"
observatory = "Mirelle"
freq_mhz = [820.0]
share = 0.5

[white]
sigma_us = [0.2, 2.0]
efac = [0.9, 1.2]
equad_log10_s = [-7.5, -6.8]
ecorr_log10_s = [-7.5, -6.8]

[red]
share = 0.5
log10_amplitude = [-14.2, -13.6]
spectral_index = [2.0, 4.5]

[dm]
share = 0.5
log10_amplitude = [-14.0, -13.4]
spectral_index = [1.5, 3.0]

[background]
log10_amplitude = -14.0
"#;

#[test]
fn agrees_with_the_numpy_peer_woodbury_form() {
    check(SMALL, 21, 10, None, "peer-woodbury");
}

#[test]
fn agrees_with_the_numpy_peer_fast_form() {
    // ECORR on every pulsar (SMALL's white table), red and DM noise on half of them.
    check(SMALL, 23, 10, Some("--fast"), "peer-fast");
}

#[test]
fn agrees_with_the_numpy_peer_fast_form_on_the_demo_array() {
    let demo = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/demo.toml"),
    )
    .unwrap();
    check(&demo, 2027, 14, Some("--fast"), "peer-demo-fast");
}

#[test]
fn agrees_with_the_numpy_peer_dense_form() {
    check(SMALL, 22, 8, Some("--dense"), "peer-dense");
}

#[test]
fn agrees_with_the_numpy_peer_on_the_demo_array() {
    let demo = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/demo.toml"),
    )
    .unwrap();
    check(&demo, 2026, 14, None, "peer-demo");
}
