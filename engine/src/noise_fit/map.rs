//! The maximum a posteriori noise model of one pulsar: L-BFGS (Nocedal & Wright 2006, Numerical
//! Optimization, sec. 7.2; the `argmin` crate's implementation with a More-Thuente line search)
//! on the unconstrained parameterisation of [`Posterior`], from several seeded starting points.
//!
//! Convergence is judged by the relative gradient of Dennis & Schnabel (1983, Numerical Methods
//! for Unconstrained Optimization and Nonlinear Equations, sec. 7.2, as recalled from memory):
//! max_k |g_k| max(|x_k|, 1) / max(|f|, 1) below eps^(1/3) ~ 6e-6 (their recommended gradient
//! tolerance), at the best point of the run, whatever made the optimiser stop. An absolute
//! gradient tolerance cannot be reached at ln L ~ 3e4 in double precision (the line search then
//! stops on a direction it no longer sees descending, with every start at the same optimum).

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
    /// Converged when the relative gradient (module documentation) is below this.
    pub gradient_tolerance: f64,
    /// Two runs "agree" when their ln posterior differs by less than this.
    pub agreement: f64,
}

impl Default for MapSettings {
    fn default() -> Self {
        MapSettings {
            starts: 4,
            max_iterations: 500,
            // eps^(1/3) (Dennis & Schnabel 1983, sec. 7.2, as recalled).
            gradient_tolerance: 6.055e-6,
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
    /// The relative gradient at the end (module documentation); infinite if the run failed.
    pub relative_gradient: f64,
    /// The relative gradient at the end is below the tolerance.
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
    /// The best run converged and at least one other run reached the same ln posterior
    /// (within `agreement`), or there was only one start.
    pub converged: bool,
    /// Number of runs whose ln posterior is within `agreement` of the best.
    pub agreeing_runs: usize,
}

/// The optimisation problem: minus the log posterior. argmin asks for the cost and the gradient
/// separately, usually at the same point one after the other; one evaluation gives both, so the
/// last point's value and gradient are kept and a second request at it costs nothing.
struct Problem<'p, 'a> {
    post: &'p Posterior<'a>,
    last: std::sync::Mutex<Option<Evaluated>>,
}

/// A point and minus the log posterior and its gradient there.
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
        let f = -self.post.log_posterior_and_gradient(x, &mut g)?;
        g.iter_mut().for_each(|v| *v = -*v);
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

/// The relative gradient max_k |g_k| max(|x_k|, 1) / max(|f|, 1) (Dennis & Schnabel 1983,
/// sec. 7.2, as recalled): scale-free in f, so a tolerance means the same at ln L ~ 1e2 and
/// ~ 1e5.
pub fn relative_gradient(x: &[f64], f: f64, g: &[f64]) -> f64 {
    let scale = f.abs().max(1.0);
    x.iter()
        .zip(g)
        .map(|(xk, gk)| gk.abs() * xk.abs().max(1.0) / scale)
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
        relative_gradient: f64::INFINITY,
        converged: false,
        reason,
    };
    let problem = Problem {
        post,
        last: std::sync::Mutex::new(None),
    };
    // argmin's own stopping rules are absolute; scale them by |f| at the start (the cost there
    // is kept by the problem, so argmin's first request costs nothing): the gradient's 2-norm
    // a tenth of the relative tolerance times |f|, or a change of f per iteration within
    // 4 units of its round-off (4 eps |f|), where no further progress can be seen. The verdict
    // is the relative gradient at the end, whatever stopped the run.
    let f0 = match problem.evaluate(&x0) {
        Ok((f, _)) => f.abs().max(1.0),
        Err(e) => return failed(e.to_string()),
    };
    let solver = match LBFGS::new(MoreThuenteLineSearch::new(), 7)
        .with_tolerance_grad(0.1 * settings.gradient_tolerance * f0)
        .and_then(|s| s.with_tolerance_cost(4.0 * f64::EPSILON * f0))
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
            let relative_gradient = match post.log_posterior_and_gradient(x, &mut g) {
                Ok(f) => relative_gradient(x, f, &g),
                Err(_) => f64::INFINITY,
            };
            let stop = reason.map_or_else(|| "unknown".to_string(), |r| r.text().to_string());
            MapRun {
                start: start.to_vec(),
                values,
                log_posterior: -state.get_best_cost(),
                iterations: state.get_iter(),
                relative_gradient,
                converged: relative_gradient < settings.gradient_tolerance,
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
    use super::relative_gradient;

    #[test]
    fn relative_gradient_is_free_of_the_scale_of_f() {
        // Dennis & Schnabel's relative gradient (sec. 7.2, as recalled): multiplying f and its
        // gradient by the same factor leaves it unchanged; |x| < 1 counts as 1, |f| < 1 as 1.
        let x = [0.5, -3.0];
        let g = [2e-3, -1e-4];
        let r = relative_gradient(&x, 40.0, &g);
        assert!((r - (2e-3f64 * 1.0 / 40.0).max(1e-4 * 3.0 / 40.0)).abs() < 1e-18);
        let scaled: Vec<f64> = g.iter().map(|v| v * 750.0).collect();
        assert!((relative_gradient(&x, 40.0 * 750.0, &scaled) - r).abs() < 1e-18);
        assert_eq!(relative_gradient(&x, 0.01, &g), 2e-3);
    }
}
