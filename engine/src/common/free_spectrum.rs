//! The free spectrum of the common process (docs/common-process.md, "Free spectrum"): an
//! independent power rho_j (s^2, the variance of each of the sin and cos coefficients) at each of
//! the K analysis frequencies, uncorrelated between pulsars (CURN) or with a correlation
//! pattern (HD, monopole, dipole), and the log density and its analytic gradient for a
//! gradient-based sampler.
//!
//! With the common prior Phi_c = Gamma (x) diag(rho) = H H^T, H = R (x) E, R R^T = Gamma and
//! E = diag(rho)^(1/2) (each rho_j on the sin and the cos column), the Woodbury identity gives
//! (van Haasteren & Vallisneri 2014, eqs. 22-27), exactly as for the power law,
//!
//! ln L(rho) - ln L(0) = 1/2 t^T Q^-1 t - 1/2 ln det Q,
//! Q = I + E' M0 E',  t = E' t0,  M0 = (R^T (x) I) Z (R (x) I),  t0 = (R^T (x) I) X,
//!
//! with E' = I_r (x) E. Q >= I is well conditioned whatever rho is, so one Cholesky factor of Q
//! gives the value. For the gradient, with s_i = ln of the prior variance of column i and
//! v = Q^-1 t, the derivative of E' by s_i is E' P_i / 2 (P_i the projector on column i of every
//! block), so (Petersen & Pedersen 2012, eqs. 38 and 61: d ln det Q = tr(Q^-1 dQ),
//! d Q^-1 = -Q^-1 dQ Q^-1)
//!
//! d/ds_i [ln L] = 1/2 [v_i^2 + (Q^-1)_ii - 1],
//!
//! summed over the blocks and the sin and cos columns of frequency j, and d s / d log10 rho_j =
//! ln 10. For CURN every block is one pulsar (r = N blocks of size 2K, R = I): the cost is
//! N (2K)^3 / 3; for a correlated pattern it is (r 2K)^3 / 3 per evaluation.

use super::likelihood::{pattern_root, CommonData, CommonModel};
use crate::error::{Error, Result};
use crate::linalg::single_threaded_blas;
use crate::orf::pattern_matrix;
use ndarray::{Array1, Array2};
use ndarray_linalg::{Cholesky, Diag, SolveTriangular, UPLO};
use rayon::prelude::*;

/// Default prior range of log10 rho_j (rho in s^2): from far below the white-noise floor of any
/// timing array to far above the loudest expected common process (a power law of A = 1e-14,
/// gamma = 13/3 over 13 years has log10 rho_1 = -11.4 and log10 rho_14 = -16.3).
pub const DEFAULT_LOG10_POWER_RANGE: [f64; 2] = [-20.0, -8.0];

/// The free-spectrum likelihood of one correlation model on the reduced data.
#[derive(Clone, Debug)]
pub struct FreeSpectrum {
    pub model: CommonModel,
    /// Number of frequencies K.
    pub k: usize,
    /// Independent blocks (M0, t0): one per pulsar for CURN, one for a correlated pattern.
    blocks: Vec<(Array2<f64>, Array1<f64>)>,
}

impl FreeSpectrum {
    /// Precompute M0 and t0 of `model` (no work depends on rho).
    pub fn new(data: &CommonData, model: CommonModel) -> Result<Self> {
        single_threaded_blas();
        let k = data.k();
        let blocks = match model.pattern() {
            None => data
                .z
                .iter()
                .zip(&data.x)
                .map(|(z, x)| (z.clone(), x.clone()))
                .collect(),
            Some(p) => {
                let n = data.n_pulsars();
                let r = pattern_root(&pattern_matrix(p, &data.directions), n)?;
                let rank = r.ncols();
                let m2 = 2 * k;
                let dim = rank * m2;
                // M0[(c, i), (d, j)] = sum_a R_ac R_ad Z_a[i, j]; t0[(c, i)] = sum_a R_ac X_a[i].
                let mut m0 = Array2::<f64>::zeros((dim, dim));
                let mut t0 = Array1::<f64>::zeros(dim);
                for a in 0..n {
                    for c in 0..rank {
                        let rac = r[[a, c]];
                        for i in 0..m2 {
                            t0[c * m2 + i] += rac * data.x[a][i];
                        }
                        for d in 0..rank {
                            let w = rac * r[[a, d]];
                            if w == 0.0 {
                                continue;
                            }
                            let mut blk = m0
                                .slice_mut(ndarray::s![c * m2..(c + 1) * m2, d * m2..(d + 1) * m2]);
                            blk.scaled_add(w, &data.z[a]);
                        }
                    }
                }
                vec![(m0, t0)]
            }
        };
        Ok(FreeSpectrum { model, k, blocks })
    }

    /// The size of the largest block factored per gradient.
    pub fn largest_block(&self) -> usize {
        self.blocks
            .iter()
            .map(|(m, _)| m.nrows())
            .max()
            .unwrap_or(0)
    }

    /// The number of independent blocks (pulsars for CURN, one for a pattern).
    pub fn n_blocks(&self) -> usize {
        self.blocks.len()
    }

    /// ln L(rho) - ln L(0) and its gradient in log10 rho_j, j = 1..K (`log10_rho[j - 1]`).
    pub fn log_likelihood(&self, log10_rho: &[f64]) -> Result<(f64, Vec<f64>)> {
        if log10_rho.len() != self.k {
            return Err(Error::setting(
                "free spectrum",
                format!("expected {} powers, got {}", self.k, log10_rho.len()),
            ));
        }
        if let Some(v) = log10_rho.iter().find(|v| !v.is_finite()) {
            return Err(Error::NonFinite {
                what: format!("a free-spectrum power (log10 rho = {v})"),
            });
        }
        // E per column: sqrt(rho_j) on the sin and cos columns of frequency j.
        let e: Vec<f64> = (0..2 * self.k)
            .map(|i| 10f64.powf(0.5 * log10_rho[i / 2]))
            .collect();
        let parts: Vec<(f64, Vec<f64>)> = self
            .blocks
            .par_iter()
            .map(|(m0, t0)| block_value_and_gradient(m0, t0, &e, self.k))
            .collect::<Result<_>>()?;
        let mut value = 0.0;
        let mut grad = vec![0.0; self.k];
        for (v, g) in parts {
            value += v;
            for (a, b) in grad.iter_mut().zip(g) {
                *a += b;
            }
        }
        if !value.is_finite() || grad.iter().any(|g| !g.is_finite()) {
            return Err(Error::NonFinite {
                what: format!("the {} free-spectrum likelihood", self.model.name()),
            });
        }
        Ok((value, grad))
    }
}

/// One block: value and gradient in log10 rho (K entries; `e` holds the 2K prior standard
/// deviations of one block, repeated per block). Shared with the joint red-noise fit
/// (`joint.rs`), where the block is one pulsar.
pub(crate) fn block_value_and_gradient(
    m0: &Array2<f64>,
    t0: &Array1<f64>,
    e: &[f64],
    k: usize,
) -> Result<(f64, Vec<f64>)> {
    let dim = m0.nrows();
    let m2 = 2 * k;
    let ei = |i: usize| e[i % m2];
    let q = Array2::from_shape_fn((dim, dim), |(i, j)| {
        ei(i) * m0[[i, j]] * ei(j) + if i == j { 1.0 } else { 0.0 }
    });
    let t = Array1::from_shape_fn(dim, |i| ei(i) * t0[i]);
    let l = q
        .cholesky(UPLO::Lower)
        .map_err(|_| Error::NotPositiveDefinite {
            what: "I + E M0 E of the free spectrum (Z_a must be positive semi-definite)".into(),
            pivot: 0,
        })?;
    // L^-1 (dim x dim) gives diag(Q^-1)_i = sum_k (L^-1)_ki^2 and v = L^-T L^-1 t.
    let linv = l
        .solve_triangular(UPLO::Lower, Diag::NonUnit, &Array2::eye(dim))
        .map_err(|_| Error::NonFinite {
            what: "the triangular inverse of the free-spectrum factor".into(),
        })?;
    let y = linv.dot(&t);
    let v = linv.t().dot(&y);
    let logdet: f64 = l.diag().iter().map(|d| 2.0 * d.ln()).sum();
    let value = 0.5 * y.dot(&y) - 0.5 * logdet;
    let mut grad = vec![0.0; k];
    for i in 0..dim {
        let col = linv.column(i);
        let qinv_ii = col.dot(&col);
        grad[(i % m2) / 2] += 0.5 * (v[i] * v[i] + qinv_ii - 1.0) * std::f64::consts::LN_10;
    }
    Ok((value, grad))
}

/// The free-spectrum posterior on an unconstrained scale: log10 rho_j = lo + (hi - lo)
/// sigma(y_j) with the logistic sigma, uniform prior in log10 rho_j on [lo, hi]. The density in
/// y includes the Jacobian ln(hi - lo) + ln sigma(y) + ln(1 - sigma(y)) (the change of
/// variables, e.g. Gelman et al. 2013, sec. 1.8), so a sampler on R^K draws from it directly.
#[derive(Clone, Debug)]
pub struct FreeSpectrumPosterior {
    pub likelihood: FreeSpectrum,
    pub lo: f64,
    pub hi: f64,
}

impl FreeSpectrumPosterior {
    /// Check the prior range before any work.
    pub fn new(likelihood: FreeSpectrum, lo: f64, hi: f64) -> Result<Self> {
        if !(lo.is_finite()
            && hi.is_finite()
            && lo < hi
            && (-40.0..=0.0).contains(&lo)
            && (-40.0..=0.0).contains(&hi))
        {
            return Err(Error::setting(
                "log10-power-range",
                format!(
                    "the prior range [{lo}, {hi}] of log10 rho (s^2) holds no mass or leaves \
                     [-40, 0]: give -40 <= LO < HI <= 0 (default {},{})",
                    DEFAULT_LOG10_POWER_RANGE[0], DEFAULT_LOG10_POWER_RANGE[1]
                ),
            ));
        }
        Ok(FreeSpectrumPosterior { likelihood, lo, hi })
    }

    /// log10 rho from the unconstrained y.
    pub fn to_log10_rho(&self, y: &[f64]) -> Vec<f64> {
        y.iter()
            .map(|&v| self.lo + (self.hi - self.lo) * logistic(v))
            .collect()
    }

    /// ln p(y | data) up to a constant, and its gradient in y.
    pub fn log_density(&self, y: &[f64]) -> Result<(f64, Vec<f64>)> {
        let u = self.to_log10_rho(y);
        let (ll, g) = self.likelihood.log_likelihood(&u)?;
        let w = self.hi - self.lo;
        let mut value = ll;
        let mut grad = Vec::with_capacity(y.len());
        for (i, &v) in y.iter().enumerate() {
            let s = logistic(v);
            // ln sigma(y) + ln(1 - sigma(y)) = -softplus(-y) - softplus(y).
            value += w.ln() - softplus(-v) - softplus(v);
            grad.push(g[i] * w * s * (1.0 - s) + (1.0 - 2.0 * s));
        }
        Ok((value, grad))
    }
}

pub(crate) fn logistic(y: f64) -> f64 {
    if y >= 0.0 {
        1.0 / (1.0 + (-y).exp())
    } else {
        let e = y.exp();
        e / (1.0 + e)
    }
}

/// ln(1 + e^y) without overflow.
pub(crate) fn softplus(y: f64) -> f64 {
    if y > 30.0 {
        y + (-y).exp()
    } else {
        y.exp().ln_1p()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spectrum::frequencies;

    /// A small fictional array of 3 pulsars, K = 3.
    fn data() -> CommonData {
        let k = 3;
        let m = 2 * k;
        let t_span = 10.0 * 365.25 * 86400.0;
        let mut x = Vec::new();
        let mut z = Vec::new();
        for a in 0..3 {
            let b = Array2::from_shape_fn((m, m), |(i, j)| {
                (((a * 5 + i * 7 + j * 3) % 11) as f64 / 11.0 - 0.4) * 1e6
            });
            z.push(b.dot(&b.t()) + Array2::<f64>::eye(m) * 3e11);
            x.push(Array1::from_shape_fn(m, |i| {
                (((a * 13 + i * 3) % 7) as f64 / 7.0 - 0.5) * 3e5
            }));
        }
        CommonData {
            labels: vec!["Q1".into(), "Q2".into(), "Q3".into()],
            directions: vec![[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.6, 0.0, 0.8]],
            x,
            z,
            freqs: frequencies(k, t_span),
            t_span,
        }
    }

    #[test]
    fn gradient_matches_central_differences_for_every_model() {
        let d = data();
        let u = [-12.3, -13.1, -13.9];
        for model in CommonModel::ALL {
            let fs = FreeSpectrum::new(&d, model).unwrap();
            let (_, g) = fs.log_likelihood(&u).unwrap();
            let post = FreeSpectrumPosterior::new(fs.clone(), -20.0, -8.0).unwrap();
            let y = [0.3, -0.7, 1.1];
            let (_, gy) = post.log_density(&y).unwrap();
            for j in 0..3 {
                let h = 1e-5;
                let mut up = u;
                let mut dn = u;
                up[j] += h;
                dn[j] -= h;
                let fd = (fs.log_likelihood(&up).unwrap().0 - fs.log_likelihood(&dn).unwrap().0)
                    / (2.0 * h);
                assert!(
                    (fd - g[j]).abs() < 1e-6 * fd.abs().max(1.0),
                    "{} j {j}: analytic {} fd {fd}",
                    model.name(),
                    g[j]
                );
                let (mut yp, mut ym) = (y, y);
                yp[j] += h;
                ym[j] -= h;
                let fdy = (post.log_density(&yp).unwrap().0 - post.log_density(&ym).unwrap().0)
                    / (2.0 * h);
                assert!((fdy - gy[j]).abs() < 1e-6 * fdy.abs().max(1.0));
            }
            // Not vacuous: the gradient is not zero here.
            assert!(g.iter().any(|v| v.abs() > 1e-2), "{g:?}");
        }
    }

    #[test]
    fn a_power_law_spectrum_gives_the_power_law_likelihood() {
        let d = data();
        for model in CommonModel::ALL {
            let fs = FreeSpectrum::new(&d, model).unwrap();
            for (la, gamma) in [(-14.0, 13.0 / 3.0), (-13.2, 2.5)] {
                let phi0 = d.phi0(gamma);
                let u: Vec<f64> = (0..3).map(|j| 2.0 * la + phi0[2 * j].log10()).collect();
                let got = fs.log_likelihood(&u).unwrap().0;
                let want = d.amplitude_curve(model, gamma).unwrap().at_log10(la);
                assert!(
                    (got - want).abs() < 1e-9 * want.abs().max(1.0),
                    "{}: {got} vs {want}",
                    model.name()
                );
            }
        }
    }

    #[test]
    fn an_empty_power_range_is_refused() {
        let fs = FreeSpectrum::new(&data(), CommonModel::Curn).unwrap();
        let e = FreeSpectrumPosterior::new(fs, -10.0, -10.0).unwrap_err();
        assert!(e.to_string().contains("log10-power-range"));
    }
}
