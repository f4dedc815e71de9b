//! Injection campaigns: add a background of known amplitude to an array many times, recover it
//! with the optimal statistic, and measure bias, scatter, interval coverage (weak-signal sigma_0
//! and the pair covariance with the signal present, [`crate::paircov`]) and the detection
//! probability at a chosen false-alarm probability. See docs/injection.md.
//!
//! Everything happens in the template-weighted reduced space of [`crate::optimal::weight`]
//! (x~_a = Phi^(1/2) X_a, Z~_a = Phi^(1/2) Z_a Phi^(1/2)), starting from each pulsar's *bare*
//! reduction (its own noise, no common process in P_a). The analysis covariance with a common
//! auto-power D_c Phi on the analysis frequencies is P_a = P_a,0 + F Phi^(1/2) D_c Phi^(1/2) F^T,
//! and the Woodbury identity (Woodbury 1950; Hager 1989) turns the bare reduction into the
//! analysed one without refactoring anything:
//!
//!   x~_a = R_a x~_a,0,   Z~_a = R_a Z~_a,0,   R_a = (I + Z~_a,0 D_c)^-1.
//!
//! With the auto-power set to the injected amplitude (D_c = A^2, the default) this is the
//! standard analysis of the notes (P_a includes the common auto-power at the injected level).
//!
//! Randomness: realization i draws from `stream(seed, Purpose::Injection, i)` (reduced space) or
//! from `simulate_residuals(.., seed, Purpose::Injection, i)` (time domain), and the same draws
//! are scaled for every amplitude (common random numbers), so realization i depends on
//! (seed, i) alone. Simulated null trials t draw from
//! `stream(seed, Purpose::Injection, NULL_STREAM_BASE + t)`.

mod amplitudes;
mod campaign;
mod files;
mod merge;
mod settings;
mod summary;
mod target;
mod threshold;

pub use crate::shard::Shard;
pub use amplitudes::parse_amplitudes;
pub use campaign::{assumptions, run_campaign, Campaign, Record};
pub use files::{read_realizations, RecoveryFile};
pub use merge::merge_shards;
pub use settings::{
    AutoPowerChoice, InjectSettings, Mode, DEFAULT_NULL_TRIALS, DEFAULT_REALIZATIONS,
};
pub use summary::{summarise, CampaignState, Outcome, PluginRow, RecoveryRow, Z68, Z95};
pub use target::{Target, TargetKind};
pub use threshold::{default_false_alarm, detection_threshold, read_null_trials};

/// Stream index offset of the simulated null trials (realization indices stay below it).
pub const NULL_STREAM_BASE: u64 = 1 << 40;

/// Amplitude of the unit background simulated in time-domain mode (rescaled per amplitude;
/// the reduction is linear in the residuals).
pub const REFERENCE_AMPLITUDE: f64 = 1e-15;

#[cfg(test)]
mod tests;
