//! Shared helpers of the cross-crate checks: small fictional arrays built from scenario text.

use ptacorr::release::{read_release, Release};
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::simulate::simulate_scenario;
use std::path::{Path, PathBuf};

/// A fresh, empty temporary folder unique to this process and `name` (the workspace's one
/// helper, `ptacorr::testing`).
pub fn temp_dir(name: &str) -> PathBuf {
    ptacorr::testing::temp_dir(&format!("checks-{name}"))
}

/// A small scenario: `n` pulsars over `years`, one backend with two channels, white noise,
/// and optionally a background of log10 amplitude `bg` simulated on exactly the analysis ladder
/// (14 frequencies, no leakage) so the optimal statistic is exactly unbiased.
pub fn small_scenario(n: usize, years: f64, cadence: f64, bg: Option<f64>) -> String {
    let background = bg
        .map(|a| format!("[background]\nlog10_amplitude = {a}\nspectral_index = 4.333333333333333\npattern = \"hd\"\n"))
        .unwrap_or_default();
    format!(
        r#"
[array]
title = "Check array (fictional)"
n_pulsars = {n}
start_mjd = 56000.0
span_years = {years}
cadence_days = {cadence}

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

[white]
sigma_us = [0.2, 1.0]
efac = [1.0, 1.2]

{background}
[simulation]
n_frequencies = 14
span_factor = 1
"#
    )
}

/// Simulate a scenario text into `dir` with `seed` and read it back.
pub fn simulate_release(scenario: &str, dir: &Path, seed: u64) -> Release {
    let s = Scenario::parse(scenario, Path::new("check.toml")).expect("scenario parses");
    let layout = lay_out(&s, seed);
    simulate_scenario(&layout, seed, dir).expect("simulation runs");
    read_release(dir).expect("release reads")
}

/// The Python with NumPy for the peer checks: $PTACORR_PYTHON, else the repository's .venv
/// (made by `./run setup` and `./run test`). Its absence is a failure, never a silent pass: a
/// peer check that cannot run has checked nothing.
pub fn numpy_python() -> PathBuf {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("repository root")
        .to_path_buf();
    let candidates: Vec<PathBuf> = std::env::var_os("PTACORR_PYTHON")
        .map(PathBuf::from)
        .into_iter()
        .chain([repo.join(".venv/bin/python")])
        .collect();
    for c in &candidates {
        let ok = std::process::Command::new(c)
            .args(["-c", "import numpy"])
            .status()
            .is_ok_and(|s| s.success());
        if ok {
            return c.clone();
        }
    }
    panic!(
        "the NumPy peer check needs a Python with NumPy and found none (tried {candidates:?}): \
         run `./run setup` (it makes .venv with NumPy) or set PTACORR_PYTHON to such a Python"
    );
}

/// The dense-reference scaffolding shared by the checks that rebuild a pulsar's covariance as
/// an explicit n x n matrix (`dense_reference.rs`, `common_dense.rs`, `likelihood_dense.rs`).
pub mod dense {
    use ndarray::Array2;
    use std::f64::consts::PI;

    /// phi(f) = A^2/(12 pi^2) f_yr^(gamma-3) f^-gamma / T in s^2, f_yr = 1/(365.25 d)
    /// (Lentati et al. 2013), written out here independently of `engine/src/spectrum.rs`.
    pub fn phi(log10_a: f64, gamma: f64, f: f64, t: f64) -> f64 {
        let fyr: f64 = 1.0 / (365.25 * 86400.0);
        10f64.powf(2.0 * log10_a) / (12.0 * PI * PI) * fyr.powf(gamma - 3.0) * f.powf(-gamma) / t
    }

    /// Fourier columns sin, cos per frequency j / span (j = 1..k), times a row scale.
    pub fn fourier(t: &[f64], k: usize, span: f64, scale: &[f64]) -> Array2<f64> {
        Array2::from_shape_fn((t.len(), 2 * k), |(i, c)| {
            let arg = 2.0 * PI * (c / 2 + 1) as f64 / span * t[i];
            scale[i] * if c % 2 == 0 { arg.sin() } else { arg.cos() }
        })
    }
}
