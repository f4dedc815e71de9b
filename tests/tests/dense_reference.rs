//! The Woodbury engine against the dense textbook form: explicit n x n covariance matrices and
//! the projection that marginalises the timing model (van Haasteren et al. 2009;
//! van Haasteren & Vallisneri 2014). Every matrix here is built independently of the engine's
//! basis code, from the formulas of docs/reduction.md.

use ndarray::{Array1, Array2};
use ndarray_linalg::Inverse;
use ptacorr::analysis::{correlate, CorrelateSettings};
use ptacorr::orf::Pattern;
use ptacorr::release::{read_release, Pulsar, Release};
use ptacorr_checks::dense::{fourier, phi};
use ptacorr_checks::{simulate_release, temp_dir};
use std::f64::consts::PI;

const SCENARIO: &str = r#"
[array]
title = "Dense check (fictional)"
n_pulsars = 4
start_mjd = 57000.0
span_years = 4.0
cadence_days = 60.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

[[backend]]
name = "MRL-UHF"
observatory = "Mirelle"
freq_mhz = [820.0]
share = 0.6

[white]
sigma_us = [0.3, 1.5]
efac = [0.9, 1.3]
equad_log10_s = [-7.0, -6.5]
ecorr_log10_s = [-7.0, -6.5]

[red]
share = 1.0
log10_amplitude = [-14.0, -13.5]
spectral_index = [2.0, 4.0]

[dm]
share = 0.5
log10_amplitude = [-14.0, -13.5]
spectral_index = [2.0, 3.0]

[background]
log10_amplitude = -13.7
pattern = "hd"
"#;

/// Dense X = F^T P^-1 r and Z = F^T P^-1 F of one pulsar.
fn dense_reduce(rel: &Release, p: &Pulsar, k: usize) -> (Array1<f64>, Array2<f64>) {
    let (t0, t1) = rel.mjd_range();
    let span = (t1 - t0) * 86400.0;
    let t: Vec<f64> = p.mjd.iter().map(|m| (m - t0) * 86400.0).collect();
    let n = t.len();
    let pn = rel.noise.pulsar(&p.label);
    let ones = vec![1.0; n];
    let f = fourier(&t, k, span, &ones);
    let mut c = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        let w = pn.white_for(&p.backends[p.backend[i]]);
        c[[i, i]] = (w.efac * p.sigma[i]).powi(2) + w.equad().powi(2);
    }
    // Red noise plus the common process's auto-power, on the same K frequencies.
    let common = rel.noise.common.unwrap();
    let red = pn.red.unwrap();
    let phi_red: Vec<f64> = (0..2 * k)
        .map(|col| {
            let fj = (col / 2 + 1) as f64 / span;
            phi(common.log10_amplitude, common.spectral_index, fj, span)
                + phi(red.log10_amplitude, red.spectral_index, fj, span)
        })
        .collect();
    c = c + f
        .dot(&Array2::from_diag(&Array1::from(phi_red)))
        .dot(&f.t());
    if let Some(dm) = pn.dm {
        let scale: Vec<f64> = p.freq_mhz.iter().map(|nu| (1400.0 / nu).powi(2)).collect();
        let fd = fourier(&t, k, span, &scale);
        let pd: Vec<f64> = (0..2 * k)
            .map(|col| {
                phi(
                    dm.log10_amplitude,
                    dm.spectral_index,
                    (col / 2 + 1) as f64 / span,
                    span,
                )
            })
            .collect();
        c = c + fd.dot(&Array2::from_diag(&Array1::from(pd))).dot(&fd.t());
    }
    // ECORR: TOAs of one backend at the same epoch (here: the same MJD) share a jitter term.
    for i in 0..n {
        for j in 0..n {
            if p.backend[i] == p.backend[j] && (p.mjd[i] - p.mjd[j]).abs() * 86400.0 <= 3600.0 {
                let w = pn.white_for(&p.backends[p.backend[i]]);
                c[[i, j]] += w.ecorr().unwrap().powi(2);
            }
        }
    }
    // Timing model (unnormalised: the projection does not care) and its marginalisation.
    let mut m = match &p.design {
        Some(d) => d.values.clone(),
        None => Array2::from_shape_fn((n, 3), |(i, j)| t[i].powi(j as i32)),
    };
    // Column scaling leaves the projection unchanged; it only keeps M^T C^-1 M well conditioned.
    for mut col in m.columns_mut() {
        let norm = col.dot(&col).sqrt();
        col /= norm;
    }
    let cinv = c.inv().unwrap();
    let cm = cinv.dot(&m);
    let inner = m.t().dot(&cm).inv().unwrap();
    let pinv = &cinv - &cm.dot(&inner).dot(&cm.t());
    let r = Array1::from(p.residual.clone());
    (f.t().dot(&pinv.dot(&r)), f.t().dot(&pinv).dot(&f))
}

#[test]
fn woodbury_engine_matches_dense_covariances() {
    let dir = temp_dir("dense");
    simulate_release(SCENARIO, &dir, 11);
    // Give the first pulsar an exported design matrix with an extra column (a 300-day sinusoid, not on the Fourier ladder).
    let rel0 = read_release(&dir).unwrap();
    let p0 = &rel0.pulsars[0];
    let mut csv = String::from("offset,f0,f1,wave300\n");
    for &m in &p0.mjd {
        let t = (m - 57000.0) * 86400.0;
        let yr = 2.0 * PI * t / (300.0 * 86400.0);
        csv.push_str(&format!("1.0,{t:?},{:?},{:?}\n", t * t, yr.sin()));
    }
    std::fs::write(dir.join("design0.csv"), csv).unwrap();
    let text = std::fs::read_to_string(dir.join("release.toml")).unwrap();
    let label_line = format!("residuals = \"residuals/{}.csv\"", p0.label);
    let text = text.replacen(
        &label_line,
        &format!("{label_line}\ndesign_matrix = \"design0.csv\""),
        1,
    );
    std::fs::write(dir.join("release.toml"), text).unwrap();

    let rel = read_release(&dir).unwrap();
    assert!(rel.pulsars[0].design.is_some());
    assert!(rel
        .pulsars
        .iter()
        .any(|p| rel.noise.pulsar(&p.label).dm.is_some()));
    let k = 6;
    let settings = CorrelateSettings {
        n_frequencies: k,
        ..Default::default()
    };
    let c = correlate(&rel, &settings).unwrap();

    let dense: Vec<_> = rel
        .pulsars
        .iter()
        .map(|p| dense_reduce(&rel, p, k))
        .collect();
    for (a, (x, z)) in dense.iter().enumerate() {
        let scale = x.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for i in 0..2 * k {
            assert!(
                (c.reduced[a].x[i] - x[i]).abs() <= 1e-8 * scale,
                "X[{a}][{i}]: {} vs {}",
                c.reduced[a].x[i],
                x[i]
            );
            for j in 0..2 * k {
                let s = (z[[i, i]] * z[[j, j]]).sqrt();
                assert!(
                    (c.reduced[a].z[[i, j]] - z[[i, j]]).abs() <= 1e-8 * s,
                    "Z[{a}][{i},{j}]: {} vs {} (scale {s})",
                    c.reduced[a].z[[i, j]],
                    z[[i, j]]
                );
            }
        }
    }
    // Pairwise optimal statistic from the dense X, Z with the template Phi (A = 1).
    let span = rel.span_seconds();
    let ph: Vec<f64> = (0..2 * k)
        .map(|col| phi(0.0, 13.0 / 3.0, (col / 2 + 1) as f64 / span, span))
        .collect();
    let phim = Array2::from_diag(&Array1::from(ph.clone()));
    let mut q = 0;
    let (mut num, mut den) = (0.0, 0.0);
    for a in 0..dense.len() {
        for b in a + 1..dense.len() {
            let (xa, za) = &dense[a];
            let (xb, zb) = &dense[b];
            let top = xa.dot(&phim.dot(xb));
            let tr = za.dot(&phim).dot(zb).dot(&phim).diag().sum();
            let (rho, sigma) = (top / tr, tr.powf(-0.5));
            assert!(
                (c.pairs.sigma[q] / sigma - 1.0).abs() < 1e-8,
                "sigma of pair {q}"
            );
            assert!(
                (c.pairs.rho[q] - rho).abs() < 1e-8 * sigma,
                "rho of pair {q}"
            );
            let g = c.pairs.pattern_values(Pattern::Hd)[q];
            num += g * rho / (sigma * sigma);
            den += g * g / (sigma * sigma);
            q += 1;
        }
    }
    let hd = c.estimates[&Pattern::Hd];
    assert!((hd.amplitude2 - num / den).abs() < 1e-8 * den.powf(-0.5));
    assert!((hd.amplitude2_sigma / den.powf(-0.5) - 1.0).abs() < 1e-8);
    std::fs::remove_dir_all(&dir).ok();
}
