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
#[derive(Clone, Debug, Serialize)]
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
    /// Marginal posteriors of log10 A (over gamma) and of gamma.
    pub log10_amplitude: Tabulated,
    pub spectral_index: Tabulated,
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

/// Most gamma nodes the adaptive rule refines to (per model).
pub const MAX_INDEX_NODES: usize = 257;

/// ln of the composite Simpson rule over gamma of the amplitude integrals `ln_i` on equally
/// spaced `gammas` (uniform prior in gamma on their range).
fn ln_simpson_over_gamma(ln_i: &[f64], gammas: &[f64]) -> f64 {
    let n = gammas.len();
    let width = gammas[n - 1] - gammas[0];
    let h = width / (n - 1) as f64;
    let terms: Vec<f64> = simpson_weights(n, h)
        .iter()
        .zip(ln_i)
        .map(|(w, l)| l + w.ln() - width.ln())
        .collect();
    log_sum_exp(&terms)
}

/// The adaptive gamma rule of one model: composite Simpson on the settings' nodes, then the
/// spacing halved (every new node a midpoint, one eigen form each) until the evidence changes
/// by less than `index_tolerance` relative, or the nodes reach [`MAX_INDEX_NODES`]. Returns
/// the curves, the nodes and the rule's error estimate: Richardson's |S_h/2 - S_h| / 15 of the
/// value when converged (Simpson's error falls by 16 per halving of h for a smooth integrand;
/// e.g. Press et al. 2007, Numerical Recipes, 3rd ed., sec. 4.2), the full difference when the
/// node cap stopped it first.
fn adaptive_gamma_nodes(
    data: &CommonData,
    model: CommonModel,
    s: &CommonSettings,
) -> Result<(Vec<AmplitudeCurve>, Vec<f64>, f64)> {
    let mut gammas = s.spectral_indices();
    let mut curves: Vec<AmplitudeCurve> = gammas
        .par_iter()
        .map(|&g| data.amplitude_curve(model, g))
        .collect::<Result<_>>()?;
    let mut ln_i: Vec<f64> = curves
        .par_iter()
        .map(|c| amplitude_integral(c, s).ln_evidence)
        .collect();
    let mut prev = ln_simpson_over_gamma(&ln_i, &gammas);
    loop {
        let mids: Vec<f64> = gammas.windows(2).map(|w| 0.5 * (w[0] + w[1])).collect();
        let new: Vec<AmplitudeCurve> = mids
            .par_iter()
            .map(|&g| data.amplitude_curve(model, g))
            .collect::<Result<_>>()?;
        let new_ln: Vec<f64> = new
            .par_iter()
            .map(|c| amplitude_integral(c, s).ln_evidence)
            .collect();
        let n = gammas.len();
        let mut g2 = Vec::with_capacity(2 * n - 1);
        let mut c2 = Vec::with_capacity(2 * n - 1);
        let mut l2 = Vec::with_capacity(2 * n - 1);
        let mut new_curves = new.into_iter();
        for j in 0..n {
            g2.push(gammas[j]);
            c2.push(curves[j].clone());
            l2.push(ln_i[j]);
            if j + 1 < n {
                g2.push(mids[j]);
                c2.push(new_curves.next().expect("one midpoint per interval"));
                l2.push(new_ln[j]);
            }
        }
        gammas = g2;
        curves = c2;
        ln_i = l2;
        let now = ln_simpson_over_gamma(&ln_i, &gammas);
        check_finite(now, "the varied-index evidence")?;
        let change = (now - prev).exp_m1().abs();
        if change <= s.index_tolerance {
            return Ok((curves, gammas, change / 15.0));
        }
        if 2 * gammas.len() - 1 > MAX_INDEX_NODES {
            return Ok((curves, gammas, change));
        }
        prev = now;
    }
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
        let (curves, gammas, rule_err) = adaptive_gamma_nodes(data, m, settings)?;
        let varied = varied_index_fit(&curves, &gammas, settings, rule_err)?;
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

fn varied_index_fit(
    curves: &[AmplitudeCurve],
    gammas: &[f64],
    s: &CommonSettings,
    rule_err: f64,
) -> Result<VariedIndexFit> {
    let n = gammas.len();
    let width = gammas[n - 1] - gammas[0];
    let h = width / (n - 1) as f64;
    let ints: Vec<LogEvidence> = curves.iter().map(|c| amplitude_integral(c, s)).collect();
    let ln_i: Vec<f64> = ints.iter().map(|e| e.ln_evidence).collect();
    let ln_gamma_prior = -width.ln();
    let fine = ln_simpson_over_gamma(&ln_i, gammas);
    // Amplitude-integral errors, weighted by each node's share of the evidence.
    let amp_err: f64 = simpson_weights(n, h)
        .iter()
        .enumerate()
        .map(|(j, w)| (ln_i[j] + w.ln() + ln_gamma_prior - fine).exp() * ints[j].error)
        .sum();
    check_finite(fine, "the varied-index evidence")?;
    let evidence = LogEvidence {
        ln_evidence: fine,
        error: rule_err + amp_err,
    };
    let table = s.table_amplitudes();
    let log_likelihood_table: Vec<Vec<f64>> = curves
        .iter()
        .map(|c| table.iter().map(|&u| c.at_log10(u)).collect())
        .collect();
    let spectral_index = Tabulated::from_log_density(gammas.to_vec(), &ln_i)?;
    // Marginal of log10 A: Simpson over gamma of each node's density on a fine grid.
    let x = linspace(s.log10_amplitude_min, s.log10_amplitude_max, FINE_VARIED);
    let w = simpson_weights(n, h);
    let per_gamma: Vec<Vec<f64>> = curves
        .par_iter()
        .map(|c| x.iter().map(|&u| c.at_log10(u) + s.ln_prior(u)).collect())
        .collect();
    let lp: Vec<f64> = (0..x.len())
        .map(|i| {
            let terms: Vec<f64> = (0..n).map(|j| per_gamma[j][i] + w[j].ln()).collect();
            log_sum_exp(&terms)
        })
        .collect();
    Ok(VariedIndexFit {
        evidence,
        gamma_rule_error: rule_err,
        spectral_indices: gammas.to_vec(),
        ln_amplitude_integral: ln_i,
        log_likelihood_table,
        log10_amplitude: Tabulated::from_log_density(x, &lp)?,
        spectral_index,
    })
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
