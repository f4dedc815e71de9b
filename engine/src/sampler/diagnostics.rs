//! Convergence diagnostics of several Markov chains for one scalar quantity: split R-hat and
//! bulk and tail effective sample sizes, all after Vehtari, Gelman, Simpson, Carpenter &
//! Bürkner (2021), "Rank-normalization, folding, and localization: an improved R-hat for
//! assessing convergence of MCMC", Bayesian Analysis 16, 667 (called V21 below).
//!
//! - Split chains (V21 sec. 3.1): each chain is cut into its first and second half, so a chain
//!   that drifts looks like two chains that disagree.
//! - Rank normalisation (V21 eq. 14): the pooled draws are replaced by their average ranks r,
//!   then by z = Phi^-1((r - 3/8) / (S + 1/4)) (Blom's offsets), S the number of draws.
//! - R-hat (V21 eqs. 3-4, the classic potential scale reduction of Gelman & Rubin 1992 on split
//!   chains): with M chains of N draws, W the mean within-chain variance and B / N the variance
//!   of the chain means, var+ = (N - 1) / N W + B / N and R-hat = sqrt(var+ / W). The reported
//!   value is max(R-hat of z, R-hat of the folded z of |x - median|) (V21 sec. 4.2).
//! - Effective sample size (V21 eqs. 10-12, after Geyer 1992, Statistical Science 7, 473):
//!   rho_t = 1 - (W - mean_m acov_m(t)) / var+, summed by Geyer's initial positive sequence of
//!   pair sums rho_2k + rho_2k+1 made monotone; tau = -1 + 2 sum of the pairs; ESS = M N / tau.
//!   Bulk ESS is the ESS of the rank-normalised split chains; tail ESS is the smaller ESS of the
//!   indicators I(x <= q_0.05) and I(x <= q_0.95) (V21 sec. 4.3).
//!
//! The lower bound tau >= 1 / log10(M N) (so ESS <= M N log10(M N) for antithetic chains)
//! follows common practice in Stan's implementation (from memory).

use statrs::function::erf::erfc_inv;

/// Vehtari et al. (2021) recommend R-hat below 1.01 before using the draws.
pub const RHAT_MAX: f64 = 1.01;
/// Vehtari et al. (2021) recommend bulk and tail ESS of at least 100 per chain; with the default
/// four chains that is 400.
pub const ESS_MIN: f64 = 400.0;

/// The diagnostics and summary of one quantity over all chains.
#[derive(Clone, Debug, PartialEq)]
pub struct Summary {
    pub mean: f64,
    pub sd: f64,
    pub q05: f64,
    pub q16: f64,
    pub median: f64,
    pub q84: f64,
    pub q95: f64,
    /// max of the rank-normalised bulk and folded split R-hat.
    pub rhat: f64,
    pub ess_bulk: f64,
    pub ess_tail: f64,
}

impl Summary {
    /// R-hat below `rhat_max` and both ESS at least `ess_min` (NaN counts as failing).
    pub fn converged(&self, rhat_max: f64, ess_min: f64) -> bool {
        self.rhat < rhat_max && self.ess_bulk >= ess_min && self.ess_tail >= ess_min
    }
}

/// Summary of one quantity given as one slice of draws per chain (equal lengths, >= 4 each).
pub fn summarise(chains: &[&[f64]]) -> Summary {
    let pooled: Vec<f64> = chains.iter().flat_map(|c| c.iter().copied()).collect();
    let n = pooled.len() as f64;
    let mean = pooled.iter().sum::<f64>() / n;
    let sd = (pooled.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let mut sorted = pooled.clone();
    sorted.sort_by(f64::total_cmp);
    Summary {
        mean,
        sd,
        q05: quantile_sorted(&sorted, 0.05),
        q16: quantile_sorted(&sorted, 0.16),
        median: quantile_sorted(&sorted, 0.5),
        q84: quantile_sorted(&sorted, 0.84),
        q95: quantile_sorted(&sorted, 0.95),
        rhat: rhat(chains),
        ess_bulk: ess_bulk(chains),
        ess_tail: ess_tail(chains),
    }
}

/// The q-quantile of sorted values by linear interpolation between order statistics
/// (Hyndman & Fan 1996, Am. Stat. 50, 361, definition 7).
pub fn quantile_sorted(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let h = (sorted.len() - 1) as f64 * q;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

/// Each chain cut into halves (the middle draw of an odd-length chain is dropped).
pub fn split(chains: &[&[f64]]) -> Vec<Vec<f64>> {
    let mut out = Vec::with_capacity(2 * chains.len());
    for c in chains {
        let h = c.len() / 2;
        out.push(c[..h].to_vec());
        out.push(c[c.len() - h..].to_vec());
    }
    out
}

/// Rank normalisation (V21 eq. 14) of the pooled draws, keeping the chain structure; ties get
/// their average rank.
pub fn rank_normalise(chains: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let pooled: Vec<f64> = chains.iter().flat_map(|c| c.iter().copied()).collect();
    let s = pooled.len();
    let mut order: Vec<usize> = (0..s).collect();
    order.sort_by(|&a, &b| pooled[a].total_cmp(&pooled[b]));
    let mut rank = vec![0.0; s];
    let mut i = 0;
    while i < s {
        let mut j = i;
        while j + 1 < s && pooled[order[j + 1]] == pooled[order[i]] {
            j += 1;
        }
        // Ranks are 1-based; positions i..=j share the average rank.
        let r = 0.5 * ((i + 1) + (j + 1)) as f64;
        for &k in &order[i..=j] {
            rank[k] = r;
        }
        i = j + 1;
    }
    let mut out = Vec::with_capacity(chains.len());
    let mut k = 0;
    for c in chains {
        let mut z = Vec::with_capacity(c.len());
        for _ in c {
            let p = (rank[k] - 0.375) / (s as f64 + 0.25);
            z.push(inverse_normal_cdf(p));
            k += 1;
        }
        out.push(z);
    }
    out
}

/// Phi^-1(p) = -sqrt(2) erfc^-1(2 p) (Abramowitz & Stegun 1964, 26.2.2 with 7.1.2).
fn inverse_normal_cdf(p: f64) -> f64 {
    -std::f64::consts::SQRT_2 * erfc_inv(2.0 * p)
}

/// Chain means and the mean within-chain variance W and var+ (V21 eqs. 3-4).
fn variances(chains: &[Vec<f64>]) -> Option<(Vec<f64>, f64, f64)> {
    let m = chains.len();
    let n = chains.iter().map(Vec::len).min()?;
    if m < 2 || n < 2 {
        return None;
    }
    let nf = n as f64;
    let means: Vec<f64> = chains
        .iter()
        .map(|c| c[..n].iter().sum::<f64>() / nf)
        .collect();
    let grand = means.iter().sum::<f64>() / m as f64;
    let b_over_n = means.iter().map(|x| (x - grand).powi(2)).sum::<f64>() / (m - 1) as f64;
    let w = chains
        .iter()
        .zip(&means)
        .map(|(c, mu)| c[..n].iter().map(|x| (x - mu).powi(2)).sum::<f64>() / (nf - 1.0))
        .sum::<f64>()
        / m as f64;
    let var_plus = (nf - 1.0) / nf * w + b_over_n;
    Some((means, w, var_plus))
}

/// The classic potential scale reduction sqrt(var+ / W) of the given chains (no splitting);
/// NaN when W is zero or there are fewer than two chains of two draws.
pub fn potential_scale_reduction(chains: &[Vec<f64>]) -> f64 {
    match variances(chains) {
        Some((_, w, var_plus)) if w > 0.0 => (var_plus / w).sqrt(),
        _ => f64::NAN,
    }
}

/// The reported R-hat: max of the rank-normalised split R-hat and the rank-normalised split
/// R-hat of the folded draws |x - median| (V21 sec. 4.2).
pub fn rhat(chains: &[&[f64]]) -> f64 {
    let sp = split(chains);
    let bulk = potential_scale_reduction(&rank_normalise(&sp));
    let mut pooled: Vec<f64> = sp.iter().flatten().copied().collect();
    pooled.sort_by(f64::total_cmp);
    let med = quantile_sorted(&pooled, 0.5);
    let folded: Vec<Vec<f64>> = sp
        .iter()
        .map(|c| c.iter().map(|x| (x - med).abs()).collect())
        .collect();
    let tail = potential_scale_reduction(&rank_normalise(&folded));
    if bulk.is_nan() || tail.is_nan() {
        f64::NAN
    } else {
        bulk.max(tail)
    }
}

/// Effective sample size of the given chains as they are (no splitting, no ranks), by Geyer's
/// initial monotone sequence over the multi-chain autocorrelation (V21 eqs. 10-12). NaN when
/// the draws have no variance.
pub fn effective_sample_size(chains: &[Vec<f64>]) -> f64 {
    let Some((means, w, var_plus)) = variances(chains) else {
        return f64::NAN;
    };
    if var_plus.is_nan() || var_plus <= 0.0 {
        return f64::NAN;
    }
    let m = chains.len();
    let n = chains.iter().map(Vec::len).min().unwrap_or(0);
    let total = (m * n) as f64;
    // mean over chains of the biased autocovariance at lag t (divided by N).
    let acov = |t: usize| -> f64 {
        let mut s = 0.0;
        for (c, mu) in chains.iter().zip(&means) {
            let c = &c[..n];
            let mut a = 0.0;
            for i in 0..n - t {
                a += (c[i] - mu) * (c[i + t] - mu);
            }
            s += a / n as f64;
        }
        s / m as f64
    };
    let rho = |t: usize| -> f64 {
        if t == 0 {
            1.0
        } else {
            1.0 - (w - acov(t)) / var_plus
        }
    };
    let mut sum = 0.0;
    let mut previous = f64::INFINITY;
    let mut t = 0;
    while t + 1 < n {
        let pair = rho(t) + rho(t + 1);
        if pair <= 0.0 {
            break;
        }
        // Initial monotone sequence: a pair never exceeds the one before it.
        let pair = pair.min(previous);
        sum += pair;
        previous = pair;
        t += 2;
    }
    let tau = (-1.0 + 2.0 * sum).max(1.0 / total.log10());
    total / tau
}

/// Bulk ESS: the ESS of the rank-normalised split chains (V21 sec. 4.3).
pub fn ess_bulk(chains: &[&[f64]]) -> f64 {
    effective_sample_size(&rank_normalise(&split(chains)))
}

/// Tail ESS: the smaller ESS of the split-chain indicators of the 5% and 95% quantiles
/// (V21 sec. 4.3).
pub fn ess_tail(chains: &[&[f64]]) -> f64 {
    let sp = split(chains);
    let mut pooled: Vec<f64> = sp.iter().flatten().copied().collect();
    pooled.sort_by(f64::total_cmp);
    let mut worst = f64::INFINITY;
    for q in [0.05, 0.95] {
        let cut = quantile_sorted(&pooled, q);
        let ind: Vec<Vec<f64>> = sp
            .iter()
            .map(|c| {
                c.iter()
                    .map(|&x| if x <= cut { 1.0 } else { 0.0 })
                    .collect()
            })
            .collect();
        let e = effective_sample_size(&ind);
        if e.is_nan() {
            return f64::NAN;
        }
        worst = worst.min(e);
    }
    worst
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::{stream, Purpose};
    use rand_distr::{Distribution, StandardNormal};

    /// M AR(1) chains x_t = rho x_{t-1} + sqrt(1 - rho^2) e_t, started in the stationary law.
    fn ar1(rho: f64, m: usize, n: usize, seed: u64) -> Vec<Vec<f64>> {
        (0..m)
            .map(|c| {
                let mut rng = stream(seed, Purpose::NoiseChain, c as u64);
                let mut x: f64 = StandardNormal.sample(&mut rng);
                let s = (1.0 - rho * rho).sqrt();
                (0..n)
                    .map(|_| {
                        let e: f64 = StandardNormal.sample(&mut rng);
                        x = rho * x + s * e;
                        x
                    })
                    .collect()
            })
            .collect()
    }

    #[test]
    fn ess_of_ar1_chains_matches_the_closed_form() {
        // For AR(1) the integrated autocorrelation time is (1 + rho) / (1 - rho), so
        // ESS = M N (1 - rho) / (1 + rho) (e.g. Geyer 1992, sec. 3). With window ~2K lags the
        // estimate's relative sd is about sqrt(2 (2K + 1) / (M N)) (Madras & Sokal 1988,
        // J. Stat. Phys. 50, 109, eq. 2.27): about 0.02 at rho = 0.5 and 0.05 at rho = 0.8 for
        // M N = 1e5. The tolerance is 4 sd (false-failure rate about 6e-5 per check).
        for (rho, tol, seed) in [(0.5, 0.08, 11u64), (0.8, 0.2, 12), (-0.3, 0.08, 13)] {
            let chains = ar1(rho, 4, 25_000, seed);
            let want = 1e5 * (1.0 - rho) / (1.0 + rho);
            let got = effective_sample_size(&chains);
            assert!(
                (got / want - 1.0).abs() < tol,
                "rho {rho}: ESS {got} vs {want}"
            );
            // Bulk ESS works on ranks; for a Gaussian AR(1) the ranks keep nearly the same
            // autocorrelation, so the same tolerance applies.
            let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
            let bulk = ess_bulk(&refs);
            assert!((bulk / want - 1.0).abs() < tol, "rho {rho}: bulk {bulk}");
        }
    }

    #[test]
    fn independent_draws_have_full_ess() {
        let chains = ar1(0.0, 4, 5_000, 21);
        let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
        // Relative sd of the estimate ~ sqrt(2 * 3 / 2e4) = 0.017; 4 sd = 0.07.
        let e = ess_bulk(&refs);
        assert!((e / 2e4 - 1.0).abs() < 0.07, "{e}");
        // Tail ESS of iid draws: an indicator sequence is itself iid.
        let t = ess_tail(&refs);
        assert!((t / 2e4 - 1.0).abs() < 0.1, "{t}");
    }

    #[test]
    fn rhat_of_a_hand_worked_example() {
        // Two chains (1, 2, 3) and (3, 4, 5): means 2 and 4, within variances 1 and 1, so
        // W = 1, B / N = var(2, 4) = 2, var+ = 2/3 * 1 + 2 = 8/3, R-hat = sqrt(8/3)
        // (Gelman et al. 2013, BDA3, eqs. 11.2-11.4, worked by hand).
        let r = potential_scale_reduction(&[vec![1.0, 2.0, 3.0], vec![3.0, 4.0, 5.0]]);
        assert!((r - (8.0f64 / 3.0).sqrt()).abs() < 1e-15, "{r}");
    }

    #[test]
    fn rhat_separates_mixed_from_unmixed_chains() {
        let chains = ar1(0.3, 4, 2_000, 31);
        let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
        // Mixed chains: R-hat - 1 is O(1/N) (here about 1e-3); 1.01 is V21's threshold.
        let r = rhat(&refs);
        assert!(r < RHAT_MAX, "mixed chains: {r}");
        // One chain shifted by one standard deviation: the between-chain variance is about
        // 3/16 against W = 1, so R-hat ~ sqrt(1 + 3/16) = 1.09, far above 1.01.
        let mut shifted = chains.clone();
        for x in &mut shifted[0] {
            *x += 1.0;
        }
        let refs: Vec<&[f64]> = shifted.iter().map(|c| c.as_slice()).collect();
        let r = rhat(&refs);
        assert!(r > 1.05, "unmixed chains: {r}");
        // A chain whose scale differs (same mean) is caught by the folded R-hat only.
        let mut wide = chains.clone();
        for x in &mut wide[1] {
            *x *= 3.0;
        }
        let refs: Vec<&[f64]> = wide.iter().map(|c| c.as_slice()).collect();
        assert!(rhat(&refs) > 1.05, "scale-mismatched chains");
        // A drifting chain is caught by splitting.
        let mut drift = chains;
        let n = drift[2].len() as f64;
        for (i, x) in drift[2].iter_mut().enumerate() {
            *x += 2.0 * i as f64 / n;
        }
        let refs: Vec<&[f64]> = drift.iter().map(|c| c.as_slice()).collect();
        assert!(rhat(&refs) > 1.02, "drifting chain");
    }

    #[test]
    fn rank_normalisation_gives_normal_scores() {
        // Ranks 1..S map to Blom's normal scores; ties share the average rank.
        let z = rank_normalise(&[vec![3.0, 1.0], vec![2.0, 2.0]]);
        let s = 4.0;
        let score = |r: f64| inverse_normal_cdf((r - 0.375) / (s + 0.25));
        assert!((z[0][0] - score(4.0)).abs() < 1e-14);
        assert!((z[0][1] - score(1.0)).abs() < 1e-14);
        assert!((z[1][0] - score(2.5)).abs() < 1e-14);
        assert_eq!(z[1][0], z[1][1]);
        // Phi^-1(0.975) = 1.959963984540054 (handbook value).
        assert!((inverse_normal_cdf(0.975) - 1.959963984540054).abs() < 1e-12);
    }

    #[test]
    fn quantiles_interpolate() {
        let v = [1.0, 2.0, 3.0, 4.0, 5.0];
        assert_eq!(quantile_sorted(&v, 0.5), 3.0);
        assert_eq!(quantile_sorted(&v, 0.25), 2.0);
        assert!((quantile_sorted(&v, 0.1) - 1.4).abs() < 1e-15);
    }
}
