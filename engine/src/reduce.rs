//! The per-pulsar reduction: the Woodbury form of the Gaussian likelihood of one pulsar with its
//! timing model marginalised, reduced to X = F^T P^-1 r and Z = F^T P^-1 F on the analysis
//! Fourier basis (van Haasteren & Vallisneri 2014; Chamberlin et al. 2015). Everything the
//! correlation analysis needs afterwards is X, Z and the sky direction.

use crate::basis::{chromatic_basis, ecorr_epochs, fourier_basis, timing_model, ECORR_EPOCH_GAP_S};
use crate::constants::SECONDS_PER_DAY;
use crate::error::{Error, Result};
use crate::linalg::ScaledCholesky;
use crate::noise::{NoiseModel, PulsarNoise};
use crate::release::{Pulsar, Release};
use crate::sky::Direction;
use crate::spectrum::{frequencies, PowerLaw};
use ndarray::{s, Array1, Array2, Axis};
use rayon::prelude::*;

/// The shared time origin and analysis frequencies of an array.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct FrequencyGrid {
    /// Earliest MJD of the array (t = 0).
    pub t0_mjd: f64,
    /// Span of the whole array, seconds.
    pub t_span: f64,
    /// Analysis frequencies f_j = j / T_span, j = 1..K (Hz).
    pub freqs: Vec<f64>,
}

impl FrequencyGrid {
    /// The grid of a release with `k` analysis frequencies.
    pub fn for_release(release: &Release, k: usize) -> Result<Self> {
        let (lo, hi) = release.mjd_range();
        Self::new(lo, hi, k)
    }

    /// The grid spanning `[mjd_lo, mjd_hi]` with `k` frequencies.
    pub fn new(mjd_lo: f64, mjd_hi: f64, k: usize) -> Result<Self> {
        let t_span = (mjd_hi - mjd_lo) * SECONDS_PER_DAY;
        if t_span.is_nan() || t_span <= 0.0 {
            return Err(Error::setting(
                "span",
                "the array spans no time (all TOAs at one MJD)",
            ));
        }
        if k == 0 {
            return Err(Error::setting("frequencies", "need at least one frequency"));
        }
        Ok(FrequencyGrid {
            t0_mjd: mjd_lo,
            t_span,
            freqs: frequencies(k, t_span),
        })
    }

    /// Number of analysis frequencies K.
    pub fn k(&self) -> usize {
        self.freqs.len()
    }

    /// Seconds since t0 for a list of MJDs.
    pub fn seconds(&self, mjd: &[f64]) -> Vec<f64> {
        mjd.iter()
            .map(|&m| (m - self.t0_mjd) * SECONDS_PER_DAY)
            .collect()
    }

    /// The first `k` frequencies of the same ladder j / T_span (k may exceed K).
    pub fn ladder(&self, k: usize) -> Vec<f64> {
        frequencies(k, self.t_span)
    }
}

/// One pulsar reduced to the analysis basis.
#[derive(Clone, Debug)]
pub struct Reduced {
    pub label: String,
    pub direction: Direction,
    /// X = F^T P^-1 r (length 2K).
    pub x: Array1<f64>,
    /// Z = F^T P^-1 F (2K x 2K, symmetric positive semi-definite).
    pub z: Array2<f64>,
}

/// The Woodbury-factored model of one pulsar, kept so that new residual vectors (simulations,
/// injections) can be reduced in O(n * cols) without refactoring.
pub struct PulsarModel {
    /// sqrt(N^-1) per TOA.
    sqrt_ninv: Vec<f64>,
    /// sqrt(N^-1) * T (n x cols), the whitened basis.
    wt: Array2<f64>,
    /// Columns of the whitened analysis basis sqrt(N^-1) F (n x 2K).
    wf: Array2<f64>,
    chol: ScaledCholesky,
    /// L^-1 D^-1 T^T N^-1 F (cols x 2K).
    qf: Array2<f64>,
    /// Z = F^T P^-1 F.
    pub z: Array2<f64>,
}

/// Which processes enter a pulsar's covariance besides its white noise.
#[derive(Clone, Copy, Debug, Default)]
pub struct AutoPower<'a> {
    /// The common process's auto-power, on the K analysis frequencies.
    pub common: Option<&'a PowerLaw>,
}

impl PulsarModel {
    /// Build the model T = [M | F_red | F_dm | U_ecorr] with prior B (docs/conventions.md) and
    /// factor S = B^-1 + T^T N^-1 T.
    pub fn build(
        p: &Pulsar,
        noise: &PulsarNoise,
        grid: &FrequencyGrid,
        auto: AutoPower,
    ) -> Result<Self> {
        let n = p.n_toa();
        let k = grid.k();
        let t = grid.seconds(&p.mjd);

        // White noise N_ii = (EFAC sigma_i)^2 + EQUAD^2 per backend.
        let whites: Vec<_> = p.backends.iter().map(|b| noise.white_for(b)).collect();
        let sqrt_ninv: Vec<f64> = (0..n)
            .map(|i| {
                let w = &whites[p.backend[i]];
                let var = (w.efac * p.sigma[i]).powi(2) + w.equad().powi(2);
                1.0 / var.sqrt()
            })
            .collect();

        // Blocks of T and their prior inverses (0 for the timing model's flat prior).
        let m = timing_model(p, &t)?;
        let mut blocks: Vec<Array2<f64>> = vec![m.clone()];
        let mut binv: Vec<f64> = vec![0.0; m.ncols()];

        let k_common = if auto.common.is_some() { k } else { 0 };
        let k_red = noise.red.map_or(0, |r| r.n_frequencies.unwrap_or(k));
        let k_r = k_common.max(k_red);
        if k_r > 0 {
            let ladder = grid.ladder(k_r);
            blocks.push(fourier_basis(&t, &ladder));
            for (j, &f) in ladder.iter().enumerate() {
                let mut phi = 0.0;
                if let Some(c) = auto.common.filter(|_| j < k_common) {
                    phi += c.coefficient_variance(f, grid.t_span);
                }
                if let Some(r) = noise.red.filter(|_| j < k_red) {
                    phi += r.power_law().coefficient_variance(f, grid.t_span);
                }
                binv.extend([1.0 / phi, 1.0 / phi]);
            }
        }
        if let Some(dm) = noise.dm {
            let ladder = grid.ladder(dm.n_frequencies.unwrap_or(k));
            blocks.push(chromatic_basis(&t, &p.freq_mhz, &ladder));
            for &f in &ladder {
                let phi = dm.power_law().coefficient_variance(f, grid.t_span);
                binv.extend([1.0 / phi, 1.0 / phi]);
            }
        }
        let use_ecorr: Vec<bool> = whites.iter().map(|w| w.ecorr().is_some()).collect();
        if use_ecorr.iter().any(|&u| u) {
            let epochs = ecorr_epochs(&t, &p.backend, &use_ecorr, ECORR_EPOCH_GAP_S);
            let mut u = Array2::zeros((n, epochs.len()));
            for (e, (b, idx)) in epochs.iter().enumerate() {
                for &i in idx {
                    u[[i, e]] = 1.0;
                }
                binv.push(1.0 / whites[*b].ecorr().expect("ecorr backend").powi(2));
            }
            blocks.push(u);
        }

        // The analysis basis F: the first K frequencies of the red block when present, else
        // (for frequencies beyond k_r) extra columns outside T.
        let f_all = fourier_basis(&t, &grid.freqs);
        let views: Vec<_> = blocks.iter().map(|b| b.view()).collect();
        let tmat = ndarray::concatenate(Axis(1), &views).expect("blocks share rows");
        let mut wt = tmat;
        let mut wf = f_all;
        for i in 0..n {
            wt.row_mut(i).mapv_inplace(|v| v * sqrt_ninv[i]);
            wf.row_mut(i).mapv_inplace(|v| v * sqrt_ninv[i]);
        }

        // S = B^-1 + T^T N^-1 T (one GEMM).
        let mut smat = wt.t().dot(&wt);
        for (i, b) in binv.iter().enumerate() {
            smat[[i, i]] += b;
        }
        let chol = ScaledCholesky::new(
            &smat,
            &format!("S = B^-1 + T^T N^-1 T of pulsar {}", p.label),
        )?;
        let tnf = wt.t().dot(&wf);
        let qf = chol.whiten(&tnf);
        let fnf = wf.t().dot(&wf);
        let z = &fnf - &qf.t().dot(&qf);
        let z = symmetrise(z);
        Ok(PulsarModel {
            sqrt_ninv,
            wt,
            wf,
            chol,
            qf,
            z,
        })
    }

    /// X = F^T P^-1 r for a residual vector r (s), by the Woodbury identity.
    pub fn reduce(&self, r: &[f64]) -> Array1<f64> {
        let wr: Array1<f64> = r.iter().zip(&self.sqrt_ninv).map(|(a, b)| a * b).collect();
        let fnr = self.wf.t().dot(&wr);
        let tnr = self.wt.t().dot(&wr);
        let q = self.chol.whiten(&tnr.insert_axis(Axis(1)));
        fnr - self.qf.t().dot(&q.slice(s![.., 0]))
    }

    /// Number of TOAs.
    pub fn n_toa(&self) -> usize {
        self.sqrt_ninv.len()
    }

    /// log det S (for likelihood evaluations).
    pub fn log_det_s(&self) -> f64 {
        self.chol.log_det()
    }
}

fn symmetrise(z: Array2<f64>) -> Array2<f64> {
    let zt = z.t().to_owned();
    (z + zt) * 0.5
}

/// Reduce one pulsar: build its model and apply it to its residuals.
pub fn reduce_pulsar(
    p: &Pulsar,
    noise: &PulsarNoise,
    grid: &FrequencyGrid,
    auto: AutoPower,
) -> Result<Reduced> {
    let model = PulsarModel::build(p, noise, grid, auto)?;
    let x = model.reduce(&p.residual);
    if x.iter().chain(model.z.iter()).any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: format!("the reduction of pulsar {}", p.label),
        });
    }
    Ok(Reduced {
        label: p.label.clone(),
        direction: p.direction,
        x,
        z: model.z,
    })
}

/// Reduce every pulsar of a release in parallel (one rayon task per pulsar).
pub fn reduce_release(
    release: &Release,
    noise: &NoiseModel,
    grid: &FrequencyGrid,
    common: Option<&PowerLaw>,
) -> Result<Vec<Reduced>> {
    crate::linalg::single_threaded_blas();
    release
        .pulsars
        .par_iter()
        .map(|p| reduce_pulsar(p, &noise.pulsar(&p.label), grid, AutoPower { common }))
        .collect()
}
