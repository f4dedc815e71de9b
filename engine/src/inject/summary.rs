//! Statistics of a campaign: bias, scatter, interval coverage and detection probability per
//! amplitude, and the campaign state needed to merge shards.

use super::campaign::Record;
use super::settings::Mode;
use super::target::TargetKind;
use crate::orf::Pattern;
use crate::paircov::VariancePolynomial;
use crate::shard::Shard;
use serde::{Deserialize, Serialize};

/// Standard-normal quantiles of the two nominal central intervals, Phi^-1(0.84) and
/// Phi^-1(0.975) (Abramowitz & Stegun 1964, table 26.1; checked against statrs in the tests).
pub const Z68: f64 = 0.994_457_883_209_753_2;
pub const Z95: f64 = 1.959_963_984_540_054;

/// One row of recovery.csv (and of the `rows` of recovery.json).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RecoveryRow {
    pub amplitude: f64,
    pub amplitude2_injected: f64,
    pub realizations: u64,
    pub amplitude2_mean: f64,
    pub amplitude2_std: f64,
    pub amplitude2_sem: f64,
    pub bias: f64,
    pub bias_sem: f64,
    pub snr_mean: f64,
    pub snr_std: f64,
    pub coverage68_weak: f64,
    pub coverage95_weak: f64,
    pub coverage68_full: f64,
    pub coverage95_full: f64,
    pub detection_probability: f64,
}

/// Coverage of the intervals with sigma at the recovered amplitude (plug-in).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PluginRow {
    pub amplitude: f64,
    pub coverage68_plugin: f64,
    pub coverage95_plugin: f64,
}

fn mean_std(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, var.sqrt())
}

/// Summarise the records of one amplitude. `reference` is the expected A2_hat (A^2, plus the
/// data's own estimate for a release target).
pub fn summarise(
    amplitude: f64,
    reference: f64,
    records: &[Record],
    threshold: f64,
) -> (RecoveryRow, PluginRow) {
    let n = records.len();
    let a2: Vec<f64> = records.iter().map(|r| r.amplitude2).collect();
    let snr: Vec<f64> = records.iter().map(|r| r.snr).collect();
    let (mean, std) = mean_std(&a2);
    let (snr_mean, snr_std) = mean_std(&snr);
    let sem = std / (n as f64).sqrt();
    let frac =
        |f: &dyn Fn(&Record) -> bool| records.iter().filter(|r| f(r)).count() as f64 / n as f64;
    let cov =
        |z: f64, s: fn(&Record) -> f64| frac(&|r| (r.amplitude2 - reference).abs() <= z * s(r));
    let row = RecoveryRow {
        amplitude,
        amplitude2_injected: amplitude * amplitude,
        realizations: n as u64,
        amplitude2_mean: mean,
        amplitude2_std: std,
        amplitude2_sem: sem,
        bias: mean - reference,
        bias_sem: sem,
        snr_mean,
        snr_std,
        coverage68_weak: cov(Z68, |r| r.sigma_weak),
        coverage95_weak: cov(Z95, |r| r.sigma_weak),
        coverage68_full: cov(Z68, |r| r.sigma_full),
        coverage95_full: cov(Z95, |r| r.sigma_full),
        detection_probability: frac(&|r| r.snr > threshold),
    };
    let plug = PluginRow {
        amplitude,
        coverage68_plugin: cov(Z68, |r| r.sigma_plugin),
        coverage95_plugin: cov(Z95, |r| r.sigma_plugin),
    };
    (row, plug)
}

/// The state of a campaign needed to merge shards (campaign.json).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct CampaignState {
    pub mode: Mode,
    pub pattern: Pattern,
    pub target: TargetKind,
    pub seed: u64,
    pub shard: Shard,
    pub realizations_total: u64,
    pub amplitudes: Vec<f64>,
    /// The data's own A2_hat per amplitude (0 for a scenario target).
    pub baseline_amplitude2: Vec<f64>,
    pub variance_polynomials: Vec<VariancePolynomial>,
    pub false_alarm_probability: f64,
    pub detection_threshold_snr: f64,
    pub null_source: String,
    pub null_trials: usize,
    pub input_hash: String,
    pub n_pulsars: usize,
    pub n_frequencies: usize,
}

/// The results of a campaign (or of merged shards).
pub struct Outcome {
    pub state: CampaignState,
    pub records: Vec<Record>,
    pub rows: Vec<RecoveryRow>,
    pub plugin: Vec<PluginRow>,
    pub assumptions: String,
    pub provenance: serde_json::Value,
}

impl Outcome {
    /// Summarise records by amplitude.
    pub fn new(
        state: CampaignState,
        records: Vec<Record>,
        assumptions: String,
        provenance: serde_json::Value,
    ) -> Outcome {
        let mut rows = Vec::new();
        let mut plugin = Vec::new();
        for (k, &amp) in state.amplitudes.iter().enumerate() {
            let rec: Vec<Record> = records
                .iter()
                .filter(|r| r.amplitude == amp)
                .copied()
                .collect();
            let (row, plug) = summarise(
                amp,
                amp * amp + state.baseline_amplitude2[k],
                &rec,
                state.detection_threshold_snr,
            );
            rows.push(row);
            plugin.push(plug);
        }
        Outcome {
            state,
            records,
            rows,
            plugin,
            assumptions,
            provenance,
        }
    }

    /// Realizations per amplitude in this outcome.
    pub fn realizations(&self) -> u64 {
        self.rows.first().map_or(0, |r| r.realizations)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The interval quantiles against statrs's normal inverse CDF.
    #[test]
    fn interval_quantiles_match_statrs() {
        use statrs::distribution::{ContinuousCDF, Normal};
        let n = Normal::new(0.0, 1.0).unwrap();
        assert!((n.inverse_cdf(0.84) - Z68).abs() < 1e-9);
        assert!((n.inverse_cdf(0.975) - Z95).abs() < 1e-9);
    }
}
