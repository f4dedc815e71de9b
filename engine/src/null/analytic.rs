//! The analytic null of the optimal statistic (Hazboun et al. 2023). Under the null with the
//! model right, x~_a = L_a z_a with z standard normal and L_a L_a^T = Z~_a, independently per
//! pulsar, and
//!     SNR = sum_{a<b} c_ab x~_a . x~_b = z^T M z,   c_ab = G_ab / (sum G^2 tr_ab)^(1/2),
//! with M the symmetric block matrix M_ab = (c_ab / 2) L_a^T L_b (a != b), M_aa = 0. So the SNR
//! is a generalised chi-square sum_k lambda_k chi^2_1 over the eigenvalues of M, and its tail
//! probability follows from Imhof's (1961) inversion formula on a saddle-point contour
//! ([`crate::gchisq`], the engine's one generalised chi-square). Its mean is
//! tr M = 0 and its variance 2 tr M^2 = sum c_ab^2 tr(Z~_a Z~_b) = 1 (the cumulants
//! kappa_r = 2^(r-1) (r-1)! tr(M^r) of a Gaussian quadratic form; Imhof 1961, section 2):
//! the SNR has unit variance under the null.

use super::{DensityGrid, Prepared, Trial};
use crate::error::{Error, Result};
use crate::gchisq::{GchisqError, GeneralisedChiSquare};
use ndarray::Array2;
use rayon::prelude::*;

/// Points of the density grid written to null.json.
pub const DENSITY_POINTS: usize = 200;

/// The eigenvalues of M (non-zero ones: |lambda| above 1e-13 of the largest), from the
/// per-pulsar roots L_a of [`crate::whiten::analysis_roots`] (each `p.dim` x `p.dim`).
pub fn eigenvalues(p: &Prepared, roots: &[Array2<f64>]) -> Result<Vec<f64>> {
    if roots.len() != p.n || roots.iter().any(|l| l.dim() != (p.dim, p.dim)) {
        return Err(Error::setting(
            "roots",
            format!("need {} square roots of size {}", p.n, p.dim),
        ));
    }
    let (n, d) = (p.n, p.dim);
    let mut m = Array2::<f64>::zeros((n * d, n * d));
    let mut k = 0;
    for a in 0..n {
        for b in a + 1..n {
            let block = roots[a].t().dot(&roots[b]) * (0.5 * p.coef[k]);
            for i in 0..d {
                for j in 0..d {
                    m[[a * d + i, b * d + j]] = block[[i, j]];
                    m[[b * d + j, a * d + i]] = block[[i, j]];
                }
            }
            k += 1;
        }
    }
    let vals = crate::linalg::symmetric_eigenvalues(m).ok_or_else(|| Error::NonFinite {
        what: "the eigenvalues of the OS quadratic form".into(),
    })?;
    let top = vals.iter().fold(0.0f64, |s, v| s.max(v.abs()));
    Ok(vals
        .iter()
        .copied()
        .filter(|v| v.abs() > 1e-13 * top)
        .collect())
}

/// The generalised chi-square of the eigenvalues, with its errors as the engine's.
fn form(eigenvalues: &[f64]) -> Result<GeneralisedChiSquare> {
    GeneralisedChiSquare::new(eigenvalues).map_err(chi_square_error)
}

fn chi_square_error(e: GchisqError) -> Error {
    Error::NonFinite {
        what: format!("the generalised chi-square null ({e})"),
    }
}

/// P(SNR >= x) under the analytic null: Imhof's (1961) inversion on the saddle-point contour
/// of [`crate::gchisq`] (absolute error below 1e-10, relative accuracy kept in the tail).
pub fn upper_tail(eigenvalues: &[f64], x: f64) -> Result<f64> {
    form(eigenvalues)?.upper_tail(x).map_err(chi_square_error)
}

/// The null density on [`DENSITY_POINTS`] points spanning the trial SNRs (and the observed
/// SNR when there are no trials), for re-plotting; one contour inversion per point, in
/// parallel ([`GeneralisedChiSquare::density`]).
pub fn density_grid(eigenvalues: &[f64], trials: &[Trial], observed: f64) -> Result<DensityGrid> {
    let (mut lo, mut hi) = trials
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), t| {
            (l.min(t.snr), h.max(t.snr))
        });
    if !(lo.is_finite() && hi.is_finite() && hi > lo) {
        lo = (-5.0f64).min(observed - 1.0);
        hi = 5.0f64.max(observed + 1.0);
    }
    let snr: Vec<f64> = (0..DENSITY_POINTS)
        .map(|i| lo + (hi - lo) * i as f64 / (DENSITY_POINTS - 1) as f64)
        .collect();
    let q = form(eigenvalues)?;
    let density = snr
        .par_iter()
        .map(|&x| q.density(x).map_err(chi_square_error))
        .collect::<Result<_>>()?;
    Ok(DensityGrid { snr, density })
}
