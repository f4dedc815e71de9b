//! The analytic null of the optimal statistic (Hazboun et al. 2023). Under the null with the
//! model right, x~_a = L_a z_a with z standard normal and L_a L_a^T = Z~_a, independently per
//! pulsar, and
//!     SNR = sum_{a<b} c_ab x~_a . x~_b = z^T M z,   c_ab = G_ab / (sum G^2 tr_ab)^(1/2),
//! with M the symmetric block matrix M_ab = (c_ab / 2) L_a^T L_b (a != b), M_aa = 0. So the SNR
//! is a generalised chi-square sum_k lambda_k chi^2_1 over the eigenvalues of M, and its tail
//! probability follows from Imhof's (1961) inversion formula ([`crate::gchisq`]). Its mean is
//! tr M = 0 and its variance 2 tr M^2 = sum c_ab^2 tr(Z~_a Z~_b) = 1 (the cumulants
//! kappa_r = 2^(r-1) (r-1)! tr(M^r) of a Gaussian quadratic form; Imhof 1961, section 2):
//! the SNR has unit variance under the null.

use super::{DensityGrid, Prepared, Trial};
use crate::error::{Error, Result};
use crate::null::simulated::psd_root;
use ndarray::Array2;
use ndarray_linalg::{EigValsh, UPLO};
use rayon::prelude::*;

/// Points of the density grid written to null.json.
pub const DENSITY_POINTS: usize = 200;

/// The eigenvalues of M (non-zero ones: |lambda| above 1e-13 of the largest).
pub fn eigenvalues(p: &Prepared) -> Result<Vec<f64>> {
    let roots: Vec<Array2<f64>> = p
        .weighted
        .iter()
        .enumerate()
        .map(|(a, w)| {
            psd_root(&w.z, &format!("Z~ of pulsar {}", a + 1)).map(|v| {
                Array2::from_shape_vec((p.dim, p.dim), v).expect("square root has dim^2 entries")
            })
        })
        .collect::<Result<_>>()?;
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
    let vals = m.eigvalsh(UPLO::Lower).map_err(|_| Error::NonFinite {
        what: "the eigenvalues of the OS quadratic form".into(),
    })?;
    let top = vals.iter().fold(0.0f64, |s, v| s.max(v.abs()));
    Ok(vals
        .iter()
        .copied()
        .filter(|v| v.abs() > 1e-13 * top)
        .collect())
}

/// P(SNR >= x) under the analytic null.
pub fn upper_tail(eigenvalues: &[f64], x: f64) -> Result<f64> {
    Ok(Inversion::new(eigenvalues, x.abs())?.upper_tail(x))
}

/// The null density on [`DENSITY_POINTS`] points spanning the trial SNRs (and the observed
/// SNR when there are no trials), for re-plotting.
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
    let inv = Inversion::new(eigenvalues, lo.abs().max(hi.abs()))?;
    let density = snr.par_iter().map(|&x| inv.density(x)).collect();
    Ok(DensityGrid { snr, density })
}

/// Imhof's (1961) inversion on the real axis with quadrature nodes shared by every x up to
/// `x_max` (the integrand depends on x only through the phase -x u / 2):
///     P(Q > x) = 1/2 + (1/pi) int_0^U sin(theta(u)) / (u rho(u)) du,
///     f(x)     = (1/(2 pi)) int_0^U cos(theta(u)) / rho(u) du       (Gil-Pelaez 1951),
///     theta(u) = (1/2) sum atan(lambda_j u) - x u / 2,  rho(u) = prod (1 + lambda_j^2 u^2)^(1/4).
/// The truncation point U bounds the neglected tails below 1e-12 (Imhof's bound, section 3,
/// refined: for u >= U, rho(u) >= rho(U) 2^(-m/4) (u/U)^(m/2) with m the eigenvalues with
/// |lambda| U >= 1). Panels of 10-point Gauss-Legendre span at most one radian of phase or of
/// log-envelope change. Suited to the OS forms (hundreds of eigenvalues, where rho grows fast);
/// forms with fewer than 3 eigenvalues, or so few that U would exceed 1e7, are refused.
pub struct Inversion {
    scale: f64,
    u: Vec<f64>,
    w: Vec<f64>,
    theta0: Vec<f64>,
    inv_rho: Vec<f64>,
}

/// Gauss-Legendre nodes and weights on [-1, 1] by Newton's method on P_n (Golub & Welsch 1969
/// give the same nodes; Abramowitz & Stegun 1964, 25.4.29).
fn gauss_legendre(n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut x = vec![0.0; n];
    let mut w = vec![0.0; n];
    for i in 0..n {
        let mut z = (std::f64::consts::PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
        for _ in 0..100 {
            let (mut p1, mut p2) = (1.0, 0.0);
            for j in 0..n {
                let p3 = p2;
                p2 = p1;
                p1 = ((2 * j + 1) as f64 * z * p2 - j as f64 * p3) / (j + 1) as f64;
            }
            let pp = n as f64 * (z * p1 - p2) / (z * z - 1.0);
            let dz = p1 / pp;
            z -= dz;
            if dz.abs() < 1e-16 {
                let pp = {
                    let (mut p1, mut p2) = (1.0, 0.0);
                    for j in 0..n {
                        let p3 = p2;
                        p2 = p1;
                        p1 = ((2 * j + 1) as f64 * z * p2 - j as f64 * p3) / (j + 1) as f64;
                    }
                    n as f64 * (z * p1 - p2) / (z * z - 1.0)
                };
                w[i] = 2.0 / ((1.0 - z * z) * pp * pp);
                break;
            }
        }
        x[i] = z;
    }
    (x, w)
}

impl Inversion {
    /// Prepare the nodes for |x| <= `x_max`.
    pub fn new(eigenvalues: &[f64], x_max: f64) -> Result<Inversion> {
        let refuse = |m: &str| Error::NonFinite {
            what: format!("the generalised chi-square null ({m})"),
        };
        if eigenvalues.iter().any(|v| !v.is_finite()) || !x_max.is_finite() {
            return Err(refuse("non-finite eigenvalue or argument"));
        }
        let scale = eigenvalues.iter().fold(0.0f64, |s, v| s.max(v.abs()));
        let lam: Vec<f64> = eigenvalues
            .iter()
            .map(|v| v / scale)
            .filter(|v| *v != 0.0)
            .collect();
        if lam.len() < 3 {
            return Err(refuse("fewer than three non-zero eigenvalues"));
        }
        let xm = x_max / scale;
        let ln_eps = (1e-12f64).ln();
        let log_bound = |u: f64| {
            let m = lam.iter().filter(|l| l.abs() * u >= 1.0).count() as f64;
            if m < 3.0 {
                return f64::INFINITY;
            }
            let ln_rho: f64 = 0.25 * lam.iter().map(|l| (l * l * u * u).ln_1p()).sum::<f64>();
            let base = 0.25 * m * std::f64::consts::LN_2 - ln_rho;
            // Tail of the probability integral and of the density integral.
            (base + (2.0 / (std::f64::consts::PI * m)).ln())
                .max(base + u.ln() - (0.5 * m - 1.0).ln())
        };
        let mut big_u = 1.0;
        while log_bound(big_u) > ln_eps {
            big_u *= 1.5;
            if big_u > 1e7 {
                return Err(refuse("too few eigenvalues for the real-axis inversion"));
            }
        }
        let (gx, gw) = gauss_legendre(10);
        let (mut u, mut w) = (Vec::new(), Vec::new());
        let mut a = 0.0;
        while a < big_u {
            let mut rate = 0.5 * xm + 1.0 / (1.0 + a);
            for l in &lam {
                let q = 1.0 + l * l * a * a;
                rate += 0.5 * l.abs() / q + 0.5 * l * l * a / q;
            }
            let h = (1.0 / rate).min(big_u - a);
            for (x, wt) in gx.iter().zip(&gw) {
                u.push(a + 0.5 * h * (x + 1.0));
                w.push(0.5 * h * wt);
            }
            a += h;
            if u.len() > 20_000_000 {
                return Err(refuse("too many quadrature nodes"));
            }
        }
        let (theta0, inv_rho): (Vec<f64>, Vec<f64>) = u
            .par_iter()
            .map(|&ui| {
                let mut th = 0.0;
                let mut lr = 0.0;
                for l in &lam {
                    th += (l * ui).atan();
                    lr += (l * l * ui * ui).ln_1p();
                }
                (0.5 * th, (-0.25 * lr).exp())
            })
            .unzip();
        Ok(Inversion {
            scale,
            u,
            w,
            theta0,
            inv_rho,
        })
    }

    /// P(Q > x), clamped to [0, 1] (absolute accuracy about 1e-12).
    pub fn upper_tail(&self, x: f64) -> f64 {
        let xs = x / self.scale;
        let mut s = 0.0;
        for i in 0..self.u.len() {
            let ui = self.u[i];
            s += self.w[i] * (self.theta0[i] - 0.5 * xs * ui).sin() * self.inv_rho[i] / ui;
        }
        (0.5 + s / std::f64::consts::PI).clamp(0.0, 1.0)
    }

    /// The density f(x).
    pub fn density(&self, x: f64) -> f64 {
        let xs = x / self.scale;
        let mut s = 0.0;
        for i in 0..self.u.len() {
            s += self.w[i] * (self.theta0[i] - 0.5 * xs * self.u[i]).cos() * self.inv_rho[i];
        }
        (s / (2.0 * std::f64::consts::PI) / self.scale).max(0.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use statrs::distribution::{ChiSquared, Continuous, ContinuousCDF};

    #[test]
    fn equal_eigenvalues_give_a_scaled_chi_square() {
        // sum of m copies of lambda chi^2_1 = lambda chi^2_m (closed form), checked against
        // statrs's chi-square distribution.
        for (m, lambda) in [(12usize, 2.0f64), (10, 0.3), (30, 1.0), (16, -1.5)] {
            let e = vec![lambda; m];
            let chi = ChiSquared::new(m as f64).unwrap();
            let inv = Inversion::new(&e, 45.0 * lambda.abs()).unwrap();
            for q in [0.5, 1.0, 3.0, 8.0, 20.0, 45.0] {
                let x = lambda * q;
                let tail = inv.upper_tail(x);
                let expect = if lambda > 0.0 { chi.sf(q) } else { chi.cdf(q) };
                assert!(
                    (tail - expect).abs() < 1e-10,
                    "m={m} lambda={lambda} x={x}: {tail} vs {expect}"
                );
                let f = inv.density(x);
                let g = chi.pdf(q) / lambda.abs();
                assert!((f - g).abs() < 1e-10 + 1e-8 * g, "density {f} vs {g}");
            }
        }
    }

    #[test]
    fn mixed_signs_have_the_closed_form_moments() {
        // E Q = sum lambda, Var Q = 2 sum lambda^2 (Imhof 1961, section 2), from the density.
        let e: Vec<f64> = (0..40).map(|i| ((i as f64) * 0.37).sin()).collect();
        let mean: f64 = e.iter().sum();
        let var: f64 = 2.0 * e.iter().map(|v| v * v).sum::<f64>();
        let inv = Inversion::new(&e, 60.0).unwrap();
        let (lo, hi, n) = (mean - 12.0 * var.sqrt(), mean + 12.0 * var.sqrt(), 4000);
        let h = (hi - lo) / n as f64;
        let (mut m0, mut m1, mut m2) = (0.0, 0.0, 0.0);
        for i in 0..=n {
            let x = lo + h * i as f64;
            let wt = if i == 0 || i == n { 0.5 } else { 1.0 } * h;
            let f = inv.density(x);
            m0 += wt * f;
            m1 += wt * f * x;
            m2 += wt * f * x * x;
        }
        assert!((m0 - 1.0).abs() < 1e-6, "{m0}");
        assert!((m1 - mean).abs() < 1e-5, "{m1} vs {mean}");
        assert!(
            (m2 - m1 * m1 - var).abs() < 1e-4 * var,
            "{} vs {var}",
            m2 - m1 * m1
        );
        // The tail and the CDF from the density agree at the mean.
        let p = inv.upper_tail(mean);
        let below: f64 = (0..=2000)
            .map(|i| {
                let x = lo + (mean - lo) * i as f64 / 2000.0;
                let wt = if i == 0 || i == 2000 { 0.5 } else { 1.0 } * (mean - lo) / 2000.0;
                wt * inv.density(x)
            })
            .sum();
        assert!((p - (1.0 - below)).abs() < 1e-6, "{p} vs {}", 1.0 - below);
    }
}
