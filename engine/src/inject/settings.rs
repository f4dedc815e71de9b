//! The settings of an injection campaign and their checks.

use super::NULL_STREAM_BASE;
use crate::analysis::{
    CommonAutoPower, CorrelateSettings, DEFAULT_FREQUENCIES, DEFAULT_SPECTRAL_INDEX,
};
use crate::error::{Error, Result};
use crate::orf::Pattern;
use crate::scenario::SimulationSpec;
use crate::shard::Shard;
use serde::{Deserialize, Serialize};
use std::path::PathBuf;

/// How the injected realizations are made.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Mode {
    /// Draw the reduced data jointly with their covariance (fast, exact for the model).
    Reduced,
    /// Simulate residuals, fit out the timing model, reduce (slow, closest to reality).
    TimeDomain,
}

impl Mode {
    pub fn name(self) -> &'static str {
        match self {
            Mode::Reduced => "reduced",
            Mode::TimeDomain => "time-domain",
        }
    }
}

/// What the analysis puts into each pulsar's auto-power P_a.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum AutoPowerChoice {
    /// The common process at the injected amplitude (none at A = 0): D_c = A^2.
    Injected,
    /// The same common process (or none) at every amplitude, from the settings' `common`.
    Fixed,
}

/// Default realizations per amplitude (over all shards).
pub const DEFAULT_REALIZATIONS: u64 = 100;

/// Default number of simulated null trials for the detection threshold.
pub const DEFAULT_NULL_TRIALS: usize = 1000;

/// Settings of an injection campaign.
#[derive(Clone, Debug, Serialize)]
pub struct InjectSettings {
    pub amplitudes: Vec<f64>,
    /// Total realizations per amplitude (over all shards).
    pub realizations: u64,
    /// Spectral index of the injected background and of the template.
    pub spectral_index: f64,
    /// Pattern of the injected background and of the fitted OS.
    pub pattern: Pattern,
    pub seed: u64,
    pub shard: Shard,
    pub mode: Mode,
    pub auto_power: AutoPowerChoice,
    /// With `auto_power = Fixed`: the common process in P_a.
    pub common: CommonAutoPower,
    pub n_frequencies: usize,
    /// False-alarm probability of the detection threshold; default max(0.001, 10 / trials).
    pub false_alarm: Option<f64>,
    /// Simulated null trials when no null folder is given.
    pub null_trials: usize,
    /// A null folder (its trials.csv) to take the threshold from.
    pub null_dir: Option<PathBuf>,
    /// Time domain: the frequency ladder of the injected background (default: exactly the
    /// analysis frequencies, n_frequencies = K, span_factor = 1).
    pub signal_simulation: Option<SimulationSpec>,
}

impl Default for InjectSettings {
    fn default() -> Self {
        InjectSettings {
            amplitudes: vec![0.0],
            realizations: DEFAULT_REALIZATIONS,
            spectral_index: DEFAULT_SPECTRAL_INDEX,
            pattern: Pattern::Hd,
            seed: 1,
            shard: Shard::ALL,
            mode: Mode::Reduced,
            auto_power: AutoPowerChoice::Injected,
            common: CommonAutoPower::FromNoiseModel,
            n_frequencies: DEFAULT_FREQUENCIES,
            false_alarm: None,
            null_trials: DEFAULT_NULL_TRIALS,
            null_dir: None,
            signal_simulation: None,
        }
    }
}

impl InjectSettings {
    /// Check ranges.
    pub fn validate(&self) -> Result<()> {
        if self.amplitudes.is_empty() {
            return Err(Error::setting("amplitudes", "give at least one amplitude"));
        }
        for &a in &self.amplitudes {
            if !(a.is_finite() && (0.0..1e-9).contains(&a)) {
                return Err(Error::setting(
                    "amplitudes",
                    format!("{a} is not a plausible amplitude"),
                ));
            }
        }
        if self.realizations < 2 || self.realizations >= NULL_STREAM_BASE {
            return Err(Error::setting(
                "realizations",
                format!("must be in 2..2^40, got {}", self.realizations),
            ));
        }
        let per_shard = self.shard_realizations().len();
        if per_shard < 2 {
            return Err(Error::setting(
                "shard",
                format!(
                    "shard {}/{} holds {per_shard} realizations; need at least 2",
                    self.shard.index, self.shard.count
                ),
            ));
        }
        self.analysis_settings().validate()?;
        if let Some(p) = self.false_alarm {
            if !(p > 0.0 && p < 0.5) {
                return Err(Error::setting(
                    "false-alarm",
                    format!("must be in (0, 0.5), got {p}"),
                ));
            }
        }
        if self.null_dir.is_none() && self.null_trials < 10 {
            return Err(Error::setting("null-trials", "need at least 10"));
        }
        if let Some(s) = self.signal_simulation {
            if s.n_frequencies == 0 || s.span_factor == 0 {
                return Err(Error::setting(
                    "signal-frequencies",
                    "frequencies and span factor must be at least 1",
                ));
            }
        }
        Ok(())
    }

    /// The analysis settings shared with `correlate` (frequencies, spectral index, the common
    /// auto-power; default bins), so that both are checked by one validator.
    pub fn analysis_settings(&self) -> CorrelateSettings {
        CorrelateSettings {
            n_frequencies: self.n_frequencies,
            spectral_index: self.spectral_index,
            common: self.common,
            ..CorrelateSettings::default()
        }
    }

    /// The realization indices of this shard, ascending.
    pub fn shard_realizations(&self) -> Vec<u64> {
        self.shard.range(self.realizations).collect()
    }
}
