//! The joint fit of every pulsar's intrinsic red noise with the uncorrelated common process
//! (CURN), so the common amplitude is not conditioned on red noise fixed at `noise.toml`
//! (docs/common-process.md, "Red noise marginalised jointly").
//!
//! Each pulsar is reduced once with its white noise, DM noise and timing model from
//! `noise.toml` and with NEITHER its red noise NOR the common process in the covariance:
//! X_a = F^T P_a^-1 r_a, Z_a = F^T P_a^-1 F on the K analysis frequencies. Red noise and the
//! common process are both Gaussian processes on the same Fourier basis F (the leading columns
//! of one ladder j / T_span of the whole array), so for CURN their prior is diagonal per
//! pulsar, Phi_a = diag(rho_red,a(f_j) + rho_c(f_j)), each power on the sin and the cos column,
//! and the likelihood of the whole array is a sum over pulsars (van Haasteren & Vallisneri
//! 2014, eqs. 22-27; the same Woodbury form as the free spectrum, `free_spectrum.rs`):
//!
//! ln L - ln L(Phi = 0) = sum_a [1/2 t_a^T Q_a^-1 t_a - 1/2 ln det Q_a],
//! Q_a = I + E_a Z_a E_a, t_a = E_a X_a, E_a = Phi_a^(1/2).
//!
//! ln L(Phi = 0) does not depend on any red or common parameter. With s = ln Phi_a(f_j), the
//! free-spectrum gradient d ln L / d log10 Phi_a(f_j) (Petersen & Pedersen 2012, The Matrix
//! Cookbook, eqs. 38 and 61) carries over by the chain rule: with
//! rho = A^2 phi_0(f; gamma) (`spectrum::power_law_phi`), d ln rho / d log10 A = 2 ln 10 and
//! d ln rho / d gamma = ln(f_yr / f), and
//!
//! d ln L / d theta = sum_j (d ln L / d ln Phi_a,j) (rho_theta,j / Phi_a,j) d ln rho_theta,j / d theta.
//!
//! Parameters: (log10 A, gamma) of the common process, then (log10 A_a, gamma_a) of every pulsar
//! whose prior has red noise (2 + 2 N_red; N_red may be below N). A pulsar's red noise lives on
//! the first min(K_red, K) analysis frequencies, K_red its prior's `red_frequencies`: the
//! reduced data hold the K analysis frequencies only, so red power above f_K is not modelled in
//! the joint fit (the fixed-noise answer keeps noise.toml's red noise on its own frequencies).

use super::evidence::{AmplitudePrior, CommonFit, Interval1d};
use super::free_spectrum::{block_value_and_gradient, logistic, softplus};
use super::likelihood::{CommonData, CommonModel};
use crate::chains::{ChainTable, Parameter};
use crate::constants::F_YR;
use crate::error::{Error, Result};
use crate::likelihood::Hyper;
use crate::noise::NoiseModel;
use crate::priors::{parameter_kinds, PriorFile};
use crate::release::Release;
use crate::rng::Purpose;
use crate::sampler::diagnostics::{quantile_sorted, Summary};
use crate::sampler::{
    chain_table, map_draws, sample, summarise_coordinates, ChainDraws, LogDensity, SamplerSettings,
};
use crate::spectrum::power_law_phi;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use std::f64::consts::LN_10;

/// The red-noise prior of one pulsar in the joint fit.
#[derive(Clone, Debug, PartialEq)]
pub struct JointRedPrior {
    /// Frequencies of the red process, min(K_red, K).
    pub n_frequencies: usize,
    /// Uniform range of log10 A_a.
    pub log10_amplitude: [f64; 2],
    /// Uniform range of gamma_a.
    pub spectral_index: [f64; 2],
}

/// The reduced data without red noise, and which pulsars get red parameters.
#[derive(Clone, Debug)]
pub struct JointRedData {
    /// X_a, Z_a reduced with white, DM and timing model only.
    pub data: CommonData,
    /// Per pulsar (release order): its red prior, None for no red noise.
    pub red: Vec<Option<JointRedPrior>>,
}

impl JointRedData {
    /// Reduce `release` with `noise` minus every pulsar's red noise on `k` analysis frequencies;
    /// red parameters and ranges from `priors` (the priors file of `ptacorr noise`, or its
    /// built-in defaults: red noise for every pulsar).
    pub fn from_release(
        release: &Release,
        noise: &NoiseModel,
        k: usize,
        priors: &PriorFile,
    ) -> Result<Self> {
        priors.check_release(release)?;
        let mut red = Vec::with_capacity(release.pulsars.len());
        for p in &release.pulsars {
            let prior = priors.pulsar(p)?;
            let Some(n) = prior.components.red else {
                red.push(None);
                continue;
            };
            let kinds = parameter_kinds(&prior.components);
            let bound = |h: Hyper| {
                kinds
                    .iter()
                    .position(|&x| x == h)
                    .and_then(|i| prior.bounds.get(i).copied())
                    .ok_or_else(|| {
                        Error::setting(
                            "joint-red-priors",
                            format!("pulsar {}: the prior has no red-noise range", p.label),
                        )
                    })
            };
            red.push(Some(JointRedPrior {
                n_frequencies: n.min(k),
                log10_amplitude: bound(Hyper::RedLog10Amplitude)?,
                spectral_index: bound(Hyper::RedSpectralIndex)?,
            }));
        }
        let mut without = noise.clone();
        for p in without.pulsars.values_mut() {
            p.red = None;
        }
        let data = CommonData::from_release(release, &without, k)?;
        Self::new(data, red)
    }

    /// From reduced data and per-pulsar red priors (checked).
    pub fn new(data: CommonData, red: Vec<Option<JointRedPrior>>) -> Result<Self> {
        if red.len() != data.n_pulsars() {
            return Err(Error::setting(
                "joint-red",
                format!("{} red priors for {} pulsars", red.len(), data.n_pulsars()),
            ));
        }
        for (label, r) in data.labels.iter().zip(&red) {
            let Some(r) = r else { continue };
            for (name, [lo, hi]) in [
                ("red.log10_amplitude", r.log10_amplitude),
                ("red.spectral_index", r.spectral_index),
            ] {
                if !(lo.is_finite() && hi.is_finite() && lo < hi) {
                    return Err(Error::setting(
                        "joint-red-priors",
                        format!(
                            "pulsar {label}: the prior range [{lo}, {hi}] of {name} holds no mass (need low < high)"
                        ),
                    ));
                }
            }
            if r.n_frequencies == 0 || r.n_frequencies > data.k() {
                return Err(Error::setting(
                    "joint-red-priors",
                    format!(
                        "pulsar {label}: red noise on {} frequencies (need 1..={})",
                        r.n_frequencies,
                        data.k()
                    ),
                ));
            }
        }
        Ok(JointRedData { data, red })
    }

    /// Number of pulsars with red parameters.
    pub fn n_red(&self) -> usize {
        self.red.iter().filter(|r| r.is_some()).count()
    }

    /// The sampled parameters in order: common (log10 A, gamma), then per red pulsar.
    pub fn parameters(&self) -> Vec<Parameter> {
        let mut v = vec![
            Parameter::CommonLog10Amplitude,
            Parameter::CommonSpectralIndex,
        ];
        for (l, r) in self.data.labels.iter().zip(&self.red) {
            if r.is_some() {
                v.push(Parameter::PulsarRedLog10Amplitude(l.clone()));
                v.push(Parameter::PulsarRedSpectralIndex(l.clone()));
            }
        }
        v
    }
}

/// The joint log likelihood of CURN and every pulsar's red noise.
#[derive(Clone, Debug)]
pub struct JointRedLikelihood {
    pub joint: JointRedData,
    /// Index of a pulsar's log10 A_a in the parameter vector (gamma_a follows).
    offsets: Vec<Option<usize>>,
    /// ln(f_yr / f_j).
    ln_ratio: Vec<f64>,
}

impl JointRedLikelihood {
    pub fn new(joint: JointRedData) -> Self {
        let mut next = 2;
        let offsets = joint
            .red
            .iter()
            .map(|r| {
                r.as_ref().map(|_| {
                    next += 2;
                    next - 2
                })
            })
            .collect();
        let ln_ratio = joint.data.freqs.iter().map(|f| (F_YR / f).ln()).collect();
        JointRedLikelihood {
            joint,
            offsets,
            ln_ratio,
        }
    }

    /// 2 + 2 N_red.
    pub fn dim(&self) -> usize {
        2 + 2 * self.joint.n_red()
    }

    fn powers(&self, log10_a: f64, gamma: f64, n: usize) -> Vec<f64> {
        let d = &self.joint.data;
        let a2 = 10f64.powf(2.0 * log10_a);
        (0..d.k())
            .map(|j| {
                if j < n {
                    power_law_phi(a2, gamma, d.freqs[j], d.t_span)
                } else {
                    0.0
                }
            })
            .collect()
    }

    /// ln L - ln L(Phi = 0) at `theta` = (log10 A, gamma, log10 A_a, gamma_a, ...) and its
    /// gradient.
    pub fn log_likelihood(&self, theta: &[f64]) -> Result<(f64, Vec<f64>)> {
        if theta.len() != self.dim() {
            return Err(Error::setting(
                "joint-red",
                format!("expected {} parameters, got {}", self.dim(), theta.len()),
            ));
        }
        if let Some(v) = theta.iter().find(|v| !v.is_finite()) {
            return Err(Error::NonFinite {
                what: format!("a joint red-noise parameter ({v})"),
            });
        }
        let d = &self.joint.data;
        let k = d.k();
        let rc = self.powers(theta[0], theta[1], k);
        let parts: Vec<(f64, [f64; 2], [f64; 2])> = (0..d.n_pulsars())
            .into_par_iter()
            .map(|a| {
                let rr = match (self.offsets[a], &self.joint.red[a]) {
                    (Some(o), Some(r)) => self.powers(theta[o], theta[o + 1], r.n_frequencies),
                    _ => vec![0.0; k],
                };
                let phi: Vec<f64> = rc.iter().zip(&rr).map(|(c, r)| c + r).collect();
                let e: Vec<f64> = (0..2 * k).map(|i| phi[i / 2].sqrt()).collect();
                // g[j] = d ln L_a / d log10 Phi_a(f_j).
                let (v, g) = block_value_and_gradient(&d.z[a], &d.x[a], &e, k)?;
                let (mut gc, mut gr) = ([0.0; 2], [0.0; 2]);
                for j in 0..k {
                    if phi[j] <= 0.0 {
                        continue;
                    }
                    // d ln L / d ln Phi = g / ln 10; d ln rho / d log10 A = 2 ln 10.
                    let s = g[j] / LN_10;
                    let (wc, wr) = (rc[j] / phi[j], rr[j] / phi[j]);
                    gc[0] += s * wc * 2.0 * LN_10;
                    gc[1] += s * wc * self.ln_ratio[j];
                    gr[0] += s * wr * 2.0 * LN_10;
                    gr[1] += s * wr * self.ln_ratio[j];
                }
                Ok((v, gc, gr))
            })
            .collect::<Result<_>>()?;
        let mut value = 0.0;
        let mut grad = vec![0.0; self.dim()];
        for (a, (v, gc, gr)) in parts.into_iter().enumerate() {
            value += v;
            grad[0] += gc[0];
            grad[1] += gc[1];
            if let Some(o) = self.offsets[a] {
                grad[o] += gr[0];
                grad[o + 1] += gr[1];
            }
        }
        if !value.is_finite() || grad.iter().any(|g| !g.is_finite()) {
            return Err(Error::NonFinite {
                what: "the joint red-noise likelihood".into(),
            });
        }
        Ok((value, grad))
    }
}

/// The joint posterior on an unconstrained scale: every parameter is
/// lo + (hi - lo) sigma(y) with the logistic sigma (uniform prior on [lo, hi], Jacobian as in
/// [`super::FreeSpectrumPosterior`]); with the uniform-in-A common prior, p(log10 A) is
/// proportional to 10^log10 A, which adds ln 10 log10 A.
#[derive(Clone, Debug)]
pub struct JointRedPosterior {
    pub likelihood: JointRedLikelihood,
    /// [lo, hi] per parameter, in the parameter order.
    pub bounds: Vec<[f64; 2]>,
    pub amplitude_prior: AmplitudePrior,
}

impl JointRedPosterior {
    /// `common_log10_amplitude` and `common_spectral_index`: the common prior ranges of the
    /// grid fit (checked there; checked again here).
    pub fn new(
        likelihood: JointRedLikelihood,
        common_log10_amplitude: [f64; 2],
        common_spectral_index: [f64; 2],
        amplitude_prior: AmplitudePrior,
    ) -> Result<Self> {
        for (name, [lo, hi]) in [
            ("log10-amplitude-range", common_log10_amplitude),
            ("index-range", common_spectral_index),
        ] {
            if !(lo.is_finite() && hi.is_finite() && lo < hi) {
                return Err(Error::setting(
                    name,
                    format!("the prior range [{lo}, {hi}] holds no mass (need LO < HI)"),
                ));
            }
        }
        let mut bounds = vec![common_log10_amplitude, common_spectral_index];
        for r in likelihood.joint.red.iter().flatten() {
            bounds.push(r.log10_amplitude);
            bounds.push(r.spectral_index);
        }
        Ok(JointRedPosterior {
            likelihood,
            bounds,
            amplitude_prior,
        })
    }

    /// The physical parameters of the unconstrained `y`.
    pub fn to_physical(&self, y: &[f64]) -> Vec<f64> {
        y.iter()
            .zip(&self.bounds)
            .map(|(&v, [lo, hi])| lo + (hi - lo) * logistic(v))
            .collect()
    }

    /// ln p(y | data) up to a constant, and its gradient in y.
    pub fn log_density(&self, y: &[f64]) -> Result<(f64, Vec<f64>)> {
        if y.len() != self.bounds.len() {
            return Err(Error::setting(
                "joint-red",
                format!(
                    "expected {} coordinates, got {}",
                    self.bounds.len(),
                    y.len()
                ),
            ));
        }
        let u = self.to_physical(y);
        let (ll, mut g) = self.likelihood.log_likelihood(&u)?;
        let mut value = ll;
        if self.amplitude_prior == AmplitudePrior::UniformAmplitude {
            value += LN_10 * u[0];
            g[0] += LN_10;
        }
        let mut grad = Vec::with_capacity(y.len());
        for (i, &v) in y.iter().enumerate() {
            let [lo, hi] = self.bounds[i];
            let w = hi - lo;
            let s = logistic(v);
            value += w.ln() - softplus(-v) - softplus(v);
            grad.push(g[i] * w * s * (1.0 - s) + (1.0 - 2.0 * s));
        }
        Ok((value, grad))
    }
}

impl LogDensity for JointRedPosterior {
    fn dim(&self) -> usize {
        self.bounds.len()
    }
    fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        let (v, g) = self.log_density(x)?;
        if !v.is_finite() || g.iter().any(|d| !d.is_finite()) {
            return Err(Error::NonFinite {
                what: "the joint red-noise log density".into(),
            });
        }
        grad.copy_from_slice(&g);
        Ok(v)
    }
}

/// Settings of the joint fit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct JointRedSettings {
    pub sampler: SamplerSettings,
    pub seed: u64,
    /// Where the red-noise priors came from (a priors file or the built-in defaults).
    pub priors: String,
}

/// The draws of a joint fit.
#[derive(Clone, Debug)]
pub struct JointRedSamples {
    pub parameters: Vec<Parameter>,
    pub chains: Vec<ChainDraws>,
    /// Physical-scale draws, per chain.
    pub physical: Vec<Vec<Vec<f64>>>,
    pub summaries: Vec<Summary>,
    pub divergences: usize,
}

/// Sample the joint posterior (chains from the middle of every prior range, y = 0, plus the
/// sampler's jitter). Chain c draws from `rng::stream(seed, JointRedChain, c)`; `done(c)` is
/// called when chain c ends (progress).
pub fn sample_joint_red(
    post: &JointRedPosterior,
    settings: &JointRedSettings,
    done: &(dyn Fn(usize) + Sync),
) -> Result<JointRedSamples> {
    settings.sampler.check()?;
    let start = vec![0.0; post.bounds.len()];
    let chains = sample(
        post,
        &start,
        &settings.sampler,
        settings.seed,
        Purpose::JointRedChain,
        0,
        done,
    )?;
    let map = |y: &[f64]| post.to_physical(y);
    let physical = map_draws(&chains, &map);
    if physical.iter().flatten().flatten().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: "a joint red-noise draw".into(),
        });
    }
    let summaries = summarise_coordinates(&physical);
    let divergences = chains.iter().map(ChainDraws::divergences).sum();
    Ok(JointRedSamples {
        parameters: post.likelihood.joint.parameters(),
        chains,
        physical,
        summaries,
        divergences,
    })
}

/// The posterior of one parameter of the joint fit in summary.json.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct JointParameter {
    pub median: f64,
    /// Central 68.3% and 95% intervals of the draws.
    pub interval_68: [f64; 2],
    pub interval_95: [f64; 2],
    pub rhat: f64,
    pub ess_bulk: f64,
    pub ess_tail: f64,
}

/// The joint fit in the `summary.json` of `ptacorr common --joint-red`, beside the
/// fixed-noise CURN answer of the same run.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct JointRedSummary {
    pub settings: JointRedSettings,
    /// 2 + 2 N_red.
    pub n_parameters: usize,
    /// Pulsars with red-noise parameters (N_red of them).
    pub red_pulsars: Vec<String>,
    pub priors: String,
    pub chain_table: String,
    /// The common process of the joint fit.
    pub log10_amplitude: JointParameter,
    pub spectral_index: JointParameter,
    /// The fixed-noise CURN answer of the same run (varied index, red noise fixed at
    /// noise.toml), when CURN was fitted.
    pub fixed_noise_log10_amplitude: Option<Interval1d>,
    pub fixed_noise_spectral_index: Option<Interval1d>,
    /// Joint median minus fixed-noise median.
    pub log10_amplitude_difference: Option<f64>,
    pub spectral_index_difference: Option<f64>,
    /// Over every parameter of the fit.
    pub max_rhat: f64,
    pub min_ess_bulk: f64,
    pub min_ess_tail: f64,
    pub divergences: usize,
    /// R-hat < 1.01 and bulk and tail ESS >= 400 for every parameter.
    pub converged: bool,
    pub assumptions: String,
}

/// The chain table of the joint fit.
pub const JOINT_RED_CHAINS_FILE: &str = "joint-red-chains.csv";

/// What the joint fit assumes.
pub const JOINT_RED_ASSUMPTIONS: &str = "The joint fit samples the CURN common process and every listed pulsar's red noise together (white and DM noise held fixed at noise.toml; red noise on the first min(red_frequencies, K) analysis frequencies, none above f_K), with uniform priors on the stated ranges; intervals are central quantiles of the NUTS draws. The fixed-noise answer beside it holds every pulsar's red noise at noise.toml. A detection claim needs the collaboration's full analysis.";

fn parameter_summary(draws: &[f64], s: &Summary) -> JointParameter {
    let mut v = draws.to_vec();
    v.sort_by(f64::total_cmp);
    let q = |p: f64| quantile_sorted(&v, p);
    JointParameter {
        median: q(0.5),
        interval_68: [q(0.158_655_253_931_457_05), q(0.841_344_746_068_542_9)],
        interval_95: [q(0.025), q(0.975)],
        rhat: s.rhat,
        ess_bulk: s.ess_bulk,
        ess_tail: s.ess_tail,
    }
}

impl JointRedSamples {
    /// The chain table (`chain,draw,log_posterior,diverging,common.log10_amplitude,
    /// common.spectral_index,red_log10_amplitude.LABEL,red_spectral_index.LABEL,...`).
    pub fn table(&self) -> Result<ChainTable> {
        chain_table(self.parameters.clone(), &self.chains, &self.physical)
    }

    /// The summary beside the fixed-noise CURN answer of `fit` (if it fitted CURN).
    pub fn summary(
        &self,
        joint: &JointRedData,
        settings: &JointRedSettings,
        post: &JointRedPosterior,
        fit: Option<&CommonFit>,
    ) -> JointRedSummary {
        let column =
            |i: usize| -> Vec<f64> { self.physical.iter().flatten().map(|d| d[i]).collect() };
        let la = parameter_summary(&column(0), &self.summaries[0]);
        let ga = parameter_summary(&column(1), &self.summaries[1]);
        let curn = fit.and_then(|f| f.fits.get(&CommonModel::Curn));
        let fa = curn.map(|c| c.varied.log10_amplitude.summary());
        let fg = curn.map(|c| c.varied.spectral_index.summary());
        let max_rhat = self.summaries.iter().map(|s| s.rhat).fold(0.0, f64::max);
        let min =
            |f: fn(&Summary) -> f64| self.summaries.iter().map(f).fold(f64::INFINITY, f64::min);
        let (min_ess_bulk, min_ess_tail) = (min(|s| s.ess_bulk), min(|s| s.ess_tail));
        let [alo, ahi] = post.bounds[0];
        let [glo, ghi] = post.bounds[1];
        let common_prior = match post.amplitude_prior {
            AmplitudePrior::UniformLog10 => format!("common log10 A uniform on [{alo}, {ahi}]"),
            AmplitudePrior::UniformAmplitude => format!("common A uniform on [1e{alo}, 1e{ahi}]"),
        };
        JointRedSummary {
            settings: settings.clone(),
            n_parameters: self.parameters.len(),
            red_pulsars: joint
                .data
                .labels
                .iter()
                .zip(&joint.red)
                .filter(|(_, r)| r.is_some())
                .map(|(l, _)| l.clone())
                .collect(),
            priors: format!(
                "{common_prior}, common gamma uniform on [{glo}, {ghi}]; each pulsar's red log10 A and gamma uniform on the ranges of {} (red noise on the first min(red_frequencies, K) analysis frequencies)",
                settings.priors
            ),
            chain_table: JOINT_RED_CHAINS_FILE.to_string(),
            log10_amplitude_difference: fa.as_ref().map(|f| la.median - f.median),
            spectral_index_difference: fg.as_ref().map(|f| ga.median - f.median),
            log10_amplitude: la,
            spectral_index: ga,
            fixed_noise_log10_amplitude: fa,
            fixed_noise_spectral_index: fg,
            max_rhat,
            min_ess_bulk,
            min_ess_tail,
            divergences: self.divergences,
            converged: max_rhat < 1.01 && min_ess_bulk >= 400.0 && min_ess_tail >= 400.0,
            assumptions: JOINT_RED_ASSUMPTIONS.to_string(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spectrum::frequencies;
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};

    /// A small fictional array of 3 pulsars, K = 4 (the free spectrum's test data, scaled).
    fn data() -> CommonData {
        let k = 4;
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

    fn prior(n: usize) -> Option<JointRedPrior> {
        Some(JointRedPrior {
            n_frequencies: n,
            log10_amplitude: [-20.0, -11.0],
            spectral_index: [0.0, 7.0],
        })
    }

    /// Central differences with h = 1e-5 have truncation error O(h^2 f''') ~ 1e-10 relative
    /// and rounding O(eps |f| / h) ~ 1e-11 |f|, so 1e-6 relative (the brief's tolerance)
    /// leaves a wide margin (Press et al., Numerical Recipes, 3rd ed., sec. 5.7).
    #[test]
    fn gradient_matches_central_differences_at_random_points() {
        let joint = JointRedData::new(data(), vec![prior(4), None, prior(2)]).unwrap();
        let like = JointRedLikelihood::new(joint);
        assert_eq!(like.dim(), 6);
        let post = JointRedPosterior::new(
            like.clone(),
            [-18.0, -12.0],
            [0.0, 7.0],
            AmplitudePrior::UniformAmplitude,
        )
        .unwrap();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let mut moved = false;
        for _ in 0..5 {
            let mut theta = vec![0.0; 6];
            for (i, t) in theta.iter_mut().enumerate() {
                *t = if i % 2 == 0 {
                    rng.random_range(-15.0..-12.5)
                } else {
                    rng.random_range(1.0..6.0)
                };
            }
            let (_, g) = like.log_likelihood(&theta).unwrap();
            let y: Vec<f64> = (0..6).map(|_| rng.random_range(-2.0..2.0)).collect();
            let (_, gy) = post.log_density(&y).unwrap();
            for i in 0..6 {
                let h = 1e-5;
                let (mut up, mut dn) = (theta.clone(), theta.clone());
                up[i] += h;
                dn[i] -= h;
                let fd = (like.log_likelihood(&up).unwrap().0
                    - like.log_likelihood(&dn).unwrap().0)
                    / (2.0 * h);
                assert!(
                    (fd - g[i]).abs() < 1e-6 * fd.abs().max(1.0),
                    "theta {theta:?} i {i}: analytic {} fd {fd}",
                    g[i]
                );
                let (mut yp, mut ym) = (y.clone(), y.clone());
                yp[i] += h;
                ym[i] -= h;
                let fdy = (post.log_density(&yp).unwrap().0 - post.log_density(&ym).unwrap().0)
                    / (2.0 * h);
                assert!(
                    (fdy - gy[i]).abs() < 1e-6 * fdy.abs().max(1.0),
                    "y i {i}: analytic {} fd {fdy}",
                    gy[i]
                );
                moved |= g[i].abs() > 1e-2;
            }
        }
        // Not vacuous: the gradient is not zero at these points.
        assert!(moved);
    }

    /// With no red noise the joint likelihood is the CURN power-law likelihood of the eigen
    /// form (`likelihood.rs`), and red noise at (A, gamma) in every pulsar plus a common
    /// process at (A, gamma) is the CURN likelihood at amplitude sqrt(2) A.
    #[test]
    fn without_red_noise_it_is_the_curn_likelihood() {
        let d = data();
        let none = JointRedLikelihood::new(JointRedData::new(d.clone(), vec![None; 3]).unwrap());
        let all = JointRedLikelihood::new(
            JointRedData::new(d.clone(), vec![prior(4), prior(4), prior(4)]).unwrap(),
        );
        for (la, g) in [(-14.0, 13.0 / 3.0), (-13.2, 2.5)] {
            let want = d
                .amplitude_curve(CommonModel::Curn, g)
                .unwrap()
                .at_log10(la);
            let got = none.log_likelihood(&[la, g]).unwrap().0;
            assert!(
                (got - want).abs() < 1e-9 * want.abs().max(1.0),
                "{got} vs {want}"
            );
            let doubled = d
                .amplitude_curve(CommonModel::Curn, g)
                .unwrap()
                .at_log10(la + 0.5 * 2f64.log10());
            let got = all.log_likelihood(&[la, g, la, g, la, g, la, g]).unwrap().0;
            assert!(
                (got - doubled).abs() < 1e-9 * doubled.abs().max(1.0),
                "{got} vs {doubled}"
            );
        }
    }

    #[test]
    fn an_empty_prior_range_is_refused() {
        let mut p = prior(4).unwrap();
        p.spectral_index = [3.0, 3.0];
        let e = JointRedData::new(data(), vec![Some(p), None, None]).unwrap_err();
        assert!(e.to_string().contains("red.spectral_index"), "{e}");
        assert!(e.to_string().contains("Q1"), "{e}");
        let like = JointRedLikelihood::new(JointRedData::new(data(), vec![None; 3]).unwrap());
        let e = JointRedPosterior::new(
            like,
            [-12.0, -18.0],
            [0.0, 7.0],
            AmplitudePrior::UniformLog10,
        )
        .unwrap_err();
        assert!(e.to_string().contains("log10-amplitude-range"), "{e}");
    }

    /// With no pulsar given red parameters the joint posterior of (log10 A, gamma) is the
    /// fixed-noise CURN posterior of the grid fit (the same likelihood and priors), so the NUTS
    /// median of log10 A must lie within 4.4 Monte Carlo standard errors of the quadrature
    /// median (two-sided false-failure rate 1e-5 for a Gaussian error; standard error of a
    /// median sqrt(pi/2) sd / sqrt(ESS), Kendall & Stuart vol. 1 sec. 10.10, recalled from
    /// memory).
    #[test]
    fn without_red_parameters_the_joint_fit_reproduces_the_grid_curn_answer() {
        let d = data();
        let settings = crate::common::CommonSettings {
            n_frequencies: d.k(),
            models: vec![CommonModel::Curn],
            ..Default::default()
        };
        let fit = crate::common::fit_common(&d, &settings).unwrap();
        let joint = JointRedData::new(d, vec![None; 3]).unwrap();
        let post = JointRedPosterior::new(
            JointRedLikelihood::new(joint.clone()),
            [settings.log10_amplitude_min, settings.log10_amplitude_max],
            [settings.spectral_index_min, settings.spectral_index_max],
            AmplitudePrior::UniformLog10,
        )
        .unwrap();
        let js = JointRedSettings {
            sampler: SamplerSettings {
                warmup: 300,
                draws: 1000,
                chains: 4,
                ..Default::default()
            },
            seed: 11,
            priors: "(none)".into(),
        };
        let s = sample_joint_red(&post, &js, &|_| {}).unwrap();
        let sum = s.summary(&joint, &js, &post, Some(&fit));
        let fixed = sum.fixed_noise_log10_amplitude.clone().unwrap();
        let sd = (fixed.interval_68[1] - fixed.interval_68[0]) / 2.0;
        let se = (std::f64::consts::PI / 2.0).sqrt() * sd / sum.log10_amplitude.ess_bulk.sqrt();
        assert!(
            sum.log10_amplitude_difference.unwrap().abs() < 4.4 * se,
            "joint {} vs grid {} (se {se})",
            sum.log10_amplitude.median,
            fixed.median
        );
        assert!(sum.max_rhat < 1.01, "R-hat {}", sum.max_rhat);
        assert_eq!(s.table().unwrap().len(), 4000);
    }

    /// The chain table of a joint fit names every pulsar's red columns, reads back with the
    /// same parameters, and is refused where one pulsar's table is expected.
    #[test]
    fn the_joint_chain_table_reads_back_and_is_not_a_pulsar_table() {
        let joint = JointRedData::new(data(), vec![prior(4), None, prior(2)]).unwrap();
        let post = JointRedPosterior::new(
            JointRedLikelihood::new(joint.clone()),
            [-18.0, -12.0],
            [0.0, 7.0],
            AmplitudePrior::UniformLog10,
        )
        .unwrap();
        let js = JointRedSettings {
            sampler: SamplerSettings {
                warmup: 20,
                draws: 10,
                chains: 2,
                ..Default::default()
            },
            seed: 3,
            priors: "(test)".into(),
        };
        let s = sample_joint_red(&post, &js, &|_| {}).unwrap();
        let csv = s.table().unwrap().to_csv().unwrap();
        let header = csv.lines().next().unwrap();
        assert_eq!(
            header,
            "chain,draw,log_posterior,diverging,common.log10_amplitude,common.spectral_index,red_log10_amplitude.Q1,red_spectral_index.Q1,red_log10_amplitude.Q3,red_spectral_index.Q3"
        );
        let path = std::path::Path::new("joint-red-chains.csv");
        let back = ChainTable::parse(csv.as_bytes(), path).unwrap();
        assert_eq!(back.parameters, joint.parameters());
        assert_eq!(back.len(), 20);
        let red_only =
            ChainTable::new(vec![Parameter::PulsarRedLog10Amplitude("Q1".into())]).unwrap();
        let e = red_only
            .check_pulsar(path, &[], &crate::noise::PulsarNoise::default())
            .unwrap_err();
        assert!(e.to_string().contains("red_log10_amplitude.Q1"), "{e}");
    }
}
