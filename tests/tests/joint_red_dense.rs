//! The joint likelihood of every pulsar's red noise with the uncorrelated common process
//! (`ptacorr common --joint-red`, engine/src/common/joint.rs) against the dense time-domain
//! likelihood: one n x n covariance over every TOA of a small array,
//! C = blockdiag(C_a) with C_a = N_a (white, ECORR) + DM + F_a diag(rho_red,a + rho_c) F_a^T,
//! the timing model marginalised with a flat prior (van Haasteren et al. 2009, eq. 20;
//! van Haasteren & Vallisneri 2014, eq. 17):
//! ln L = -1/2 r^T (C^-1 - C^-1 M (M^T C^-1 M)^-1 M^T C^-1) r - 1/2 ln det C
//!        - 1/2 ln det (M^T C^-1 M) + const.
//! Every matrix is built here from the formulas, independently of the engine's basis code.

use ndarray::{s, Array1, Array2};
use ndarray_linalg::{Cholesky, Inverse, UPLO};
use ptacorr::common::{JointRedData, JointRedLikelihood};
use ptacorr::priors::PriorFile;
use ptacorr::release::{Pulsar, Release};
use ptacorr_checks::dense::{fourier, phi};
use ptacorr_checks::{simulate_release, temp_dir};
use std::path::Path;

const SCENARIO: &str = r#"
[array]
title = "Dense joint red-noise check (fictional)"
n_pulsars = 3
start_mjd = 57000.0
span_years = 5.0
cadence_days = 90.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

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
share = 1.0
log10_amplitude = [-14.0, -13.5]
spectral_index = [2.0, 3.0]

[background]
log10_amplitude = -13.8
pattern = "hd"
"#;

/// One pulsar: its covariance without red noise (white, ECORR, DM), analysis Fourier basis,
/// timing-model columns (1, t, t^2, normalised) and residuals.
struct DensePulsar {
    c: Array2<f64>,
    f: Array2<f64>,
    m: Array2<f64>,
    r: Array1<f64>,
}

fn dense_pulsar(rel: &Release, p: &Pulsar, k: usize) -> DensePulsar {
    let (t0, t1) = rel.mjd_range();
    let span = (t1 - t0) * 86400.0;
    let t: Vec<f64> = p.mjd.iter().map(|m| (m - t0) * 86400.0).collect();
    let n = t.len();
    let pn = rel.noise.pulsar(&p.label);
    let f = fourier(&t, k, span, &vec![1.0; n]);
    let mut c = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        let w = pn.white_for(&p.backends[p.backend[i]]);
        c[[i, i]] = (w.efac * p.sigma[i]).powi(2) + w.equad().powi(2);
    }
    // ECORR: fully correlated within an epoch (same backend, within one hour).
    for i in 0..n {
        for j in 0..n {
            if p.backend[i] == p.backend[j] && (p.mjd[i] - p.mjd[j]).abs() * 86400.0 <= 3600.0 {
                if let Some(e) = pn.white_for(&p.backends[p.backend[i]]).ecorr() {
                    c[[i, j]] += e * e;
                }
            }
        }
    }
    if let Some(dm) = pn.dm {
        let kd = dm.n_frequencies.unwrap_or(k);
        let scale: Vec<f64> = p.freq_mhz.iter().map(|nu| (1400.0 / nu).powi(2)).collect();
        let fd = fourier(&t, kd, span, &scale);
        let pd: Vec<f64> = (0..2 * kd)
            .map(|col| {
                let fj = (col / 2 + 1) as f64 / span;
                phi(dm.log10_amplitude, dm.spectral_index, fj, span)
            })
            .collect();
        c = c + fd.dot(&Array2::from_diag(&Array1::from(pd))).dot(&fd.t());
    }
    let mut m = Array2::from_shape_fn((n, 3), |(i, j)| t[i].powi(j as i32));
    for mut col in m.columns_mut() {
        let norm = col.dot(&col).sqrt();
        col /= norm;
    }
    DensePulsar {
        c,
        f,
        m,
        r: Array1::from(p.residual.clone()),
    }
}

/// The dense marginal log likelihood (up to a constant) of the whole array with per-pulsar
/// diagonal Fourier variances `ph[a]` (2K: sin and cos of each frequency).
fn dense_log_likelihood(ps: &[DensePulsar], ph: &[Vec<f64>]) -> f64 {
    let n: usize = ps.iter().map(|p| p.r.len()).sum();
    let nm: usize = ps.iter().map(|p| p.m.ncols()).sum();
    let mut c = Array2::<f64>::zeros((n, n));
    let mut m = Array2::<f64>::zeros((n, nm));
    let mut r = Array1::<f64>::zeros(n);
    let (mut o, mut col) = (0, 0);
    for (p, pa) in ps.iter().zip(ph) {
        let na = p.r.len();
        let fpf = (&p.f * &Array1::from(pa.clone())).dot(&p.f.t());
        c.slice_mut(s![o..o + na, o..o + na]).assign(&(&p.c + &fpf));
        m.slice_mut(s![o..o + na, col..col + p.m.ncols()])
            .assign(&p.m);
        r.slice_mut(s![o..o + na]).assign(&p.r);
        o += na;
        col += p.m.ncols();
    }
    let l = c.cholesky(UPLO::Lower).expect("C positive definite");
    let logdet_c: f64 = l.diag().iter().map(|v| 2.0 * v.ln()).sum();
    let cinv = c.inv().expect("C invertible");
    let cm = cinv.dot(&m);
    let mcm = m.t().dot(&cm);
    let lm = mcm
        .cholesky(UPLO::Lower)
        .expect("M^T C^-1 M positive definite");
    let logdet_m: f64 = lm.diag().iter().map(|v| 2.0 * v.ln()).sum();
    let cr = cinv.dot(&r);
    let mr = m.t().dot(&cr);
    let quad = r.dot(&cr) - mr.dot(&mcm.inv().unwrap().dot(&mr));
    -0.5 * quad - 0.5 * logdet_c - 0.5 * logdet_m
}

#[test]
fn joint_likelihood_differences_match_the_dense_time_domain_likelihood() {
    let dir = temp_dir("joint-red-dense");
    let rel = simulate_release(SCENARIO, &dir, 31);
    let k = 5;
    let (t0, t1) = rel.mjd_range();
    let span = (t1 - t0) * 86400.0;
    let n_toa: usize = rel.pulsars.iter().map(|p| p.n_toa()).sum();
    assert!((30..=200).contains(&n_toa), "{n_toa} TOAs");
    let labels: Vec<String> = rel.pulsars.iter().map(|p| p.label.clone()).collect();
    // Pulsar 1: red noise on 3 of the 5 frequencies; pulsar 2: no red noise (N_red < N);
    // pulsar 0: the built-in defaults (30 frequencies, capped at K = 5).
    let priors = PriorFile::parse(
        &format!(
            "[pulsar.{}]\nred_frequencies = 3\n\n[pulsar.{}]\nred = false\n",
            labels[1], labels[2]
        ),
        Path::new("joint-priors.toml"),
    )
    .unwrap();
    let joint = JointRedData::from_release(&rel, &rel.noise, k, &priors).unwrap();
    assert_eq!(joint.n_red(), 2);
    let like = JointRedLikelihood::new(joint);
    assert_eq!(like.dim(), 6);
    let ps: Vec<DensePulsar> = rel
        .pulsars
        .iter()
        .map(|p| dense_pulsar(&rel, p, k))
        .collect();
    let red_k = [k, 3, 0];
    // theta = (log10 A, gamma, log10 A_0, gamma_0, log10 A_1, gamma_1).
    let points: [[f64; 6]; 5] = [
        [-14.2, 13.0 / 3.0, -13.8, 3.0, -14.0, 2.5],
        [-13.6, 13.0 / 3.0, -15.0, 1.0, -13.2, 4.0],
        [-15.0, 2.0, -13.5, 5.0, -16.0, 0.5],
        [-13.3, 5.5, -14.5, 2.0, -13.9, 3.5],
        [-12.9, 3.0, -17.0, 6.0, -12.8, 1.5],
    ];
    let dense_at = |th: &[f64; 6]| {
        let ph: Vec<Vec<f64>> = (0..3)
            .map(|a| {
                (0..2 * k)
                    .map(|col| {
                        let j = col / 2;
                        let fj = (j + 1) as f64 / span;
                        let mut v = phi(th[0], th[1], fj, span);
                        if a < 2 && j < red_k[a] {
                            v += phi(th[2 + 2 * a], th[3 + 2 * a], fj, span);
                        }
                        v
                    })
                    .collect()
            })
            .collect();
        dense_log_likelihood(&ps, &ph)
    };
    // ln L(Phi = 0): no red noise and no common process anywhere.
    let dense0 = dense_log_likelihood(&ps, &vec![vec![0.0; 2 * k]; 3]);
    let dense: Vec<f64> = points.iter().map(|p| dense_at(p) - dense0).collect();
    let ours: Vec<f64> = points
        .iter()
        .map(|p| like.log_likelihood(p).unwrap().0)
        .collect();
    // Against Phi = 0 and between points (the constant cancels in both). Tolerance 1e-8
    // relative, the reduced-data check's (docs/common-process.md): both sides are exact, and
    // a dense n x n evaluation in f64 of a few hundred TOAs keeps about 1e-10 relative.
    let mut moved = 0.0f64;
    for i in 0..points.len() {
        assert!(
            (ours[i] - dense[i]).abs() < 1e-8 * dense[i].abs().max(1.0),
            "{:?}: reduced {} dense {}",
            points[i],
            ours[i],
            dense[i]
        );
        for j in 0..i {
            let (a, b) = (ours[i] - ours[j], dense[i] - dense[j]);
            let scale = dense[i].abs().max(dense[j].abs()).max(1.0);
            assert!(
                (a - b).abs() < 1e-8 * scale,
                "{:?} - {:?}: reduced {a} dense {b}",
                points[i],
                points[j]
            );
            moved = moved.max(b.abs());
        }
    }
    // Not vacuous: the likelihood moves by much more than the tolerance between the points.
    assert!(moved > 1.0, "{dense:?}");
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn an_empty_red_prior_range_is_refused_with_file_and_field() {
    let e = PriorFile::parse(
        "[ranges]\nred.log10_amplitude = [-14.0, -14.0]\n",
        Path::new("joint-priors.toml"),
    )
    .unwrap_err()
    .to_string();
    assert!(e.contains("joint-priors.toml"), "{e}");
    assert!(e.contains("red.log10_amplitude"), "{e}");
    assert!(e.contains("line 2"), "{e}");
}
