//! The posterior of one pulsar's noise hyperparameters on an unconstrained parameterisation
//! (docs/noise-estimation.md).
//!
//! Every prior is uniform on [lo, hi]; each parameter is written theta = lo + (hi - lo) s(x)
//! with the logistic s(x) = 1 / (1 + e^-x), so x ranges over the real line. The density of x is
//! p(x) = L(theta(x)) pi(theta(x)) |d theta / d x| with |d theta / d x| = (hi - lo) s (1 - s)
//! (change of variables; Gelman et al. 2013, Bayesian Data Analysis, sec. 2.8), so
//! ln p(x) = ln L + sum_k [ln s_k + ln(1 - s_k)], the prior's 1/(hi - lo) cancelling the
//! Jacobian's (hi - lo).

use crate::error::{Error, Result};
use crate::likelihood::{FixedWhite, PulsarLikelihood};
use crate::priors::{matches, PulsarPrior};

/// ln(1 + e^x) without overflow.
fn softplus(x: f64) -> f64 {
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

/// The logistic function 1 / (1 + e^-x), stable for both signs.
fn logistic(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

/// The posterior of one pulsar over its free hyperparameters; others held at fixed values.
pub struct Posterior<'a> {
    lik: &'a PulsarLikelihood,
    /// Indices of the free hyperparameters in the likelihood's parameter vector.
    free: Vec<usize>,
    /// Prior range of each free hyperparameter.
    bounds: Vec<[f64; 2]>,
    /// The full parameter vector; the free entries are overwritten at each evaluation.
    base: Vec<f64>,
    /// With the white noise held: its precomputed products (the fast path).
    fixed_white: Option<FixedWhite<'a>>,
}

impl<'a> Posterior<'a> {
    /// All hyperparameters free.
    pub fn new(lik: &'a PulsarLikelihood, prior: &PulsarPrior) -> Result<Self> {
        Self::with_fixed(lik, prior, &[])
    }

    /// Hyperparameters listed in `fixed` (index in the likelihood, value) held; the rest free.
    pub fn with_fixed(
        lik: &'a PulsarLikelihood,
        prior: &PulsarPrior,
        fixed: &[(usize, f64)],
    ) -> Result<Self> {
        if !matches(lik, prior) {
            return Err(Error::setting(
                "priors",
                format!(
                    "pulsar {}: the prior does not match the likelihood's parameters",
                    lik.label()
                ),
            ));
        }
        let mut base: Vec<f64> = prior
            .bounds
            .iter()
            .map(|[lo, hi]| 0.5 * (lo + hi))
            .collect();
        for &(i, v) in fixed {
            base[i] = v;
        }
        let free: Vec<usize> = (0..lik.dim())
            .filter(|i| !fixed.iter().any(|(j, _)| j == i))
            .collect();
        let bounds = free.iter().map(|&i| prior.bounds[i]).collect();
        Ok(Posterior {
            lik,
            free,
            bounds,
            base,
            fixed_white: None,
        })
    }

    /// The white-noise hyperparameters held at their values in `theta` (e.g. the MAP), the
    /// others free; evaluations use [`FixedWhite`]'s precomputed white-noise products.
    pub fn with_fixed_white(
        lik: &'a PulsarLikelihood,
        prior: &PulsarPrior,
        theta: &[f64],
    ) -> Result<Self> {
        let fw = lik.fixed_white(theta)?;
        let mut post = Self::with_fixed(lik, prior, fw.white())?;
        post.fixed_white = Some(fw);
        Ok(post)
    }

    /// Number of free hyperparameters.
    pub fn dim(&self) -> usize {
        self.free.len()
    }

    /// The likelihood.
    pub fn likelihood(&self) -> &PulsarLikelihood {
        self.lik
    }

    /// Indices of the free hyperparameters in the likelihood's parameter vector.
    pub fn free(&self) -> &[usize] {
        &self.free
    }

    /// Prior ranges of the free hyperparameters.
    pub fn bounds(&self) -> &[[f64; 2]] {
        &self.bounds
    }

    /// The full parameter vector theta(x).
    pub fn theta(&self, x: &[f64]) -> Vec<f64> {
        let mut theta = self.base.clone();
        for ((&i, &xi), [lo, hi]) in self.free.iter().zip(x).zip(&self.bounds) {
            theta[i] = lo + (hi - lo) * logistic(xi);
        }
        theta
    }

    /// x of free values `values` (one per free hyperparameter, strictly inside the ranges).
    pub fn unconstrained(&self, values: &[f64]) -> Vec<f64> {
        values
            .iter()
            .zip(&self.bounds)
            .map(|(&v, [lo, hi])| {
                let s = (v - lo) / (hi - lo);
                (s / (1.0 - s)).ln()
            })
            .collect()
    }

    /// ln p(x) and its gradient (with the Jacobian): the density a sampler explores.
    pub fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        self.evaluate(x, grad, true)
    }

    /// ln L(theta(x)) + ln pi(theta(x)) and its gradient in x (no Jacobian): its maximum is the
    /// posterior mode in theta.
    pub fn log_posterior_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        self.evaluate(x, grad, false)
    }

    fn evaluate(&self, x: &[f64], grad: &mut [f64], jacobian: bool) -> Result<f64> {
        if x.len() != self.dim() || grad.len() != self.dim() {
            return Err(Error::setting(
                "parameters",
                format!(
                    "pulsar {}: expected {} unconstrained parameters",
                    self.lik.label(),
                    self.dim()
                ),
            ));
        }
        let theta = self.theta(x);
        let mut g_theta = vec![0.0; theta.len()];
        let mut value = match &self.fixed_white {
            Some(fw) => fw.log_likelihood_and_gradient(&theta, &mut g_theta)?,
            None => self.lik.log_likelihood_and_gradient(&theta, &mut g_theta)?,
        };
        for (k, ((&i, &xk), [lo, hi])) in self.free.iter().zip(x).zip(&self.bounds).enumerate() {
            let s = logistic(xk);
            grad[k] = g_theta[i] * (hi - lo) * s * (1.0 - s);
            if jacobian {
                // ln s + ln(1 - s) = -softplus(-x) - softplus(x); derivative 1 - 2 s.
                value += -softplus(-xk) - softplus(xk);
                grad[k] += 1.0 - 2.0 * s;
            } else {
                value -= (hi - lo).ln();
            }
        }
        Ok(value)
    }
}

impl crate::sampler::LogDensity for Posterior<'_> {
    fn dim(&self) -> usize {
        self.free.len()
    }

    fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        self.evaluate(x, grad, true)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn logistic_pieces_agree_with_their_definitions() {
        for x in [-40.0f64, -3.0, 0.0, 0.7, 25.0] {
            let s: f64 = 1.0 / (1.0 + (-x).exp());
            assert!((logistic(x) - s).abs() <= 1e-15 * s.max(1e-300), "{x}");
            // ln(s) + ln(1 - s) = -softplus(-x) - softplus(x) (definition of softplus).
            let direct = s.ln() + (1.0 - s).ln();
            if x.abs() < 20.0 {
                assert!((direct + softplus(-x) + softplus(x)).abs() < 1e-12, "{x}");
            }
        }
    }
}
