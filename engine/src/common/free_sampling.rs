//! Sampling the free spectrum of the common process with NUTS (docs/common-process.md, "Free
//! spectrum"): the unconstrained posterior of [`FreeSpectrumPosterior`] through the shared
//! sampler glue (`sampler/`), per-frequency posterior summaries on the log10 rho scale with
//! split R-hat and bulk/tail ESS (Vehtari et al. 2021), the chain table, and the power law of
//! the grid fit beside it for the figure.
//!
//! Chain c of model m draws from `rng::stream(seed, FreeSpectrumChain, (m << 16) | c)` with m the
//! position of the model in [`CommonModel::ALL`], so the draws depend on (seed, model, chain)
//! alone, not on the thread count or on which other models are sampled.

use super::draws::DrawSettings;
use super::evidence::CommonFit;
use super::free_spectrum::{FreeSpectrum, FreeSpectrumPosterior};
use super::likelihood::{CommonData, CommonModel};
use crate::chains::{ChainTable, Parameter};
use crate::error::{Error, Result};
use crate::rng::Purpose;
use crate::sampler::diagnostics::quantile_sorted;
use crate::sampler::{
    chain_table, map_draws, sample, summarise_coordinates, ChainDraws, LogDensity, SamplerSettings,
};
use serde::{Deserialize, Serialize};

impl LogDensity for FreeSpectrumPosterior {
    fn dim(&self) -> usize {
        self.likelihood.k
    }
    fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        let (v, g) = self.log_density(x)?;
        if !v.is_finite() || g.iter().any(|d| !d.is_finite()) {
            return Err(Error::NonFinite {
                what: "the free-spectrum log density".into(),
            });
        }
        grad.copy_from_slice(&g);
        Ok(v)
    }
}

/// One row of `free-spectrum.csv`: the posterior of log10 rho_j of one model.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct FreeSpectrumRow {
    pub model: String,
    /// j in f_j = j / T_span.
    pub frequency_index: usize,
    pub frequency_hz: f64,
    pub median: f64,
    pub lo_68: f64,
    pub hi_68: f64,
    pub lo_95: f64,
    pub hi_95: f64,
    pub rhat: f64,
    pub ess_bulk: f64,
    pub ess_tail: f64,
    /// log10 rho_j of the power law at the fixed-index posterior median amplitude of the same
    /// model's grid fit, A^2 phi_0(f_j; gamma) (empty when that model was not fitted).
    pub power_law_log10_rho: Option<f64>,
}

/// The sampled free spectrum of one model.
#[derive(Clone, Debug)]
pub struct FreeSpectrumSamples {
    pub model: CommonModel,
    pub chains: Vec<ChainDraws>,
    /// The draws on the log10 rho scale, per chain.
    pub log10_rho: Vec<Vec<Vec<f64>>>,
    pub rows: Vec<FreeSpectrumRow>,
    /// Divergent transitions after warm-up, over all chains.
    pub divergences: usize,
}

/// The free-spectrum settings of a `common` run.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct FreeSpectrumSettings {
    pub models: Vec<CommonModel>,
    pub log10_power_min: f64,
    pub log10_power_max: f64,
    pub sampler: SamplerSettings,
    pub seed: u64,
}

impl Default for FreeSpectrumSettings {
    /// No model; log10 rho_j uniform over [-20, -8] (s^2), wide enough to hold both a white
    /// floor and any plausible background at the lowest frequency (our choice); the sampler's
    /// own defaults; the common seed 2026.
    fn default() -> Self {
        FreeSpectrumSettings {
            models: Vec::new(),
            log10_power_min: -20.0,
            log10_power_max: -8.0,
            sampler: SamplerSettings::default(),
            seed: DrawSettings::default().seed,
        }
    }
}

/// Refuse a free spectrum whose estimated wall time exceeds this many minutes, unless told
/// otherwise (our choice: a command run interactively should not silently take an hour).
pub const DEFAULT_MAX_MINUTES: f64 = 10.0;

impl FreeSpectrumSettings {
    /// Check every setting before any work.
    pub fn check(&self) -> Result<()> {
        self.sampler.check()?;
        if self.models.is_empty() {
            return Err(Error::setting(
                "free-spectrum",
                "no correlation model chosen for the free spectrum",
            ));
        }
        let [lo, hi] = [self.log10_power_min, self.log10_power_max];
        if !(lo.is_finite() && hi.is_finite() && lo < hi && lo >= -40.0 && hi <= 0.0) {
            return Err(Error::setting(
                "log10-power-range",
                format!(
                    "the prior range [{lo}, {hi}] of log10 rho (s^2) holds no mass or leaves \
                     [-40, 0]: give -40 <= LO < HI <= 0"
                ),
            ));
        }
        Ok(())
    }
}

/// Leapfrog steps per NUTS iteration assumed by [`estimate_free_spectrum_cost`]: a tree of
/// depth 4 (2^4 - 1 steps), typical of a well-adapted NUTS run on a smooth posterior of a few
/// dozen parameters (common practice, not a bound: the sampler may take up to
/// 2^max_depth - 1).
pub const ASSUMED_STEPS_PER_ITERATION: u64 = 15;

/// What sampling the free spectrum of one model is expected to cost, before it starts.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct FreeSpectrumCost {
    pub model: CommonModel,
    /// Size of the largest matrix factored per gradient (2K per pulsar for CURN; r 2K for a
    /// pattern of rank r).
    pub dimension: usize,
    /// Floating-point operations per gradient: a Cholesky factor (d^3/3) and the triangular
    /// inverse that gives diag(Q^-1) (d^3) per block (Golub & Van Loan 2013, Matrix
    /// Computations, 4th ed., secs. 3.1, 4.2).
    pub flops_per_gradient: f64,
    /// Measured wall time of one gradient on this machine (the best of three).
    pub seconds_per_gradient: f64,
    /// chains x (warm-up + draws) x [`ASSUMED_STEPS_PER_ITERATION`].
    pub gradients: u64,
    /// Iterations per chain (warm-up + draws).
    pub iterations: u64,
    /// Expected wall time with the chains spread over `threads` threads.
    pub seconds: f64,
    /// The same in minutes.
    pub minutes: f64,
    pub threads: usize,
}

/// Estimate the cost of sampling the free spectrum of `model`: build its likelihood, time one
/// value-and-gradient at the middle of the prior (the best of three), and multiply by the
/// expected number of gradients. Runs before any sampling, so a run that would take hours can
/// be refused with advice (docs/common-process.md, "Sampling it").
pub fn estimate_free_spectrum_cost(
    data: &CommonData,
    model: CommonModel,
    settings: &FreeSpectrumSettings,
) -> Result<FreeSpectrumCost> {
    settings.check()?;
    let like = FreeSpectrum::new(data, model)?;
    let dimension = like.largest_block();
    let blocks = like.n_blocks();
    let mid = 0.5 * (settings.log10_power_min + settings.log10_power_max);
    let point = vec![mid; data.k()];
    let mut best = f64::INFINITY;
    for _ in 0..3 {
        let t = std::time::Instant::now();
        like.log_likelihood(&point)?;
        best = best.min(t.elapsed().as_secs_f64());
    }
    let d = dimension as f64;
    let s = &settings.sampler;
    let gradients = s.chains as u64 * (s.warmup + s.draws) * ASSUMED_STEPS_PER_ITERATION;
    let threads = rayon::current_num_threads().max(1);
    let waves = s.chains.div_ceil(threads).max(1) as f64;
    let seconds = best * (gradients / s.chains as u64) as f64 * waves;
    Ok(FreeSpectrumCost {
        model,
        dimension,
        flops_per_gradient: blocks as f64 * (d * d * d / 3.0 + d * d * d),
        seconds_per_gradient: best,
        gradients,
        iterations: s.warmup + s.draws,
        seconds,
        minutes: seconds / 60.0,
        threads,
    })
}

fn model_item(model: CommonModel) -> u64 {
    CommonModel::ALL
        .iter()
        .position(|&m| m == model)
        .unwrap_or(0) as u64
}

/// Sample the free spectrum of `model` (chains from the middle of the prior range, y = 0, plus
/// the sampler's jitter) and summarise every frequency.
pub fn sample_free_spectrum(
    data: &CommonData,
    model: CommonModel,
    settings: &FreeSpectrumSettings,
    grid: Option<&CommonFit>,
) -> Result<FreeSpectrumSamples> {
    settings.check()?;
    let post = FreeSpectrumPosterior::new(
        FreeSpectrum::new(data, model)?,
        settings.log10_power_min,
        settings.log10_power_max,
    )?;
    let k = data.k();
    let start = vec![0.0; k];
    let chains = sample(
        &post,
        &start,
        &settings.sampler,
        settings.seed,
        Purpose::FreeSpectrumChain,
        model_item(model),
        &|_| {},
    )?;
    let map = |y: &[f64]| post.to_log10_rho(y);
    let log10_rho = map_draws(&chains, &map);
    let summaries = summarise_coordinates(&log10_rho);
    let power_law = grid.and_then(|g| g.fits.get(&model)).map(|f| {
        let a = f.fixed.posterior.summary().median;
        let phi0 = data.phi0(f.fixed.spectral_index);
        (0..k)
            .map(|j| 2.0 * a + phi0[2 * j].log10())
            .collect::<Vec<f64>>()
    });
    let mut rows = Vec::with_capacity(k);
    for j in 0..k {
        let mut v: Vec<f64> = log10_rho.iter().flatten().map(|d| d[j]).collect();
        if v.iter().any(|x| !x.is_finite()) {
            return Err(Error::NonFinite {
                what: format!(
                    "a free-spectrum draw of {} at frequency {}",
                    model.name(),
                    j + 1
                ),
            });
        }
        v.sort_by(f64::total_cmp);
        let q = |p: f64| quantile_sorted(&v, p);
        let s = &summaries[j];
        rows.push(FreeSpectrumRow {
            model: model.name().to_string(),
            frequency_index: j + 1,
            frequency_hz: data.freqs[j],
            median: q(0.5),
            lo_68: q(0.158_655_253_931_457_05),
            hi_68: q(0.841_344_746_068_542_9),
            lo_95: q(0.025),
            hi_95: q(0.975),
            rhat: s.rhat,
            ess_bulk: s.ess_bulk,
            ess_tail: s.ess_tail,
            power_law_log10_rho: power_law.as_ref().map(|p| p[j]),
        });
    }
    let divergences = chains.iter().map(ChainDraws::divergences).sum();
    Ok(FreeSpectrumSamples {
        model,
        chains,
        log10_rho,
        rows,
        divergences,
    })
}

impl FreeSpectrumSamples {
    /// The chain table (`chain,draw,log_posterior,diverging,common.log10_rho_1,...`);
    /// `log_posterior` is the log density on the sampler's unconstrained scale.
    pub fn table(&self) -> Result<ChainTable> {
        let k = self.rows.len();
        chain_table(
            (1..=k).map(Parameter::CommonLog10Power).collect(),
            &self.chains,
            &self.log10_rho,
        )
    }

    /// Largest R-hat and smallest bulk ESS over the frequencies.
    pub fn worst(&self) -> (f64, f64) {
        let rhat = self.rows.iter().map(|r| r.rhat).fold(0.0, f64::max);
        let ess = self
            .rows
            .iter()
            .map(|r| r.ess_bulk)
            .fold(f64::INFINITY, f64::min);
        (rhat, ess)
    }
}

#[derive(Serialize)]
struct ModelDiagnostics {
    model: &'static str,
    chain_table: String,
    max_rhat: f64,
    min_ess_bulk: f64,
    min_ess_tail: f64,
    divergences: usize,
    converged: bool,
}

#[derive(Serialize)]
struct FreeSpectrumSummary<'a> {
    settings: &'a FreeSpectrumSettings,
    prior: String,
    models: Vec<ModelDiagnostics>,
    convergence_rule: &'static str,
    assumptions: &'static str,
}

/// R-hat below 1.01 and bulk and tail ESS at least 400 at every frequency: the thresholds
/// Vehtari et al. 2021 (Bayesian Analysis 16, 667, sec. 4) recommend.
pub const FREE_SPECTRUM_CONVERGENCE: &str =
    "R-hat < 1.01 and bulk and tail ESS >= 400 at every frequency (Vehtari et al. 2021)";

/// What the free-spectrum outputs assume.
pub const FREE_SPECTRUM_ASSUMPTIONS: &str = "The free spectrum assumes the noise model (every pulsar's white, red and DM noise held fixed at noise.toml) and a prior uniform in log10 rho_j on the stated range at each frequency; intervals are central posterior quantiles of the draws. A detection claim needs the collaboration's full analysis.";

/// Write `free-spectrum.csv` (every model's per-frequency posterior), one chain table
/// `free-spectrum-chains-MODEL.csv` per model, and `free-spectrum.json` (settings, prior,
/// diagnostics) into the output set. Returns the file names written.
pub fn write_free_spectrum(
    set: &mut crate::output::OutputSet,
    settings: &FreeSpectrumSettings,
    samples: &[FreeSpectrumSamples],
) -> Result<Vec<String>> {
    let rows: Vec<&FreeSpectrumRow> = samples.iter().flat_map(|s| &s.rows).collect();
    set.write(
        "free-spectrum.csv",
        &super::write::to_csv(&rows, "free-spectrum.csv")?,
    )?;
    let mut names = vec!["free-spectrum.csv".to_string()];
    let mut models = Vec::new();
    for s in samples {
        let name = format!("free-spectrum-chains-{}.csv", s.model.name());
        set.write(&name, s.table()?.to_csv()?.as_bytes())?;
        let (max_rhat, min_ess_bulk) = s.worst();
        let min_ess_tail = s
            .rows
            .iter()
            .map(|r| r.ess_tail)
            .fold(f64::INFINITY, f64::min);
        models.push(ModelDiagnostics {
            model: s.model.name(),
            chain_table: name.clone(),
            max_rhat,
            min_ess_bulk,
            min_ess_tail,
            divergences: s.divergences,
            converged: max_rhat < 1.01 && min_ess_bulk >= 400.0 && min_ess_tail >= 400.0,
        });
        names.push(name);
    }
    set.write_json(
        "free-spectrum.json",
        &FreeSpectrumSummary {
            settings,
            prior: format!(
                "log10 rho_j (s^2) uniform on [{}, {}], independently at each frequency",
                settings.log10_power_min, settings.log10_power_max
            ),
            models,
            convergence_rule: FREE_SPECTRUM_CONVERGENCE,
            assumptions: FREE_SPECTRUM_ASSUMPTIONS,
        },
    )?;
    names.push("free-spectrum.json".into());
    Ok(names)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spectrum::frequencies;
    use ndarray::{Array1, Array2};

    /// A one-pulsar, one-frequency CURN array whose free-spectrum posterior is known in closed
    /// form: Z = z I_2, X = (x1, x2), so ln L(rho) = sum_i [x_i^2 rho / (2 (1 + z rho))] -
    /// ln(1 + z rho) (the Woodbury form of docs/common-process.md with scalar blocks). The
    /// posterior median of log10 rho under a uniform prior on [lo, hi] is found by a fine
    /// trapezoid quadrature of that density (independent of the sampler), and the NUTS median
    /// must lie within 4.4 Monte Carlo standard errors of it (two-sided false-failure rate
    /// 1e-5; the standard error of a median is sqrt(pi/2) sd / sqrt(ESS) for a near-Gaussian
    /// posterior, e.g. Kendall & Stuart, vol. 1, sec. 10.10, recalled from memory).
    #[test]
    fn nuts_median_matches_the_quadrature_median_of_a_closed_form_posterior() {
        let (z, x) = (4.0e12, [3.0e6, -2.0e6]);
        let data = CommonData {
            labels: vec!["Q1".into()],
            directions: vec![[1.0, 0.0, 0.0]],
            x: vec![Array1::from(x.to_vec())],
            z: vec![Array2::eye(2) * z],
            freqs: frequencies(1, 3e8),
            t_span: 3e8,
        };
        let (lo, hi) = (-16.0, -8.0);
        let ln_l = |u: f64| {
            let rho = 10f64.powf(u);
            x.iter()
                .map(|xi| xi * xi * rho / (2.0 * (1.0 + z * rho)) - 0.5 * (1.0 + z * rho).ln())
                .sum::<f64>()
        };
        let n = 200_001;
        let us: Vec<f64> = (0..n)
            .map(|i| lo + (hi - lo) * i as f64 / (n - 1) as f64)
            .collect();
        let lp: Vec<f64> = us.iter().map(|&u| ln_l(u)).collect();
        let m = lp.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let p: Vec<f64> = lp.iter().map(|v| (v - m).exp()).collect();
        let mut cdf = vec![0.0; n];
        for i in 1..n {
            cdf[i] = cdf[i - 1] + 0.5 * (p[i] + p[i - 1]) * (us[i] - us[i - 1]);
        }
        let total = cdf[n - 1];
        let mid = cdf.partition_point(|&c| c < 0.5 * total);
        let want = us[mid];
        let mean: f64 = us.iter().zip(&p).map(|(u, w)| u * w).sum::<f64>() / p.iter().sum::<f64>();
        let var: f64 = us
            .iter()
            .zip(&p)
            .map(|(u, w)| (u - mean).powi(2) * w)
            .sum::<f64>()
            / p.iter().sum::<f64>();
        let settings = FreeSpectrumSettings {
            models: vec![CommonModel::Curn],
            log10_power_min: lo,
            log10_power_max: hi,
            sampler: SamplerSettings {
                warmup: 300,
                draws: 1000,
                chains: 4,
                ..Default::default()
            },
            seed: 7,
        };
        let s = sample_free_spectrum(&data, CommonModel::Curn, &settings, None).unwrap();
        let r = &s.rows[0];
        let se = (std::f64::consts::PI / 2.0).sqrt() * var.sqrt() / r.ess_bulk.sqrt();
        assert!(
            (r.median - want).abs() < 4.4 * se,
            "NUTS median {} vs quadrature {want} (se {se}, ESS {})",
            r.median,
            r.ess_bulk
        );
        // R-hat below 1.01 (Vehtari et al. 2021's recommended threshold).
        assert!(r.rhat < 1.01, "R-hat {}", r.rhat);
        assert!(r.lo_95 < r.lo_68 && r.lo_68 < r.median && r.median < r.hi_68 && r.hi_68 < r.hi_95);
        // The chain table carries every draw and reads back.
        let t = s.table().unwrap();
        assert_eq!(t.len(), 4000);
        let back = ChainTable::parse(
            t.to_csv().unwrap().as_bytes(),
            std::path::Path::new("c.csv"),
        )
        .unwrap();
        assert_eq!(back.len(), 4000);
        // Same seed, same draws (independent of threads by construction of the streams).
        let again = sample_free_spectrum(&data, CommonModel::Curn, &settings, None).unwrap();
        assert_eq!(again.rows, s.rows);
    }

    #[test]
    fn free_spectrum_settings_without_mass_are_refused() {
        let mut s = FreeSpectrumSettings {
            models: vec![CommonModel::Curn],
            log10_power_min: -10.0,
            log10_power_max: -10.0,
            sampler: SamplerSettings::default(),
            seed: 1,
        };
        assert!(s
            .check()
            .unwrap_err()
            .to_string()
            .contains("log10-power-range"));
        s.log10_power_max = -8.0;
        s.models.clear();
        assert!(s.check().is_err());
    }
}
