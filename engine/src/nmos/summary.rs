//! The distribution of the optimal statistic over noise draws: median and central 68% and 95%
//! intervals of A^2 and SNR per pattern, written as `noise_marginalised` in `summary.json`.

use super::{DrawResult, NmosSettings};
use crate::orf::Pattern;
use crate::shard::Shard;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Median and central intervals of a sample.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Spread {
    pub median: f64,
    /// The 16% and 84% quantiles.
    pub interval_68: [f64; 2],
    /// The 2.5% and 97.5% quantiles.
    pub interval_95: [f64; 2],
}

/// The p-quantile of sorted data by linear interpolation between order statistics,
/// x_(floor h) + (h - floor h)(x_(floor h + 1) - x_(floor h)) with h = (n - 1) p: definition 7
/// of Hyndman & Fan (1996, The American Statistician 50, 361), the default of R and NumPy.
pub fn quantile(sorted: &[f64], p: f64) -> f64 {
    let n = sorted.len();
    if n == 0 {
        return f64::NAN;
    }
    let h = (n - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(n - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

impl Spread {
    /// The spread of a sample (any order; NaN-free).
    pub fn of(values: &[f64]) -> Spread {
        let mut v = values.to_vec();
        v.sort_by(f64::total_cmp);
        Spread {
            median: quantile(&v, 0.5),
            interval_68: [quantile(&v, 0.16), quantile(&v, 0.84)],
            interval_95: [quantile(&v, 0.025), quantile(&v, 0.975)],
        }
    }
}

/// The spread of one pattern's estimates over the draws.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PatternSpread {
    pub amplitude2: Spread,
    pub snr: Spread,
}

/// What every noise-marginalised summary says about its numbers.
pub const NMOS_NOTES: &str = "the optimal statistic repeated over draws of the noise model (Vigeland et al. 2018): each draw takes one row of every pulsar's chain table (and of the common-process table when given), independently per pulsar, so the draws follow the product of the per-pulsar posteriors; pulsars without a table and parameters absent from a table keep their noise.toml values; the template spectrum is fixed; the spread shows how much the estimate depends on the noise model, it is not a confidence interval of A^2; snr is not a false-alarm probability (see `ptacorr null`); a detection claim needs the collaboration's full analysis.";

/// The `noise_marginalised` block of `summary.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct NmosSummary {
    /// Draws summarised here (the shard's, or all after a merge).
    pub draws: u64,
    /// Draws of the whole run.
    pub draws_total: u64,
    pub seed: u64,
    pub shard: Shard,
    /// The chains folder and the common-process table, as given.
    pub chains: Option<String>,
    pub common_draws: Option<String>,
    /// Pulsars whose noise was drawn from a table, and those kept at noise.toml.
    pub pulsars_drawn: Vec<String>,
    pub pulsars_fixed: Vec<String>,
    /// SHA-256 over the bytes of every table read.
    pub tables_sha256: String,
    /// Median and intervals of A^2 and SNR per pattern.
    pub patterns: BTreeMap<Pattern, PatternSpread>,
    pub notes: String,
}

impl NmosSummary {
    /// The summary of a run's draws.
    pub fn new(
        settings: &NmosSettings,
        pulsars_drawn: Vec<String>,
        pulsars_fixed: Vec<String>,
        tables_sha256: String,
        draws: &[DrawResult],
    ) -> NmosSummary {
        NmosSummary {
            draws: draws.len() as u64,
            draws_total: settings.draws,
            seed: settings.seed,
            shard: settings.shard,
            chains: settings.chains.as_ref().map(|p| p.display().to_string()),
            common_draws: settings
                .common_draws
                .as_ref()
                .map(|p| p.display().to_string()),
            pulsars_drawn,
            pulsars_fixed,
            tables_sha256,
            patterns: spreads(draws),
            notes: NMOS_NOTES.to_string(),
        }
    }
}

/// Median and intervals of A^2 and SNR of every pattern.
pub fn spreads(draws: &[DrawResult]) -> BTreeMap<Pattern, PatternSpread> {
    Pattern::ALL
        .iter()
        .enumerate()
        .map(|(k, &p)| {
            let a2: Vec<f64> = draws.iter().map(|d| d.estimates[k].amplitude2).collect();
            let snr: Vec<f64> = draws.iter().map(|d| d.estimates[k].snr).collect();
            (
                p,
                PatternSpread {
                    amplitude2: Spread::of(&a2),
                    snr: Spread::of(&snr),
                },
            )
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_match_hyndman_fan_definition_7() {
        // Worked values of definition 7 (the default of R's quantile() and NumPy's
        // percentile(), from memory of their documented formula) on 1..=10 and on 4 values.
        let x: Vec<f64> = (1..=10).map(f64::from).collect();
        assert_eq!(quantile(&x, 0.5), 5.5);
        assert!((quantile(&x, 0.16) - 2.44).abs() < 1e-12);
        assert!((quantile(&x, 0.975) - 9.775).abs() < 1e-12);
        assert_eq!(quantile(&x, 0.0), 1.0);
        assert_eq!(quantile(&x, 1.0), 10.0);
        let s = Spread::of(&[3.0, 1.0, 4.0, 1.5]);
        assert_eq!(s.median, 2.25);
        assert_eq!(quantile(&[7.0], 0.3), 7.0);
    }
}
