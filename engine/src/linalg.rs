//! Dense linear algebra helpers: a diagonally scaled Cholesky factor with a clear error when a
//! matrix is not positive definite, and triangular solves through LAPACK.

use crate::error::{Error, Result};
use ndarray::{Array1, Array2, Axis};
use ndarray_linalg::{Cholesky, Diag, SolveTriangular, UPLO};

extern "C" {
    fn openblas_set_num_threads(n: std::ffi::c_int);
}

/// Make OpenBLAS single-threaded (once per process). The engine parallelises over pulsars and
/// trials with rayon; letting every BLAS call spawn its own threads on top oversubscribes the
/// cores (common practice for task-parallel code over a threaded BLAS).
pub fn single_threaded_blas() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    // SAFETY: a plain setter of OpenBLAS's thread count, called before any parallel BLAS use.
    ONCE.call_once(|| unsafe { openblas_set_num_threads(1) });
}

/// Cholesky factor of a symmetric positive-definite S, computed as S = D L L^T D with
/// D = diag(S)^(1/2). Scaling by the diagonal (Jacobi equilibration, Golub & Van Loan 2013,
/// sec. 3.5.2) leaves the answer unchanged and keeps badly scaled blocks (timing model next to
/// red-noise priors) well conditioned for the factorisation.
pub struct ScaledCholesky {
    /// Lower-triangular factor of the scaled matrix.
    l: Array2<f64>,
    /// D^-1 = diag(S)^(-1/2).
    dinv: Array1<f64>,
}

impl ScaledCholesky {
    /// Factor `s`; `what` names the matrix in the error.
    pub fn new(s: &Array2<f64>, what: &str) -> Result<Self> {
        let n = s.nrows();
        let mut dinv = Array1::zeros(n);
        for i in 0..n {
            let d = s[[i, i]];
            if !(d.is_finite() && d > 0.0) {
                return Err(Error::NotPositiveDefinite {
                    what: what.to_string(),
                    pivot: i + 1,
                });
            }
            dinv[i] = 1.0 / d.sqrt();
        }
        let mut scaled = s.clone();
        for ((i, j), v) in scaled.indexed_iter_mut() {
            *v *= dinv[i] * dinv[j];
        }
        let l = scaled.cholesky(UPLO::Lower).map_err(|e| {
            let pivot = match e {
                ndarray_linalg::error::LinalgError::Lapack(
                    lax::error::Error::LapackComputationalFailure { return_code },
                ) => return_code.max(0) as usize,
                _ => 0,
            };
            Error::NotPositiveDefinite {
                what: what.to_string(),
                pivot,
            }
        })?;
        Ok(ScaledCholesky { l, dinv })
    }

    /// L^-1 D^-1 b, so that b^T S^-1 c = (whiten b)^T (whiten c).
    pub fn whiten(&self, b: &Array2<f64>) -> Array2<f64> {
        let mut scaled = b.clone();
        for (mut row, &d) in scaled.axis_iter_mut(Axis(0)).zip(self.dinv.iter()) {
            row *= d;
        }
        self.l
            .solve_triangular(UPLO::Lower, Diag::NonUnit, &scaled)
            .expect("triangular solve of a valid factor")
    }

    /// log det S.
    pub fn log_det(&self) -> f64 {
        let ll: f64 = self.l.diag().iter().map(|v| 2.0 * v.ln()).sum();
        let dd: f64 = self.dinv.iter().map(|v| -2.0 * v.ln()).sum();
        ll + dd
    }
}

/// Lower Cholesky factor of a (well-scaled) symmetric positive-definite matrix.
pub fn cholesky_lower(s: &Array2<f64>, what: &str) -> Result<Array2<f64>> {
    s.cholesky(UPLO::Lower)
        .map_err(|_| Error::NotPositiveDefinite {
            what: what.to_string(),
            pivot: 0,
        })
}
