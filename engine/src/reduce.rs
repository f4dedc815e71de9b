//! The per-pulsar reduction: the Woodbury form of the Gaussian likelihood of one pulsar with its
//! timing model marginalised, reduced to X = F^T P^-1 r and Z = F^T P^-1 F on the analysis
//! Fourier basis (van Haasteren & Vallisneri 2014; Chamberlin et al. 2015). Everything the
//! correlation analysis needs afterwards is X, Z and the sky direction.

use crate::basis::{chromatic_scale, ecorr_epochs, fourier_basis, timing_model, ECORR_EPOCH_GAP_S};
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
///
/// ECORR is folded into the white noise rather than added as basis columns: N is then block
/// diagonal (one block D_I + c^2 1 1^T per epoch I), and the Sherman-Morrison formula
/// (Sherman & Morrison 1950) gives N_I^-1 = D_I^-1 - beta D_I^-1 1 1^T D_I^-1 with
/// beta = c^2 / (1 + c^2 1^T D_I^-1 1). The cost then does not grow with the number of epochs.
pub struct PulsarModel {
    /// D^-1/2 per TOA (D: the diagonal white noise).
    sqrt_dinv: Vec<f64>,
    /// D^-1/2 [T | F] (n x (cols + 2K)): the whitened model basis and analysis basis.
    wa: Array2<f64>,
    /// Number of columns of T.
    n_t: usize,
    /// ECORR epochs: TOA indices and beta.
    epochs: Vec<(Vec<usize>, f64)>,
    /// Row e: sum over epoch e of D^-1/2 times the rows of `wa` (E x (cols + 2K)).
    v: Array2<f64>,
    chol: ScaledCholesky,
    /// L^-1 D_S^-1 T^T N^-1 F (cols x 2K).
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
    /// Build the model T = [M | F_red | F_dm] with prior B and white noise N (EFAC, EQUAD,
    /// ECORR; docs/conventions.md), and factor S = B^-1 + T^T N^-1 T.
    pub fn build(
        p: &Pulsar,
        noise: &PulsarNoise,
        grid: &FrequencyGrid,
        auto: AutoPower,
    ) -> Result<Self> {
        let n = p.n_toa();
        let k = grid.k();
        let t = grid.seconds(&p.mjd);

        // White noise D_ii = (EFAC sigma_i)^2 + EQUAD^2 per backend.
        let whites: Vec<_> = p.backends.iter().map(|b| noise.white_for(b)).collect();
        let sqrt_dinv: Vec<f64> = (0..n)
            .map(|i| {
                let w = &whites[p.backend[i]];
                let var = (w.efac * p.sigma[i]).powi(2) + w.equad().powi(2);
                1.0 / var.sqrt()
            })
            .collect();

        // Frequencies needed by any block; one Fourier basis serves them all.
        let k_common = if auto.common.is_some() { k } else { 0 };
        let k_red = noise.red.map_or(0, |r| r.n_frequencies.unwrap_or(k));
        let k_r = k_common.max(k_red);
        let k_dm = noise.dm.map_or(0, |d| d.n_frequencies.unwrap_or(k));
        let k_max = k.max(k_r).max(k_dm);
        let ladder = grid.ladder(k_max);
        let fourier = fourier_basis(&t, &ladder);

        // Columns of [T | F] and the prior inverses of T (0 for the timing model's flat prior).
        let m = timing_model(p, &t)?;
        let mut blocks: Vec<Array2<f64>> = vec![m];
        let mut binv: Vec<f64> = vec![0.0; blocks[0].ncols()];
        if k_r > 0 {
            blocks.push(fourier.slice(s![.., ..2 * k_r]).to_owned());
            for (j, &f) in ladder[..k_r].iter().enumerate() {
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
            let mut fd = fourier.slice(s![.., ..2 * k_dm]).to_owned();
            for (mut row, sc) in fd.rows_mut().into_iter().zip(chromatic_scale(&p.freq_mhz)) {
                row *= sc;
            }
            blocks.push(fd);
            for &f in &ladder[..k_dm] {
                let phi = dm.power_law().coefficient_variance(f, grid.t_span);
                binv.extend([1.0 / phi, 1.0 / phi]);
            }
        }
        let n_t = binv.len();
        blocks.push(fourier.slice(s![.., ..2 * k]).to_owned());
        let views: Vec<_> = blocks.iter().map(|b| b.view()).collect();
        let mut wa = ndarray::concatenate(Axis(1), &views).expect("blocks share rows");
        drop(blocks);
        for (mut row, &w) in wa.rows_mut().into_iter().zip(&sqrt_dinv) {
            row *= w;
        }

        // ECORR epochs and their Sherman-Morrison terms.
        let use_ecorr: Vec<bool> = whites.iter().map(|w| w.ecorr().is_some()).collect();
        let epochs: Vec<(Vec<usize>, f64)> = if use_ecorr.iter().any(|&u| u) {
            ecorr_epochs(&t, &p.backend, &use_ecorr, ECORR_EPOCH_GAP_S)
                .into_iter()
                .map(|(b, idx)| {
                    let c2 = whites[b].ecorr().expect("ecorr backend").powi(2);
                    let sum_dinv: f64 = idx.iter().map(|&i| sqrt_dinv[i] * sqrt_dinv[i]).sum();
                    (idx, c2 / (1.0 + c2 * sum_dinv))
                })
                .collect()
        } else {
            Vec::new()
        };
        let mut v = Array2::<f64>::zeros((epochs.len(), wa.ncols()));
        for (e, (idx, _)) in epochs.iter().enumerate() {
            let mut row = v.row_mut(e);
            for &i in idx {
                row.scaled_add(sqrt_dinv[i], &wa.row(i));
            }
        }

        // [T | F]^T N^-1 [T | F] in one GEMM, less the ECORR correction V^T diag(beta) V.
        let mut gram = wa.t().dot(&wa);
        if !epochs.is_empty() {
            let mut bv = v.clone();
            for (mut row, (_, beta)) in bv.rows_mut().into_iter().zip(&epochs) {
                row *= *beta;
            }
            gram -= &v.t().dot(&bv);
        }
        let mut smat = gram.slice(s![..n_t, ..n_t]).to_owned();
        for (i, b) in binv.iter().enumerate() {
            smat[[i, i]] += b;
        }
        let chol = ScaledCholesky::new(
            &smat,
            &format!("S = B^-1 + T^T N^-1 T of pulsar {}", p.label),
        )?;
        let tnf = gram.slice(s![..n_t, n_t..]).to_owned();
        let qf = chol.whiten(&tnf);
        let fnf = gram.slice(s![n_t.., n_t..]).to_owned();
        let z = symmetrise(&fnf - &qf.t().dot(&qf));
        Ok(PulsarModel {
            sqrt_dinv,
            wa,
            n_t,
            epochs,
            v,
            chol,
            qf,
            z,
        })
    }

    /// X = F^T P^-1 r for a residual vector r (s), by the Woodbury identity.
    pub fn reduce(&self, r: &[f64]) -> Array1<f64> {
        let wr: Array1<f64> = r.iter().zip(&self.sqrt_dinv).map(|(a, b)| a * b).collect();
        let mut g = self.wa.t().dot(&wr);
        if !self.epochs.is_empty() {
            let s: Array1<f64> = self
                .epochs
                .iter()
                .map(|(idx, beta)| {
                    beta * idx.iter().map(|&i| self.sqrt_dinv[i] * wr[i]).sum::<f64>()
                })
                .collect();
            g -= &self.v.t().dot(&s);
        }
        let tnr = g.slice(s![..self.n_t]).to_owned();
        let fnr = g.slice(s![self.n_t..]).to_owned();
        let q = self.chol.whiten(&tnr.insert_axis(Axis(1)));
        fnr - self.qf.t().dot(&q.slice(s![.., 0]))
    }

    /// Number of TOAs.
    pub fn n_toa(&self) -> usize {
        self.sqrt_dinv.len()
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
