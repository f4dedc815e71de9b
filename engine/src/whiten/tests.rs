//! Tests of the stable Woodbury transform, and of every command on the precise, dense,
//! strong-signal array of `simulations/precise.toml` (cut to 8 pulsars, same precision and
//! amplitude). On the earlier direct forms this array stopped `null` (every method, through
//! the analytic null, and `--method simulate`) with "Z~ of pulsar 7 is not positive definite".

use super::*;
use crate::analysis::{correlate, CorrelateSettings};
use crate::basis::{fourier_basis, timing_model};
use crate::inject::{run_campaign, AutoPowerChoice, InjectSettings, Target};
use crate::null::testdata::{release_from, temp_dir};
use crate::null::{analytic, run_null, Control, Method, NullSettings, Prepared};
use crate::orf::Pattern;
use ndarray::{s, Array1};
use ndarray_linalg::{Cholesky, Diag, Inverse, SolveTriangular, QR};
use std::sync::OnceLock;

/// The precise scenario with `n` pulsars (seed 3 puts a short-span precise pulsar among the
/// first 8, the failing case).
fn precise(n: usize) -> String {
    let text = std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/precise.toml"),
    )
    .expect("simulations/precise.toml");
    assert!(text.contains("n_pulsars = 40"));
    text.replace("n_pulsars = 40", &format!("n_pulsars = {n}"))
}

fn precise_release() -> &'static Release {
    static R: OnceLock<Release> = OnceLock::new();
    R.get_or_init(|| release_from(&precise(8), 3, &temp_dir("precise-release")))
}

fn max_abs(m: &Array2<f64>) -> f64 {
    m.iter().fold(0.0f64, |s, v| s.max(v.abs()))
}

fn frob(m: &Array2<f64>) -> f64 {
    m.iter().map(|v| v * v).sum::<f64>().sqrt()
}

/// A rank-deficient positive semi-definite matrix with eigenvalues spread over 12 decades.
fn spread_psd(dim: usize) -> Array2<f64> {
    let a = Array2::from_shape_fn((dim, dim), |(i, j)| ((i * 7 + j * 13) % 17) as f64 - 8.0);
    let (q, _) = a.qr().unwrap();
    let mut z = Array2::<f64>::zeros((dim, dim));
    for k in 0..dim - 1 {
        let e = 10f64.powf(12.0 * k as f64 / (dim - 2) as f64);
        let col = q.column(k);
        for i in 0..dim {
            for j in 0..dim {
                z[[i, j]] += e * col[i] * col[j];
            }
        }
    }
    (&z + &z.t()) * 0.5
}

/// R and Z~ against LAPACK's general inverse (LU, Anderson et al. 1999) of I + Z~_0 D_c on a
/// matrix where that inverse is well conditioned (|Z~_0 D_c| <= 10, cond <= 11): agreement to
/// 1e-12 relative (11 eps times the dimension, with margin), also with D_c zero on some
/// frequencies.
#[test]
fn transform_matches_the_general_inverse_where_it_is_well_conditioned() {
    let dim = 10;
    let z0 = spread_psd(dim) * 1e-11;
    for dc in [
        vec![0.7; dim],
        (0..dim).map(|i| [0.0, 0.3, 1.0][i % 3]).collect(),
    ] {
        let (r, z) = woodbury_transform(&z0, &dc, "T").unwrap();
        let mut k = z0.clone();
        for (mut col, &d) in k.columns_mut().into_iter().zip(&dc) {
            col *= d;
        }
        k += &Array2::<f64>::eye(dim);
        let r_ref = k.inv().unwrap();
        assert!(max_abs(&(&r - &r_ref)) < 1e-12 * max_abs(&r_ref));
        let z_ref = r_ref.dot(&z0);
        assert!(max_abs(&(&z - &z_ref)) < 1e-12 * max_abs(&z_ref));
        // The root squares to the same Z~.
        let l = analysed_root(&z0, &dc, "T").unwrap();
        assert!(max_abs(&(&l.dot(&l.t()) - &z_ref)) < 1e-12 * max_abs(&z_ref));
    }
    // D_c = 0: the identity.
    let (r, z) = woodbury_transform(&z0, &vec![0.0; dim], "T").unwrap();
    assert_eq!(r, Array2::<f64>::eye(dim));
    assert!(max_abs(&(&z - &z0)) < 1e-12 * max_abs(&z0));
}

/// With |Z~_0 D_c| up to 10^16 and Z~_0 singular, Z~ stays positive semi-definite (its
/// smallest eigenvalue not below -1e-13 of the largest: the rounding of a product L L^T,
/// Higham 2002, sec. 3.5). With D_c > 0 everywhere, D^(1/2) Z~ D^(1/2) = K (I + K)^-1 has the
/// trace sum e_k / (1 + e_k) over the eigenvalues of K = D^(1/2) Z~_0 D^(1/2) (spectral
/// identity; K's eigenvalues from LAPACK); checked at |K| = 10^8, where the tolerance is
/// Weyl's bound dim eps |K| on the eigenvalue errors (d/de e/(1+e) <= 1) times 10.
#[test]
fn transform_stays_positive_semi_definite_under_a_strong_common_process() {
    use ndarray_linalg::EigValsh;
    let dim = 12;
    let dc: Vec<f64> = (0..dim).map(|i| if i < 4 { 1.0 } else { 1e-6 }).collect();
    let z0 = spread_psd(dim) * 1e4;
    let (_, z) = woodbury_transform(&z0, &dc, "T").unwrap();
    let e = z.eigvalsh(UPLO::Lower).unwrap();
    let top = e.iter().cloned().fold(0.0, f64::max);
    assert!(e[0] >= -1e-13 * top, "{} of {top}", e[0]);

    let z0 = spread_psd(dim) * 1e-4;
    let (_, z) = woodbury_transform(&z0, &dc, "T").unwrap();
    let k = Array2::from_shape_fn((dim, dim), |(i, j)| {
        dc[i].sqrt() * z0[[i, j]] * dc[j].sqrt()
    });
    let ek = k.eigvalsh(UPLO::Lower).unwrap();
    let k_norm = ek.iter().cloned().fold(0.0, f64::max);
    let want: f64 = ek.iter().map(|&v| v.max(0.0) / (1.0 + v.max(0.0))).sum();
    let got: f64 = (0..dim).map(|i| dc[i] * z[[i, i]]).sum();
    let tol = 10.0 * dim as f64 * f64::EPSILON * k_norm;
    assert!(
        (got - want).abs() < tol,
        "{got} vs {want} (tolerance {tol})"
    );
    // Bad D_c is a clear error.
    assert!(woodbury_transform(&z0, &vec![-1.0; dim], "T").is_err());
    assert!(woodbury_transform(&z0, &[1.0], "T").is_err());
}

/// Z~ of F^T P^-1 F with the timing model marginalised, computed densely (explicit n x n
/// covariance P = D + F Phi_c F^T; Cholesky P = C C^T; the whitened timing model projected out
/// of the whitened F by Householder QR, so Z = B_perp^T B_perp is positive semi-definite by
/// construction), weighted by the template.
fn dense_weighted_z(rel: &Release, c: &Correlation, a: usize) -> Array2<f64> {
    let p = &rel.pulsars[a];
    let noise = rel.noise.pulsar(&p.label);
    let t = c.grid.seconds(&p.mjd);
    let f = fourier_basis(&t, &c.grid.freqs);
    let m = timing_model(p, &t).unwrap();
    let law = c.common.expect("precise release has a common process");
    let n = p.n_toa();
    let mut cov = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        let w = noise.white_for(&p.backends[p.backend[i]]);
        cov[[i, i]] = (w.efac * p.sigma[i]).powi(2) + w.equad().powi(2);
    }
    let phi_c: Array1<f64> = c
        .grid
        .freqs
        .iter()
        .flat_map(|&fr| {
            let v = law.coefficient_variance(fr, c.grid.t_span);
            [v, v]
        })
        .collect();
    let fp = &f * &phi_c;
    cov += &fp.dot(&f.t());
    let chol = cov.cholesky(UPLO::Lower).unwrap();
    let wm = chol
        .solve_triangular(UPLO::Lower, Diag::NonUnit, &m)
        .unwrap();
    let wf = chol
        .solve_triangular(UPLO::Lower, Diag::NonUnit, &f)
        .unwrap();
    let (q, _) = wm.qr().unwrap();
    let q = q.slice(s![.., ..m.ncols()]).to_owned();
    let b_perp = &wf - &q.dot(&q.t().dot(&wf));
    let z = b_perp.t().dot(&b_perp);
    let h: Vec<f64> = c.phi.iter().map(|v| v.sqrt()).collect();
    Array2::from_shape_fn(z.dim(), |(i, j)| z[[i, j]] * h[i] * h[j])
}
/// The stable Z~ (L L^T from the bare reduction and the transform) against the dense
/// reference for the pulsar whose direct Z~ is most indefinite and for a full-span pulsar:
/// Frobenius agreement to 1e-8 relative. Both sides carry rounding of about eps times the
/// conditioning of the problem (|Z~_0 D_c| ~ 1e4 for the transform, cond of the n x n
/// covariance for the reference); measured 1e-9 for the short-span pulsar and 1e-12 for the
/// full-span one, so 1e-8 is a margin of 10 over the worst (common practice).
#[test]
fn stable_z_matches_the_dense_covariance_on_precise_pulsars() {
    use ndarray_linalg::EigValsh;
    let rel = precise_release();
    let c = correlate(rel, &CorrelateSettings::default()).unwrap();
    let roots = analysis_roots(rel, &c).unwrap();
    let ratio = |z: &Array2<f64>| {
        let e = z.eigvalsh(UPLO::Lower).unwrap();
        e[0] / e.iter().cloned().fold(0.0, f64::max)
    };
    let direct: Vec<f64> = c
        .reduced
        .iter()
        .map(|r| ratio(&crate::optimal::weight(r, &c.phi).z))
        .collect();
    let worst = (0..direct.len())
        .min_by(|&a, &b| direct[a].total_cmp(&direct[b]))
        .unwrap();
    let full = (0..rel.pulsars.len())
        .max_by_key(|&a| rel.pulsars[a].n_toa())
        .unwrap();
    for a in [worst, full] {
        let z_ref = dense_weighted_z(rel, &c, a);
        let z = roots[a].dot(&roots[a].t());
        let err = frob(&(&z - &z_ref)) / frob(&z_ref);
        let z_direct = crate::optimal::weight(&c.reduced[a], &c.phi).z;
        let err_direct = frob(&(&z_direct - &z_ref)) / frob(&z_ref);
        eprintln!(
            "pulsar {} ({} TOAs): direct min/max eigenvalue {:.2e}, direct vs dense {err_direct:.2e}, stable vs dense {err:.2e}",
            a + 1,
            rel.pulsars[a].n_toa(),
            direct[a]
        );
        assert!(err < 1e-8, "pulsar {}: {err}", a + 1);
        assert!(ratio(&z) >= -1e-13);
    }
}

fn null_on_precise(method: Method) -> crate::null::NullReport {
    let rel = precise_release();
    let out = temp_dir(&format!("precise-{method:?}"));
    let s = NullSettings::new(method, 300, 4);
    let r = run_null(rel, &s, &out, Control::default()).unwrap();
    std::fs::remove_dir_all(&out).unwrap();
    r
}

/// Every null method runs on the precise array with the analytic null (it stopped before
/// with "Z~ of pulsar 7 is not positive definite"); every method reports the same observed
/// SNR and the same analytic p-value (one analysis, one quadratic form).
#[test]
fn every_null_method_runs_on_the_precise_array() {
    let mut seen: Option<(f64, f64)> = None;
    for m in [Method::Simulate, Method::Phase, Method::Scramble] {
        let r = null_on_precise(m);
        let a = r.analytic.as_ref().expect("analytic null on by default");
        assert!(r.observed_snr.is_finite(), "{m:?}");
        assert!(
            (0.0..=1.0).contains(&a.p_value),
            "{m:?}: analytic p {}",
            a.p_value
        );
        assert!(
            (0.0..=1.0).contains(&r.p_value),
            "{m:?}: trial p {}",
            r.p_value
        );
        match seen {
            None => seen = Some((r.observed_snr, a.p_value)),
            Some(s) => assert_eq!(s, (r.observed_snr, a.p_value), "{m:?}"),
        }
    }
}

/// The simulated null's covariance is the analysis's: the quadratic form of the roots has
/// mean tr M = 0 and variance 2 tr M^2 = sum c_ab^2 tr(Z~_a Z~_b) = 1 with c_ab from the
/// correlate run's traces (Imhof 1961, section 2; analytic.rs), to 1e-6 (the direct
/// reduction's traces carry the 1e-9 rounding of its cancellation).
#[test]
fn precise_null_has_unit_variance() {
    let rel = precise_release();
    let c = correlate(rel, &CorrelateSettings::default()).unwrap();
    let p = Prepared::new(&c, Pattern::Hd).unwrap();
    let e = analytic::eigenvalues(&p, &analysis_roots(rel, &c).unwrap()).unwrap();
    let (mean, var) = crate::gchisq::mean_variance(&e).unwrap();
    assert!(mean.abs() < 1e-6, "mean {mean}");
    assert!((var - 1.0).abs() < 1e-6, "variance {var}");
}

/// `correlate` and reduced-mode injections on the precise array run and give finite
/// results, with the auto-power at the injected amplitude and fixed from noise.toml (the
/// recovery's calibration is checked in inject.rs's own tests).
#[test]
fn correlate_and_reduced_injections_run_on_the_precise_array() {
    let rel = precise_release();
    let c = correlate(rel, &CorrelateSettings::default()).unwrap();
    let hd = &c.estimates[&Pattern::Hd];
    assert!(
        hd.snr.is_finite() && hd.amplitude2_sigma > 0.0,
        "SNR {}",
        hd.snr
    );
    for auto_power in [AutoPowerChoice::Injected, AutoPowerChoice::Fixed] {
        let settings = InjectSettings {
            amplitudes: vec![0.0, 5e-15],
            realizations: 40,
            auto_power,
            null_trials: 200,
            ..InjectSettings::default()
        };
        let out = run_campaign(Target::from_release(rel), settings).unwrap();
        assert!(out
            .records
            .iter()
            .all(|r| r.amplitude2.is_finite() && r.snr.is_finite()));
    }
}
