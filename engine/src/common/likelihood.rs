//! The exact likelihood of the reduced data for a common process (docs/common-process.md).
//!
//! Each pulsar is reduced without the common process in its auto-power, X_a = F^T P_a^-1 r_a
//! and Z_a = F^T P_a^-1 F. With Z = blockdiag(Z_a) and the common prior
//! Phi_c = A^2 Gamma (x) diag(phi_0(gamma)), the Woodbury identity gives (van Haasteren &
//! Vallisneri 2014, eqs. 22-27)
//!
//! ln L(A, gamma) - ln L(0) = 1/2 X^T (Phi_c^-1 + Z)^-1 X - 1/2 ln det(I + Phi_c Z).
//!
//! Writing Gamma (x) diag(phi_0) = H H^T with H = R (x) diag(phi_0)^(1/2), R R^T = Gamma, and
//! M = H^T Z H = V diag(mu) V^T, t = V^T H^T X, this is, for every A at O(dim) cost,
//!
//! ln L(A) - ln L(0) = -1/2 sum_i [ln(1 + A^2 mu_i) - A^2 t_i^2 / (1 + A^2 mu_i)].
//!
//! No inverse of Gamma or of Z is needed, so a rank-deficient Gamma (monopole: rank 1; dipole:
//! rank 3) loses nothing; for the uncorrelated process (CURN) M is block-diagonal per pulsar.

use crate::error::{Error, Result};
use crate::linalg::{single_threaded_blas, with_workspaces, ScaledCholesky};
use crate::noise::NoiseModel;
use crate::orf::{pattern_matrix, Pattern};
use crate::reduce::{reduce_release, FrequencyGrid, Reduced};
use crate::release::Release;
use crate::sky::Direction;
use crate::spectrum::template;
use ndarray::{Array1, Array2};
use rayon::prelude::*;
use std::os::raw::{c_char, c_int};

/// The inter-pulsar correlation of the common process.
#[derive(
    Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "lowercase")]
pub enum CommonModel {
    /// Common uncorrelated red noise: Gamma = I.
    Curn,
    /// Hellings-Downs correlations (Hellings & Downs 1983).
    Hd,
    /// Monopole, Gamma_ab = 1.
    Monopole,
    /// Dipole, Gamma_ab = cos zeta_ab.
    Dipole,
}

impl CommonModel {
    /// All models in reporting order.
    pub const ALL: [CommonModel; 4] = [
        CommonModel::Curn,
        CommonModel::Hd,
        CommonModel::Monopole,
        CommonModel::Dipole,
    ];

    /// Short name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            CommonModel::Curn => "curn",
            CommonModel::Hd => "hd",
            CommonModel::Monopole => "monopole",
            CommonModel::Dipole => "dipole",
        }
    }

    /// Parse a short name.
    pub fn from_name(s: &str) -> Option<CommonModel> {
        CommonModel::ALL.into_iter().find(|m| m.name() == s)
    }

    /// The correlation pattern of a correlated model (None for CURN).
    pub fn pattern(self) -> Option<Pattern> {
        match self {
            CommonModel::Curn => None,
            CommonModel::Hd => Some(Pattern::Hd),
            CommonModel::Monopole => Some(Pattern::Monopole),
            CommonModel::Dipole => Some(Pattern::Dipole),
        }
    }
}

/// The reduced data of an array with no common process in any auto-power: everything the
/// common-process likelihood needs.
#[derive(Clone, Debug)]
pub struct CommonData {
    pub labels: Vec<String>,
    pub directions: Vec<Direction>,
    /// X_a (length 2K each).
    pub x: Vec<Array1<f64>>,
    /// Z_a (2K x 2K each, positive definite).
    pub z: Vec<Array2<f64>>,
    /// Analysis frequencies (Hz), length K.
    pub freqs: Vec<f64>,
    /// Span T of the array (s).
    pub t_span: f64,
}

impl CommonData {
    /// Reduce every pulsar of `release` with its own noise from `noise` and no common process,
    /// on `k` analysis frequencies.
    pub fn from_release(release: &Release, noise: &NoiseModel, k: usize) -> Result<Self> {
        let grid = FrequencyGrid::for_release(release, k)?;
        let reduced = reduce_release(release, noise, &grid, None)?;
        Self::from_reduced(&reduced, &grid)
    }

    /// From pulsars already reduced without the common process. Checks that every Z_a is
    /// positive definite: a singular Z_a means the noise model leaves a Fourier direction of
    /// that pulsar with no information, and the common process there is not identifiable.
    pub fn from_reduced(reduced: &[Reduced], grid: &FrequencyGrid) -> Result<Self> {
        if reduced.is_empty() {
            return Err(Error::setting("release", "the release has no pulsars"));
        }
        for r in reduced {
            let what = format!(
                "Z = F^T P^-1 F of pulsar {} (its Fourier-basis precision without the common \
                 process; if its red or DM process or timing model absorbs a frequency, or it \
                 has fewer TOAs than twice the number of frequencies, use fewer frequencies or \
                 fix the noise model of {})",
                r.label, r.label
            );
            let chol = ScaledCholesky::new(&r.z, &what)?;
            // Exactly singular Z_a (more Fourier columns than the TOAs left after the timing
            // model, say) can factor with rounding-level pivots; a pivot below this is no
            // information at all in that direction (kappa_2 > 1e12: the likelihood would not be
            // accurate to the 1e-8 of docs/common-process.md anyway).
            let pivot = chol.smallest_pivot();
            if pivot < MIN_RELATIVE_PIVOT {
                return Err(Error::NotPositiveDefinite {
                    what: format!(
                        "{what}: numerically singular, smallest relative pivot {pivot:.1e}"
                    ),
                    pivot: 0,
                });
            }
        }
        Ok(CommonData {
            labels: reduced.iter().map(|r| r.label.clone()).collect(),
            directions: reduced.iter().map(|r| r.direction).collect(),
            x: reduced.iter().map(|r| r.x.clone()).collect(),
            z: reduced.iter().map(|r| r.z.clone()).collect(),
            freqs: grid.freqs.clone(),
            t_span: grid.t_span,
        })
    }

    /// Number of pulsars N.
    pub fn n_pulsars(&self) -> usize {
        self.x.len()
    }

    /// Number of frequencies K.
    pub fn k(&self) -> usize {
        self.freqs.len()
    }

    /// The template phi_0(gamma) (A = 1), length 2K (Lentati et al. 2013).
    pub fn phi0(&self, gamma: f64) -> Vec<f64> {
        template(gamma, &self.freqs, self.t_span)
    }

    /// The eigen form of the likelihood of `model` at spectral index `gamma`.
    pub fn amplitude_curve(&self, model: CommonModel, gamma: f64) -> Result<AmplitudeCurve> {
        single_threaded_blas();
        if !gamma.is_finite() {
            return Err(Error::setting(
                "spectral-index",
                format!("must be finite, got {gamma}"),
            ));
        }
        let d: Vec<f64> = self.phi0(gamma).iter().map(|p| p.sqrt()).collect();
        // Z~_a = D Z_a D and w_a = D X_a with D = diag(phi_0)^(1/2).
        let zt: Vec<Array2<f64>> = self
            .z
            .iter()
            .map(|z| Array2::from_shape_fn(z.dim(), |(i, j)| d[i] * z[[i, j]] * d[j]))
            .collect();
        let wt: Vec<Array1<f64>> = self
            .x
            .iter()
            .map(|x| Array1::from_shape_fn(x.len(), |i| d[i] * x[i]))
            .collect();
        let what = |m: CommonModel| {
            format!(
                "H^T Z H of the {} common process at spectral index {gamma}",
                m.name()
            )
        };
        let parts: Vec<(Vec<f64>, Vec<f64>)> = match model.pattern() {
            None => zt
                .par_iter()
                .zip(wt.par_iter())
                .map(|(z, w)| spectral_weights(z.clone(), w, &what(model)))
                .collect::<Result<_>>()?,
            Some(p) => {
                let r = pattern_root(&pattern_matrix(p, &self.directions), self.n_pulsars())?;
                let (m, w) = correlated_blocks(&r, &zt, &wt);
                vec![spectral_weights(m, &w, &what(model))?]
            }
        };
        let mut mu = Vec::new();
        let mut t2 = Vec::new();
        for (m, t) in parts {
            mu.extend(m);
            t2.extend(t);
        }
        Ok(AmplitudeCurve { mu, t2 })
    }
}

/// The smallest accepted squared pivot of a pulsar's diagonally scaled Z_a
/// ([`ScaledCholesky::smallest_pivot`]).
pub const MIN_RELATIVE_PIVOT: f64 = 1e-12;

/// R (N x r) with R R^T = Gamma from the symmetric eigendecomposition of the pattern matrix,
/// keeping eigenvalues above 1e-12 of the largest (rank-deficient patterns keep their rank:
/// 1 for the monopole, 3 for the dipole). A clearly negative eigenvalue is an error.
pub fn pattern_root(gamma: &[f64], n: usize) -> Result<Array2<f64>> {
    let g = Array2::from_shape_vec((n, n), gamma.to_vec()).expect("n x n pattern");
    let (vals, vecs) = symmetric_eigen(g, "the correlation pattern matrix")?;
    let top = vals.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let tol = 1e-12 * top.max(f64::MIN_POSITIVE);
    if let Some(v) = vals.iter().find(|&&v| v < -1e-9 * top) {
        return Err(Error::NotPositiveDefinite {
            what: format!(
                "the correlation pattern matrix (eigenvalue {v:e}, largest {top:e}; a pattern \
                 must be positive semi-definite)"
            ),
            pivot: 0,
        });
    }
    let keep: Vec<usize> = (0..n).filter(|&i| vals[i] > tol).collect();
    // `vecs` row i is eigenvector i.
    Ok(Array2::from_shape_fn((n, keep.len()), |(a, c)| {
        vecs[[keep[c], a]] * vals[keep[c]].sqrt()
    }))
}

/// M = (R^T (x) I) Z~ (R (x) I) and w = (R^T (x) I) w~ for block-diagonal Z~ = blockdiag(Z~_a):
/// M[(c, i), (d, j)] = sum_a R_ac R_ad Z~_a[i, j], formed as one matrix product
/// (r^2 x N) (N x (2K)^2). Shapes: M is (r 2K) x (r 2K), w has length r 2K.
fn correlated_blocks(
    r: &Array2<f64>,
    zt: &[Array2<f64>],
    wt: &[Array1<f64>],
) -> (Array2<f64>, Array1<f64>) {
    let (n, rank) = r.dim();
    let m2 = zt[0].nrows();
    let outer = Array2::from_shape_fn((rank * rank, n), |(cd, a)| {
        r[[a, cd / rank]] * r[[a, cd % rank]]
    });
    let zs = Array2::from_shape_fn((n, m2 * m2), |(a, ij)| zt[a][[ij / m2, ij % m2]]);
    let prod = outer.dot(&zs);
    let dim = rank * m2;
    let mut m = Array2::<f64>::zeros((dim, dim));
    for c in 0..rank {
        for dd in 0..rank {
            let row = prod.row(c * rank + dd);
            for i in 0..m2 {
                for j in 0..m2 {
                    m[[c * m2 + i, dd * m2 + j]] = row[i * m2 + j];
                }
            }
        }
    }
    let mut w = Array1::<f64>::zeros(dim);
    for (a, wa) in wt.iter().enumerate() {
        for c in 0..rank {
            let rac = r[[a, c]];
            for i in 0..m2 {
                w[c * m2 + i] += rac * wa[i];
            }
        }
    }
    (m, w)
}

/// Eigenvalues mu of the symmetric positive semi-definite `m` and t_i^2 = (v_i^T w)^2.
/// Rounding can leave eigenvalues of a semi-definite matrix slightly negative; those within
/// 1e-10 of the largest are set to 0, anything more negative is an error.
fn spectral_weights(m: Array2<f64>, w: &Array1<f64>, what: &str) -> Result<(Vec<f64>, Vec<f64>)> {
    if m.nrows() >= TRIDIAGONAL_MIN_DIM {
        let (vals, t2) = spectral_weights_tridiagonal(m, w, what)?;
        return finish_weights(vals, t2, what);
    }
    let (vals, vecs) = symmetric_eigen(m, what)?;
    let t = vecs.dot(w);
    let t2: Vec<f64> = t.iter().map(|v| v * v).collect();
    finish_weights(vals, t2, what)
}

/// From this dimension on, [`spectral_weights_tridiagonal`] replaces the full eigendecomposition.
const TRIDIAGONAL_MIN_DIM: usize = 200;

fn finish_weights(vals: Vec<f64>, t2: Vec<f64>, what: &str) -> Result<(Vec<f64>, Vec<f64>)> {
    let top = vals.iter().fold(0.0f64, |a, v| a.max(v.abs()));
    let mut mu = Vec::with_capacity(vals.len());
    for &v in &vals {
        if v < -1e-10 * top {
            return Err(Error::NotPositiveDefinite {
                what: format!("{what} (eigenvalue {v:e}, largest {top:e})"),
                pivot: 0,
            });
        }
        mu.push(v.max(0.0));
    }
    if t2.iter().chain(&mu).any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: what.to_string(),
        });
    }
    Ok((mu, t2))
}

/// Eigenvalues of `m` and t_i^2 = (v_i^T w)^2 without forming the eigenvectors of `m`:
/// a Householder reflector P_0 with P_0 w = -+|w| e_1 (Golub & Van Loan 2013, sec. 5.1.2),
/// M' = P_0 M P_0, then the two-stage reduction of M' to tridiagonal T = Q^T M' Q (LAPACK
/// dsytrd_2stage: dense to band by blocked reflectors, then bulge chasing; Haidar et al. 2011),
/// whose reflectors all act on rows 2..n so that Q e_1 = e_1, and the eigenpairs of T by MRRR
/// (dstemr; Dhillon & Parlett 2004). Then t_i = |w| s_i(1) with s_i the eigenvectors of T.
/// Cost: about (4/3) n^3 in level-3 BLAS against ~ (4/3 + 2 + ...) n^3 for the full
/// eigendecomposition. Checked against it in the tests below.
fn spectral_weights_tridiagonal(
    mut m: Array2<f64>,
    w: &Array1<f64>,
    what: &str,
) -> Result<(Vec<f64>, Vec<f64>)> {
    let n = m.nrows();
    if m.iter().chain(w.iter()).any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: what.to_string(),
        });
    }
    let beta = w.dot(w).sqrt();
    if beta > 0.0 {
        // u = (w + sign(w_1) beta e_1) / |.|, P_0 = I - 2 u u^T.
        let mut u = w.clone();
        u[0] += beta.copysign(w[0]);
        let un = u.dot(&u).sqrt();
        u /= un;
        let p = m.dot(&u);
        let q = &p * 2.0 - &u * (2.0 * u.dot(&p));
        for i in 0..n {
            for j in 0..n {
                m[[i, j]] -= u[i] * q[j] + q[i] * u[j];
            }
        }
    }
    let mut a = m
        .as_standard_layout()
        .into_owned()
        .into_raw_vec_and_offset()
        .0;
    let ni = c_int::try_from(n).expect("dimension fits a LAPACK int");
    let (vect, uplo) = (b'N' as c_char, b'L' as c_char);
    let mut d = vec![0.0; n];
    let mut e = vec![0.0; n];
    let mut tau = vec![0.0; n];
    let mut info: c_int = 0;
    // SAFETY: a is n x n, d, e and tau have n elements, the workspaces their stated lengths.
    with_workspaces(|hous: &mut [f64], lh, work: &mut [f64], lw| unsafe {
        dsytrd_2stage_(
            &vect,
            &uplo,
            &ni,
            a.as_mut_ptr(),
            &ni,
            d.as_mut_ptr(),
            e.as_mut_ptr(),
            tau.as_mut_ptr(),
            hous.as_mut_ptr(),
            &lh,
            work.as_mut_ptr(),
            &lw,
            &mut info,
        );
    });
    if info != 0 {
        return Err(Error::NonFinite {
            what: format!("the tridiagonal reduction of {what} (LAPACK dsytrd_2stage info {info})"),
        });
    }
    drop(a);
    let (d_copy, e_copy) = (d.clone(), e.clone());
    let (jobz, range) = (b'V' as c_char, b'A' as c_char);
    let (vl, vu, il, iu) = (0.0f64, 0.0f64, 0 as c_int, 0 as c_int);
    let mut found: c_int = 0;
    let mut vals = vec![0.0; n];
    let mut z = vec![0.0; n * n];
    let mut isuppz: Vec<c_int> = vec![0; 2 * n];
    let mut tryrac: c_int = 1;
    // SAFETY: d, e have n elements, z is n x n column-major (nzc = n suffices with
    // RANGE = 'A'), isuppz 2n, the workspaces their stated lengths.
    with_workspaces(|work: &mut [f64], lw, iwork: &mut [c_int], liw| unsafe {
        dstemr_(
            &jobz,
            &range,
            &ni,
            d.as_mut_ptr(),
            e.as_mut_ptr(),
            &vl,
            &vu,
            &il,
            &iu,
            &mut found,
            vals.as_mut_ptr(),
            z.as_mut_ptr(),
            &ni,
            &ni,
            isuppz.as_mut_ptr(),
            &mut tryrac,
            work.as_mut_ptr(),
            &lw,
            iwork.as_mut_ptr(),
            &liw,
            &mut info,
        );
    });
    if info != 0 || found as usize != n {
        // MRRR can fail on clusters of tiny eigenvalues; divide and conquer (dstedc,
        // Cuppen 1981) is slower but always succeeds on a finite tridiagonal matrix.
        let (v, zz) = tridiagonal_eigen_dc(d_copy, e_copy, what)?;
        vals = v;
        z = zz;
    }
    // Column i of z (column-major) is eigenvector i; its first component is z[i * n].
    let t2 = (0..n).map(|i| (beta * z[i * n]).powi(2)).collect();
    Ok((vals, t2))
}

/// Eigenpairs of the symmetric tridiagonal (d, e) by LAPACK dstedc; z column-major n x n.
fn tridiagonal_eigen_dc(
    mut d: Vec<f64>,
    mut e: Vec<f64>,
    what: &str,
) -> Result<(Vec<f64>, Vec<f64>)> {
    let n = d.len();
    let ni = c_int::try_from(n).expect("dimension fits a LAPACK int");
    let compz = b'I' as c_char;
    let mut z = vec![0.0; n * n];
    let mut info: c_int = 0;
    // SAFETY: d, e have n elements, z is n x n, the workspaces their stated lengths.
    with_workspaces(|work: &mut [f64], lw, iwork: &mut [c_int], liw| unsafe {
        dstedc_(
            &compz,
            &ni,
            d.as_mut_ptr(),
            e.as_mut_ptr(),
            z.as_mut_ptr(),
            &ni,
            work.as_mut_ptr(),
            &lw,
            iwork.as_mut_ptr(),
            &liw,
            &mut info,
        );
    });
    if info != 0 {
        return Err(Error::NonFinite {
            what: format!("the tridiagonal eigenproblem of {what} (LAPACK dstedc info {info})"),
        });
    }
    Ok((d, z))
}

extern "C" {
    fn dstedc_(
        compz: *const c_char,
        n: *const c_int,
        d: *mut f64,
        e: *mut f64,
        z: *mut f64,
        ldz: *const c_int,
        work: *mut f64,
        lwork: *const c_int,
        iwork: *mut c_int,
        liwork: *const c_int,
        info: *mut c_int,
    );
}

extern "C" {
    // LAPACK two-stage tridiagonal reduction and MRRR tridiagonal eigensolver (OpenBLAS).
    fn dsytrd_2stage_(
        vect: *const c_char,
        uplo: *const c_char,
        n: *const c_int,
        a: *mut f64,
        lda: *const c_int,
        d: *mut f64,
        e: *mut f64,
        tau: *mut f64,
        hous2: *mut f64,
        lhous2: *const c_int,
        work: *mut f64,
        lwork: *const c_int,
        info: *mut c_int,
    );
    fn dstemr_(
        jobz: *const c_char,
        range: *const c_char,
        n: *const c_int,
        d: *mut f64,
        e: *mut f64,
        vl: *const f64,
        vu: *const f64,
        il: *const c_int,
        iu: *const c_int,
        m: *mut c_int,
        w: *mut f64,
        z: *mut f64,
        ldz: *const c_int,
        nzc: *const c_int,
        isuppz: *mut c_int,
        tryrac: *mut c_int,
        work: *mut f64,
        lwork: *const c_int,
        iwork: *mut c_int,
        liwork: *const c_int,
        info: *mut c_int,
    );
}

extern "C" {
    // LAPACK dsyevd (divide and conquer, Anderson et al. 1999), provided by the linked OpenBLAS.
    fn dsyevd_(
        jobz: *const c_char,
        uplo: *const c_char,
        n: *const c_int,
        a: *mut f64,
        lda: *const c_int,
        w: *mut f64,
        work: *mut f64,
        lwork: *const c_int,
        iwork: *mut c_int,
        liwork: *const c_int,
        info: *mut c_int,
    );
}

/// Symmetric eigendecomposition by LAPACK dsyevd: eigenvalues ascending and the eigenvectors as
/// the ROWS of the returned n x n matrix (so `vecs.dot(w)` is V^T w).
pub fn symmetric_eigen(m: Array2<f64>, what: &str) -> Result<(Vec<f64>, Array2<f64>)> {
    let n = m.nrows();
    assert_eq!(m.ncols(), n, "symmetric_eigen: square matrix");
    if n == 0 {
        return Ok((Vec::new(), m));
    }
    if m.iter().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: what.to_string(),
        });
    }
    // Row-major symmetric == column-major symmetric; column-major eigenvectors are row-major rows.
    let mut a = m
        .as_standard_layout()
        .into_owned()
        .into_raw_vec_and_offset()
        .0;
    let ni = c_int::try_from(n).expect("dimension fits a LAPACK int");
    let mut w = vec![0.0; n];
    let (jobz, uplo) = (b'V' as c_char, b'L' as c_char);
    let mut info: c_int = 0;
    // SAFETY: a is n x n, w has n elements, the workspaces their stated lengths.
    with_workspaces(|work: &mut [f64], lw, iwork: &mut [c_int], liw| unsafe {
        dsyevd_(
            &jobz,
            &uplo,
            &ni,
            a.as_mut_ptr(),
            &ni,
            w.as_mut_ptr(),
            work.as_mut_ptr(),
            &lw,
            iwork.as_mut_ptr(),
            &liw,
            &mut info,
        );
    });
    if info != 0 {
        return Err(Error::NonFinite {
            what: format!("the eigendecomposition of {what} (LAPACK dsyevd info {info})"),
        });
    }
    Ok((w, Array2::from_shape_vec((n, n), a).expect("n x n")))
}

/// The likelihood of one (model, gamma) as a function of the amplitude: eigenvalues mu_i of
/// H^T Z H and squared projections t_i^2 of H^T X (docs/common-process.md).
#[derive(Clone, Debug)]
pub struct AmplitudeCurve {
    pub mu: Vec<f64>,
    pub t2: Vec<f64>,
}

impl AmplitudeCurve {
    /// ln L(A) - ln L(0) at A^2 = `a2`:
    /// -1/2 sum_i [ln(1 + a2 mu_i) - a2 t_i^2 / (1 + a2 mu_i)].
    pub fn log_likelihood_ratio(&self, a2: f64) -> f64 {
        let mut s = 0.0;
        for (&m, &t) in self.mu.iter().zip(&self.t2) {
            let q = a2 * m;
            s += (a2 * t) / (1.0 + q) - q.ln_1p();
        }
        0.5 * s
    }

    /// ln L - ln L(0) at log10 A = `u`.
    pub fn at_log10(&self, u: f64) -> f64 {
        self.log_likelihood_ratio(10f64.powf(2.0 * u))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray_linalg::{Cholesky, Determinant, Inverse, UPLO};

    #[test]
    fn eigen_form_matches_the_woodbury_form() {
        // A random-ish symmetric positive definite Z and S = H H^T of rank 2.
        let n = 6;
        let b = Array2::from_shape_fn((n, n), |(i, j)| ((i * 7 + j * 3) % 5) as f64 - 1.7);
        let z = b.t().dot(&b) + Array2::<f64>::eye(n) * 0.3;
        let h = Array2::from_shape_fn((n, 2), |(i, j)| (i as f64 + 1.0) * (j as f64 - 0.4));
        let x = Array1::from_shape_fn(n, |i| (i as f64 * 0.9).sin());
        let (mu, t2) = spectral_weights(h.t().dot(&z).dot(&h), &h.t().dot(&x), "m").unwrap();
        let curve = AmplitudeCurve { mu, t2 };
        for a2 in [0.0, 1e-3, 0.1, 1.0, 37.0] {
            // Direct: X ~ N(0, Z + Z Phi Z), Phi = a2 H H^T (X a sufficient statistic).
            let phi = h.dot(&h.t()) * a2;
            let c = &z + &z.dot(&phi).dot(&z);
            let ll = |c: &Array2<f64>| {
                let (_, ld) = c.sln_det().unwrap();
                -0.5 * x.dot(&c.inv().unwrap().dot(&x)) - 0.5 * ld
            };
            let want = ll(&c) - ll(&z);
            let got = curve.log_likelihood_ratio(a2);
            assert!(
                (got - want).abs() < 1e-10 * want.abs().max(1.0),
                "{got} {want}"
            );
        }
        let _ = z.cholesky(UPLO::Lower).unwrap();
    }

    #[test]
    fn tridiagonal_route_matches_the_full_eigendecomposition() {
        // Same likelihood curve from dsytrd_2stage + dstemr as from dsyevd, on a 300 x 300
        // positive semi-definite M with a spread of eigenvalues (rounding-level agreement).
        let n = 300;
        let b = Array2::from_shape_fn((n, n / 2), |(i, j)| {
            ((i * 37 + j * 11) % 29) as f64 / 29.0 - 0.45 + if i == 2 * j { 3.0 } else { 0.0 }
        });
        let m = b.dot(&b.t());
        let w = Array1::from_shape_fn(n, |i| (i as f64 * 0.37).cos() * 5.0);
        let (vals, vecs) = symmetric_eigen(m.clone(), "m").unwrap();
        let t = vecs.dot(&w);
        let full = AmplitudeCurve {
            mu: vals.iter().map(|v| v.max(0.0)).collect(),
            t2: t.iter().map(|v| v * v).collect(),
        };
        let (mu, t2) = spectral_weights_tridiagonal(m, &w, "m").unwrap();
        let tri = AmplitudeCurve {
            mu: mu.iter().map(|v| v.max(0.0)).collect(),
            t2,
        };
        let total: f64 = tri.t2.iter().sum();
        assert!((total / w.dot(&w) - 1.0).abs() < 1e-12, "sum t^2 = |w|^2");
        for a2 in [1e-4, 1e-2, 1.0, 100.0] {
            let (x, y) = (full.log_likelihood_ratio(a2), tri.log_likelihood_ratio(a2));
            assert!(
                (x - y).abs() < 1e-9 * x.abs().max(1.0),
                "a2 {a2}: {x} vs {y}"
            );
        }
    }

    #[test]
    fn a_degenerate_noise_model_is_refused_with_the_pulsar_named() {
        // Z_a with a direction carrying no information (a zero row and column).
        let mut z = Array2::<f64>::eye(4);
        z[[2, 2]] = 0.0;
        let r = Reduced {
            label: "P07".into(),
            direction: [0.0, 0.0, 1.0],
            x: Array1::zeros(4),
            z,
            flops: 0.0,
        };
        let grid = FrequencyGrid::new(55000.0, 58000.0, 2).unwrap();
        let e = CommonData::from_reduced(&[r], &grid)
            .unwrap_err()
            .to_string();
        assert!(e.contains("P07") && e.contains("fewer frequencies"), "{e}");
        assert!(CommonData::from_reduced(&[], &grid).is_err());
    }

    #[test]
    fn monopole_root_has_rank_one() {
        let g = vec![1.0; 9];
        let r = pattern_root(&g, 3).unwrap();
        assert_eq!(r.ncols(), 1);
        let back = r.dot(&r.t());
        assert!(back.iter().all(|v| (v - 1.0).abs() < 1e-12));
    }
}
