//! The noise-marginalised optimal statistic (Vigeland et al. 2018, Phys. Rev. D 98, 044003):
//! the optimal statistic repeated over draws of the noise model from a posterior, reported as
//! a distribution of A^2 and SNR instead of one number at one fixed noise model.
//!
//! Draws come from chain tables ([`crate::chains`]): a folder of per-pulsar tables
//! (`LABEL.csv`, as `ptacorr noise` writes them under `chains/`) and optionally a table of
//! common-process draws (`common-draws.csv` of `ptacorr common`). Draw d picks one row of
//! every table with the generator `rng::stream(seed, NoiseDraws, d)` alone (uniformly, with
//! replacement, the tables in release order and the common table last), so a draw does not
//! depend on threads or shards. Pulsars without a table keep their `noise.toml` model, and
//! parameters absent from a table keep their `noise.toml` values. The per-pulsar tables are
//! drawn independently of each other: this is the product of the per-pulsar posteriors, not
//! a joint array posterior (docs/noise-marginalised.md).
//!
//! Per draw each pulsar with a table is reduced again on a basis computed once
//! ([`crate::reduce::PulsarBasis`]); pulsars without a table are reduced once and reused
//! (unless common-process draws change every pulsar's auto-power); the pair geometry and
//! pattern values are computed once.

pub mod files;
pub mod summary;

use crate::analysis::{CommonAutoPower, CorrelateSettings};
use crate::chains::ChainTable;
use crate::error::{Error, Result};
use crate::noise::{PulsarNoise, RedProcess};
use crate::optimal::{optimal_statistic, pair_correlations, OsEstimate};
use crate::orf::Pattern;
use crate::reduce::{reduce_pulsar_on, AutoPower, FrequencyGrid, PulsarBasis, Reduced};
use crate::release::Release;
use crate::rng::{stream, Purpose};
use crate::shard::Shard;
use crate::spectrum::{template, PowerLaw};
use rand::Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

pub use files::{merge_shards, DRAWS_FILE};
pub use summary::{NmosSummary, Spread};

/// Most draws of one run.
pub const MAX_DRAWS: u64 = 10_000_000;

/// Default number of draws.
pub const DEFAULT_DRAWS: u64 = 1000;

/// Settings of the noise-marginalised OS.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct NmosSettings {
    /// Folder of per-pulsar chain tables `LABEL.csv`.
    pub chains: Option<PathBuf>,
    /// Table of common-process draws.
    pub common_draws: Option<PathBuf>,
    /// Number of draws over all shards.
    pub draws: u64,
    pub seed: u64,
    pub shard: Shard,
}

impl NmosSettings {
    /// Check ranges before any work.
    pub fn validate(&self) -> Result<()> {
        if self.chains.is_none() && self.common_draws.is_none() {
            return Err(Error::setting(
                "noise-draws",
                "give a folder of chain tables, a common-process draw table, or both",
            ));
        }
        if self.draws == 0 || self.draws > MAX_DRAWS {
            return Err(Error::setting(
                "draws",
                format!("must be in 1..={MAX_DRAWS}, got {}", self.draws),
            ));
        }
        self.shard
            .check(self.draws)
            .map_err(|m| Error::setting("shard", m))?;
        Ok(())
    }
}

/// The draw tables of a run, checked against the release.
#[derive(Clone, Debug)]
pub struct DrawTables {
    /// Per pulsar (release order): its table and file, if it has one.
    pub pulsars: Vec<Option<(PathBuf, ChainTable)>>,
    /// The common-process table and its file.
    pub common: Option<(PathBuf, ChainTable)>,
    /// SHA-256 over the bytes of every table read, in the order above.
    pub sha256: String,
}

/// Read the chain tables named by `settings` and check them against `release`: every
/// `*.csv` in the chains folder must be named after a pulsar of the release, its parameters
/// must be the pulsar's backends and processes, and every table must hold at least as many
/// rows as draws requested. Nothing is computed before this has passed.
pub fn read_tables(
    release: &Release,
    settings: &NmosSettings,
    correlate: &CorrelateSettings,
) -> Result<DrawTables> {
    settings.validate()?;
    if settings.common_draws.is_some() && matches!(correlate.common, CommonAutoPower::Off) {
        return Err(Error::setting(
            "common-draws",
            "a common-process draw table puts the common process into the auto-power; it cannot be combined with --no-common",
        ));
    }
    let mut hasher = Sha256::new();
    let mut pulsars: Vec<Option<(PathBuf, ChainTable)>> = vec![None; release.pulsars.len()];
    let enough = |path: &Path, t: &ChainTable| -> Result<()> {
        if (t.len() as u64) < settings.draws {
            return Err(Error::input(
                path,
                Some(t.line(t.len() - 1)),
                None,
                format!(
                    "the table has {} draws (its last row is this line), fewer than the {} draws requested; ask for at most {} draws or give a longer chain",
                    t.len(),
                    settings.draws,
                    t.len()
                ),
            ));
        }
        Ok(())
    };
    if let Some(dir) = &settings.chains {
        let entries = std::fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
        let mut files: Vec<PathBuf> = Vec::new();
        for e in entries {
            let e = e.map_err(|e| Error::io(dir, e))?;
            let path = e.path();
            if path.extension().and_then(|x| x.to_str()) == Some("csv") {
                files.push(path);
            }
        }
        files.sort();
        if files.is_empty() {
            return Err(Error::input(
                dir,
                None,
                None,
                "the folder holds no chain tables (LABEL.csv, one per pulsar)",
            ));
        }
        for path in files {
            let label = path
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            let Some(k) = release.pulsars.iter().position(|p| p.label == label) else {
                return Err(Error::input(
                    &path,
                    None,
                    None,
                    format!(
                        "the release has no pulsar {}: a chain table is named after its pulsar (LABEL.csv)",
                        crate::output::quote(&label)
                    ),
                ));
            };
            let bytes = std::fs::read(&path).map_err(|e| Error::io(&path, e))?;
            hasher.update(&bytes);
            let table = ChainTable::parse(&bytes, &path)?;
            let p = &release.pulsars[k];
            table.check_pulsar(&path, &p.backends, &release.noise.pulsar(&p.label))?;
            enough(&path, &table)?;
            pulsars[k] = Some((path, table));
        }
    }
    let common = match &settings.common_draws {
        Some(path) => {
            let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
            hasher.update(&bytes);
            let table = ChainTable::parse(&bytes, path)?;
            table.check_common_only(path)?;
            enough(path, &table)?;
            Some((path.clone(), table))
        }
        None => None,
    };
    let sha256 = hasher
        .finalize()
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect();
    Ok(DrawTables {
        pulsars,
        common,
        sha256,
    })
}

/// The rows draw `d` takes: one per pulsar table (release order; `None` without a table) and
/// one of the common table. Depends on (seed, d) alone.
pub fn pick_rows(tables: &DrawTables, seed: u64, d: u64) -> (Vec<Option<usize>>, Option<usize>) {
    let mut rng = stream(seed, Purpose::NoiseDraws, d);
    let rows = tables
        .pulsars
        .iter()
        .map(|t| t.as_ref().map(|(_, t)| rng.random_range(0..t.len())))
        .collect();
    let common = tables
        .common
        .as_ref()
        .map(|(_, t)| rng.random_range(0..t.len()));
    (rows, common)
}

/// The OS of every pattern at one draw.
#[derive(Clone, Debug, PartialEq)]
pub struct DrawResult {
    pub draw: u64,
    /// log10 amplitude of the common process in the auto-power at this draw (when drawn).
    pub common_log10_amplitude: Option<f64>,
    /// One estimate per pattern, in [`Pattern::ALL`] order.
    pub estimates: [OsEstimate; 3],
}

/// Run the draws of `settings.shard` (in parallel over draws; each draw's numbers depend on
/// (seed, draw) alone).
pub fn run_draws(
    release: &Release,
    correlate: &CorrelateSettings,
    settings: &NmosSettings,
    tables: &DrawTables,
) -> Result<Vec<DrawResult>> {
    correlate.validate()?;
    settings.validate()?;
    crate::linalg::single_threaded_blas();
    let grid = FrequencyGrid::for_release(release, correlate.n_frequencies)?;
    let base_common: Option<PowerLaw> = correlate.common_power_law(release);
    let common_at = |row: Option<usize>| -> Option<PowerLaw> {
        match (&tables.common, row) {
            (Some((_, t)), Some(r)) => {
                let base = base_common.map(|p| RedProcess {
                    log10_amplitude: p.log10_amplitude,
                    spectral_index: p.spectral_index,
                    n_frequencies: None,
                });
                Some(
                    t.common_process(r, base.as_ref(), correlate.spectral_index)
                        .power_law(),
                )
            }
            _ => base_common,
        }
    };
    // The structure (processes present) of every pulsar's model is that of its first row.
    let base_noise: Vec<PulsarNoise> = release
        .pulsars
        .iter()
        .map(|p| release.noise.pulsar(&p.label))
        .collect();
    let structure: Vec<PulsarNoise> = tables
        .pulsars
        .iter()
        .zip(&base_noise)
        .map(|(t, b)| match t {
            Some((_, t)) => t.pulsar_noise(0, b),
            None => b.clone(),
        })
        .collect();
    let any_common = common_at(Some(0)).or(base_common);
    let bases: Vec<PulsarBasis> = release
        .pulsars
        .par_iter()
        .zip(&structure)
        .map(|(p, n)| {
            PulsarBasis::new(
                p,
                n,
                &grid,
                AutoPower {
                    common: any_common.as_ref(),
                },
            )
        })
        .collect::<Result<_>>()?;
    // Pulsars whose model never changes are reduced once.
    let fixed: Vec<Option<Reduced>> = if tables.common.is_some() {
        vec![None; release.pulsars.len()]
    } else {
        release
            .pulsars
            .par_iter()
            .enumerate()
            .map(|(k, p)| match &tables.pulsars[k] {
                Some(_) => Ok(None),
                None => reduce_pulsar_on(
                    p,
                    &base_noise[k],
                    &grid,
                    AutoPower {
                        common: base_common.as_ref(),
                    },
                    &bases[k],
                )
                .map(Some),
            })
            .collect::<Result<_>>()?
    };
    let phi = template(correlate.spectral_index, &grid.freqs, grid.t_span);
    let range = settings.shard.range(settings.draws);
    range
        .into_par_iter()
        .map(|d| {
            let (rows, common_row) = pick_rows(tables, settings.seed, d);
            let common = common_at(common_row);
            let auto = AutoPower {
                common: common.as_ref(),
            };
            let reduced: Vec<Reduced> = release
                .pulsars
                .iter()
                .enumerate()
                .map(|(k, p)| match (&fixed[k], &tables.pulsars[k], rows[k]) {
                    (Some(r), _, _) => Ok(r.clone()),
                    (None, Some((path, t)), Some(row)) => {
                        let noise = t.pulsar_noise(row, &base_noise[k]);
                        reduce_pulsar_on(p, &noise, &grid, auto, &bases[k]).map_err(|e| {
                            Error::input(
                                path,
                                Some(t.line(row)),
                                None,
                                format!("the noise model of this draw cannot be used: {e}"),
                            )
                        })
                    }
                    _ => reduce_pulsar_on(p, &base_noise[k], &grid, auto, &bases[k]),
                })
                .collect::<Result<_>>()?;
            let pairs = pair_correlations(&reduced, &phi)?;
            let estimates = Pattern::ALL
                .map(|pat| optimal_statistic(&pairs.rho, &pairs.sigma, &pairs.pattern_values(pat)));
            Ok(DrawResult {
                draw: d,
                common_log10_amplitude: tables
                    .common
                    .as_ref()
                    .and(common.map(|c| c.log10_amplitude)),
                estimates,
            })
        })
        .collect()
}

/// The whole noise-marginalised step of a correlate run on already read and checked tables:
/// the draws of the shard and their summary.
pub fn run(
    release: &Release,
    correlate: &CorrelateSettings,
    settings: &NmosSettings,
    tables: &DrawTables,
) -> Result<(NmosSummary, Vec<DrawResult>)> {
    let draws = run_draws(release, correlate, settings, tables)?;
    let (mut drawn, mut fixed) = (Vec::new(), Vec::new());
    for (p, t) in release.pulsars.iter().zip(&tables.pulsars) {
        match t {
            Some(_) => drawn.push(p.label.clone()),
            None => fixed.push(p.label.clone()),
        }
    }
    let summary = NmosSummary::new(settings, drawn, fixed, tables.sha256.clone(), &draws);
    Ok((summary, draws))
}

#[cfg(test)]
mod tests;
