//! The maximum a posteriori noise model of one pulsar: L-BFGS (Nocedal & Wright 2006, Numerical
//! Optimization, sec. 7.2; the `argmin` crate's implementation with a More-Thuente line search)
//! on the unconstrained parameterisation of [`Posterior`], from several seeded starting points.
//!
//! Convergence is judged by the scaled gradient max_k |g_k| max(|x_k|, 1) of ln p at the best
//! point of the run, whatever made the optimiser stop: Dennis & Schnabel's relative gradient
//! (1983, Numerical Methods for Unconstrained Optimization and Nonlinear Equations, sec. 7.2, as
//! recalled from memory) with the scale of the function set to 1, the unit in which differences
//! of a ln posterior matter (a difference of 1 is a factor e in density). Dividing by |ln p|, as
//! the relative gradient does, is wrong here: ln L ~ 3e4 for 2,400 TOAs is almost all the
//! constant -sum ln sigma_i - (n/2) ln 2 pi, which depends on the unit of the uncertainties
//! (about 13.8 per TOA for sigma ~ 1 us in seconds), so the tolerance would have been 3e4 times
//! too loose and runs stopped with gradients of 1e-2 far from the optimum (measured,
//! docs/noise-estimation.md). The tolerance, 1e-3, bounds the ln p still to gain: for a ln p
//! concave between the point x and the optimum x*, ln p(x*) - ln p(x) <= g . (x* - x) (the
//! first-order condition of concavity; Boyd & Vandenberghe 2004, Convex Optimization, eq. 3.2),
//! at most 1e-3 sum_k |x*_k - x_k| / max(|x_k|, 1), below the 0.1 of the agreement test for
//! any optimum within ~10 units per coordinate in 10 parameters. It is above the floor that
//! round-off in ln p leaves the line search (measured up to 4e-4 at ln p ~ 3e4, where f changes
//! by less than 4 eps |f| per step).

use super::posterior::Posterior;
use crate::error::{Error, Result};
use crate::rng::{stream, Purpose};
use argmin::core::{CostFunction, Executor, Gradient, State};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::quasinewton::LBFGS;
use rand::Rng;
use serde::Serialize;

/// Settings of the MAP search.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct MapSettings {
    /// Number of starting points (each an independent L-BFGS run).
    pub starts: usize,
    /// Iteration limit of each run.
    pub max_iterations: u64,
    /// Converged when the scaled gradient (module documentation) is below this.
    pub gradient_tolerance: f64,
    /// Two runs "agree" when their ln posterior differs by less than this.
    pub agreement: f64,
}

impl Default for MapSettings {
    fn default() -> Self {
        MapSettings {
            starts: 4,
            max_iterations: 500,
            // Module documentation: the first-order bound on the ln p still to gain.
            gradient_tolerance: 1e-3,
            agreement: 0.1,
        }
    }
}

/// One L-BFGS run.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct MapRun {
    /// Free values at the start.
    pub start: Vec<f64>,
    /// Free values at the end (the start if the run failed).
    pub values: Vec<f64>,
    /// ln L + ln prior at the end (-inf if the run failed).
    pub log_posterior: f64,
    pub iterations: u64,
    /// The scaled gradient at the end (module documentation); infinite if the run failed.
    pub scaled_gradient: f64,
    /// The scaled gradient at the end is below the tolerance: a local maximum.
    pub converged: bool,
    /// Why it stopped, or the error that ended it.
    pub reason: String,
}

/// The MAP of one pulsar.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct MapResult {
    /// Index of the best run.
    pub best: usize,
    pub runs: Vec<MapRun>,
    /// Free values at the best run's end.
    pub values: Vec<f64>,
    pub log_posterior: f64,
    /// The best run converged (its end is a local maximum to the tolerance) and at least one
    /// other run reached the same ln posterior (within `agreement`), or there was one start.
    pub converged: bool,
    /// Number of runs whose ln posterior is within `agreement` of the best.
    pub agreeing_runs: usize,
}

impl MapResult {
    /// The warning about this search, if any (`converged` false): the best run stopped short
    /// of a maximum (its scaled gradient above the tolerance), or it reached a maximum that no
    /// other start confirmed, the others ending lower (at another mode, or on a plateau where
    /// the data no longer constrain a parameter, such as a red-noise amplitude far below the
    /// white noise). Starts that end lower while two or more agree on the best are not warned
    /// about: the best is kept, and `map_agreeing_starts` in diagnostics.csv counts them.
    pub fn warning(&self, label: &str) -> Option<String> {
        let best = &self.runs[self.best];
        let n = self.runs.len();
        if !best.converged {
            return Some(format!(
                "pulsar {label}: the MAP search did not converge: the best of {n} starts stopped ({}) after {} iterations with scaled gradient {:.1e}, above the tolerance; its values may be short of the maximum ({} of {n} starts agree in ln posterior)",
                best.reason, best.iterations, best.scaled_gradient, self.agreeing_runs
            ));
        }
        if self.converged {
            return None;
        }
        let (maxima, short): (Vec<&MapRun>, Vec<&MapRun>) = self
            .runs
            .iter()
            .enumerate()
            .filter(|&(i, _)| i != self.best)
            .map(|(_, r)| r)
            .partition(|r| r.converged);
        let below = |rs: &[&MapRun]| {
            rs.iter()
                .map(|r| self.log_posterior - r.log_posterior)
                .fold(0.0, f64::max)
        };
        Some(format!(
            "pulsar {label}: the MAP is a maximum that only 1 of {n} starts reached; {} others ended at other maxima or plateaus (up to {:.2} below in ln posterior) and {} stopped short of one; the best is kept, but the posterior has more than one mode or flat regions and a higher mode may have been missed (try more --starts)",
            maxima.len(),
            below(&maxima),
            short.len()
        ))
    }
}

/// The optimisation problem: minus the log posterior times `scale` (the bounded first step of
/// [`run_from`]). argmin asks for the cost and the gradient separately, usually at the same point
/// one after the other; one evaluation gives both, so the last point's value and gradient are
/// kept and a second request at it costs nothing.
struct Problem<'p, 'a> {
    post: &'p Posterior<'a>,
    scale: f64,
    last: std::sync::Mutex<Option<Evaluated>>,
}

/// A point and minus the scaled log posterior and its gradient there.
type Evaluated = (Vec<f64>, f64, Vec<f64>);

impl Problem<'_, '_> {
    fn evaluate(&self, x: &[f64]) -> std::result::Result<(f64, Vec<f64>), argmin::core::Error> {
        let mut last = self.last.lock().unwrap_or_else(|e| e.into_inner());
        if let Some((p, f, g)) = last.as_ref() {
            if p.as_slice() == x {
                return Ok((*f, g.clone()));
            }
        }
        let mut g = vec![0.0; x.len()];
        let f = -self.scale * self.post.log_posterior_and_gradient(x, &mut g)?;
        g.iter_mut().for_each(|v| *v *= -self.scale);
        *last = Some((x.to_vec(), f, g.clone()));
        Ok((f, g))
    }
}

impl CostFunction for Problem<'_, '_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, x: &Vec<f64>) -> std::result::Result<f64, argmin::core::Error> {
        Ok(self.evaluate(x)?.0)
    }
}

impl Gradient for Problem<'_, '_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, x: &Vec<f64>) -> std::result::Result<Vec<f64>, argmin::core::Error> {
        Ok(self.evaluate(x)?.1)
    }
}

/// The scaled gradient max_k |g_k| max(|x_k|, 1) (module documentation): Dennis & Schnabel's
/// relative gradient (1983, sec. 7.2, as recalled) with the scale of f set to 1, so it is free of
/// the additive constant of ln L (which depends on the unit of the uncertainties).
pub fn scaled_gradient(x: &[f64], g: &[f64]) -> f64 {
    x.iter()
        .zip(g)
        .map(|(xk, gk)| gk.abs() * xk.abs().max(1.0))
        .fold(0.0, f64::max)
}

/// Starting points: uniform over the central 80 % of each prior range (in theta), drawn from
/// `rng::stream(seed, NoiseStart, pulsar_index)` so they depend on (seed, pulsar) alone.
pub fn starting_points(post: &Posterior, n: usize, seed: u64, pulsar_index: u64) -> Vec<Vec<f64>> {
    let mut rng = stream(seed, Purpose::NoiseStart, pulsar_index);
    (0..n)
        .map(|_| {
            post.bounds()
                .iter()
                .map(|[lo, hi]| lo + (hi - lo) * rng.random_range(0.1..0.9))
                .collect()
        })
        .collect()
}

/// One L-BFGS run from free values `start`.
pub fn run_from(post: &Posterior, start: &[f64], settings: &MapSettings) -> MapRun {
    let x0 = post.unconstrained(start);
    let failed = |reason: String| MapRun {
        start: start.to_vec(),
        values: start.to_vec(),
        log_posterior: f64::NEG_INFINITY,
        iterations: 0,
        scaled_gradient: f64::INFINITY,
        converged: false,
        reason,
    };
    // The first step: with no curvature pairs yet, L-BFGS steps along the gradient itself
    // (unit initial inverse Hessian, unit trial step), which at a start far from the optimum
    // is ~1e3-1e4 in x; the logistic map saturates there (its derivative e^-|x| underflows),
    // the gradient in x vanishes, the Wolfe curvature condition holds trivially and the run
    // stops at a prior corner hundreds to thousands below the optimum in ln p (measured,
    // docs/noise-estimation.md). Minus ln p is therefore scaled by 1 / max(1, max_k |g_k|) at
    // the start, so the first trial step moves no coordinate by more than 1; the later steps
    // are unchanged, since L-BFGS scales its inverse Hessian by s.y / y.y (Nocedal & Wright
    // 2006, eq. 7.20), which does not depend on a constant factor of f.
    let mut g0 = vec![0.0; x0.len()];
    let f0 = match post.log_posterior_and_gradient(&x0, &mut g0) {
        Ok(f) => f,
        Err(e) => return failed(e.to_string()),
    };
    let scale = 1.0 / g0.iter().fold(1.0, |m: f64, v| m.max(v.abs()));
    if !scale.is_finite() || !f0.is_finite() {
        return failed(format!("ln posterior {f0} at the start"));
    }
    let problem = Problem {
        post,
        scale,
        last: std::sync::Mutex::new(Some((
            x0.clone(),
            -scale * f0,
            g0.iter().map(|v| -scale * v).collect(),
        ))),
    };
    // argmin's own stopping rules (on the scaled problem): the gradient's 2-norm below a tenth
    // of the tolerance, or a change of f per iteration within 4 units of its round-off
    // (4 eps |f|, with |f| at the start), where no further progress can be seen. The verdict is
    // the scaled gradient of ln p itself at the end, whatever stopped the run.
    let solver = match LBFGS::new(MoreThuenteLineSearch::new(), 7)
        .with_tolerance_grad(0.1 * settings.gradient_tolerance * scale)
        .and_then(|s| s.with_tolerance_cost(4.0 * f64::EPSILON * (scale * f0).abs().max(scale)))
    {
        Ok(s) => s,
        Err(e) => return failed(e.to_string()),
    };
    let result = Executor::new(problem, solver)
        .configure(|s| s.param(x0).max_iters(settings.max_iterations))
        .run();
    match result {
        Err(e) => failed(e.to_string()),
        Ok(res) => {
            let state = res.state();
            let Some(x) = state.get_best_param() else {
                return failed("no iterate".to_string());
            };
            let theta = post.theta(x);
            let values: Vec<f64> = post.free().iter().map(|&i| theta[i]).collect();
            let reason = state.get_termination_reason();
            let mut g = vec![0.0; x.len()];
            let (log_posterior, scaled_gradient) = match post.log_posterior_and_gradient(x, &mut g)
            {
                Ok(f) => (f, scaled_gradient(x, &g)),
                Err(_) => (f64::NEG_INFINITY, f64::INFINITY),
            };
            let stop = reason.map_or_else(|| "unknown".to_string(), |r| r.text().to_string());
            MapRun {
                start: start.to_vec(),
                values,
                log_posterior,
                iterations: state.get_iter(),
                scaled_gradient,
                converged: scaled_gradient < settings.gradient_tolerance,
                reason: stop,
            }
        }
    }
}

/// The MAP from `settings.starts` seeded starting points (serially: pulsars run in parallel).
pub fn maximum_a_posteriori(
    post: &Posterior,
    settings: &MapSettings,
    seed: u64,
    pulsar_index: u64,
) -> Result<MapResult> {
    if settings.starts == 0 {
        return Err(Error::setting("starts", "need at least one starting point"));
    }
    let runs: Vec<MapRun> = starting_points(post, settings.starts, seed, pulsar_index)
        .iter()
        .map(|s| run_from(post, s, settings))
        .collect();
    let best = (0..runs.len())
        .max_by(|&a, &b| runs[a].log_posterior.total_cmp(&runs[b].log_posterior))
        .expect("at least one run");
    if !runs[best].log_posterior.is_finite() {
        return Err(Error::NonFinite {
            what: format!(
                "every MAP run of pulsar {} ({})",
                post.likelihood().label(),
                runs[best].reason
            ),
        });
    }
    let agreeing_runs = runs
        .iter()
        .filter(|r| (runs[best].log_posterior - r.log_posterior).abs() < settings.agreement)
        .count();
    let converged = runs[best].converged && (agreeing_runs >= 2 || runs.len() == 1);
    Ok(MapResult {
        best,
        values: runs[best].values.clone(),
        log_posterior: runs[best].log_posterior,
        converged,
        agreeing_runs,
        runs,
    })
}

#[cfg(test)]
mod tests {
    use super::{scaled_gradient, MapResult, MapRun};

    fn run(log_posterior: f64, converged: bool) -> MapRun {
        MapRun {
            start: vec![0.0],
            values: vec![0.0],
            log_posterior,
            iterations: 12,
            scaled_gradient: if converged { 1e-5 } else { 0.02 },
            converged,
            reason: "Solver converged".into(),
        }
    }

    fn result(runs: Vec<MapRun>, agreeing_runs: usize, converged: bool) -> MapResult {
        MapResult {
            best: 0,
            values: vec![0.0],
            log_posterior: runs[0].log_posterior,
            converged,
            agreeing_runs,
            runs,
        }
    }

    #[test]
    fn the_warning_says_why_the_starts_disagree() {
        // The rule as docs/noise-estimation.md ("MAP") states it (our own rule, no outside
        // reference). Confirmed by a second start: no warning, whatever the other starts did.
        let ok = result(
            vec![run(10.0, true), run(10.0, true), run(-500.0, true)],
            2,
            true,
        );
        assert_eq!(ok.warning("P1"), None);
        // The best run stopped short of a maximum.
        let short = result(vec![run(10.0, false), run(9.0, true)], 1, false);
        let w = short.warning("P1").unwrap();
        assert!(
            w.contains("did not converge") && w.contains("2.0e-2"),
            "{w}"
        );
        // Only the best start reached its maximum: the others at lower maxima or short.
        let modes = result(
            vec![run(10.0, true), run(9.5, true), run(3.0, false)],
            1,
            false,
        );
        let w = modes.warning("P1").unwrap();
        assert!(w.contains("only 1 of 3") && w.contains("1 others") && w.contains("0.50"));
        assert!(w.contains("1 stopped short"), "{w}");
    }

    #[test]
    fn scaled_gradient_is_free_of_the_constant_of_ln_l() {
        // Dennis & Schnabel's relative gradient (sec. 7.2, as recalled) with the scale of f set
        // to 1: max_k |g_k| max(|x_k|, 1), |x| < 1 counting as 1; adding a constant to ln L
        // (the unit of the uncertainties) changes neither g nor x, so the value cannot depend
        // on it.
        let x = [0.5, -3.0];
        let g = [2e-3, -1e-4];
        assert_eq!(scaled_gradient(&x, &g), (2e-3f64).max(1e-4 * 3.0));
        assert_eq!(scaled_gradient(&[0.0, -30.0], &g), (2e-3f64).max(3e-3));
    }
}
