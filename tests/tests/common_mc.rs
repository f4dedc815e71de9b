//! Monte Carlo calibration of the common-process posterior and Bayes factors (long: run with
//! `-- --ignored`). Reduced data are drawn from their exact distribution
//! X ~ N(0, Z + Z Phi_c Z) (van Haasteren & Vallisneri 2014, eq. 22), with Z from a simulated
//! white-noise array; the draws use the engine's seeded streams.
//! Every tolerance is a binomial or Monte Carlo standard error, stated beside it.

use ndarray::{Array1, Array2};
use ndarray_linalg::{Cholesky, UPLO};
use ptacorr::common::{fit_fixed_index, AmplitudePrior, CommonData, CommonModel, CommonSettings};
use ptacorr::rng::{stream, Purpose};
use ptacorr_checks::{simulate_release, small_scenario, temp_dir};
use rand::Rng;
use rand_distr::StandardNormal;
use std::f64::consts::PI;

const K: usize = 5;

/// Hellings & Downs (1983) with 1 on the diagonal; monopole; dipole; identity for CURN.
fn gamma_matrix(model: CommonModel, d: &[[f64; 3]]) -> Array2<f64> {
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

/// phi(f) at A = 1 (Lentati et al. 2013).
fn phi0(gamma: f64, f: f64, t: f64) -> f64 {
    let fyr: f64 = 1.0 / (365.25 * 86400.0);
    1.0 / (12.0 * PI * PI) * fyr.powf(gamma - 3.0) * f.powf(-gamma) / t
}

struct Sampler {
    base: CommonData,
    /// Cholesky factors of the blocks Z_a.
    lz: Vec<Array2<f64>>,
}

impl Sampler {
    fn new(n: usize, seed: u64) -> Self {
        let dir = temp_dir(&format!("common-mc-{n}-{seed}"));
        let rel = simulate_release(&small_scenario(n, 8.0, 30.0, None), &dir, seed);
        let base = CommonData::from_release(&rel, &rel.noise, K).unwrap();
        std::fs::remove_dir_all(&dir).ok();
        let lz = base
            .z
            .iter()
            .map(|z| z.cholesky(UPLO::Lower).unwrap())
            .collect();
        Sampler { base, lz }
    }

    /// X = L_Z xi_1 + Z (A R (x) D) xi_2, so Cov X = Z + Z Phi_c Z.
    fn draw(&self, model: CommonModel, log10_a: Option<f64>, gamma: f64, index: u64) -> CommonData {
        let mut rng = stream(20261202, Purpose::Injection, index);
        let n = self.base.n_pulsars();
        let m = 2 * K;
        let mut x: Vec<Array1<f64>> = self
            .lz
            .iter()
            .map(|l| {
                l.dot(&Array1::from_shape_fn(m, |_| {
                    rng.sample::<f64, _>(StandardNormal)
                }))
            })
            .collect();
        if let Some(la) = log10_a {
            let g = gamma_matrix(model, &self.base.directions);
            // Gamma is positive definite for these distinct sky positions (CURN, HD); the
            // monopole and dipole are rank deficient, so a tiny ridge keeps the factor real.
            let rg = (&g + &(Array2::<f64>::eye(n) * 1e-12))
                .cholesky(UPLO::Lower)
                .unwrap();
            let xi = Array2::from_shape_fn((n, m), |_| rng.sample::<f64, _>(StandardNormal));
            let coef = rg.dot(&xi); // row a: correlated coefficients of pulsar a (unit scale)
            let a = 10f64.powf(la);
            for p in 0..n {
                let c = Array1::from_shape_fn(m, |i| {
                    a * phi0(gamma, self.base.freqs[i / 2], self.base.t_span).sqrt() * coef[[p, i]]
                });
                x[p] = &x[p] + &self.base.z[p].dot(&c);
            }
        }
        CommonData {
            x,
            ..self.base.clone()
        }
    }
}

fn binomial_sigma(p: f64, n: usize) -> f64 {
    (p * (1.0 - p) / n as f64).sqrt()
}

#[test]
#[ignore]
fn credible_intervals_cover_the_injected_amplitude_at_their_nominal_rate() {
    // Bayesian calibration: with the true log10 A drawn from the prior, a central credible
    // interval holds it with exactly its credibility (Cook, Gelman & Rubin 2006).
    let s = Sampler::new(10, 5);
    let settings = CommonSettings {
        n_frequencies: K,
        log10_amplitude_min: -16.0,
        log10_amplitude_max: -13.0,
        ..Default::default()
    };
    let gamma = 13.0 / 3.0;
    for model in [CommonModel::Curn, CommonModel::Hd] {
        let trials = 400;
        let (mut in68, mut in95) = (0usize, 0usize);
        for r in 0..trials {
            let mut u = stream(99, Purpose::Injection, r as u64);
            let truth = -16.0 + 3.0 * u.random::<f64>();
            let d = s.draw(model, Some(truth), gamma, 1000 + r as u64);
            let fit = fit_fixed_index(&d, model, &settings).unwrap();
            let sum = fit.posterior.summary();
            in68 += (sum.interval_68[0] <= truth && truth <= sum.interval_68[1]) as usize;
            in95 += (sum.interval_95[0] <= truth && truth <= sum.interval_95[1]) as usize;
        }
        let (f68, f95) = (in68 as f64 / trials as f64, in95 as f64 / trials as f64);
        // 3 binomial standard errors.
        assert!(
            (f68 - 0.6827).abs() < 3.0 * binomial_sigma(0.6827, trials),
            "{}: 68% coverage {f68}",
            model.name()
        );
        assert!(
            (f95 - 0.95).abs() < 3.0 * binomial_sigma(0.95, trials),
            "{}: 95% coverage {f95}",
            model.name()
        );
    }
}

#[test]
#[ignore]
fn hd_versus_curn_bayes_factor_grows_with_amplitude_and_favours_curn_without_correlations() {
    let s = Sampler::new(16, 7);
    let settings = CommonSettings {
        n_frequencies: K,
        ..Default::default()
    };
    let gamma = 13.0 / 3.0;
    let trials = 40;
    let ln_bf = |model: CommonModel, la: f64, offset: u64| -> Vec<f64> {
        (0..trials)
            .map(|r| {
                let d = s.draw(model, Some(la), gamma, offset + r);
                let hd = fit_fixed_index(&d, CommonModel::Hd, &settings).unwrap();
                let cu = fit_fixed_index(&d, CommonModel::Curn, &settings).unwrap();
                hd.evidence.ln_evidence - cu.evidence.ln_evidence
            })
            .collect()
    };
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let amps = [-14.5, -13.8, -13.2];
    let means: Vec<f64> = amps
        .iter()
        .enumerate()
        .map(|(i, &a)| mean(&ln_bf(CommonModel::Hd, a, 10_000 * (i as u64 + 1))))
        .collect();
    // Increasing means: each step must exceed zero (MC spread of a mean of 40 is small next
    // to the growth of the HD evidence with signal-to-noise; checked at each step).
    assert!(means[0] < means[1] && means[1] < means[2], "{means:?}");
    assert!(means[2] > 1.0, "strong HD signal favours HD: {means:?}");
    // An uncorrelated common process: HD vs CURN centred below zero.
    let mut unc = ln_bf(CommonModel::Curn, -13.2, 90_000);
    unc.sort_by(f64::total_cmp);
    let median = unc[unc.len() / 2];
    assert!(
        median < 0.0,
        "median ln BF HD vs CURN for CURN data: {median}"
    );
}

#[test]
#[ignore]
fn upper_limits_lie_above_the_true_amplitude() {
    let s = Sampler::new(10, 9);
    let settings = CommonSettings {
        n_frequencies: K,
        amplitude_prior: AmplitudePrior::UniformAmplitude,
        ..Default::default()
    };
    let gamma = 13.0 / 3.0;
    let trials = 300;
    for (truth, offset) in [(None, 200_000u64), (Some(-14.8), 300_000)] {
        let mut above = 0;
        for r in 0..trials {
            let d = s.draw(CommonModel::Curn, truth, gamma, offset + r);
            let fit = fit_fixed_index(&d, CommonModel::Curn, &settings).unwrap();
            let ul = fit.posterior.summary().upper_limit_95;
            assert!(ul.is_finite() && ul <= settings.log10_amplitude_max);
            // Noise only: the true amplitude is 0 (log10 = -inf).
            if truth.is_none_or(|t| ul >= t) {
                above += 1;
            }
        }
        let f = above as f64 / trials as f64;
        // At least 95% within 3 binomial standard errors.
        assert!(
            f >= 0.95 - 3.0 * binomial_sigma(0.95, trials as usize),
            "{truth:?}: {f}"
        );
    }
}

#[test]
#[ignore]
fn upper_limits_hold_the_truth_at_their_credibility_when_the_truth_follows_the_prior() {
    // With no signal every finite upper limit lies above the true (zero) amplitude, so the
    // check above can only fail on a non-finite or out-of-range limit. The calibrated form
    // (Cook, Gelman & Rubin 2006): draw the true A from the prior the fit uses (uniform in A
    // over the range); then the 95% upper limit holds it in exactly 95% of realizations, neither
    // more nor less. A wrong normalisation of the uniform-in-A prior or of the amplitude axis
    // moves this fraction. The range is one where the data of these 10 pulsars are weakly
    // informative, so the prior matters: fitting with the uniform-in-log10 prior instead gives
    // 0.895 here (measured), which this check rejects; the right prior gave 0.9525.
    let s = Sampler::new(10, 11);
    let settings = CommonSettings {
        n_frequencies: K,
        log10_amplitude_min: -17.0,
        log10_amplitude_max: -14.5,
        amplitude_prior: AmplitudePrior::UniformAmplitude,
        ..Default::default()
    };
    let gamma = 13.0 / 3.0;
    let trials = 400;
    let (lo, hi) = (
        10f64.powf(settings.log10_amplitude_min),
        10f64.powf(settings.log10_amplitude_max),
    );
    let mut held = 0;
    for r in 0..trials {
        let mut u = stream(77, Purpose::Injection, r as u64);
        let truth = (lo + (hi - lo) * u.random::<f64>()).log10();
        let d = s.draw(CommonModel::Curn, Some(truth), gamma, 400_000 + r as u64);
        let fit = fit_fixed_index(&d, CommonModel::Curn, &settings).unwrap();
        held += (fit.posterior.summary().upper_limit_95 >= truth) as usize;
    }
    let f = held as f64 / trials as f64;
    // Two-sided, 3 binomial standard errors (0.033 at 400 trials).
    assert!(
        (f - 0.95).abs() < 3.0 * binomial_sigma(0.95, trials),
        "95% upper limit held the truth in {f} of {trials}"
    );
}
