//! Posteriors and Bayes factors of the common process on a (log10 A, gamma) grid
//! (docs/common-process.md).
//!
//! For each correlation model and spectral index gamma the amplitude integral
//! I(gamma) = int pi(u) exp(ln L(u, gamma) - ln L(0)) du, u = log10 A, is computed by adaptive
//! Simpson quadrature (Lyness 1969) on the eigen form, which costs O(2KN) per amplitude. The
//! gamma integral uses composite Simpson on an odd number of equally spaced indices, its error
//! estimated by refinement (Richardson: the same rule at twice the spacing). The evidence of
//! noise only is exactly 1 on this scale, so ln I is the log Bayes factor against noise only.

use super::likelihood::{AmplitudeCurve, CommonData, CommonModel};
use crate::constants::GAMMA_BINARIES;
use crate::error::{Error, Result};
use rayon::prelude::*;
use serde::Serialize;
use std::collections::BTreeMap;

/// The prior on the amplitude.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum AmplitudePrior {
    /// Uniform in log10 A over the range (the default, for detection and Bayes factors).
    UniformLog10,
    /// Uniform in A over the range (common practice for upper limits).
    UniformAmplitude,
}

impl AmplitudePrior {
    /// ln of the prior density in u = log10 A on [lo, hi].
    pub fn ln_density(self, u: f64, lo: f64, hi: f64) -> f64 {
        match self {
            AmplitudePrior::UniformLog10 => -(hi - lo).ln(),
            // p(A) = 1/(A_hi - A_lo): p(u) = ln 10 A / (A_hi - A_lo) = ln10 10^(u - hi) / (1 - 10^(lo - hi)).
            AmplitudePrior::UniformAmplitude => {
                std::f64::consts::LN_10.ln() + (u - hi) * std::f64::consts::LN_10
                    - (-(10f64.powf(lo - hi))).ln_1p()
            }
        }
    }

    /// Name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            AmplitudePrior::UniformLog10 => "uniform-log10",
            AmplitudePrior::UniformAmplitude => "uniform-amplitude",
        }
    }
}

/// Settings of a common-process run.
#[derive(Clone, Debug, Serialize)]
pub struct CommonSettings {
    /// Number of analysis frequencies K.
    pub n_frequencies: usize,
    /// Prior range of log10 A.
    pub log10_amplitude_min: f64,
    pub log10_amplitude_max: f64,
    /// Prior range of the spectral index gamma (uniform).
    pub spectral_index_min: f64,
    pub spectral_index_max: f64,
    /// Number of equally spaced gamma nodes the rule starts from (odd, for Simpson's rule);
    /// the spacing is halved until the varied-index evidence changes by less than
    /// `index_tolerance` (relative) or the nodes reach [`MAX_INDEX_NODES`].
    pub n_spectral_index: usize,
    /// Relative change of the varied-index evidence between two halvings of the gamma spacing
    /// below which the gamma rule is accepted.
    pub index_tolerance: f64,
    /// The fixed-index case.
    pub fixed_spectral_index: f64,
    /// Number of log10 A points in the output tables.
    pub n_table_amplitudes: usize,
    pub amplitude_prior: AmplitudePrior,
    /// Relative tolerance of the adaptive amplitude quadrature.
    pub tolerance: f64,
    /// The models to fit.
    pub models: Vec<CommonModel>,
}

impl Default for CommonSettings {
    fn default() -> Self {
        CommonSettings {
            n_frequencies: 14,
            log10_amplitude_min: -18.0,
            log10_amplitude_max: -12.0,
            spectral_index_min: 0.0,
            spectral_index_max: 7.0,
            n_spectral_index: 41,
            index_tolerance: 1e-3,
            fixed_spectral_index: GAMMA_BINARIES,
            n_table_amplitudes: 121,
            amplitude_prior: AmplitudePrior::UniformLog10,
            tolerance: 1e-8,
            models: CommonModel::ALL.to_vec(),
        }
    }
}

impl CommonSettings {
    /// Check the settings before any work; every message says what to change.
    pub fn validate(&self) -> Result<()> {
        if self.n_frequencies == 0 || self.n_frequencies > 1000 {
            return Err(Error::setting(
                "frequencies",
                format!("must be in 1..=1000, got {}", self.n_frequencies),
            ));
        }
        let (lo, hi) = (self.log10_amplitude_min, self.log10_amplitude_max);
        if !(lo.is_finite() && hi.is_finite() && lo < hi) {
            return Err(Error::setting(
                "log10-amplitude-range",
                format!(
                    "the prior range [{lo}, {hi}] of log10 A holds no mass: give two finite \
                     values LO < HI (default -18,-12)"
                ),
            ));
        }
        let [alo, ahi] = crate::noise::COMMON_LOG10_AMPLITUDE_RANGE;
        if !(alo..=ahi).contains(&lo) || !(alo..=ahi).contains(&hi) {
            return Err(Error::setting(
                "log10-amplitude-range",
                format!("log10 A must lie in [{alo}, {ahi}], got [{lo}, {hi}]"),
            ));
        }
        let (g0, g1) = (self.spectral_index_min, self.spectral_index_max);
        if !(g0.is_finite() && g1.is_finite() && g0 < g1 && g0 >= 0.0 && g1 <= 10.0) {
            return Err(Error::setting(
                "spectral-index-range",
                format!(
                    "the prior range [{g0}, {g1}] of the spectral index holds no mass or leaves \
                     [0, 10]: give 0 <= LO < HI <= 10 (default 0,7)"
                ),
            ));
        }
        if self.n_spectral_index < 3 || self.n_spectral_index.is_multiple_of(2) {
            return Err(Error::setting(
                "index-points",
                format!(
                    "the spectral-index grid needs an odd number of points >= 3 for Simpson's \
                     rule, got {} (default 41)",
                    self.n_spectral_index
                ),
            ));
        }
        if !(self.index_tolerance.is_finite()
            && self.index_tolerance > 0.0
            && self.index_tolerance < 1.0)
        {
            return Err(Error::setting(
                "index-tolerance",
                format!(
                    "must be a relative tolerance in (0, 1), got {} (default 1e-3)",
                    self.index_tolerance
                ),
            ));
        }
        if self.n_spectral_index > MAX_INDEX_NODES {
            return Err(Error::setting(
                "index-points",
                format!(
                    "at most {MAX_INDEX_NODES} spectral-index nodes, got {}",
                    self.n_spectral_index
                ),
            ));
        }
        if !(self.fixed_spectral_index.is_finite()
            && (0.0..=10.0).contains(&self.fixed_spectral_index))
        {
            return Err(Error::setting(
                "fixed-index",
                format!("must be in [0, 10], got {}", self.fixed_spectral_index),
            ));
        }
        if self.n_table_amplitudes < 2 {
            return Err(Error::setting(
                "amplitude-points",
                format!(
                    "the log10 A table needs at least 2 points, got {} (default 121)",
                    self.n_table_amplitudes
                ),
            ));
        }
        if !(self.tolerance > 0.0 && self.tolerance < 0.1) {
            return Err(Error::setting(
                "tolerance",
                format!("must be in (0, 0.1), got {}", self.tolerance),
            ));
        }
        if self.models.is_empty() {
            return Err(Error::setting("models", "no correlation model chosen"));
        }
        Ok(())
    }

    /// The gamma nodes.
    pub fn spectral_indices(&self) -> Vec<f64> {
        linspace(
            self.spectral_index_min,
            self.spectral_index_max,
            self.n_spectral_index,
        )
    }

    /// The log10 A nodes of the output tables.
    pub fn table_amplitudes(&self) -> Vec<f64> {
        linspace(
            self.log10_amplitude_min,
            self.log10_amplitude_max,
            self.n_table_amplitudes,
        )
    }

    pub(crate) fn ln_prior(&self, u: f64) -> f64 {
        self.amplitude_prior
            .ln_density(u, self.log10_amplitude_min, self.log10_amplitude_max)
    }
}

/// `n` equally spaced points from `a` to `b` inclusive.
pub fn linspace(a: f64, b: f64, n: usize) -> Vec<f64> {
    if n == 1 {
        return vec![a];
    }
    (0..n)
        .map(|i| a + (b - a) * i as f64 / (n - 1) as f64)
        .collect()
}

/// ln of a sum of exponentials, stably.
fn log_sum_exp(terms: &[f64]) -> f64 {
    let m = terms.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + terms.iter().map(|t| (t - m).exp()).sum::<f64>().ln()
}

/// ln int_lo^hi exp(f(u)) du by adaptive Simpson quadrature (Lyness 1969) and its relative
/// error estimate (sum of |S_2 - S_1| / 15 over the accepted intervals, divided by the total).
/// The integrand is scaled by its maximum over a 257-point scan so nothing under- or overflows.
pub fn log_integral_adaptive(f: &dyn Fn(f64) -> f64, lo: f64, hi: f64, tol: f64) -> (f64, f64) {
    const SCAN: usize = 256;
    let xs = linspace(lo, hi, SCAN + 1);
    let fs: Vec<f64> = xs.iter().map(|&u| f(u)).collect();
    let peak = fs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let g = |u: f64| (f(u) - peak).exp();
    let h = (hi - lo) / SCAN as f64;
    // A first estimate sets the absolute tolerance of the refinement.
    let coarse: f64 = fs
        .windows(2)
        .map(|w| 0.5 * h * ((w[0] - peak).exp() + (w[1] - peak).exp()))
        .sum();
    let abs_tol = tol * coarse.max(f64::MIN_POSITIVE);
    let mut total = 0.0;
    let mut err = 0.0;
    for i in 0..SCAN {
        let (a, b) = (xs[i], xs[i + 1]);
        let (fa, fb) = ((fs[i] - peak).exp(), (fs[i + 1] - peak).exp());
        let m = 0.5 * (a + b);
        let fm = g(m);
        let whole = (b - a) / 6.0 * (fa + 4.0 * fm + fb);
        let (s, e) = simpson_step(&g, a, b, fa, fm, fb, whole, abs_tol / SCAN as f64, 48);
        total += s;
        err += e;
    }
    (peak + total.ln(), err / total)
}

#[allow(clippy::too_many_arguments)]
fn simpson_step(
    g: &dyn Fn(f64) -> f64,
    a: f64,
    b: f64,
    fa: f64,
    fm: f64,
    fb: f64,
    whole: f64,
    tol: f64,
    depth: u32,
) -> (f64, f64) {
    let m = 0.5 * (a + b);
    let (lm, rm) = (0.5 * (a + m), 0.5 * (m + b));
    let (flm, frm) = (g(lm), g(rm));
    let left = (m - a) / 6.0 * (fa + 4.0 * flm + fm);
    let right = (b - m) / 6.0 * (fm + 4.0 * frm + fb);
    let delta = left + right - whole;
    if depth == 0 || delta.abs() <= 15.0 * tol {
        return (left + right + delta / 15.0, delta.abs() / 15.0);
    }
    let (s1, e1) = simpson_step(g, a, m, fa, flm, fm, left, tol / 2.0, depth - 1);
    let (s2, e2) = simpson_step(g, m, b, fm, frm, fb, right, tol / 2.0, depth - 1);
    (s1 + s2, e1 + e2)
}

/// Composite Simpson weights for an odd number `n` of nodes spaced `h`.
pub fn simpson_weights(n: usize, h: f64) -> Vec<f64> {
    (0..n)
        .map(|i| {
            let c = if i == 0 || i == n - 1 {
                1.0
            } else if i % 2 == 1 {
                4.0
            } else {
                2.0
            };
            c * h / 3.0
        })
        .collect()
}

/// Summary of a one-dimensional posterior.
#[derive(Clone, Debug, PartialEq, Serialize, serde::Deserialize)]
pub struct Interval1d {
    pub median: f64,
    /// The maximum of the posterior density on the evaluation grid.
    pub map: f64,
    /// Central 68.3% and 95% credible intervals.
    pub interval_68: [f64; 2],
    pub interval_95: [f64; 2],
    /// The 95% upper limit (the 0.95 quantile).
    pub upper_limit_95: f64,
}

/// A posterior density tabulated on a grid (trapezoid cumulative distribution).
#[derive(Clone, Debug)]
pub struct Tabulated {
    pub x: Vec<f64>,
    /// Normalised density.
    pub density: Vec<f64>,
    pub cdf: Vec<f64>,
}

impl Tabulated {
    /// From ln of an unnormalised density at equally spaced points.
    pub fn from_log_density(x: Vec<f64>, ln_p: &[f64]) -> Result<Self> {
        let peak = ln_p.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        if !peak.is_finite() {
            return Err(Error::NonFinite {
                what: "the posterior density (no finite value on the grid)".into(),
            });
        }
        let p: Vec<f64> = ln_p.iter().map(|v| (v - peak).exp()).collect();
        let mut cdf = vec![0.0; p.len()];
        for i in 1..p.len() {
            cdf[i] = cdf[i - 1] + 0.5 * (x[i] - x[i - 1]) * (p[i] + p[i - 1]);
        }
        let total = *cdf.last().expect("non-empty grid");
        let density = p.iter().map(|v| v / total).collect();
        for c in &mut cdf {
            *c /= total;
        }
        Ok(Tabulated { x, density, cdf })
    }

    /// The q-quantile by linear interpolation of the cumulative distribution.
    pub fn quantile(&self, q: f64) -> f64 {
        let i = self.cdf.partition_point(|&c| c < q);
        if i == 0 {
            return self.x[0];
        }
        if i >= self.x.len() {
            return *self.x.last().expect("non-empty");
        }
        let (c0, c1) = (self.cdf[i - 1], self.cdf[i]);
        let f = if c1 > c0 { (q - c0) / (c1 - c0) } else { 0.0 };
        self.x[i - 1] + f * (self.x[i] - self.x[i - 1])
    }

    /// Median, MAP, intervals and upper limit.
    pub fn summary(&self) -> Interval1d {
        let imax = (0..self.x.len())
            .max_by(|&a, &b| self.density[a].total_cmp(&self.density[b]))
            .unwrap_or(0);
        Interval1d {
            median: self.quantile(0.5),
            map: self.x[imax],
            interval_68: [self.quantile(0.158_655_25), self.quantile(0.841_344_75)],
            interval_95: [self.quantile(0.025), self.quantile(0.975)],
            upper_limit_95: self.quantile(0.95),
        }
    }
}

/// A log evidence (relative to noise only) and its numerical error (absolute, in ln).
#[derive(Clone, Copy, Debug, Serialize)]
pub struct LogEvidence {
    pub ln_evidence: f64,
    pub error: f64,
}

/// The fixed-index result of one model.
#[derive(Clone, Debug)]
pub struct FixedIndexFit {
    pub spectral_index: f64,
    pub evidence: LogEvidence,
    pub curve: AmplitudeCurve,
    /// Posterior of log10 A on a fine grid.
    pub posterior: Tabulated,
}

/// The varied-index result of one model.
#[derive(Clone, Debug)]
pub struct VariedIndexFit {
    pub evidence: LogEvidence,
    /// Error of the gamma rule alone (refinement), in ln.
    pub gamma_rule_error: f64,
    pub spectral_indices: Vec<f64>,
    /// ln I(gamma_j) (amplitude integrals).
    pub ln_amplitude_integral: Vec<f64>,
    /// ln L - ln L(0) on the table grid: `[gamma index][amplitude index]`.
    pub log_likelihood_table: Vec<Vec<f64>>,
    /// The eigen form at each gamma node (ln L at any amplitude).
    pub curves: Vec<AmplitudeCurve>,
    /// Marginal posteriors of log10 A (over gamma) and of gamma.
    pub log10_amplitude: Tabulated,
    pub spectral_index: Tabulated,
    /// ln L - ln L(0) + ln pi(log10 A) at the edge of the 68.3% and 95% highest-density
    /// credible regions of the joint posterior of (log10 A, gamma).
    pub credible_levels: [f64; 2],
}

/// Everything fitted for one model.
#[derive(Clone, Debug)]
pub struct ModelFit {
    pub model: CommonModel,
    pub fixed: FixedIndexFit,
    pub varied: VariedIndexFit,
}

/// A log Bayes factor with its numerical error.
#[derive(Clone, Debug, Serialize)]
pub struct BayesFactor {
    pub numerator: CommonModel,
    /// None: noise only.
    pub denominator: Option<CommonModel>,
    pub ln_bayes_factor: f64,
    pub ln_error: f64,
}

/// The fits of every model and the Bayes factors between them.
#[derive(Clone, Debug)]
pub struct CommonFit {
    pub settings: CommonSettings,
    pub fits: BTreeMap<CommonModel, ModelFit>,
    pub table_amplitudes: Vec<f64>,
}

/// Points of the fine log10 A grid for the fixed index and for each gamma node.
const FINE_FIXED: usize = 4097;
const FINE_VARIED: usize = 1025;

/// Most gamma nodes the adaptive rule starts from (`--index-points`).
pub const MAX_INDEX_NODES: usize = 257;

/// Most gamma nodes the adaptive rule refines to (per model): room for quarter points on every
/// starting interval and then some.
pub const MAX_REFINED_INDEX_NODES: usize = 1025;

/// Boole's rule on five equally spaced nodes over [a, b], as weights: (b - a)/90 (7, 32, 12,
/// 32, 7). It is Simpson's rule on the five nodes plus its Richardson correction
/// (S_2 - S_1)/15 (Abramowitz & Stegun 1964, 25.4.14; Burden & Faires 2011, Numerical Analysis,
/// 9th ed., sec. 4.6).
const BOOLE: [f64; 5] = [
    7.0 / 90.0,
    32.0 / 90.0,
    12.0 / 90.0,
    32.0 / 90.0,
    7.0 / 90.0,
];

/// The adaptive rule in gamma and what it ends with.
struct GammaRule {
    /// Nodes in increasing gamma, with their eigen-form curves and amplitude integrals.
    gammas: Vec<f64>,
    curves: Vec<AmplitudeCurve>,
    integrals: Vec<LogEvidence>,
    /// Quadrature weight of each node (in units of gamma; the prior 1/width is not included).
    weights: Vec<f64>,
    /// Estimated relative error of the rule (in ln of the evidence).
    error: f64,
}

/// The adaptive rule in gamma of one model: [`adaptive_simpson_log`] over ln I(gamma) (one
/// eigen form and one amplitude integral per node; a round's new nodes in parallel, in a fixed
/// order, so the result does not depend on the thread count), at most
/// [`MAX_REFINED_INDEX_NODES`] nodes.
fn adaptive_gamma_rule(
    data: &CommonData,
    model: CommonModel,
    s: &CommonSettings,
) -> Result<GammaRule> {
    let eval = |gs: &[f64]| -> Result<Vec<((AmplitudeCurve, LogEvidence), f64)>> {
        gs.par_iter()
            .map(|&g| {
                let c = data.amplitude_curve(model, g)?;
                let e = amplitude_integral(&c, s);
                check_finite(
                    e.ln_evidence,
                    "an amplitude integral of the varied-index fit",
                )?;
                let l = e.ln_evidence;
                Ok(((c, e), l))
            })
            .collect()
    };
    let rule = adaptive_simpson_log(
        &s.spectral_indices(),
        s.index_tolerance,
        MAX_REFINED_INDEX_NODES,
        eval,
    )?;
    let mut curves = Vec::with_capacity(rule.nodes.len());
    let mut integrals = Vec::with_capacity(rule.nodes.len());
    for (c, e) in rule.payload {
        curves.push(c);
        integrals.push(e);
    }
    Ok(GammaRule {
        gammas: rule.nodes,
        curves,
        integrals,
        weights: rule.weights,
        error: rule.error,
    })
}

/// The nodes, weights and error of [`adaptive_simpson_log`].
pub struct AdaptiveRule<T> {
    /// Nodes in increasing order.
    pub nodes: Vec<f64>,
    /// What the evaluator returned with each node's ln f.
    pub payload: Vec<T>,
    /// ln f at each node.
    pub ln_values: Vec<f64>,
    /// Quadrature weight of each node: int f ~ sum_i w_i f(x_i).
    pub weights: Vec<f64>,
    /// ln of the integral.
    pub ln_integral: f64,
    /// Estimated relative error of the integral.
    pub error: f64,
}

/// Locally adaptive Simpson quadrature of a positive integrand given by its logarithm (Kuncir
/// 1962, CACM 5, 347; Lyness 1969, JACM 16, 483; Burden & Faires 2011, Numerical Analysis, 9th
/// ed., sec. 4.6), on the range of the equally spaced `start` nodes (an odd number, at least
/// 3). `eval` returns (payload, ln f) for a batch of nodes (a round's new nodes at once, so it
/// may evaluate them in parallel). The start nodes are cut into intervals of five nodes (of
/// three when their count is not 1 mod 4: those first get their quarter points). On an interval
/// [a, b] Simpson's rule on three nodes (S_1) and on five (S_2) give the error estimate
/// |S_2 - S_1|/15; it is accepted when that is at most `tol` times its share (b - a)/W of the
/// range times the current estimate of the whole integral, otherwise it is split at its
/// midpoint and each half gets its quarter points. Only failing intervals are refined. The
/// value is Boole's rule on every accepted interval; the error estimate the sum of
/// |S_2 - S_1|/15 over them, or of the whole |S_2 - S_1| for intervals the node cap `max_nodes`
/// left unconverged.
pub fn adaptive_simpson_log<T, E>(
    start: &[f64],
    tol: f64,
    max_nodes: usize,
    mut eval: E,
) -> Result<AdaptiveRule<T>>
where
    E: FnMut(&[f64]) -> Result<Vec<(T, f64)>>,
{
    let n0 = start.len();
    debug_assert!(n0 >= 3 && !n0.is_multiple_of(2));
    let width = start[n0 - 1] - start[0];
    let mut xs: Vec<f64> = start.to_vec();
    let mut payload: Vec<T> = Vec::new();
    let mut ln_f: Vec<f64> = Vec::new();
    for (p, l) in eval(start)? {
        payload.push(p);
        ln_f.push(l);
    }
    // Intervals waiting for their quarter points: node indices (a, midpoint, b).
    let mut halves: Vec<[usize; 3]> = Vec::new();
    // Intervals with all five nodes (a, a + h/4, midpoint, b - h/4, b).
    let mut ready: Vec<[usize; 5]> = Vec::new();
    if (n0 - 1).is_multiple_of(4) {
        ready = (0..(n0 - 1) / 4)
            .map(|p| [4 * p, 4 * p + 1, 4 * p + 2, 4 * p + 3, 4 * p + 4])
            .collect();
    } else {
        halves = (0..(n0 - 1) / 2)
            .map(|p| [2 * p, 2 * p + 1, 2 * p + 2])
            .collect();
    }
    let simpsons = |f: &dyn Fn(usize) -> f64, xs: &[f64], p: &[usize; 5]| {
        let h = xs[p[4]] - xs[p[0]];
        let s1 = h / 6.0 * (f(p[0]) + 4.0 * f(p[2]) + f(p[4]));
        let s2 = h / 12.0 * (f(p[0]) + 4.0 * f(p[1]) + 2.0 * f(p[2]) + 4.0 * f(p[3]) + f(p[4]));
        let boole = (0..5).map(|k| h * BOOLE[k] * f(p[k])).sum::<f64>();
        (s1, s2, boole)
    };
    // Accepted intervals and whether the node cap stopped them before they converged.
    let mut accepted: Vec<([usize; 5], bool)> = Vec::new();
    loop {
        if !halves.is_empty() {
            let quarters: Vec<f64> = halves
                .iter()
                .flat_map(|&[a, m, b]| [0.5 * (xs[a] + xs[m]), 0.5 * (xs[m] + xs[b])])
                .collect();
            let first = xs.len();
            let got = eval(&quarters)?;
            xs.extend_from_slice(&quarters);
            for (p, l) in got {
                payload.push(p);
                ln_f.push(l);
            }
            for (p, &[a, m, b]) in halves.iter().enumerate() {
                ready.push([a, first + 2 * p, m, first + 2 * p + 1, b]);
            }
            halves.clear();
        }
        // Integrand values scaled by the largest so far (nothing overflows).
        let peak = ln_f.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let f = |i: usize| (ln_f[i] - peak).exp();
        let total: f64 = accepted
            .iter()
            .map(|(p, _)| p)
            .chain(ready.iter())
            .map(|p| simpsons(&f, &xs, p).2)
            .sum();
        let mut failed = Vec::new();
        for p in ready.drain(..) {
            let share = (xs[p[4]] - xs[p[0]]) / width;
            let (s1, s2, _) = simpsons(&f, &xs, &p);
            if (s2 - s1).abs() / 15.0 <= tol * share * total {
                accepted.push((p, false));
            } else {
                failed.push(p);
            }
        }
        if failed.is_empty() {
            break;
        }
        if xs.len() + 4 * failed.len() > max_nodes {
            accepted.extend(failed.into_iter().map(|p| (p, true)));
            break;
        }
        halves = failed
            .into_iter()
            .flat_map(|p| [[p[0], p[1], p[2]], [p[2], p[3], p[4]]])
            .collect();
    }
    // Weights, value and error with the final scaling.
    let peak = ln_f.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let f = |i: usize| (ln_f[i] - peak).exp();
    let mut weights = vec![0.0; xs.len()];
    let mut err = 0.0;
    let mut total = 0.0;
    for (p, capped) in &accepted {
        let h = xs[p[4]] - xs[p[0]];
        for k in 0..5 {
            weights[p[k]] += h * BOOLE[k];
        }
        let (s1, s2, boole) = simpsons(&f, &xs, p);
        total += boole;
        err += (s2 - s1).abs() / if *capped { 1.0 } else { 15.0 };
    }
    // Nodes in increasing order.
    let mut order: Vec<usize> = (0..xs.len()).collect();
    order.sort_by(|&a, &b| xs[a].total_cmp(&xs[b]));
    let mut slots: Vec<Option<T>> = payload.into_iter().map(Some).collect();
    Ok(AdaptiveRule {
        nodes: order.iter().map(|&i| xs[i]).collect(),
        payload: order
            .iter()
            .map(|&i| slots[i].take().expect("each node once"))
            .collect(),
        ln_values: order.iter().map(|&i| ln_f[i]).collect(),
        weights: order.iter().map(|&i| weights[i]).collect(),
        ln_integral: peak + total.ln(),
        error: err / total,
    })
}

/// Fit every model of `settings` to `data`.
pub fn fit_common(data: &CommonData, settings: &CommonSettings) -> Result<CommonFit> {
    settings.validate()?;
    let mut fits = BTreeMap::new();
    // The fixed-index curves at once; then each model's adaptive gamma rule, whose eigen forms
    // rayon spreads over the cores.
    let fixed_curves: Vec<AmplitudeCurve> = settings
        .models
        .par_iter()
        .map(|&m| data.amplitude_curve(m, settings.fixed_spectral_index))
        .collect::<Result<_>>()?;
    for (&m, curve) in settings.models.iter().zip(&fixed_curves) {
        let fixed = fixed_index_fit(curve, settings)?;
        let rule = adaptive_gamma_rule(data, m, settings)?;
        let varied = varied_index_fit(rule, settings)?;
        fits.insert(
            m,
            ModelFit {
                model: m,
                fixed,
                varied,
            },
        );
    }
    Ok(CommonFit {
        settings: settings.clone(),
        fits,
        table_amplitudes: settings.table_amplitudes(),
    })
}

/// The fixed-index fit of one model alone (settings validated; the gamma grid unused).
pub fn fit_fixed_index(
    data: &CommonData,
    model: CommonModel,
    settings: &CommonSettings,
) -> Result<FixedIndexFit> {
    settings.validate()?;
    let curve = data.amplitude_curve(model, settings.fixed_spectral_index)?;
    fixed_index_fit(&curve, settings)
}

fn amplitude_integral(curve: &AmplitudeCurve, s: &CommonSettings) -> LogEvidence {
    let f = |u: f64| curve.at_log10(u) + s.ln_prior(u);
    let (ln_i, rel) = log_integral_adaptive(
        &f,
        s.log10_amplitude_min,
        s.log10_amplitude_max,
        s.tolerance,
    );
    LogEvidence {
        ln_evidence: ln_i,
        error: rel,
    }
}

fn fixed_index_fit(curve: &AmplitudeCurve, s: &CommonSettings) -> Result<FixedIndexFit> {
    let evidence = amplitude_integral(curve, s);
    check_finite(evidence.ln_evidence, "the fixed-index evidence")?;
    let x = linspace(s.log10_amplitude_min, s.log10_amplitude_max, FINE_FIXED);
    let lp: Vec<f64> = x
        .iter()
        .map(|&u| curve.at_log10(u) + s.ln_prior(u))
        .collect();
    Ok(FixedIndexFit {
        spectral_index: s.fixed_spectral_index,
        evidence,
        curve: curve.clone(),
        posterior: Tabulated::from_log_density(x, &lp)?,
    })
}

fn varied_index_fit(rule: GammaRule, s: &CommonSettings) -> Result<VariedIndexFit> {
    let GammaRule {
        gammas,
        curves,
        integrals,
        weights,
        error: rule_err,
    } = rule;
    let n = gammas.len();
    let width = s.spectral_index_max - s.spectral_index_min;
    let ln_i: Vec<f64> = integrals.iter().map(|e| e.ln_evidence).collect();
    let ln_gamma_prior = -width.ln();
    let terms: Vec<f64> = (0..n)
        .map(|j| ln_i[j] + weights[j].ln() + ln_gamma_prior)
        .collect();
    let fine = log_sum_exp(&terms);
    check_finite(fine, "the varied-index evidence")?;
    // Amplitude-integral errors, weighted by each node's share of the evidence.
    let amp_err: f64 = (0..n)
        .map(|j| (terms[j] - fine).exp() * integrals[j].error)
        .sum();
    let evidence = LogEvidence {
        ln_evidence: fine,
        error: rule_err + amp_err,
    };
    let table = s.table_amplitudes();
    let log_likelihood_table: Vec<Vec<f64>> = curves
        .iter()
        .map(|c| table.iter().map(|&u| c.at_log10(u)).collect())
        .collect();
    let spectral_index = Tabulated::from_log_density(gammas.clone(), &ln_i)?;
    // Marginal of log10 A: the gamma rule's weights over each node's density on a fine grid.
    let x = linspace(s.log10_amplitude_min, s.log10_amplitude_max, FINE_VARIED);
    let per_gamma: Vec<Vec<f64>> = curves
        .par_iter()
        .map(|c| x.iter().map(|&u| c.at_log10(u) + s.ln_prior(u)).collect())
        .collect();
    let lp: Vec<f64> = (0..x.len())
        .map(|i| {
            let terms: Vec<f64> = (0..n).map(|j| per_gamma[j][i] + weights[j].ln()).collect();
            log_sum_exp(&terms)
        })
        .collect();
    let credible_levels = joint_credible_levels(&per_gamma, &weights, &x);
    Ok(VariedIndexFit {
        evidence,
        gamma_rule_error: rule_err,
        spectral_indices: gammas,
        ln_amplitude_integral: ln_i,
        log_likelihood_table,
        log10_amplitude: Tabulated::from_log_density(x, &lp)?,
        spectral_index,
        credible_levels,
        curves,
    })
}

/// The levels of ln L(log10 A, gamma) - ln L(0) + ln pi(log10 A) (the unnormalised joint
/// posterior density without the constant gamma prior) that enclose 68.3% and 95% of the joint
/// posterior: the highest-density credible regions (Box & Tiao 1973, Bayesian Inference in
/// Statistical Analysis, sec. 2.8). Each point of the (gamma node) x (fine log10 A grid)
/// carries the mass of its gamma weight times its log10 A spacing; the points are sorted by
/// density and the level is the density at which the cumulative mass reaches the content.
fn joint_credible_levels(per_gamma: &[Vec<f64>], weights: &[f64], x: &[f64]) -> [f64; 2] {
    let peak = per_gamma
        .iter()
        .flatten()
        .cloned()
        .fold(f64::NEG_INFINITY, f64::max);
    let du = (x[x.len() - 1] - x[0]) / (x.len() - 1) as f64;
    let mut pts: Vec<(f64, f64)> = Vec::with_capacity(per_gamma.len() * x.len());
    for (row, w) in per_gamma.iter().zip(weights) {
        for (i, &lp) in row.iter().enumerate() {
            // Trapezoid ends in log10 A.
            let end = if i == 0 || i + 1 == x.len() { 0.5 } else { 1.0 };
            pts.push((lp - peak, (lp - peak).exp() * w * du * end));
        }
    }
    pts.sort_by(|a, b| b.0.total_cmp(&a.0));
    let total: f64 = pts.iter().map(|p| p.1).sum();
    let mut out = [f64::NEG_INFINITY; 2];
    for (k, content) in [0.682_689_49, 0.95].into_iter().enumerate() {
        let mut cum = 0.0;
        for p in &pts {
            cum += p.1;
            if cum >= content * total {
                out[k] = p.0 + peak;
                break;
            }
        }
    }
    out
}

fn check_finite(v: f64, what: &str) -> Result<()> {
    if v.is_finite() {
        Ok(())
    } else {
        Err(Error::NonFinite {
            what: format!("{what} ({v}); check the noise model and the prior ranges"),
        })
    }
}

impl CommonFit {
    /// ln BF of `a` against `b` (None: noise only), fixed index or varied index.
    pub fn bayes_factor(
        &self,
        a: CommonModel,
        b: Option<CommonModel>,
        fixed: bool,
    ) -> Option<BayesFactor> {
        let ev = |m: CommonModel| {
            self.fits.get(&m).map(|f| {
                if fixed {
                    f.fixed.evidence
                } else {
                    f.varied.evidence
                }
            })
        };
        let ea = ev(a)?;
        let eb = match b {
            Some(m) => ev(m)?,
            None => LogEvidence {
                ln_evidence: 0.0,
                error: 0.0,
            },
        };
        Some(BayesFactor {
            numerator: a,
            denominator: b,
            ln_bayes_factor: ea.ln_evidence - eb.ln_evidence,
            ln_error: ea.error + eb.error,
        })
    }

    /// The standard comparisons: HD vs CURN, HD vs monopole, HD vs dipole, CURN vs noise only
    /// (those whose models were fitted).
    pub fn standard_bayes_factors(&self, fixed: bool) -> Vec<BayesFactor> {
        use CommonModel::*;
        [
            (Hd, Some(Curn)),
            (Hd, Some(Monopole)),
            (Hd, Some(Dipole)),
            (Curn, None),
        ]
        .into_iter()
        .filter_map(|(a, b)| self.bayes_factor(a, b, fixed))
        .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn adaptive_integral_of_a_narrow_gaussian() {
        // int exp(-(u - 0.3)^2 / (2 s^2)) du = s sqrt(2 pi) over a range holding all the mass.
        let s = 0.004;
        let f = |u: f64| -(u - 0.3).powi(2) / (2.0 * s * s) + 700.0;
        let (ln_i, err) = log_integral_adaptive(&f, -3.0, 3.0, 1e-9);
        let want = 700.0 + (s * (2.0 * std::f64::consts::PI).sqrt()).ln();
        assert!((ln_i - want).abs() < 1e-8, "{ln_i} vs {want}");
        assert!(err < 1e-8);
    }

    #[test]
    fn local_adaptive_simpson_integrates_a_narrow_peak_with_few_nodes() {
        // int_0^7 exp(-(g - 4.3)^2 / (2 s^2)) dg = s sqrt(2 pi) to double precision (the tails
        // beyond the range are below 1e-300 of it): the Gaussian integral, a closed form. A
        // peak 0.05 wide on a range of 7 is the loud-signal case of the gamma rule: the local
        // rule refines only near the peak, so it needs fewer nodes than halving everywhere.
        let s = 0.05;
        let want = (s * (2.0 * std::f64::consts::PI).sqrt()).ln() + 900.0;
        for (start, tol) in [(41usize, 1e-3), (41, 1e-6), (5, 1e-6), (43, 1e-6)] {
            let xs = linspace(0.0, 7.0, start);
            let mut evals = 0;
            let rule = adaptive_simpson_log(&xs, tol, 4097, |gs: &[f64]| {
                evals += gs.len();
                Ok(gs
                    .iter()
                    .map(|&g| ((), -(g - 4.3).powi(2) / (2.0 * s * s) + 900.0))
                    .collect())
            })
            .unwrap();
            let rel = (rule.ln_integral - want).abs();
            assert!(rel < tol, "start {start}, tol {tol}: error {rel:e}");
            assert!(rule.error < tol && rule.error >= 0.0);
            assert_eq!(evals, rule.nodes.len());
            // Fewer nodes than the global rule (halve every spacing until the composite Simpson
            // value changes by less than tol) needs for the same integral.
            let mut n = start;
            let simpson = |n: usize| {
                let xs = linspace(0.0, 7.0, n);
                let w = simpson_weights(n, 7.0 / (n - 1) as f64);
                let v: f64 = xs
                    .iter()
                    .zip(&w)
                    .map(|(g, w)| w * (-(g - 4.3).powi(2) / (2.0 * s * s)).exp())
                    .sum();
                v.ln() + 900.0
            };
            while ((simpson(2 * n - 1) - simpson(n)).exp_m1()).abs() > tol {
                n = 2 * n - 1;
            }
            let global = 2 * n - 1;
            assert!(
                rule.nodes.len() < global,
                "start {start}, tol {tol}: {} nodes, the global rule {global}",
                rule.nodes.len()
            );
            assert!(rule.nodes.windows(2).all(|w| w[0] < w[1]));
            // The weights integrate the same function: sum w_i f(x_i) is the integral.
            let peak = rule
                .ln_values
                .iter()
                .cloned()
                .fold(f64::NEG_INFINITY, f64::max);
            let sum: f64 = rule
                .weights
                .iter()
                .zip(&rule.ln_values)
                .map(|(w, l)| w * (l - peak).exp())
                .sum();
            assert!((peak + sum.ln() - rule.ln_integral).abs() < 1e-12);
            // And a constant exactly (Boole's rule is exact for polynomials of degree 5).
            let total: f64 = rule.weights.iter().sum();
            assert!((total - 7.0).abs() < 1e-12, "{total}");
        }
    }

    #[test]
    fn gaussian_quantiles_match_the_normal_table() {
        // Standard normal quantiles (Abramowitz & Stegun 1964, table 26.5): 0.95 -> 1.644854,
        // 0.975 -> 1.959964. Grid error of the trapezoid CDF at h = 0.001 is far below 1e-4.
        let x = linspace(-8.0, 8.0, 16001);
        let lp: Vec<f64> = x.iter().map(|u| -0.5 * u * u).collect();
        let t = Tabulated::from_log_density(x, &lp).unwrap();
        let s = t.summary();
        assert!((s.upper_limit_95 - 1.644854).abs() < 1e-4);
        assert!((s.interval_95[1] - 1.959964).abs() < 1e-4);
        assert!(s.median.abs() < 1e-6 && s.map.abs() < 1e-9);
    }

    #[test]
    fn settings_without_mass_or_points_are_refused() {
        let bad = [
            CommonSettings {
                log10_amplitude_min: -12.0,
                log10_amplitude_max: -12.0,
                ..Default::default()
            },
            CommonSettings {
                spectral_index_min: 5.0,
                spectral_index_max: 2.0,
                ..Default::default()
            },
            CommonSettings {
                n_spectral_index: 0,
                ..Default::default()
            },
            CommonSettings {
                n_table_amplitudes: 0,
                ..Default::default()
            },
            CommonSettings {
                log10_amplitude_min: f64::NAN,
                ..Default::default()
            },
        ];
        for s in bad {
            let e = s.validate().unwrap_err().to_string();
            assert!(e.contains("invalid setting"), "{e}");
        }
        CommonSettings::default().validate().unwrap();
    }

    #[test]
    fn uniform_amplitude_prior_is_normalised() {
        let (lo, hi) = (-18.0, -12.0);
        let f = |u: f64| AmplitudePrior::UniformAmplitude.ln_density(u, lo, hi);
        let (ln_i, _) = log_integral_adaptive(&f, lo, hi, 1e-10);
        assert!(ln_i.abs() < 1e-9, "{ln_i}");
        let g = |u: f64| AmplitudePrior::UniformLog10.ln_density(u, lo, hi);
        assert!(log_integral_adaptive(&g, lo, hi, 1e-10).0.abs() < 1e-12);
    }
}
