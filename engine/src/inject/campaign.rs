//! The campaign itself: the bare reduction of every pulsar, the analysis at each amplitude
//! (Woodbury transform and pair-covariance polynomial), and the realizations.

use super::settings::{AutoPowerChoice, InjectSettings, Mode};
use super::summary::{CampaignState, Outcome};
use super::target::{Target, TargetKind};
use super::threshold::{default_false_alarm, detection_threshold, read_null_trials};
use super::{NULL_STREAM_BASE, REFERENCE_AMPLITUDE, Z68, Z95};
use crate::analysis::CommonAutoPower;
use crate::error::{Error, Result};
use crate::linalg::PsdRoot;
use crate::noise::RedProcess;
use crate::orf::{pattern_matrix, Pattern};
use crate::paircov::{variance_polynomial, VariancePolynomial};
use crate::reduce::{AutoPower, FrequencyGrid, PulsarModel};
use crate::rng::{stream, Purpose};
use crate::scenario::{BackgroundPattern, BackgroundSpec, SimulationSpec};
use crate::simulate::{pattern_root, simulate_residuals, Ingredients};
use crate::spectrum::{template, PowerLaw};
use crate::whiten::woodbury_transform;
use ndarray::{Array1, Array2};
use rand::Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;

/// One realization at one amplitude: a row of `realizations.csv` (written by
/// [`crate::output::csv_table`], read back by [`crate::output::read_csv`]).
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Record {
    pub amplitude: f64,
    pub realization: u64,
    pub amplitude2: f64,
    /// sigma_0 (weak signal).
    #[serde(rename = "amplitude2_sigma_weak")]
    pub sigma_weak: f64,
    /// From the pair covariance at the injected amplitude.
    #[serde(rename = "amplitude2_sigma_full")]
    pub sigma_full: f64,
    /// From the pair covariance at the recovered amplitude (what an analyst would report); not
    /// in the file (the merge recomputes it from the variance polynomial).
    #[serde(skip, default = "not_in_file")]
    pub sigma_plugin: f64,
    pub snr: f64,
}

fn not_in_file() -> f64 {
    f64::NAN
}

/// The analysis at one amplitude: D_c, the Woodbury transforms and the variance polynomial.
pub(super) struct AnalysisAt {
    pub(super) dc: Vec<f64>,
    /// R_a (None when D_c = 0: the identity).
    pub(super) r: Option<Vec<Array2<f64>>>,
    pub(super) poly: VariancePolynomial,
}

/// A prepared injection campaign.
pub struct Campaign {
    pub target: Target,
    pub settings: InjectSettings,
    pub grid: FrequencyGrid,
    /// The template (A = 1), length 2K.
    pub phi: Vec<f64>,
    pub(super) h: Array1<f64>,
    /// The bare per-pulsar models, kept only in time-domain mode (which reduces fresh
    /// residuals in every realization); empty in reduced mode. A model holds the whitened basis
    /// (n x c doubles: about 97 MB at 50,000 TOAs and c = 243), so keeping all of them bounded
    /// `inject` at 200 x 50,000 x 60 by the machine's memory (docs/performance.md).
    models: Vec<PulsarModel>,
    /// Bare weighted Z~_a,0.
    pub(super) z0: Vec<Array2<f64>>,
    /// Z~_a,0^(1/2) (symmetric root).
    z0_root: Vec<Array2<f64>>,
    /// The data's bare weighted reduction (release target), N x 2K.
    data: Option<Array2<f64>>,
    /// Pattern matrix with unit diagonal and a square root of it.
    pub(super) g: Array2<f64>,
    g_root: Array2<f64>,
    pub(super) analyses: Vec<AnalysisAt>,
    null_analysis: AnalysisAt,
    /// The data's own A2_hat under each amplitude's analysis (release target; else 0).
    pub baseline: Vec<f64>,
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
        let m = phi.len();
        let keep_models = settings.mode == Mode::TimeDomain;
        let release_data = target.kind == TargetKind::Release;
        // Per pulsar (in parallel): the bare model, its weighted Z~_a,0 and, for a release,
        // the weighted reduction of its residuals; the model itself is dropped at once unless
        // time-domain mode needs it, so only a thread's worth of models is held at a time.
        /// A pulsar's weighted Z~_a,0, its weighted data reduction (release targets) and its
        /// model (time-domain mode).
        type PerPulsar = (Array2<f64>, Option<Array1<f64>>, Option<PulsarModel>);
        let per: Vec<PerPulsar> = target
            .pulsars
            .par_iter()
            .map(|p| {
                let md = PulsarModel::build(
                    p,
                    &target.noise.pulsar(&p.label),
                    &grid,
                    AutoPower { common: None },
                )?;
                let mut z = md.z.clone();
                for ((i, j), v) in z.indexed_iter_mut() {
                    *v *= h[i] * h[j];
                }
                let x = release_data.then(|| md.reduce(&p.residual) * &h);
                Ok((z, x, keep_models.then_some(md)))
            })
            .collect::<Result<_>>()?;
        let mut z0 = Vec::with_capacity(n);
        let mut reduced_data = Vec::with_capacity(n);
        let mut models = Vec::new();
        for (z, x, md) in per {
            z0.push(z);
            reduced_data.push(x);
            models.extend(md);
        }
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
            .map(|(z, p)| Ok(PsdRoot::new(z, &format!("Z of pulsar {}", p.label))?.symmetric()))
            .collect::<Result<Vec<_>>>()?;
        let data = match target.kind {
            TargetKind::Release => {
                let mut d = Array2::<f64>::zeros((n, m));
                for (a, (x, p)) in reduced_data.iter().zip(&target.pulsars).enumerate() {
                    let x = x.as_ref().expect("reduced for a release target");
                    if x.iter().any(|v| !v.is_finite()) {
                        return Err(Error::NonFinite {
                            what: format!("the reduction of pulsar {}", p.label),
                        });
                    }
                    d.row_mut(a).assign(x);
                }
                Some(d)
            }
            TargetKind::Scenario | TargetKind::ReleaseFreshNoise => None,
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
        let (r, z) = if dc.iter().all(|&d| d == 0.0) {
            (None, self.z0.clone())
        } else {
            let mut rs = Vec::with_capacity(self.z0.len());
            let mut zs = Vec::with_capacity(self.z0.len());
            for (a, z0) in self.z0.iter().enumerate() {
                let (r, z) = woodbury_transform(z0, &dc, &self.target.pulsars[a].label)?;
                zs.push(z);
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

    /// The weighted bare reduction of fresh residuals (time-domain mode, which keeps the
    /// models).
    fn reduce_weighted(&self, residuals: &[Vec<f64>], scale: f64) -> Array2<f64> {
        debug_assert_eq!(self.models.len(), residuals.len(), "models kept");
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

    /// SNRs of time-domain simulated null trials: fresh noise residuals of the target
    /// (timing model fitted out), reduced and analysed as at A = 0; trial t draws from
    /// `simulate_residuals(.., seed, Injection, NULL_STREAM_BASE + t)`.
    pub fn simulated_null_time_domain(&self, trials: usize) -> Result<Vec<f64>> {
        (0..trials as u64)
            .into_par_iter()
            .map(|t| {
                let r = simulate_residuals(
                    &self.target.pulsars,
                    self.grid.t0_mjd,
                    self.grid.t_span,
                    Ingredients {
                        noise: &self.target.noise,
                        background: None,
                        simulation: self.target.simulation,
                        include_noise: true,
                    },
                    self.settings.seed,
                    Purpose::Injection,
                    NULL_STREAM_BASE + t,
                )?;
                let x = self.reduce_weighted(&r, 1.0);
                Ok(self.estimate(&self.null_analysis, &x).1)
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
        TargetKind::ReleaseFreshNoise => "release geometry with fresh noise: the release's TOAs, sky positions, uncertainties, backends and timing model with fresh noise every realization from its noise model (noise.toml without [common]); its residuals are not used; the reference for bias and coverage is A^2; the detection probability is that of this array under its noise model".to_string(),
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
        // A fresh-noise campaign on a release's geometry takes its threshold from a null of
        // the same kind as its realizations (time-domain noise for time-domain injections).
        None if campaign.target.kind == TargetKind::ReleaseFreshNoise
            && campaign.settings.mode == Mode::TimeDomain =>
        {
            (
                campaign.simulated_null_time_domain(campaign.settings.null_trials)?,
                format!(
                    "{} time-domain simulated null trials of the same array (fresh noise residuals from its noise model, timing model fitted out, analysed as at A = 0)",
                    campaign.settings.null_trials
                ),
            )
        }
        None => (
            campaign.simulated_null(campaign.settings.null_trials),
            format!(
                "{} reduced-space simulated null trials of the same array (x~_a ~ N(0, Z~_a), analysed as at A = 0)",
                campaign.settings.null_trials
            ),
        ),
    };
    // A threshold from the null of another release is legal but suspicious (release.rs).
    let mut warnings = Vec::new();
    if let Some(d) = &campaign.settings.null_dir {
        let nj = d.join("null.json");
        let other =
            crate::release::recorded_input_hash(&nj).filter(|h| *h != campaign.target.input_hash);
        if let Some(h) = other {
            let w = format!(
                "{}: the null trials come from a different release (input hash {}, the target's is {}); the detection threshold may not apply",
                nj.display(),
                crate::output::truncate(&h, 20),
                crate::output::truncate(&campaign.target.input_hash, 20)
            );
            crate::release::emit_warning(&w, &nj)?;
            warnings.push(w);
        }
    }
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
    let mut provenance = provenance;
    if !warnings.is_empty() {
        provenance["warnings"] = serde_json::json!(warnings);
    }
    let text = assumptions(&campaign, &source);
    Ok(Outcome::new(state, records, text, provenance))
}
