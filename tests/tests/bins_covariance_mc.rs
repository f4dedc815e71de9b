//! Monte Carlo check of the covariance of the binned correlations (engine/src/bin_covariance.rs)
//! on a simulated array with a strong signal: the reduced data of a simulated 30-pulsar release
//! are redrawn many times from their signal-present covariance C~ = C0 + A^2 C1 (Allen & Romano
//! 2023, the reduced-space form of docs/pair-covariance.md), every draw is analysed like
//! `correlate` (pairs, bins), and the bin residuals rho_B - A^2 hd_B are normalised by the full
//! covariance and by the independent-pair error bars. With the right covariance the normalised
//! residuals have unit variance and the whitened chi-square has mean n_bins; the independent
//! error bars under-cover. Run with `--ignored --nocapture` to see the numbers.

use ndarray::{Array1, Array2};
use ptacorr::analysis::{correlate, CommonAutoPower, CorrelateSettings};
use ptacorr::bin_covariance::bin_covariance;
use ptacorr::bins::{bin_groups, bin_pairs};
use ptacorr::optimal::{frobenius, weight, Weighted};
use ptacorr::orf::{pattern_matrix, Pattern};
use ptacorr::paircov::joint_covariance;
use ptacorr::rng::{stream, Purpose};
use ptacorr_checks::{simulate_release, small_scenario, temp_dir};
use rand::Rng;
use rand_distr::StandardNormal;

/// Allowed deviation in standard errors estimated from the sample (Var(s^2) ~ (m4 - s^4)/n,
/// Kendall & Stuart vol. 1 ch. 10, from memory). 4.4 standard errors: a two-sided normal tail of
/// 1e-5 per check, below 2e-4 for the checks of this file (common practice).
const Z_ALLOWED: f64 = 4.4;

#[test]
#[ignore]
fn full_covariance_normalises_the_bin_residuals() {
    let dir = temp_dir("bins-cov-mc");
    let rel = simulate_release(&small_scenario(30, 10.0, 30.0, None), &dir, 4242);
    let settings = CorrelateSettings {
        common: CommonAutoPower::Off,
        ..Default::default()
    };
    let c = correlate(&rel, &settings).unwrap();
    std::fs::remove_dir_all(&dir).ok();
    let n = c.reduced.len();
    let m = 2 * c.grid.k();
    let w: Vec<Weighted> = c.reduced.iter().map(|r| weight(r, &c.phi)).collect();
    let z: Vec<Array2<f64>> = w.iter().map(|x| x.z.clone()).collect();
    let dirs: Vec<_> = c.reduced.iter().map(|r| r.direction).collect();
    let g = Array2::from_shape_vec((n, n), pattern_matrix(Pattern::Hd, &dirs)).unwrap();
    // A strong signal: A^2 at 30 no-signal standard deviations of the HD amplitude.
    let a2 = 30.0 * c.estimates[&Pattern::Hd].amplitude2_sigma;
    let dc = vec![0.0; m];
    let cov = joint_covariance(&z, &g, &dc, a2).unwrap();
    let l = ptacorr::linalg::cholesky_lower(&cov, "joint covariance").unwrap();
    let groups: Vec<Vec<usize>> = bin_groups(&c.pairs, settings.n_bins, settings.binning)
        .into_iter()
        .map(|g| g.2)
        .collect();
    let nb = groups.len();
    let bc = bin_covariance(&w, &g, &dc, a2, &groups).unwrap();
    let full_sigma = bc.sigma();
    let cmat = Array2::from_shape_fn((nb, nb), |(i, j)| bc.covariance[i][j]);
    let cl = ptacorr::linalg::cholesky_lower(&cmat, "bin covariance").unwrap();
    let traces: Vec<f64> = (0..n)
        .flat_map(|a| (a + 1..n).map(move |b| (a, b)))
        .map(|(a, b)| frobenius(&z[a], &z[b]))
        .collect();

    let draws = 20_000;
    let mut pairs = c.pairs.clone();
    let mut res_full = vec![Vec::with_capacity(draws); nb];
    let mut res_ind = vec![Vec::with_capacity(draws); nb];
    let mut chi2 = Vec::with_capacity(draws);
    let mut rng = stream(77, Purpose::Injection, 0);
    for _ in 0..draws {
        let e: Array1<f64> = (0..n * m)
            .map(|_| rng.sample::<f64, _>(StandardNormal))
            .collect();
        let x = l.dot(&e);
        let mut k = 0;
        for a in 0..n {
            for b in a + 1..n {
                let num = x
                    .slice(ndarray::s![a * m..(a + 1) * m])
                    .dot(&x.slice(ndarray::s![b * m..(b + 1) * m]));
                pairs.rho[k] = num / traces[k];
                k += 1;
            }
        }
        let bins = bin_pairs(&pairs, settings.n_bins, settings.binning);
        let r: Vec<f64> = bins.iter().map(|b| b.rho - a2 * b.hd).collect();
        for i in 0..nb {
            res_full[i].push(r[i] / full_sigma[i]);
            res_ind[i].push(r[i] / bins[i].sigma);
        }
        // whitened chi-square r^T C^-1 r by forward substitution
        let mut y = vec![0.0; nb];
        for i in 0..nb {
            let mut s = r[i];
            for j in 0..i {
                s -= cl[[i, j]] * y[j];
            }
            y[i] = s / cl[[i, i]];
        }
        chi2.push(y.iter().map(|v| v * v).sum::<f64>());
    }

    let stats = |v: &[f64]| {
        let n = v.len() as f64;
        let mean = v.iter().sum::<f64>() / n;
        let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
        let m4 = v.iter().map(|x| (x - mean).powi(4)).sum::<f64>() / n;
        (mean, var, ((m4 - var * var).max(0.0) / n).sqrt())
    };
    let cover = |v: &[f64]| v.iter().filter(|x| x.abs() <= 1.0).count() as f64 / v.len() as f64;
    let (mut vf_all, mut vi_all, mut cf_all, mut ci_all) = (0.0, 0.0, 0.0, 0.0);
    for i in 0..nb {
        let (_, vf, se) = stats(&res_full[i]);
        let (_, vi, _) = stats(&res_ind[i]);
        let (cf, ci) = (cover(&res_full[i]), cover(&res_ind[i]));
        eprintln!(
            "bin {}: var(r/sigma_full) = {vf:.3} (se {se:.3}), var(r/sigma_indep) = {vi:.3}, |r| <= 1 sigma: full {cf:.3}, indep {ci:.3}",
            i + 1
        );
        assert!((vf - 1.0).abs() < Z_ALLOWED * se, "bin {}: {vf}", i + 1);
        vf_all += vf / nb as f64;
        vi_all += vi / nb as f64;
        cf_all += cf / nb as f64;
        ci_all += ci / nb as f64;
    }
    let (mchi, _, _) = stats(&chi2);
    let (_, vchi, _) = stats(&chi2);
    let se_chi = (vchi / draws as f64).sqrt();
    eprintln!(
        "mean over bins: var(r/sigma_full) = {vf_all:.3}, var(r/sigma_indep) = {vi_all:.3}; 1-sigma coverage full {cf_all:.3}, independent {ci_all:.3} (Gaussian 0.683); mean chi-square {mchi:.2} for {nb} bins"
    );
    assert!(
        (mchi - nb as f64).abs() < Z_ALLOWED * se_chi,
        "chi2 mean {mchi}"
    );
    // The independent-pair error bars under-cover: their normalised residuals are wider than
    // unit variance and cover clearly less than the full error bars.
    assert!(vi_all > 1.5, "independent variance {vi_all}");
    assert!(ci_all < cf_all - 0.1, "coverage {ci_all} vs {cf_all}");
}
