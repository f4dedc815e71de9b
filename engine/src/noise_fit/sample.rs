//! Posterior sampling of one pulsar's noise hyperparameters (docs/noise-estimation.md,
//! "Sampling"): NUTS ([`crate::sampler`]) on the unconstrained parameterisation of
//! [`Posterior`], several chains started near the MAP, seeded from (seed, pulsar, chain), and
//! per-parameter diagnostics in the physical scale.

use super::posterior::Posterior;
use crate::chains::{ChainTable, Parameter};
use crate::error::{Error, Result};
use crate::rng::Purpose;
use crate::sampler::diagnostics::{Summary, ESS_MIN, RHAT_MAX};
use crate::sampler::{
    chain_table, map_draws, sample_until, summarise_coordinates, ChainDraws, SamplerSettings,
};
use serde::{Deserialize, Serialize};

/// What `ptacorr noise` samples.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum SampleMode {
    /// No sampling: the MAP only.
    MapOnly,
    /// Every hyperparameter.
    #[default]
    Full,
    /// White noise held at its MAP; red, DM (and a free common process) sampled.
    FixedWhite,
}

/// Convergence thresholds of a pulsar's chains (Vehtari et al. 2021 recommendations).
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Convergence {
    pub rhat_max: f64,
    pub ess_min: f64,
    /// More divergences than this share of the kept draws makes a pulsar "diverging".
    pub divergence_share_max: f64,
}

impl Default for Convergence {
    fn default() -> Self {
        Convergence {
            rhat_max: RHAT_MAX,
            ess_min: ESS_MIN,
            divergence_share_max: 0.01,
        }
    }
}

/// The posterior draws of one pulsar.
#[derive(Clone, Debug)]
pub struct PulsarSamples {
    /// Names of the sampled parameters (`noise.toml` keys).
    pub parameters: Vec<String>,
    /// Their indices in the likelihood's parameter vector.
    pub indices: Vec<usize>,
    pub chains: Vec<ChainDraws>,
    /// Per chain, the draws in the physical scale (row-major, one row per draw).
    pub physical: Vec<Vec<Vec<f64>>>,
    /// Per sampled parameter, in the physical scale.
    pub summaries: Vec<Summary>,
    pub divergences: usize,
    pub warmup_divergences: usize,
    pub max_depth_hits: usize,
    pub gradient_evaluations: u64,
    /// Every parameter has R-hat < rhat_max and bulk and tail ESS >= ess_min.
    pub converged: bool,
    /// Divergences exceed the allowed share of the kept draws.
    pub diverging: bool,
}

impl PulsarSamples {
    /// Largest R-hat over the parameters (NaN if any is NaN).
    pub fn max_rhat(&self) -> f64 {
        self.summaries
            .iter()
            .map(|s| s.rhat)
            .fold(f64::NEG_INFINITY, |m, r| {
                if r.is_nan() || m.is_nan() {
                    f64::NAN
                } else {
                    m.max(r)
                }
            })
    }

    /// Smallest bulk ESS.
    pub fn min_ess_bulk(&self) -> f64 {
        self.summaries
            .iter()
            .map(|s| s.ess_bulk)
            .fold(f64::INFINITY, f64::min)
    }

    /// Smallest tail ESS.
    pub fn min_ess_tail(&self) -> f64 {
        self.summaries
            .iter()
            .map(|s| s.ess_tail)
            .fold(f64::INFINITY, f64::min)
    }

    /// The chain table of these draws (CONTRACTS: `chains/LABEL.csv`).
    pub fn table(&self) -> Result<ChainTable> {
        let params = self
            .parameters
            .iter()
            .map(|n| Parameter::parse(n).map_err(|m| Error::setting("chain table", m)))
            .collect::<Result<Vec<_>>>()?;
        chain_table(params, &self.chains, &self.physical)
    }
}

/// Sample the posterior `post` of pulsar number `pulsar_index` from the free values `start`
/// (the MAP): chain c draws from `rng::stream(seed, NoiseChain, (pulsar_index << 16) | c)`.
/// When after `settings.draws` draws per chain some parameter misses the `convergence`
/// thresholds, the chains are run longer ([`sample_until`]), up to `max_draws` per chain
/// (equal to `settings.draws`: never). `done` is called after each chain.
#[allow(clippy::too_many_arguments)]
pub fn sample_pulsar(
    post: &Posterior,
    start: &[f64],
    settings: &SamplerSettings,
    max_draws: u64,
    convergence: &Convergence,
    seed: u64,
    pulsar_index: u64,
    done: &(dyn Fn(usize) + Sync),
) -> Result<PulsarSamples> {
    // Start inside the bulk of the logistic map: a MAP at a prior edge sits at |x| >> 1 where
    // the density is flat and adaptation would start from a poor step size.
    let x0: Vec<f64> = post
        .unconstrained(start)
        .into_iter()
        .map(|x| x.clamp(-4.0, 4.0))
        .collect();
    let free = post.free().to_vec();
    let to_physical = |x: &[f64]| -> Vec<f64> {
        let theta = post.theta(x);
        free.iter().map(|&i| theta[i]).collect()
    };
    // A longer run when some parameter misses the thresholds: ESS grows about in proportion
    // to the draws, so ask for the draws that would give 1.2 x the threshold at the smallest
    // ESS seen (at least 1.5 x as many; twice as many when only R-hat fails).
    let more = |chains: &[ChainDraws]| -> Option<u64> {
        let summaries = summarise_coordinates(&map_draws(chains, &to_physical));
        if summaries
            .iter()
            .all(|s| s.converged(convergence.rhat_max, convergence.ess_min))
        {
            return None;
        }
        let have = chains.first().map_or(0, |c| c.len()) as f64;
        let min_ess = summaries
            .iter()
            .map(|s| s.ess_bulk.min(s.ess_tail))
            .fold(f64::INFINITY, f64::min);
        let grow = if min_ess.is_finite() && min_ess > 0.0 && min_ess < convergence.ess_min {
            (1.2 * convergence.ess_min / min_ess).max(1.5)
        } else {
            2.0
        };
        Some((have * grow).ceil() as u64)
    };
    let chains = sample_until(
        post,
        &x0,
        settings,
        max_draws,
        &more,
        seed,
        Purpose::NoiseChain,
        pulsar_index,
        done,
    )?;
    let lik = post.likelihood();
    let parameters: Vec<String> = free
        .iter()
        .map(|&i| lik.parameters()[i].name.clone())
        .collect();
    let physical = map_draws(&chains, &to_physical);
    let summaries = summarise_coordinates(&physical);
    let divergences: usize = chains.iter().map(ChainDraws::divergences).sum();
    let kept: usize = chains.iter().map(ChainDraws::len).sum();
    let converged = summaries
        .iter()
        .all(|s| s.converged(convergence.rhat_max, convergence.ess_min));
    Ok(PulsarSamples {
        parameters,
        indices: free,
        physical,
        summaries,
        divergences,
        warmup_divergences: chains.iter().map(|c| c.warmup_divergences).sum(),
        max_depth_hits: chains.iter().map(|c| c.max_depth_hits).sum(),
        gradient_evaluations: chains.iter().map(|c| c.gradient_evaluations).sum(),
        converged,
        diverging: divergences as f64 > convergence.divergence_share_max * kept as f64,
        chains,
    })
}
