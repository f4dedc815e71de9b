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

use crate::analysis::CommonAutoPower;
use crate::error::{Error, Result};
use crate::noise::{NoiseModel, RedProcess};
use crate::orf::{pattern_matrix, Pattern};
use crate::output::{fmt_f64, write_atomic, write_json};
use crate::paircov::{variance_polynomial, VariancePolynomial};
use crate::reduce::{AutoPower, FrequencyGrid, PulsarModel};
use crate::release::{Pulsar, Release};
use crate::rng::{stream, Purpose};
use crate::scenario::{lay_out, BackgroundPattern, BackgroundSpec, Scenario, SimulationSpec};
use crate::simulate::{pattern_root, simulate_residuals, Ingredients};
use crate::spectrum::{template, PowerLaw};
use ndarray::{Array1, Array2};
use ndarray_linalg::{Eigh, Inverse, UPLO};
use rand::Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// Stream index offset of the simulated null trials (realization indices stay below it).
pub const NULL_STREAM_BASE: u64 = 1 << 40;

/// Amplitude of the unit background simulated in time-domain mode (rescaled per amplitude;
/// the reduction is linear in the residuals).
pub const REFERENCE_AMPLITUDE: f64 = 1e-15;

/// Standard-normal quantiles of the two nominal central intervals, Phi^-1(0.84) and
/// Phi^-1(0.975) (Abramowitz & Stegun 1964, table 26.1; checked against statrs in the tests).
pub const Z68: f64 = 0.994_457_883_209_753_2;
pub const Z95: f64 = 1.959_963_984_540_054;

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

pub use crate::shard::Shard;

/// Parse an amplitude list: comma-separated items, each a number (`0`, `1e-15`) or a
/// log-spaced range `log:LO:HI:N` (N >= 2 values from LO to HI inclusive, LO, HI > 0).
/// Amplitudes must be finite, >= 0, below 1e-9, and distinct.
pub fn parse_amplitudes(text: &str) -> Result<Vec<f64>> {
    let bad = |m: String| Error::setting("amplitudes", m);
    let mut out: Vec<f64> = Vec::new();
    for item in text.split(',').map(str::trim) {
        if item.is_empty() {
            return Err(bad(format!("empty item in {text:?}")));
        }
        if let Some(rest) = item.strip_prefix("log:") {
            let parts: Vec<&str> = rest.split(':').collect();
            if parts.len() != 3 {
                return Err(bad(format!("{item:?}: expected log:LO:HI:N")));
            }
            let lo: f64 = parts[0]
                .parse()
                .map_err(|_| bad(format!("{item:?}: LO is not a number")))?;
            let hi: f64 = parts[1]
                .parse()
                .map_err(|_| bad(format!("{item:?}: HI is not a number")))?;
            let n: usize = parts[2]
                .parse()
                .map_err(|_| bad(format!("{item:?}: N is not a count")))?;
            let ok = lo > 0.0 && hi > lo && lo.is_finite() && hi.is_finite();
            if !ok || !(2..=1000).contains(&n) {
                return Err(bad(format!(
                    "{item:?}: need 0 < LO < HI and 2 <= N <= 1000"
                )));
            }
            let (l0, l1) = (lo.log10(), hi.log10());
            for k in 0..n {
                let v = if k == n - 1 {
                    hi
                } else {
                    10f64.powf(l0 + (l1 - l0) * k as f64 / (n - 1) as f64)
                };
                out.push(v);
            }
        } else {
            let v: f64 = item
                .parse()
                .map_err(|_| bad(format!("{item:?} is not a number")))?;
            out.push(v);
        }
    }
    for &v in &out {
        if !(v.is_finite() && (0.0..1e-9).contains(&v)) {
            return Err(bad(format!(
                "{v} is not a plausible amplitude (need 0 <= A < 1e-9)"
            )));
        }
    }
    for (i, &v) in out.iter().enumerate() {
        if out[..i].contains(&v) {
            return Err(bad(format!("{v} appears twice")));
        }
    }
    Ok(out)
}

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
            realizations: 100,
            spectral_index: crate::constants::GAMMA_BINARIES,
            pattern: Pattern::Hd,
            seed: 1,
            shard: Shard::ALL,
            mode: Mode::Reduced,
            auto_power: AutoPowerChoice::Injected,
            common: CommonAutoPower::FromNoiseModel,
            n_frequencies: 14,
            false_alarm: None,
            null_trials: 1000,
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
        if !(self.spectral_index.is_finite()
            && self.spectral_index > 0.0
            && self.spectral_index <= 10.0)
        {
            return Err(Error::setting(
                "spectral-index",
                format!("must be in (0, 10], got {}", self.spectral_index),
            ));
        }
        if self.n_frequencies == 0 || self.n_frequencies > 1000 {
            return Err(Error::setting("frequencies", "must be in 1..=1000"));
        }
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

    /// The realization indices of this shard, ascending.
    pub fn shard_realizations(&self) -> Vec<u64> {
        self.shard.range(self.realizations).collect()
    }
}

/// Where the realizations come from.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum TargetKind {
    /// A release: the signal is added to its actual residuals.
    Release,
    /// A scenario: fresh noise every realization on one laid-out array.
    Scenario,
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

/// One realization at one amplitude.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Record {
    pub amplitude: f64,
    pub realization: u64,
    pub amplitude2: f64,
    /// sigma_0 (weak signal).
    pub sigma_weak: f64,
    /// From the pair covariance at the injected amplitude.
    pub sigma_full: f64,
    /// From the pair covariance at the recovered amplitude (what an analyst would report).
    pub sigma_plugin: f64,
    pub snr: f64,
}

/// The analysis at one amplitude: D_c, the Woodbury transforms and the variance polynomial.
struct AnalysisAt {
    dc: Vec<f64>,
    /// R_a (None when D_c = 0: the identity).
    r: Option<Vec<Array2<f64>>>,
    poly: VariancePolynomial,
}

/// A prepared injection campaign.
pub struct Campaign {
    pub target: Target,
    pub settings: InjectSettings,
    pub grid: FrequencyGrid,
    /// The template (A = 1), length 2K.
    pub phi: Vec<f64>,
    h: Array1<f64>,
    models: Vec<PulsarModel>,
    /// Bare weighted Z~_a,0.
    z0: Vec<Array2<f64>>,
    /// Z~_a,0^(1/2) (symmetric root).
    z0_root: Vec<Array2<f64>>,
    /// The data's bare weighted reduction (release target), N x 2K.
    data: Option<Array2<f64>>,
    /// Pattern matrix with unit diagonal and a square root of it.
    g: Array2<f64>,
    g_root: Array2<f64>,
    analyses: Vec<AnalysisAt>,
    null_analysis: AnalysisAt,
    /// The data's own A2_hat under each amplitude's analysis (release target; else 0).
    pub baseline: Vec<f64>,
}

/// A symmetric square root of a symmetric positive semi-definite matrix (eigen-decomposition,
/// tiny negative eigenvalues from rounding clipped to 0).
fn psd_root(m: &Array2<f64>, what: &str) -> Result<Array2<f64>> {
    let (vals, vecs) = m
        .eigh(UPLO::Lower)
        .map_err(|_| Error::NotPositiveDefinite {
            what: what.to_string(),
            pivot: 0,
        })?;
    let top = vals.iter().cloned().fold(0.0, f64::max);
    let mut scaled = vecs.clone();
    for (j, &l) in vals.iter().enumerate() {
        if l < -1e-8 * top {
            return Err(Error::NotPositiveDefinite {
                what: what.to_string(),
                pivot: j + 1,
            });
        }
        scaled.column_mut(j).mapv_inplace(|v| v * l.max(0.0).sqrt());
    }
    Ok(scaled.dot(&vecs.t()))
}

/// Small dense kernels of the per-realization hot loop, written out so that no multithreaded
/// BLAS call runs inside the rayon workers (OpenBLAS threads inside rayon tasks oversubscribe
/// the cores).
fn matvec(m: &Array2<f64>, v: ndarray::ArrayView1<f64>) -> Array1<f64> {
    let c = m.ncols();
    let v: Vec<f64> = v.iter().copied().collect();
    match m.as_slice() {
        Some(flat) => flat
            .chunks_exact(c)
            .map(|row| row.iter().zip(&v).map(|(a, b)| a * b).sum())
            .collect(),
        None => m.dot(&Array1::from(v)),
    }
}

fn symmetrise(z: Array2<f64>) -> Array2<f64> {
    let zt = z.t().to_owned();
    (z + zt) * 0.5
}

impl Campaign {
    /// Reduce every pulsar once (bare), weight by the template, and prepare the analysis of
    /// every amplitude (Woodbury transforms and pair-covariance polynomials).
    pub fn prepare(target: Target, settings: InjectSettings) -> Result<Campaign> {
        settings.validate()?;
        let n = target.pulsars.len();
        if n < crate::release::MIN_PULSARS {
            return Err(Error::setting(
                "pulsars",
                format!(
                    "need at least {} pulsars, got {n}",
                    crate::release::MIN_PULSARS
                ),
            ));
        }
        let (lo, hi) = target
            .pulsars
            .iter()
            .flat_map(|p| p.mjd.iter().copied())
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), m| {
                (a.min(m), b.max(m))
            });
        let grid = FrequencyGrid::new(lo, hi, settings.n_frequencies)?;
        let phi = template(settings.spectral_index, &grid.freqs, grid.t_span);
        let h: Array1<f64> = phi.iter().map(|p| p.sqrt()).collect();
        let models: Vec<PulsarModel> = target
            .pulsars
            .par_iter()
            .map(|p| {
                PulsarModel::build(
                    p,
                    &target.noise.pulsar(&p.label),
                    &grid,
                    AutoPower { common: None },
                )
            })
            .collect::<Result<_>>()?;
        let m = phi.len();
        let z0: Vec<Array2<f64>> = models
            .iter()
            .map(|md| {
                let mut z = md.z.clone();
                for ((i, j), v) in z.indexed_iter_mut() {
                    *v *= h[i] * h[j];
                }
                z
            })
            .collect();
        for (a, z) in z0.iter().enumerate() {
            if z.iter().any(|v| !v.is_finite()) {
                return Err(Error::NonFinite {
                    what: format!("the reduction of pulsar {}", target.pulsars[a].label),
                });
            }
        }
        let z0_root = z0
            .iter()
            .zip(&target.pulsars)
            .map(|(z, p)| psd_root(z, &format!("Z of pulsar {}", p.label)))
            .collect::<Result<Vec<_>>>()?;
        let data = match target.kind {
            TargetKind::Release => {
                let mut d = Array2::<f64>::zeros((n, m));
                for (a, (md, p)) in models.iter().zip(&target.pulsars).enumerate() {
                    let x = md.reduce(&p.residual) * &h;
                    if x.iter().any(|v| !v.is_finite()) {
                        return Err(Error::NonFinite {
                            what: format!("the reduction of pulsar {}", p.label),
                        });
                    }
                    d.row_mut(a).assign(&x);
                }
                Some(d)
            }
            TargetKind::Scenario => None,
        };
        let dirs: Vec<_> = target.pulsars.iter().map(|p| p.direction).collect();
        let g = Array2::from_shape_vec((n, n), pattern_matrix(settings.pattern, &dirs))
            .expect("square pattern matrix");
        let g_root = pattern_root(&g)?;

        // D_c of the fixed analysis, in template units.
        let fixed_dc: Vec<f64> = match settings.auto_power {
            AutoPowerChoice::Injected => vec![0.0; m],
            AutoPowerChoice::Fixed => {
                let law: Option<PowerLaw> = match settings.common {
                    CommonAutoPower::FromNoiseModel => {
                        target.noise.common.as_ref().map(RedProcess::power_law)
                    }
                    CommonAutoPower::Off => None,
                    CommonAutoPower::Given(p) => Some(p),
                    CommonAutoPower::FromCommonFit(f) => Some(f.power_law),
                };
                match law {
                    None => vec![0.0; m],
                    Some(l) => grid
                        .freqs
                        .iter()
                        .flat_map(|&f| {
                            let r = l.coefficient_variance(f, grid.t_span)
                                / crate::spectrum::power_law_phi(
                                    1.0,
                                    settings.spectral_index,
                                    f,
                                    grid.t_span,
                                );
                            [r, r]
                        })
                        .collect(),
                }
            }
        };
        let mut campaign = Campaign {
            target,
            grid,
            phi,
            h,
            models,
            z0,
            z0_root,
            data,
            g,
            g_root,
            analyses: Vec::new(),
            null_analysis: AnalysisAt {
                dc: Vec::new(),
                r: None,
                poly: VariancePolynomial {
                    v0: 0.0,
                    v1: 0.0,
                    v2: 0.0,
                    norm: 1.0,
                },
            },
            baseline: Vec::new(),
            settings,
        };
        let dc_for = |a: f64| -> Vec<f64> {
            match campaign.settings.auto_power {
                AutoPowerChoice::Injected => vec![a * a; m],
                AutoPowerChoice::Fixed => fixed_dc.clone(),
            }
        };
        let amps = campaign.settings.amplitudes.clone();
        let analyses = amps
            .iter()
            .map(|&a| campaign.analysis_at(dc_for(a)))
            .collect::<Result<Vec<_>>>()?;
        campaign.null_analysis = campaign.analysis_at(dc_for(0.0))?;
        campaign.baseline = match &campaign.data {
            Some(d) => analyses
                .iter()
                .map(|at| campaign.estimate(at, d).0)
                .collect(),
            None => vec![0.0; amps.len()],
        };
        campaign.analyses = analyses;
        Ok(campaign)
    }

    fn analysis_at(&self, dc: Vec<f64>) -> Result<AnalysisAt> {
        let m = dc.len();
        let (r, z) = if dc.iter().all(|&d| d == 0.0) {
            (None, self.z0.clone())
        } else {
            let mut rs = Vec::with_capacity(self.z0.len());
            let mut zs = Vec::with_capacity(self.z0.len());
            for (a, z0) in self.z0.iter().enumerate() {
                let mut k = z0.clone();
                for (mut col, &d) in k.columns_mut().into_iter().zip(&dc) {
                    col *= d;
                }
                k += &Array2::<f64>::eye(m);
                let r = k.inv().map_err(|_| Error::NotPositiveDefinite {
                    what: format!(
                        "I + Z~ D_c of pulsar {} (the Woodbury transform)",
                        self.target.pulsars[a].label
                    ),
                    pivot: 0,
                })?;
                zs.push(symmetrise(r.dot(z0)));
                rs.push(r);
            }
            (Some(rs), zs)
        };
        let poly = variance_polynomial(&z, &self.g, &dc)?;
        Ok(AnalysisAt { dc, r, poly })
    }

    /// A2_hat and SNR of bare weighted data `x0` (N x 2K) under an analysis.
    fn estimate(&self, at: &AnalysisAt, x0: &Array2<f64>) -> (f64, f64) {
        let x = match &at.r {
            None => x0.clone(),
            Some(rs) => {
                let mut x = Array2::<f64>::zeros(x0.raw_dim());
                for (a, r) in rs.iter().enumerate() {
                    x.row_mut(a).assign(&matvec(r, x0.row(a)));
                }
                x
            }
        };
        let n = x.nrows();
        let m = x.ncols();
        let flat = x.as_slice().expect("row-major realization");
        let mut q = 0.0;
        for a in 0..n {
            let xa = &flat[a * m..(a + 1) * m];
            for b in a + 1..n {
                let xb = &flat[b * m..(b + 1) * m];
                let d: f64 = xa.iter().zip(xb).map(|(p, q)| p * q).sum();
                q += self.g[[a, b]] * d;
            }
        }
        let a2 = q / at.poly.norm;
        (a2, a2 * at.poly.norm.sqrt())
    }

    /// Bare weighted noise drawn from N(0, Z~_a,0) independently per pulsar.
    fn draw_noise<R: Rng>(&self, rng: &mut R) -> Array2<f64> {
        let n = self.z0.len();
        let m = self.phi.len();
        let e = Array2::from_shape_fn((n, m), |_| rng.sample::<f64, _>(StandardNormal));
        let mut x = Array2::<f64>::zeros((n, m));
        for a in 0..n {
            x.row_mut(a).assign(&matvec(&self.z0_root[a], e.row(a)));
        }
        x
    }

    /// The bare weighted noise and unit-amplitude signal of realization `i`.
    fn realization_parts(&self, i: u64) -> Result<(Array2<f64>, Array2<f64>)> {
        let n = self.z0.len();
        let m = self.phi.len();
        match self.settings.mode {
            Mode::Reduced => {
                let mut rng = stream(self.settings.seed, Purpose::Injection, i);
                let noise = self.draw_noise(&mut rng);
                let e = Array2::from_shape_fn((n, m), |_| rng.sample::<f64, _>(StandardNormal));
                // c~ ~ N(0, G (x) I) at A = 1; its reduction is Z~_a,0 c~_a.
                // One BLAS product (single-threaded: `linalg::single_threaded_blas`).
                let c = self.g_root.dot(&e);
                let mut s = Array2::<f64>::zeros((n, m));
                for a in 0..n {
                    s.row_mut(a).assign(&matvec(&self.z0[a], c.row(a)));
                }
                let noise = self.data.clone().unwrap_or(noise);
                Ok((noise, s))
            }
            Mode::TimeDomain => {
                let t0 = self.grid.t0_mjd;
                let span = self.grid.t_span;
                let noise = match &self.data {
                    Some(d) => d.clone(),
                    None => {
                        let r = simulate_residuals(
                            &self.target.pulsars,
                            t0,
                            span,
                            Ingredients {
                                noise: &self.target.noise,
                                background: None,
                                simulation: self.target.simulation,
                                include_noise: true,
                            },
                            self.settings.seed,
                            Purpose::Injection,
                            i,
                        )?;
                        self.reduce_weighted(&r, 1.0)
                    }
                };
                let pattern = match self.settings.pattern {
                    Pattern::Hd => BackgroundPattern::Hd,
                    Pattern::Monopole => BackgroundPattern::Monopole,
                    Pattern::Dipole => BackgroundPattern::Dipole,
                };
                let sim = self.settings.signal_simulation.unwrap_or(SimulationSpec {
                    n_frequencies: self.grid.k(),
                    span_factor: 1,
                });
                let r = simulate_residuals(
                    &self.target.pulsars,
                    t0,
                    span,
                    Ingredients {
                        noise: &self.target.noise,
                        background: Some(BackgroundSpec {
                            log10_amplitude: REFERENCE_AMPLITUDE.log10(),
                            spectral_index: self.settings.spectral_index,
                            pattern,
                        }),
                        simulation: sim,
                        include_noise: false,
                    },
                    self.settings.seed,
                    Purpose::Injection,
                    i,
                )?;
                Ok((noise, self.reduce_weighted(&r, 1.0 / REFERENCE_AMPLITUDE)))
            }
        }
    }

    fn reduce_weighted(&self, residuals: &[Vec<f64>], scale: f64) -> Array2<f64> {
        let n = self.models.len();
        let mut x = Array2::<f64>::zeros((n, self.phi.len()));
        for (a, (md, r)) in self.models.iter().zip(residuals).enumerate() {
            x.row_mut(a).assign(&(md.reduce(r) * &self.h * scale));
        }
        x
    }

    /// Every amplitude's record of realization `i`.
    pub fn realization(&self, i: u64) -> Result<Vec<Record>> {
        let (noise, signal) = self.realization_parts(i)?;
        let mut out = Vec::with_capacity(self.analyses.len());
        for (at, &amp) in self.analyses.iter().zip(&self.settings.amplitudes) {
            let x0 = &noise + &(&signal * amp);
            let (a2, snr) = self.estimate(at, &x0);
            if !(a2.is_finite() && snr.is_finite()) {
                return Err(Error::NonFinite {
                    what: format!("the recovered amplitude of realization {i}"),
                });
            }
            out.push(Record {
                amplitude: amp,
                realization: i,
                amplitude2: a2,
                sigma_weak: at.poly.sigma0(),
                sigma_full: at.poly.amplitude2_sigma(amp * amp),
                sigma_plugin: at.poly.amplitude2_sigma(a2),
                snr,
            });
        }
        Ok(out)
    }

    /// Every realization of this shard (in parallel; the result does not depend on threads).
    pub fn run(&self) -> Result<Vec<Record>> {
        let idx = self.settings.shard_realizations();
        let per: Vec<Vec<Record>> = idx
            .par_iter()
            .map(|&i| self.realization(i))
            .collect::<Result<_>>()?;
        // Order: amplitude (as listed), then realization.
        let n_amp = self.settings.amplitudes.len();
        let mut out = Vec::with_capacity(per.len() * n_amp);
        for k in 0..n_amp {
            out.extend(per.iter().map(|r| r[k]));
        }
        Ok(out)
    }

    /// SNRs of simulated null trials: bare noise only, analysed as at A = 0.
    pub fn simulated_null(&self, trials: usize) -> Vec<f64> {
        (0..trials as u64)
            .into_par_iter()
            .map(|t| {
                let mut rng = stream(self.settings.seed, Purpose::Injection, NULL_STREAM_BASE + t);
                let x = self.draw_noise(&mut rng);
                self.estimate(&self.null_analysis, &x).1
            })
            .collect()
    }

    /// The variance polynomial of each amplitude's analysis.
    pub fn polynomials(&self) -> Vec<VariancePolynomial> {
        self.analyses.iter().map(|a| a.poly).collect()
    }

    /// D_c of each amplitude's analysis (first entry; constant over frequency in
    /// injected mode).
    pub fn common_auto_power(&self) -> Vec<Vec<f64>> {
        self.analyses.iter().map(|a| a.dc.clone()).collect()
    }

    /// The bare weighted Z~_a,0 (for checks).
    pub fn bare_z(&self) -> &[Array2<f64>] {
        &self.z0
    }

    /// The pattern matrix (unit diagonal).
    pub fn pattern_matrix(&self) -> &Array2<f64> {
        &self.g
    }

    /// The bare weighted noise and unit signal of realization `i` (for checks).
    pub fn parts(&self, i: u64) -> Result<(Array2<f64>, Array2<f64>)> {
        self.realization_parts(i)
    }
}

/// Read the `snr` column of a null folder's `trials.csv` (header `trial,snr,amplitude2`).
pub fn read_null_trials(dir: &Path) -> Result<Vec<f64>> {
    let path = dir.join("trials.csv");
    let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
    let mut lines = text.lines().enumerate();
    let (_, header) = lines
        .next()
        .ok_or_else(|| Error::input(&path, Some(1), None, "empty file"))?;
    let cols: Vec<&str> = header.split(',').map(str::trim).collect();
    let k = cols
        .iter()
        .position(|c| *c == "snr")
        .ok_or_else(|| Error::input(&path, Some(1), None, "no snr column in the header"))?;
    let mut out = Vec::new();
    for (ln, line) in lines {
        if line.trim().is_empty() {
            continue;
        }
        let v = line
            .split(',')
            .nth(k)
            .and_then(|s| s.trim().parse::<f64>().ok())
            .filter(|v| v.is_finite())
            .ok_or_else(|| Error::input(&path, Some(ln + 1), Some("snr"), "not a finite number"))?;
        out.push(v);
    }
    if out.len() < 10 {
        return Err(Error::input(
            &path,
            None,
            None,
            format!("{} trials; need at least 10", out.len()),
        ));
    }
    Ok(out)
}

/// The detection threshold on the SNR at false-alarm probability `fap` from null SNRs: with
/// k = floor(fap n), the (k+1)-th largest value; a detection is snr > threshold, so exactly k of
/// the n null trials are detections (empirical quantile, common practice).
pub fn detection_threshold(null: &[f64], fap: f64) -> Result<f64> {
    let n = null.len();
    let k = (fap * n as f64 + 1e-9).floor() as usize;
    if k < 1 || k >= n {
        return Err(Error::setting(
            "false-alarm",
            format!(
                "{fap} with {n} null trials leaves {k} trials above the threshold; need at least one (use more null trials)"
            ),
        ));
    }
    let mut v = null.to_vec();
    v.sort_by(|a, b| b.total_cmp(a));
    Ok(v[k])
}

/// The default false-alarm probability for `n` null trials: 0.001, raised so that at least 10
/// trials lie above the threshold (0.01 for 1000 trials).
pub fn default_false_alarm(n: usize) -> f64 {
    (10.0 / n as f64).max(0.001)
}

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

/// recovery.json.
#[derive(Serialize, Deserialize)]
struct RecoveryFile {
    pattern: String,
    false_alarm_probability: f64,
    detection_threshold_snr: f64,
    realizations: u64,
    mode: String,
    rows: Vec<RecoveryRow>,
    assumptions: String,
    provenance: serde_json::Value,
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

    /// Write recovery.csv, recovery.json, realizations.csv, coverage_plugin.csv and
    /// campaign.json into `dir` (each atomically).
    pub fn write(&self, dir: &Path) -> Result<()> {
        let mut csv = String::from(RECOVERY_HEADER);
        csv.push('\n');
        for r in &self.rows {
            let vals = [
                r.amplitude,
                r.amplitude2_injected,
                r.realizations as f64,
                r.amplitude2_mean,
                r.amplitude2_std,
                r.amplitude2_sem,
                r.bias,
                r.bias_sem,
                r.snr_mean,
                r.snr_std,
                r.coverage68_weak,
                r.coverage95_weak,
                r.coverage68_full,
                r.coverage95_full,
                r.detection_probability,
            ];
            let cells: Vec<String> = vals
                .iter()
                .enumerate()
                .map(|(i, v)| {
                    if i == 2 {
                        r.realizations.to_string()
                    } else {
                        fmt_f64(*v)
                    }
                })
                .collect();
            csv.push_str(&cells.join(","));
            csv.push('\n');
        }
        let mut real = String::from(REALIZATIONS_HEADER);
        real.push('\n');
        for r in &self.records {
            let _ = writeln!(
                real,
                "{},{},{},{},{},{}",
                fmt_f64(r.amplitude),
                r.realization,
                fmt_f64(r.amplitude2),
                fmt_f64(r.sigma_weak),
                fmt_f64(r.sigma_full),
                fmt_f64(r.snr)
            );
        }
        let mut plug = String::from("amplitude,coverage68_plugin,coverage95_plugin\n");
        for p in &self.plugin {
            let _ = writeln!(
                plug,
                "{},{},{}",
                fmt_f64(p.amplitude),
                fmt_f64(p.coverage68_plugin),
                fmt_f64(p.coverage95_plugin)
            );
        }
        let json = RecoveryFile {
            pattern: self.state.pattern.name().to_string(),
            false_alarm_probability: self.state.false_alarm_probability,
            detection_threshold_snr: self.state.detection_threshold_snr,
            realizations: self.realizations(),
            mode: self.state.mode.name().to_string(),
            rows: self.rows.clone(),
            assumptions: self.assumptions.clone(),
            provenance: self.provenance.clone(),
        };
        write_atomic(&dir.join("realizations.csv"), real.as_bytes())?;
        write_atomic(&dir.join("coverage_plugin.csv"), plug.as_bytes())?;
        write_json(&dir.join("campaign.json"), &self.state)?;
        write_atomic(&dir.join("recovery.csv"), csv.as_bytes())?;
        write_json(&dir.join("recovery.json"), &json)
    }
}

/// Header of recovery.csv.
pub const RECOVERY_HEADER: &str = "amplitude,amplitude2_injected,realizations,amplitude2_mean,amplitude2_std,amplitude2_sem,bias,bias_sem,snr_mean,snr_std,coverage68_weak,coverage95_weak,coverage68_full,coverage95_full,detection_probability";

/// Header of realizations.csv.
pub const REALIZATIONS_HEADER: &str =
    "amplitude,realization,amplitude2,amplitude2_sigma_weak,amplitude2_sigma_full,snr";

/// The assumptions stated in recovery.json.
pub fn assumptions(c: &Campaign, null_source: &str) -> String {
    let s = &c.settings;
    let auto = match s.auto_power {
        AutoPowerChoice::Injected => "each pulsar's auto-power P_a includes the common process at the injected amplitude (none at A = 0), so the diagonal blocks of the joint covariance are C_aa = Z_a".to_string(),
        AutoPowerChoice::Fixed => "each pulsar's auto-power P_a holds the same common process at every amplitude (D_c = Phi_c / Phi; none if not given), so C_aa = Z_a + Z_a (A^2 Phi - Phi_c) Z_a".to_string(),
    };
    let mode = match s.mode {
        Mode::Reduced => "reduced space: the weighted reductions are drawn as Z~_a^(1/2) e_a (noise) plus Z~_a c~_a with c~ ~ N(0, A^2 G (x) I) (signal), the joint covariance C of the notes, exact for the model".to_string(),
        Mode::TimeDomain => {
            let sim = s.signal_simulation.unwrap_or(SimulationSpec { n_frequencies: c.grid.k(), span_factor: 1 });
            format!("time domain: residuals simulated (noise on the target's ladder; background on {} frequencies of spacing 1/({} T_span)), timing model fitted out by weighted least squares, reduced with the bare pulsar models", sim.n_frequencies * sim.span_factor, sim.span_factor)
        }
    };
    let target = match c.target.kind {
        TargetKind::Scenario => "scenario target: one laid-out array, fresh noise every realization from the true noise model; the reference for bias and coverage is A^2".to_string(),
        TargetKind::Release => "release target: the signal is added to the release's actual residuals (one fixed noise realization); the reference for bias and coverage is A^2 plus the data's own A2_hat under the same analysis (campaign.json baseline_amplitude2), and coverage is conditional on that noise realization".to_string(),
    };
    format!(
        "Background of amplitude A with spectral index {:.6} and the {} pattern, injected on the analysis frequencies and recovered with the OS of the same pattern and template ({} frequencies). {auto}. {mode}. {target}. amplitude2_sigma_weak is sigma_0 = (sum G^2/sigma^2)^(-1/2); amplitude2_sigma_full is the pair covariance with the signal present (Allen & Romano 2023) at the injected amplitude; coverage_plugin.csv uses it at the recovered amplitude. Intervals are A2_hat +- z sigma with z = {Z68} (68%) and {Z95} (95%). Detection: snr > detection_threshold_snr, taken from {null_source}. Realizations i depend on (seed, i) only, identical draws scaled for every amplitude.",
        s.spectral_index,
        s.pattern.name(),
        c.grid.k(),
    )
}

/// Run a campaign end to end: prepare, threshold, realizations, outcome.
pub fn run_campaign(target: Target, settings: InjectSettings) -> Result<Outcome> {
    crate::linalg::single_threaded_blas();
    let campaign = Campaign::prepare(target, settings)?;
    let (null, source) = match &campaign.settings.null_dir {
        Some(d) => (
            read_null_trials(d)?,
            format!("the null trials in {}", d.join("trials.csv").display()),
        ),
        None => (
            campaign.simulated_null(campaign.settings.null_trials),
            format!(
                "{} reduced-space simulated null trials of the same array (x~_a ~ N(0, Z~_a), analysed as at A = 0)",
                campaign.settings.null_trials
            ),
        ),
    };
    let fap = campaign
        .settings
        .false_alarm
        .unwrap_or_else(|| default_false_alarm(null.len()));
    let threshold = detection_threshold(&null, fap)?;
    let records = campaign.run()?;
    let s = &campaign.settings;
    let state = CampaignState {
        mode: s.mode,
        pattern: s.pattern,
        target: campaign.target.kind,
        seed: s.seed,
        shard: s.shard,
        realizations_total: s.realizations,
        amplitudes: s.amplitudes.clone(),
        baseline_amplitude2: campaign.baseline.clone(),
        variance_polynomials: campaign.polynomials(),
        false_alarm_probability: fap,
        detection_threshold_snr: threshold,
        null_source: source.clone(),
        null_trials: null.len(),
        input_hash: campaign.target.input_hash.clone(),
        n_pulsars: campaign.target.pulsars.len(),
        n_frequencies: campaign.grid.k(),
    };
    let provenance = serde_json::json!({
        "program": "ptacorr",
        "version": crate::VERSION,
        "release_title": campaign.target.title,
        "input_hash": campaign.target.input_hash,
        "settings": serde_json::to_value(s).unwrap_or(serde_json::Value::Null),
    });
    let text = assumptions(&campaign, &source);
    Ok(Outcome::new(state, records, text, provenance))
}

/// Parse realizations.csv (as written by [`Outcome::write`]).
pub fn read_realizations(path: &Path) -> Result<Vec<Record>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let mut lines = text.lines().enumerate();
    match lines.next() {
        Some((_, h)) if h.trim() == REALIZATIONS_HEADER => {}
        _ => {
            return Err(Error::input(
                path,
                Some(1),
                None,
                format!("expected the header {REALIZATIONS_HEADER}"),
            ))
        }
    }
    let mut out = Vec::new();
    for (ln, line) in lines {
        if line.trim().is_empty() || line.trim() == REALIZATIONS_HEADER {
            continue; // concatenated shard files may repeat the header
        }
        let f: Vec<&str> = line.split(',').map(str::trim).collect();
        let num = |k: usize, name: &str| -> Result<f64> {
            f.get(k)
                .and_then(|s| s.parse::<f64>().ok())
                .ok_or_else(|| Error::input(path, Some(ln + 1), Some(name), "not a number"))
        };
        let realization = f
            .get(1)
            .and_then(|s| s.parse::<u64>().ok())
            .ok_or_else(|| Error::input(path, Some(ln + 1), Some("realization"), "not an index"))?;
        out.push(Record {
            amplitude: num(0, "amplitude")?,
            realization,
            amplitude2: num(2, "amplitude2")?,
            sigma_weak: num(3, "amplitude2_sigma_weak")?,
            sigma_full: num(4, "amplitude2_sigma_full")?,
            sigma_plugin: f64::NAN,
            snr: num(5, "snr")?,
        });
    }
    Ok(out)
}

/// Merge shard folders (each with campaign.json, recovery.json and realizations.csv) of one
/// campaign: check they agree, concatenate the realizations (no index twice), summarise.
pub fn merge_shards(dirs: &[PathBuf]) -> Result<Outcome> {
    if dirs.is_empty() {
        return Err(Error::setting("merge", "give at least one shard folder"));
    }
    let mut first: Option<(CampaignState, RecoveryFile)> = None;
    let mut records = Vec::new();
    for d in dirs {
        let read_json = |name: &str| -> Result<serde_json::Value> {
            let p = d.join(name);
            let text = std::fs::read_to_string(&p).map_err(|e| Error::io(&p, e))?;
            serde_json::from_str(&text)
                .map_err(|e| Error::input(&p, Some(e.line()), None, e.to_string()))
        };
        let state: CampaignState = serde_json::from_value(read_json("campaign.json")?)
            .map_err(|e| Error::input(&d.join("campaign.json"), None, None, e.to_string()))?;
        let rec: RecoveryFile = serde_json::from_value(read_json("recovery.json")?)
            .map_err(|e| Error::input(&d.join("recovery.json"), None, None, e.to_string()))?;
        let mut rs = read_realizations(&d.join("realizations.csv"))?;
        // The plug-in sigma from the shard's variance polynomial at the recovered amplitude.
        for r in &mut rs {
            let k = state
                .amplitudes
                .iter()
                .position(|&a| a == r.amplitude)
                .ok_or_else(|| {
                    Error::input(
                        &d.join("realizations.csv"),
                        None,
                        Some("amplitude"),
                        format!("{} is not an amplitude of the campaign", r.amplitude),
                    )
                })?;
            r.sigma_plugin = state.variance_polynomials[k].amplitude2_sigma(r.amplitude2);
        }
        records.extend(rs);
        match &first {
            None => first = Some((state, rec)),
            Some((s0, _)) => {
                let same = s0.mode == state.mode
                    && s0.pattern == state.pattern
                    && s0.seed == state.seed
                    && s0.amplitudes == state.amplitudes
                    && s0.realizations_total == state.realizations_total
                    && s0.input_hash == state.input_hash
                    && s0.detection_threshold_snr == state.detection_threshold_snr
                    && s0.shard.count == state.shard.count;
                if !same {
                    return Err(Error::setting(
                        "merge",
                        format!(
                            "{} is not a shard of the same campaign (mode, pattern, seed, amplitudes, realizations, input, threshold and shard count must agree)",
                            d.display()
                        ),
                    ));
                }
            }
        }
    }
    let (mut state, rec) = first.expect("at least one shard");
    records.sort_by(|a, b| {
        let ka = state.amplitudes.iter().position(|&x| x == a.amplitude);
        let kb = state.amplitudes.iter().position(|&x| x == b.amplitude);
        ka.cmp(&kb).then(a.realization.cmp(&b.realization))
    });
    for w in records.windows(2) {
        if w[0].amplitude == w[1].amplitude && w[0].realization == w[1].realization {
            return Err(Error::setting(
                "merge",
                format!(
                    "realization {} at amplitude {} appears twice (a shard given twice?)",
                    w[0].realization, w[0].amplitude
                ),
            ));
        }
    }
    state.shard = Shard::ALL;
    Ok(Outcome::new(
        state,
        records,
        rec.assumptions,
        rec.provenance,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A small fictional array for the checks: 12 pulsars, 8 years, 30-day cadence, white noise
    /// and some intrinsic red noise, simulated on exactly the analysis ladder (K = 8).
    pub(crate) const SMALL: &str = r#"
[array]
title = "Injection check array (fictional): 12 pulsars, 8 years"
n_pulsars = 12
start_mjd = 56000.0
span_years = 8.0
cadence_days = 30.0
seed = 7

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1400.0]

[white]
sigma_us = [0.2, 0.6]
efac = [1.0, 1.2]

[red]
share = 0.3
log10_amplitude = [-14.5, -14.0]
spectral_index = [2.0, 4.0]

[simulation]
n_frequencies = 8
span_factor = 1
"#;

    pub(crate) fn small_target() -> Target {
        let s = Scenario::parse(SMALL, Path::new("small.toml")).unwrap();
        Target::from_scenario(&s, SMALL)
    }

    pub(crate) fn small_settings(amps: &[f64], realizations: u64) -> InjectSettings {
        InjectSettings {
            amplitudes: amps.to_vec(),
            realizations,
            n_frequencies: 8,
            ..InjectSettings::default()
        }
    }

    /// The interval quantiles against statrs's normal inverse CDF.
    #[test]
    fn interval_quantiles_match_statrs() {
        use statrs::distribution::{ContinuousCDF, Normal};
        let n = Normal::new(0.0, 1.0).unwrap();
        assert!((n.inverse_cdf(0.84) - Z68).abs() < 1e-9);
        assert!((n.inverse_cdf(0.975) - Z95).abs() < 1e-9);
    }

    #[test]
    fn amplitude_lists_parse_values_and_log_ranges() {
        assert_eq!(
            parse_amplitudes("0, 1e-15,3e-15").unwrap(),
            vec![0.0, 1e-15, 3e-15]
        );
        let v = parse_amplitudes("0,log:1e-16:1e-14:3").unwrap();
        assert_eq!(v.len(), 4);
        assert_eq!((v[0], v[1], v[3]), (0.0, 1e-16, 1e-14));
        assert!((v[2] / 1e-15 - 1.0).abs() < 1e-12);
        for bad in [
            "",
            "x",
            "1e-15,",
            "-1e-15",
            "1e-15,1e-15",
            "log:0:1e-14:3",
            "log:1e-14:1e-16:3",
            "log:1e-16:1e-14:1",
            "log:1e-16:1e-14",
            "1e-3",
            "nan",
        ] {
            assert!(parse_amplitudes(bad).is_err(), "{bad:?} accepted");
        }
    }

    #[test]
    fn shards_take_contiguous_blocks_of_realizations() {
        let s = Shard::parse("2/3").unwrap();
        assert_eq!(s.range(8).collect::<Vec<u64>>(), vec![2, 3, 4]);
    }

    #[test]
    fn threshold_leaves_exactly_k_null_trials_above() {
        let null: Vec<f64> = (0..1000).map(|i| i as f64).collect();
        let t = detection_threshold(&null, 0.01).unwrap();
        assert_eq!(null.iter().filter(|&&v| v > t).count(), 10);
        assert!(detection_threshold(&null, 0.0005).is_err());
        assert_eq!(default_false_alarm(1000), 0.01);
        assert_eq!(default_false_alarm(100_000), 0.001);
    }

    /// Woodbury identity (Woodbury 1950): the reduction with the common process in P equals
    /// the bare one transformed by R = (I + Z~_0 D_c)^-1; checked against a model rebuilt with
    /// the common auto-power by the engine's own Woodbury reduction.
    #[test]
    fn transform_matches_a_model_rebuilt_with_the_common_process() {
        let a = 5e-15;
        let c = Campaign::prepare(small_target(), small_settings(&[a], 4)).unwrap();
        let law = PowerLaw {
            log10_amplitude: a.log10(),
            spectral_index: c.settings.spectral_index,
        };
        for (k, p) in c.target.pulsars.iter().enumerate().take(3) {
            let md = PulsarModel::build(
                p,
                &c.target.noise.pulsar(&p.label),
                &c.grid,
                AutoPower { common: Some(&law) },
            )
            .unwrap();
            let mut zw = md.z.clone();
            for ((i, j), v) in zw.indexed_iter_mut() {
                *v *= c.h[i] * c.h[j];
            }
            let r = &c.analyses[0].r.as_ref().unwrap()[k];
            let zt = r.dot(&c.z0[k]);
            let scale = zw.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            let diff = (&zt - &zw).iter().fold(0.0f64, |m, v| m.max(v.abs()));
            assert!(diff < 1e-7 * scale, "pulsar {k}: {diff} vs {scale}");
            // residual vector: any r works, the identity is linear
            let res: Vec<f64> = (0..p.n_toa())
                .map(|i| ((i * 7919) % 13) as f64 * 1e-7)
                .collect();
            let x_direct = md.reduce(&res) * &c.h;
            let x_bare = c.models[k].reduce(&res) * &c.h;
            let x_t = r.dot(&x_bare);
            let sx = x_direct.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            let dx = (&x_t - &x_direct)
                .iter()
                .fold(0.0f64, |m, v| m.max(v.abs()));
            assert!(dx < 1e-7 * sx, "pulsar {k}: {dx} vs {sx}");
        }
    }

    /// The factorised draws (per-pulsar noise roots plus a pattern root for the signal) have
    /// the joint covariance C of the notes (section 5, Allen & Romano 2023): each element of
    /// the sample covariance within 5 standard errors sqrt((C_ii C_jj + C_ij^2) / n) (the
    /// Gaussian sampling variance of a covariance estimate, Anderson 2003).
    #[test]
    fn draws_have_the_joint_covariance() {
        let a = 1e-14;
        let mut set = small_settings(&[a], 3000);
        set.n_frequencies = 2;
        let c = Campaign::prepare(small_target(), set).unwrap();
        let at = &c.analyses[0];
        let rs = at.r.as_ref().unwrap();
        let z: Vec<Array2<f64>> = rs
            .iter()
            .zip(&c.z0)
            .map(|(r, z0)| symmetrise(r.dot(z0)))
            .collect();
        let cov = crate::paircov::joint_covariance(&z, &c.g, &at.dc, a * a).unwrap();
        let n = 3000usize;
        let dim = cov.nrows();
        let mut acc = Array2::<f64>::zeros((dim, dim));
        for i in 0..n as u64 {
            let (noise, s) = c.parts(i).unwrap();
            let x0 = &noise + &(&s * a);
            let mut v = Vec::with_capacity(dim);
            for (k, r) in rs.iter().enumerate() {
                v.extend(r.dot(&x0.row(k)).iter().copied());
            }
            let v = Array1::from(v);
            for p in 0..dim {
                for q in 0..dim {
                    acc[[p, q]] += v[p] * v[q];
                }
            }
        }
        acc /= n as f64;
        let mut worst = 0.0f64;
        for p in 0..dim {
            for q in 0..dim {
                let se = ((cov[[p, p]] * cov[[q, q]] + cov[[p, q]].powi(2)) / n as f64).sqrt();
                worst = worst.max((acc[[p, q]] - cov[[p, q]]).abs() / se);
            }
        }
        assert!(worst < 5.0, "worst element {worst} standard errors off");
    }

    /// Realization i depends on (seed, i) only: shards and thread counts give the same records.
    #[test]
    fn shards_and_threads_do_not_change_realizations() {
        let amps = [0.0, 3e-15];
        let full = Campaign::prepare(small_target(), small_settings(&amps, 6)).unwrap();
        let all = full.run().unwrap();
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let single = pool.install(|| full.run().unwrap());
        assert_eq!(all, single);
        let mut pieces = Vec::new();
        for k in 1..=2 {
            let mut s = small_settings(&amps, 6);
            s.shard = Shard { index: k, count: 2 };
            pieces.extend(Campaign::prepare(small_target(), s).unwrap().run().unwrap());
        }
        for r in &all {
            assert!(
                pieces.contains(r),
                "realization {} missing or changed",
                r.realization
            );
        }
        assert_eq!(pieces.len(), all.len());
    }

    /// Files have the documented headers and keys, and merging two shards reproduces the
    /// single run.
    #[test]
    fn outputs_have_the_documented_shape_and_shards_merge() {
        let dir = std::env::temp_dir().join(format!("ptacorr-inject-{}", std::process::id()));
        let amps = [0.0, 3e-15];
        let mut s = small_settings(&amps, 8);
        s.null_trials = 200;
        let whole = run_campaign(small_target(), s.clone()).unwrap();
        whole.write(&dir.join("whole")).unwrap();
        let mut shard_dirs = Vec::new();
        for k in 1..=2 {
            let mut sk = s.clone();
            sk.shard = Shard { index: k, count: 2 };
            let d = dir.join(format!("shard{k}"));
            run_campaign(small_target(), sk).unwrap().write(&d).unwrap();
            shard_dirs.push(d);
        }
        let merged = merge_shards(&shard_dirs).unwrap();
        assert_eq!(merged.rows, whole.rows);
        assert_eq!(merged.plugin, whole.plugin);
        assert!(merge_shards(&[shard_dirs[0].clone(), shard_dirs[0].clone()]).is_err());

        let csv = std::fs::read_to_string(dir.join("whole/recovery.csv")).unwrap();
        assert_eq!(csv.lines().next().unwrap(), RECOVERY_HEADER);
        assert_eq!(csv.lines().count(), 3);
        let real = std::fs::read_to_string(dir.join("whole/realizations.csv")).unwrap();
        assert_eq!(real.lines().next().unwrap(), REALIZATIONS_HEADER);
        assert_eq!(real.lines().count(), 1 + 16);
        let j: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(dir.join("whole/recovery.json")).unwrap(),
        )
        .unwrap();
        let keys: Vec<&str> = j.as_object().unwrap().keys().map(|k| k.as_str()).collect();
        for k in [
            "pattern",
            "false_alarm_probability",
            "detection_threshold_snr",
            "realizations",
            "mode",
            "rows",
            "assumptions",
            "provenance",
        ] {
            assert!(keys.contains(&k), "missing {k}");
        }
        assert_eq!(keys.len(), 8);
        assert_eq!(j["pattern"], "hd");
        assert_eq!(j["mode"], "reduced");
        assert_eq!(j["realizations"], 8);
        assert_eq!(j["false_alarm_probability"], 0.05);
        let row = j["rows"][1].as_object().unwrap();
        let fields: Vec<&str> = RECOVERY_HEADER.split(',').collect();
        assert_eq!(row.len(), fields.len());
        for f in fields {
            assert!(row.contains_key(f), "row lacks {f}");
        }
        // the per-realization files of shards concatenate into the whole set
        let mut cat = String::new();
        for d in &shard_dirs {
            cat.push_str(&std::fs::read_to_string(d.join("realizations.csv")).unwrap());
        }
        std::fs::write(dir.join("cat.csv"), cat).unwrap();
        assert_eq!(read_realizations(&dir.join("cat.csv")).unwrap().len(), 16);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    fn check_unbiased(rows: &[RecoveryRow]) {
        for r in rows {
            assert!(
                r.bias.abs() < 3.0 * r.bias_sem,
                "A = {:e}: bias {:e} vs sem {:e}",
                r.amplitude,
                r.bias,
                r.bias_sem
            );
        }
    }

    /// Quick check (seconds): the recovered A^2 is unbiased in reduced space at zero, weak and
    /// strong signal, and the weak-signal sigma_0 is below the scatter at strong signal while
    /// the pair-covariance sigma matches it (sample sd within 4 standard errors, relative SE
    /// of a standard deviation ~ 1/sqrt(2(n-1)), common practice).
    #[test]
    fn reduced_space_recovery_is_unbiased_quick() {
        let amps = [0.0, 3e-15, 1e-14];
        let mut s = small_settings(&amps, 600);
        s.null_trials = 200;
        let out = run_campaign(small_target(), s).unwrap();
        check_unbiased(&out.rows);
        let strong = &out.rows[2];
        let rec = out.records.iter().find(|r| r.amplitude == 1e-14).unwrap();
        let rel_se = 1.0 / (2.0 * 599.0f64).sqrt();
        assert!((strong.amplitude2_std / rec.sigma_full - 1.0).abs() < 4.0 * rel_se);
        assert!(strong.amplitude2_std / rec.sigma_weak > 1.0 + 4.0 * rel_se);
    }

    /// A release target: the expected recovery is A^2 on top of the data's own estimate.
    #[test]
    fn release_target_recovers_the_injection_on_top_of_the_data() {
        let dir = std::env::temp_dir().join(format!("ptacorr-inject-rel-{}", std::process::id()));
        let sc = Scenario::parse(SMALL, Path::new("small.toml")).unwrap();
        let layout = lay_out(&sc, 7);
        crate::simulate::simulate_scenario(&layout, 7, &dir).unwrap();
        let rel = crate::release::read_release(&dir).unwrap();
        let mut s = small_settings(&[0.0, 1e-14], 400);
        s.null_trials = 200;
        let out = run_campaign(Target::from_release(&rel), s).unwrap();
        // at A = 0 every realization is the data itself
        let base = out.state.baseline_amplitude2[0].abs();
        assert!(out.rows[0].amplitude2_std <= 1e-9 * base);
        assert!(out.rows[0].bias.abs() <= 1e-9 * base);
        check_unbiased(&out.rows[1..]);
        assert!(out.state.baseline_amplitude2[1] != 0.0);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// The check array scaled up: 40 pulsars (or `n`), `k` analysis frequencies.
    fn array(n: usize, k: usize) -> Target {
        let text = SMALL
            .replace("n_pulsars = 12", &format!("n_pulsars = {n}"))
            .replace("12 pulsars", &format!("{n} pulsars"))
            .replace("n_frequencies = 8", &format!("n_frequencies = {k}"));
        let s = Scenario::parse(&text, Path::new("array.toml")).unwrap();
        Target::from_scenario(&s, &text)
    }

    /// Relative standard error of a sample standard deviation from the sample kurtosis,
    /// se(s)/s ~ sqrt((m4/s^4 - 1) / (4 n)) (delta method; Kendall & Stuart, vol. 1, 10.8).
    fn std_rel_se(v: &[f64]) -> f64 {
        let n = v.len() as f64;
        let m = v.iter().sum::<f64>() / n;
        let m2 = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / n;
        let m4 = v.iter().map(|x| (x - m).powi(4)).sum::<f64>() / n;
        ((m4 / (m2 * m2) - 1.0) / (4.0 * n)).sqrt()
    }

    fn print_rows(label: &str, out: &Outcome) {
        eprintln!(
            "{label}: threshold snr {:.3} at fap {}",
            out.state.detection_threshold_snr, out.state.false_alarm_probability
        );
        eprintln!("  A          bias/sem  std/sig_full  cov68 w/f      cov95 w/f      cov68/95 plugin  P_det");
        for (r, p) in out.rows.iter().zip(&out.plugin) {
            let rec: Vec<&Record> = out
                .records
                .iter()
                .filter(|x| x.amplitude == r.amplitude)
                .collect();
            eprintln!(
                "  {:.2e}  {:+.2}     {:.3}         {:.3}/{:.3}    {:.3}/{:.3}    {:.3}/{:.3}      {:.4}",
                r.amplitude,
                r.bias / r.bias_sem,
                r.amplitude2_std / rec[0].sigma_full,
                r.coverage68_weak,
                r.coverage68_full,
                r.coverage95_weak,
                r.coverage95_full,
                p.coverage68_plugin,
                p.coverage95_plugin,
                r.detection_probability
            );
        }
    }

    fn check_campaign(out: &Outcome, check_detection: bool, check_coverage: bool) {
        check_unbiased(&out.rows);
        for r in &out.rows {
            let rec: Vec<&Record> = out
                .records
                .iter()
                .filter(|x| x.amplitude == r.amplitude)
                .collect();
            let a2: Vec<f64> = rec.iter().map(|x| x.amplitude2).collect();
            let se = std_rel_se(&a2);
            let ratio = r.amplitude2_std / rec[0].sigma_full;
            assert!(
                (ratio - 1.0).abs() < 3.0 * se,
                "A = {:e}: std / sigma_full = {ratio} (se {se})",
                r.amplitude
            );
            // Gaussian intervals on a generalised-chi-square statistic (Hazboun et al. 2023):
            // the 68% interval over-covers by a few points, the 95% one is close; stated
            // tolerances, not Monte Carlo errors.
            if !check_coverage {
                continue;
            }
            assert!(
                (r.coverage68_full - 0.68).abs() < 0.08,
                "cov68 {}",
                r.coverage68_full
            );
            assert!(
                (r.coverage95_full - 0.95).abs() < 0.025,
                "cov95 {}",
                r.coverage95_full
            );
        }
        let strong = out.rows.last().unwrap();
        assert!(
            strong.coverage68_weak < 0.55 && strong.coverage95_weak < 0.85,
            "weak sigma covers {} / {}",
            strong.coverage68_weak,
            strong.coverage95_weak
        );
        if check_detection {
            let n = out.rows[0].realizations as f64;
            let fap = out.state.false_alarm_probability;
            let se = (fap * (1.0 - fap) * (1.0 / n + 1.0 / out.state.null_trials as f64)).sqrt();
            let p0 = out.rows[0].detection_probability;
            assert!(
                (p0 - fap).abs() < 3.0 * se,
                "P_det(0) = {p0} vs fap {fap} (se {se})"
            );
            for w in out.rows.windows(2) {
                assert!(
                    w[1].detection_probability >= w[0].detection_probability,
                    "P_det not monotone"
                );
            }
            assert!(strong.detection_probability > 0.9);
        }
    }

    /// Monte Carlo (about a minute in the test profile): reduced-space injections into a
    /// 40-pulsar, 14-frequency array. Unbiased at every amplitude (3 MC standard errors);
    /// the scatter equals the pair-covariance sigma (3 standard errors of a standard
    /// deviation); coverage with it near nominal (stated tolerances), with sigma_0 far below at
    /// strong signal; P_det rises monotonically and equals the false-alarm probability at
    /// A = 0 within binomial errors of both the injections and the null.
    #[test]
    #[ignore]
    fn reduced_space_bias_coverage_and_detection() {
        let amps = [0.0, 1e-15, 3e-15, 1e-14, 3e-14];
        let mut s = small_settings(&amps, 8000);
        s.n_frequencies = 14;
        s.null_trials = 20_000;
        s.false_alarm = Some(0.05);
        s.seed = 11;
        let out = run_campaign(array(40, 14), s.clone()).unwrap();
        print_rows("reduced, auto-power at the injected level", &out);
        check_campaign(&out, true, true);
        // Without the common process in the auto-power the weak-signal sigma is even worse.
        s.auto_power = AutoPowerChoice::Fixed;
        s.common = CommonAutoPower::Off;
        let out = run_campaign(array(40, 14), s).unwrap();
        print_rows("reduced, no common auto-power", &out);
        // The scatter still equals the pair-covariance sigma, but the statistic is far from
        // Gaussian at strong signal (68% interval covers ~0.79), so coverage is reported only.
        check_campaign(&out, false, false);
    }

    /// Monte Carlo (tens of seconds): time-domain injections (simulate, fit out the timing
    /// model, reduce) into the 12-pulsar array: unbiased and scatter equal to the
    /// pair-covariance sigma, as in reduced space.
    #[test]
    #[ignore]
    fn time_domain_bias_and_scatter() {
        let amps = [0.0, 3e-15, 1e-14, 3e-14];
        let mut s = small_settings(&amps, 3000);
        s.mode = Mode::TimeDomain;
        s.null_trials = 2000;
        s.seed = 5;
        let t = std::time::Instant::now();
        let out = run_campaign(small_target(), s).unwrap();
        eprintln!(
            "time domain: {:.1} s for {} realizations",
            t.elapsed().as_secs_f64(),
            3000
        );
        print_rows("time domain", &out);
        check_unbiased(&out.rows);
        for r in &out.rows {
            let rec: Vec<&Record> = out
                .records
                .iter()
                .filter(|x| x.amplitude == r.amplitude)
                .collect();
            let a2: Vec<f64> = rec.iter().map(|x| x.amplitude2).collect();
            let ratio = r.amplitude2_std / rec[0].sigma_full;
            assert!(
                (ratio - 1.0).abs() < 3.0 * std_rel_se(&a2),
                "A = {:e}: {ratio}",
                r.amplitude
            );
        }
    }

    /// Benchmark (issue 4): 10,000 reduced-space injections of a 100-pulsar, 14-frequency
    /// array in under a minute (including preparation and a 1000-trial null).
    #[test]
    #[ignore]
    fn benchmark_reduced_space_100_pulsars() {
        crate::linalg::single_threaded_blas();
        for amps in [vec![1e-14], vec![0.0, 1e-15, 3e-15, 1e-14, 3e-14]] {
            let per = 10_000 / amps.len() as u64;
            let mut s = small_settings(&amps, per);
            s.n_frequencies = 14;
            let t = std::time::Instant::now();
            let c = Campaign::prepare(array(100, 14), s).unwrap();
            let t_prep = t.elapsed().as_secs_f64();
            let null = c.simulated_null(1000);
            let t_null = t.elapsed().as_secs_f64() - t_prep;
            let rec = c.run().unwrap();
            let total = t.elapsed().as_secs_f64();
            eprintln!(
                "100 pulsars, K = 14, {} amplitudes x {per}: prepare {t_prep:.2} s, null {t_null:.2} s, injections {:.2} s, total {total:.2} s ({} threads)",
                amps.len(),
                total - t_prep - t_null,
                rayon::current_num_threads()
            );
            assert_eq!(rec.len(), 10_000);
            assert_eq!(null.len(), 1000);
        }
    }
}
