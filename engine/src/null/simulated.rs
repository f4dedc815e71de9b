//! Simulated nulls (docs/null.md). Under the null with the noise model right, the
//! reduced data X_a = F^T P_a^-1 r_a of independent pulsars are independent with
//! Cov(X_a) = F^T P_a^-1 P_a P_a^-1 F = Z_a (van Haasteren & Vallisneri 2014), so the weighted
//! x~_a = Phi^(1/2) X_a ~ N(0, Z~_a) with Z~_a = Phi^(1/2) Z_a Phi^(1/2). A reduced-space trial
//! draws x~_a = L_a z_a with L_a L_a^T = Z~_a and z_a standard normal: no time-domain work, and
//! sigma_ab (the traces) does not change across trials. The time-domain mode instead simulates
//! full residuals from the noise model and reduces them, as a check of the reduced-space draws.

use super::{Prepared, Trial, TrialSource};
use crate::analysis::{CorrelateSettings, Correlation};
use crate::error::{Error, Result};
use crate::linalg::PsdRoot;
use crate::reduce::{AutoPower, PulsarModel};
use crate::release::Release;
use crate::rng::{stream, Purpose};
use crate::scenario::{BackgroundPattern, BackgroundSpec, SimulationSpec};
use crate::simulate::{simulate_residuals, Ingredients};
use ndarray::Array2;
use rand::Rng;
use rand_distr::StandardNormal;

/// A square root L with L L^T = Z of a symmetric positive semi-definite matrix
/// ([`crate::linalg::PsdRoot`]: works when Z is singular, e.g. a pulsar without data at some
/// analysis frequency). Row-major, dim x dim.
pub fn psd_root(z: &Array2<f64>, what: &str) -> Result<Vec<f64>> {
    Ok(PsdRoot::new(z, what)?.factor().iter().copied().collect())
}

/// Reduced-space simulated nulls.
pub struct Reduced<'a> {
    p: &'a Prepared,
    seed: u64,
    /// L_a per pulsar (row-major dim x dim).
    roots: Vec<Vec<f64>>,
}

impl<'a> Reduced<'a> {
    /// Draws with the per-pulsar roots L_a of [`crate::whiten::analysis_roots`] (each
    /// `p.dim` x `p.dim`, L_a L_a^T = Z~_a).
    pub fn new(p: &'a Prepared, roots: Vec<Array2<f64>>, seed: u64) -> Result<Self> {
        if roots.len() != p.n || roots.iter().any(|l| l.dim() != (p.dim, p.dim)) {
            return Err(Error::setting(
                "roots",
                format!("need {} square roots of size {}", p.n, p.dim),
            ));
        }
        let roots = roots
            .into_iter()
            .map(|l| l.as_standard_layout().iter().copied().collect())
            .collect();
        Ok(Reduced { p, seed, roots })
    }

    /// The square roots L_a.
    pub fn roots(&self) -> &[Vec<f64>] {
        &self.roots
    }

    /// The simulated x~ of trial `index` (n rows of 2K).
    pub fn draw(&self, index: u64) -> Vec<f64> {
        let dim = self.p.dim;
        let mut rng = stream(self.seed, Purpose::SimulatedNull, index);
        let mut z = vec![0.0; dim];
        let mut x = vec![0.0; self.p.n * dim];
        for (a, l) in self.roots.iter().enumerate() {
            for v in z.iter_mut() {
                *v = rng.sample(StandardNormal);
            }
            for i in 0..dim {
                x[a * dim + i] = super::dot(&l[i * dim..(i + 1) * dim], &z);
            }
        }
        x
    }
}

impl TrialSource for Reduced<'_> {
    fn trial(&self, index: u64) -> Result<Trial> {
        let snr = self.p.snr_of(&self.draw(index));
        Ok(Trial {
            index,
            snr,
            amplitude2: snr * self.p.sigma0,
            attempts: 1,
        })
    }
}

/// Time-domain simulated nulls: residuals from the noise model (white noise, ECORR, red and DM
/// noise, plus an uncorrelated common process with the auto-power's spectrum when the analysis
/// has one, so that the model is right), on the analysis frequency ladder (span factor 1,
/// K frequencies, matching the model when the noise file sets no per-process frequency count);
/// the timing model is fitted out and each pulsar reduced with its model, built once.
pub struct TimeDomain<'a> {
    release: &'a Release,
    p: &'a Prepared,
    seed: u64,
    t0_mjd: f64,
    t_span: f64,
    models: Vec<PulsarModel>,
    sqrt_phi: Vec<f64>,
    background: Option<BackgroundSpec>,
    simulation: SimulationSpec,
}

impl<'a> TimeDomain<'a> {
    pub fn new(
        release: &'a Release,
        c: &'a Correlation,
        p: &'a Prepared,
        _settings: &CorrelateSettings,
        seed: u64,
    ) -> Result<Self> {
        let models = release
            .pulsars
            .iter()
            .map(|ps| {
                PulsarModel::build(
                    ps,
                    &release.noise.pulsar(&ps.label),
                    &c.grid,
                    AutoPower {
                        common: c.common.as_ref(),
                    },
                )
            })
            .collect::<Result<_>>()?;
        Ok(TimeDomain {
            release,
            p,
            seed,
            t0_mjd: c.grid.t0_mjd,
            t_span: c.grid.t_span,
            models,
            sqrt_phi: c.phi.iter().map(|v| v.sqrt()).collect(),
            background: c.common.map(|pl| BackgroundSpec {
                log10_amplitude: pl.log10_amplitude,
                spectral_index: pl.spectral_index,
                pattern: BackgroundPattern::Uncorrelated,
            }),
            simulation: SimulationSpec {
                n_frequencies: c.grid.k(),
                span_factor: 1,
            },
        })
    }

    /// The simulated x~ of trial `index`.
    pub fn draw(&self, index: u64) -> Result<Vec<f64>> {
        let what = Ingredients {
            noise: &self.release.noise,
            background: self.background,
            simulation: self.simulation,
            include_noise: true,
        };
        let res = simulate_residuals(
            &self.release.pulsars,
            self.t0_mjd,
            self.t_span,
            what,
            // A seed of its own, so that no trial reuses the generators that simulated a
            // release with the same seed (the background stream is keyed by realization only).
            crate::rng::splitmix64(self.seed ^ 0x6e75_6c6c_5f74_645f),
            Purpose::TimeDomainNull,
            index,
        )?;
        let mut x = Vec::with_capacity(self.p.n * self.p.dim);
        for (m, r) in self.models.iter().zip(&res) {
            let xa = m.reduce(r);
            x.extend(xa.iter().zip(&self.sqrt_phi).map(|(v, h)| v * h));
        }
        Ok(x)
    }
}

impl TrialSource for TimeDomain<'_> {
    fn trial(&self, index: u64) -> Result<Trial> {
        let snr = self.p.snr_of(&self.draw(index)?);
        Ok(Trial {
            index,
            snr,
            amplitude2: snr * self.p.sigma0,
            attempts: 1,
        })
    }
}
