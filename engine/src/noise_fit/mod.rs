//! Per-pulsar Bayesian noise estimation (`ptacorr noise`; docs/noise-estimation.md): for every
//! pulsar of a release, the likelihood of [`crate::likelihood`] under the priors of
//! [`crate::priors`], its maximum a posteriori point ([`map`]), posterior draws by NUTS
//! ([`sample`]), and the output files: a `noise.toml` that `correlate` reads (posterior medians
//! or MAP values), the chain table of every pulsar, a per-parameter estimates table, a
//! per-pulsar diagnostics table, the priors used and a provenance record.

pub mod map;
pub mod posterior;
pub mod sample;
pub mod truth;

use crate::error::{Error, Result};
use crate::likelihood::{CommonTerm, PulsarLikelihood, WhiteGramStatus};
use crate::noise::{NoiseModel, PulsarNoise, RedProcess};
use crate::output::{check_manifest, OutputSet};
use crate::priors::{PriorFile, PulsarPrior};
use crate::reduce::FrequencyGrid;
use crate::release::{Pulsar, Release};
use crate::sampler::SamplerSettings;
use crate::shard::Shard;
use crate::white_gram::GramSettings;
use map::{maximum_a_posteriori, MapResult, MapSettings};
use posterior::Posterior;
use rayon::prelude::*;
use sample::{sample_pulsar, Convergence, PulsarSamples, SampleMode};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::path::Path;

/// Which values `noise.toml` receives.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum ModelValues {
    /// Posterior medians of the sampled parameters (MAP for the others).
    #[default]
    Median,
    /// MAP values.
    Map,
}

/// Settings of a noise run.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct NoiseSettings {
    pub seed: u64,
    pub map: MapSettings,
    pub mode: SampleMode,
    pub sampler: SamplerSettings,
    /// Chains whose draws miss the convergence thresholds after `sampler.draws` draws are
    /// continued in blocks up to this many kept draws per chain (at least `sampler.draws`;
    /// `None`: 4 x `sampler.draws`; equal to `sampler.draws`: never continued).
    pub max_draws: Option<u64>,
    pub convergence: Convergence,
    pub values: ModelValues,
    /// The pulsars of this shard (contiguous block of the release's order); recorded in the
    /// provenance as shard_index/shard_count, not among the settings that shards must share.
    #[serde(skip)]
    pub shard: Shard,
}

impl Default for NoiseSettings {
    fn default() -> Self {
        NoiseSettings {
            seed: 1,
            map: MapSettings::default(),
            mode: SampleMode::Full,
            sampler: SamplerSettings::default(),
            max_draws: None,
            convergence: Convergence::default(),
            values: ModelValues::Median,
            shard: Shard::ALL,
        }
    }
}

/// One hyperparameter's estimates.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Estimate {
    pub pulsar: String,
    pub parameter: String,
    /// Value at the maximum a posteriori point.
    pub map: f64,
    pub prior_low: f64,
    pub prior_high: f64,
    /// The MAP sits within 1e-3 of the prior range's width from an edge.
    pub map_at_edge: bool,
    /// Sampled (false: held at its MAP, or no sampling).
    pub sampled: bool,
    /// Posterior summaries (empty when not sampled).
    pub median: Option<f64>,
    pub mean: Option<f64>,
    pub sd: Option<f64>,
    pub q05: Option<f64>,
    pub q16: Option<f64>,
    pub q84: Option<f64>,
    pub q95: Option<f64>,
    /// Split R-hat (rank-normalised, folded; Vehtari et al. 2021).
    pub rhat: Option<f64>,
    pub ess_bulk: Option<f64>,
    pub ess_tail: Option<f64>,
}

/// The fit of one pulsar.
#[derive(Clone, Debug)]
pub struct PulsarFit {
    pub label: String,
    pub n_toa: usize,
    pub parameters: Vec<String>,
    pub bounds: Vec<[f64; 2]>,
    pub map: MapResult,
    /// The noise model written to `noise.toml` (posterior medians or MAP, per the settings).
    pub noise: PulsarNoise,
    /// Posterior draws (absent without sampling).
    pub samples: Option<PulsarSamples>,
    /// Notes on how the likelihood was evaluated (the interpolated white-noise Gram missed its
    /// check, so the exact evaluation was used).
    pub notes: Vec<String>,
}

/// One row of `diagnostics.csv`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DiagnosticsRow {
    pub pulsar: String,
    pub n_toa: usize,
    pub n_parameters: usize,
    pub map_log_posterior: f64,
    pub map_converged: bool,
    pub map_starts: usize,
    pub map_agreeing_starts: usize,
    pub map_iterations: u64,
    pub map_stop_reason: String,
    /// "map-only", "full" or "fixed-white".
    pub mode: String,
    pub sampled_parameters: usize,
    pub chains: Option<usize>,
    pub draws_per_chain: Option<u64>,
    pub divergences: Option<usize>,
    pub warmup_divergences: Option<usize>,
    pub max_depth_hits: Option<usize>,
    pub gradient_evaluations: Option<u64>,
    pub max_rhat: Option<f64>,
    pub min_ess_bulk: Option<f64>,
    pub min_ess_tail: Option<f64>,
    /// Every sampled parameter has R-hat and bulk/tail ESS within the thresholds.
    pub posterior_converged: Option<bool>,
    /// Divergences above the allowed share of the kept draws.
    pub posterior_diverging: Option<bool>,
}

impl PulsarFit {
    /// The estimates rows of this pulsar.
    pub fn estimates(&self) -> Vec<Estimate> {
        self.parameters
            .iter()
            .zip(&self.bounds)
            .zip(&self.map.values)
            .enumerate()
            .map(|(k, ((name, &[lo, hi]), &v))| {
                let summary = self.samples.as_ref().and_then(|s| {
                    s.indices
                        .iter()
                        .position(|&i| i == k)
                        .map(|j| s.summaries[j].clone())
                });
                let get =
                    |f: fn(&crate::sampler::diagnostics::Summary) -> f64| summary.as_ref().map(f);
                Estimate {
                    pulsar: self.label.clone(),
                    parameter: name.clone(),
                    map: v,
                    prior_low: lo,
                    prior_high: hi,
                    map_at_edge: (v - lo).min(hi - v) < 1e-3 * (hi - lo),
                    sampled: summary.is_some(),
                    median: get(|s| s.median),
                    mean: get(|s| s.mean),
                    sd: get(|s| s.sd),
                    q05: get(|s| s.q05),
                    q16: get(|s| s.q16),
                    q84: get(|s| s.q84),
                    q95: get(|s| s.q95),
                    rhat: get(|s| s.rhat),
                    ess_bulk: get(|s| s.ess_bulk),
                    ess_tail: get(|s| s.ess_tail),
                }
            })
            .collect()
    }

    /// The diagnostics row of this pulsar.
    pub fn diagnostics(&self, mode: SampleMode) -> DiagnosticsRow {
        let best = &self.map.runs[self.map.best];
        let s = self.samples.as_ref();
        DiagnosticsRow {
            pulsar: self.label.clone(),
            n_toa: self.n_toa,
            n_parameters: self.parameters.len(),
            map_log_posterior: self.map.log_posterior,
            map_converged: self.map.converged,
            map_starts: self.map.runs.len(),
            map_agreeing_starts: self.map.agreeing_runs,
            map_iterations: best.iterations,
            map_stop_reason: best.reason.clone(),
            mode: mode_name(mode).to_string(),
            sampled_parameters: s.map_or(0, |s| s.parameters.len()),
            chains: s.map(|s| s.chains.len()),
            draws_per_chain: s.map(|s| s.chains.first().map_or(0, |c| c.len() as u64)),
            divergences: s.map(|s| s.divergences),
            warmup_divergences: s.map(|s| s.warmup_divergences),
            max_depth_hits: s.map(|s| s.max_depth_hits),
            gradient_evaluations: s.map(|s| s.gradient_evaluations),
            max_rhat: s.map(PulsarSamples::max_rhat),
            min_ess_bulk: s.map(PulsarSamples::min_ess_bulk),
            min_ess_tail: s.map(PulsarSamples::min_ess_tail),
            posterior_converged: s.map(|s| s.converged),
            posterior_diverging: s.map(|s| s.diverging),
        }
    }

    /// Warnings about this pulsar's fit (MAP not converged, chains not converged, divergences).
    pub fn warnings(&self) -> Vec<String> {
        let mut w = self.notes.clone();
        w.extend(self.map.warning(&self.label));
        if let Some(s) = &self.samples {
            if !s.converged {
                let worst = s
                    .summaries
                    .iter()
                    .zip(&s.parameters)
                    .max_by(|a, b| {
                        let bad = |x: &crate::sampler::diagnostics::Summary| {
                            if x.rhat.is_nan() {
                                f64::INFINITY
                            } else {
                                x.rhat
                            }
                        };
                        bad(a.0).total_cmp(&bad(b.0))
                    })
                    .map(|(x, n)| {
                        format!(
                            "{n}: R-hat {:.3}, bulk ESS {:.0}, tail ESS {:.0}",
                            x.rhat, x.ess_bulk, x.ess_tail
                        )
                    })
                    .unwrap_or_default();
                w.push(format!(
                    "pulsar {}: the chains have NOT converged (worst {worst}); do not use its posterior before running longer chains",
                    self.label
                ));
            }
            if s.diverging {
                w.push(format!(
                    "pulsar {}: {} divergent transitions in {} draws; the posterior may be improper or badly scaled and its summaries biased",
                    self.label,
                    s.divergences,
                    s.chains.iter().map(|c| c.len()).sum::<usize>()
                ));
            }
        }
        w
    }
}

/// The name of a sampling mode in files.
pub fn mode_name(mode: SampleMode) -> &'static str {
    match mode {
        SampleMode::MapOnly => "map-only",
        SampleMode::Full => "full",
        SampleMode::FixedWhite => "fixed-white",
    }
}

/// Fit one pulsar: MAP, then (unless `MapOnly`) posterior draws started at the MAP. The
/// `index` of the pulsar in the release seeds its starting points and chains; `chain_done` is
/// called after each chain.
pub fn fit_pulsar(
    p: &Pulsar,
    prior: &PulsarPrior,
    grid: &FrequencyGrid,
    settings: &NoiseSettings,
    index: u64,
    chain_done: &(dyn Fn(usize) + Sync),
) -> Result<PulsarFit> {
    let mut lik = PulsarLikelihood::new(p, &prior.components, grid)?;
    // Distinct TOA uncertainties: T^T N^-1 T from the checked interpolant in EQUAD^2 / EFAC^2
    // over the prior range (white_gram.rs); a failed check leaves the exact evaluation, noted.
    let mut notes = Vec::new();
    if let WhiteGramStatus::Failed(note) =
        lik.interpolate_white(&prior.bounds, &GramSettings::default())
    {
        notes.push(note);
    }
    let lik = lik;
    let post = Posterior::new(&lik, prior)?;
    let map = maximum_a_posteriori(&post, &settings.map, settings.seed, index)?;
    let theta_map = post.theta(&post.unconstrained(&map.values));
    let samples = match settings.mode {
        SampleMode::MapOnly => None,
        SampleMode::Full => Some(sample_pulsar(
            // The same posterior in the coordinates NUTS crosses easily (posterior.rs).
            &Posterior::new(&lik, prior)?.with_white_ridge(),
            &map.values,
            &settings.sampler,
            settings.max_draws_per_chain(),
            &settings.convergence,
            settings.seed,
            index,
            chain_done,
        )?),
        SampleMode::FixedWhite => {
            let fixed = Posterior::with_fixed_white(&lik, prior, &theta_map)?;
            if fixed.dim() == 0 {
                None
            } else {
                let start: Vec<f64> = fixed.free().iter().map(|&i| theta_map[i]).collect();
                Some(sample_pulsar(
                    &fixed,
                    &start,
                    &settings.sampler,
                    settings.max_draws_per_chain(),
                    &settings.convergence,
                    settings.seed,
                    index,
                    chain_done,
                )?)
            }
        }
    };
    let mut theta = theta_map.clone();
    if let (ModelValues::Median, Some(s)) = (settings.values, &samples) {
        for (&i, summary) in s.indices.iter().zip(&s.summaries) {
            theta[i] = summary.median;
        }
    }
    let noise = lik.noise_at(&theta);
    Ok(PulsarFit {
        label: p.label.clone(),
        n_toa: p.n_toa(),
        parameters: lik.parameters().iter().map(|h| h.name.clone()).collect(),
        bounds: prior.bounds.clone(),
        noise,
        map,
        samples,
        notes,
    })
}

/// Units of progress of a run over `n_pulsars`: one per chain, or one per pulsar without
/// sampling.
pub fn progress_units(n_pulsars: u64, settings: &NoiseSettings) -> u64 {
    match settings.mode {
        SampleMode::MapOnly => n_pulsars,
        _ => n_pulsars * settings.sampler.chains as u64,
    }
}

/// The result of a noise run over the pulsars of one shard.
pub struct NoiseRun {
    pub fits: Vec<PulsarFit>,
    /// The common process written to `noise.toml` (a fixed one only).
    pub common: Option<RedProcess>,
    pub provenance: NoiseProvenance,
    /// True values of the fitted parameters when the release has `truth.toml` (simulated).
    pub truth: Vec<truth::TruthValue>,
    /// The priors file with every default written out.
    pub priors_toml: String,
}

/// Inputs and settings of a noise run.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct NoiseProvenance {
    pub program: String,
    pub version: String,
    pub release_title: String,
    pub input_hash: String,
    /// SHA-256 of the priors file as used (the text written to `priors.toml`).
    pub priors_hash: String,
    pub priors_source: String,
    pub settings: serde_json::Value,
    pub shard_index: u64,
    pub shard_count: u64,
    /// Labels of the pulsars fitted here, in release order.
    pub pulsars: Vec<String>,
    pub n_pulsars_in_release: usize,
    /// Warnings about the release (release.rs).
    #[serde(default)]
    pub warnings: Vec<String>,
    /// Warnings about the fits (not converged, divergences), in pulsar order.
    #[serde(default)]
    pub fit_warnings: Vec<String>,
}

/// Check the settings of a run (before any work).
pub fn check_settings(settings: &NoiseSettings) -> Result<()> {
    if settings.map.starts == 0 || settings.map.starts > 1000 {
        return Err(Error::setting(
            "starts",
            format!("{} is outside [1, 1000]", settings.map.starts),
        ));
    }
    if settings.mode != SampleMode::MapOnly {
        settings.sampler.check()?;
        let cap = settings.max_draws_per_chain();
        if cap < settings.sampler.draws || cap > crate::sampler::MAX_DRAWS {
            return Err(Error::setting(
                "max-draws",
                format!(
                    "{cap} is outside [{}, {}] (at least --draws)",
                    settings.sampler.draws,
                    crate::sampler::MAX_DRAWS
                ),
            ));
        }
    }
    Ok(())
}

impl NoiseSettings {
    /// The most kept draws per chain: `max_draws`, or 4 x `sampler.draws` when unset.
    pub fn max_draws_per_chain(&self) -> u64 {
        self.max_draws
            .unwrap_or_else(|| self.sampler.draws.saturating_mul(4))
    }
}

/// Fit the pulsars of `settings.shard` in parallel (one rayon task per pulsar, chains in
/// parallel within); `progress` is called once per unit of [`progress_units`]. Settings and
/// priors are checked before any work.
pub fn fit_release(
    release: &Release,
    priors: &PriorFile,
    settings: &NoiseSettings,
    progress: &(dyn Fn() + Sync),
) -> Result<NoiseRun> {
    check_settings(settings)?;
    priors.check_release(release)?;
    let grid = FrequencyGrid::for_release(release, 1)?;
    // The simulated truth (if any) is read before the work, so a bad file stops the run early.
    let truth = truth::read_truth(&release.dir)?;
    let range = settings.shard.range(release.pulsars.len() as u64);
    let chosen: Vec<(u64, &Pulsar)> = range
        .clone()
        .map(|i| (i, &release.pulsars[i as usize]))
        .collect();
    let priors_per: Vec<PulsarPrior> = chosen
        .iter()
        .map(|(_, p)| priors.pulsar(p))
        .collect::<Result<_>>()?;
    crate::linalg::single_threaded_blas();
    let fits: Vec<PulsarFit> = chosen
        .par_iter()
        .zip(&priors_per)
        .map(|((i, p), prior)| {
            let fit = fit_pulsar(p, prior, &grid, settings, *i, &|_| {
                if settings.mode != SampleMode::MapOnly {
                    progress();
                }
            });
            if settings.mode == SampleMode::MapOnly {
                progress();
            }
            fit
        })
        .collect::<Result<_>>()?;
    let priors_toml = priors.to_toml();
    let common = match priors.common_spec()? {
        Some(c) => match c.term {
            CommonTerm::Fixed(pl) => Some(RedProcess {
                log10_amplitude: pl.log10_amplitude,
                spectral_index: pl.spectral_index,
                n_frequencies: Some(c.n_frequencies),
            }),
            CommonTerm::Free => None,
        },
        None => None,
    };
    let provenance = NoiseProvenance {
        program: "ptacorr".into(),
        version: crate::VERSION.into(),
        release_title: release.title.clone(),
        input_hash: release.input_hash.clone(),
        priors_hash: format!("sha256:{:x}", Sha256::digest(priors_toml.as_bytes())),
        priors_source: priors.path.display().to_string(),
        settings: serde_json::to_value(settings).unwrap_or(serde_json::Value::Null),
        shard_index: settings.shard.index,
        shard_count: settings.shard.count,
        pulsars: fits.iter().map(|f| f.label.clone()).collect(),
        n_pulsars_in_release: release.pulsars.len(),
        warnings: release.warnings.clone(),
        fit_warnings: fits.iter().flat_map(PulsarFit::warnings).collect(),
    };
    let names: Vec<(&str, &[String])> = fits
        .iter()
        .map(|f| (f.label.as_str(), f.parameters.as_slice()))
        .collect();
    let truth = truth::truth_values(&truth, &names);
    Ok(NoiseRun {
        fits,
        common,
        provenance,
        priors_toml,
        truth,
    })
}

/// The noise model of a run, as `noise.toml` holds it.
pub fn noise_model(run: &NoiseRun) -> NoiseModel {
    NoiseModel {
        common: run.common,
        pulsars: run
            .fits
            .iter()
            .map(|f| (f.label.clone(), f.noise.clone()))
            .collect(),
    }
}

/// The file names of a noise folder.
pub const NOISE_FILE: &str = "noise.toml";
/// First line of a written `noise.toml`.
fn noise_header(values: ModelValues, mode: SampleMode) -> &'static str {
    match (values, mode) {
        (_, SampleMode::MapOnly) | (ModelValues::Map, _) => {
            "# Noise model estimated by ptacorr noise (MAP values)\n"
        }
        (ModelValues::Median, SampleMode::Full) => {
            "# Noise model estimated by ptacorr noise (posterior medians)\n"
        }
        (ModelValues::Median, SampleMode::FixedWhite) => {
            "# Noise model estimated by ptacorr noise (white noise at MAP; red and DM posterior medians)\n"
        }
    }
}
pub const ESTIMATES_FILE: &str = "estimates.csv";
pub const DIAGNOSTICS_FILE: &str = "diagnostics.csv";
pub const PRIORS_FILE: &str = "priors.toml";
pub const PROVENANCE_FILE: &str = "provenance.json";
/// Folder of the chain tables, one `LABEL.csv` per pulsar.
pub const CHAINS_DIR: &str = "chains";

/// The settings of a run as recorded in its provenance.
fn recorded_settings(prov: &NoiseProvenance) -> (ModelValues, SampleMode) {
    let get = |k: &str| prov.settings.get(k).cloned();
    let values = get("values")
        .and_then(|v| serde_json::from_value(v).ok())
        .unwrap_or_default();
    let mode = get("mode")
        .and_then(|v| serde_json::from_value(v).ok())
        .unwrap_or(SampleMode::MapOnly);
    (values, mode)
}

/// The files of a noise folder before its chain tables: `noise.toml` (the model, under a first
/// line that says how it was estimated), `estimates.csv`, `diagnostics.csv`, `priors.toml` and
/// (when there are true values) `truth.csv`, the tables from their row types. The one writer of
/// these files, for a run and for the merge of its shards, so both write the same bytes (and
/// the same manifest order) for the same rows.
struct Files<'a> {
    model: &'a NoiseModel,
    estimates: &'a [Estimate],
    diagnostics: &'a [DiagnosticsRow],
    priors_toml: &'a str,
    truth: &'a [truth::TruthValue],
}

impl Files<'_> {
    fn stage(&self, values: ModelValues, mode: SampleMode, set: &mut OutputSet) -> Result<()> {
        // The csv crate's writer, shared with the correlate and common tables (its float form,
        // shortest round trip, reads back bit for bit).
        use crate::common::write::to_csv;
        let noise_text = toml::to_string(self.model).map_err(|e| Error::NonFinite {
            what: format!("noise.toml ({e})"),
        })?;
        set.write(
            NOISE_FILE,
            format!("{}{noise_text}", noise_header(values, mode)).as_bytes(),
        )?;
        set.write(ESTIMATES_FILE, &to_csv(self.estimates, ESTIMATES_FILE)?)?;
        set.write(
            DIAGNOSTICS_FILE,
            &to_csv(self.diagnostics, DIAGNOSTICS_FILE)?,
        )?;
        set.write(PRIORS_FILE, self.priors_toml.as_bytes())?;
        if !self.truth.is_empty() {
            set.write(truth::TRUTH_FILE, &to_csv(self.truth, truth::TRUTH_FILE)?)?;
        }
        Ok(())
    }
}

/// Stage a run's files in `set` (after all computation); the caller commits.
pub fn write_run(run: &NoiseRun, set: &mut OutputSet) -> Result<()> {
    let (values, mode) = recorded_settings(&run.provenance);
    let estimates: Vec<Estimate> = run.fits.iter().flat_map(|f| f.estimates()).collect();
    let diagnostics: Vec<DiagnosticsRow> = run.fits.iter().map(|f| f.diagnostics(mode)).collect();
    Files {
        model: &noise_model(run),
        estimates: &estimates,
        diagnostics: &diagnostics,
        priors_toml: &run.priors_toml,
        truth: &run.truth,
    }
    .stage(values, mode, set)?;
    for f in &run.fits {
        if let Some(s) = &f.samples {
            set.write(
                &format!("{CHAINS_DIR}/{}.csv", f.label),
                s.table()?.to_csv()?.as_bytes(),
            )?;
        }
    }
    set.write_json(PROVENANCE_FILE, &run.provenance)
}

/// The rows of a table of a noise folder, read with the type it is written with.
fn rows_of<T: serde::de::DeserializeOwned>(path: &Path) -> Result<Vec<T>> {
    Ok(crate::output::read_csv::<T>(path)?
        .into_iter()
        .map(|(_, r)| r)
        .collect())
}

/// Merge the folders of the shards of one noise run into the set `out`: every shard present
/// once, all from the same release, priors and settings, each with a valid manifest.
pub fn merge_shards(dirs: &[&Path], out: &mut OutputSet) -> Result<()> {
    let mut shards: Vec<(NoiseProvenance, &Path)> = Vec::new();
    for &d in dirs {
        check_manifest(d)?;
        let path = d.join(PROVENANCE_FILE);
        let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
        let prov: NoiseProvenance = serde_json::from_str(&text)
            .map_err(|e| Error::input(&path, Some(e.line()), None, e.to_string()))?;
        shards.push((prov, d));
    }
    let Some((first, _)) = shards.first().cloned() else {
        return Err(Error::setting("merge", "no folders given"));
    };
    for (p, d) in &shards {
        let same = p.input_hash == first.input_hash
            && p.priors_hash == first.priors_hash
            && p.settings == first.settings
            && p.shard_count == first.shard_count
            && p.version == first.version;
        if !same {
            return Err(Error::input(
                &d.join(PROVENANCE_FILE),
                None,
                None,
                "this shard comes from a different release, priors, settings or shard count",
            ));
        }
    }
    shards.sort_by_key(|(p, _)| p.shard_index);
    let indices: Vec<u64> = shards.iter().map(|(p, _)| p.shard_index).collect();
    let want: Vec<u64> = (1..=first.shard_count).collect();
    if indices != want {
        return Err(Error::setting(
            "merge",
            format!(
                "need shards 1..{} exactly once each, got {indices:?}",
                first.shard_count
            ),
        ));
    }
    let (values, mode) = recorded_settings(&first);
    let mut model = NoiseModel::default();
    let mut estimates: Vec<Estimate> = Vec::new();
    let mut diagnostics: Vec<DiagnosticsRow> = Vec::new();
    let mut truth_rows: Vec<truth::TruthValue> = Vec::new();
    let mut chains: Vec<(String, Vec<u8>)> = Vec::new();
    for (prov, d) in &shards {
        // truth.csv (simulated releases only; a shard whose pulsars have no true value has none).
        let path = d.join(truth::TRUTH_FILE);
        if path.is_file() {
            truth_rows.extend(rows_of::<truth::TruthValue>(&path)?);
        }
        let path = d.join(NOISE_FILE);
        let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
        let m = NoiseModel::parse(&text, &path)?;
        model.common = m.common;
        model.pulsars.extend(m.pulsars);
        estimates.extend(rows_of::<Estimate>(&d.join(ESTIMATES_FILE))?);
        diagnostics.extend(rows_of::<DiagnosticsRow>(&d.join(DIAGNOSTICS_FILE))?);
        if mode != SampleMode::MapOnly {
            for label in &prov.pulsars {
                let name = format!("{CHAINS_DIR}/{label}.csv");
                let path = d.join(&name);
                if path.exists() {
                    let bytes = std::fs::read(&path).map_err(|e| Error::io(&path, e))?;
                    chains.push((name, bytes));
                }
            }
        }
    }
    let priors_path = shards[0].1.join(PRIORS_FILE);
    let priors = std::fs::read_to_string(&priors_path).map_err(|e| Error::io(&priors_path, e))?;
    let mut prov = first.clone();
    prov.shard_index = 1;
    prov.shard_count = 1;
    prov.pulsars = shards.iter().flat_map(|(p, _)| p.pulsars.clone()).collect();
    // Release warnings are the same in every shard; fit warnings are per pulsar.
    prov.fit_warnings = shards
        .iter()
        .flat_map(|(p, _)| p.fit_warnings.clone())
        .collect();
    Files {
        model: &model,
        estimates: &estimates,
        diagnostics: &diagnostics,
        priors_toml: &priors,
        truth: &truth_rows,
    }
    .stage(values, mode, out)?;
    for (name, bytes) in &chains {
        out.write(name, bytes)?;
    }
    out.write_json(PROVENANCE_FILE, &prov)
}
