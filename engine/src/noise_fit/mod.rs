//! Per-pulsar Bayesian noise estimation (`ptacorr noise`; docs/noise-estimation.md): for every
//! pulsar of a release, the likelihood of [`crate::likelihood`] under the priors of
//! [`crate::priors`], its maximum a posteriori point ([`map`]), and the output files: a
//! `noise.toml` that `correlate` reads, a per-parameter estimates table, a per-pulsar
//! diagnostics table, the priors used and a provenance record.

pub mod map;
pub mod posterior;

use crate::error::{Error, Result};
use crate::likelihood::{CommonTerm, PulsarLikelihood};
use crate::noise::{NoiseModel, PulsarNoise, RedProcess};
use crate::output::{write_atomic, write_json};
use crate::priors::{PriorFile, PulsarPrior};
use crate::reduce::FrequencyGrid;
use crate::release::{Pulsar, Release};
use crate::shard::Shard;
use map::{maximum_a_posteriori, MapResult, MapSettings};
use posterior::Posterior;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::path::Path;

/// Settings of a noise run.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct NoiseSettings {
    pub seed: u64,
    pub map: MapSettings,
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
}

/// The fit of one pulsar.
#[derive(Clone, Debug)]
pub struct PulsarFit {
    pub label: String,
    pub n_toa: usize,
    pub parameters: Vec<String>,
    pub bounds: Vec<[f64; 2]>,
    pub map: MapResult,
    /// The noise model at the MAP, in the types of `noise.toml`.
    pub noise: PulsarNoise,
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
}

impl PulsarFit {
    /// The estimates rows of this pulsar.
    pub fn estimates(&self) -> Vec<Estimate> {
        self.parameters
            .iter()
            .zip(&self.bounds)
            .zip(&self.map.values)
            .map(|((name, &[lo, hi]), &v)| Estimate {
                pulsar: self.label.clone(),
                parameter: name.clone(),
                map: v,
                prior_low: lo,
                prior_high: hi,
                map_at_edge: (v - lo).min(hi - v) < 1e-3 * (hi - lo),
            })
            .collect()
    }

    /// The diagnostics row of this pulsar.
    pub fn diagnostics(&self) -> DiagnosticsRow {
        let best = &self.map.runs[self.map.best];
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
        }
    }
}

/// Fit one pulsar (the `index` of the pulsar in the release seeds its starting points).
pub fn fit_pulsar(
    p: &Pulsar,
    prior: &PulsarPrior,
    grid: &FrequencyGrid,
    settings: &NoiseSettings,
    index: u64,
) -> Result<PulsarFit> {
    let lik = PulsarLikelihood::new(p, &prior.components, grid)?;
    let post = Posterior::new(&lik, prior)?;
    let map = maximum_a_posteriori(&post, &settings.map, settings.seed, index)?;
    let theta = post.theta(&post.unconstrained(&map.values));
    let noise = lik.noise_at(&theta);
    Ok(PulsarFit {
        label: p.label.clone(),
        n_toa: p.n_toa(),
        parameters: lik.parameters().iter().map(|h| h.name.clone()).collect(),
        bounds: prior.bounds.clone(),
        noise,
        map,
    })
}

/// The result of a noise run over the pulsars of one shard.
pub struct NoiseRun {
    pub fits: Vec<PulsarFit>,
    /// The common process written to `noise.toml` (a fixed one only).
    pub common: Option<RedProcess>,
    pub provenance: NoiseProvenance,
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
}

/// Fit the pulsars of `settings.shard` in parallel (one rayon task per pulsar); `progress` is
/// called once per finished pulsar. Settings and priors are checked before any work.
pub fn fit_release(
    release: &Release,
    priors: &PriorFile,
    settings: &NoiseSettings,
    progress: &(dyn Fn(&str) + Sync),
) -> Result<NoiseRun> {
    priors.check_release(release)?;
    if settings.map.starts == 0 {
        return Err(Error::setting("starts", "need at least one starting point"));
    }
    let grid = FrequencyGrid::for_release(release, 1)?;
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
            let fit = fit_pulsar(p, prior, &grid, settings, *i);
            progress(&p.label);
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
    };
    Ok(NoiseRun {
        fits,
        common,
        provenance,
        priors_toml,
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

/// CSV text of serialisable rows (header from the row type).
fn csv_text<T: Serialize>(rows: &[T], what: &str) -> Result<String> {
    let mut w = csv::Writer::from_writer(Vec::new());
    for r in rows {
        w.serialize(r).map_err(|e| Error::NonFinite {
            what: format!("{what} ({e})"),
        })?;
    }
    let bytes = w.into_inner().map_err(|e| Error::NonFinite {
        what: format!("{what} ({e})"),
    })?;
    Ok(String::from_utf8(bytes).expect("csv is UTF-8"))
}

/// The file names of a noise folder.
pub const NOISE_FILE: &str = "noise.toml";
/// First line of a written `noise.toml`.
const NOISE_HEADER: &str = "# Noise model estimated by ptacorr noise (MAP values)\n";
pub const ESTIMATES_FILE: &str = "estimates.csv";
pub const DIAGNOSTICS_FILE: &str = "diagnostics.csv";
pub const PRIORS_FILE: &str = "priors.toml";
pub const PROVENANCE_FILE: &str = "provenance.json";

/// Write a run's files into `dir` (after all computation; each file atomically).
pub fn write_run(run: &NoiseRun, dir: &Path) -> Result<()> {
    let model = noise_model(run);
    let noise_text = toml::to_string(&model).map_err(|e| Error::NonFinite {
        what: format!("noise.toml ({e})"),
    })?;
    let estimates: Vec<Estimate> = run.fits.iter().flat_map(|f| f.estimates()).collect();
    let diagnostics: Vec<DiagnosticsRow> = run.fits.iter().map(|f| f.diagnostics()).collect();
    let files = [
        (NOISE_FILE, format!("{NOISE_HEADER}{noise_text}")),
        (ESTIMATES_FILE, csv_text(&estimates, ESTIMATES_FILE)?),
        (DIAGNOSTICS_FILE, csv_text(&diagnostics, DIAGNOSTICS_FILE)?),
        (PRIORS_FILE, run.priors_toml.clone()),
    ];
    crate::output::ensure_dir(dir)?;
    for (name, text) in files {
        write_atomic(&dir.join(name), text.as_bytes())?;
    }
    write_json(&dir.join(PROVENANCE_FILE), &run.provenance)
}

/// Merge the folders of the shards of one noise run into `out`: every shard present once, all
/// from the same release, priors and settings.
pub fn merge_shards(dirs: &[&Path], out: &Path) -> Result<()> {
    let mut shards: Vec<(NoiseProvenance, &Path)> = Vec::new();
    for &d in dirs {
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
    let mut model = NoiseModel::default();
    let mut estimates = String::new();
    let mut diagnostics = String::new();
    for (k, (_, d)) in shards.iter().enumerate() {
        let path = d.join(NOISE_FILE);
        let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
        let m = NoiseModel::parse(&text, &path)?;
        model.common = m.common;
        model.pulsars.extend(m.pulsars);
        for (name, acc) in [
            (ESTIMATES_FILE, &mut estimates),
            (DIAGNOSTICS_FILE, &mut diagnostics),
        ] {
            let path = d.join(name);
            let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
            let mut lines = text.lines();
            let header = lines.next().unwrap_or_default();
            if k == 0 {
                acc.push_str(header);
                acc.push('\n');
            }
            for l in lines {
                acc.push_str(l);
                acc.push('\n');
            }
        }
    }
    let priors_path = shards[0].1.join(PRIORS_FILE);
    let priors = std::fs::read_to_string(&priors_path).map_err(|e| Error::io(&priors_path, e))?;
    let mut prov = first.clone();
    prov.shard_index = 1;
    prov.shard_count = 1;
    prov.pulsars = shards.iter().flat_map(|(p, _)| p.pulsars.clone()).collect();
    let noise_text = toml::to_string(&model).map_err(|e| Error::NonFinite {
        what: format!("noise.toml ({e})"),
    })?;
    crate::output::ensure_dir(out)?;
    write_atomic(
        &out.join(NOISE_FILE),
        format!("{NOISE_HEADER}{noise_text}").as_bytes(),
    )?;
    write_atomic(&out.join(ESTIMATES_FILE), estimates.as_bytes())?;
    write_atomic(&out.join(DIAGNOSTICS_FILE), diagnostics.as_bytes())?;
    write_atomic(&out.join(PRIORS_FILE), priors.as_bytes())?;
    write_json(&out.join(PROVENANCE_FILE), &prov)
}
