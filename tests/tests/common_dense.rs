//! The reduced-data likelihood of the common process against the dense time-domain likelihood:
//! one n x n covariance over every TOA of a small array, C = C_int + F Phi_c F^T with
//! Phi_c = A^2 Gamma (x) diag(phi_0(gamma)), the timing model marginalised with a flat prior
//! (van Haasteren et al. 2009, eq. 20; van Haasteren & Vallisneri 2014, eq. 17):
//! ln L = -1/2 r^T (C^-1 - C^-1 M (M^T C^-1 M)^-1 M^T C^-1) r - 1/2 ln det C
//!        - 1/2 ln det (M^T C^-1 M) + const.
//! Every matrix is built here from the formulas, independently of the engine's basis code; the
//! patterns come from their published closed forms (Hellings & Downs 1983).

use ndarray::{Array1, Array2};
use ndarray_linalg::{Cholesky, Inverse, UPLO};
use ptacorr::common::{fit_fixed_index, CommonData, CommonModel, CommonSettings};
use ptacorr::release::{Pulsar, Release};
use ptacorr_checks::dense::{fourier, phi};
use ptacorr_checks::{simulate_release, temp_dir};

const SCENARIO: &str = r#"
[array]
title = "Dense common check (fictional)"
n_pulsars = 4
start_mjd = 57000.0
span_years = 5.0
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
share = 0.75
log10_amplitude = [-14.0, -13.5]
spectral_index = [2.0, 4.0]

[dm]
share = 0.5
log10_amplitude = [-14.0, -13.5]
spectral_index = [2.0, 3.0]

[background]
log10_amplitude = -13.8
pattern = "hd"
"#;

/// One pulsar's own covariance (white, ECORR, red, DM), its analysis Fourier basis and its
/// timing-model columns (1, t, t^2; normalised, which leaves the projection unchanged).
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
    for i in 0..n {
        for j in 0..n {
            if p.backend[i] == p.backend[j] && (p.mjd[i] - p.mjd[j]).abs() * 86400.0 <= 3600.0 {
                if let Some(e) = pn.white_for(&p.backends[p.backend[i]]).ecorr() {
                    c[[i, j]] += e * e;
                }
            }
        }
    }
    if let Some(red) = pn.red {
        let kr = red.n_frequencies.unwrap_or(k);
        let fr = fourier(&t, kr, span, &vec![1.0; n]);
        let pr: Vec<f64> = (0..2 * kr)
            .map(|col| {
                let fj = (col / 2 + 1) as f64 / span;
                phi(red.log10_amplitude, red.spectral_index, fj, span)
            })
            .collect();
        c = c + fr.dot(&Array2::from_diag(&Array1::from(pr))).dot(&fr.t());
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

/// Hellings & Downs (1983): 1/2 - x/4 + 3/2 x ln x, x = (1 - cos zeta)/2; 1 on the diagonal.
fn gamma_matrix(model: CommonModel, rel: &Release) -> Array2<f64> {
    let d: Vec<[f64; 3]> = rel.pulsars.iter().map(|p| p.direction).collect();
    let n = d.len();
    Array2::from_shape_fn((n, n), |(a, b)| {
        if a == b {
            return 1.0;
        }
        let c = d[a][0] * d[b][0] + d[a][1] * d[b][1] + d[a][2] * d[b][2];
        match model {
            CommonModel::Curn => 0.0,
            CommonModel::Monopole => 1.0,
            CommonModel::Dipole => c,
            CommonModel::Hd => {
                let x = (1.0 - c) / 2.0;
                0.5 - x / 4.0 + 1.5 * x * x.ln()
            }
        }
    })
}

/// The dense marginal log likelihood (up to a constant) of the whole array.
fn dense_log_likelihood(
    ps: &[DensePulsar],
    gamma_ab: &Array2<f64>,
    log10_a: Option<f64>,
    gamma: f64,
    span: f64,
    k: usize,
) -> f64 {
    let ph: Option<Vec<f64>> = log10_a.map(|la| {
        (0..2 * k)
            .map(|cc| phi(la, gamma, (cc / 2 + 1) as f64 / span, span))
            .collect()
    });
    dense_log_likelihood_phi(ps, gamma_ab, ph.as_deref())
}

/// The same with any common coefficient variances `ph` (2K: sin and cos of each frequency).
fn dense_log_likelihood_phi(ps: &[DensePulsar], gamma_ab: &Array2<f64>, ph: Option<&[f64]>) -> f64 {
    let offs: Vec<usize> = ps
        .iter()
        .scan(0, |s, p| {
            let o = *s;
            *s += p.r.len();
            Some(o)
        })
        .collect();
    let n: usize = ps.iter().map(|p| p.r.len()).sum();
    let nm: usize = ps.iter().map(|p| p.m.ncols()).sum();
    let mut c = Array2::<f64>::zeros((n, n));
    let mut m = Array2::<f64>::zeros((n, nm));
    let mut r = Array1::<f64>::zeros(n);
    let mut col = 0;
    for (a, p) in ps.iter().enumerate() {
        let o = offs[a];
        let na = p.r.len();
        c.slice_mut(ndarray::s![o..o + na, o..o + na]).assign(&p.c);
        m.slice_mut(ndarray::s![o..o + na, col..col + p.m.ncols()])
            .assign(&p.m);
        r.slice_mut(ndarray::s![o..o + na]).assign(&p.r);
        col += p.m.ncols();
    }
    if let Some(ph) = ph {
        for (a, pa) in ps.iter().enumerate() {
            for (b, pb) in ps.iter().enumerate() {
                let g = gamma_ab[[a, b]];
                if g == 0.0 {
                    continue;
                }
                let fa = &pa.f * &Array1::from(ph.to_vec()).mapv(|v| v * g);
                let blk = fa.dot(&pb.f.t());
                let (oa, ob) = (offs[a], offs[b]);
                let mut sl = c.slice_mut(ndarray::s![oa..oa + pa.r.len(), ob..ob + pb.r.len()]);
                sl += &blk;
            }
        }
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
fn reduced_likelihood_differences_match_the_dense_time_domain_likelihood() {
    let dir = temp_dir("common-dense");
    // The first seed whose random layout gives some pulsar DM noise, so every process is checked.
    let rel = (23..33)
        .map(|seed| simulate_release(SCENARIO, &dir, seed))
        .find(|rel| {
            rel.pulsars
                .iter()
                .any(|p| rel.noise.pulsar(&p.label).dm.is_some())
        })
        .expect("a layout with DM noise");
    let k = 5;
    let (t0, t1) = rel.mjd_range();
    let span = (t1 - t0) * 86400.0;
    let data = CommonData::from_release(&rel, &rel.noise, k).unwrap();
    let ps: Vec<DensePulsar> = rel
        .pulsars
        .iter()
        .map(|p| dense_pulsar(&rel, p, k))
        .collect();
    let points = [
        (-15.0, 2.0),
        (-14.2, 13.0 / 3.0),
        (-13.6, 13.0 / 3.0),
        (-13.3, 5.5),
        (-13.9, 0.5),
        (-12.8, 3.0),
    ];
    for model in CommonModel::ALL {
        let g = gamma_matrix(model, &rel);
        let dense0 = dense_log_likelihood(&ps, &g, None, 0.0, span, k);
        let mut dense = Vec::new();
        let mut ours = Vec::new();
        for &(la, gamma) in &points {
            dense.push(dense_log_likelihood(&ps, &g, Some(la), gamma, span, k) - dense0);
            ours.push(data.amplitude_curve(model, gamma).unwrap().at_log10(la));
        }
        // Differences between points and against A = 0 (the constant cancels in both).
        for i in 0..points.len() {
            let scale = dense[i].abs().max(1.0);
            assert!(
                (ours[i] - dense[i]).abs() < 1e-8 * scale,
                "{} at {:?}: reduced {} dense {}",
                model.name(),
                points[i],
                ours[i],
                dense[i]
            );
            for j in 0..i {
                let (a, b) = (ours[i] - ours[j], dense[i] - dense[j]);
                assert!(
                    (a - b).abs() < 1e-8 * b.abs().max(1.0) + 1e-8 * scale,
                    "{} {:?} - {:?}: {a} vs {b}",
                    model.name(),
                    points[i],
                    points[j]
                );
            }
        }
        // The check is not vacuous: the likelihood moves by much more than the tolerance.
        assert!(dense.iter().any(|d| d.abs() > 1.0), "{dense:?}");
    }
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn fixed_index_posterior_matches_brute_force_dense_evaluation_at_20_amplitudes() {
    // p(u | X) = L(u) pi(u) / evidence with u = log10 A; the dense likelihood gives L(u) / L(0)
    // and the engine's evidence the normalisation. Tolerance 1e-6 in ln p: the trapezoid
    // normalisation of the 4097-node table against the adaptive evidence (tolerance 1e-8).
    let dir = temp_dir("common-dense-posterior");
    let rel = simulate_release(SCENARIO, &dir, 29);
    let k = 5;
    let (t0, t1) = rel.mjd_range();
    let span = (t1 - t0) * 86400.0;
    let data = CommonData::from_release(&rel, &rel.noise, k).unwrap();
    let ps: Vec<DensePulsar> = rel
        .pulsars
        .iter()
        .map(|p| dense_pulsar(&rel, p, k))
        .collect();
    let settings = CommonSettings {
        n_frequencies: k,
        ..Default::default()
    };
    let gamma = settings.fixed_spectral_index;
    let fit = fit_fixed_index(&data, CommonModel::Hd, &settings).unwrap();
    let post = &fit.posterior;
    assert_eq!(post.x.len(), 4097);
    let g = gamma_matrix(CommonModel::Hd, &rel);
    let dense0 = dense_log_likelihood(&ps, &g, None, 0.0, span, k);
    let ln_prior = -(settings.log10_amplitude_max - settings.log10_amplitude_min).ln();
    let mut compared = 0;
    for j in 0..20 {
        let i = 100 + 200 * j;
        let u = post.x[i];
        let want = dense_log_likelihood(&ps, &g, Some(u), gamma, span, k) - dense0 + ln_prior
            - fit.evidence.ln_evidence;
        let got = post.density[i].ln();
        if want > -600.0 {
            assert!((got - want).abs() < 1e-6, "log10 A = {u}: {got} vs {want}");
            compared += 1;
        }
    }
    assert!(
        compared >= 10,
        "only {compared} amplitudes carry posterior mass"
    );
    std::fs::remove_dir_all(&dir).ok();
}

/// Kolmogorov-Smirnov distance between the empirical distribution of `xs` and the cumulative
/// distribution `cdf`.
fn ks_distance(xs: &mut [f64], cdf: &dyn Fn(f64) -> f64) -> f64 {
    xs.sort_by(f64::total_cmp);
    let n = xs.len() as f64;
    xs.iter()
        .enumerate()
        .map(|(i, &x)| {
            let c = cdf(x);
            (c - i as f64 / n).abs().max((c - (i + 1) as f64 / n).abs())
        })
        .fold(0.0, f64::max)
}

fn tab_cdf(t: &ptacorr::common::Tabulated, x: f64) -> f64 {
    let i = t.x.partition_point(|&v| v < x).clamp(1, t.x.len() - 1);
    let f = (x - t.x[i - 1]) / (t.x[i] - t.x[i - 1]);
    t.cdf[i - 1] + f.clamp(0.0, 1.0) * (t.cdf[i] - t.cdf[i - 1])
}

#[test]
fn posterior_draws_follow_the_quadrature_posterior_and_depend_on_seed_and_index_only() {
    use ptacorr::common::{draw_curn, fit_common, DrawIndex};
    let dir = temp_dir("common-draws");
    let rel = simulate_release(SCENARIO, &dir, 29);
    let settings = CommonSettings {
        n_frequencies: 5,
        n_spectral_index: 9,
        ..Default::default()
    };
    let data = CommonData::from_release(&rel, &rel.noise, 5).unwrap();
    let fit = fit_common(&data, &settings).unwrap();
    let curn = &fit.fits[&CommonModel::Curn];
    // Kolmogorov (1933): P(sqrt(n) D > 1.95) ~ 0.001 for draws from the stated distribution,
    // so the bound below is a 0.1% false-failure rate (the seed is fixed, so it is one draw).
    let n = 3000;
    let bound = 1.95 / (n as f64).sqrt();
    let fixed = draw_curn(&data, &fit, DrawIndex::Fixed, n, 11).unwrap();
    let mut u: Vec<f64> = fixed.iter().map(|d| d.log10_amplitude).collect();
    let d = ks_distance(&mut u, &|x| tab_cdf(&curn.fixed.posterior, x));
    assert!(d < bound, "fixed-index draws: KS distance {d} >= {bound}");
    assert!(fixed.iter().all(|d| d.spectral_index.is_none()));
    let varied = draw_curn(&data, &fit, DrawIndex::Varied, n, 11).unwrap();
    let mut g: Vec<f64> = varied.iter().map(|d| d.spectral_index.unwrap()).collect();
    let d = ks_distance(&mut g, &|x| tab_cdf(&curn.varied.spectral_index, x));
    assert!(d < bound, "gamma draws: KS distance {d} >= {bound}");
    let mut u: Vec<f64> = varied.iter().map(|d| d.log10_amplitude).collect();
    let d = ks_distance(&mut u, &|x| tab_cdf(&curn.varied.log10_amplitude, x));
    // The log10 A marginal is tabulated by Simpson over the 9 gamma nodes, the draws take gamma
    // continuously: allow the KS bound plus that rule's difference (checked loose, 0.02).
    assert!(d < bound + 0.02, "log10 A draws: KS distance {d}");
    // Draw i depends on (seed, i) alone.
    let few = draw_curn(&data, &fit, DrawIndex::Varied, 7, 11).unwrap();
    assert_eq!(&few[..], &varied[..7]);
    let other = draw_curn(&data, &fit, DrawIndex::Varied, 7, 12).unwrap();
    assert_ne!(few, other);
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn free_spectrum_likelihood_matches_the_dense_time_domain_likelihood() {
    // A spectrum that is no power law: log10 rho_j rising and falling over the 5 frequencies.
    use ptacorr::common::FreeSpectrum;
    let dir = temp_dir("common-dense-free");
    let rel = simulate_release(SCENARIO, &dir, 29);
    let k = 5;
    let data = CommonData::from_release(&rel, &rel.noise, k).unwrap();
    let ps: Vec<DensePulsar> = rel
        .pulsars
        .iter()
        .map(|p| dense_pulsar(&rel, p, k))
        .collect();
    let spectra: [[f64; 5]; 3] = [
        [-12.0, -13.5, -12.8, -14.0, -15.0],
        [-13.0, -13.0, -13.0, -13.0, -13.0],
        [-11.5, -14.5, -16.0, -13.2, -17.0],
    ];
    for model in CommonModel::ALL {
        let g = gamma_matrix(model, &rel);
        let fs = FreeSpectrum::new(&data, model).unwrap();
        let dense0 = dense_log_likelihood_phi(&ps, &g, None);
        let mut moved = 0.0f64;
        for u in &spectra {
            let ph: Vec<f64> = (0..2 * k).map(|c| 10f64.powf(u[c / 2])).collect();
            let want = dense_log_likelihood_phi(&ps, &g, Some(&ph)) - dense0;
            let got = fs.log_likelihood(u).unwrap().0;
            assert!(
                (got - want).abs() < 1e-8 * want.abs().max(1.0),
                "{} {u:?}: free spectrum {got} dense {want}",
                model.name()
            );
            moved = moved.max(want.abs());
        }
        assert!(moved > 1.0, "{}: the likelihood barely moves", model.name());
    }
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn free_spectrum_gradient_matches_central_differences_and_the_power_law_limit() {
    // The analytic gradient (docs/common-process.md, "Free spectrum") against central
    // differences of the value, in log10 rho and on the sampler's unconstrained scale; and with
    // rho_j = A^2 phi_0,j(gamma) the free spectrum is the power law's eigen form.
    use ptacorr::chains::ChainTable;
    use ptacorr::common::{draws_csv, CommonDraw, FreeSpectrum, FreeSpectrumPosterior};
    let dir = temp_dir("common-free-gradient");
    let rel = simulate_release(SCENARIO, &dir, 29);
    let k = 4;
    let data = CommonData::from_release(&rel, &rel.noise, k).unwrap();
    let u = [-12.4, -13.3, -14.1, -13.6];
    let y = [0.4, -0.9, 1.3, 0.1];
    for model in CommonModel::ALL {
        let fs = FreeSpectrum::new(&data, model).unwrap();
        let (_, g) = fs.log_likelihood(&u).unwrap();
        let post = FreeSpectrumPosterior::new(fs.clone(), -20.0, -8.0).unwrap();
        let (_, gy) = post.log_density(&y).unwrap();
        for j in 0..k {
            let h = 1e-5;
            let (mut up, mut dn) = (u, u);
            up[j] += h;
            dn[j] -= h;
            let fd =
                (fs.log_likelihood(&up).unwrap().0 - fs.log_likelihood(&dn).unwrap().0) / (2.0 * h);
            assert!(
                (fd - g[j]).abs() < 1e-5 * fd.abs().max(1.0),
                "{} d/d log10 rho_{j}: analytic {} central difference {fd}",
                model.name(),
                g[j]
            );
            let (mut yp, mut ym) = (y, y);
            yp[j] += h;
            ym[j] -= h;
            let fdy =
                (post.log_density(&yp).unwrap().0 - post.log_density(&ym).unwrap().0) / (2.0 * h);
            assert!(
                (fdy - gy[j]).abs() < 1e-5 * fdy.abs().max(1.0),
                "{} d/dy_{j}: analytic {} central difference {fdy}",
                model.name(),
                gy[j]
            );
        }
        assert!(g.iter().any(|v| v.abs() > 1e-2), "{g:?}");
        for (la, gamma) in [(-13.8, 13.0 / 3.0), (-13.2, 2.5)] {
            let phi0 = data.phi0(gamma);
            let us: Vec<f64> = (0..k).map(|j| 2.0 * la + phi0[2 * j].log10()).collect();
            let got = fs.log_likelihood(&us).unwrap().0;
            let want = data.amplitude_curve(model, gamma).unwrap().at_log10(la);
            assert!(
                (got - want).abs() < 1e-9 * want.abs().max(1.0),
                "{}: free spectrum {got} power law {want}",
                model.name()
            );
        }
    }
    let fs = FreeSpectrum::new(&data, CommonModel::Curn).unwrap();
    let e = FreeSpectrumPosterior::new(fs, -10.0, -10.0).unwrap_err();
    assert!(e.to_string().contains("log10-power-range"), "{e}");
    // The draw table is a chain table the shared reader accepts as common-process draws.
    let d = [CommonDraw {
        log10_amplitude: -14.5,
        spectral_index: Some(4.0),
        log_posterior: -1.25,
    }];
    let text = String::from_utf8(draws_csv(&d).unwrap()).unwrap();
    assert_eq!(
        text,
        "chain,draw,log_posterior,diverging,common.log10_amplitude,common.spectral_index\n\
         0,0,-1.25,false,-14.5,4.0\n"
    );
    let p = std::path::Path::new("common-draws.csv");
    let back = ChainTable::parse(text.as_bytes(), p).unwrap();
    back.check_common_only(p).unwrap();
    assert_eq!(back.draws[0].values, vec![-14.5, 4.0]);
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn adaptive_gamma_rule_converges_to_a_fine_fixed_rule() {
    // The adaptive rule in gamma (docs/common-process.md, "Quadrature") against an independent
    // reference: composite Simpson over 1025 equally spaced gamma nodes (spacing 7/1024; for a
    // smooth integrand Simpson's error is O(h^4), Press et al. 2007, Numerical Recipes, 3rd ed.,
    // sec. 4.2, so this reference is far finer than any tolerance tested). Whatever node count
    // it starts from, the adaptive evidence must agree with the reference to the stated
    // tolerance (the last halving changed it by less than that; the remaining error of a
    // converging Simpson rule is about 1/15 of the last change), and its reported error must
    // be below the tolerance too.
    use ptacorr::common::{fit_common, log_integral_adaptive, simpson_weights};
    let dir = temp_dir("common-gamma-rule");
    let rel = simulate_release(SCENARIO, &dir, 29);
    let data = CommonData::from_release(&rel, &rel.noise, 5).unwrap();
    let tol = 1e-3;
    for model in [CommonModel::Curn, CommonModel::Hd] {
        let base = CommonSettings {
            n_frequencies: 5,
            index_tolerance: tol,
            models: vec![model],
            ..Default::default()
        };
        let n_ref = 1025;
        let h = (base.spectral_index_max - base.spectral_index_min) / (n_ref - 1) as f64;
        let w = simpson_weights(n_ref, h);
        let ln_terms: Vec<f64> = (0..n_ref)
            .map(|j| {
                let g = base.spectral_index_min + j as f64 * h;
                let c = data.amplitude_curve(model, g).unwrap();
                let (ln_i, _) = log_integral_adaptive(
                    &|u| c.at_log10(u), // uniform in log10 A: density 1/6 added below
                    base.log10_amplitude_min,
                    base.log10_amplitude_max,
                    1e-10,
                );
                ln_i - (base.log10_amplitude_max - base.log10_amplitude_min).ln() + w[j].ln()
                    - (base.spectral_index_max - base.spectral_index_min).ln()
            })
            .collect();
        let m = ln_terms.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let reference = m + ln_terms.iter().map(|t| (t - m).exp()).sum::<f64>().ln();
        for start in [3, 5, 9, 41] {
            let s = CommonSettings {
                n_spectral_index: start,
                ..base.clone()
            };
            let fit = fit_common(&data, &s).unwrap();
            let v = &fit.fits[&model].varied;
            let err = (v.evidence.ln_evidence - reference).abs();
            assert!(
                err < tol,
                "{} from {start} nodes ({} at the end): ln Z {} vs reference {reference} (error {err:e})",
                model.name(),
                v.spectral_indices.len(),
                v.evidence.ln_evidence
            );
            assert!(v.gamma_rule_error < tol, "reported {}", v.gamma_rule_error);
            assert!(v.spectral_indices.len() >= start);
            eprintln!(
                "{} from {start}: {} nodes, error {err:e}, reported {:e}",
                model.name(),
                v.spectral_indices.len(),
                v.gamma_rule_error
            );
        }
    }
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn free_spectrum_cost_estimate_counts_the_factored_dimension_and_the_gradients() {
    // The cost of a free-spectrum run is stated before it starts (docs/common-process.md,
    // "Cost"): CURN factors one 2K block per pulsar, HD one block of rank(Gamma) x 2K (the HD
    // matrix of distinct pulsars is positive definite, so rank N; Hellings & Downs 1983), each
    // d^3/3 (Cholesky) + d^3 (triangular inverse) flops (Golub & Van Loan 2013, secs. 3.1, 4.2),
    // and chains x (warm-up + draws) x 15 gradients.
    use ptacorr::common::{
        estimate_free_spectrum_cost, FreeSpectrumSettings, ASSUMED_STEPS_PER_ITERATION,
    };
    let dir = temp_dir("common-fs-cost");
    let rel = simulate_release(SCENARIO, &dir, 29);
    let k = 3;
    let data = CommonData::from_release(&rel, &rel.noise, k).unwrap();
    let n = data.n_pulsars();
    let fs = FreeSpectrumSettings {
        models: vec![CommonModel::Curn, CommonModel::Hd],
        log10_power_min: -20.0,
        log10_power_max: -8.0,
        sampler: ptacorr::sampler::SamplerSettings {
            warmup: 100,
            draws: 200,
            chains: 3,
            ..Default::default()
        },
        seed: 1,
    };
    for (m, d, blocks) in [
        (CommonModel::Curn, 2 * k, n),
        (CommonModel::Hd, n * 2 * k, 1),
    ] {
        let c = estimate_free_spectrum_cost(&data, m, &fs).unwrap();
        assert_eq!(c.dimension, d, "{}", m.name());
        let df = d as f64;
        assert_eq!(
            c.flops_per_gradient,
            blocks as f64 * (df.powi(3) / 3.0 + df.powi(3))
        );
        assert_eq!(c.gradients, 3 * 300 * ASSUMED_STEPS_PER_ITERATION);
        assert!(c.seconds_per_gradient > 0.0 && c.seconds.is_finite() && c.seconds > 0.0);
    }
    std::fs::remove_dir_all(&dir).ok();
}
