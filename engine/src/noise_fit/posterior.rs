//! The posterior of one pulsar's noise hyperparameters on an unconstrained parameterisation
//! (docs/noise-estimation.md).
//!
//! Every prior is uniform on [lo, hi]; each parameter is written theta = lo + (hi - lo) s(x)
//! with the logistic s(x) = 1 / (1 + e^-x), so x ranges over the real line. The density of x is
//! p(x) = L(theta(x)) pi(theta(x)) |d theta / d x| with |d theta / d x| = (hi - lo) s (1 - s)
//! (change of variables; Gelman et al. 2013, Bayesian Data Analysis, sec. 2.8), so
//! ln p(x) = ln L + sum_k [ln s_k + ln(1 - s_k)], the prior's 1/(hi - lo) cancelling the
//! Jacobian's (hi - lo).
//!
//! For sampling, a backend whose EFAC and log10 EQUAD are both free can be given the "ridge"
//! coordinates of [`Posterior::with_white_ridge`]: the data constrain mainly the total white
//! variance EFAC^2 sigma^2 + EQUAD^2 (exactly so when the backend's TOAs share one sigma), so in
//! (EFAC, log10 EQUAD) the posterior is a thin curved ridge that NUTS with a diagonal mass
//! matrix crosses only with tiny steps and many divergences (measured,
//! docs/noise-estimation.md "Speed"). With the backend's reference uncertainty s^2 (geometric
//! mean of its sigma_i^2), the coordinates are
//!
//! u = ln(EFAC^2 s^2 + EQUAD^2) on [u_lo, u_hi] (the range the prior rectangle allows), then
//! q = log10 EQUAD on [q_a(u), q_b(u)], the q for which EFAC = sqrt(e^u - 10^(2q)) / s stays in
//! its prior range,
//!
//! each through the logistic map, so the pair again ranges over R^2 and maps one to one onto the
//! prior rectangle. The density of (y1, y2) carries |d(EFAC, q) / d(y1, y2)| =
//! e^u / (2 s^2 EFAC) (u_hi - u_lo) s1 (1 - s1) (q_b - q_a) s2 (1 - s2) (a triangular Jacobian;
//! change of variables as above). The posterior itself is unchanged: only the coordinates the
//! sampler moves in.

use crate::error::{Error, Result};
use crate::likelihood::{FixedWhite, Hyper, PulsarLikelihood};
use crate::priors::{matches, PulsarPrior};
use std::f64::consts::LN_10;

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

/// A backend's (EFAC, log10 EQUAD) pair in ridge coordinates ([`Posterior::with_white_ridge`]).
#[derive(Clone, Copy, Debug)]
struct RidgePair {
    /// Positions of EFAC and log10 EQUAD among the free coordinates.
    efac: usize,
    equad: usize,
    /// The reference sigma^2 (s^2).
    s2: f64,
    /// EFAC and log10 EQUAD prior ranges.
    e_range: [f64; 2],
    q_range: [f64; 2],
}

/// One ridge pair at (y1, y2): the physical values, their derivatives, and ln of the
/// Jacobian determinant |d(EFAC, q) / d(y1, y2)| with its derivatives.
#[derive(Clone, Copy, Debug)]
struct RidgePoint {
    e: f64,
    q: f64,
    e_y1: f64,
    e_y2: f64,
    q_y1: f64,
    q_y2: f64,
    log_j: f64,
    log_j_y1: f64,
    log_j_y2: f64,
}

impl RidgePair {
    /// 10^(2 lo) etc.: the EFAC^2 s^2 bounds [A, B] and the EQUAD^2 bounds [Q_lo, Q_hi].
    fn corners(&self) -> (f64, f64, f64, f64) {
        let [el, eh] = self.e_range;
        let [ql, qh] = self.q_range;
        (
            el * el * self.s2,
            eh * eh * self.s2,
            10f64.powf(2.0 * ql),
            10f64.powf(2.0 * qh),
        )
    }

    /// [u_lo, u_hi].
    fn u_range(&self) -> [f64; 2] {
        let (a, b, ql, qh) = self.corners();
        [(a + ql).ln(), (b + qh).ln()]
    }

    /// q_a(u), q_b(u) and their derivatives in u: q_a = max(q_lo, log10(V - B) / 2),
    /// q_b = min(q_hi, log10(V - A) / 2), V = e^u; and 10^(2 q_b) - (the part of V it leaves):
    /// V - 10^(2 q_b), exact (A, or V - Q_hi).
    fn q_range_at(&self, u: f64) -> (f64, f64, f64, f64, f64, f64) {
        let (a, b, ql2, qh2) = self.corners();
        let v = u.exp();
        let (qa, qa_u) = if v - b > ql2 {
            (0.5 * (v - b).log10(), v / (2.0 * LN_10 * (v - b)))
        } else {
            (self.q_range[0], 0.0)
        };
        let (qb, qb_u, top, rest) = if v - a < qh2 {
            (0.5 * (v - a).log10(), v / (2.0 * LN_10 * (v - a)), v - a, a)
        } else {
            (self.q_range[1], 0.0, qh2, v - qh2)
        };
        (qa, qa_u, qb, qb_u, top, rest)
    }

    fn at(&self, y1: f64, y2: f64) -> RidgePoint {
        let [u_lo, u_hi] = self.u_range();
        let s1 = logistic(y1);
        let u = u_lo + (u_hi - u_lo) * s1;
        let u_y1 = (u_hi - u_lo) * s1 * logistic(-y1);
        let v = u.exp();
        let (qa, qa_u, qb, qb_u, top, rest) = self.q_range_at(u);
        let w = qb - qa;
        let (s2, t2) = (logistic(y2), logistic(-y2));
        // q = q_b - w (1 - s2), with 1 - s2 = logistic(-y2) (no cancellation near q_b).
        let q = qb - w * t2;
        let q_y2 = w * s2 * t2;
        let q_y1 = (qa_u + (qb_u - qa_u) * s2) * u_y1;
        // EFAC^2 s^2 = V - 10^(2q) = rest - top (10^(-2 w t2) - 1): the small difference near
        // q_b without cancellation.
        let equad2 = top * (-2.0 * LN_10 * w * t2).exp();
        let e2s2 = rest - top * (-2.0 * LN_10 * w * t2).exp_m1();
        let e = (e2s2 / self.s2).sqrt();
        // dEFAC/du at fixed q = V / (2 s^2 EFAC); dEFAC/dq at fixed u = -ln 10 EQUAD^2 / (s^2 EFAC).
        let e_u = v / (2.0 * self.s2 * e);
        let e_q = -LN_10 * equad2 / (self.s2 * e);
        let e_y1 = e_u * u_y1 + e_q * q_y1;
        let e_y2 = e_q * q_y2;
        // ln|J| = ln(V / (2 s^2 EFAC)) + ln u_y1 + ln q_y2, with
        // ln(s (1 - s)) = -softplus(-y) - softplus(y).
        let log_j = u - (2.0 * self.s2).ln() - e.ln() + (u_hi - u_lo).ln() + w.ln()
            - softplus(-y1)
            - softplus(y1)
            - softplus(-y2)
            - softplus(y2);
        let log_j_y1 = u_y1 - e_y1 / e + (qb_u - qa_u) / w * u_y1 + (1.0 - 2.0 * s1);
        let log_j_y2 = -e_y2 / e + (1.0 - 2.0 * s2);
        RidgePoint {
            e,
            q,
            e_y1,
            e_y2,
            q_y1,
            q_y2,
            log_j,
            log_j_y1,
            log_j_y2,
        }
    }

    /// (y1, y2) of (EFAC, q) strictly inside the prior rectangle.
    fn unconstrained(&self, e: f64, q: f64) -> (f64, f64) {
        let [u_lo, u_hi] = self.u_range();
        let u = (e * e * self.s2 + 10f64.powf(2.0 * q)).ln();
        let (qa, _, qb, _, _, _) = self.q_range_at(u);
        // A value on a prior edge (a MAP can sit there) maps to an infinite coordinate, and
        // rounding can put it a hair outside: clamp the fraction first, so the result is never
        // NaN (the caller clamps infinite starts).
        let logit = |s: f64| {
            let s = if s.is_nan() { 0.5 } else { s.clamp(0.0, 1.0) };
            (s / (1.0 - s)).ln()
        };
        (
            logit((u - u_lo) / (u_hi - u_lo)),
            logit((q - qa) / (qb - qa)),
        )
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
    /// Backends whose (EFAC, log10 EQUAD) use ridge coordinates.
    ridge: Vec<RidgePair>,
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
            ridge: Vec::new(),
        })
    }

    /// The same posterior in ridge coordinates (module documentation) for every backend whose
    /// EFAC and log10 EQUAD are both free: what the full posterior is sampled in.
    pub fn with_white_ridge(mut self) -> Self {
        let params = self.lik.parameters();
        let position = |kind: Hyper| self.free.iter().position(|&i| params[i].kind == kind);
        let mut ridge = Vec::new();
        for b in 0..self.lik.backend_count() {
            if let (Some(e), Some(q)) = (position(Hyper::Efac(b)), position(Hyper::Log10Equad(b))) {
                let s2 = self.lik.backend_reference_sigma2(b);
                if s2.is_finite() && s2 > 0.0 {
                    ridge.push(RidgePair {
                        efac: e,
                        equad: q,
                        s2,
                        e_range: self.bounds[e],
                        q_range: self.bounds[q],
                    });
                }
            }
        }
        self.ridge = ridge;
        self
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

    /// Number of backends whose EFAC and log10 EQUAD are sampled in ridge coordinates.
    pub fn ridge_pairs(&self) -> usize {
        self.ridge.len()
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
        for r in &self.ridge {
            let pt = r.at(x[r.efac], x[r.equad]);
            theta[self.free[r.efac]] = pt.e;
            theta[self.free[r.equad]] = pt.q;
        }
        theta
    }

    /// x of free values `values` (one per free hyperparameter, strictly inside the ranges).
    pub fn unconstrained(&self, values: &[f64]) -> Vec<f64> {
        let mut x: Vec<f64> = values
            .iter()
            .zip(&self.bounds)
            .map(|(&v, [lo, hi])| {
                let s = (v - lo) / (hi - lo);
                (s / (1.0 - s)).ln()
            })
            .collect();
        for r in &self.ridge {
            (x[r.efac], x[r.equad]) = r.unconstrained(values[r.efac], values[r.equad]);
        }
        x
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
            if self.ridge.iter().any(|r| r.efac == k || r.equad == k) {
                continue;
            }
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
        for r in &self.ridge {
            let pt = r.at(x[r.efac], x[r.equad]);
            let (ge, gq) = (g_theta[self.free[r.efac]], g_theta[self.free[r.equad]]);
            grad[r.efac] = ge * pt.e_y1 + gq * pt.q_y1;
            grad[r.equad] = ge * pt.e_y2 + gq * pt.q_y2;
            // The uniform prior density on the rectangle.
            value -= (r.e_range[1] - r.e_range[0]).ln() + (r.q_range[1] - r.q_range[0]).ln();
            if jacobian {
                value += pt.log_j;
                grad[r.efac] += pt.log_j_y1;
                grad[r.equad] += pt.log_j_y2;
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

    /// Ridge pairs as the benchmark's priors make them (EFAC in [0.01, 10], log10 EQUAD in
    /// [-9, -5], sigma 0.44 us) and one whose corners cut the u range (a narrow EFAC range and
    /// an EQUAD range reaching above sigma).
    fn pairs() -> Vec<RidgePair> {
        vec![
            RidgePair {
                efac: 0,
                equad: 1,
                s2: 0.44e-6f64.powi(2),
                e_range: [0.01, 10.0],
                q_range: [-9.0, -5.0],
            },
            RidgePair {
                efac: 0,
                equad: 1,
                s2: 1.0e-6f64.powi(2),
                e_range: [0.5, 2.0],
                q_range: [-7.0, -5.5],
            },
        ]
    }

    const POINTS: [(f64, f64); 6] = [
        (0.0, 0.0),
        (0.4, -1.3),
        (-2.5, 3.0),
        (3.1, 6.0),
        (-0.7, -4.0),
        (1.5, 9.0),
    ];

    /// The map is one to one onto the prior rectangle: (y1, y2) -> (EFAC, q) -> (y1, y2) again,
    /// and every image inside the ranges.
    #[test]
    fn ridge_coordinates_round_trip_inside_the_prior() {
        for r in pairs() {
            for (y1, y2) in POINTS {
                let p = r.at(y1, y2);
                assert!(p.e > r.e_range[0] && p.e < r.e_range[1], "{p:?}");
                assert!(p.q > r.q_range[0] && p.q < r.q_range[1], "{p:?}");
                let (z1, z2) = r.unconstrained(p.e, p.q);
                // Round trip to 1e-6 absolute: the inverse goes through ln and log10 of
                // variances near 1e-13 s^2 (about 1e-9 relative rounding, amplified by the
                // logit's slope of at most a few hundred at these points).
                assert!(
                    (z1 - y1).abs() < 1e-6 && (z2 - y2).abs() < 1e-6,
                    "{y1} {y2}: {z1} {z2}"
                );
            }
        }
    }

    /// Values on the prior's edges and corners (where a MAP can sit) give coordinates that are
    /// infinite or finite, never NaN.
    #[test]
    fn ridge_coordinates_of_prior_edges_are_not_nan() {
        for r in pairs() {
            for e in [r.e_range[0], r.e_range[1], 1.0] {
                for q in [r.q_range[0], r.q_range[1], -6.3] {
                    let (y1, y2) = r.unconstrained(e, q);
                    assert!(!y1.is_nan() && !y2.is_nan(), "({e}, {q}): ({y1}, {y2})");
                }
            }
        }
    }

    /// ln|det d(EFAC, q)/d(y1, y2)| and the derivatives of the map against central finite
    /// differences (the change-of-variables Jacobian, Gelman et al. 2013, sec. 2.8, computed
    /// independently as the determinant of the difference quotients). Step h = 1e-5: the
    /// truncation error of the central difference is O(h^2) ~ 1e-10 times the third
    /// derivative; 1e-6 relative leaves room for the rounding of the map (about 1e-12 / h).
    #[test]
    fn ridge_jacobian_matches_finite_differences() {
        let h = 1e-5;
        for r in pairs() {
            for (y1, y2) in POINTS {
                let p = r.at(y1, y2);
                let d = |dy1: f64, dy2: f64| {
                    let a = r.at(y1 + dy1, y2 + dy2);
                    let b = r.at(y1 - dy1, y2 - dy2);
                    ((a.e - b.e) / (2.0 * h), (a.q - b.q) / (2.0 * h))
                };
                let (e1, q1) = d(h, 0.0);
                let (e2, q2) = d(0.0, h);
                let close = |a: f64, b: f64, what: &str| {
                    assert!(
                        (a - b).abs() <= 1e-6 * a.abs().max(b.abs()).max(1e-12),
                        "{what} at ({y1}, {y2}): analytic {a}, finite difference {b}"
                    )
                };
                close(p.e_y1, e1, "dEFAC/dy1");
                close(p.e_y2, e2, "dEFAC/dy2");
                close(p.q_y1, q1, "dq/dy1");
                close(p.q_y2, q2, "dq/dy2");
                // Up to the constant prior density 1/((e_hi - e_lo)(q_hi - q_lo)).
                let det = (e1 * q2 - e2 * q1).abs();
                close(p.log_j, det.ln(), "ln |J|");
                let lj = |dy1: f64, dy2: f64| {
                    (r.at(y1 + dy1, y2 + dy2).log_j - r.at(y1 - dy1, y2 - dy2).log_j) / (2.0 * h)
                };
                close(p.log_j_y1, lj(h, 0.0), "d ln|J|/dy1");
                close(p.log_j_y2, lj(0.0, h), "d ln|J|/dy2");
            }
        }
    }

    /// The pushforward of the ridge density is the uniform prior: integrating |J| over a grid
    /// in (y1, y2) (midpoint rule, 1200^2 points on [-30, 30]^2, where the logistic tails
    /// leave less than 1e-20 of the mass) gives the rectangle's area (e_hi - e_lo)(q_hi - q_lo).
    /// The pushed-forward prior has steps in u where the rectangle's corners lie (u changes by
    /// about Q_lo / B across them), which the midpoint rule resolves only to O(step): 1.4e-3
    /// relative at this grid for the second pair (measured against 4000^2 points on [-40, 40]^2,
    /// which agree with the area to 1e-4), so the tolerance is 3e-3; a wrong factor in the
    /// Jacobian moves the integral by far more. The first pair's step (Q_lo / B ~ 1e-7) needs a
    /// far finer grid than a unit test affords; its Jacobian is checked pointwise above.
    #[test]
    fn ridge_jacobian_integrates_to_the_prior_area() {
        for r in &pairs()[1..] {
            let (n, lim) = (1200usize, 30.0f64);
            let step = 2.0 * lim / n as f64;
            let mut sum = 0.0;
            for i in 0..n {
                for j in 0..n {
                    let y1 = -lim + (i as f64 + 0.5) * step;
                    let y2 = -lim + (j as f64 + 0.5) * step;
                    sum += r.at(y1, y2).log_j.exp();
                }
            }
            let area = (r.e_range[1] - r.e_range[0]) * (r.q_range[1] - r.q_range[0]);
            let got = sum * step * step;
            assert!((got / area - 1.0).abs() < 3e-3, "{got} vs {area}");
        }
    }
}
