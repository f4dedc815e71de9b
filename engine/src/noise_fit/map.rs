//! The maximum a posteriori noise model of one pulsar: L-BFGS (Nocedal & Wright 2006, Numerical
//! Optimization, sec. 7.2; the `argmin` crate's implementation with a More-Thuente line search)
//! on the unconstrained parameterisation of [`Posterior`], from several seeded starting points.

use super::posterior::Posterior;
use crate::error::{Error, Result};
use crate::rng::{stream, Purpose};
use argmin::core::{CostFunction, Executor, Gradient, State, TerminationReason};
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
    /// Stop when the gradient norm in x falls below this.
    pub gradient_tolerance: f64,
    /// Two runs "agree" when their ln posterior differs by less than this.
    pub agreement: f64,
}

impl Default for MapSettings {
    fn default() -> Self {
        MapSettings {
            starts: 4,
            max_iterations: 500,
            gradient_tolerance: 1e-5,
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
    /// The optimiser stopped on its gradient or cost tolerance.
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

struct Problem<'p, 'a> {
    post: &'p Posterior<'a>,
}

impl CostFunction for Problem<'_, '_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, x: &Vec<f64>) -> std::result::Result<f64, argmin::core::Error> {
        let mut g = vec![0.0; x.len()];
        Ok(-self.post.log_posterior_and_gradient(x, &mut g)?)
    }
}

impl Gradient for Problem<'_, '_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, x: &Vec<f64>) -> std::result::Result<Vec<f64>, argmin::core::Error> {
        let mut g = vec![0.0; x.len()];
        self.post.log_posterior_and_gradient(x, &mut g)?;
        Ok(g.into_iter().map(|v| -v).collect())
    }
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
        converged: false,
        reason,
    };
    let solver = match LBFGS::new(MoreThuenteLineSearch::new(), 7)
        .with_tolerance_grad(settings.gradient_tolerance)
        .and_then(|s| s.with_tolerance_cost(1e-12))
    {
        Ok(s) => s,
        Err(e) => return failed(e.to_string()),
    };
    let result = Executor::new(Problem { post }, solver)
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
            MapRun {
                start: start.to_vec(),
                values,
                log_posterior: -state.get_best_cost(),
                iterations: state.get_iter(),
                converged: matches!(reason, Some(TerminationReason::SolverConverged)),
                reason: reason.map_or_else(|| "unknown".to_string(), |r| r.text().to_string()),
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
