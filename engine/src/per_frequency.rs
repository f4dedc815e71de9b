//! The optimal statistic at each analysis frequency separately (the per-frequency optimal
//! statistic of Sardesai & Vigeland 2023 and Gersbach et al. 2024), with the covariance of the
//! per-frequency estimates and the combined estimate that reproduces the broadband OS
//! (docs/frequency-spread-bins.md).
//!
//! The pair numerator of the broadband statistic is a sum over frequency blocks. With the
//! template-weighted data x~_a = Phi^(1/2) X_a and Z~_a = Phi^(1/2) Z_a Phi^(1/2)
//! ([`crate::optimal::weight`]) and E_k the selector of the sine and cosine rows of frequency k:
//!
//!   x~_a . x~_b = sum_k x~_a^T E_k x~_b,
//!   tr(Z~_a Z~_b) = sum_kl tr(E_k Z~_a E_l Z~_b).
//!
//! Summed over pairs with the pattern weights G_ab, this gives per-frequency numerators and a
//! K x K matrix (our notation):
//!
//!   N_k  = sum_{a<b} G_ab x~_a^T E_k x~_b,
//!   F_kl = sum_{a<b} G_ab^2 tr(E_k Z~_a E_l Z~_b).
//!
//! The per-frequency estimate of A^2 (the template amplitude squared that frequency k alone
//! measures) is a_k = N_k / F_kk with no-signal uncertainty F_kk^(-1/2): the OS of
//! Gersbach et al. 2024 with the template restricted to frequency k, in units of the template
//! (their power estimate is a_k phi_k). Without signal the N_k have covariance F (Isserlis 1918,
//! pairs independent), so Cov(a_k, a_l) = F_kl / (F_kk F_ll). With the spectrum of the template,
//! E[a] = A^2 m with m_k = (F 1)_k / F_kk (leakage between frequencies through the timing model
//! and uneven sampling included), and the generalised least-squares combination of the a_k with
//! that model and covariance is
//!
//!   A2_comb = (m^T C^-1 a) / (m^T C^-1 m) = (sum_k N_k) / (sum_kl F_kl),
//!
//! which is the broadband OS exactly (Chamberlin et al. 2015's A2_hat = sum G rho / sigma^2 /
//! sum G^2 / sigma^2 with rho sigma^-2 = x~_a . x~_b and sigma^-2 = tr(Z~_a Z~_b)), with
//! uncertainty (sum_kl F_kl)^(-1/2) = sigma_0.

use crate::error::{Error, Result};
use crate::optimal::{OsEstimate, Weighted};
use ndarray::Array2;
use rayon::prelude::*;

/// The per-frequency optimal statistic of one pattern.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct PerFrequency {
    /// Analysis frequencies f_k (Hz).
    pub frequencies_hz: Vec<f64>,
    /// The template coefficient variance phi(f_k) at A = 1 (s^2), to turn a_k into power.
    pub template_phi: Vec<f64>,
    /// a_k = N_k / F_kk: the template amplitude squared measured by frequency k alone.
    pub amplitude2: Vec<f64>,
    /// F_kk^(-1/2): the no-signal uncertainty of a_k.
    pub amplitude2_sigma: Vec<f64>,
    /// Cov(a_k, a_l) = F_kl / (F_kk F_ll) without signal (K x K, row-major rows).
    pub covariance: Vec<Vec<f64>>,
    /// m_k = (F 1)_k / F_kk: E[a_k] / A^2 for a background with the template's spectrum.
    pub leakage: Vec<f64>,
    /// The generalised least-squares combination of the a_k (equal to the broadband OS).
    pub combined: OsEstimate,
    /// Cov(a_k, a_l) with the signal present at `signal_amplitude2` ([`signal_covariance`]),
    /// when computed.
    pub covariance_signal: Option<Vec<Vec<f64>>>,
    /// The A^2 of `covariance_signal`.
    pub signal_amplitude2: Option<f64>,
}

/// Cov(a_k, a_l) with a signal present: N_k = (1/2) x^T (G' (x) E_k) x for the stacked x~
/// (G' = G with zero diagonal), so for Gaussian x with the signal-present covariance C~ of
/// [`crate::paircov::joint_covariance`] (Allen & Romano 2023 in the reduced space),
/// Cov(N_k, N_l) = (1/2) tr((G' (x) E_k) C~ (G' (x) E_l) C~) (Isserlis 1918)
/// = (1/2) sum over rows r of frequency k and s of frequency l of P_rs P_sr with
/// P = (G' (x) I) C~; divided by F_kk F_ll. `g` is the N x N pattern matrix (unit diagonal),
/// `dc` the common auto-power in the analysis in template units, `a2` the signal's A^2.
pub fn signal_covariance(
    w: &[Weighted],
    g: &Array2<f64>,
    dc: &[f64],
    a2: f64,
    sigma: &[f64],
) -> Result<Vec<Vec<f64>>> {
    let m = w.first().map_or(0, |x| x.z.nrows());
    let k = m / 2;
    if sigma.len() != k {
        return Err(Error::setting(
            "per-frequency",
            "one uncertainty per frequency is needed",
        ));
    }
    let z: Vec<Array2<f64>> = w.iter().map(|x| x.z.clone()).collect();
    let c = crate::paircov::JointBlocks::new(&z, g, dc, a2.max(0.0))?;
    signal_covariance_with(&c, g, sigma)
}

/// [`signal_covariance`] from the slices `c` of the joint covariance C~.
pub fn signal_covariance_with(
    c: &crate::paircov::JointBlocks,
    g: &Array2<f64>,
    sigma: &[f64],
) -> Result<Vec<Vec<f64>>> {
    let n = g.nrows();
    let m = c.components();
    let k = m / 2;
    if c.pulsars() != n || sigma.len() != k {
        return Err(Error::setting(
            "per-frequency",
            "the joint covariance must be N 2K square, with one uncertainty per frequency",
        ));
    }
    let mut gp = g.clone();
    for a in 0..n {
        gp[[a, a]] = 0.0;
    }
    // Per component pair, as in bin_covariance.rs: with V_ij the N x N matrix
    // V_ij[c, b] = C~[(c, i), (b, j)] (the slice S_ij of JointBlocks), the (i, j) block of P is
    // G' V_ij, and C~ symmetric gives V_ji = V_ij^T, so the rows r of component i and s of
    // component j add
    //   sum_ab (G' V_ij)[a, b] (G' V_ji)[b, a] = <G' V_ij, V_ij G'> (Frobenius),
    // the same for (j, i). Two N x N products per pair i <= j (the same 2 (2K)^2 N^3 operations
    // as the one product G' C~ in all), each on cache-resident N x N matrices, and nothing of
    // size (N 2K)^2 is written; the pairs run in one parallel loop and their terms are added in
    // pair order, so the result does not depend on the thread count.
    let term = |(i, j): (usize, usize)| -> f64 {
        let v = c.slice(i, j);
        let left = gp.dot(&v);
        let right = v.dot(&gp);
        crate::optimal::frobenius(&left, &right)
    };
    let tasks: Vec<(usize, usize)> = (0..m).flat_map(|i| (i..m).map(move |j| (i, j))).collect();
    let mut cov = vec![vec![0.0; k]; k];
    let terms: Vec<f64> = tasks.par_iter().map(|&t| term(t)).collect();
    for (&(i, j), t) in tasks.iter().zip(terms) {
        let (fi, fj) = (i / 2, j / 2);
        cov[fi][fj] += t;
        if i != j {
            cov[fj][fi] += t;
        }
    }
    for i in 0..k {
        for j in 0..k {
            // F_kk = sigma_k^-2
            cov[i][j] *= 0.5 * (sigma[i] * sigma[j]).powi(2);
        }
    }
    if cov.iter().flatten().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: "the per-frequency covariance with signal".into(),
        });
    }
    Ok(cov)
}

/// N_k and F_kl of an array (the sums over pairs a < b of the module doc), pairs in parallel
/// over the first pulsar. `g` holds G_ab in row-major pair order; `k` is the number of
/// frequencies (each weighted vector has length 2k: sine then cosine per frequency).
pub fn frequency_sums(w: &[Weighted], g: &[f64], k: usize) -> Result<(Vec<f64>, Vec<f64>)> {
    let n = w.len();
    if w.iter()
        .any(|x| x.x.len() != 2 * k || x.z.dim() != (2 * k, 2 * k))
    {
        return Err(Error::setting(
            "per-frequency",
            "every weighted pulsar must have 2K rows",
        ));
    }
    if g.len() != n * n.saturating_sub(1) / 2 {
        return Err(Error::setting(
            "per-frequency",
            "one pattern value per pair is needed",
        ));
    }
    // Offset of pulsar a's first pair in row-major order.
    let offset = |a: usize| a * n - a * (a + 1) / 2;
    let (num, fis) = (0..n)
        .into_par_iter()
        .map(|a| {
            let mut num = vec![0.0; k];
            let mut fis = vec![0.0; k * k];
            let za = &w[a].z;
            for b in a + 1..n {
                let gab = g[offset(a) + (b - a - 1)];
                let zb = &w[b].z;
                for i in 0..2 * k {
                    num[i / 2] += gab * w[a].x[i] * w[b].x[i];
                }
                let g2 = gab * gab;
                for i in 0..2 * k {
                    let row = &mut fis[(i / 2) * k..(i / 2 + 1) * k];
                    for j in 0..2 * k {
                        row[j / 2] += g2 * za[[i, j]] * zb[[i, j]];
                    }
                }
            }
            (num, fis)
        })
        // Collected in pulsar order and added sequentially, so the sums (and the output bytes)
        // do not depend on how rayon split the work.
        .collect::<Vec<_>>()
        .into_iter()
        .fold(
            (vec![0.0; k], vec![0.0; k * k]),
            |(mut n1, mut f1), (n2, f2)| {
                n1.iter_mut().zip(&n2).for_each(|(x, y)| *x += y);
                f1.iter_mut().zip(&f2).for_each(|(x, y)| *x += y);
                (n1, f1)
            },
        );
    Ok((num, fis))
}

/// The per-frequency OS of the pattern values `g` (row-major pairs) from the weighted pulsars
/// `w` (template `phi` of length 2K, the frequencies `freqs`).
pub fn per_frequency(
    w: &[Weighted],
    g: &[f64],
    freqs: &[f64],
    phi: &[f64],
) -> Result<PerFrequency> {
    let k = freqs.len();
    if phi.len() != 2 * k {
        return Err(Error::setting(
            "per-frequency",
            "the template must have 2K entries",
        ));
    }
    let (num, fis) = frequency_sums(w, g, k)?;
    let f = |i: usize, j: usize| fis[i * k + j];
    for i in 0..k {
        if !(f(i, i).is_finite() && f(i, i) > 0.0) {
            return Err(Error::NonFinite {
                what: format!(
                    "the per-frequency normalisation F_kk at frequency {} of {k} (no pair has data there?)",
                    i + 1
                ),
            });
        }
    }
    let amplitude2: Vec<f64> = (0..k).map(|i| num[i] / f(i, i)).collect();
    let amplitude2_sigma: Vec<f64> = (0..k).map(|i| f(i, i).powf(-0.5)).collect();
    let covariance: Vec<Vec<f64>> = (0..k)
        .map(|i| (0..k).map(|j| f(i, j) / (f(i, i) * f(j, j))).collect())
        .collect();
    let leakage: Vec<f64> = (0..k)
        .map(|i| (0..k).map(|j| f(i, j)).sum::<f64>() / f(i, i))
        .collect();
    // The GLS combination: m^T C^-1 a = sum_k F_kk a_k = sum_k N_k, m^T C^-1 m = sum_kl F_kl.
    let num_sum: f64 = (0..k).map(|i| f(i, i) * amplitude2[i]).sum();
    let den: f64 = fis.iter().sum();
    let a2 = num_sum / den;
    let sigma = den.powf(-0.5);
    Ok(PerFrequency {
        frequencies_hz: freqs.to_vec(),
        template_phi: (0..k).map(|i| phi[2 * i]).collect(),
        amplitude2,
        amplitude2_sigma,
        covariance,
        leakage,
        combined: OsEstimate {
            amplitude2: a2,
            amplitude2_sigma: sigma,
            snr: a2 / sigma,
        },
        covariance_signal: None,
        signal_amplitude2: None,
    })
}

/// One row of `per-frequency.csv`.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PerFrequencyRow {
    /// 1-based frequency index k (f_k = k / T_span).
    pub index: usize,
    pub frequency_hz: f64,
    /// a_k (units of the template amplitude squared).
    pub amplitude2: f64,
    /// F_kk^(-1/2), without signal.
    pub amplitude2_sigma: f64,
    /// The uncertainty with the signal at the measured amplitude (empty when not computed).
    pub amplitude2_sigma_signal: Option<f64>,
    /// a_k phi(f_k): the Fourier-coefficient variance measured at f_k (s^2).
    pub power_s2: f64,
    /// F_kk^(-1/2) phi(f_k) (s^2).
    pub power_sigma_s2: f64,
    /// The power-law prediction at the broadband amplitude, A2_hat phi(f_k) (s^2).
    pub power_law_s2: f64,
    /// The same including leakage, A2_hat m_k phi(f_k) (s^2): what a_k phi_k averages to.
    pub expected_s2: f64,
}

/// One entry of `per-frequency-covariance.csv` (every (k, l), row-major).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PerFrequencyCovarianceRow {
    pub index_a: usize,
    pub index_b: usize,
    /// Cov(a_k, a_l) without signal (units of the template amplitude squared, squared).
    pub covariance: f64,
    /// Cov / (sigma_k sigma_l).
    pub correlation: f64,
    /// Cov(a_k, a_l) with the signal at the measured amplitude (empty when not computed).
    pub covariance_signal: Option<f64>,
}

impl PerFrequency {
    /// The rows of `per-frequency.csv` for a broadband amplitude `broadband_a2`.
    pub fn rows(&self, broadband_a2: f64) -> Vec<PerFrequencyRow> {
        (0..self.frequencies_hz.len())
            .map(|i| {
                let phi = self.template_phi[i];
                PerFrequencyRow {
                    index: i + 1,
                    frequency_hz: self.frequencies_hz[i],
                    amplitude2: self.amplitude2[i],
                    amplitude2_sigma: self.amplitude2_sigma[i],
                    amplitude2_sigma_signal: self
                        .covariance_signal
                        .as_ref()
                        .map(|c| c[i][i].max(0.0).sqrt()),
                    power_s2: self.amplitude2[i] * phi,
                    power_sigma_s2: self.amplitude2_sigma[i] * phi,
                    power_law_s2: broadband_a2 * phi,
                    expected_s2: broadband_a2 * self.leakage[i] * phi,
                }
            })
            .collect()
    }

    /// The rows of `per-frequency-covariance.csv`.
    pub fn covariance_rows(&self) -> Vec<PerFrequencyCovarianceRow> {
        let k = self.frequencies_hz.len();
        let mut out = Vec::with_capacity(k * k);
        for i in 0..k {
            for j in 0..k {
                let c = self.covariance[i][j];
                out.push(PerFrequencyCovarianceRow {
                    index_a: i + 1,
                    index_b: j + 1,
                    covariance: c,
                    correlation: c / (self.amplitude2_sigma[i] * self.amplitude2_sigma[j]),
                    covariance_signal: self.covariance_signal.as_ref().map(|c| c[i][j]),
                });
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::optimal::{optimal_statistic, pair_correlations, weight};
    use crate::orf::{pattern_for_pairs, Pattern};
    use crate::reduce::Reduced;
    use crate::rng::{stream, Purpose};
    use crate::sky::isotropic_direction;
    use crate::spectrum::{frequencies, template};
    use ndarray::{Array1, Array2};
    use rand::Rng;
    use rand_distr::StandardNormal;

    /// A toy array: random positive-definite Z (coupling all frequencies, as the timing model
    /// does) and X drawn from N(0, Z) or with a common signal.
    fn toy(n: usize, k: usize, seed: u64) -> (Vec<Reduced>, Vec<f64>, Vec<f64>) {
        let m = 2 * k;
        let mut r = stream(seed, Purpose::Injection, 0);
        let t_span = 4e8;
        let freqs = frequencies(k, t_span);
        let phi = template(13.0 / 3.0, &freqs, t_span);
        let red: Vec<Reduced> = (0..n)
            .map(|i| {
                let a = Array2::from_shape_fn((m, m + 3), |_| r.sample::<f64, _>(StandardNormal));
                // Z in units where Phi^(1/2) Z Phi^(1/2) is of order one.
                let mut z = a.dot(&a.t()) * 0.2 + Array2::<f64>::eye(m);
                for ((p, q), v) in z.indexed_iter_mut() {
                    *v /= (phi[p] * phi[q]).sqrt();
                }
                let x: Array1<f64> = (0..m)
                    .map(|p| r.sample::<f64, _>(StandardNormal) / phi[p].sqrt())
                    .collect();
                Reduced {
                    label: format!("T{i}"),
                    direction: isotropic_direction(r.random(), r.random()),
                    x,
                    z,
                    flops: 0.0,
                }
            })
            .collect();
        (red, freqs, phi)
    }

    fn directions(red: &[Reduced]) -> Vec<crate::sky::Direction> {
        red.iter().map(|r| r.direction).collect()
    }

    /// The identity of the module doc: the GLS combination of the per-frequency estimates is
    /// the broadband OS (Chamberlin et al. 2015 form via `optimal_statistic`), to rounding, for
    /// every pattern and for a template index other than the default.
    #[test]
    fn combination_reproduces_the_broadband_statistic() {
        let (red, freqs, _) = toy(9, 5, 1);
        for gamma in [13.0 / 3.0, 3.0] {
            let phi = template(gamma, &freqs, 4e8);
            let pairs = pair_correlations(&red, &phi).unwrap();
            let w: Vec<Weighted> = red.iter().map(|r| weight(r, &phi)).collect();
            for p in Pattern::ALL {
                let g = pattern_for_pairs(p, &directions(&red));
                let broad = optimal_statistic(&pairs.rho, &pairs.sigma, &g);
                let pf = per_frequency(&w, &g, &freqs, &phi).unwrap();
                let c = pf.combined;
                assert!(
                    (c.amplitude2 - broad.amplitude2).abs() <= 1e-12 * broad.amplitude2_sigma,
                    "{p:?} {} vs {}",
                    c.amplitude2,
                    broad.amplitude2
                );
                assert!((c.amplitude2_sigma / broad.amplitude2_sigma - 1.0).abs() < 1e-13);
            }
        }
    }

    /// Gersbach et al. 2024 define the per-frequency pair statistic with the template
    /// restricted to frequency k: rho_ab,k = X_a^T Phi_k X_b / tr(Z_a Phi_k Z_b Phi_k) with
    /// sigma_ab,k = tr(Z_a Phi_k Z_b Phi_k)^(-1/2), then the usual OS over pairs. Computed
    /// that way, pair by pair on the unweighted X and Z, with Phi_k = E_k (unit power), the
    /// result is a_k phi_k.
    #[test]
    fn each_frequency_is_the_os_with_the_template_restricted_to_it() {
        let (red, freqs, phi) = toy(7, 4, 2);
        let w: Vec<Weighted> = red.iter().map(|r| weight(r, &phi)).collect();
        let g = pattern_for_pairs(Pattern::Hd, &directions(&red));
        let pf = per_frequency(&w, &g, &freqs, &phi).unwrap();
        for k in 0..freqs.len() {
            let (mut rho, mut sig) = (Vec::new(), Vec::new());
            for a in 0..red.len() {
                for b in a + 1..red.len() {
                    let sel = [2 * k, 2 * k + 1];
                    let num: f64 = sel.iter().map(|&i| red[a].x[i] * red[b].x[i]).sum();
                    let mut tr = 0.0;
                    for &i in &sel {
                        for &j in &sel {
                            tr += red[a].z[[i, j]] * red[b].z[[j, i]];
                        }
                    }
                    rho.push(num / tr);
                    sig.push(tr.powf(-0.5));
                }
            }
            let os = optimal_statistic(&rho, &sig, &g);
            let p = phi[2 * k];
            assert!((os.amplitude2 / (pf.amplitude2[k] * p) - 1.0).abs() < 1e-10);
            assert!((os.amplitude2_sigma / (pf.amplitude2_sigma[k] * p) - 1.0).abs() < 1e-10);
        }
    }

    /// Monte Carlo: with no signal (X_a ~ N(0, Z_a), pulsars independent) the sample
    /// covariance of the a_k matches F_kl / (F_kk F_ll). Tolerance: 5 standard errors of a
    /// sample covariance, sqrt((1 + r^2) / n) in correlation units (common practice; a false
    /// failure about once in 10^6 runs per entry for near-Gaussian estimates).
    #[test]
    fn covariance_matches_draws_without_signal() {
        let (red, freqs, phi) = toy(8, 3, 3);
        let k = freqs.len();
        let g = pattern_for_pairs(Pattern::Hd, &directions(&red));
        let roots: Vec<Array2<f64>> = red
            .iter()
            .map(|r| crate::linalg::cholesky_lower(&r.z, "Z").unwrap())
            .collect();
        let draws = 4000;
        let mut rng = stream(5, Purpose::Injection, 9);
        let mut samples = vec![vec![0.0; k]; draws];
        let mut pf0 = None;
        for s in samples.iter_mut() {
            let sim: Vec<Reduced> = red
                .iter()
                .zip(&roots)
                .map(|(r, l)| {
                    let e: Array1<f64> = (0..2 * k)
                        .map(|_| rng.sample::<f64, _>(StandardNormal))
                        .collect();
                    Reduced {
                        x: l.dot(&e),
                        ..r.clone()
                    }
                })
                .collect();
            let w: Vec<Weighted> = sim.iter().map(|r| weight(r, &phi)).collect();
            let pf = per_frequency(&w, &g, &freqs, &phi).unwrap();
            s.copy_from_slice(&pf.amplitude2);
            pf0 = Some(pf);
        }
        let pf = pf0.unwrap();
        let mean: Vec<f64> = (0..k)
            .map(|i| samples.iter().map(|s| s[i]).sum::<f64>() / draws as f64)
            .collect();
        for i in 0..k {
            for j in 0..k {
                let c: f64 = samples
                    .iter()
                    .map(|s| (s[i] - mean[i]) * (s[j] - mean[j]))
                    .sum::<f64>()
                    / (draws - 1) as f64;
                let want = pf.covariance[i][j];
                let scale = pf.amplitude2_sigma[i] * pf.amplitude2_sigma[j];
                let r = want / scale;
                let tol = 5.0 * ((1.0 + r * r) / draws as f64).sqrt();
                assert!(
                    ((c - want) / scale).abs() < tol,
                    "({i},{j}): sample {c} vs {want}"
                );
            }
        }
    }

    /// The signal-present covariance reduces to F_kl / (F_kk F_ll) without signal and common
    /// auto-power, and matches draws of the stacked data from C~ with a signal (tolerance as
    /// in `covariance_matches_draws_without_signal`).
    #[test]
    fn signal_covariance_matches_draws() {
        let (red, freqs, phi) = toy(6, 3, 7);
        let (n, k) = (red.len(), freqs.len());
        let m = 2 * k;
        let dirs = directions(&red);
        let gp = pattern_for_pairs(Pattern::Hd, &dirs);
        let gm =
            Array2::from_shape_vec((n, n), crate::orf::pattern_matrix(Pattern::Hd, &dirs)).unwrap();
        let w: Vec<Weighted> = red.iter().map(|r| weight(r, &phi)).collect();
        let pf = per_frequency(&w, &gp, &freqs, &phi).unwrap();
        let c0 = signal_covariance(&w, &gm, &vec![0.0; m], 0.0, &pf.amplitude2_sigma).unwrap();
        for i in 0..k {
            for j in 0..k {
                let want = pf.covariance[i][j];
                assert!((c0[i][j] - want).abs() < 1e-12 * pf.covariance[i][i]);
            }
        }
        let a2 = 3.0;
        let cs = signal_covariance(&w, &gm, &vec![0.0; m], a2, &pf.amplitude2_sigma).unwrap();
        let z: Vec<Array2<f64>> = w.iter().map(|x| x.z.clone()).collect();
        let joint = crate::paircov::joint_covariance(&z, &gm, &vec![0.0; m], a2).unwrap();
        let l = crate::linalg::cholesky_lower(&joint, "joint").unwrap();
        let draws = 4000;
        let mut rng = stream(8, Purpose::Injection, 3);
        let mut samples = vec![vec![0.0; k]; draws];
        for s in samples.iter_mut() {
            let e: Array1<f64> = (0..n * m)
                .map(|_| rng.sample::<f64, _>(StandardNormal))
                .collect();
            let x = l.dot(&e);
            let ws: Vec<Weighted> = (0..n)
                .map(|a| Weighted {
                    x: x.slice(ndarray::s![a * m..(a + 1) * m]).to_owned(),
                    z: z[a].clone(),
                })
                .collect();
            s.copy_from_slice(&per_frequency(&ws, &gp, &freqs, &phi).unwrap().amplitude2);
        }
        let mean: Vec<f64> = (0..k)
            .map(|i| samples.iter().map(|s| s[i]).sum::<f64>() / draws as f64)
            .collect();
        for i in 0..k {
            // the mean is A^2 m_k (leakage included)
            let sd = cs[i][i].sqrt();
            assert!(
                (mean[i] - a2 * pf.leakage[i]).abs() < 5.0 * sd / (draws as f64).sqrt(),
                "mean {} vs {}",
                mean[i],
                a2 * pf.leakage[i]
            );
            for j in 0..k {
                let c: f64 = samples
                    .iter()
                    .map(|s| (s[i] - mean[i]) * (s[j] - mean[j]))
                    .sum::<f64>()
                    / (draws - 1) as f64;
                let scale = (cs[i][i] * cs[j][j]).sqrt();
                let r = cs[i][j] / scale;
                // 6 standard errors: products of Gaussian data have heavier tails.
                let tol = 6.0 * ((1.0 + r * r) / draws as f64).sqrt();
                assert!(
                    ((c - cs[i][j]) / scale).abs() < tol,
                    "({i},{j}): sample {c} vs {}",
                    cs[i][j]
                );
            }
        }
        // and the signal makes the spread larger than the no-signal one
        assert!(cs[0][0] > 1.2 * pf.covariance[0][0]);
    }

    #[test]
    fn block_form_is_the_dense_trace() {
        // The per-component-pair form equals the definition written out densely,
        // (1/2) sum over rows r of frequency k and s of frequency l of P_rs P_sr with
        // P = (G' (x) I) C (Isserlis 1918), with C the full joint covariance
        // (paircov::joint_covariance) of random symmetric Z~, random common auto-power and a
        // random pattern; the block form reads it through JointBlocks' slices. Tolerance: a few
        // hundred roundings of terms of order one (1e-12 relative).
        let (n, k) = (5, 3);
        let m = 2 * k;
        let nm = n * m;
        let mut r = crate::rng::stream(5, crate::rng::Purpose::Layout, 0);
        let mut z = Vec::new();
        for _ in 0..n {
            let mut za = Array2::<f64>::zeros((m, m));
            for i in 0..m {
                for j in 0..=i {
                    let v = rand::Rng::random::<f64>(&mut r) - 0.5;
                    za[[i, j]] = v;
                    za[[j, i]] = v;
                }
            }
            z.push(za);
        }
        let dc: Vec<f64> = (0..m).map(|_| rand::Rng::random::<f64>(&mut r)).collect();
        let mut g = Array2::<f64>::eye(n);
        for a in 0..n {
            for b in 0..a {
                let v = rand::Rng::random::<f64>(&mut r) - 0.5;
                g[[a, b]] = v;
                g[[b, a]] = v;
            }
        }
        let a2 = 1.3;
        let c = crate::paircov::joint_covariance(&z, &g, &dc, a2).unwrap();
        let blocks = crate::paircov::JointBlocks::new(&z, &g, &dc, a2).unwrap();
        let sigma = [1.0f64, 0.5, 2.0];
        let got = signal_covariance_with(&blocks, &g, &sigma).unwrap();
        let mut gpi = Array2::<f64>::zeros((nm, nm));
        for a in 0..n {
            for b in 0..n {
                if a != b {
                    for i in 0..m {
                        gpi[[a * m + i, b * m + i]] = g[[a, b]];
                    }
                }
            }
        }
        let p = gpi.dot(&c);
        for fk in 0..k {
            for fl in 0..k {
                let mut want = 0.0;
                for rr in 0..nm {
                    for ss in 0..nm {
                        if (rr % m) / 2 == fk && (ss % m) / 2 == fl {
                            want += p[[rr, ss]] * p[[ss, rr]];
                        }
                    }
                }
                want *= 0.5 * (sigma[fk] * sigma[fl]).powi(2);
                let scale = want.abs().max(1.0);
                assert!(
                    (got[fk][fl] - want).abs() < 1e-12 * scale,
                    "{fk} {fl}: {} {want}",
                    got[fk][fl]
                );
            }
        }
    }

    #[test]
    fn mismatched_sizes_are_errors() {
        let (red, freqs, phi) = toy(3, 2, 4);
        let w: Vec<Weighted> = red.iter().map(|r| weight(r, &phi)).collect();
        assert!(per_frequency(&w, &[0.1, 0.2], &freqs, &phi).is_err());
        assert!(per_frequency(&w, &[0.1, 0.2, 0.3], &freqs[..1], &phi).is_err());
    }
}
