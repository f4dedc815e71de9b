//! The white-weighted Gram matrix of one backend, T_b^T N_b^-1 T_b, as a function of its
//! EFAC and EQUAD, interpolated once per pulsar (docs/noise-estimation.md, "Speed").
//!
//! With distinct TOA uncertainties sigma_i the per-TOA white variance of backend b is
//! N_i = EFAC^2 sigma_i^2 + EQUAD^2 = a (s_i + t), with s_i = sigma_i^2, a = EFAC^2 and
//! t = EQUAD^2 / EFAC^2, so
//!
//! G_b(t) / a = sum_i T_i T_i^T / (s_i + t) / a
//!
//! (T_i the i-th row of T). Only the one-parameter family G_b(t) costs n_b c^2 operations per
//! evaluation; it is what this module replaces. In tau = ln(s_min + t) (s_min the backend's
//! smallest s_i) the scaled family
//!
//! H(tau) = (s_min + t) G_b(t) = sum_i w_i(tau) T_i T_i^T, w_i = 1 / (1 + (s_i - s_min) e^-tau),
//!
//! has logistic weights: each w_i is analytic except at the poles
//! tau = ln(s_i - s_min) + i pi (2k + 1), so H is analytic in the strip |Im tau| < pi, and on
//! |Im tau| <= theta (pi/2 <= theta < pi) every |w_i| <= 1 / sin theta (|1 + r e^(-i y)| >=
//! |sin y| for r >= 0, |y| >= pi/2). Every entry then obeys
//! |H_jk| <= M sqrt(H1_jj H1_kk), M = 1 / sin theta, with H1 = sum_i T_i T_i^T the unweighted
//! Gram (Cauchy-Schwarz).
//!
//! The range of tau the prior allows is cut into pieces of width l <= [`MAX_PIECE_WIDTH`]; on
//! each piece H is interpolated at the n + 1 Chebyshev points x_j = cos(j pi / n) of the piece
//! mapped to [-1, 1] and kept as its Chebyshev series p(x) = sum_k c_k T_k(x), whose
//! coefficient matrices come from the node matrices by the discrete cosine sums
//! c_k = (2 / n) sum''_j H(x_j) cos(j k pi / n) (first and last terms halved, and c_0, c_n
//! halved; Trefethen 2013, Approximation Theory and Approximation Practice, ch. 3 and 4). The
//! Bernstein ellipse E_rho whose semi-minor axis (rho - 1/rho) / 2 equals 2 theta / l lies in
//! the strip, so the interpolant's error is at most 4 M rho^-n / (rho - 1) in units of
//! sqrt(H1_jj H1_kk) (Trefethen 2013, Theorem 8.2); n is the smallest that brings this below
//! the stated tolerance, minimised over theta. The series is evaluated term by term
//! (|T_k(x)| <= 1 on [-1, 1], so no term is amplified) together with its derivative,
//! T_k'(x) = k U_(k-1)(x) (Chebyshev polynomials of the second kind; Mason & Handscomb 2003,
//! Chebyshev Polynomials, sec. 2.4.5), which gives dG_b/dt for the gradient without a second
//! family. One evaluation costs 2 (n + 1) c (c + 1) / 2 multiply-adds per backend instead of
//! n_b c (c + 1). Nothing here depends on what the columns are: the likelihood passes the rows
//! of X = [T | r | 1 | sigma], whose weighted Gram holds every sum over TOAs an evaluation
//! needs (T^T N^-1 T, T^T N^-1 r, r^T N^-1 r, sum N_i^-1, sum s_i N_i^-1;
//! [`crate::likelihood`]).
//!
//! Nothing is used unchecked: at setup the interpolant and its derivative are compared with
//! the exact sums at the ends of the range and between the nodes nearest each piece's ends and
//! in its middle (where interpolation errors peak); if any entry misses [`CHECK_TOLERANCE`]
//! (derivative: [`CHECK_TOLERANCE_DERIVATIVE`]), the backend is not interpolated and the
//! caller falls back to the exact TOA-by-TOA evaluation with a note.

use crate::linalg::{mirror_upper, syrk_tn};
use ndarray::{Array2, Axis};
use std::f64::consts::PI;

/// Target of the analytic error bound, relative to sqrt(H1_jj H1_kk): about 100 times the
/// double-precision rounding unit (1.1e-16), the level at which the exact sums over ~10^3 TOAs
/// are themselves rounded (a rounding error growing like sqrt(n) eps; common practice, not a
/// proven bound).
pub const TOLERANCE: f64 = 1e-14;
/// What the check at setup accepts for the interpolated H, in the same units: 100 x
/// [`TOLERANCE`], room for the rounding of the (n + 1)-term coefficient sums and of the
/// exact reference sums (each ~ n eps with n <= 64 terms: ~1e-14).
pub const CHECK_TOLERANCE: f64 = 1e-12;
/// What the check accepts for dH/dtau: the interpolant's derivative loses up to a factor
/// n^2 against its values (Markov's inequality for polynomials on [-1, 1]: |p'| <= n^2 max |p|;
/// Rivlin 1990, Chebyshev Polynomials, 2nd ed., ch. 2; recalled from memory, the section not
/// checked), about 10^3 at
/// the n ~ 30 used here, times 2 / l for the piece's width.
pub const CHECK_TOLERANCE_DERIVATIVE: f64 = 1e-9;
/// Widest piece in tau (natural log units). Narrower pieces need fewer nodes each (the
/// per-evaluation cost) and more pieces (the setup cost); at width 1.5 the bound asks for
/// 17 nodes at [`TOLERANCE`] (24 at width 3).
pub const MAX_PIECE_WIDTH: f64 = 1.5;
/// Most nodes per piece; when the bound asks for more, this many are used and the check decides.
pub const MAX_NODES: usize = 64;

/// Settings of the interpolation (the defaults are the constants above; tests change them).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct GramSettings {
    pub tolerance: f64,
    pub check_tolerance: f64,
    pub check_tolerance_derivative: f64,
    pub max_piece_width: f64,
    pub max_nodes: usize,
}

impl Default for GramSettings {
    fn default() -> Self {
        GramSettings {
            tolerance: TOLERANCE,
            check_tolerance: CHECK_TOLERANCE,
            check_tolerance_derivative: CHECK_TOLERANCE_DERIVATIVE,
            max_piece_width: MAX_PIECE_WIDTH,
            max_nodes: MAX_NODES,
        }
    }
}

/// Entries of the packed upper triangle of a c x c matrix (stored row by row).
fn packed_len(c: usize) -> usize {
    c * (c + 1) / 2
}

fn pack_upper(m: &Array2<f64>, out: &mut [f64]) {
    let c = m.nrows();
    let mut p = 0;
    for j in 0..c {
        for k in j..c {
            out[p] = m[[j, k]];
            p += 1;
        }
    }
}

/// Position of row j's diagonal entry in the packed upper triangle of a dim x dim matrix.
fn row_start(j: usize, dim: usize) -> usize {
    j * dim - j * j.saturating_sub(1) / 2
}

/// Entry (j, k) of a packed upper triangle of a dim x dim symmetric matrix.
pub fn packed_entry(packed: &[f64], dim: usize, j: usize, k: usize) -> f64 {
    let (j, k) = if j <= k { (j, k) } else { (k, j) };
    packed[row_start(j, dim) + k - j]
}

/// Add alpha times the leading c x c block (c = `m`'s size) of a packed dim x dim upper
/// triangle into the upper triangle of `m`.
pub fn add_packed(alpha: f64, packed: &[f64], dim: usize, m: &mut Array2<f64>) {
    let c = m.nrows();
    for j in 0..c {
        let src = &packed[row_start(j, dim)..row_start(j, dim) + c - j];
        let mut row = m.row_mut(j);
        let row = row.as_slice_mut().expect("standard layout");
        for (v, x) in row[j..].iter_mut().zip(src) {
            *v += alpha * x;
        }
    }
}

/// tr(A X_c) for a symmetric c x c A (both triangles) and the leading c x c block X_c of a
/// symmetric X given by its packed dim x dim upper triangle:
/// sum_j A_jj X_jj + 2 sum_(j<k) A_jk X_jk.
pub fn trace_product(a: &Array2<f64>, packed: &[f64], dim: usize) -> f64 {
    let c = a.nrows();
    let (mut diag, mut off) = (0.0, 0.0);
    for j in 0..c {
        let src = &packed[row_start(j, dim)..row_start(j, dim) + c - j];
        let row = a.row(j);
        let row = row.as_slice().expect("standard layout");
        diag += row[j] * src[0];
        off += row[j + 1..]
            .iter()
            .zip(&src[1..])
            .map(|(v, x)| v * x)
            .sum::<f64>();
    }
    diag + 2.0 * off
}

/// z^T X z for a symmetric X given by its packed dim x dim upper triangle (z of length dim).
pub fn quadratic_form(packed: &[f64], z: &[f64]) -> f64 {
    let dim = z.len();
    let (mut diag, mut off) = (0.0, 0.0);
    for j in 0..dim {
        let src = &packed[row_start(j, dim)..row_start(j, dim) + dim - j];
        diag += z[j] * z[j] * src[0];
        off += z[j]
            * z[j + 1..]
                .iter()
                .zip(&src[1..])
                .map(|(a, b)| a * b)
                .sum::<f64>();
    }
    diag + 2.0 * off
}

/// One piece [lo, hi] of the tau range: the Chebyshev coefficient matrices (packed, one after
/// the other).
#[derive(Clone, Debug)]
struct Piece {
    lo: f64,
    hi: f64,
    nodes: usize,
    coeffs: Vec<f64>,
}

/// The interpolated Gram of one backend.
#[derive(Clone, Debug)]
pub struct BackendGram {
    /// The backend's TOAs (indices into the pulsar's) and their s_i = sigma_i^2.
    pub rows: Vec<usize>,
    pub s: Vec<f64>,
    pub s_min: f64,
    /// The allowed range of t.
    pub t_range: [f64; 2],
    tau_range: [f64; 2],
    /// Packed c x c, c (c + 1) / 2 entries.
    len: usize,
    kind: Kind,
}

#[derive(Clone, Debug)]
enum Kind {
    /// t can take one value only (no free EQUAD): H and dH/dtau there, exact.
    Fixed {
        h: Vec<f64>,
        dh: Vec<f64>,
    },
    Pieces(Vec<Piece>),
}

/// What the setup found: the nodes used, or why the backend is not interpolated.
#[derive(Clone, Debug, PartialEq)]
pub struct GramReport {
    pub nodes: usize,
    pub pieces: usize,
    /// Largest error found by the check (value, derivative), in units of sqrt(H1_jj H1_kk).
    pub max_error: [f64; 2],
}

/// H(tau) (or dH/dtau with `derivative`) by the exact sum over the backend's rows.
fn exact(tb: &Array2<f64>, s: &[f64], s_min: f64, tau: f64, derivative: bool) -> Array2<f64> {
    let c = tb.ncols();
    let e = (-tau).exp();
    let mut x = tb.clone();
    for (mut row, &si) in x.rows_mut().into_iter().zip(s) {
        let q = (si - s_min) * e;
        let w = 1.0 / (1.0 + q);
        // dw/dtau = w (1 - w) = q w^2, without the cancellation of 1 - w.
        let weight = if derivative { q * w * w } else { w };
        row *= weight.sqrt();
    }
    let mut out = Array2::zeros((c, c));
    syrk_tn(1.0, &x, 0.0, &mut out);
    out
}

/// The number of nodes the bound asks for on a piece of width `width` (module documentation),
/// minimised over theta in [pi/2, pi).
fn nodes_for(width: f64, tolerance: f64, max_nodes: usize) -> usize {
    let mut best = max_nodes;
    for step in 0..48 {
        let theta = PI * (0.5 + 0.01 * step as f64);
        let m = 1.0 / theta.sin();
        let b = 2.0 * theta / width;
        let rho = b + (b * b + 1.0).sqrt();
        // 4 M rho^-n / (rho - 1) <= tolerance.
        let n = ((4.0 * m / ((rho - 1.0) * tolerance)).ln() / rho.ln()).ceil();
        if n.is_finite() && n >= 1.0 {
            best = best.min(n as usize);
        }
    }
    best.max(2)
}

impl BackendGram {
    /// The interpolant for the backend whose rows of T are `rows` (uncertainties `sigma`), for
    /// t in `t_range` (t_lo = t_hi: one value). Err(note) when the check fails.
    pub fn build(
        t: &Array2<f64>,
        sigma: &[f64],
        rows: Vec<usize>,
        t_range: [f64; 2],
        settings: &GramSettings,
    ) -> Result<(Self, GramReport), String> {
        let c = t.ncols();
        let len = packed_len(c);
        let tb = t.select(Axis(0), &rows);
        let s: Vec<f64> = rows.iter().map(|&i| sigma[i] * sigma[i]).collect();
        let s_min = s.iter().copied().fold(f64::INFINITY, f64::min);
        if !(s_min.is_finite() && s_min > 0.0) || rows.is_empty() {
            return Err("a TOA uncertainty is not positive".into());
        }
        let [t_lo, t_hi] = t_range;
        if !(t_lo.is_finite() && t_hi.is_finite() && 0.0 <= t_lo && t_lo <= t_hi) {
            return Err(format!(
                "the range of EQUAD^2 / EFAC^2 [{t_lo:e}, {t_hi:e}] is not finite"
            ));
        }
        let tau_range = [(s_min + t_lo).ln(), (s_min + t_hi).ln()];
        let pack = |m: &Array2<f64>| {
            let mut v = vec![0.0; len];
            pack_upper(m, &mut v);
            v
        };
        let base = BackendGram {
            rows,
            s: s.clone(),
            s_min,
            t_range,
            tau_range,
            len,
            kind: Kind::Fixed {
                h: Vec::new(),
                dh: Vec::new(),
            },
        };
        if t_lo == t_hi {
            let h = pack(&exact(&tb, &s, s_min, tau_range[0], false));
            let dh = pack(&exact(&tb, &s, s_min, tau_range[0], true));
            let report = GramReport {
                nodes: 1,
                pieces: 1,
                max_error: [0.0, 0.0],
            };
            return Ok((
                BackendGram {
                    kind: Kind::Fixed { h, dh },
                    ..base
                },
                report,
            ));
        }
        let span = tau_range[1] - tau_range[0];
        let n_pieces = (span / settings.max_piece_width).ceil().max(1.0) as usize;
        let width = span / n_pieces as f64;
        let n = nodes_for(width, settings.tolerance, settings.max_nodes);
        let mut pieces = Vec::with_capacity(n_pieces);
        for p in 0..n_pieces {
            let lo = tau_range[0] + width * p as f64;
            let hi = if p + 1 == n_pieces {
                tau_range[1]
            } else {
                lo + width
            };
            let (mid, half) = (0.5 * (lo + hi), 0.5 * (hi - lo));
            // Node matrices at x_j = cos(j pi / n).
            let node: Vec<Vec<f64>> = (0..=n)
                .map(|j| {
                    let x = (j as f64 * PI / n as f64).cos();
                    pack(&exact(&tb, &s, s_min, mid + half * x, false))
                })
                .collect();
            let mut coeffs = vec![0.0; (n + 1) * len];
            for k in 0..=n {
                let ck = &mut coeffs[k * len..(k + 1) * len];
                for (j, hj) in node.iter().enumerate() {
                    let mut f = (2.0 / n as f64) * ((j * k) as f64 * PI / n as f64).cos();
                    if j == 0 || j == n {
                        f *= 0.5;
                    }
                    if k == 0 || k == n {
                        f *= 0.5;
                    }
                    ck.iter_mut().zip(hj).for_each(|(c, h)| *c += f * h);
                }
            }
            pieces.push(Piece {
                lo,
                hi,
                nodes: n + 1,
                coeffs,
            });
        }
        let gram = BackendGram {
            kind: Kind::Pieces(pieces),
            ..base
        };
        // The check: the range ends, and per piece between the nodes nearest its ends and in
        // its middle, x = cos((j + 1/2) pi / n) for j = 0, n / 2, n - 1.
        let unweighted = {
            let mut h1 = Array2::zeros((c, c));
            syrk_tn(1.0, &tb, 0.0, &mut h1);
            mirror_upper(&mut h1);
            h1
        };
        let scale: Vec<f64> = (0..c).map(|j| unweighted[[j, j]].sqrt()).collect();
        let mut points = vec![tau_range[0], tau_range[1]];
        if let Kind::Pieces(ps) = &gram.kind {
            for pc in ps {
                let (mid, half) = (0.5 * (pc.lo + pc.hi), 0.5 * (pc.hi - pc.lo));
                for j in [0, n / 2, n - 1] {
                    points.push(mid + half * ((j as f64 + 0.5) * PI / n as f64).cos());
                }
            }
        }
        let mut max_error = [0.0f64; 2];
        let (mut h, mut dh) = (vec![0.0; len], vec![0.0; len]);
        for &tau in &points {
            gram.eval_tau(tau, &mut h, &mut dh);
            for (which, (got, derivative)) in [(&h, false), (&dh, true)].into_iter().enumerate() {
                let want = exact(&tb, &s, s_min, tau, derivative);
                let mut p = 0;
                for j in 0..c {
                    for k in j..c {
                        let unit = scale[j] * scale[k];
                        if unit > 0.0 {
                            let err = (got[p] - want[[j, k]]).abs() / unit;
                            max_error[which] = max_error[which].max(err);
                        }
                        p += 1;
                    }
                }
            }
        }
        let report = GramReport {
            nodes: n + 1,
            pieces: n_pieces,
            max_error,
        };
        if !(max_error[0] <= settings.check_tolerance
            && max_error[1] <= settings.check_tolerance_derivative)
        {
            return Err(format!(
                "the interpolated white-weighted Gram ({} pieces of {} Chebyshev nodes) missed \
                 its check: error {:.1e} (allowed {:.0e}), derivative {:.1e} (allowed {:.0e})",
                n_pieces,
                n + 1,
                max_error[0],
                settings.check_tolerance,
                max_error[1],
                settings.check_tolerance_derivative
            ));
        }
        Ok((gram, report))
    }

    /// Packed size c (c + 1) / 2.
    pub fn packed_len(&self) -> usize {
        self.len
    }

    /// H and dH/dtau at t into `h`, `dh` (packed); false when t lies outside the range the
    /// interpolant was built and checked for (the caller then evaluates exactly).
    pub fn eval(&self, t: f64, h: &mut [f64], dh: &mut [f64]) -> bool {
        match &self.kind {
            Kind::Fixed { h: h0, dh: dh0 } => {
                if t != self.t_range[0] {
                    return false;
                }
                h.copy_from_slice(h0);
                dh.copy_from_slice(dh0);
                true
            }
            Kind::Pieces(_) => {
                let tau = (self.s_min + t).ln();
                // Rounding of EQUAD^2 / EFAC^2 at a prior corner may land a hair outside.
                let slack = 1e-9;
                if !(tau >= self.tau_range[0] - slack && tau <= self.tau_range[1] + slack) {
                    return false;
                }
                self.eval_tau(tau, h, dh);
                true
            }
        }
    }

    /// The series and its derivative at tau (clamped into the range).
    fn eval_tau(&self, tau: f64, h: &mut [f64], dh: &mut [f64]) {
        let Kind::Pieces(pieces) = &self.kind else {
            return;
        };
        let width = (self.tau_range[1] - self.tau_range[0]) / pieces.len() as f64;
        let k =
            (((tau - self.tau_range[0]) / width).floor().max(0.0) as usize).min(pieces.len() - 1);
        let pc = &pieces[k];
        let x = ((2.0 * tau - (pc.lo + pc.hi)) / (pc.hi - pc.lo)).clamp(-1.0, 1.0);
        let dxdtau = 2.0 / (pc.hi - pc.lo);
        h.fill(0.0);
        dh.fill(0.0);
        // T_k by T_(k+1) = 2 x T_k - T_(k-1); T_k' = k U_(k-1), U by the same recurrence.
        let (mut t_prev, mut t_cur) = (1.0, x);
        let (mut u_prev, mut u_cur) = (0.0, 1.0); // U_(-1) = 0, U_0 = 1
        for kk in 0..pc.nodes {
            let (tk, dk) = if kk == 0 {
                (1.0, 0.0)
            } else {
                let tk = t_cur;
                let dk = kk as f64 * u_cur * dxdtau;
                // advance
                let t_next = 2.0 * x * t_cur - t_prev;
                t_prev = t_cur;
                t_cur = t_next;
                let u_next = 2.0 * x * u_cur - u_prev;
                u_prev = u_cur;
                u_cur = u_next;
                (tk, dk)
            };
            let ck = &pc.coeffs[kk * self.len..(kk + 1) * self.len];
            for ((hv, dv), &cv) in h.iter_mut().zip(dh.iter_mut()).zip(ck) {
                *hv += tk * cv;
                *dv += dk * cv;
            }
        }
    }

    /// Number of coefficient matrices read by one evaluation.
    pub fn nodes_per_evaluation(&self) -> usize {
        match &self.kind {
            Kind::Fixed { .. } => 1,
            Kind::Pieces(p) => p[0].nodes,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The interpolant against the exact sums at random points of the range, on rows with
    /// uncertainties spread over two decades (reference: the exact sum, computed here in the
    /// plainest form, one rank-one term per row).
    #[test]
    fn interpolant_matches_the_exact_sum() {
        let (n, c) = (200, 5);
        let t = Array2::from_shape_fn((n, c), |(i, j)| ((i * 7 + j * 13) as f64 * 0.37).sin());
        let sigma: Vec<f64> = (0..n)
            .map(|i| 1e-7 * 10f64.powf((i as f64 * 0.61).sin()))
            .collect();
        let rows: Vec<usize> = (0..n).collect();
        let (g, report) =
            BackendGram::build(&t, &sigma, rows, [1e-20, 1e-8], &GramSettings::default()).unwrap();
        assert!(report.max_error[0] <= CHECK_TOLERANCE, "{report:?}");
        let (mut h, mut dh) = (vec![0.0; g.packed_len()], vec![0.0; g.packed_len()]);
        for k in 0..40 {
            let t_val = 10f64.powf(-20.0 + 12.0 * k as f64 / 39.0);
            assert!(g.eval(t_val, &mut h, &mut dh));
            let u = g.s_min + t_val;
            // G(t) u = H; compare G(t) = sum T_i T_i^T / (s_i + t) entry (0, 1) and (2, 2).
            for (j, l) in [(0, 1), (2, 2), (0, 4)] {
                let want: f64 = (0..n)
                    .map(|i| t[[i, j]] * t[[i, l]] / (sigma[i] * sigma[i] + t_val))
                    .sum();
                let unit: f64 = (0..n).map(|i| t[[i, j]] * t[[i, j]]).sum::<f64>().sqrt()
                    * (0..n).map(|i| t[[i, l]] * t[[i, l]]).sum::<f64>().sqrt()
                    / u;
                let p = (0..j).map(|r| c - r).sum::<usize>() + (l - j);
                let got = h[p] / u;
                assert!(
                    (got - want).abs() <= CHECK_TOLERANCE * unit,
                    "t {t_val:e} ({j},{l}): {got} vs {want}"
                );
            }
        }
        assert!(!g.eval(1e-7, &mut h, &mut dh), "outside the range");
    }

    /// Too few nodes: the check at setup reports the miss (never a silent approximation).
    #[test]
    fn too_few_nodes_fail_the_check() {
        let (n, c) = (100, 3);
        let t = Array2::from_shape_fn((n, c), |(i, j)| ((i + 3 * j) as f64 * 0.71).cos());
        let sigma: Vec<f64> = (0..n)
            .map(|i| 1e-7 * 10f64.powf((i as f64 * 0.3).sin()))
            .collect();
        let settings = GramSettings {
            max_nodes: 3,
            ..GramSettings::default()
        };
        let e =
            BackendGram::build(&t, &sigma, (0..n).collect(), [1e-20, 1e-8], &settings).unwrap_err();
        assert!(e.contains("missed its check"), "{e}");
    }
}
