//! The Gaussian likelihood of one pulsar as a function of its noise hyperparameters, with its
//! analytic gradient (docs/noise-estimation.md).
//!
//! The covariance is C = N + F B F^T: N the white noise (EFAC, EQUAD per backend, ECORR blocks
//! folded in by Sherman-Morrison, as in [`crate::reduce`]), F the red and chromatic Fourier bases
//! on j / T_span, B their power-law prior variances. The timing model M is marginalised with a
//! flat prior (van Haasteren & Levin 2013, MNRAS 428, 1147):
//!
//! ln L = -1/2 [r^T P r + ln det C + ln det(M^T C^-1 M)] - (n - m)/2 ln 2 pi,
//! P = C^-1 - C^-1 M (M^T C^-1 M)^-1 M^T C^-1,
//!
//! evaluated in the Woodbury form with T = [M | F] and B^-1 = 0 on M's columns
//! (van Haasteren & Vallisneri 2014, MNRAS 446, 1170): with S = B^-1 + T^T N^-1 T and
//! a = S^-1 T^T N^-1 r,
//!
//! r^T P r = (r - T a)^T N^-1 (r - T a) + a^T B^-1 a,
//! ln det C + ln det(M^T C^-1 M) = ln det N + ln det B + ln det S   (B over F's columns only).
//!
//! The gradient is d ln L = 1/2 [(P r)^T dC (P r) - tr(P dC)] (Petersen & Pedersen, The Matrix
//! Cookbook 2012, eqs. 38 and 61, with the marginalisation folded into P). For a power-law
//! column j: T^T P r = B^-1 a and T^T P T = B^-1 S^-1 (T^T N^-1 T), so each column costs O(1)
//! once S is factored; white-noise terms use diag(P) and 1^T P 1 over each ECORR epoch.

use crate::basis::{chromatic_scale, ecorr_epochs, timing_model, ECORR_EPOCH_GAP_S};
use crate::constants::F_YR;
use crate::error::{Error, Result};
use crate::linalg::{mirror_upper, syrk_flops, syrk_tn, ScaledCholesky};
use crate::noise::{PulsarNoise, RedProcess, WhiteNoise};
use crate::reduce::{basis_columns, ecorr_beta, FrequencyGrid};
use crate::release::Pulsar;
use crate::spectrum::{power_law_phi, PowerLaw};
use crate::white_gram::{
    add_packed, packed_entry, quadratic_form, trace_product, BackendGram, GramReport, GramSettings,
};
use ndarray::linalg::general_mat_vec_mul;
use ndarray::{s, Array1, Array2, ArrayView1, ArrayViewMut1, Axis};
use std::cell::RefCell;
use std::f64::consts::{LN_10, PI};

/// Which white-noise terms of one backend are free parameters (an absent EFAC is 1, an absent
/// EQUAD or ECORR is 0).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub struct BackendTerms {
    pub efac: bool,
    pub log10_equad: bool,
    pub log10_ecorr: bool,
}

/// The common process in a pulsar's auto-power: given, or with free amplitude and index.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum CommonTerm {
    Fixed(PowerLaw),
    Free,
}

/// A common process on the first `n_frequencies` frequencies of the ladder.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CommonSpec {
    pub n_frequencies: usize,
    pub term: CommonTerm,
}

/// The noise processes of one pulsar's model.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct Components {
    /// One entry per backend of the pulsar, in the order of `Pulsar::backends`.
    pub backends: Vec<BackendTerms>,
    /// Achromatic red noise on this many frequencies.
    pub red: Option<usize>,
    /// Chromatic (DM) noise on this many frequencies, basis scaled by (1400 MHz / nu)^2.
    pub dm: Option<usize>,
    pub common: Option<CommonSpec>,
}

/// What a hyperparameter is; backends by their index in `Pulsar::backends`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Hyper {
    Efac(usize),
    /// log10 of EQUAD in seconds.
    Log10Equad(usize),
    /// log10 of ECORR in seconds.
    Log10Ecorr(usize),
    RedLog10Amplitude,
    RedSpectralIndex,
    DmLog10Amplitude,
    DmSpectralIndex,
    CommonLog10Amplitude,
    CommonSpectralIndex,
}

/// One hyperparameter: its kind and its name in chain tables (`efac.KRK-L`,
/// `equad_log10_s.KRK-L`, `red.log10_amplitude`, ...: the keys of `noise.toml`).
#[derive(Clone, Debug, PartialEq)]
pub struct Hyperparameter {
    pub name: String,
    pub kind: Hyper,
}

/// Indices of a backend's free parameters in the parameter vector.
#[derive(Clone, Copy, Debug, Default)]
struct WhiteIndex {
    efac: Option<usize>,
    equad: Option<usize>,
    ecorr: Option<usize>,
}

/// A power-law block of T: its columns (start in T) and frequencies.
#[derive(Clone, Debug)]
struct Block {
    start: usize,
    freqs: Vec<f64>,
}

/// Buffers of one evaluation's n-sized and (n x c)-sized steps, kept per thread and reused
/// ([`with_work`]), so that an evaluation allocates nothing of size n: on 2,400 TOAs x 60
/// columns a fresh 1.2 MB array per step cost more in page faults than the arithmetic
/// (measured, docs/noise-estimation.md "Speed").
#[derive(Default)]
struct Work {
    /// D_ii = (EFAC sigma_i)^2 + EQUAD^2 and D_ii^-1/2.
    d: Vec<f64>,
    sqrt_dinv: Vec<f64>,
    /// D^-1/2 r.
    wr: Vec<f64>,
    /// D^-1/2 (r - T a).
    e: Vec<f64>,
    /// P r.
    pr: Vec<f64>,
    /// D^-1/2 T; in the gradient overwritten by N^-1 T and then by its rows whitened with S.
    wa: Array2<f64>,
    /// Per ECORR epoch: sum of D^-1 over its TOAs, beta^(1/2) of the Sherman-Morrison fold,
    /// and beta^(1/2) times the sum of its D^-1/2 rows of D^-1/2 T.
    sum_dinv: Vec<f64>,
    sqrt_beta: Vec<f64>,
    v: Array2<f64>,
    /// T^T N^-1 T (both triangles).
    gram: Array2<f64>,
    /// Per backend, H and dH/dtau of the interpolated Gram (packed; [`BackendGram`]).
    gram_h: Vec<f64>,
}

impl Work {
    /// Size the buffers for n TOAs, c columns and ne ECORR epochs (a no-op when they fit).
    fn size(&mut self, n: usize, c: usize, ne: usize) {
        for v in [
            &mut self.d,
            &mut self.sqrt_dinv,
            &mut self.wr,
            &mut self.e,
            &mut self.pr,
        ] {
            v.resize(n, 0.0);
        }
        self.sum_dinv.resize(ne, 0.0);
        self.sqrt_beta.resize(ne, 0.0);
        for (m, dim) in [
            (&mut self.wa, (n, c)),
            (&mut self.v, (ne, c)),
            (&mut self.gram, (c, c)),
        ] {
            if m.dim() != dim {
                *m = Array2::zeros(dim);
            }
        }
    }
}

thread_local! {
    static WORK: RefCell<Work> = RefCell::new(Work::default());
}

/// Run `f` with this thread's buffers (fresh ones should they be in use, which an evaluation
/// never nests).
fn with_work<T>(f: impl FnOnce(&mut Work) -> T) -> T {
    WORK.with(|cell| match cell.try_borrow_mut() {
        Ok(mut w) => f(&mut w),
        Err(_) => f(&mut Work::default()),
    })
}

/// The white-noise values of one evaluation and the products they give.
struct WhiteValues {
    efac: Vec<f64>,
    equad2: Vec<f64>,
    ecorr2: Vec<f64>,
    /// T^T N^-1 r, r^T N^-1 r and ln det N.
    tnr: Array1<f64>,
    rnr: f64,
    log_det_n: f64,
}

/// The likelihood with the white noise held at fixed values (`ptacorr noise --fixed-white`).
/// N is then fixed, so T^T N^-1 T, T^T N^-1 r, r^T N^-1 r and ln det N are computed once, and
/// so is the elimination of the timing model, whose columns carry no prior (B^-1 = 0 there):
/// with T = [M | F] and G = T^T N^-1 T, block Gaussian elimination (the Schur complement;
/// Golub & Van Loan 2013, Matrix Computations, sec. 3.2.10 and 4.2) gives
///
/// S' = B_F^-1 + G', G' = G_FF - G_FM G_MM^-1 G_MF, t' = t_F - G_FM G_MM^-1 t_M (t = T^T N^-1 r),
/// ln det S = ln det G_MM + ln det S', a_F = S'^-1 t', (S^-1)_FF = S'^-1,
/// r^T P r = r^T N^-1 r - t_M^T G_MM^-1 t_M - a_F^T t'
///
/// (the last by the Woodbury identity; Press et al. 2007, Numerical Recipes, sec. 2.7.3; the
/// same S as in [`PulsarLikelihood`]). An evaluation factors only S' (c_F x c_F for the c_F
/// Fourier columns) and inverts its triangular factor for diag(S'^-1): about 2 c_F^3 / 3
/// operations instead of O(n c^2). The scalar difference loses about
/// log10(r^T N^-1 r / r^T P r) digits, a few at most for residuals dominated by red noise; the
/// gradient in the power-law parameters is the full likelihood's formula, and the white-noise
/// entries of the gradient are zero.
pub struct FixedWhite<'a> {
    lik: &'a PulsarLikelihood,
    /// (index, value) of every white-noise hyperparameter.
    white: Vec<(usize, f64)>,
    /// G' and t' over the Fourier columns (timing model eliminated).
    gram: Array2<f64>,
    tnr: Array1<f64>,
    /// r^T N^-1 r - t_M^T G_MM^-1 t_M.
    rnr: f64,
    /// ln det N + ln det G_MM.
    log_det: f64,
}

impl FixedWhite<'_> {
    /// The fixed white-noise values (index in the parameter vector, value).
    pub fn white(&self) -> &[(usize, f64)] {
        &self.white
    }

    /// ln L at `theta` (its white-noise entries are ignored: the fixed values hold) and its
    /// gradient (zero in the white-noise entries).
    pub fn log_likelihood_and_gradient(&self, theta: &[f64], grad: &mut [f64]) -> Result<f64> {
        let lik = self.lik;
        lik.check_theta(theta)?;
        lik.check_gradient(grad)?;
        let (n, cols) = lik.t.dim();
        let m = lik.n_m;
        let (phi, binv, red_share, common_share) = lik.prior_variances(theta)?;
        let mut s = self.gram.clone();
        for c in m..cols {
            s[[c - m, c - m]] += binv[c];
        }
        let chol = ScaledCholesky::from_owned(s, || {
            format!(
                "S = B^-1 + T^T N^-1 T of pulsar {} (timing model eliminated)",
                lik.label
            )
        })?;
        let a = chol.solve_vec(self.tnr.as_slice().expect("contiguous"));
        let chi2 = self.rnr - a.dot(&self.tnr);
        let log_det_b: f64 = phi[m..].iter().map(|p| p.ln()).sum();
        let lnl = -0.5 * (chi2 + self.log_det + log_det_b + chol.log_det())
            - 0.5 * (n - m) as f64 * (2.0 * PI).ln();
        if !lnl.is_finite() {
            return Err(Error::NonFinite {
                what: format!("the likelihood of pulsar {} (ln L)", lik.label),
            });
        }
        grad.iter_mut().for_each(|g| *g = 0.0);
        // (S^-1 T^T N^-1 T)_cc = 1 - (S^-1)_cc / phi_c since T^T N^-1 T = S - B^-1.
        let s_inv = chol.inverse_diagonal();
        let mut h = vec![0.0; cols];
        for c in m..cols {
            let (ac, sc) = (a[c - m], s_inv[c - m]);
            h[c] = 0.5 * (ac * ac * binv[c] - 1.0 + sc * binv[c]);
        }
        lik.power_law_gradient(&h, &red_share, &common_share, grad);
        if let Some(k) = grad.iter().position(|g| !g.is_finite()) {
            return Err(Error::NonFinite {
                what: format!(
                    "the likelihood of pulsar {} (gradient in {})",
                    lik.label, lik.params[k].name
                ),
            });
        }
        Ok(lnl)
    }
}

/// The likelihood of one pulsar, with everything that does not depend on the hyperparameters
/// (bases, epochs) built once.
pub struct PulsarLikelihood {
    label: String,
    residual: Vec<f64>,
    sigma: Vec<f64>,
    backend: Vec<usize>,
    backends: Vec<String>,
    /// T = [M | Fourier (k_r) | chromatic Fourier (k_dm)], unwhitened (n x cols).
    t: Array2<f64>,
    n_m: usize,
    t_span: f64,
    /// Red columns (shared by red noise and the common process): k_r = max(k_red, k_common).
    red_block: Option<Block>,
    k_red: usize,
    k_common: usize,
    dm_block: Option<Block>,
    common: Option<CommonTerm>,
    /// ECORR epochs: backend and TOA indices.
    epochs: Vec<(usize, Vec<usize>)>,
    /// The ECORR epoch of each TOA (usize::MAX: none).
    epoch_of: Vec<usize>,
    white_index: Vec<WhiteIndex>,
    red_index: Option<usize>,
    dm_index: Option<usize>,
    common_index: Option<usize>,
    params: Vec<Hyperparameter>,
    /// TOAs grouped by (backend, sigma), when that is exact and cheaper ([`Groups`]).
    groups: Option<Groups>,
    /// Per backend, the interpolated white-weighted Gram ([`crate::white_gram`]), when set up
    /// by [`PulsarLikelihood::interpolate_white`].
    white_gram: Option<Vec<BackendGram>>,
}

/// Whether [`PulsarLikelihood::interpolate_white`] set up the interpolated evaluation.
#[derive(Clone, Debug, PartialEq)]
pub enum WhiteGramStatus {
    /// Used, with each backend's report (nodes, pieces, the error found by the check).
    Used(Vec<GramReport>),
    /// Not needed or not applicable: the TOAs are grouped (exact and cheaper), or a backend has
    /// ECORR (its epochs couple TOAs).
    NotApplicable,
    /// The check at setup failed: evaluations stay exact (TOA by TOA); the note says why.
    Failed(String),
}

/// TOAs of equal white-noise variance: N^-1 is d_g^-1 on group g's TOAs, d_g =
/// (EFAC_b sigma_g)^2 + EQUAD_b^2 for the group's backend b and uncertainty sigma_g, so the
/// sums over TOAs factor into per-group constants computed once: T^T N^-1 T = sum_g G_g / d_g
/// with G_g = T_g^T T_g, T^T N^-1 r = sum_g t_g / d_g with t_g = T_g^T r_g, r^T N^-1 r =
/// sum_g |r_g|^2 / d_g, ln det N = sum_g n_g ln d_g (exact; no approximation). The white-noise
/// gradient needs, per group, sum_i (P r)_i^2 = |r_g - T_g a|^2 / d_g^2 and
/// sum_i P_ii = n_g / d_g - tr(S^-1 G_g) / d_g^2 (the Woodbury form of P's diagonal block,
/// Press et al. 2007, sec. 2.7.3). An evaluation then costs O(g c^2 + c^3) instead of O(n c^2).
/// Used without ECORR (whose epochs couple TOAs) and when g c <= n (the per-group matrices take
/// no more memory than T).
#[derive(Clone, Debug)]
struct Groups {
    backend: Vec<usize>,
    sigma: Vec<f64>,
    count: Vec<f64>,
    gram: Vec<Array2<f64>>,
    tr: Vec<Array1<f64>>,
    rr: Vec<f64>,
}

impl Groups {
    /// The groups of a pulsar's TOAs, or None when grouping does not pay (see [`Groups`]).
    fn build(t: &Array2<f64>, residual: &[f64], sigma: &[f64], backend: &[usize]) -> Option<Self> {
        let (n, c) = t.dim();
        let mut keys: Vec<(usize, u64)> = Vec::new();
        let mut member = Vec::with_capacity(n);
        for (&b, &s) in backend.iter().zip(sigma) {
            let key = (b, s.to_bits());
            let k = match keys.iter().position(|&x| x == key) {
                Some(k) => k,
                None => {
                    if (keys.len() + 1) * c.max(1) > n {
                        return None;
                    }
                    keys.push(key);
                    keys.len() - 1
                }
            };
            member.push(k);
        }
        let g = keys.len();
        let mut groups = Groups {
            backend: keys.iter().map(|k| k.0).collect(),
            sigma: keys.iter().map(|k| f64::from_bits(k.1)).collect(),
            count: vec![0.0; g],
            gram: Vec::with_capacity(g),
            tr: Vec::with_capacity(g),
            rr: vec![0.0; g],
        };
        for k in 0..g {
            let rows: Vec<usize> = (0..n).filter(|&i| member[i] == k).collect();
            let tg = t.select(Axis(0), &rows);
            let rg: Array1<f64> = rows.iter().map(|&i| residual[i]).collect();
            let mut gram = Array2::zeros((c, c));
            syrk_tn(1.0, &tg, 0.0, &mut gram);
            mirror_upper(&mut gram);
            groups.gram.push(gram);
            groups.tr.push(tg.t().dot(&rg));
            groups.rr[k] = rg.dot(&rg);
            groups.count[k] = rows.len() as f64;
        }
        Some(groups)
    }
}

/// What [`PulsarLikelihood::solve_compressed`] gives the gradient of a compressed form.
struct Compressed {
    lnl: f64,
    chol: ScaledCholesky,
    a: Array1<f64>,
    binv: Vec<f64>,
    red_share: Vec<f64>,
    common_share: Vec<f64>,
}

impl PulsarLikelihood {
    /// The likelihood of pulsar `p` under `components`, Fourier frequencies on the ladder of
    /// `grid` (j / T_span, time origin `grid.t0_mjd`).
    pub fn new(p: &Pulsar, components: &Components, grid: &FrequencyGrid) -> Result<Self> {
        if components.backends.len() != p.backends.len() {
            return Err(Error::setting(
                "components",
                format!(
                    "pulsar {} has {} backends, the model lists {}",
                    p.label,
                    p.backends.len(),
                    components.backends.len()
                ),
            ));
        }
        let t = grid.seconds(&p.mjd);
        let k_red = components.red.unwrap_or(0);
        let k_dm = components.dm.unwrap_or(0);
        let k_common = components.common.map_or(0, |c| c.n_frequencies);
        if components.red == Some(0)
            || components.dm == Some(0)
            || components.common.is_some() && k_common == 0
        {
            return Err(Error::setting(
                "n_frequencies",
                format!(
                    "pulsar {}: a red, DM or common process needs at least one frequency",
                    p.label
                ),
            ));
        }
        let k_r = k_red.max(k_common);
        let ladder = grid.ladder(k_r.max(k_dm));
        let m = timing_model(p, &t)?;
        let n_m = m.ncols();
        let dm_scale = if k_dm > 0 {
            chromatic_scale(&p.freq_mhz)
        } else {
            Vec::new()
        };
        let ones = vec![1.0; t.len()];
        let tmat = basis_columns(&m, &t, &ladder, k_r, k_dm, &dm_scale, &ones);

        let mut params = Vec::new();
        let push = |params: &mut Vec<Hyperparameter>, name: String, kind: Hyper| {
            params.push(Hyperparameter { name, kind });
            params.len() - 1
        };
        let mut white_index = Vec::new();
        for (b, terms) in components.backends.iter().enumerate() {
            let name = &p.backends[b];
            let mut w = WhiteIndex::default();
            if terms.efac {
                w.efac = Some(push(&mut params, format!("efac.{name}"), Hyper::Efac(b)));
            }
            if terms.log10_equad {
                w.equad = Some(push(
                    &mut params,
                    format!("equad_log10_s.{name}"),
                    Hyper::Log10Equad(b),
                ));
            }
            if terms.log10_ecorr {
                w.ecorr = Some(push(
                    &mut params,
                    format!("ecorr_log10_s.{name}"),
                    Hyper::Log10Ecorr(b),
                ));
            }
            white_index.push(w);
        }
        let pair = |params: &mut Vec<Hyperparameter>, prefix: &str, a: Hyper, g: Hyper| {
            let i = push(params, format!("{prefix}.log10_amplitude"), a);
            push(params, format!("{prefix}.spectral_index"), g);
            i
        };
        let red_index = components.red.map(|_| {
            pair(
                &mut params,
                "red",
                Hyper::RedLog10Amplitude,
                Hyper::RedSpectralIndex,
            )
        });
        let dm_index = components.dm.map(|_| {
            pair(
                &mut params,
                "dm",
                Hyper::DmLog10Amplitude,
                Hyper::DmSpectralIndex,
            )
        });
        let common_index = match components.common.map(|c| c.term) {
            Some(CommonTerm::Free) => Some(pair(
                &mut params,
                "common",
                Hyper::CommonLog10Amplitude,
                Hyper::CommonSpectralIndex,
            )),
            _ => None,
        };

        let use_ecorr: Vec<bool> = components.backends.iter().map(|b| b.log10_ecorr).collect();
        let epochs = if use_ecorr.iter().any(|&u| u) {
            ecorr_epochs(&t, &p.backend, &use_ecorr, ECORR_EPOCH_GAP_S)
        } else {
            Vec::new()
        };
        let mut epoch_of = vec![usize::MAX; t.len()];
        for (k, (_, idx)) in epochs.iter().enumerate() {
            for &i in idx {
                epoch_of[i] = k;
            }
        }
        let groups = if epochs.is_empty() {
            Groups::build(&tmat, &p.residual, &p.sigma, &p.backend)
        } else {
            None
        };
        Ok(PulsarLikelihood {
            label: p.label.clone(),
            residual: p.residual.clone(),
            sigma: p.sigma.clone(),
            backend: p.backend.clone(),
            backends: p.backends.clone(),
            t: tmat,
            n_m,
            t_span: grid.t_span,
            red_block: (k_r > 0).then(|| Block {
                start: n_m,
                freqs: ladder[..k_r].to_vec(),
            }),
            k_red,
            k_common,
            dm_block: (k_dm > 0).then(|| Block {
                start: n_m + 2 * k_r,
                freqs: ladder[..k_dm].to_vec(),
            }),
            common: components.common.map(|c| c.term),
            epochs,
            epoch_of,
            white_index,
            red_index,
            dm_index,
            common_index,
            params,
            groups,
            white_gram: None,
        })
    }

    /// Evaluate with the interpolated per-backend Gram of [`crate::white_gram`] whenever the
    /// white noise lies inside `bounds` (the prior ranges, in the order of [`Self::parameters`];
    /// outside them an evaluation is exact). Applies to pulsars without ECORR whose TOAs are not
    /// grouped ([`Groups`]: equal uncertainties are exact and cheaper). When the check at setup
    /// fails, nothing changes and the status carries the note.
    pub fn interpolate_white(
        &mut self,
        bounds: &[[f64; 2]],
        settings: &GramSettings,
    ) -> WhiteGramStatus {
        if self.groups.is_some() || !self.epochs.is_empty() || bounds.len() != self.params.len() {
            return WhiteGramStatus::NotApplicable;
        }
        // The interpolated family is the Gram of X = [T | r | 1 | sigma]: its blocks are
        // T^T W T, T^T W r, r^T W r, sum w_i and sum w_i s_i (W = diag(w_i); [`BackendGram`]),
        // every product with N^-1 an evaluation needs.
        let (n, cols) = self.t.dim();
        let mut x = Array2::<f64>::zeros((n, cols + 3));
        x.slice_mut(s![.., ..cols]).assign(&self.t);
        for i in 0..n {
            x[[i, cols]] = self.residual[i];
            x[[i, cols + 1]] = 1.0;
            x[[i, cols + 2]] = self.sigma[i];
        }
        let mut grams = Vec::with_capacity(self.backends.len());
        let mut reports = Vec::with_capacity(self.backends.len());
        for (b, wi) in self.white_index.iter().enumerate() {
            let e_range = wi.efac.map_or([1.0, 1.0], |i| bounds[i]);
            let q2_range = wi.equad.map_or([0.0, 0.0], |i| {
                [
                    10f64.powf(2.0 * bounds[i][0]),
                    10f64.powf(2.0 * bounds[i][1]),
                ]
            });
            // t = EQUAD^2 / EFAC^2 over the prior rectangle.
            let t_range = [
                q2_range[0] / (e_range[1] * e_range[1]),
                q2_range[1] / (e_range[0] * e_range[0]),
            ];
            let rows: Vec<usize> = (0..self.backend.len())
                .filter(|&i| self.backend[i] == b)
                .collect();
            if rows.is_empty() {
                return WhiteGramStatus::NotApplicable;
            }
            match BackendGram::build(&x, &self.sigma, rows, t_range, settings) {
                Ok((g, r)) => {
                    grams.push(g);
                    reports.push(r);
                }
                Err(note) => {
                    return WhiteGramStatus::Failed(format!(
                        "pulsar {} backend {}: {note}; its likelihood is evaluated TOA by TOA",
                        self.label, self.backends[b]
                    ))
                }
            }
        }
        self.white_gram = Some(grams);
        WhiteGramStatus::Used(reports)
    }

    /// Whether evaluations use the interpolated white-weighted Gram.
    pub fn white_interpolated(&self) -> bool {
        self.white_gram.is_some()
    }

    /// The same likelihood without the interpolated Gram (for checks against the exact form).
    pub fn exact_white(mut self) -> Self {
        self.white_gram = None;
        self
    }

    /// The hyperparameters, in the order of the parameter vector.
    pub fn parameters(&self) -> &[Hyperparameter] {
        &self.params
    }

    /// Number of hyperparameters.
    pub fn dim(&self) -> usize {
        self.params.len()
    }

    /// The pulsar's label.
    pub fn label(&self) -> &str {
        &self.label
    }

    /// Number of backends of the pulsar.
    pub fn backend_count(&self) -> usize {
        self.backends.len()
    }

    /// The geometric mean of sigma_i^2 over the TOAs of backend `b` (seconds^2; NaN for a
    /// backend without TOAs): the reference uncertainty of the sampler's white-noise
    /// coordinates ([`crate::noise_fit::posterior`]).
    pub fn backend_reference_sigma2(&self, b: usize) -> f64 {
        let (sum, count) = self
            .sigma
            .iter()
            .zip(&self.backend)
            .filter(|(_, &k)| k == b)
            .fold((0.0, 0usize), |(s, c), (x, _)| (s + (x * x).ln(), c + 1));
        (sum / count as f64).exp()
    }

    /// Number of TOAs n and columns of T.
    pub fn shape(&self) -> (usize, usize) {
        self.t.dim()
    }

    /// ln L at `theta`.
    pub fn log_likelihood(&self, theta: &[f64]) -> Result<f64> {
        self.evaluate(theta, None)
    }

    /// ln L at `theta` and its gradient (written to `grad`, length [`Self::dim`]).
    pub fn log_likelihood_and_gradient(&self, theta: &[f64], grad: &mut [f64]) -> Result<f64> {
        self.evaluate(theta, Some(grad))
    }

    /// Floating-point operations of one value-and-gradient evaluation as counted: the rank-k
    /// update T^T D^-1 T (n c (c + 1)) and V^T V, the triangular solve Z = N^-1 T D^-1 L^-T
    /// whose row norms are the quadratic forms of diag(P) (n c^2), the passes over n x c
    /// arrays (D^-1/2 T, T^T N^-1 r, T a, N^-1 T, the scaling before the solve, the row norms:
    /// 9 n c; with ECORR also V, its rows in N^-1 T and the epoch sums of Z: 5 n c), and the
    /// small dense steps on S (c^3 / 3 for the factor, c^3 / 3 for the inverse of the
    /// triangular factor).
    /// Grouped TOAs ([`Groups`]): per group G_g / d_g, t_g / d_g and, for the gradient,
    /// a^T G_g a, t_g . a and the Frobenius product with S^-1 (5 c^2 + 4 c), and the dense
    /// steps on S (c^3 / 3 for the factor, c^3 / 3 for the inverse factor, c^3 / 3 for S^-1).
    pub fn flops(&self) -> f64 {
        let (n, c) = self.t.dim();
        let (nf, cf) = (n as f64, c as f64);
        if let Some(g) = &self.groups {
            return g.count.len() as f64 * (5.0 * cf * cf + 4.0 * cf) + cf.powi(3);
        }
        if let Some(grams) = &self.white_gram {
            // Per backend: the series and its derivative (4 flops per coefficient entry of the
            // (c + 3)-square Gram), S's share, two trace products and two quadratic forms
            // (2 each per entry); ln det N (2 per TOA); the dense steps on S (c^3 / 3 factor,
            // 2 c^3 / 3 for S^-1).
            let per: f64 = grams
                .iter()
                .map(|g| (4 * g.nodes_per_evaluation() + 10) as f64 * g.packed_len() as f64)
                .sum();
            return per + 2.0 * nf + cf.powi(3);
        }
        let ne = self.epochs.len();
        let ecorr = if ne > 0 { 5.0 * nf * cf } else { 0.0 };
        syrk_flops(n, c)
            + syrk_flops(ne, c)
            + nf * cf * cf
            + 9.0 * nf * cf
            + ecorr
            + cf.powi(3) * (2.0 / 3.0)
    }

    /// The noise model at `theta` in the types of `noise.toml` (red and DM with their own
    /// numbers of frequencies). The common process is not part of a pulsar's entry.
    pub fn noise_at(&self, theta: &[f64]) -> PulsarNoise {
        let white = self
            .white_index
            .iter()
            .enumerate()
            .map(|(b, w)| WhiteNoise {
                backend: self.backends[b].clone(),
                efac: w.efac.map_or(1.0, |i| theta[i]),
                equad_log10_s: w.equad.map(|i| theta[i]),
                ecorr_log10_s: w.ecorr.map(|i| theta[i]),
            })
            .collect();
        let process = |i: Option<usize>, k: usize| {
            i.map(|i| RedProcess {
                log10_amplitude: theta[i],
                spectral_index: theta[i + 1],
                n_frequencies: Some(k),
            })
        };
        PulsarNoise {
            white,
            red: process(self.red_index, self.k_red),
            dm: process(
                self.dm_index,
                self.dm_block.as_ref().map_or(0, |b| b.freqs.len()),
            ),
        }
    }

    /// Prior variances phi of every column of T (infinite on the timing model's), their
    /// inverses, and the shares of red noise and the common process in each red column (for the
    /// gradient). phi(f) as in [`crate::spectrum::power_law_phi`].
    #[allow(clippy::type_complexity)]
    fn prior_variances(&self, theta: &[f64]) -> Result<(Vec<f64>, Vec<f64>, Vec<f64>, Vec<f64>)> {
        let cols = self.t.ncols();
        let mut phi = vec![f64::INFINITY; cols];
        let mut red_share = vec![0.0; cols];
        let mut common_share = vec![0.0; cols];
        if let Some(block) = &self.red_block {
            let red = self.red_index.map(|i| (theta[i], theta[i + 1]));
            let common = match self.common {
                Some(CommonTerm::Fixed(c)) => Some((c.log10_amplitude, c.spectral_index)),
                Some(CommonTerm::Free) => self.common_index.map(|i| (theta[i], theta[i + 1])),
                None => None,
            };
            for (j, &f) in block.freqs.iter().enumerate() {
                let pr = red.filter(|_| j < self.k_red).map_or(0.0, |(a, g)| {
                    power_law_phi(10f64.powf(2.0 * a), g, f, self.t_span)
                });
                let pc = common.filter(|_| j < self.k_common).map_or(0.0, |(a, g)| {
                    power_law_phi(10f64.powf(2.0 * a), g, f, self.t_span)
                });
                for c in [block.start + 2 * j, block.start + 2 * j + 1] {
                    phi[c] = pr + pc;
                    red_share[c] = pr / (pr + pc);
                    common_share[c] = pc / (pr + pc);
                }
            }
        }
        if let (Some(block), Some(i)) = (&self.dm_block, self.dm_index) {
            for (j, &f) in block.freqs.iter().enumerate() {
                let p = power_law_phi(10f64.powf(2.0 * theta[i]), theta[i + 1], f, self.t_span);
                phi[block.start + 2 * j] = p;
                phi[block.start + 2 * j + 1] = p;
            }
        }
        let binv: Vec<f64> = phi.iter().map(|p| 1.0 / p).collect();
        if phi[self.n_m..].iter().any(|p| !(p.is_finite() && *p > 0.0)) {
            return Err(Error::NonFinite {
                what: format!(
                    "the likelihood of pulsar {} (power-law prior variance not positive)",
                    self.label
                ),
            });
        }
        Ok((phi, binv, red_share, common_share))
    }

    /// Chain rule from h_c = d ln L / d ln phi_c to the power-law parameters:
    /// d ln phi / d log10 A = 2 ln 10, d ln phi / d gamma = ln(f_yr / f).
    fn power_law_gradient(
        &self,
        h: &[f64],
        red_share: &[f64],
        common_share: &[f64],
        grad: &mut [f64],
    ) {
        let mut power_law = |block: &Block, index: usize, share: &dyn Fn(usize, usize) -> f64| {
            for (j, &f) in block.freqs.iter().enumerate() {
                let dln_gamma = (F_YR / f).ln();
                for c in [block.start + 2 * j, block.start + 2 * j + 1] {
                    let w = share(j, c) * h[c];
                    grad[index] += 2.0 * LN_10 * w;
                    grad[index + 1] += dln_gamma * w;
                }
            }
        };
        if let (Some(block), Some(i)) = (&self.red_block, self.red_index) {
            power_law(block, i, &|j, c| {
                if j < self.k_red {
                    red_share[c]
                } else {
                    0.0
                }
            });
        }
        if let (Some(block), Some(i)) = (&self.red_block, self.common_index) {
            power_law(block, i, &|j, c| {
                if j < self.k_common {
                    common_share[c]
                } else {
                    0.0
                }
            });
        }
        if let (Some(block), Some(i)) = (&self.dm_block, self.dm_index) {
            power_law(block, i, &|_, _| 1.0);
        }
    }

    /// Indices of the white-noise hyperparameters (EFAC, EQUAD, ECORR of every backend).
    pub fn white_parameters(&self) -> Vec<usize> {
        self.params
            .iter()
            .enumerate()
            .filter(|(_, p)| {
                matches!(
                    p.kind,
                    Hyper::Efac(_) | Hyper::Log10Equad(_) | Hyper::Log10Ecorr(_)
                )
            })
            .map(|(i, _)| i)
            .collect()
    }

    /// The white-noise products at `theta` that a fixed white noise leaves constant, with the
    /// timing model eliminated ([`FixedWhite`]).
    pub fn fixed_white(&self, theta: &[f64]) -> Result<FixedWhite<'_>> {
        self.check_theta(theta)?;
        let (gram, tnr, rnr, log_det_n) = with_work(|w| {
            let v = self.fill_white(theta, w)?;
            Ok::<_, Error>((w.gram.clone(), v.tnr, v.rnr, v.log_det_n))
        })?;
        let m = self.n_m;
        let white = self
            .white_parameters()
            .into_iter()
            .map(|i| (i, theta[i]))
            .collect();
        if m == 0 {
            return Ok(FixedWhite {
                lik: self,
                white,
                gram,
                tnr,
                rnr,
                log_det: log_det_n,
            });
        }
        let chol = ScaledCholesky::new(
            &gram.slice(s![..m, ..m]).to_owned(),
            &format!("M^T N^-1 M of pulsar {} (its timing model)", self.label),
        )?;
        // W = L^-1 D^-1 G_MF and w = L^-1 D^-1 t_M, so G_FM G_MM^-1 G_MF = W^T W.
        let wmf = chol.whiten(&gram.slice(s![..m, m..]).to_owned());
        let wt = chol.whiten(&tnr.slice(s![..m]).to_owned().insert_axis(Axis(1)));
        let wt = wt.column(0);
        Ok(FixedWhite {
            lik: self,
            white,
            gram: &gram.slice(s![m.., m..]) - &wmf.t().dot(&wmf),
            tnr: &tnr.slice(s![m..]) - &wmf.t().dot(&wt),
            rnr: rnr - wt.dot(&wt),
            log_det: log_det_n + chol.log_det(),
        })
    }

    /// The white-noise part at `theta` into `w`: D, the whitened T and r, ECORR's
    /// Sherman-Morrison terms and T^T N^-1 T; returns the values and T^T N^-1 r,
    /// r^T N^-1 r and ln det N.
    fn fill_white(&self, theta: &[f64], w: &mut Work) -> Result<WhiteValues> {
        let (n, cols) = self.t.dim();
        let nb = self.backends.len();
        w.size(n, cols, self.epochs.len());
        // White noise per backend: D_ii = (EFAC sigma_i)^2 + EQUAD^2, ECORR^2 per epoch.
        let mut efac = vec![1.0; nb];
        let mut equad2 = vec![0.0; nb];
        let mut ecorr2 = vec![0.0; nb];
        for (b, wi) in self.white_index.iter().enumerate() {
            if let Some(i) = wi.efac {
                efac[b] = theta[i];
            }
            if let Some(i) = wi.equad {
                equad2[b] = 10f64.powf(2.0 * theta[i]);
            }
            if let Some(i) = wi.ecorr {
                ecorr2[b] = 10f64.powf(2.0 * theta[i]);
            }
        }
        for i in 0..n {
            let b = self.backend[i];
            let di = (efac[b] * self.sigma[i]).powi(2) + equad2[b];
            if !(di.is_finite() && di > 0.0) {
                return Err(Error::NonFinite {
                    what: format!(
                        "the likelihood of pulsar {} (white-noise variance not positive)",
                        self.label
                    ),
                });
            }
            w.d[i] = di;
            w.sqrt_dinv[i] = 1.0 / di.sqrt();
            w.wr[i] = self.residual[i] * w.sqrt_dinv[i];
        }
        // Whitened T; ECORR's Sherman-Morrison terms per epoch (the fold of
        // `reduce::ecorr_rows`, on this evaluation's buffers).
        for ((mut dst, src), &sd) in
            w.wa.rows_mut()
                .into_iter()
                .zip(self.t.rows())
                .zip(&w.sqrt_dinv)
        {
            dst.zip_mut_with(&src, |x, &y| *x = y * sd);
        }
        for (k, (b, idx)) in self.epochs.iter().enumerate() {
            let sum: f64 = idx.iter().map(|&i| w.sqrt_dinv[i] * w.sqrt_dinv[i]).sum();
            w.sum_dinv[k] = sum;
            let sb = ecorr_beta(ecorr2[*b], sum).sqrt();
            w.sqrt_beta[k] = sb;
            let mut row = w.v.row_mut(k);
            row.fill(0.0);
            for &i in idx {
                row.scaled_add(sb * w.sqrt_dinv[i], &w.wa.row(i));
            }
        }
        // T^T N^-1 T = (D^-1/2 T)^T (D^-1/2 T) - V^T V: two symmetric rank-k updates.
        syrk_tn(1.0, &w.wa, 0.0, &mut w.gram);
        if !self.epochs.is_empty() {
            syrk_tn(-1.0, &w.v, 1.0, &mut w.gram);
        }
        mirror_upper(&mut w.gram);
        let es_r = self.epoch_sums(w, &w.wr);
        let mut tnr = w.wa.t().dot(&ArrayView1::from(&w.wr[..]));
        if !self.epochs.is_empty() {
            tnr -= &w.v.t().dot(&es_r);
        }
        let rnr = w.wr.iter().map(|x| x * x).sum::<f64>() - es_r.dot(&es_r);
        let log_det_n = self.log_det_n(&w.d, &w.sum_dinv, &ecorr2);
        Ok(WhiteValues {
            efac,
            equad2,
            ecorr2,
            tnr,
            rnr,
            log_det_n,
        })
    }

    /// Per ECORR epoch: beta^(1/2) times the sum over its TOAs of D^-1/2 x, for a whitened
    /// vector x.
    fn epoch_sums(&self, w: &Work, x: &[f64]) -> Array1<f64> {
        self.epochs
            .iter()
            .zip(&w.sqrt_beta)
            .map(|((_, idx), sb)| sb * idx.iter().map(|&i| w.sqrt_dinv[i] * x[i]).sum::<f64>())
            .collect()
    }

    /// ln det N: the diagonal and, per ECORR epoch, ln(1 + c^2 sum D^-1) (matrix determinant
    /// lemma).
    fn log_det_n(&self, d: &[f64], sum_dinv: &[f64], ecorr2: &[f64]) -> f64 {
        d.iter().map(|v| v.ln()).sum::<f64>()
            + self
                .epochs
                .iter()
                .zip(sum_dinv)
                .map(|((b, _), s)| (ecorr2[*b] * s).ln_1p())
                .sum::<f64>()
    }

    fn check_theta(&self, theta: &[f64]) -> Result<()> {
        if theta.len() != self.params.len() {
            return Err(Error::setting(
                "parameters",
                format!(
                    "pulsar {}: expected {} hyperparameters, got {}",
                    self.label,
                    self.params.len(),
                    theta.len()
                ),
            ));
        }
        if let Some(i) = theta.iter().position(|v| !v.is_finite()) {
            return Err(Error::NonFinite {
                what: format!(
                    "the likelihood of pulsar {} (parameter {} is {})",
                    self.label, self.params[i].name, theta[i]
                ),
            });
        }
        Ok(())
    }

    fn evaluate(&self, theta: &[f64], grad: Option<&mut [f64]>) -> Result<f64> {
        self.check_theta(theta)?;
        if let Some(g) = &self.groups {
            return self.evaluate_grouped(theta, grad, g);
        }
        with_work(|w| {
            if let Some(grams) = &self.white_gram {
                // None: the white noise lies outside the interpolated range.
                let mut grad = grad;
                if let Some(v) = self.evaluate_interpolated(theta, grad.as_deref_mut(), grams, w)? {
                    return Ok(v);
                }
                return self.evaluate_in(theta, grad, w);
            }
            self.evaluate_in(theta, grad, w)
        })
    }

    /// Whether evaluations use grouped TOAs ([`Groups`]).
    pub fn grouped(&self) -> bool {
        self.groups.is_some()
    }

    /// The same likelihood evaluated TOA by TOA (for checks of the grouped form).
    pub fn ungrouped(mut self) -> Self {
        self.groups = None;
        self
    }

    /// Per backend, EFAC (1 when not a parameter) and EQUAD^2 (0 when not a parameter).
    fn backend_white(&self, theta: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let nb = self.backends.len();
        let mut efac = vec![1.0; nb];
        let mut equad2 = vec![0.0; nb];
        for (b, wi) in self.white_index.iter().enumerate() {
            if let Some(i) = wi.efac {
                efac[b] = theta[i];
            }
            if let Some(i) = wi.equad {
                equad2[b] = 10f64.powf(2.0 * theta[i]);
            }
        }
        (efac, equad2)
    }

    /// ln L of the compressed forms (grouped, interpolated) from their sums over TOAs: `s` =
    /// T^T N^-1 T (B^-1 is added here), `tnr` = T^T N^-1 r, `rnr` = r^T N^-1 r, and ln det N.
    /// r^T P r = r^T N^-1 r - (T^T N^-1 r)^T S^-1 (T^T N^-1 r) (Woodbury, as in [`FixedWhite`]).
    fn solve_compressed(
        &self,
        theta: &[f64],
        mut s: Array2<f64>,
        tnr: &Array1<f64>,
        rnr: f64,
        log_det_n: f64,
    ) -> Result<Compressed> {
        let (n, cols) = self.t.dim();
        let (phi, binv, red_share, common_share) = self.prior_variances(theta)?;
        for c in self.n_m..cols {
            s[[c, c]] += binv[c];
        }
        let chol = ScaledCholesky::from_owned(s, || {
            format!("S = B^-1 + T^T N^-1 T of pulsar {}", self.label)
        })?;
        let a = chol.solve_vec(tnr.as_slice().expect("contiguous"));
        let chi2 = rnr - a.dot(tnr);
        let log_det_b: f64 = phi[self.n_m..].iter().map(|p| p.ln()).sum();
        let lnl = -0.5 * (chi2 + log_det_n + log_det_b + chol.log_det())
            - 0.5 * (n - self.n_m) as f64 * (2.0 * PI).ln();
        if !lnl.is_finite() {
            return Err(Error::NonFinite {
                what: format!("the likelihood of pulsar {} (ln L)", self.label),
            });
        }
        Ok(Compressed {
            lnl,
            chol,
            a,
            binv,
            red_share,
            common_share,
        })
    }

    /// The red/DM/common part of the gradient of the compressed forms, from a = S^-1 T^T N^-1 r
    /// and S^-1, added to `grad`; then every entry is checked finite.
    fn prior_gradient(
        &self,
        a: &Array1<f64>,
        s_inv: &Array2<f64>,
        binv: &[f64],
        red_share: &[f64],
        common_share: &[f64],
        grad: &mut [f64],
    ) -> Result<()> {
        let cols = self.t.ncols();
        let mut h = vec![0.0; cols];
        for c in self.n_m..cols {
            h[c] = 0.5 * (a[c] * a[c] * binv[c] - 1.0 + s_inv[[c, c]] * binv[c]);
        }
        self.power_law_gradient(&h, red_share, common_share, grad);
        if let Some(k) = grad.iter().position(|g| !g.is_finite()) {
            return Err(Error::NonFinite {
                what: format!(
                    "the likelihood of pulsar {} (gradient in {})",
                    self.label, self.params[k].name
                ),
            });
        }
        Ok(())
    }

    /// [`Self::evaluate_in`] on grouped TOAs ([`Groups`]): the same formulas with the sums over
    /// TOAs taken per group.
    fn evaluate_grouped(
        &self,
        theta: &[f64],
        grad: Option<&mut [f64]>,
        groups: &Groups,
    ) -> Result<f64> {
        let non_finite = |what: &str| Error::NonFinite {
            what: format!("the likelihood of pulsar {} ({what})", self.label),
        };
        let cols = self.t.ncols();
        let (efac, equad2) = self.backend_white(theta);
        let ng = groups.count.len();
        let mut d = vec![0.0; ng];
        let mut s = Array2::<f64>::zeros((cols, cols));
        let mut tnr = Array1::<f64>::zeros(cols);
        let (mut rnr, mut log_det_n) = (0.0, 0.0);
        for k in 0..ng {
            let b = groups.backend[k];
            let dk = (efac[b] * groups.sigma[k]).powi(2) + equad2[b];
            if !(dk.is_finite() && dk > 0.0) {
                return Err(non_finite("white-noise variance not positive"));
            }
            d[k] = dk;
            s.scaled_add(1.0 / dk, &groups.gram[k]);
            tnr.scaled_add(1.0 / dk, &groups.tr[k]);
            rnr += groups.rr[k] / dk;
            log_det_n += groups.count[k] * dk.ln();
        }
        let Compressed {
            lnl,
            chol,
            a,
            binv,
            red_share,
            common_share,
        } = self.solve_compressed(theta, s, &tnr, rnr, log_det_n)?;
        let Some(grad) = grad else {
            return Ok(lnl);
        };
        self.clear_gradient(grad)?;
        let s_inv = chol.inverse();
        for k in 0..ng {
            let b = groups.backend[k];
            let wi = self.white_index[b];
            if wi.efac.is_none() && wi.equad.is_none() {
                continue;
            }
            let gk = &groups.gram[k];
            // |r_g - T_g a|^2 = |r_g|^2 - 2 a . t_g + a^T G_g a.
            let quad = groups.rr[k] - 2.0 * a.dot(&groups.tr[k]) + a.dot(&gk.dot(&a));
            let trace: f64 = s_inv.iter().zip(gk.iter()).map(|(x, y)| x * y).sum();
            let dk = d[k];
            // sum over the group of (P r)_i^2 - P_ii.
            let h = (quad + trace) / (dk * dk) - groups.count[k] / dk;
            let sg2 = groups.sigma[k] * groups.sigma[k];
            if let Some(i) = wi.efac {
                grad[i] += efac[b] * sg2 * h;
            }
            if let Some(i) = wi.equad {
                grad[i] += LN_10 * equad2[b] * h;
            }
        }
        self.prior_gradient(&a, &s_inv, &binv, &red_share, &common_share, grad)?;
        Ok(lnl)
    }

    /// ln L (and its gradient) from the interpolated per-backend Grams ([`crate::white_gram`])
    /// of X = [T | r | 1 | sigma]: with N_i = a_b (s_i + t_b), a_b = EFAC^2,
    /// t_b = EQUAD^2 / EFAC^2 and u_b = s_min + t_b, every sum over TOAs of an evaluation is a
    /// block of sum_b H_b(tau_b) / (a_b u_b) (T^T N^-1 T, T^T N^-1 r, r^T N^-1 r, sum N_i^-1,
    /// sum s_i N_i^-1) or of K0 = sum_i X_i X_i^T / N_i^2 = (H - H') / (a^2 u^2) and
    /// K1 = sum_i s_i X_i X_i^T / N_i^2 = (s_min H + t H') / (a^2 u^2) (H' = dH/dtau; from
    /// G(t) = H / u, dG/dt = (H' - H) / u^2), so an evaluation never touches T; ln det N
    /// alone is summed over the TOAs. As in the grouped form, r^T P r = r^T N^-1 r -
    /// (T^T N^-1 r)^T S^-1 (T^T N^-1 r) (Woodbury). The white-noise gradient needs, per backend,
    /// sum_i (P r)_i^2 = z^T K0 z with z = (-a, 1, 0, 0) (P r = N^-1 (r - T a)), the same with
    /// K1, and sum_i P_ii = sum_i N_i^-1 - tr(S^-1 K0_TT) (the Woodbury form of P's diagonal,
    /// Press et al. 2007, sec. 2.7.3), again with K1. Ok(None) when a backend's t lies outside
    /// the interpolated range.
    fn evaluate_interpolated(
        &self,
        theta: &[f64],
        grad: Option<&mut [f64]>,
        grams: &[BackendGram],
        w: &mut Work,
    ) -> Result<Option<f64>> {
        let non_finite = |what: &str| Error::NonFinite {
            what: format!("the likelihood of pulsar {} ({what})", self.label),
        };
        let cols = self.t.ncols();
        let dim = cols + 3;
        let nb = self.backends.len();
        let (efac, equad2) = self.backend_white(theta);
        let len = grams.first().map_or(0, |g| g.packed_len());
        w.gram_h.resize(2 * nb * len, 0.0);
        let mut tval = vec![0.0; nb];
        for (b, g) in grams.iter().enumerate() {
            let a = efac[b] * efac[b];
            tval[b] = equad2[b] / a;
            if !(a.is_finite() && a > 0.0 && tval[b].is_finite()) {
                return Ok(None);
            }
            let (h, dh) = w.gram_h[2 * b * len..(2 * b + 2) * len].split_at_mut(len);
            if !g.eval(tval[b], h, dh) {
                return Ok(None);
            }
        }
        let gram_h = &w.gram_h;
        let h_of = |b: usize| &gram_h[2 * b * len..(2 * b + 1) * len];
        let dh_of = |b: usize| &gram_h[(2 * b + 1) * len..(2 * b + 2) * len];
        // ln det N = sum_b [n_b ln a_b + sum_i ln(s_i + t_b)]; the logarithm of products of
        // four ratios (s_i + t) / u, each in [1, s_max / s_min], so one log per four TOAs.
        let mut log_det_n = 0.0;
        for (b, g) in grams.iter().enumerate() {
            let u = g.s_min + tval[b];
            let inv_u = 1.0 / u;
            let mut sum = 0.0;
            for chunk in g.s.chunks(4) {
                sum += chunk
                    .iter()
                    .map(|si| (si + tval[b]) * inv_u)
                    .product::<f64>()
                    .ln();
            }
            log_det_n += g.s.len() as f64 * (efac[b] * efac[b] * u).ln() + sum;
        }
        if !log_det_n.is_finite() {
            return Err(non_finite("white-noise variance not positive"));
        }
        let mut s = Array2::<f64>::zeros((cols, cols));
        let mut tnr = Array1::<f64>::zeros(cols);
        let mut rnr = 0.0;
        for (b, g) in grams.iter().enumerate() {
            let f = 1.0 / (efac[b] * efac[b] * (g.s_min + tval[b]));
            let h = h_of(b);
            add_packed(f, h, dim, &mut s);
            for (j, v) in tnr.iter_mut().enumerate() {
                *v += f * packed_entry(h, dim, j, cols);
            }
            rnr += f * packed_entry(h, dim, cols, cols);
        }
        mirror_upper(&mut s);
        let Compressed {
            lnl,
            chol,
            a,
            binv,
            red_share,
            common_share,
        } = self.solve_compressed(theta, s, &tnr, rnr, log_det_n)?;
        let Some(grad) = grad else {
            return Ok(Some(lnl));
        };
        self.clear_gradient(grad)?;
        let s_inv = chol.inverse();
        let mut z = vec![0.0; dim];
        z.iter_mut().zip(a.iter()).for_each(|(z, a)| *z = -a);
        z[cols] = 1.0;
        for (b, g) in grams.iter().enumerate() {
            let wi = self.white_index[b];
            if wi.efac.is_none() && wi.equad.is_none() {
                continue;
            }
            let (h, dh) = (h_of(b), dh_of(b));
            let (t, u, a2) = (tval[b], g.s_min + tval[b], efac[b] * efac[b]);
            let f = 1.0 / (a2 * u);
            let f2 = f * f;
            // sum N_i^-1, sum s_i N_i^-1.
            let d0 = f * packed_entry(h, dim, cols + 1, cols + 1);
            let d1 = f * packed_entry(h, dim, cols + 2, cols + 2);
            // sum (P r)_i^2 and sum s_i (P r)_i^2.
            let (qh, qdh) = (quadratic_form(h, &z), quadratic_form(dh, &z));
            let q0 = f2 * (qh - qdh);
            let q1 = f2 * (g.s_min * qh + t * qdh);
            let (tr_h, tr_dh) = (
                trace_product(&s_inv, h, dim),
                trace_product(&s_inv, dh, dim),
            );
            let tr_k0 = f2 * (tr_h - tr_dh);
            let tr_k1 = f2 * (g.s_min * tr_h + t * tr_dh);
            // 1/2 sum_i dN_i [(P r)_i^2 - P_ii], dN_i = 2 EFAC s_i or 2 ln 10 EQUAD^2.
            if let Some(i) = wi.efac {
                grad[i] += efac[b] * (q1 - d1 + tr_k1);
            }
            if let Some(i) = wi.equad {
                grad[i] += LN_10 * equad2[b] * (q0 - d0 + tr_k0);
            }
        }
        self.prior_gradient(&a, &s_inv, &binv, &red_share, &common_share, grad)?;
        Ok(Some(lnl))
    }

    /// An error unless `grad` has one entry per parameter.
    fn check_gradient(&self, grad: &[f64]) -> Result<()> {
        if grad.len() != self.params.len() {
            return Err(Error::setting(
                "gradient",
                "gradient buffer has the wrong length",
            ));
        }
        Ok(())
    }

    /// [`Self::check_gradient`], then every entry set to 0 for the sums that follow.
    fn clear_gradient(&self, grad: &mut [f64]) -> Result<()> {
        self.check_gradient(grad)?;
        grad.iter_mut().for_each(|g| *g = 0.0);
        Ok(())
    }

    fn evaluate_in(&self, theta: &[f64], grad: Option<&mut [f64]>, w: &mut Work) -> Result<f64> {
        let non_finite = |what: &str| Error::NonFinite {
            what: format!("the likelihood of pulsar {} ({what})", self.label),
        };
        let (n, cols) = self.t.dim();
        let WhiteValues {
            efac,
            equad2,
            ecorr2,
            tnr,
            log_det_n,
            ..
        } = self.fill_white(theta, w)?;
        let (phi, binv, red_share, common_share) = self.prior_variances(theta)?;

        // S = B^-1 + T^T N^-1 T, a = S^-1 T^T N^-1 r.
        let mut s = w.gram.clone();
        for c in self.n_m..cols {
            s[[c, c]] += binv[c];
        }
        let chol = ScaledCholesky::from_owned(s, || {
            format!("S = B^-1 + T^T N^-1 T of pulsar {}", self.label)
        })?;
        let a = chol.solve_vec(tnr.as_slice().expect("contiguous"));

        // r^T P r = |r - T a|^2_N^-1 + a^T B^-1 a: two non-negative terms, no cancellation.
        w.e.copy_from_slice(&w.wr);
        general_mat_vec_mul(-1.0, &w.wa, &a, 1.0, &mut ArrayViewMut1::from(&mut w.e[..]));
        let es = self.epoch_sums(w, &w.e);
        let chi2 = w.e.iter().map(|x| x * x).sum::<f64>() - es.dot(&es)
            + (self.n_m..cols).map(|c| binv[c] * a[c] * a[c]).sum::<f64>();
        let log_det_b: f64 = phi[self.n_m..].iter().map(|p| p.ln()).sum();
        let lnl = -0.5 * (chi2 + log_det_n + log_det_b + chol.log_det())
            - 0.5 * (n - self.n_m) as f64 * (2.0 * PI).ln();
        if !lnl.is_finite() {
            return Err(non_finite("ln L"));
        }
        let Some(grad) = grad else {
            return Ok(lnl);
        };
        self.clear_gradient(grad)?;

        // P r = N^-1 (r - T a), per TOA: D^-1/2 (e_i - D_i^-1/2 beta^(1/2) es_epoch); and
        // N^-1 T in place of D^-1/2 T, row by row.
        for i in 0..n {
            let k = self.epoch_of[i];
            let sd = w.sqrt_dinv[i];
            let mut row = w.wa.row_mut(i);
            if k == usize::MAX {
                w.pr[i] = sd * w.e[i];
            } else {
                let sb = w.sqrt_beta[k];
                w.pr[i] = sd * (w.e[i] - sd * sb * es[k]);
                row.scaled_add(-sd * sb, &w.v.row(k));
            }
            row *= sd;
        }
        // With X = N^-1 T, (N^-1 T S^-1 T^T N^-1)_ii = |Z_i|^2 for the rows of Z = X D^-1 L^-T
        // (one triangular solve with n right-hand sides, in place; S = D L L^T D).
        chol.whiten_rows(&mut w.wa);
        let z = &w.wa;

        // White noise: dD_ii = 2 EFAC sigma_i^2, or 2 ln 10 EQUAD^2, per backend;
        // diag(P)_i = (N^-1)_ii - |Z_i|^2.
        for i in 0..n {
            let k = self.epoch_of[i];
            let beta = if k == usize::MAX {
                0.0
            } else {
                w.sqrt_beta[k] * w.sqrt_beta[k]
            };
            let di = w.sqrt_dinv[i] * w.sqrt_dinv[i];
            let zi = z.row(i);
            let diag_p = di - beta * di * di - zi.dot(&zi);
            let b = self.backend[i];
            let h = w.pr[i] * w.pr[i] - diag_p;
            if let Some(k) = self.white_index[b].efac {
                grad[k] += 0.5 * 2.0 * efac[b] * self.sigma[i] * self.sigma[i] * h;
            }
            if let Some(k) = self.white_index[b].equad {
                grad[k] += 0.5 * 2.0 * LN_10 * equad2[b] * h;
            }
        }
        // ECORR: dC = 2 ln 10 c^2 1 1^T per epoch;
        // 1^T P 1 = s/(1 + c^2 s) - |sum of the epoch's rows of Z|^2.
        let mut z1 = Array1::<f64>::zeros(cols);
        for (k, (b, idx)) in self.epochs.iter().enumerate() {
            let Some(g) = self.white_index[*b].ecorr else {
                continue;
            };
            let c2 = ecorr2[*b];
            let one_pr: f64 = idx.iter().map(|&i| w.pr[i]).sum();
            z1.fill(0.0);
            for &i in idx {
                z1 += &z.row(i);
            }
            let one_p_one = w.sum_dinv[k] / (1.0 + c2 * w.sum_dinv[k]) - z1.dot(&z1);
            grad[g] += 0.5 * 2.0 * LN_10 * c2 * (one_pr * one_pr - one_p_one);
        }

        // Power laws: d ln L / d ln phi_j = 1/2 [a_j^2 / phi_j - (S^-1 T^T N^-1 T)_jj], and
        // (S^-1 T^T N^-1 T)_jj = 1 - (S^-1)_jj / phi_j since T^T N^-1 T = S - B^-1.
        let s_inv = chol.inverse_diagonal();
        let mut h = vec![0.0; cols];
        for c in self.n_m..cols {
            h[c] = 0.5 * (a[c] * a[c] * binv[c] - 1.0 + s_inv[c] * binv[c]);
        }
        self.power_law_gradient(&h, &red_share, &common_share, grad);
        if let Some(k) = grad.iter().position(|g| !g.is_finite()) {
            return Err(non_finite(&format!("gradient in {}", self.params[k].name)));
        }
        Ok(lnl)
    }
}
