//! The single-pulsar noise likelihood (engine/src/likelihood.rs) against the dense textbook
//! form, and its analytic gradient against finite differences.
//!
//! Reference: the explicit n x n covariance C = N + ECORR blocks + F B F^T, built here from the
//! formulas (not from the engine's basis code), with the timing model marginalised under a flat
//! prior (van Haasteren & Levin 2013, MNRAS 428, 1147, eq. for the marginal likelihood):
//! ln L = -1/2 [r^T P r + ln det C + ln det(M^T C^-1 M)] - (n - m)/2 ln 2 pi,
//! P = C^-1 - C^-1 M (M^T C^-1 M)^-1 M^T C^-1. The engine uses the same constant, so the values
//! are compared directly (and their difference between two parameter points too).

use ndarray::{Array1, Array2};
use ndarray_linalg::{Determinant, Inverse};
use ptacorr::likelihood::{
    BackendTerms, CommonSpec, CommonTerm, Components, Hyper, PulsarLikelihood,
};
use ptacorr::reduce::FrequencyGrid;
use ptacorr::release::{DesignMatrix, Pulsar, Release};
use ptacorr::spectrum::PowerLaw;
use ptacorr_checks::dense::{fourier, phi};
use ptacorr_checks::{simulate_release, temp_dir};
use rand::{Rng, SeedableRng};
use std::f64::consts::PI;

const SCENARIO: &str = r#"
[array]
title = "Likelihood check (fictional)"
n_pulsars = 3
start_mjd = 57000.0
span_years = 4.0
cadence_days = 45.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

[[backend]]
name = "MRL-UHF"
observatory = "Mirelle"
freq_mhz = [820.0]
share = 1.0

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
"#;

/// Values of the hyperparameters by kind, for the dense form.
#[derive(Default)]
struct Point {
    efac: Vec<f64>,
    equad: Vec<Option<f64>>,
    ecorr: Vec<Option<f64>>,
    red: Option<(f64, f64)>,
    dm: Option<(f64, f64)>,
    common: Option<(f64, f64)>,
}

fn point(
    lik: &PulsarLikelihood,
    theta: &[f64],
    nb: usize,
    fixed_common: Option<PowerLaw>,
) -> Point {
    let mut pt = Point {
        efac: vec![1.0; nb],
        equad: vec![None; nb],
        ecorr: vec![None; nb],
        common: fixed_common.map(|c| (c.log10_amplitude, c.spectral_index)),
        ..Default::default()
    };
    for (p, &v) in lik.parameters().iter().zip(theta) {
        match p.kind {
            Hyper::Efac(b) => pt.efac[b] = v,
            Hyper::Log10Equad(b) => pt.equad[b] = Some(v),
            Hyper::Log10Ecorr(b) => pt.ecorr[b] = Some(v),
            Hyper::RedLog10Amplitude => pt.red = Some((v, 0.0)),
            Hyper::RedSpectralIndex => pt.red.as_mut().unwrap().1 = v,
            Hyper::DmLog10Amplitude => pt.dm = Some((v, 0.0)),
            Hyper::DmSpectralIndex => pt.dm.as_mut().unwrap().1 = v,
            Hyper::CommonLog10Amplitude => pt.common = Some((v, 0.0)),
            Hyper::CommonSpectralIndex => pt.common.as_mut().unwrap().1 = v,
        }
    }
    pt
}

/// Dense ln L (see the module comment).
fn dense_log_likelihood(p: &Pulsar, grid: &FrequencyGrid, comp: &Components, pt: &Point) -> f64 {
    let span = grid.t_span;
    let t: Vec<f64> = p.mjd.iter().map(|m| (m - grid.t0_mjd) * 86400.0).collect();
    let n = t.len();
    let mut c = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        let b = p.backend[i];
        c[[i, i]] =
            (pt.efac[b] * p.sigma[i]).powi(2) + pt.equad[b].map_or(0.0, |q| 10f64.powf(2.0 * q));
    }
    // ECORR: TOAs of one backend within 3600 s share a jitter term (here: the same MJD).
    for i in 0..n {
        for j in 0..n {
            let b = p.backend[i];
            if b == p.backend[j] && (t[i] - t[j]).abs() <= 3600.0 {
                if let Some(q) = pt.ecorr[b] {
                    c[[i, j]] += 10f64.powf(2.0 * q);
                }
            }
        }
    }
    let ones = vec![1.0; n];
    let k_red = comp.red.unwrap_or(0);
    let k_common = comp.common.map_or(0, |c| c.n_frequencies);
    let k_r = k_red.max(k_common);
    if k_r > 0 {
        let f = fourier(&t, k_r, span, &ones);
        let d: Vec<f64> = (0..2 * k_r)
            .map(|col| {
                let j = col / 2;
                let fj = (j + 1) as f64 / span;
                let r = pt
                    .red
                    .filter(|_| j < k_red)
                    .map_or(0.0, |(a, g)| phi(a, g, fj, span));
                let cm = pt
                    .common
                    .filter(|_| j < k_common)
                    .map_or(0.0, |(a, g)| phi(a, g, fj, span));
                r + cm
            })
            .collect();
        c = c + f.dot(&Array2::from_diag(&Array1::from(d))).dot(&f.t());
    }
    if let Some(k) = comp.dm {
        let (a, g) = pt.dm.unwrap();
        let scale: Vec<f64> = p.freq_mhz.iter().map(|nu| (1400.0 / nu).powi(2)).collect();
        let fd = fourier(&t, k, span, &scale);
        let d: Vec<f64> = (0..2 * k)
            .map(|col| phi(a, g, (col / 2 + 1) as f64 / span, span))
            .collect();
        c = c + fd.dot(&Array2::from_diag(&Array1::from(d))).dot(&fd.t());
    }
    let mut m = match &p.design {
        Some(d) => d.values.clone(),
        None => Array2::from_shape_fn((n, 3), |(i, j)| t[i].powi(j as i32)),
    };
    // Unit-norm columns, as the engine's timing model (the constant ln det M^T M differs
    // otherwise).
    for mut col in m.columns_mut() {
        let norm = col.dot(&col).sqrt();
        col /= norm;
    }
    let cinv = c.inv().unwrap();
    let cm = cinv.dot(&m);
    let a = m.t().dot(&cm);
    let pinv = &cinv - &cm.dot(&a.inv().unwrap()).dot(&cm.t());
    let r = Array1::from(p.residual.clone());
    let (_, ld_c) = c.sln_det().unwrap();
    let (_, ld_a) = a.sln_det().unwrap();
    -0.5 * (r.dot(&pinv.dot(&r)) + ld_c + ld_a) - 0.5 * (n - m.ncols()) as f64 * (2.0 * PI).ln()
}

/// A random point in a moderate box (not the prior box: the dense inverse must stay accurate).
fn random_point(lik: &PulsarLikelihood, rng: &mut impl Rng) -> Vec<f64> {
    lik.parameters()
        .iter()
        .map(|p| match p.kind {
            Hyper::Efac(_) => rng.random_range(0.6..1.8),
            Hyper::Log10Equad(_) | Hyper::Log10Ecorr(_) => rng.random_range(-7.5..-6.0),
            Hyper::RedLog10Amplitude | Hyper::DmLog10Amplitude | Hyper::CommonLog10Amplitude => {
                rng.random_range(-14.5..-13.0)
            }
            _ => rng.random_range(1.0..5.0),
        })
        .collect()
}

struct Case {
    name: &'static str,
    comp: Components,
    design: bool,
    fixed_common: Option<PowerLaw>,
}

fn cases() -> Vec<Case> {
    let white = |equad: bool, ecorr: [bool; 2]| {
        vec![
            BackendTerms {
                efac: true,
                log10_equad: equad,
                log10_ecorr: ecorr[0],
            },
            BackendTerms {
                efac: true,
                log10_equad: equad,
                log10_ecorr: ecorr[1],
            },
        ]
    };
    let common = PowerLaw {
        log10_amplitude: -14.2,
        spectral_index: 13.0 / 3.0,
    };
    vec![
        Case {
            name: "white only",
            comp: Components {
                backends: white(true, [false, false]),
                ..Default::default()
            },
            design: false,
            fixed_common: None,
        },
        Case {
            name: "ECORR on one backend, red",
            comp: Components {
                backends: white(false, [true, false]),
                red: Some(6),
                ..Default::default()
            },
            design: false,
            fixed_common: None,
        },
        Case {
            name: "everything, design matrix, fixed common",
            comp: Components {
                backends: white(true, [true, true]),
                red: Some(5),
                dm: Some(7),
                common: Some(CommonSpec {
                    n_frequencies: 4,
                    term: CommonTerm::Fixed(common),
                }),
            },
            design: true,
            fixed_common: Some(common),
        },
        Case {
            // No ECORR: TOAs of one backend share one sigma in this simulation, so the
            // likelihood takes its grouped form (likelihood.rs, `Groups`).
            name: "red and DM without ECORR, design matrix",
            comp: Components {
                backends: white(true, [false, false]),
                red: Some(6),
                dm: Some(5),
                common: None,
            },
            design: true,
            fixed_common: None,
        },
        Case {
            name: "red and free common on different ladders, DM",
            comp: Components {
                backends: white(true, [false, true]),
                red: Some(3),
                dm: Some(4),
                common: Some(CommonSpec {
                    n_frequencies: 6,
                    term: CommonTerm::Free,
                }),
            },
            design: false,
            fixed_common: None,
        },
    ]
}

fn with_design(p: &Pulsar, grid: &FrequencyGrid) -> Pulsar {
    let t: Vec<f64> = p.mjd.iter().map(|m| (m - grid.t0_mjd) * 86400.0).collect();
    let yr = 365.25 * 86400.0;
    let values = Array2::from_shape_fn((t.len(), 5), |(i, j)| match j {
        0 => 1.0,
        1 => t[i],
        2 => t[i] * t[i],
        3 => (2.0 * PI * t[i] / yr).sin(),
        _ => (2.0 * PI * t[i] / yr).cos(),
    });
    let names = ["offset", "spin", "spin_down", "ra_like", "dec_like"]
        .map(String::from)
        .to_vec();
    Pulsar {
        design: Some(DesignMatrix { names, values }),
        ..p.clone()
    }
}

fn release(name: &str) -> Release {
    let dir = temp_dir(name);
    let rel = simulate_release(SCENARIO, &dir, 5);
    let _ = std::fs::remove_dir_all(&dir);
    rel
}

#[test]
fn woodbury_likelihood_matches_the_dense_form() {
    let rel = release("likelihood-dense-value");
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let mut rng = rand_chacha_rng(1);
    for case in cases() {
        for p in &rel.pulsars {
            assert_eq!(
                p.backends.len(),
                2,
                "the check needs both backends in every pulsar"
            );
            let p = if case.design {
                with_design(p, &grid)
            } else {
                p.clone()
            };
            let lik = PulsarLikelihood::new(&p, &case.comp, &grid).unwrap();
            // Without ECORR the simulation's one sigma per backend makes the grouped form
            // (likelihood.rs, `Groups`); it and the TOA-by-TOA form both meet the dense one.
            let no_ecorr = case.comp.backends.iter().all(|b| !b.log10_ecorr);
            assert_eq!(lik.grouped(), no_ecorr, "{}", case.name);
            let by_toa = PulsarLikelihood::new(&p, &case.comp, &grid)
                .unwrap()
                .ungrouped();
            let mut values = Vec::new();
            for _ in 0..2 {
                let theta = random_point(&lik, &mut rng);
                let got = lik.log_likelihood(&theta).unwrap();
                let pt = point(&lik, &theta, 2, case.fixed_common);
                let want = dense_log_likelihood(&p, &grid, &case.comp, &pt);
                let got_by_toa = by_toa.log_likelihood(&theta).unwrap();
                assert!(
                    (got_by_toa - want).abs() <= 1e-10 * want.abs(),
                    "{} {}: TOA by TOA ln L {got_by_toa} vs dense {want}",
                    case.name,
                    p.label
                );
                // 1e-10 relative: the dense inverse of a C with condition number ~1e5 here
                // loses ~1e-11; the Woodbury form is more accurate than that.
                assert!(
                    (got - want).abs() <= 1e-10 * want.abs(),
                    "{} {}: ln L {got} vs dense {want}",
                    case.name,
                    p.label
                );
                values.push((got, want));
            }
            let (d_got, d_want) = (values[0].0 - values[1].0, values[0].1 - values[1].1);
            // Differences: the parameter-dependent part alone, against the same scale.
            assert!(
                (d_got - d_want).abs() <= 1e-10 * values[0].1.abs(),
                "{} {}: difference {d_got} vs {d_want}",
                case.name,
                p.label
            );
        }
    }
}

fn rand_chacha_rng(seed: u64) -> rand::rngs::StdRng {
    rand::rngs::StdRng::seed_from_u64(seed)
}

#[test]
fn analytic_gradient_matches_finite_differences() {
    let rel = release("likelihood-dense-gradient");
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let mut rng = rand_chacha_rng(2);
    for case in cases() {
        for p in &rel.pulsars {
            let p = if case.design {
                with_design(p, &grid)
            } else {
                p.clone()
            };
            let lik = PulsarLikelihood::new(&p, &case.comp, &grid).unwrap();
            let theta = random_point(&lik, &mut rng);
            let mut grad = vec![0.0; lik.dim()];
            let value = lik.log_likelihood_and_gradient(&theta, &mut grad).unwrap();
            assert_eq!(value, lik.log_likelihood(&theta).unwrap());
            let scale = grad.iter().fold(0.0f64, |m, g| m.max(g.abs()));
            for k in 0..lik.dim() {
                // Five-point central difference (Abramowitz & Stegun 1964, 25.3.6), error
                // O(h^4 f^(5)); h = 1e-3 on parameters of order 1.
                let h = 1e-3;
                let at = |dx: f64| {
                    let mut x = theta.clone();
                    x[k] += dx;
                    lik.log_likelihood(&x).unwrap()
                };
                let fd = (at(-2.0 * h) - 8.0 * at(-h) + 8.0 * at(h) - at(2.0 * h)) / (12.0 * h);
                // 1e-6 relative to the component, or to 1e-3 of the largest component when
                // the component itself is near zero (relative error has no meaning there).
                let tol = 1e-6 * grad[k].abs().max(1e-3 * scale);
                assert!(
                    (grad[k] - fd).abs() <= tol,
                    "{} {} d/d {}: analytic {} vs finite difference {fd}",
                    case.name,
                    p.label,
                    lik.parameters()[k].name,
                    grad[k]
                );
            }
        }
    }
}

/// MAP recovery of EFAC on simulated white-noise-only pulsars against the simulation's truth.
/// Reference: the truth drawn by `ptacorr simulate`; tolerance 5 standard errors, with the
/// standard error of a Gaussian scale EFAC from n TOAs ~ EFAC / sqrt(2 (n - m)) (Fisher
/// information of a variance, 2 / sigma^4 per sample; Cramer-Rao bound).
#[test]
fn map_recovers_simulated_efac() {
    use ptacorr::noise_fit::map::MapSettings;
    use ptacorr::noise_fit::{fit_release, NoiseSettings};
    use ptacorr::priors::PriorFile;
    const WHITE: &str = r#"
[array]
title = "EFAC recovery (fictional)"
n_pulsars = 4
start_mjd = 57000.0
span_years = 6.0
cadence_days = 7.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0]

[white]
sigma_us = [0.5, 1.0]
efac = [0.6, 1.8]
"#;
    let dir = temp_dir("likelihood-efac-recovery");
    let rel = simulate_release(WHITE, &dir, 9);
    let truth: toml::Value =
        toml::from_str(&std::fs::read_to_string(dir.join("truth.toml")).unwrap()).unwrap();
    let _ = std::fs::remove_dir_all(&dir);
    let priors = PriorFile::parse(
        "[components]\nequad = false\necorr_backends = \"none\"\nred = false\n",
        std::path::Path::new("p.toml"),
    )
    .unwrap();
    let settings = NoiseSettings {
        map: MapSettings {
            starts: 3,
            ..MapSettings::default()
        },
        mode: ptacorr::noise_fit::sample::SampleMode::MapOnly,
        ..NoiseSettings::default()
    };
    let run = fit_release(&rel, &priors, &settings, &|| {}).unwrap();
    for (fit, p) in run.fits.iter().zip(&rel.pulsars) {
        let want = truth["pulsar"][&p.label]["white"][0]["efac"]
            .as_float()
            .unwrap();
        let got = fit.noise.white[0].efac;
        let se = want / (2.0 * (p.n_toa() - 3) as f64).sqrt();
        assert!(fit.map.converged, "{}: MAP not converged", p.label);
        assert!(
            (got - want).abs() < 5.0 * se,
            "{}: EFAC {got} vs truth {want} (se {se})",
            p.label
        );
    }
}

/// The sampler's density on the unconstrained scale (with the logistic Jacobian) and the MAP
/// objective (without it): analytic gradients against five-point finite differences
/// (Abramowitz & Stegun 1964, 25.3.6), 1e-6 relative as above; some parameters held fixed, as
/// a white-noise-at-MAP run does.
#[test]
fn unconstrained_posterior_gradients_match_finite_differences() {
    use ptacorr::noise_fit::posterior::Posterior;
    use ptacorr::priors::PriorFile;
    let rel = release("likelihood-dense-posterior");
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let priors = PriorFile::parse(
        "[components]\ndm = true\ndm_frequencies = 5\nred_frequencies = 6\necorr_backends = [\"KRK-L\"]\n",
        std::path::Path::new("p.toml"),
    )
    .unwrap();
    let mut rng = rand_chacha_rng(3);
    let mut ridge_pairs_seen = 0;
    for p in &rel.pulsars {
        let prior = priors.pulsar(p).unwrap();
        let lik = PulsarLikelihood::new(p, &prior.components, &grid).unwrap();
        let theta = random_point(&lik, &mut rng);
        // The plain logistic coordinates, the ridge coordinates the full posterior is sampled
        // in (EFAC and log10 EQUAD of each backend as one pair), and some parameters held.
        let plain = |fixed: &[(usize, f64)]| Posterior::with_fixed(&lik, &prior, fixed).unwrap();
        for post in [
            plain(&[]),
            plain(&[]).with_white_ridge(),
            plain(&[(0, theta[0]), (1, theta[1])]),
            plain(&[(0, theta[0]), (1, theta[1])]).with_white_ridge(),
        ] {
            ridge_pairs_seen += post.ridge_pairs();
            let values: Vec<f64> = post.free().iter().map(|&i| theta[i]).collect();
            let x = post.unconstrained(&values);
            // Both backends have EFAC and EQUAD; holding KRK-L's leaves MRL-UHF's pair.
            assert!(
                [0, 1, 2].contains(&post.ridge_pairs()),
                "{} ridge pairs",
                post.ridge_pairs()
            );
            type Eval<'p> = fn(&Posterior<'p>, &[f64], &mut [f64]) -> ptacorr::Result<f64>;
            let evals: [Eval; 2] = [
                Posterior::log_density_and_gradient,
                Posterior::log_posterior_and_gradient,
            ];
            for f in evals {
                let mut grad = vec![0.0; post.dim()];
                f(&post, &x, &mut grad).unwrap();
                let scale = grad.iter().fold(0.0f64, |m, g| m.max(g.abs()));
                for k in 0..post.dim() {
                    let h = 1e-3;
                    let at = |dx: f64| {
                        let mut y = x.clone();
                        y[k] += dx;
                        let mut g = vec![0.0; y.len()];
                        f(&post, &y, &mut g).unwrap()
                    };
                    let fd = (at(-2.0 * h) - 8.0 * at(-h) + 8.0 * at(h) - at(2.0 * h)) / (12.0 * h);
                    let tol = 1e-6 * grad[k].abs().max(1e-3 * scale);
                    assert!(
                        (grad[k] - fd).abs() <= tol,
                        "{} x[{k}]: analytic {} vs finite difference {fd}",
                        p.label,
                        grad[k]
                    );
                }
            }
        }
    }
    // Three pulsars, two pairs each without held parameters, one with.
    assert_eq!(
        ridge_pairs_seen,
        3 * (2 + 1),
        "the ridge coordinates were checked"
    );
}

/// The fixed-white fast path (`ptacorr noise --fixed-white`) against the full likelihood at the
/// same parameters: the value to 1e-10 relative (its r^T N^-1 r - a^T T^T N^-1 r loses a few
/// digits at most against the full form's sum of two non-negative terms), the power-law
/// gradient to 1e-8 relative of the largest component, white-noise entries zero; and the
/// value again after moving only the red and DM parameters.
#[test]
fn fixed_white_likelihood_matches_the_full_one() {
    let rel = release("likelihood-fixed-white");
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let mut rng = rand_chacha_rng(3);
    for case in cases() {
        for p in &rel.pulsars {
            let p = if case.design {
                with_design(p, &grid)
            } else {
                p.clone()
            };
            let lik = PulsarLikelihood::new(&p, &case.comp, &grid).unwrap();
            let theta = random_point(&lik, &mut rng);
            let fw = lik.fixed_white(&theta).unwrap();
            let white = lik.white_parameters();
            for step in 0..2 {
                let mut x = theta.clone();
                if step == 1 {
                    let other = random_point(&lik, &mut rng);
                    for k in 0..x.len() {
                        if !white.contains(&k) {
                            x[k] = other[k];
                        }
                    }
                }
                let mut g_full = vec![0.0; lik.dim()];
                let mut g_fast = vec![0.0; lik.dim()];
                let full = lik.log_likelihood_and_gradient(&x, &mut g_full).unwrap();
                let fast = fw.log_likelihood_and_gradient(&x, &mut g_fast).unwrap();
                assert!(
                    (full - fast).abs() <= 1e-10 * full.abs(),
                    "{} {}: fixed-white ln L {fast} vs full {full}",
                    case.name,
                    p.label
                );
                let scale = g_full.iter().fold(0.0f64, |m, g| m.max(g.abs()));
                for k in 0..lik.dim() {
                    if white.contains(&k) {
                        assert_eq!(g_fast[k], 0.0);
                    } else {
                        assert!(
                            (g_fast[k] - g_full[k]).abs() <= 1e-8 * scale,
                            "{} {} d/d {}: {} vs {}",
                            case.name,
                            p.label,
                            lik.parameters()[k].name,
                            g_fast[k],
                            g_full[k]
                        );
                    }
                }
            }
        }
    }
}

/// The test scenario with every TOA uncertainty scattered by `dex` (so no two are equal),
/// simulated with `seed` in a temporary folder that is removed again.
fn scattered_release(dex: f64, name: &str, seed: u64) -> Release {
    let scatter = SCENARIO.replace(
        "sigma_us = [0.3, 1.5]",
        &format!("sigma_us = [0.3, 1.5]\nsigma_scatter_dex = {dex}"),
    );
    let dir = temp_dir(name);
    let rel = simulate_release(&scatter, &dir, seed);
    let _ = std::fs::remove_dir_all(&dir);
    rel
}

/// The interpolated white-weighted Gram (engine/src/white_gram.rs) with distinct TOA
/// uncertainties (0.2 dex scatter, so the TOAs are not grouped): ln L against the dense form
/// at 1e-10 relative (as above), the gradient against five-point central differences
/// (Abramowitz & Stegun 1964, 25.3.6) at 1e-6 relative (as above), and against the exact
/// TOA-by-TOA evaluation. Cases without ECORR (the interpolation's domain), with EQUAD free
/// (interpolated in t) and without it (one t: the exact Gram kept).
#[test]
fn interpolated_white_gram_matches_dense_and_finite_differences() {
    let rel = scattered_release(0.2, "likelihood-dense-interpolated", 7);
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let mut rng = rand_chacha_rng(11);
    let backends = |equad: bool| {
        vec![
            BackendTerms {
                efac: true,
                log10_equad: equad,
                log10_ecorr: false,
            };
            2
        ]
    };
    let comps = [
        ("white only", backends(true), None, None, false),
        (
            "red and DM, design matrix",
            backends(true),
            Some(6),
            Some(5),
            true,
        ),
        ("EFAC only, red", backends(false), Some(4), None, false),
    ];
    let mut interpolated = 0;
    for (name, b, red, dm, design) in comps {
        let comp = Components {
            backends: b,
            red,
            dm,
            common: None,
        };
        for p in &rel.pulsars {
            let p = if design {
                with_design(p, &grid)
            } else {
                p.clone()
            };
            let mut lik = PulsarLikelihood::new(&p, &comp, &grid).unwrap();
            assert!(
                !lik.grouped(),
                "{name}: scattered uncertainties are not grouped"
            );
            // The default prior ranges (priors.rs): EFAC [0.01, 10], log10 EQUAD [-9, -5]; the
            // power-law ranges do not enter.
            let bounds: Vec<[f64; 2]> = lik
                .parameters()
                .iter()
                .map(|h| match h.kind {
                    Hyper::Efac(_) => [0.01, 10.0],
                    Hyper::Log10Equad(_) => [-9.0, -5.0],
                    _ => [-20.0, 7.0],
                })
                .collect();
            let status = lik.interpolate_white(&bounds, &Default::default());
            assert!(
                matches!(status, ptacorr::likelihood::WhiteGramStatus::Used(_)),
                "{name} {}: {status:?}",
                p.label
            );
            assert!(lik.white_interpolated());
            interpolated += 1;
            let exact = PulsarLikelihood::new(&p, &comp, &grid).unwrap();
            for _ in 0..2 {
                let theta = random_point(&lik, &mut rng);
                let got = lik.log_likelihood(&theta).unwrap();
                let want = dense_log_likelihood(&p, &grid, &comp, &point(&lik, &theta, 2, None));
                assert!(
                    (got - want).abs() <= 1e-10 * want.abs(),
                    "{name} {}: interpolated ln L {got} vs dense {want}",
                    p.label
                );
                let mut grad = vec![0.0; lik.dim()];
                let mut grad_exact = vec![0.0; lik.dim()];
                lik.log_likelihood_and_gradient(&theta, &mut grad).unwrap();
                exact
                    .log_likelihood_and_gradient(&theta, &mut grad_exact)
                    .unwrap();
                let scale = grad.iter().fold(0.0f64, |m, g| m.max(g.abs()));
                for k in 0..lik.dim() {
                    let h = 1e-3;
                    let at = |dx: f64| {
                        let mut x = theta.clone();
                        x[k] += dx;
                        lik.log_likelihood(&x).unwrap()
                    };
                    let fd = (at(-2.0 * h) - 8.0 * at(-h) + 8.0 * at(h) - at(2.0 * h)) / (12.0 * h);
                    let tol = 1e-6 * grad[k].abs().max(1e-3 * scale);
                    let name_k = &lik.parameters()[k].name;
                    assert!(
                        (grad[k] - fd).abs() <= tol,
                        "{name} {} d/d {name_k}: analytic {} vs finite difference {fd}",
                        p.label,
                        grad[k]
                    );
                    assert!(
                        (grad[k] - grad_exact[k]).abs() <= tol,
                        "{name} {} d/d {name_k}: interpolated {} vs TOA by TOA {}",
                        p.label,
                        grad[k],
                        grad_exact[k]
                    );
                }
            }
            // Outside the interpolated range (EFAC below its prior): the exact evaluation.
            let mut theta = random_point(&lik, &mut rng);
            for (k, h) in lik.parameters().iter().enumerate() {
                if matches!(h.kind, Hyper::Efac(_)) {
                    theta[k] = 0.005;
                }
            }
            if comp.backends[0].log10_equad {
                let (a, b) = (
                    lik.log_likelihood(&theta).unwrap(),
                    exact.log_likelihood(&theta).unwrap(),
                );
                // The same arithmetic; 1e-13 relative since BLAS may round differently for
                // buffers at other alignments (two likelihood objects).
                assert!(
                    (a - b).abs() <= 1e-13 * b.abs(),
                    "{name}: outside the range the evaluation is exact: {a} vs {b}"
                );
            }
        }
    }
    assert_eq!(interpolated, 3 * rel.pulsars.len());
}

/// An interpolant that misses its check at setup (too few Chebyshev nodes allowed) is not
/// used: the status says why, and the evaluation is the exact one (to 1e-13 relative: the same
/// arithmetic, rounded differently only where BLAS sees buffers at other alignments).
#[test]
fn interpolated_white_gram_falls_back_when_its_check_fails() {
    let rel = scattered_release(0.3, "likelihood-dense-fallback", 8);
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let comp = Components {
        backends: vec![
            BackendTerms {
                efac: true,
                log10_equad: true,
                log10_ecorr: false,
            };
            2
        ],
        red: Some(5),
        ..Default::default()
    };
    let p = &rel.pulsars[0];
    let mut lik = PulsarLikelihood::new(p, &comp, &grid).unwrap();
    let bounds: Vec<[f64; 2]> = lik
        .parameters()
        .iter()
        .map(|h| match h.kind {
            Hyper::Efac(_) => [0.01, 10.0],
            Hyper::Log10Equad(_) => [-9.0, -5.0],
            _ => [-20.0, 7.0],
        })
        .collect();
    let settings = ptacorr::white_gram::GramSettings {
        max_nodes: 3,
        ..Default::default()
    };
    match lik.interpolate_white(&bounds, &settings) {
        ptacorr::likelihood::WhiteGramStatus::Failed(note) => {
            assert!(note.contains("missed its check"), "{note}");
            assert!(note.contains("TOA by TOA"), "{note}");
        }
        other => panic!("expected a failed check, got {other:?}"),
    }
    assert!(!lik.white_interpolated());
    let exact = PulsarLikelihood::new(p, &comp, &grid).unwrap();
    let theta = random_point(&lik, &mut rand_chacha_rng(12));
    let (a, b) = (
        lik.log_likelihood(&theta).unwrap(),
        exact.log_likelihood(&theta).unwrap(),
    );
    assert!((a - b).abs() <= 1e-13 * b.abs(), "{a} vs {b}");
}

/// A MAP run reported as converged sits at a maximum: L-BFGS restarted from its end gains less
/// than 0.01 in ln posterior. Reference: the first-order condition of a concave function,
/// ln p(x*) - ln p(x) <= g . (x* - x) (Boyd & Vandenberghe 2004, Convex Optimization, eq. 3.2),
/// with the scaled-gradient tolerance 1e-3 per coordinate and the four white-noise coordinates
/// moving less than 2.5 units each on restart: at most 0.01. Pulsars as in the noise benchmark
/// (benchmarks/scenario-noise-100x2400.toml: two backends, uncertainties scattered by 0.2 dex,
/// EQUAD comparable to them), where a tolerance divided by |ln p| ~ 3e4 had let runs stop with
/// gradients ~1e-2 up to 1.4 below the maximum (pulsar P014, checked here) and 12 of 100
/// pulsars warn. The search must also be confirmed by a second start (`converged`).
#[test]
fn converged_map_runs_are_maxima_that_a_restart_cannot_improve() {
    use ptacorr::noise_fit::map::{maximum_a_posteriori, run_from, MapSettings};
    use ptacorr::noise_fit::posterior::Posterior;
    use ptacorr::priors::PriorFile;
    // The benchmark's array cut to its first 14 pulsars (each pulsar's draws come from its
    // own index, so P14 is the benchmark's P014: white noise only, 4 parameters).
    let scenario = include_str!("../../benchmarks/scenario-noise-100x2400.toml")
        .replace("n_pulsars = 100", "n_pulsars = 14");
    let dir = temp_dir("likelihood-map-restart");
    let rel = simulate_release(&scenario, &dir, 8);
    let _ = std::fs::remove_dir_all(&dir);
    let grid = FrequencyGrid::for_release(&rel, 1).unwrap();
    let priors = PriorFile::parse(
        "[components]\necorr_backends = \"none\"\nred = false\ndm = false\n",
        std::path::Path::new("p.toml"),
    )
    .unwrap();
    let settings = MapSettings::default();
    let mut checked = 0;
    for (i, p) in rel.pulsars.iter().enumerate() {
        if p.label != "P14" {
            continue;
        }
        let prior = priors.pulsar(p).unwrap();
        let mut lik = PulsarLikelihood::new(p, &prior.components, &grid).unwrap();
        let _ = lik.interpolate_white(&prior.bounds, &Default::default());
        let post = Posterior::new(&lik, &prior).unwrap();
        let map = maximum_a_posteriori(&post, &settings, 1, i as u64).unwrap();
        for run in map.runs.iter().filter(|r| r.converged) {
            // Just inside the prior range (a maximum on an edge maps to an infinite coordinate).
            let inside: Vec<f64> = run
                .values
                .iter()
                .zip(post.bounds())
                .map(|(&v, &[lo, hi])| {
                    lo + (hi - lo) * ((v - lo) / (hi - lo)).clamp(1e-12, 1.0 - 1e-12)
                })
                .collect();
            let again = run_from(&post, &inside, &settings);
            let gain = again.log_posterior - run.log_posterior;
            assert!(
                gain < 0.01,
                "{}: a run reported converged at ln p {} gains {gain} on restart",
                p.label,
                run.log_posterior
            );
            checked += 1;
        }
        assert!(map.converged, "{}: MAP search not converged", p.label);
    }
    assert!(
        checked >= 2,
        "only {checked} converged runs checked in {:?}",
        rel.pulsars.iter().map(|p| &p.label).collect::<Vec<_>>()
    );
}
