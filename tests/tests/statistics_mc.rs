//! Monte Carlo checks of the optimal statistic's calibration on simulated arrays. The claims are
//! textbook properties of the estimator (Anholm et al. 2009; Chamberlin et al. 2015): with the
//! noise model right and no signal, SNR has mean 0 and unit variance; with a signal, the
//! amplitude estimate is unbiased.

use ptacorr::analysis::{correlate, CommonAutoPower, CorrelateSettings};
use ptacorr::orf::Pattern;
use ptacorr::release::read_release;
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::simulate::simulate_scenario;
use ptacorr_checks::{small_scenario, temp_dir};
use std::path::Path;

/// Recovered (amplitude2, snr) over `n` simulated arrays of one scenario.
fn campaign(scenario: &str, n: u64, settings: &CorrelateSettings, name: &str) -> Vec<(f64, f64)> {
    let s = Scenario::parse(scenario, Path::new("mc.toml")).unwrap();
    let dir = temp_dir(name);
    let out = (0..n)
        .map(|seed| {
            let layout = lay_out(&s, 1000 + seed);
            simulate_scenario(&layout, 1000 + seed, &dir).unwrap();
            let rel = read_release(&dir).unwrap();
            let e = correlate(&rel, settings).unwrap().estimates[&Pattern::Hd];
            (e.amplitude2, e.snr)
        })
        .collect();
    std::fs::remove_dir_all(&dir).ok();
    out
}

fn mean_sd(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0);
    (m, var.sqrt())
}

/// Standard error of the sample standard deviation from the sample itself, by the delta method:
/// Var(s^2) ~ (m4 - s^4) / n, so se(s) ~ sqrt(m4 - s^4) / (2 s sqrt(n)) (Kendall & Stuart,
/// *The Advanced Theory of Statistics*, vol. 1, ch. 10, recalled from memory). It does not assume
/// a Gaussian SNR, whose null distribution has heavier tails (a generalised chi-square).
fn sd_standard_error(v: &[f64]) -> f64 {
    let n = v.len() as f64;
    let (m, s) = mean_sd(v);
    let m4 = v.iter().map(|x| (x - m).powi(4)).sum::<f64>() / n;
    (m4 - s.powi(4)).max(0.0).sqrt() / (2.0 * s * n.sqrt())
}

/// Allowed deviation of a Monte Carlo estimate, in its standard errors. This file makes three
/// such two-sided checks; at 3.5 standard errors each fails with probability 4.7e-4 for a
/// correct engine (normal tail, Abramowitz & Stegun 26.2.17), so the file's false-failure rate
/// over the choice of seeds is below 1.4e-3.
const Z_ALLOWED: f64 = 3.5;

#[test]
fn noise_only_snr_has_zero_mean_and_unit_variance() {
    // 300 white-noise-only arrays of 8 pulsars; the model is exactly right.
    let n = 300;
    let scen = small_scenario(8, 5.0, 30.0, None);
    let settings = CorrelateSettings {
        common: CommonAutoPower::Off,
        ..Default::default()
    };
    let snr: Vec<f64> = campaign(&scen, n, &settings, "mc-null")
        .into_iter()
        .map(|r| r.1)
        .collect();
    let (m, sd) = mean_sd(&snr);
    // Standard errors from the sample: mean sd/sqrt(n) (about 0.058), sd by the delta method.
    let se_mean = sd / (n as f64).sqrt();
    let se_sd = sd_standard_error(&snr);
    assert!(m.abs() < Z_ALLOWED * se_mean, "mean SNR {m}, se {se_mean}");
    assert!(
        (sd - 1.0).abs() < Z_ALLOWED * se_sd,
        "sd of SNR {sd}, se {se_sd}"
    );
}

#[test]
fn injected_amplitude_is_recovered_without_bias() {
    // A background of A = 10^-13.8 simulated on the analysis ladder, analysed with the common
    // auto-power at the true level.
    let n = 200;
    let log10_a = -13.8;
    let scen = small_scenario(8, 5.0, 30.0, Some(log10_a));
    let settings = CorrelateSettings::default();
    let a2: Vec<f64> = campaign(&scen, n, &settings, "mc-signal")
        .into_iter()
        .map(|r| r.0)
        .collect();
    let (m, sd) = mean_sd(&a2);
    let truth = 10f64.powf(2.0 * log10_a);
    let se = sd / (n as f64).sqrt();
    assert!(
        (m - truth).abs() < Z_ALLOWED * se,
        "mean A^2 {m:e}, injected {truth:e}, standard error {se:e}"
    );
    // And the signal is really there (a check of the set-up, not a tolerance): the mean is
    // many standard errors from zero.
    assert!(m > 5.0 * se);
}
