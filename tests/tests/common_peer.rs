//! The engine's eigen-form common-process likelihood against the NumPy peer
//! (tests/reference/common_ref.py), which reduces every pulsar with its own code and evaluates
//! ln L(A, gamma) - ln L(0) of X ~ N(0, Z + Z Phi Z) (van Haasteren & Vallisneri 2014, eqs. 22-27)
//! by one Cholesky factorisation of the full 2KN x 2KN covariance per point. Differences of the
//! log likelihood must agree to 1e-8 (relative to max(|difference|, 1)), for all four models at
//! 8 (A, gamma) points each, on an array with white, ECORR, red and DM noise.

use ptacorr::common::{CommonData, CommonModel};
use ptacorr_checks::{numpy_python, simulate_release, temp_dir};
use std::path::Path;
use std::process::Command;

const SCENARIO: &str = r#"
[array]
title = "Common peer check (fictional)"
n_pulsars = 7
start_mjd = 57000.0
span_years = 6.0
cadence_days = 40.0

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
log10_amplitude = -13.9
pattern = "hd"
"#;

const POINTS: [(f64, f64); 8] = [
    (-16.0, 13.0 / 3.0),
    (-14.6, 13.0 / 3.0),
    (-14.0, 13.0 / 3.0),
    (-13.5, 13.0 / 3.0),
    (-13.0, 13.0 / 3.0),
    (-14.2, 2.0),
    (-13.7, 5.5),
    (-15.0, 0.7),
];

#[test]
fn eigen_form_agrees_with_the_numpy_dense_cholesky_peer() {
    let py = numpy_python();
    let dir = temp_dir("common-peer");
    let rel_dir = dir.join("release");
    let rel = simulate_release(SCENARIO, &rel_dir, 31);
    let k = 8;
    let data = CommonData::from_release(&rel, &rel.noise, k).unwrap();
    let mut csv = String::from("model,log10_amplitude,spectral_index\n");
    for m in CommonModel::ALL {
        for (u, g) in POINTS {
            csv.push_str(&format!("{},{u:?},{g:?}\n", m.name()));
        }
    }
    let points = dir.join("points.csv");
    std::fs::write(&points, csv).unwrap();
    let out = dir.join("peer.csv");
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("reference/common_ref.py");
    let o = Command::new(&py)
        .arg(&script)
        .arg(&rel_dir)
        .arg("--points")
        .arg(&points)
        .arg("--out")
        .arg(&out)
        .args(["--frequencies", &k.to_string()])
        .output()
        .expect("python runs");
    assert!(
        o.status.success(),
        "peer failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let mut r = csv::Reader::from_path(&out).unwrap();
    let rows: Vec<(String, f64, f64, f64)> = r
        .records()
        .map(|rec| {
            let rec = rec.unwrap();
            let f = |i: usize| rec[i].parse::<f64>().unwrap();
            (rec[0].to_string(), f(1), f(2), f(3))
        })
        .collect();
    assert_eq!(rows.len(), 4 * POINTS.len(), "the peer skipped points");
    let mut worst = 0.0f64;
    for m in CommonModel::ALL {
        let mine: Vec<&(String, f64, f64, f64)> = rows.iter().filter(|r| r.0 == m.name()).collect();
        let ours: Vec<f64> = mine
            .iter()
            .map(|r| data.amplitude_curve(m, r.2).unwrap().at_log10(r.1))
            .collect();
        for (i, ri) in mine.iter().enumerate() {
            // Against A = 0 and between every two points: the constant cancels in both.
            let tol = |b: f64| 1e-8 * b.abs().max(1.0);
            let d = (ours[i] - ri.3).abs();
            worst = worst.max(d / ri.3.abs().max(1.0));
            assert!(
                d < tol(ri.3),
                "{} at ({}, {}): engine {} peer {}",
                m.name(),
                ri.1,
                ri.2,
                ours[i],
                ri.3
            );
            for j in 0..i {
                let (a, b) = (ours[i] - ours[j], ri.3 - mine[j].3);
                assert!(
                    (a - b).abs() < tol(b) + tol(ri.3),
                    "{} {i}-{j}: {a} vs {b}",
                    m.name()
                );
            }
        }
        // Not vacuous: the likelihood moves over the points by far more than the tolerance.
        let spread = mine.iter().map(|r| r.3).fold(f64::NEG_INFINITY, f64::max)
            - mine.iter().map(|r| r.3).fold(f64::INFINITY, f64::min);
        assert!(spread > 10.0, "{}: spread {spread}", m.name());
    }
    eprintln!("worst relative difference engine vs peer: {worst:.2e}");
    std::fs::remove_dir_all(&dir).ok();
}
