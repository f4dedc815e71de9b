//! Dense linear algebra helpers: a diagonally scaled Cholesky factor with a clear error when a
//! matrix is not positive definite, triangular solves through LAPACK, and square roots of
//! positive semi-definite matrices.

use crate::error::{Error, Result};
use ndarray::{Array1, Array2, Axis};
use ndarray_linalg::{Cholesky, Diag, Eigh, SolveTriangular, UPLO};

extern "C" {
    fn openblas_set_num_threads(n: std::ffi::c_int);
    fn cblas_dsyrk(
        order: std::ffi::c_int,
        uplo: std::ffi::c_int,
        trans: std::ffi::c_int,
        n: std::ffi::c_int,
        k: std::ffi::c_int,
        alpha: f64,
        a: *const f64,
        lda: std::ffi::c_int,
        beta: f64,
        c: *mut f64,
        ldc: std::ffi::c_int,
    );
    fn cblas_dtrsm(
        order: std::ffi::c_int,
        side: std::ffi::c_int,
        uplo: std::ffi::c_int,
        trans: std::ffi::c_int,
        diag: std::ffi::c_int,
        m: std::ffi::c_int,
        n: std::ffi::c_int,
        alpha: f64,
        a: *const f64,
        lda: std::ffi::c_int,
        b: *mut f64,
        ldb: std::ffi::c_int,
    );
    fn cblas_dtrsv(
        order: std::ffi::c_int,
        uplo: std::ffi::c_int,
        trans: std::ffi::c_int,
        diag: std::ffi::c_int,
        n: std::ffi::c_int,
        a: *const f64,
        lda: std::ffi::c_int,
        x: *mut f64,
        incx: std::ffi::c_int,
    );
    fn dtrtri_(
        uplo: *const std::ffi::c_char,
        diag: *const std::ffi::c_char,
        n: *const std::ffi::c_int,
        a: *mut f64,
        lda: *const std::ffi::c_int,
        info: *mut std::ffi::c_int,
    );
    fn dpotrf_(
        uplo: *const std::ffi::c_char,
        n: *const std::ffi::c_int,
        a: *mut f64,
        lda: *const std::ffi::c_int,
        info: *mut std::ffi::c_int,
    );
    fn dsyev_2stage_(
        jobz: *const std::ffi::c_char,
        uplo: *const std::ffi::c_char,
        n: *const std::ffi::c_int,
        a: *mut f64,
        lda: *const std::ffi::c_int,
        w: *mut f64,
        work: *mut f64,
        lwork: *const std::ffi::c_int,
        info: *mut std::ffi::c_int,
    );
}

const CBLAS_ROW_MAJOR: std::ffi::c_int = 101;
const CBLAS_TRANS: std::ffi::c_int = 112;
const CBLAS_UPPER: std::ffi::c_int = 121;
const CBLAS_NO_TRANS: std::ffi::c_int = 111;
const CBLAS_LOWER: std::ffi::c_int = 122;
const CBLAS_NON_UNIT: std::ffi::c_int = 131;
const CBLAS_RIGHT: std::ffi::c_int = 142;

/// A matrix dimension as a BLAS integer.
fn blas_int(v: usize) -> std::ffi::c_int {
    std::ffi::c_int::try_from(v).expect("matrix dimension fits a BLAS int")
}

/// Floating-point operations of `syrk_tn` on an `rows x cols` matrix: the upper triangle of
/// A^T A, cols (cols + 1) / 2 inner products of length rows, each rows multiplies and adds.
pub fn syrk_flops(rows: usize, cols: usize) -> f64 {
    rows as f64 * cols as f64 * (cols as f64 + 1.0)
}

/// c <- alpha A^T A + beta c on the upper triangle only (BLAS dsyrk, Dongarra et al. 1990):
/// half the work of the general product, since A^T A is symmetric. `a` is rows x cols in
/// standard (row-major) layout, `c` is cols x cols in standard layout. Call [`mirror_upper`]
/// once the last update is done.
pub fn syrk_tn(alpha: f64, a: &Array2<f64>, beta: f64, c: &mut Array2<f64>) {
    let (rows, cols) = a.dim();
    assert_eq!(c.dim(), (cols, cols), "syrk_tn: c must be cols x cols");
    if rows == 0 || cols == 0 {
        if beta != 1.0 {
            c.mapv_inplace(|v| v * beta);
        }
        return;
    }
    let a = a.as_standard_layout();
    assert!(
        c.is_standard_layout(),
        "syrk_tn: c must be in standard layout"
    );
    let to_int = blas_int;
    // SAFETY: both buffers are contiguous row-major with the leading dimensions given; dsyrk
    // reads rows x cols of `a` and writes the upper triangle of the cols x cols `c`.
    unsafe {
        cblas_dsyrk(
            CBLAS_ROW_MAJOR,
            CBLAS_UPPER,
            CBLAS_TRANS,
            to_int(cols),
            to_int(rows),
            alpha,
            a.as_ptr(),
            to_int(cols),
            beta,
            c.as_mut_ptr(),
            to_int(cols),
        );
    }
}

/// X = U V^T for matrices with few rows and long rows (row-major `u`: r x len, `v`: s x len),
/// where a general matrix product spends most of its time packing: X[a, b] = u_a . v_b, each
/// dot summed in eight interleaved partial sums (element k into sum k mod 8, in increasing k)
/// that are then added pairwise ((0+4)+(2+6))+((1+5)+(3+7)). Multiplications and additions are
/// separate IEEE operations (no fused multiply-add), so the result is the same bytes on every
/// CPU, whatever vector width the run-time dispatch picks, and whatever the thread count.
pub fn row_dots(u: &[f64], v: &[f64], len: usize) -> Array2<f64> {
    assert!(
        len > 0 && u.len().is_multiple_of(len) && v.len().is_multiple_of(len),
        "row_dots: whole rows"
    );
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx512f") {
            // SAFETY: the CPU has AVX-512F (checked just above).
            return unsafe { row_dots_avx512(u, v, len) };
        }
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has AVX2 (checked just above).
            return unsafe { row_dots_avx2(u, v, len) };
        }
    }
    row_dots_generic(u, v, len)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn row_dots_avx512(u: &[f64], v: &[f64], len: usize) -> Array2<f64> {
    row_dots_generic(u, v, len)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn row_dots_avx2(u: &[f64], v: &[f64], len: usize) -> Array2<f64> {
    row_dots_generic(u, v, len)
}

/// Lanes of the partial sums of [`row_dots`].
const LANES: usize = 8;
/// Elements per chunk of [`row_dots`]: the chunk of every row of U and V stays in cache while
/// every (row of U, row of V) block passes over it.
const DOT_CHUNK: usize = 512;

#[inline(always)]
fn row_dots_generic(u: &[f64], v: &[f64], len: usize) -> Array2<f64> {
    let (r, s) = (u.len() / len, v.len() / len);
    // Partial sums of every (a, b), LANES each, carried from chunk to chunk.
    let mut acc = vec![[0.0f64; LANES]; r * s];
    let body = len - len % LANES;
    let mut k0 = 0;
    while k0 < body {
        let k1 = (k0 + DOT_CHUNK).min(body);
        // Blocks of 2 rows of U by 4 rows of V (eight sums in registers), then the edges.
        let mut a = 0;
        while a < r {
            let ra = if a + 2 <= r { 2 } else { 1 };
            let mut b = 0;
            while b < s {
                let rb = if b + 4 <= s { 4 } else { 1 };
                match (ra, rb) {
                    (2, 4) => dot_block::<2, 4>(u, v, len, a, b, s, k0, k1, &mut acc),
                    (2, 1) => dot_block::<2, 1>(u, v, len, a, b, s, k0, k1, &mut acc),
                    (1, 4) => dot_block::<1, 4>(u, v, len, a, b, s, k0, k1, &mut acc),
                    _ => dot_block::<1, 1>(u, v, len, a, b, s, k0, k1, &mut acc),
                }
                b += rb;
            }
            a += ra;
        }
        k0 = k1;
    }
    Array2::from_shape_fn((r, s), |(a, b)| {
        let mut p = acc[a * s + b];
        // The last len % LANES elements go to lanes 0.. in order.
        for (l, k) in (body..len).enumerate() {
            p[l] += u[a * len + k] * v[b * len + k];
        }
        ((p[0] + p[4]) + (p[2] + p[6])) + ((p[1] + p[5]) + (p[3] + p[7]))
    })
}

/// The partial sums of rows a..a+RA of U with rows b..b+RB of V over elements k0..k1.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn dot_block<const RA: usize, const RB: usize>(
    u: &[f64],
    v: &[f64],
    len: usize,
    a: usize,
    b: usize,
    s: usize,
    k0: usize,
    k1: usize,
    acc: &mut [[f64; LANES]],
) {
    let mut sums = [[[0.0f64; LANES]; RB]; RA];
    for (i, row) in sums.iter_mut().enumerate() {
        for (j, x) in row.iter_mut().enumerate() {
            *x = acc[(a + i) * s + b + j];
        }
    }
    let ur: [&[f64]; RA] = std::array::from_fn(|i| &u[(a + i) * len + k0..(a + i) * len + k1]);
    let vr: [&[f64]; RB] = std::array::from_fn(|j| &v[(b + j) * len + k0..(b + j) * len + k1]);
    for g in 0..(k1 - k0) / LANES {
        let us: [&[f64; LANES]; RA] = std::array::from_fn(|i| {
            ur[i][g * LANES..(g + 1) * LANES]
                .try_into()
                .expect("one lane group")
        });
        let vs: [&[f64; LANES]; RB] = std::array::from_fn(|j| {
            vr[j][g * LANES..(g + 1) * LANES]
                .try_into()
                .expect("one lane group")
        });
        for i in 0..RA {
            for j in 0..RB {
                for l in 0..LANES {
                    sums[i][j][l] += us[i][l] * vs[j][l];
                }
            }
        }
    }
    for (i, row) in sums.iter().enumerate() {
        for (j, x) in row.iter().enumerate() {
            acc[(a + i) * s + b + j] = *x;
        }
    }
}

/// Copy the upper triangle of a square matrix into its lower triangle.
pub fn mirror_upper(c: &mut Array2<f64>) {
    let n = c.nrows();
    for i in 0..n {
        for j in 0..i {
            c[[i, j]] = c[[j, i]];
        }
    }
}

/// The eigenvalues (ascending) of a symmetric matrix, of which only the lower triangle is read
/// (and overwritten): LAPACK's two-stage reduction to tridiagonal form, dense to band by blocked
/// BLAS-3 updates and band to tridiagonal by bulge chasing, then the implicit QL/QR iteration
/// (`dsyev_2stage`; Haidar, Ltaief & Dongarra 2011; Anderson et al. 1999). The one-stage
/// reduction (`dsyev`) spends half its operations in matrix-vector products that stream the
/// whole matrix from memory once per column; the two-stage form does the same job mostly from
/// cache. None is returned when LAPACK reports failure (no convergence, or a non-finite entry).
pub fn symmetric_eigenvalues(mut a: Array2<f64>) -> Option<Vec<f64>> {
    let n = a.nrows();
    if a.ncols() != n || n == 0 || a.iter().any(|v| !v.is_finite()) {
        return None;
    }
    let ni = std::ffi::c_int::try_from(n).ok()?;
    if !a.is_standard_layout() {
        a = a.as_standard_layout().into_owned();
    }
    // Row-major storage of a symmetric matrix is its column-major transpose: the lower
    // triangle for LAPACK is the upper triangle of the row-major array, and both are filled.
    let (jobz, uplo) = (b'N' as std::ffi::c_char, b'L' as std::ffi::c_char);
    let mut w = vec![0.0; n];
    let mut info: std::ffi::c_int = 0;
    // SAFETY: `a` is a contiguous n x n array, `w` holds n values, `work` its stated length.
    with_workspace(|work: &mut [f64], lwork| unsafe {
        dsyev_2stage_(
            &jobz,
            &uplo,
            &ni,
            a.as_mut_ptr(),
            &ni,
            w.as_mut_ptr(),
            work.as_mut_ptr(),
            &lwork,
            &mut info,
        );
    });
    (info == 0 && w.iter().all(|v| v.is_finite())).then_some(w)
}

/// A LAPACK workspace element: the size a workspace query returns in its first element.
pub(crate) trait Workspace: Copy + Default {
    fn size(self) -> usize;
}

impl Workspace for f64 {
    fn size(self) -> usize {
        self as usize
    }
}

impl Workspace for std::ffi::c_int {
    fn size(self) -> usize {
        usize::try_from(self).unwrap_or(0)
    }
}

/// LAPACK's workspace protocol for a routine with two workspaces (Anderson et al. 1999,
/// LAPACK Users' Guide, "workspace query"): `call(w1, l1, w2, l2)` once with l1 = l2 = -1, which
/// returns the sizes needed in w1[0] and w2[0], then with workspaces of those sizes (at least 1).
pub(crate) fn with_workspaces<A: Workspace, B: Workspace>(
    mut call: impl FnMut(&mut [A], std::ffi::c_int, &mut [B], std::ffi::c_int),
) {
    let (mut q1, mut q2) = ([A::default()], [B::default()]);
    call(&mut q1, -1, &mut q2, -1);
    let (n1, n2) = (q1[0].size().max(1), q2[0].size().max(1));
    let (mut w1, mut w2) = (vec![A::default(); n1], vec![B::default(); n2]);
    let len = |n: usize| std::ffi::c_int::try_from(n).unwrap_or(std::ffi::c_int::MAX);
    call(&mut w1, len(n1), &mut w2, len(n2));
}

/// [`with_workspaces`] for a routine with one workspace.
pub(crate) fn with_workspace<A: Workspace>(mut call: impl FnMut(&mut [A], std::ffi::c_int)) {
    with_workspaces(|w: &mut [A], l, _: &mut [std::ffi::c_int], _| call(w, l));
}

/// Make OpenBLAS single-threaded (once per process). The engine parallelises over pulsars and
/// trials with rayon; letting every BLAS call spawn its own threads on top oversubscribes the
/// cores (common practice for task-parallel code over a threaded BLAS).
pub fn single_threaded_blas() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    // SAFETY: a plain setter of OpenBLAS's thread count, called before any parallel BLAS use.
    ONCE.call_once(|| unsafe { openblas_set_num_threads(1) });
}

/// A zeroed `rows x cols` matrix for a large work array (the joint covariance: 63 MB at
/// 100 pulsars and K = 14). On Linux its memory is offered to the kernel as transparent huge
/// pages (`madvise(MADV_HUGEPAGE)`, Linux `madvise(2)`) before it is first written, so that
/// filling it takes one page fault per 2 MB instead of one per 4 kB; in a virtual machine a page
/// fault is costly, and the 4 kB faults of that one matrix were a fifth of `correlate`'s CPU time
/// at 100 x 2,400 (docs/performance.md). The values are the same zeros either way.
pub fn zeros_large(rows: usize, cols: usize) -> Array2<f64> {
    let v = vec![0.0f64; rows * cols];
    #[cfg(target_os = "linux")]
    {
        const HUGE: usize = 2 << 20;
        let bytes = std::mem::size_of_val(v.as_slice());
        if bytes >= 2 * HUGE {
            let begin = v.as_ptr() as usize;
            let start = begin.div_ceil(HUGE) * HUGE;
            let end = (begin + bytes) / HUGE * HUGE;
            if end > start {
                // SAFETY: [start, end) lies inside the allocation of `v`, which this function
                // owns; MADV_HUGEPAGE is advice on how to back it and changes no contents. A
                // failure (a kernel without transparent huge pages) leaves 4 kB pages.
                unsafe {
                    libc::madvise(start as *mut libc::c_void, end - start, libc::MADV_HUGEPAGE);
                }
            }
        }
    }
    Array2::from_shape_vec((rows, cols), v).expect("rows x cols values")
}

/// Let the process keep the memory it frees for its next allocations (glibc `mallopt`:
/// `M_MMAP_THRESHOLD` at its largest, 32 MB, and a 1 GB `M_TRIM_THRESHOLD`; glibc manual,
/// "Malloc Tunable Parameters"). By default glibc maps every block above a threshold afresh
/// and returns it on free, so each pulsar's work arrays (the whitened basis: 5 to 10 MB at
/// 10,000 TOAs) came as new pages, each page faulted in and zeroed by the kernel: about 40 % of
/// the page faults of `correlate` at 100 x 10,000 (docs/performance.md). Blocks above 32 MB
/// (the joint covariance) are still mapped ([`zeros_large`]). Called once by the command-line
/// program at start; a library caller keeps its own allocator settings. No value changes.
pub fn keep_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: mallopt only sets allocator parameters; called before other threads start.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 32 << 20);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 1 << 30);
    }
}

/// Set OpenBLAS's thread count (for measurements such as `examples/peak_gemm.rs`; the engine
/// itself uses [`single_threaded_blas`]).
pub fn set_blas_threads(n: usize) {
    let n = std::ffi::c_int::try_from(n.max(1)).unwrap_or(1);
    // SAFETY: a plain setter of OpenBLAS's thread count.
    unsafe { openblas_set_num_threads(n) };
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

/// The positive return code of a failed LAPACK call (for dpotrf: the order of the leading minor
/// that is not positive definite), 0 when there is none. ndarray-linalg wraps the error of its
/// LAPACK layer (`lax`) without re-exporting that type, so naming its variant would need `lax`
/// as a direct dependency for this one match; its message, "... return_code = N", carries the
/// code instead. The unit test `cholesky_error_names_the_failing_pivot` pins this format.
fn lapack_failure_code(e: &ndarray_linalg::error::LinalgError) -> usize {
    let text = e.to_string();
    if !text.contains("Computational failure") {
        return 0;
    }
    text.rsplit("return_code = ")
        .next()
        .and_then(|n| n.trim().parse::<i64>().ok())
        .map_or(0, |n| n.max(0) as usize)
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
        if n == 0 {
            // LAPACK refuses an empty matrix (its leading dimension must be at least 1).
            return Ok(ScaledCholesky {
                l: Array2::zeros((0, 0)),
                dinv,
            });
        }
        let mut scaled = s.clone();
        for ((i, j), v) in scaled.indexed_iter_mut() {
            *v *= dinv[i] * dinv[j];
        }
        let l = scaled.cholesky(UPLO::Lower).map_err(|e| {
            let pivot = match &e {
                ndarray_linalg::error::LinalgError::Lapack(_) => lapack_failure_code(&e),
                _ => 0,
            };
            Error::NotPositiveDefinite {
                what: what.to_string(),
                pivot,
            }
        })?;
        // Row-major storage, which the BLAS calls below assume.
        let l = if l.is_standard_layout() {
            l
        } else {
            l.as_standard_layout().into_owned()
        };
        Ok(ScaledCholesky { l, dinv })
    }

    /// [`Self::new`] on a matrix it may overwrite, for small matrices factored many times
    /// (a sampler's likelihood): scaled in place and handed to LAPACK's dpotrf directly, no
    /// copy and no change of layout. Row-major storage of a symmetric matrix is its
    /// column-major transpose, so LAPACK's upper factor U of that storage is, read row-major,
    /// the lower factor L with S = L L^T. `what` names the matrix in the error.
    pub fn from_owned(mut s: Array2<f64>, what: impl FnOnce() -> String) -> Result<Self> {
        let n = s.nrows();
        assert_eq!(s.ncols(), n, "from_owned: S must be square");
        if !s.is_standard_layout() {
            s = s.as_standard_layout().into_owned();
        }
        let mut dinv = Array1::zeros(n);
        for i in 0..n {
            let d = s[[i, i]];
            if !(d.is_finite() && d > 0.0) {
                return Err(Error::NotPositiveDefinite {
                    what: what(),
                    pivot: i + 1,
                });
            }
            dinv[i] = 1.0 / d.sqrt();
        }
        if n == 0 {
            return Ok(ScaledCholesky { l: s, dinv });
        }
        {
            let flat = s.as_slice_mut().expect("standard layout");
            let dv = dinv.as_slice().expect("contiguous");
            for (i, row) in flat.chunks_exact_mut(n).enumerate() {
                // Only the lower triangle (row-major) is read by the factorisation.
                for (v, dj) in row[..=i].iter_mut().zip(dv) {
                    *v *= dv[i] * dj;
                }
            }
        }
        let (uplo, ni) = (b'U' as std::ffi::c_char, blas_int(n));
        let mut info: std::ffi::c_int = 0;
        // SAFETY: `s` is a contiguous n x n array; dpotrf reads and overwrites one triangle.
        unsafe { dpotrf_(&uplo, &ni, s.as_mut_ptr(), &ni, &mut info) };
        if info != 0 {
            return Err(Error::NotPositiveDefinite {
                what: what(),
                pivot: usize::try_from(info).unwrap_or(0),
            });
        }
        // Clear the strict upper triangle (row-major), which still holds S.
        let flat = s.as_slice_mut().expect("standard layout");
        for (i, row) in flat.chunks_exact_mut(n).enumerate() {
            row[i + 1..].iter_mut().for_each(|v| *v = 0.0);
        }
        Ok(ScaledCholesky { l: s, dinv })
    }

    /// Order of the factored matrix.
    pub fn dim(&self) -> usize {
        self.dinv.len()
    }

    /// Every row x_i of `x` (rows x dim, standard layout) replaced by (L^-1 D^-1 x_i)^T in
    /// place, so that x_i^T S^-1 x_j = (row i) . (row j): one triangular solve with many
    /// right-hand sides (BLAS dtrsm, Dongarra et al. 1990), rows x dim^2 operations, the rows
    /// kept contiguous.
    pub fn whiten_rows(&self, x: &mut Array2<f64>) {
        let (rows, cols) = x.dim();
        assert_eq!(cols, self.dim(), "whiten_rows: x must have dim columns");
        assert!(x.is_standard_layout(), "whiten_rows: x must be row-major");
        if rows == 0 || cols == 0 {
            return;
        }
        for mut row in x.rows_mut() {
            row *= &self.dinv;
        }
        // Row i of Z = X D^-1 L^-T solves Z L^T = X D^-1 (right side, L transposed); L is
        // row-major with its lower triangle filled.
        // SAFETY: `self.l` is a contiguous dim x dim row-major array, `x` a contiguous
        // rows x dim row-major array; dtrsm reads L's lower triangle and overwrites x.
        unsafe {
            cblas_dtrsm(
                CBLAS_ROW_MAJOR,
                CBLAS_RIGHT,
                CBLAS_LOWER,
                CBLAS_TRANS,
                CBLAS_NON_UNIT,
                blas_int(rows),
                blas_int(cols),
                1.0,
                self.l.as_ptr(),
                blas_int(cols),
                x.as_mut_ptr(),
                blas_int(cols),
            );
        }
    }

    /// S^-1 b: two triangular solves (BLAS dtrsv) between the diagonal scalings.
    pub fn solve_vec(&self, b: &[f64]) -> Array1<f64> {
        let n = self.dim();
        assert_eq!(b.len(), n, "solve_vec: b must have dim entries");
        let mut x: Array1<f64> = b.iter().zip(&self.dinv).map(|(v, d)| v * d).collect();
        if n == 0 {
            return x;
        }
        let xs = x.as_slice_mut().expect("contiguous");
        for trans in [CBLAS_NO_TRANS, CBLAS_TRANS] {
            // SAFETY: L is a contiguous n x n row-major array, x holds n values.
            unsafe {
                cblas_dtrsv(
                    CBLAS_ROW_MAJOR,
                    CBLAS_LOWER,
                    trans,
                    CBLAS_NON_UNIT,
                    blas_int(n),
                    self.l.as_ptr(),
                    blas_int(n),
                    xs.as_mut_ptr(),
                    1,
                );
            }
        }
        x *= &self.dinv;
        x
    }

    /// L^-1 (row-major), by LAPACK dtrtri (dim^3 / 3 operations; Anderson et al. 1999). None
    /// only on a zero pivot, which a successful Cholesky factor cannot have.
    fn triangular_inverse(&self) -> Option<Array2<f64>> {
        let n = self.dim();
        let mut inv = self.l.clone();
        // Row-major L read column-major is L^T, an upper triangle; its inverse read row-major
        // again is L^-1.
        let (uplo, diag) = (b'U' as std::ffi::c_char, b'N' as std::ffi::c_char);
        let ni = blas_int(n);
        let mut info: std::ffi::c_int = 0;
        // SAFETY: `inv` is a contiguous n x n array; dtrtri overwrites its triangle in place.
        unsafe { dtrtri_(&uplo, &diag, &ni, inv.as_mut_ptr(), &ni, &mut info) };
        (info == 0).then_some(inv)
    }

    /// The diagonal of S^-1, (S^-1)_jj = D_jj^-2 sum_k (L^-1)_kj^2, from the inverse of the
    /// triangular factor (LAPACK dtrtri, dim^3 / 3 operations; Anderson et al. 1999), not from
    /// S^-1 itself.
    pub fn inverse_diagonal(&self) -> Vec<f64> {
        let n = self.dim();
        if n == 0 {
            return Vec::new();
        }
        let Some(inv) = self.triangular_inverse() else {
            return vec![f64::NAN; n];
        };
        let mut out = vec![0.0; n];
        for (k, row) in inv.rows().into_iter().enumerate() {
            for (j, v) in row.iter().enumerate().take(k + 1) {
                out[j] += v * v;
            }
        }
        out.iter_mut()
            .zip(&self.dinv)
            .for_each(|(o, d)| *o *= d * d);
        out
    }

    /// S^-1 itself, D^-1 L^-T L^-1 D^-1: the inverse of the triangular factor (LAPACK dtrtri,
    /// dim^3 / 3 operations) and its rank-dim update (dim^3 / 3).
    pub fn inverse(&self) -> Array2<f64> {
        let n = self.dim();
        if n == 0 {
            return Array2::zeros((0, 0));
        }
        let Some(inv) = self.triangular_inverse() else {
            return Array2::from_elem((n, n), f64::NAN);
        };
        let mut out = Array2::zeros((n, n));
        syrk_tn(1.0, &inv, 0.0, &mut out);
        mirror_upper(&mut out);
        for ((i, j), v) in out.indexed_iter_mut() {
            *v *= self.dinv[i] * self.dinv[j];
        }
        out
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

    /// The smallest squared pivot of the scaled factor, min_i L_ii^2: the fraction of column
    /// i's scaled variance left after the columns before it (a Schur complement). Exactly
    /// singular matrices give rounding-level values here even when the factorisation succeeds,
    /// and 1 / min_i L_ii^2 bounds the 2-norm condition number of the scaled matrix from below
    /// (Higham 2002, sec. 10.1: kappa_2 >= max_i 1 / L_ii^2 for a unit-diagonal matrix).
    pub fn smallest_pivot(&self) -> f64 {
        self.l
            .diag()
            .iter()
            .fold(f64::INFINITY, |m, v| m.min(v * v))
    }

    /// log det S.
    pub fn log_det(&self) -> f64 {
        let ll: f64 = self.l.diag().iter().map(|v| 2.0 * v.ln()).sum();
        let dd: f64 = self.dinv.iter().map(|v| -2.0 * v.ln()).sum();
        ll + dd
    }
}

/// Eigenvalues of a symmetric positive semi-definite matrix below `-PSD_TOLERANCE * max(e)` mean
/// the matrix is not positive semi-definite; smaller negative ones are rounding and are set to
/// zero. The eigenvalues of the computed matrix differ from the exact ones by at most the norm
/// of its rounding error (Weyl's inequality, Golub & Van Loan 2013, cor. 8.1.6); for the Gram
/// and pattern matrices factored here that error is a modest multiple of eps ||M|| (Higham 2002,
/// sec. 3.5), far below 1e-8 ||M|| = 4.5e7 eps ||M|| (the margin is a judgement, common
/// practice).
pub const PSD_TOLERANCE: f64 = 1e-8;

/// Square roots of a symmetric positive semi-definite M (n x n) from its eigen-decomposition
/// M = V diag(e) V^T, so singular M work (rank-deficient monopole and dipole patterns, a pulsar
/// without data at some frequency).
pub struct PsdRoot {
    /// L = V diag(sqrt(e)), L L^T = M.
    factor: Array2<f64>,
    vecs: Array2<f64>,
}

impl PsdRoot {
    /// Decompose `m`; `what` names the matrix in the error. Non-finite entries and eigenvalues
    /// below `-PSD_TOLERANCE * max(e)` are errors.
    pub fn new(m: &Array2<f64>, what: &str) -> Result<PsdRoot> {
        let not_psd = |pivot| Error::NotPositiveDefinite {
            what: what.to_string(),
            pivot,
        };
        if m.iter().any(|v| !v.is_finite()) {
            return Err(Error::NonFinite {
                what: what.to_string(),
            });
        }
        let (vals, vecs) = m.eigh(UPLO::Lower).map_err(|_| not_psd(0))?;
        let top = vals.iter().cloned().fold(0.0, f64::max);
        let mut factor = vecs.clone();
        for (j, &e) in vals.iter().enumerate() {
            if e < -PSD_TOLERANCE * top {
                return Err(not_psd(j + 1));
            }
            let s = e.max(0.0).sqrt();
            factor.column_mut(j).mapv_inplace(|v| v * s);
        }
        Ok(PsdRoot { factor, vecs })
    }

    /// L = V diag(sqrt(e)) with L L^T = M (n x n).
    pub fn factor(&self) -> &Array2<f64> {
        &self.factor
    }

    /// L, consuming the decomposition.
    pub fn into_factor(self) -> Array2<f64> {
        self.factor
    }

    /// The symmetric root M^(1/2) = V diag(sqrt(e)) V^T (n x n).
    pub fn symmetric(&self) -> Array2<f64> {
        self.factor.dot(&self.vecs.t())
    }
}

/// (Z + Z^T) / 2: removes the rounding asymmetry of a product that is symmetric in exact
/// arithmetic.
pub fn symmetrise(z: Array2<f64>) -> Array2<f64> {
    let zt = z.t().to_owned();
    (z + zt) * 0.5
}

/// Lower Cholesky factor of a (well-scaled) symmetric positive-definite matrix.
pub fn cholesky_lower(s: &Array2<f64>, what: &str) -> Result<Array2<f64>> {
    s.cholesky(UPLO::Lower)
        .map_err(|_| Error::NotPositiveDefinite {
            what: what.to_string(),
            pivot: 0,
        })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// row_dots against BLAS's general product (ndarray's `dot`, OpenBLAS dgemm) at 1e-13 of the
    /// sum of |terms|, on every edge of its blocking (row counts 1..7 against 1..9, lengths not a
    /// multiple of the lanes or of a chunk); and bit for bit against its own stated order,
    /// written out one element at a time, so that the vector code is the documented
    /// arithmetic.
    #[test]
    fn row_dots_match_the_matrix_product_and_their_stated_order() {
        let mut r = crate::rng::stream(12, crate::rng::Purpose::Layout, 0);
        use rand::Rng;
        for (ra, rb, len) in [
            (1, 1, 1),
            (2, 4, 8),
            (3, 5, 13),
            (7, 9, 1031),
            (10, 10, 1100),
        ] {
            let u = Array2::from_shape_fn((ra, len), |_| r.random::<f64>() - 0.5);
            let v = Array2::from_shape_fn((rb, len), |_| r.random::<f64>() - 0.5);
            let x = row_dots(u.as_slice().unwrap(), v.as_slice().unwrap(), len);
            let want = u.dot(&v.t());
            let body = len - len % 8;
            for a in 0..ra {
                for b in 0..rb {
                    let scale: f64 = (0..len).map(|k| (u[[a, k]] * v[[b, k]]).abs()).sum();
                    assert!((x[[a, b]] - want[[a, b]]).abs() <= 1e-13 * scale);
                    let mut p = [0.0f64; 8];
                    for k in 0..body {
                        p[k % 8] += u[[a, k]] * v[[b, k]];
                    }
                    for (l, k) in (body..len).enumerate() {
                        p[l] += u[[a, k]] * v[[b, k]];
                    }
                    let exact = ((p[0] + p[4]) + (p[2] + p[6])) + ((p[1] + p[5]) + (p[3] + p[7]));
                    assert_eq!(
                        x[[a, b]].to_bits(),
                        exact.to_bits(),
                        "({a}, {b}) of {ra} x {rb} x {len}"
                    );
                }
            }
        }
    }

    /// diag(1, 1, -1, 1) (after scaling, a matrix whose third leading minor is negative; its
    /// diagonal is positive so the check before LAPACK passes): dpotrf reports order 3
    /// (LAPACK Users' Guide, dpotrf INFO > 0: "the leading minor of order i is not positive
    /// definite"), and the error says so.
    #[test]
    fn cholesky_error_names_the_failing_pivot() {
        let mut s = Array2::<f64>::eye(4);
        s[[1, 2]] = 2.0;
        s[[2, 1]] = 2.0;
        // Leading minors: 1, 1, 1 - 4 = -3 < 0: order 3 fails.
        match ScaledCholesky::new(&s, "test matrix") {
            Err(Error::NotPositiveDefinite { pivot, .. }) => assert_eq!(pivot, 3),
            other => panic!("expected a pivot-3 failure, got {:?}", other.err()),
        }
        match ScaledCholesky::from_owned(s, || "test matrix".into()) {
            Err(Error::NotPositiveDefinite { pivot, .. }) => assert_eq!(pivot, 3),
            other => panic!("expected a pivot-3 failure, got {:?}", other.err()),
        }
    }

    #[test]
    fn two_stage_eigenvalues_match_the_one_stage_solver() {
        // Against LAPACK's one-stage dsyev (through ndarray-linalg) on a random symmetric
        // matrix with a spread of eigenvalues, and on a diagonal matrix whose eigenvalues are
        // its entries.
        let n = 97;
        let mut r = crate::rng::stream(11, crate::rng::Purpose::Layout, 0);
        use rand::Rng;
        let b = Array2::from_shape_fn((n, n), |_| r.random::<f64>() - 0.5);
        let a = &b + &b.t();
        let two = symmetric_eigenvalues(a.clone()).unwrap();
        let (one, _) = a.eigh(UPLO::Lower).unwrap();
        let top = one.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (x, y) in two.iter().zip(one.iter()) {
            assert!((x - y).abs() < 1e-12 * top, "{x} {y}");
        }
        let d = Array2::from_diag(&Array1::from_iter((0..n).map(|i| (i as f64 - 40.0) * 0.5)));
        let e = symmetric_eigenvalues(d).unwrap();
        for (i, v) in e.iter().enumerate() {
            assert!((v - (i as f64 - 40.0) * 0.5).abs() < 1e-13);
        }
        assert!(symmetric_eigenvalues(Array2::from_elem((3, 3), f64::NAN)).is_none());
    }

    #[test]
    fn triangular_helpers_match_the_explicit_inverse() {
        // Against S^-1 from ndarray-linalg's general inverse (LU, LAPACK dgetrf/dgetri), on a
        // badly scaled symmetric positive-definite S (the case the diagonal scaling is for).
        use ndarray_linalg::Inverse;
        let n = 9;
        let b = Array2::from_shape_fn((n, n), |(i, j)| ((i * 7 + j * 5) % 13) as f64 - 6.0);
        let scale = Array1::from_iter((0..n).map(|i| 10f64.powi(i as i32 - 4)));
        let mut s = b.t().dot(&b) + Array2::<f64>::eye(n) * 3.0;
        for ((i, j), v) in s.indexed_iter_mut() {
            *v *= scale[i] * scale[j];
        }
        let inv = s.inv().unwrap();
        let chol = ScaledCholesky::new(&s, "test").unwrap();
        let owned = ScaledCholesky::from_owned(s.clone(), || "test".into()).unwrap();
        assert!((owned.log_det() - chol.log_det()).abs() < 1e-12 * chol.log_det().abs());
        for (a, b) in owned.l.iter().zip(chol.l.iter()) {
            assert!((a - b).abs() < 1e-12, "{a} vs {b}");
        }
        for (j, d) in chol.inverse_diagonal().iter().enumerate() {
            assert!((d - inv[[j, j]]).abs() < 1e-10 * inv[[j, j]], "{j}");
        }
        let rhs: Vec<f64> = (0..n).map(|i| (i as f64 - 3.0) * scale[i]).collect();
        let x = chol.solve_vec(&rhs);
        let want = inv.dot(&Array1::from(rhs));
        for (a, w) in x.iter().zip(want.iter()) {
            assert!((a - w).abs() < 1e-9 * want.iter().fold(0.0f64, |m, v| m.max(v.abs())));
        }
        let mut rows =
            Array2::from_shape_fn((5, n), |(i, j)| (i as f64 + 1.0) * scale[j] * j as f64);
        let orig = rows.clone();
        chol.whiten_rows(&mut rows);
        let quad = orig.dot(&inv).dot(&orig.t());
        let got = rows.dot(&rows.t());
        for (a, w) in got.iter().zip(quad.iter()) {
            assert!((a - w).abs() < 1e-9 * quad[[4, 4]], "{a} vs {w}");
        }
    }

    #[test]
    fn syrk_matches_the_general_product() {
        let a = Array2::from_shape_fn((7, 4), |(i, j)| ((i * 5 + j * 3) % 11) as f64 - 4.5);
        let v = Array2::from_shape_fn((3, 4), |(i, j)| (i as f64 + 1.0) * (j as f64 - 1.5));
        let mut g = Array2::zeros((4, 4));
        syrk_tn(1.0, &a, 0.0, &mut g);
        syrk_tn(-0.5, &v, 1.0, &mut g);
        mirror_upper(&mut g);
        let want = a.t().dot(&a) - v.t().dot(&v) * 0.5;
        for (x, y) in g.iter().zip(want.iter()) {
            assert!((x - y).abs() < 1e-12 * y.abs().max(1.0), "{x} vs {y}");
        }
        assert_eq!(syrk_flops(7, 4), 140.0);
    }
}
