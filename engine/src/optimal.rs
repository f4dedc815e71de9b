//! The optimal statistic: pairwise cross-correlations rho_ab with their uncertainties, and the
//! amplitude of a correlation pattern fitted to them (Anholm et al. 2009; Demorest et al. 2013;
//! Chamberlin et al. 2015; multiple-component form: Sardesai & Vigeland 2023).

use crate::error::{Error, Result};
use crate::orf::Pattern;
use crate::reduce::Reduced;
use crate::sky::{angle, cos_angle, Direction};
use ndarray::{Array1, Array2};
use ndarray_linalg::Inverse;
use rayon::prelude::*;

/// A pulsar's reduced data weighted by the template: x~ = Phi^(1/2) X and
/// Z~ = Phi^(1/2) Z Phi^(1/2), so that X_a^T Phi X_b = x~_a . x~_b and
/// tr(Z_a Phi Z_b Phi) = sum_ij Z~_a,ij Z~_b,ij (Z symmetric).
#[derive(Clone, Debug)]
pub struct Weighted {
    pub x: Array1<f64>,
    pub z: Array2<f64>,
}

/// Weight one reduced pulsar by the template diag(phi) (length 2K).
pub fn weight(r: &Reduced, phi: &[f64]) -> Weighted {
    let h: Array1<f64> = phi.iter().map(|p| p.sqrt()).collect();
    let x = &r.x * &h;
    let mut z = r.z.clone();
    for ((i, j), v) in z.indexed_iter_mut() {
        *v *= h[i] * h[j];
    }
    Weighted { x, z }
}

/// Every pair a < b (row-major order) of an array: indices, sky geometry, rho and sigma.
#[derive(Clone, Debug, Default)]
pub struct PairCorrelations {
    pub a: Vec<usize>,
    pub b: Vec<usize>,
    pub cos_angle: Vec<f64>,
    /// Separation zeta_ab in radians by [`angle`] (atan2 of |p_a x p_b| and p_a . p_b), accurate
    /// at all separations where acos(cos_angle) is not (docs/optimal-statistic.md).
    pub angle: Vec<f64>,
    /// rho_ab = X_a^T Phi X_b / tr(Z_a Phi Z_b Phi), an estimate of A^2 G_ab (s^2... in units
    /// of A^2).
    pub rho: Vec<f64>,
    /// sigma_ab = tr(Z_a Phi Z_b Phi)^(-1/2).
    pub sigma: Vec<f64>,
}

impl PairCorrelations {
    /// Number of pairs.
    pub fn len(&self) -> usize {
        self.rho.len()
    }

    /// True when there are no pairs.
    pub fn is_empty(&self) -> bool {
        self.rho.is_empty()
    }

    /// The pattern value G_ab of every pair.
    pub fn pattern_values(&self, pattern: Pattern) -> Vec<f64> {
        self.cos_angle.iter().map(|&c| pattern.value(c)).collect()
    }
}

/// The numerator X_a^T Phi X_b and the trace tr(Z_a Phi Z_b Phi) of one pair.
pub fn pair_terms(wa: &Weighted, wb: &Weighted) -> (f64, f64) {
    let num = wa.x.dot(&wb.x);
    let tr = frobenius(&wa.z, &wb.z);
    (num, tr)
}

/// sum_ij A_ij B_ij.
pub fn frobenius(a: &Array2<f64>, b: &Array2<f64>) -> f64 {
    match (a.as_slice(), b.as_slice()) {
        (Some(x), Some(y)) => x.iter().zip(y).map(|(p, q)| p * q).sum(),
        _ => a.iter().zip(b.iter()).map(|(p, q)| p * q).sum(),
    }
}

/// All pairwise correlations of an array (pairs in parallel over the first pulsar).
pub fn pair_correlations(reduced: &[Reduced], phi: &[f64]) -> Result<PairCorrelations> {
    let weighted: Vec<Weighted> = reduced.par_iter().map(|r| weight(r, phi)).collect();
    let directions: Vec<Direction> = reduced.iter().map(|r| r.direction).collect();
    let traces = pair_traces(&weighted);
    let nums = pair_numerators(&weighted);
    let mut out = PairCorrelations::default();
    let n = reduced.len();
    let mut k = 0;
    for a in 0..n {
        for b in a + 1..n {
            let tr = traces[k];
            if !(tr.is_finite() && tr > 0.0) {
                return Err(Error::NonFinite {
                    what: format!(
                        "tr(Z_a Phi Z_b Phi) of pair {}-{} (is one pulsar without data at the analysis frequencies?)",
                        reduced[a].label, reduced[b].label
                    ),
                });
            }
            out.a.push(a);
            out.b.push(b);
            out.cos_angle
                .push(cos_angle(&directions[a], &directions[b]));
            out.angle.push(angle(&directions[a], &directions[b]));
            out.rho.push(nums[k] / tr);
            out.sigma.push(tr.powf(-0.5));
            k += 1;
        }
    }
    Ok(out)
}

/// tr(Z_a Phi Z_b Phi) of every pair a < b (row-major), computed in parallel.
pub fn pair_traces(w: &[Weighted]) -> Vec<f64> {
    let n = w.len();
    (0..n)
        .into_par_iter()
        .flat_map_iter(|a| (a + 1..n).map(move |b| frobenius(&w[a].z, &w[b].z)))
        .collect()
}

/// X_a^T Phi X_b of every pair a < b (row-major).
pub fn pair_numerators(w: &[Weighted]) -> Vec<f64> {
    let n = w.len();
    let mut out = Vec::with_capacity(n * n.saturating_sub(1) / 2);
    for a in 0..n {
        for b in a + 1..n {
            out.push(w[a].x.dot(&w[b].x));
        }
    }
    out
}

/// The optimal-statistic estimate of one pattern.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct OsEstimate {
    /// A2_hat = sum(G rho / sigma^2) / sum(G^2 / sigma^2).
    pub amplitude2: f64,
    /// sigma_0 = (sum G^2 / sigma^2)^(-1/2), the uncertainty without signal.
    pub amplitude2_sigma: f64,
    /// A2_hat / sigma_0.
    pub snr: f64,
}

impl OsEstimate {
    /// The amplitude A = sqrt(A2_hat) of a positive estimate (a negative or zero A2_hat has
    /// none).
    pub fn amplitude(&self) -> Option<f64> {
        (self.amplitude2 > 0.0).then(|| self.amplitude2.sqrt())
    }
}

/// Fit one pattern's amplitude to the pair correlations (Anholm et al. 2009; Chamberlin et
/// al. 2015): A2 = sum(G rho/s^2)/sum(G^2/s^2), sigma_0 = (sum G^2/s^2)^(-1/2).
pub fn optimal_statistic(rho: &[f64], sigma: &[f64], g: &[f64]) -> OsEstimate {
    let mut num = 0.0;
    let mut den = 0.0;
    for ((&r, &s), &gi) in rho.iter().zip(sigma).zip(g) {
        let w = 1.0 / (s * s);
        num += gi * r * w;
        den += gi * gi * w;
    }
    let amplitude2 = num / den;
    let amplitude2_sigma = den.powf(-0.5);
    OsEstimate {
        amplitude2,
        amplitude2_sigma,
        snr: amplitude2 / amplitude2_sigma,
    }
}

/// The SNR alone from precomputed weights 1/sigma^2 (hot loop of sky scrambles).
pub fn os_snr(rho_w: &[f64], inv_var: &[f64], g: &[f64]) -> f64 {
    let mut num = 0.0;
    let mut den = 0.0;
    for ((&rw, &w), &gi) in rho_w.iter().zip(inv_var).zip(g) {
        num += gi * rw;
        den += gi * gi * w;
    }
    num / den.sqrt()
}

/// A simultaneous fit of several patterns (Sardesai & Vigeland 2023).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct MultiComponent {
    pub patterns: Vec<Pattern>,
    /// A2 = F^-1 b with F_kl = sum G^k G^l / sigma^2, b_k = sum G^k rho / sigma^2.
    pub amplitude2: Vec<f64>,
    /// F^-1, the covariance of the fitted amplitudes without signal.
    pub covariance: Vec<Vec<f64>>,
}

/// Fit several patterns at once.
pub fn multiple_component(
    pairs: &PairCorrelations,
    patterns: &[Pattern],
) -> Result<MultiComponent> {
    let gs: Vec<Vec<f64>> = patterns.iter().map(|&p| pairs.pattern_values(p)).collect();
    let m = patterns.len();
    let mut fisher = Array2::<f64>::zeros((m, m));
    let mut b = Array1::<f64>::zeros(m);
    for i in 0..pairs.len() {
        let w = 1.0 / (pairs.sigma[i] * pairs.sigma[i]);
        for k in 0..m {
            b[k] += gs[k][i] * pairs.rho[i] * w;
            for l in 0..m {
                fisher[[k, l]] += gs[k][i] * gs[l][i] * w;
            }
        }
    }
    let cov = fisher.inv().map_err(|_| Error::NotPositiveDefinite {
        what: "the Fisher matrix of the multiple-component fit (patterns degenerate for this sky)"
            .into(),
        pivot: 0,
    })?;
    let a2 = cov.dot(&b);
    Ok(MultiComponent {
        patterns: patterns.to_vec(),
        amplitude2: a2.to_vec(),
        covariance: cov.rows().into_iter().map(|r| r.to_vec()).collect(),
    })
}
