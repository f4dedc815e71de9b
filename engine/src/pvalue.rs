//! Significance from trials: empirical p-values from Monte Carlo (or
//! sky-scramble / phase-shift) trials, their exact binomial confidence
//! interval, and the equivalent one-sided Gaussian significance.
//!
//! Equation and section numbers of the cited sources are given from memory.

use statrs::function::beta::checked_beta_reg;
use statrs::function::erf::erfc_inv;
use thiserror::Error;

/// Errors of the significance routines.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum PValueError {
    /// More extreme trials than trials.
    #[error("{extreme} extreme trials out of only {trials} trials")]
    ExtremeExceedsTrials { extreme: u64, trials: u64 },
    /// Confidence level outside the open interval (0, 1), or NaN.
    #[error("confidence level {0} is not in (0, 1)")]
    InvalidConfidence(f64),
    /// Probability outside [0, 1], or NaN.
    #[error("probability {0} is not in [0, 1]")]
    InvalidProbability(f64),
}

/// Empirical p-value `(k + 1) / (N + 1)` from `k = n_extreme` of
/// `N = n_trials` null trials at least as extreme as the observation.
///
/// The `+1` counts the observation itself among the exchangeable draws
/// (Davison & Hinkley 1997, *Bootstrap Methods and their Application*, §4.2.1;
/// North, Curtis & Sham 2002, Am. J. Hum. Genet. 71, 439): under the null the
/// estimate is then exactly uniform on `{1, …, N+1}/(N+1)`, hence a valid
/// p-value, and never 0.  `N = 0` gives `1`.
pub fn trial_p_value(n_extreme: u64, n_trials: u64) -> Result<f64, PValueError> {
    if n_extreme > n_trials {
        return Err(PValueError::ExtremeExceedsTrials {
            extreme: n_extreme,
            trials: n_trials,
        });
    }
    // u64 → f64 is exact below 2^53; above, the ratio is still correct to 1 ulp.
    Ok((n_extreme as f64 + 1.0) / (n_trials as f64 + 1.0))
}

/// Exact (Clopper & Pearson 1934, Biometrika 26, 404) two-sided interval
/// `(p_lo, p_hi)` for a binomial proportion, `k` successes in `n` trials, at
/// the given `confidence` (e.g. `0.95`), with `α = 1 − confidence`:
///
/// ```text
/// P(X ≥ k | n, p_lo) = α/2,   P(X ≤ k | n, p_hi) = α/2,
/// p_lo = 0 if k = 0,          p_hi = 1 if k = n.
/// ```
///
/// Through the binomial–beta identity `P(X ≥ k | n, p) = I_p(k, n − k + 1)`
/// (Abramowitz & Stegun 1964, eq. 26.5.24) the endpoints are quantiles of beta
/// distributions, `p_lo = I⁻¹_{α/2}(k, n−k+1)` and
/// `p_hi = 1 − I⁻¹_{α/2}(n−k, k+1)`.  The regularised incomplete beta `I` is
/// statrs' `beta_reg`; it is inverted by bisection on `logit p`, which resolves
/// endpoints near 0 and near 1 to full relative precision.  Accuracy is that
/// of `beta_reg`: ~1e-13 relative for `n ≲ 10^3`, ~1e-9 at `n ~ 10^6`
/// (measured against direct binomial sums).  `n = 0` (then `k = 0`) gives
/// `(0, 1)`.
pub fn clopper_pearson(k: u64, n: u64, confidence: f64) -> Result<(f64, f64), PValueError> {
    if k > n {
        return Err(PValueError::ExtremeExceedsTrials {
            extreme: k,
            trials: n,
        });
    }
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(PValueError::InvalidConfidence(confidence));
    }
    let half_alpha = 0.5 * (1.0 - confidence);
    let (kf, nf) = (k as f64, n as f64);
    let lower = if k == 0 {
        0.0
    } else {
        inverse_regularized_beta(kf, nf - kf + 1.0, half_alpha)
    };
    let upper = if k == n {
        1.0
    } else {
        1.0 - inverse_regularized_beta(nf - kf, kf + 1.0, half_alpha)
    };
    Ok((lower, upper))
}

/// The `p ∈ (0, 1)` with `I_p(a, b) = target`, for `a, b > 0`,
/// `0 < target < 1`; bisection on `y = ln(p/(1−p))` (`I_p` increases in `p`).
fn inverse_regularized_beta(a: f64, b: f64, target: f64) -> f64 {
    let logistic = |y: f64| 1.0 / (1.0 + (-y).exp());
    let (mut lo, mut hi) = (-745.0_f64, 745.0_f64);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        // Inputs are validated (a, b > 0, p ∈ [0, 1]), so beta_reg cannot fail;
        // an error would only mean p rounded outside [0, 1]: treat as the end.
        let value =
            checked_beta_reg(a, b, logistic(mid)).unwrap_or(if mid > 0.0 { 1.0 } else { 0.0 });
        if value < target {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    logistic(0.5 * (lo + hi))
}

/// One-sided Gaussian-equivalent significance: the `z` with `P(Z > z) = p`
/// for a standard normal `Z`,
///
/// ```text
/// z = √2 · erfc⁻¹(2p)      (P(Z > z) = ½ erfc(z/√2), Abramowitz & Stegun 1964, eq. 7.1.2 / 26.2.29),
/// ```
///
/// using statrs' `erfc_inv`, which works with `2p` directly (no `1 − p`), so
/// `z` keeps full relative precision for `p` down to the smallest subnormal
/// (`p = 1e-300` gives `z ≈ 37.04`).  `p = 0` gives `+∞`, `p = 1` gives `−∞`,
/// `p > 1/2` gives negative `z`.
pub fn gaussian_equivalent_sigma(p_one_sided: f64) -> Result<f64, PValueError> {
    if !(0.0..=1.0).contains(&p_one_sided) {
        return Err(PValueError::InvalidProbability(p_one_sided));
    }
    if p_one_sided == 0.0 {
        return Ok(f64::INFINITY);
    }
    if p_one_sided == 1.0 {
        return Ok(f64::NEG_INFINITY);
    }
    Ok(std::f64::consts::SQRT_2 * erfc_inv(2.0 * p_one_sided))
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::rngs::StdRng;
    use rand::{Rng, SeedableRng};
    use statrs::distribution::{Binomial, DiscreteCDF};

    fn rel(a: f64, b: f64) -> f64 {
        if a == b {
            0.0
        } else {
            (a - b).abs() / b.abs()
        }
    }

    /// Normal upper tail by Laplace's continued fraction
    /// `Q(z) = φ(z) / (z + 1/(z + 2/(z + 3/(z + …))))`, `z > 0`
    /// (Abramowitz & Stegun 1964, eq. 26.2.14), evaluated backwards; an
    /// independent reference for large `z`.
    fn normal_tail_continued_fraction(z: f64) -> f64 {
        let mut t = z;
        for k in (1..4000).rev() {
            t = z + f64::from(k) / t;
        }
        (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt() / t
    }

    /// Binomial pmf `C(n,j) p^j (1−p)^{n−j}` with `ln C(n,j) = Σ_{i<j} ln((n−i)/(i+1))`
    /// (accurate for small `j`; independent of the incomplete beta function).
    fn binomial_pmf(j: u64, n: u64, p: f64) -> f64 {
        let ln_choose: f64 = (0..j).map(|i| ((n - i) as f64 / (i + 1) as f64).ln()).sum();
        (ln_choose + j as f64 * p.ln() + (n - j) as f64 * (-p).ln_1p()).exp()
    }

    /// `P(X ≤ k | n, p)` by direct summation.
    fn binomial_cdf_by_summation(k: u64, n: u64, p: f64) -> f64 {
        (0..=k).map(|j| binomial_pmf(j, n, p)).sum()
    }

    /// `P(X ≥ k | n, p)` by direct summation of the upper terms (no `1 − cdf`),
    /// for `n p` small enough that terms beyond `k + 2000` are negligible.
    fn binomial_sf_by_summation(k: u64, n: u64, p: f64) -> f64 {
        (k..=n.min(k + 2000)).map(|j| binomial_pmf(j, n, p)).sum()
    }

    #[test]
    fn trial_p_value_uses_plus_one_convention() {
        assert_eq!(trial_p_value(0, 999).unwrap(), 0.001);
        assert_eq!(trial_p_value(49, 999).unwrap(), 0.05);
        assert_eq!(trial_p_value(999, 999).unwrap(), 1.0);
        assert_eq!(trial_p_value(0, 0).unwrap(), 1.0);
        assert_eq!(
            trial_p_value(5, 4),
            Err(PValueError::ExtremeExceedsTrials {
                extreme: 5,
                trials: 4
            })
        );
    }

    #[test]
    fn trial_p_value_is_exactly_uniform_under_exchangeability() {
        // Davison & Hinkley (1997, §4.2.1): with the observation and N null
        // trials exchangeable, P(p̂ ≤ j/(N+1)) = j/(N+1).  Seeded check with
        // N = 19, j = 1 and 2, 2·10^5 replications, within 4 standard errors.
        let mut rng = StdRng::seed_from_u64(4);
        let (n_trials, reps) = (19u64, 200_000usize);
        let mut at_most = [0usize; 2];
        for _ in 0..reps {
            let observed: f64 = rng.random();
            let extreme = (0..n_trials)
                .filter(|_| rng.random::<f64>() >= observed)
                .count() as u64;
            let p = trial_p_value(extreme, n_trials).unwrap();
            for (j, count) in at_most.iter_mut().enumerate() {
                if p <= (j as f64 + 1.0) / 20.0 + 1e-12 {
                    *count += 1;
                }
            }
        }
        for (j, &count) in at_most.iter().enumerate() {
            let expected = (j as f64 + 1.0) / 20.0;
            let freq = count as f64 / reps as f64;
            let se = (expected * (1.0 - expected) / reps as f64).sqrt();
            assert!(
                (freq - expected).abs() < 4.0 * se,
                "j={j}: {freq} vs {expected}"
            );
        }
    }

    #[test]
    fn clopper_pearson_endpoints_solve_binomial_tail_equations() {
        // P(X ≥ k | p_lo) = α/2 and P(X ≤ k | p_hi) = α/2, reference statrs
        // Binomial (sf(k−1) = P(X ≥ k)).
        for &(k, n) in &[
            (1u64, 10u64),
            (3, 10),
            (7, 10),
            (0, 50),
            (50, 50),
            (12, 400),
            (999, 1000),
            (10, 1_000_000),
        ] {
            for &confidence in &[0.6827, 0.9, 0.95, 0.9973] {
                let half_alpha = 0.5 * (1.0 - confidence);
                let (lo, hi) = clopper_pearson(k, n, confidence).unwrap();
                assert!(0.0 <= lo && lo < hi && hi <= 1.0);
                if k > 0 {
                    let tail = Binomial::new(lo, n).unwrap().sf(k - 1);
                    assert!(
                        rel(tail, half_alpha) < 1e-8,
                        "k={k} n={n}: P(X≥k|p_lo) = {tail}"
                    );
                } else {
                    assert_eq!(lo, 0.0);
                }
                if k < n {
                    let tail = Binomial::new(hi, n).unwrap().cdf(k);
                    assert!(
                        rel(tail, half_alpha) < 1e-8,
                        "k={k} n={n}: P(X≤k|p_hi) = {tail}"
                    );
                } else {
                    assert_eq!(hi, 1.0);
                }
            }
        }
    }

    #[test]
    fn clopper_pearson_closed_forms_at_the_edges() {
        // k = 0: (1 − p_hi)^n = α/2 ⇒ p_hi = 1 − (α/2)^{1/n};
        // k = n: p_lo^n = α/2 ⇒ p_lo = (α/2)^{1/n} (Clopper & Pearson 1934).
        // Tolerance follows statrs' beta_reg: 1e-12 for n ≤ 1000, 1e-9 above.
        for &n in &[1u64, 5, 20, 1000, 100_000] {
            let tol = if n <= 1000 { 1e-12 } else { 1e-9 };
            let (lo0, hi0) = clopper_pearson(0, n, 0.95).unwrap();
            assert_eq!(lo0, 0.0);
            let exact_hi = -(0.025f64.ln() / n as f64).exp_m1();
            assert!(rel(hi0, exact_hi) < tol, "n={n}: {hi0} vs {exact_hi}");
            let (lon, hin) = clopper_pearson(n, n, 0.95).unwrap();
            assert_eq!(hin, 1.0);
            let exact_lo = (0.025f64.ln() / n as f64).exp();
            assert!(rel(lon, exact_lo) < tol, "n={n}: {lon} vs {exact_lo}");
        }
        // n = 20, k = 0: p_hi = 0.16843 (the familiar "rule of three" gives 3/n = 0.15
        // for the one-sided 95 % bound; from memory).
        assert!((clopper_pearson(0, 20, 0.95).unwrap().1 - 0.168_43).abs() < 1e-5);
        assert_eq!(clopper_pearson(0, 0, 0.95).unwrap(), (0.0, 1.0));
    }

    #[test]
    fn clopper_pearson_worked_example() {
        // 3 successes in 10 trials, 95 %: (0.0667, 0.6525) (from memory; widely
        // tabulated).  Recomputed independently here by bisection on the exact
        // binomial sums.
        let (lo, hi) = clopper_pearson(3, 10, 0.95).unwrap();
        let bisect = |f: &dyn Fn(f64) -> f64| {
            // f increasing in p, find f(p) = 0
            let (mut a, mut b) = (0.0_f64, 1.0_f64);
            for _ in 0..100 {
                let m = 0.5 * (a + b);
                if f(m) < 0.0 {
                    a = m;
                } else {
                    b = m;
                }
            }
            0.5 * (a + b)
        };
        let lo_ref = bisect(&|p| binomial_sf_by_summation(3, 10, p) - 0.025);
        let hi_ref = bisect(&|p| 0.025 - binomial_cdf_by_summation(3, 10, p));
        assert!(rel(lo, lo_ref) < 1e-12, "{lo} vs {lo_ref}");
        assert!(rel(hi, hi_ref) < 1e-12, "{hi} vs {hi_ref}");
        assert!((lo - 0.0667).abs() < 5e-5 && (hi - 0.6525).abs() < 5e-5);
        // Large n, few exceedances (typical trial counts): exact summation.
        let (lo, hi) = clopper_pearson(10, 1_000_000, 0.95).unwrap();
        assert!(rel(binomial_sf_by_summation(10, 1_000_000, lo), 0.025) < 1e-8);
        assert!(rel(binomial_cdf_by_summation(10, 1_000_000, hi), 0.025) < 1e-8);
    }

    #[test]
    fn clopper_pearson_rejects_bad_input() {
        assert!(matches!(
            clopper_pearson(4, 3, 0.95),
            Err(PValueError::ExtremeExceedsTrials { .. })
        ));
        for c in [0.0, 1.0, -0.5, 1.5, f64::NAN] {
            assert!(matches!(
                clopper_pearson(1, 3, c),
                Err(PValueError::InvalidConfidence(_))
            ));
        }
    }

    #[test]
    fn gaussian_sigma_matches_handbook_tail_values() {
        // One-sided normal tails P(Z > z), Abramowitz & Stegun (1964) Table 26.1
        // (values from memory, 7 significant figures).
        for &(z, p) in &[
            (1.0, 0.158_655_3),
            (2.0, 2.275_013e-2),
            (3.0, 1.349_898e-3),
            (5.0, 2.866_516e-7),
        ] {
            let s = gaussian_equivalent_sigma(p).unwrap();
            // dz = dp / (p · Mills ratio⁻¹) ~ 1e-7 relative in p ⇒ < 2e-7 in z.
            assert!((s - z).abs() < 2e-7 * z, "p={p}: {s} vs {z}");
        }
        assert_eq!(gaussian_equivalent_sigma(0.5).unwrap(), 0.0);
        let s = gaussian_equivalent_sigma(0.9).unwrap();
        assert!((s + gaussian_equivalent_sigma(0.1).unwrap()).abs() < 1e-15);
    }

    #[test]
    fn gaussian_sigma_keeps_precision_for_tiny_p() {
        // Against Laplace's continued fraction (A&S 26.2.14) from z = 5 to the
        // bottom of the normal range (p = 1e-300 and below).
        for &z in &[5.0, 8.0, 12.0, 20.0, 30.0, 37.0, 37.5] {
            let p = normal_tail_continued_fraction(z);
            let s = gaussian_equivalent_sigma(p).unwrap();
            assert!(rel(s, z) < 1e-14, "z={z}: {s}");
        }
        let s = gaussian_equivalent_sigma(1e-300).unwrap();
        assert!(
            rel(normal_tail_continued_fraction(s), 1e-300) < 1e-12,
            "p=1e-300: z={s}"
        );
        // Independent of the continued fraction: Gordon's (1941, Ann. Math. Stat. 12, 364;
        // recalled from memory) bounds phi(z) z / (1 + z^2) < Q(z) < phi(z) / z must bracket
        // p = 1e-300 at the returned z (their gap, 1/z^2 ~ 7e-4 relative, pins z to ~2e-5).
        let pdf = (-0.5 * s * s).exp() / (2.0 * std::f64::consts::PI).sqrt();
        assert!(
            pdf * s / (1.0 + s * s) < 1e-300 && 1e-300 < pdf / s,
            "z={s}"
        );
        assert!(gaussian_equivalent_sigma(f64::from_bits(1))
            .unwrap()
            .is_finite());
    }

    #[test]
    fn gaussian_sigma_edges_and_bad_input() {
        assert_eq!(gaussian_equivalent_sigma(0.0).unwrap(), f64::INFINITY);
        assert_eq!(gaussian_equivalent_sigma(1.0).unwrap(), f64::NEG_INFINITY);
        for p in [-1e-9, 1.0 + 1e-9, f64::NAN] {
            assert!(matches!(
                gaussian_equivalent_sigma(p),
                Err(PValueError::InvalidProbability(_))
            ));
        }
    }
}
