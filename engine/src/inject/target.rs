//! The array an injection campaign works on: a release or a laid-out scenario.

use crate::noise::NoiseModel;
use crate::release::{Pulsar, Release};
use crate::scenario::{lay_out, Scenario, SimulationSpec};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// Where the realizations come from.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum TargetKind {
    /// A release: the signal is added to its actual residuals.
    Release,
    /// A scenario: fresh noise every realization on one laid-out array.
    Scenario,
    /// A release's own geometry (TOAs, sky positions, uncertainties, backends, design
    /// matrices) and noise model, with fresh noise drawn from that model every realization;
    /// its residuals are not used.
    ReleaseFreshNoise,
}

impl TargetKind {
    /// The plain name shown in outputs and captions.
    pub fn describe(self) -> &'static str {
        match self {
            TargetKind::Release => "signal added to the release's own residuals",
            TargetKind::Scenario => "scenario array with fresh noise",
            TargetKind::ReleaseFreshNoise => "release geometry with fresh noise",
        }
    }
}

/// The array an injection campaign works on.
#[derive(Clone, Debug)]
pub struct Target {
    pub kind: TargetKind,
    pub title: String,
    pub input_hash: String,
    pub pulsars: Vec<Pulsar>,
    /// The pulsars' noise model (for a scenario its true noise, without any background).
    pub noise: NoiseModel,
    /// Frequency ladder of simulated noise (scenario, time domain).
    pub simulation: SimulationSpec,
}

impl Target {
    /// A release as the target (its residuals are the data).
    pub fn from_release(r: &Release) -> Target {
        Target {
            kind: TargetKind::Release,
            title: r.title.clone(),
            input_hash: r.input_hash.clone(),
            pulsars: r.pulsars.clone(),
            noise: r.noise.clone(),
            simulation: SimulationSpec::default(),
        }
    }

    /// A release's geometry and noise model as the target, with fresh noise every
    /// realization (its residuals are not used); the `[common]` process of noise.toml, if
    /// any, is dropped (the injection replaces it), as for a scenario. Time-domain red and DM
    /// noise are simulated on the model's own frequencies j / T_span, j = 1..max(K, the
    /// largest `n_frequencies` of the model), K being the analysis's `n_frequencies`.
    pub fn from_release_fresh_noise(r: &Release, n_frequencies: usize) -> Target {
        let mut noise = r.noise.clone();
        noise.common = None;
        let k = noise
            .pulsars
            .values()
            .flat_map(|p| [p.red, p.dm])
            .flatten()
            .filter_map(|q| q.n_frequencies)
            .fold(n_frequencies, usize::max);
        Target {
            kind: TargetKind::ReleaseFreshNoise,
            noise,
            simulation: SimulationSpec {
                n_frequencies: k,
                span_factor: 1,
            },
            ..Target::from_release(r)
        }
    }

    /// A scenario as the target: laid out with its own seed (the file's, else 1); its
    /// `[background]`, if any, is dropped (the injection replaces it).
    pub fn from_scenario(s: &Scenario, text: &str) -> Target {
        let layout = lay_out(s, s.seed(None));
        let mut noise = layout.noise;
        noise.common = None;
        Target {
            kind: TargetKind::Scenario,
            title: layout.title,
            input_hash: format!("sha256:{:x}", Sha256::digest(text.as_bytes())),
            pulsars: layout.pulsars,
            noise,
            simulation: layout.simulation,
        }
    }
}
