//! The per-pulsar reduction: the Woodbury form of the Gaussian likelihood of one pulsar with its
//! timing model marginalised, reduced to X = F^T P^-1 r and Z = F^T P^-1 F on the analysis
//! Fourier basis (van Haasteren & Vallisneri 2014; Chamberlin et al. 2015). Everything the
//! correlation analysis needs afterwards is X, Z and the sky direction.

use crate::basis::{
    chromatic_scale, ecorr_epochs, fourier_row_ladder, fourier_rows_ladder, timing_model,
    ECORR_EPOCH_GAP_S,
};
use crate::constants::SECONDS_PER_DAY;
use crate::error::{Error, Result};
use crate::linalg::{mirror_upper, symmetrise, syrk_flops, syrk_tn, ScaledCholesky};
use crate::noise::{NoiseModel, PulsarNoise};
use crate::release::{Pulsar, Release};
use crate::sky::Direction;
use crate::spectrum::{frequencies, PowerLaw};
use ndarray::{s, Array1, Array2};
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
    /// Floating-point operations of the reduction as counted by [`PulsarModel::flops`] plus
    /// the 2 n c of X (docs/performance.md).
    pub flops: f64,
}

/// The Woodbury-factored model of one pulsar, kept so that new residual vectors (simulations,
/// injections) can be reduced in O(n * cols) without refactoring.
///
/// ECORR is folded into the white noise rather than added as basis columns: N is then block
/// diagonal (one block D_I + c^2 1 1^T per epoch I), and the Sherman-Morrison formula
/// (Sherman & Morrison 1950) gives N_I^-1 = D_I^-1 - beta D_I^-1 1 1^T D_I^-1 with
/// beta = c^2 / (1 + c^2 1^T D_I^-1 1). The cost then does not grow with the number of epochs.
///
/// The columns of T = [M | F_red | F_dm] and of the analysis basis F are drawn from one set of
/// distinct columns U = [M | Fourier over max(K, K_r) | chromatic Fourier over K_dm]: F_red and
/// F are both leading columns of the same Fourier basis, so each inner product is computed once
/// (one symmetric rank-k update U^T N^-1 U) and the blocks of S, T^T N^-1 F and F^T N^-1 F are
/// picked out of it by column index.
pub struct PulsarModel {
    /// D^-1/2 per TOA (D: the diagonal white noise).
    sqrt_dinv: Vec<f64>,
    /// D^-1/2 U (n x cols of U), row-major.
    wa: Array2<f64>,
    /// Columns of U that make up T, in the order of T.
    t_cols: Vec<usize>,
    /// Columns of U that make up F (contiguous, 2K of them).
    f_cols: std::ops::Range<usize>,
    /// ECORR epochs: TOA indices and beta^(1/2).
    epochs: Vec<(Vec<usize>, f64)>,
    /// Row e: beta_e^(1/2) times the sum over epoch e of D^-1/2 times the rows of `wa`.
    v: Array2<f64>,
    chol: ScaledCholesky,
    /// L^-1 D_S^-1 T^T N^-1 F (cols of T x 2K).
    qf: Array2<f64>,
    /// Z = F^T P^-1 F.
    pub z: Array2<f64>,
    /// Floating-point operations counted in `build` (see [`PulsarModel::flops`]).
    flops: f64,
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
        let basis = PulsarBasis::for_one_model(p, noise, grid, auto)?;
        Self::build_on(p, noise, grid, auto, &basis)
    }

    /// [`PulsarModel::build`] on a basis computed before (the same bytes as `build`): the
    /// noise-marginalised OS builds one model per draw of the noise parameters and reuses
    /// the basis of every pulsar. `noise` must have the processes `basis` was made for.
    pub fn build_on(
        p: &Pulsar,
        noise: &PulsarNoise,
        grid: &FrequencyGrid,
        auto: AutoPower,
        basis: &PulsarBasis,
    ) -> Result<Self> {
        if !basis.fits(noise, grid, auto) {
            return Err(Error::setting(
                "noise model",
                format!(
                    "pulsar {}: the noise model has other processes or frequency counts than the basis it is built on",
                    p.label
                ),
            ));
        }
        let n = p.n_toa();
        let k = grid.k();
        let t = &basis.t;

        // White noise D_ii = (EFAC sigma_i)^2 + EQUAD^2 per backend.
        let whites: Vec<_> = p.backends.iter().map(|b| noise.white_for(b)).collect();
        // (EFAC, EQUAD^2) per backend: one power of ten per backend, not per TOA.
        let efac_equad2: Vec<(f64, f64)> =
            whites.iter().map(|w| (w.efac, w.equad().powi(2))).collect();
        let sqrt_dinv: Vec<f64> = (0..n)
            .map(|i| {
                let (efac, equad2) = efac_equad2[p.backend[i]];
                let var = (efac * p.sigma[i]).powi(2) + equad2;
                1.0 / var.sqrt()
            })
            .collect();

        // Frequencies needed by any block; one Fourier basis serves them all.
        let (k_common, k_red, k_dm) = (basis.k_common, basis.k_red, basis.k_dm);
        let k_r = k_common.max(k_red);
        let k_f = k.max(k_r);
        let ladder = &basis.ladder;

        // The distinct columns U = [M | Fourier (k_f) | chromatic Fourier (k_dm)], whitened,
        // written row by row in one pass.
        let n_m = basis.m.ncols();
        let (c_four, c_dm) = (n_m, n_m + 2 * k_f);
        let n_cols = c_dm + 2 * k_dm;

        // T's columns in U and the prior inverses of T (0 for the timing model's flat prior).
        let mut t_cols: Vec<usize> = (0..n_m).collect();
        let mut binv: Vec<f64> = vec![0.0; n_m];
        if k_r > 0 {
            t_cols.extend(c_four..c_four + 2 * k_r);
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
            t_cols.extend(c_dm..c_dm + 2 * k_dm);
            for &f in &ladder[..k_dm] {
                let phi = dm.power_law().coefficient_variance(f, grid.t_span);
                binv.extend([1.0 / phi, 1.0 / phi]);
            }
        }
        let f_cols = c_four..c_four + 2 * k;
        let n_t = t_cols.len();

        // ECORR epochs and their Sherman-Morrison terms; V's rows carry beta^(1/2).
        let use_ecorr: Vec<bool> = whites.iter().map(|w| w.ecorr().is_some()).collect();
        let epochs: Vec<(Vec<usize>, f64)> = if use_ecorr.iter().any(|&u| u) {
            ecorr_epochs(t, &p.backend, &use_ecorr, ECORR_EPOCH_GAP_S)
                .into_iter()
                .map(|(b, idx)| {
                    let c2 = whites[b].ecorr().expect("ecorr backend").powi(2);
                    let sum_dinv: f64 = idx.iter().map(|&i| sqrt_dinv[i] * sqrt_dinv[i]).sum();
                    (idx, ecorr_beta(c2, sum_dinv).sqrt())
                })
                .collect()
        } else {
            Vec::new()
        };
        // D^-1/2 U written row by row in one pass, with V summed in the same pass where the
        // epochs allow it (else the separate pass of `ecorr_rows`, the same bytes).
        let fold = EcorrFold::plan(&epochs, &sqrt_dinv);
        let (wa, v) = basis.whitened(&sqrt_dinv, fold.as_ref());
        let v = v.unwrap_or_else(|| ecorr_rows(&epochs, &sqrt_dinv, &wa));

        // U^T N^-1 U = U^T D^-1 U - V^T V: two symmetric rank-k updates.
        let gram = gram_n_inv(&wa, &v);

        let mut smat = Array2::<f64>::zeros((n_t, n_t));
        let mut tnf = Array2::<f64>::zeros((n_t, 2 * k));
        for (a, &ca) in t_cols.iter().enumerate() {
            for (b, &cb) in t_cols.iter().enumerate() {
                smat[[a, b]] = gram[[ca, cb]];
            }
            smat[[a, a]] += binv[a];
            for (j, cf) in f_cols.clone().enumerate() {
                tnf[[a, j]] = gram[[ca, cf]];
            }
        }
        let chol = ScaledCholesky::new(
            &smat,
            &format!("S = B^-1 + T^T N^-1 T of pulsar {}", p.label),
        )?;
        let qf = chol.whiten(&tnf);
        let fnf = gram.slice(s![f_cols.clone(), f_cols.clone()]).to_owned();
        let z = symmetrise(&fnf - &qf.t().dot(&qf));

        // Counted work: the two rank-k updates, building V, the Cholesky factor (n^3/3), the
        // triangular solve (n_t^2 per right-hand side) and Q^T Q (general product).
        let (nt, kf) = (n_t as f64, 2.0 * k as f64);
        let flops = syrk_flops(n, n_cols)
            + syrk_flops(epochs.len(), n_cols)
            + if epochs.is_empty() {
                0.0
            } else {
                2.0 * n as f64 * n_cols as f64
            }
            + nt * nt * nt / 3.0
            + nt * nt * kf
            + 2.0 * nt * kf * kf;
        Ok(PulsarModel {
            sqrt_dinv,
            wa,
            t_cols,
            f_cols,
            epochs,
            v,
            chol,
            qf,
            z,
            flops,
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
                .map(|(idx, sqrt_beta)| {
                    sqrt_beta * idx.iter().map(|&i| self.sqrt_dinv[i] * wr[i]).sum::<f64>()
                })
                .collect();
            g -= &self.v.t().dot(&s);
        }
        let tnr: Array2<f64> =
            Array2::from_shape_fn((self.t_cols.len(), 1), |(a, _)| g[self.t_cols[a]]);
        let fnr = g.slice(s![self.f_cols.clone()]).to_owned();
        let q = self.chol.whiten(&tnr);
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

    /// Floating-point operations of `build` as counted (docs/performance.md): the rank-k
    /// updates U^T D^-1 U (n c (c + 1)) and V^T V, V itself, and the small dense steps.
    pub fn flops(&self) -> f64 {
        self.flops
    }
}

/// The parts of one pulsar's model that depend only on its TOAs and on which processes it has
/// (not on the noise parameters' values): times, timing model, chromatic scale and the Fourier
/// table sin/cos(2 pi f_j t_i) over j = 1..max(K, K_red, K_dm). Computed once per pulsar and
/// reused for every draw of the noise parameters ([`PulsarModel::build_on`]); it holds
/// 8 n (n_m + 2 max(K, K_red, K_dm) + 2) bytes.
#[derive(Clone, Debug)]
pub struct PulsarBasis {
    t: Vec<f64>,
    m: Array2<f64>,
    dm_scale: Vec<f64>,
    /// Row i: [sin, cos] of 2 pi f_j t_i for each ladder frequency (n x 2 k_all); None for a
    /// basis that serves one model only ([`PulsarBasis::for_one_model`]), whose rows are
    /// computed as the whitened basis is written (the same call, the same bytes).
    trig: Option<Array2<f64>>,
    ladder: Vec<f64>,
    k_common: usize,
    k_red: usize,
    k_dm: usize,
    /// Fourier columns of U: max(K, K_common, K_red).
    k_f: usize,
}

impl PulsarBasis {
    /// The basis of pulsar `p` for a noise model with `noise`'s processes.
    pub fn new(
        p: &Pulsar,
        noise: &PulsarNoise,
        grid: &FrequencyGrid,
        auto: AutoPower,
    ) -> Result<Self> {
        Self::make(p, noise, grid, auto, true)
    }

    /// The basis of one model built once (`reduce_pulsar`, [`PulsarModel::build`]): the
    /// Fourier table is not stored (n x 2 max(K, K_red, K_dm) doubles, 9.6 MB at 10,000 TOAs
    /// and 60 frequencies, written and read once) but computed row by row as the whitened
    /// basis is written, with the same bytes.
    pub(crate) fn for_one_model(
        p: &Pulsar,
        noise: &PulsarNoise,
        grid: &FrequencyGrid,
        auto: AutoPower,
    ) -> Result<Self> {
        Self::make(p, noise, grid, auto, false)
    }

    fn make(
        p: &Pulsar,
        noise: &PulsarNoise,
        grid: &FrequencyGrid,
        auto: AutoPower,
        keep_trig: bool,
    ) -> Result<Self> {
        let k = grid.k();
        let t = grid.seconds(&p.mjd);
        let (k_common, k_red, k_dm) = Self::counts(noise, grid, auto);
        let k_f = k.max(k_common.max(k_red));
        let k_all = k_f.max(k_dm);
        let ladder = grid.ladder(k_all);
        let m = timing_model(p, &t)?;
        let dm_scale = if k_dm > 0 {
            chromatic_scale(&p.freq_mhz)
        } else {
            Vec::new()
        };
        let trig = keep_trig.then(|| {
            let mut trig = Array2::<f64>::zeros((t.len(), 2 * k_all));
            if k_all > 0 {
                for (i, mut row) in trig.rows_mut().into_iter().enumerate() {
                    fourier_row_ladder(
                        t[i],
                        ladder[0],
                        row.as_slice_mut().expect("standard layout"),
                    );
                }
            }
            trig
        });
        Ok(PulsarBasis {
            t,
            m,
            dm_scale,
            trig,
            ladder,
            k_common,
            k_red,
            k_dm,
            k_f,
        })
    }

    /// Frequencies of the common, red and DM blocks (0 when absent).
    fn counts(noise: &PulsarNoise, grid: &FrequencyGrid, auto: AutoPower) -> (usize, usize, usize) {
        let k = grid.k();
        let k_common = if auto.common.is_some() { k } else { 0 };
        let k_red = noise.red.map_or(0, |r| r.n_frequencies.unwrap_or(k));
        let k_dm = noise.dm.map_or(0, |d| d.n_frequencies.unwrap_or(k));
        (k_common, k_red, k_dm)
    }

    /// Whether a model with `noise`'s processes has this basis.
    pub fn fits(&self, noise: &PulsarNoise, grid: &FrequencyGrid, auto: AutoPower) -> bool {
        let (k_common, k_red, k_dm) = Self::counts(noise, grid, auto);
        (k_common, k_red, k_dm) == (self.k_common, self.k_red, self.k_dm)
            && grid.k().max(k_common.max(k_red)) == self.k_f
            && self.ladder == grid.ladder(self.ladder.len())
    }

    /// D^-1/2 U: the distinct columns [M | Fourier (k_f) | chromatic Fourier (k_dm)], row i
    /// scaled by `w[i]` (the same arithmetic as [`basis_columns`]). With `fold`, the ECORR rows
    /// V of [`ecorr_rows`] are summed as each row is written (while it is in cache, instead of
    /// a second pass over the n x c matrix); the plan's epochs list their TOAs in ascending
    /// order, so each row of V receives the same additions in the same order: the same bytes.
    fn whitened(&self, w: &[f64], fold: Option<&EcorrFold>) -> (Array2<f64>, Option<Array2<f64>>) {
        let n = self.t.len();
        let n_m = self.m.ncols();
        let k_f = self.k_f;
        let (c_four, c_dm) = (n_m, n_m + 2 * k_f);
        let n_cols = c_dm + 2 * self.k_dm;
        // Every value is written once, row by row, into memory that is not zeroed first.
        let mut wa: Vec<f64> = Vec::with_capacity(n * n_cols);
        let mut v = fold.map(|f| Array2::<f64>::zeros((f.n_epochs, n_cols)));
        // The Fourier rows of a basis without a stored table, LANES rows at a time (the same
        // bytes as one `fourier_row_ladder` call per row, as in `make`).
        const LANES: usize = 4;
        let width = 2 * self.ladder.len();
        let computed = self.trig.is_none() && width > 0;
        let mut scratch = vec![0.0; if computed { LANES * width } else { 0 }];
        for i0 in (0..n).step_by(LANES) {
            let rows = LANES.min(n - i0);
            if computed {
                if rows == LANES {
                    let t: &[f64; LANES] = self.t[i0..i0 + LANES].try_into().expect("LANES TOAs");
                    fourier_rows_ladder(t, self.ladder[0], width, &mut scratch);
                } else {
                    for l in 0..rows {
                        fourier_row_ladder(
                            self.t[i0 + l],
                            self.ladder[0],
                            &mut scratch[l * width..(l + 1) * width],
                        );
                    }
                }
            }
            for l in 0..rows {
                let i = i0 + l;
                let trig: &[f64] = match &self.trig {
                    Some(table) => table.row(i).to_slice().expect("standard layout"),
                    None => &scratch[l * width..(l + 1) * width],
                };
                let w = w[i];
                let row_start = wa.len();
                wa.extend(self.m.row(i).iter().map(|&src| w * src));
                wa.extend(trig[..c_dm - c_four].iter().map(|&src| w * src));
                if self.k_dm > 0 {
                    let wd = w * self.dm_scale[i];
                    wa.extend(trig[..n_cols - c_dm].iter().map(|&src| wd * src));
                }
                let row = &wa[row_start..];
                debug_assert_eq!(row.len(), n_cols);
                if let (Some(f), Some(v)) = (fold, v.as_mut()) {
                    let e = f.epoch[i];
                    if e != usize::MAX {
                        // `ArrayBase::scaled_add`'s arithmetic: y = y + (alpha x).
                        let alpha = f.weight[i];
                        let mut vr = v.row_mut(e);
                        let vr = vr.as_slice_mut().expect("standard layout");
                        for (y, &x) in vr.iter_mut().zip(row) {
                            *y += alpha * x;
                        }
                    }
                }
            }
        }
        let wa = Array2::from_shape_vec((n, n_cols), wa).expect("n rows of n_cols values");
        (wa, v)
    }
}

/// The distinct columns U = [M | Fourier over `k_f` | chromatic Fourier over `k_dm`] of one
/// pulsar (n x (n_m + 2 k_f + 2 k_dm)), row i scaled by `w[i]` (D^-1/2 for the whitened form
/// of [`PulsarModel`], 1 for the plain basis of the likelihood), written row by row in one pass.
/// `ladder` holds at least max(k_f, k_dm) frequencies j / T_span; `dm_scale` is
/// [`chromatic_scale`] of the TOAs (may be empty when `k_dm` = 0).
pub(crate) fn basis_columns(
    m: &Array2<f64>,
    t: &[f64],
    ladder: &[f64],
    k_f: usize,
    k_dm: usize,
    dm_scale: &[f64],
    w: &[f64],
) -> Array2<f64> {
    let n = t.len();
    let n_m = m.ncols();
    let (c_four, c_dm) = (n_m, n_m + 2 * k_f);
    let n_cols = c_dm + 2 * k_dm;
    let k_all = k_f.max(k_dm);
    let mut wa = Array2::<f64>::zeros((n, n_cols));
    if k_all == 0 {
        for (i, mut row) in wa.rows_mut().into_iter().enumerate() {
            for (dst, &src) in row.iter_mut().zip(m.row(i)) {
                *dst = w[i] * src;
            }
        }
        return wa;
    }
    let mut trig = vec![0.0; 2 * k_all];
    for (i, mut row) in wa.rows_mut().into_iter().enumerate() {
        let row = row.as_slice_mut().expect("standard layout");
        let w = w[i];
        fourier_row_ladder(t[i], ladder[0], &mut trig);
        for (dst, &src) in row[..n_m].iter_mut().zip(m.row(i)) {
            *dst = w * src;
        }
        for (dst, &src) in row[c_four..c_dm].iter_mut().zip(&trig) {
            *dst = w * src;
        }
        if k_dm > 0 {
            let wd = w * dm_scale[i];
            for (dst, &src) in row[c_dm..].iter_mut().zip(&trig) {
                *dst = wd * src;
            }
        }
    }
    wa
}

/// Sherman-Morrison weight of one ECORR epoch (Sherman & Morrison 1950): with
/// N_I = D_I + c^2 1 1^T, N_I^-1 = D_I^-1 - beta D_I^-1 1 1^T D_I^-1 and
/// beta = c^2 / (1 + c^2 1^T D_I^-1 1); `sum_dinv` is 1^T D_I^-1 1.
pub(crate) fn ecorr_beta(c2: f64, sum_dinv: f64) -> f64 {
    c2 / (1.0 + c2 * sum_dinv)
}

/// Which row of V each TOA adds to, for summing V as the whitened basis is written
/// ([`PulsarBasis::whitened`]).
struct EcorrFold {
    /// The ECORR epoch of each TOA (`usize::MAX`: none).
    epoch: Vec<usize>,
    /// beta_e^(1/2) D_i^-1/2: the multiplier of row i in [`ecorr_rows`].
    weight: Vec<f64>,
    n_epochs: usize,
}

impl EcorrFold {
    /// The plan for `epochs` (TOA indices and beta^(1/2)), or None when there are no epochs or
    /// an epoch does not list its TOAs in ascending order (summing in row order would then
    /// add them in another order than [`ecorr_rows`]).
    fn plan(epochs: &[(Vec<usize>, f64)], sqrt_dinv: &[f64]) -> Option<Self> {
        if epochs.is_empty() || epochs.iter().any(|(idx, _)| !idx.is_sorted()) {
            return None;
        }
        let n = sqrt_dinv.len();
        let mut epoch = vec![usize::MAX; n];
        let mut weight = vec![0.0; n];
        for (e, (idx, sqrt_beta)) in epochs.iter().enumerate() {
            for &i in idx {
                epoch[i] = e;
                weight[i] = sqrt_beta * sqrt_dinv[i];
            }
        }
        Some(EcorrFold {
            epoch,
            weight,
            n_epochs: epochs.len(),
        })
    }
}

/// V (epochs x cols): row e is beta_e^(1/2) times the sum over epoch e of D^-1/2 times the rows
/// of the whitened basis `wa`, so that U^T N^-1 U = U^T D^-1 U - V^T V. `epochs` holds the TOA
/// indices and beta^(1/2) of each epoch.
pub(crate) fn ecorr_rows(
    epochs: &[(Vec<usize>, f64)],
    sqrt_dinv: &[f64],
    wa: &Array2<f64>,
) -> Array2<f64> {
    let mut v = Array2::<f64>::zeros((epochs.len(), wa.ncols()));
    for (e, (idx, sqrt_beta)) in epochs.iter().enumerate() {
        let mut row = v.row_mut(e);
        for &i in idx {
            row.scaled_add(sqrt_beta * sqrt_dinv[i], &wa.row(i));
        }
    }
    v
}

/// U^T N^-1 U = (D^-1/2 U)^T (D^-1/2 U) - V^T V (cols x cols, both triangles): two symmetric
/// rank-k updates, the ECORR blocks folded in by Sherman-Morrison ([`ecorr_rows`]).
pub(crate) fn gram_n_inv(wa: &Array2<f64>, v: &Array2<f64>) -> Array2<f64> {
    let n_cols = wa.ncols();
    let mut gram = Array2::<f64>::zeros((n_cols, n_cols));
    syrk_tn(1.0, wa, 0.0, &mut gram);
    if v.nrows() > 0 {
        syrk_tn(-1.0, v, 1.0, &mut gram);
    }
    mirror_upper(&mut gram);
    gram
}

/// Reduce one pulsar: build its model and apply it to its residuals.
pub fn reduce_pulsar(
    p: &Pulsar,
    noise: &PulsarNoise,
    grid: &FrequencyGrid,
    auto: AutoPower,
) -> Result<Reduced> {
    if let Some(why) = overflow_row(p, noise) {
        return Err(Error::NonFinite {
            what: format!("the reduction of pulsar {}: {why}", p.label),
        });
    }
    let basis = PulsarBasis::for_one_model(p, noise, grid, auto)?;
    reduce_pulsar_on(p, noise, grid, auto, &basis)
}

/// [`reduce_pulsar`] on a basis computed before (the same bytes).
pub fn reduce_pulsar_on(
    p: &Pulsar,
    noise: &PulsarNoise,
    grid: &FrequencyGrid,
    auto: AutoPower,
    basis: &PulsarBasis,
) -> Result<Reduced> {
    if let Some(why) = overflow_row(p, noise) {
        return Err(Error::NonFinite {
            what: format!("the reduction of pulsar {}: {why}", p.label),
        });
    }
    let model = PulsarModel::build_on(p, noise, grid, auto, basis)?;
    let x = model.reduce(&p.residual);
    let flops = model.flops() + 2.0 * p.n_toa() as f64 * model.wa.ncols() as f64;
    if x.iter().chain(model.z.iter()).any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: format!(
                "the reduction of pulsar {}: {}",
                p.label,
                diagnose_non_finite(p, noise)
            ),
        });
    }
    Ok(Reduced {
        label: p.label.clone(),
        direction: p.direction,
        x,
        z: model.z,
        flops,
    })
}

/// The TOA row most likely to have made a reduction non-finite, and why: a weight
/// 1/(EFAC sigma)^2 or a whitened residual r/sigma, or a design-matrix entry, beyond the range
/// where products of a few thousand terms stay finite in f64 (about 1e150, the square root of
/// the largest f64 with margin).
pub fn diagnose_non_finite(p: &Pulsar, noise: &PulsarNoise) -> String {
    overflow_row(p, noise).unwrap_or_else(|| "no single TOA stands out; likely a noise parameter (EQUAD, ECORR, red amplitude) or a design-matrix column scale far from the others".to_string())
}

/// The first TOA row whose weight, whitened residual or design-matrix entry would overflow.
fn overflow_row(p: &Pulsar, noise: &PulsarNoise) -> Option<String> {
    const LIMIT: f64 = 1e150;
    let efacs: Vec<f64> = p.backends.iter().map(|b| noise.white_for(b).efac).collect();
    for i in 0..p.n_toa() {
        let efac = efacs[p.backend[i]];
        let s = efac * p.sigma[i];
        // Formatted only for the row that is reported (no allocation per TOA).
        let row = || format!("TOA row {} (line {} of the residual table)", i + 1, i + 2);
        if !(1.0 / (s * s)).is_finite() || 1.0 / (s * s) > LIMIT {
            return Some(format!("{}: sigma_s = {} makes the weight 1/sigma^2 overflow; likely a unit error in sigma_s", row(), p.sigma[i]));
        }
        let w = p.residual[i] / s;
        if !w.is_finite() || w.abs() > LIMIT {
            return Some(format!("{}: residual_s / sigma_s = {w:e} overflows; likely a unit error in residual_s or sigma_s", row()));
        }
        if let Some(d) = &p.design {
            if let Some((k, v)) = d
                .values
                .row(i)
                .iter()
                .enumerate()
                .find(|(_, v)| !v.is_finite() || v.abs() > LIMIT)
            {
                return Some(format!(
                    "{}: design-matrix column {} = {v:e} is too large; rescale that column",
                    row(),
                    d.names[k]
                ));
            }
        }
    }
    None
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
