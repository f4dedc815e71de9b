//! The covariance of the binned pair correlations with a signal present, and the goodness of
//! fit of the Hellings-Downs curve to the bins with that covariance (docs/frequency-spread-bins.md).
//!
//! A bin's correlation is the inverse-variance weighted mean rho_B = Q_B / W_B of its pairs
//! ([`crate::bins`]), with rho_ab / sigma_ab^2 = x~_a . x~_b in the template-weighted space of
//! [`crate::optimal::weight`]:
//!
//!   Q_B = sum_{(a,b) in B} x~_a . x~_b = (1/2) x^T (H_B (x) I) x,   W_B = sum_{(a,b) in B} sigma_ab^-2,
//!
//! with H_B the symmetric N x N indicator of the bin's pairs and x the stacked x~. For Gaussian x
//! with covariance C (the signal-present C~ = C0 + A^2 C1 of Allen & Romano 2023 in the reduced
//! space, [`crate::paircov::joint_covariance`]) Isserlis' theorem (Isserlis 1918) gives
//! Cov(x^T M x, x^T M' x) = 2 tr(M C M' C), so
//!
//!   Cov(Q_B, Q_B') = (1/2) tr((H_B (x) I) C (H_B' (x) I) C)
//!                  = (1/2) sum_{a,c} (H_B')_{ca} tau_B[a, c],
//!   tau_B[a, c] = sum_i ((C P_B) block (a, c))_{ii},   P_B = (H_B (x) I) C,
//!
//! and Cov(rho_B, rho_B') = Cov(Q_B, Q_B') / (W_B W_B'). Without signal (C = blockdiag Z~_a)
//! this is diagonal with Var(rho_B) = 1 / W_B = sigma_B^2, the independent-pair error bar.
//!
//! The fit: with the covariance evaluated at the measured amplitude and held fixed, the
//! generalised least-squares amplitude of A^2 hd_B to the bins and
//! chi^2 = (rho - A2 hd)^T Cov^-1 (rho - A2 hd), with n_bins - 1 degrees of freedom (one
//! amplitude fitted). Its p-value assumes Gaussian bins (they are sums of products of Gaussian
//! data, so only approximately), the noise model, the Hellings-Downs pattern with the template's
//! spectrum, and that the covariance at the measured amplitude is the true one.

use crate::error::{Error, Result};
use crate::linalg::{cholesky_lower, row_dots};
use crate::optimal::Weighted;
use crate::paircov::JointBlocks;
use ndarray::{Array1, Array2};
use rayon::prelude::*;
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// Largest stacked dimension N 2K for which the covariance is computed: its cost grows as
/// N^3 (2K)^2 (row additions and products per component pair; about 0.3 s of CPU at
/// 100 pulsars x 14 frequencies), so larger arrays skip it with a note rather than spend minutes.
pub const MAX_STACKED: usize = 4096;

/// Component pairs per parallel batch of [`bin_covariance_with`].
const TASK_CHUNK: usize = 1024;

/// The covariance of the binned correlations at one amplitude.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct BinCovariance {
    /// The amplitude squared of the signal in C (the measured HD A2_hat, clamped at 0).
    pub amplitude2: f64,
    /// Cov(rho_B, rho_B'), n_bins x n_bins.
    pub covariance: Vec<Vec<f64>>,
}

impl BinCovariance {
    /// The full-covariance error bar of each bin.
    pub fn sigma(&self) -> Vec<f64> {
        (0..self.covariance.len())
            .map(|i| self.covariance[i][i].max(0.0).sqrt())
            .collect()
    }

    /// The rows of `bins-covariance.csv` (every (B, B'), row-major).
    pub fn rows(&self) -> Vec<BinCovarianceRow> {
        let sig = self.sigma();
        let nb = sig.len();
        let mut out = Vec::with_capacity(nb * nb);
        for i in 0..nb {
            for j in 0..nb {
                let c = self.covariance[i][j];
                out.push(BinCovarianceRow {
                    bin_a: i + 1,
                    bin_b: j + 1,
                    covariance: c,
                    correlation: c / (sig[i] * sig[j]),
                });
            }
        }
        out
    }
}

/// One entry of `bins-covariance.csv`.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BinCovarianceRow {
    /// 1-based bin numbers in the order of bins.csv.
    pub bin_a: usize,
    pub bin_b: usize,
    /// Cov(rho_B, rho_B') with the signal at the measured amplitude (units of A^2, squared).
    pub covariance: f64,
    pub correlation: f64,
}

/// The covariance of the bins `groups` (pair indices in row-major pair order, as
/// [`crate::bins::bin_groups`]) for weighted pulsars `w`, pattern matrix `g` (N x N, unit
/// diagonal), common auto-power `dc` in the analysis (template units, length 2K; see
/// [`crate::paircov`]) and signal amplitude squared `a2`.
pub fn bin_covariance(
    w: &[Weighted],
    g: &Array2<f64>,
    dc: &[f64],
    a2: f64,
    groups: &[Vec<usize>],
) -> Result<BinCovariance> {
    let n = w.len();
    let m = w.first().map_or(0, |x| x.z.nrows());
    let nm = n * m;
    if nm > MAX_STACKED {
        return Err(Error::setting(
            "bin covariance",
            format!("N 2K = {nm} exceeds {MAX_STACKED} (the cost grows as N^3 (2K)^2)"),
        ));
    }
    let a2 = a2.max(0.0);
    let z: Vec<Array2<f64>> = w.iter().map(|x| x.z.clone()).collect();
    let c = JointBlocks::new(&z, g, dc, a2)?;
    bin_covariance_with(&c, w, a2, groups)
}

/// [`bin_covariance`] from the slices `c` of the joint covariance C~ at `a2`.
pub fn bin_covariance_with(
    c: &JointBlocks,
    w: &[Weighted],
    a2: f64,
    groups: &[Vec<usize>],
) -> Result<BinCovariance> {
    let n = w.len();
    let m = w.first().map_or(0, |x| x.z.nrows());
    if (c.pulsars(), c.components()) != (n, m) {
        return Err(Error::setting(
            "bin covariance",
            "the joint covariance must be N 2K square",
        ));
    }
    let z: Vec<&Array2<f64>> = w.iter().map(|x| &x.z).collect();
    // Pair index -> (a, b) and the bin weights W_B = sum tr(Z~_a Z~_b).
    let mut pair_ab = Vec::with_capacity(n * n.saturating_sub(1) / 2);
    for a in 0..n {
        for b in a + 1..n {
            pair_ab.push((a, b));
        }
    }
    let nb = groups.len();
    let mut wb = Vec::with_capacity(nb);
    let mut members = Vec::with_capacity(nb);
    for idx in groups {
        let mut sum = 0.0;
        let mut ab = Vec::with_capacity(idx.len());
        for &p in idx {
            let (a, b) = *pair_ab.get(p).ok_or_else(|| {
                Error::setting("bin covariance", "a bin names a pair that does not exist")
            })?;
            sum += crate::optimal::frobenius(z[a], z[b]);
            ab.push((a, b));
        }
        wb.push(sum);
        members.push(ab);
    }
    // With W_ij the N x N matrix W_ij[b, c] = C[(b, j), (c, i)] (one component pair (i, j) of
    // every pulsar pair), tau_B = sum_ij W_ij^T H_B W_ij, so
    //   Cov(Q_B, Q_B') W_B W_B' = (1/2) tr(H_B' tau_B) = (1/2) sum_ij <W_ij H_B', H_B W_ij>,
    // and, C being symmetric, W_ji = W_ij^T and W_ij H_B' = (H_B' W_ji)^T. With
    // L_B(ij) = H_B W_ij (H_B is sparse: two row additions per pair of the bin) the term of
    // (i, j) is (1/2) <L_B'(ji)^T, L_B(ij)>; the terms of (i, j) and (j, i) together are
    // (X + X^T) / 2 with X[B, B'] = <L_B(ij), L_B'(ji)^T>, one small product over all bins.
    // Everything per (i, j) is a few N x N matrices per bin (cache-resident), and nothing of
    // size (N 2K)^2 is written.
    let nn = n * n;
    let partners: Vec<Partners> = members.iter().map(|m| Partners::of(m, n)).collect();
    // W_ij[b, c] = C~[(b, j), (c, i)]: the slice S_ji.
    let gather = |i: usize, j: usize| -> Array2<f64> { c.slice(j, i) };
    let share = |(i, j): (usize, usize)| -> Array2<f64> {
        let wij = gather(i, j);
        let lij = left_rows(&partners, standard(&wij), n, false);
        if i == j {
            // L_B(ii)^T is the transpose of L_B(ii): the same values, no second pass of
            // row additions.
            let mut lt = Array2::<f64>::zeros((nb, nn));
            for (src, mut dst) in lij.rows().into_iter().zip(lt.rows_mut()) {
                for x in 0..n {
                    for y in 0..n {
                        dst[y * n + x] = src[x * n + y];
                    }
                }
            }
            row_dots(standard(&lij), standard(&lt), nn) * 0.5
        } else {
            let lt = left_rows(&partners, standard(&gather(j, i)), n, true);
            let x = row_dots(standard(&lij), standard(&lt), nn);
            (&x + &x.t()) * 0.5
        }
    };
    let tasks: Vec<(usize, usize)> = (0..m).flat_map(|i| (i..m).map(move |j| (i, j))).collect();
    // Tasks in parallel, TASK_CHUNK at a time (the shares held at once stay bounded for arrays
    // with few pulsars and many frequencies; large enough that the workers seldom wait), their
    // shares (nb x nb each) added in task order: thread-count independent bytes.
    let mut total = Array2::<f64>::zeros((nb, nb));
    for part in tasks.chunks(TASK_CHUNK) {
        let shares: Vec<Array2<f64>> = part.par_iter().map(|&t| share(t)).collect();
        for q in shares {
            total += &q;
        }
    }
    let mut cov = vec![vec![0.0; nb]; nb];
    for bi in 0..nb {
        for bj in 0..nb {
            cov[bi][bj] = total[[bi, bj]] / (wb[bi] * wb[bj]);
        }
    }
    // Symmetric in exact arithmetic; remove rounding asymmetry.
    for i in 0..nb {
        for j in i + 1..nb {
            let v = 0.5 * (cov[i][j] + cov[j][i]);
            cov[i][j] = v;
            cov[j][i] = v;
        }
    }
    if cov.iter().flatten().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: "the covariance of the binned correlations".into(),
        });
    }
    Ok(BinCovariance {
        amplitude2: a2,
        covariance: cov,
    })
}

/// The entries of a standard-layout matrix, row-major.
fn standard(a: &Array2<f64>) -> &[f64] {
    a.as_slice().expect("a product is in standard layout")
}

/// The pairs of one bin by pulsar: for each row a, the rows b of the pairs (a, b) or (b, a)
/// of the bin, in the bin's pair order (compressed rows: `list[start[a]..start[a + 1]]`), each
/// stored as the offset b N of its row in an N x N row-major matrix.
struct Partners {
    start: Vec<usize>,
    list: Vec<usize>,
}

impl Partners {
    fn of(pairs: &[(usize, usize)], n: usize) -> Self {
        let mut start = vec![0usize; n + 1];
        for &(a, b) in pairs {
            start[a + 1] += 1;
            start[b + 1] += 1;
        }
        for x in 0..n {
            start[x + 1] += start[x];
        }
        let mut next = start.clone();
        let mut list = vec![0usize; start[n]];
        for &(a, b) in pairs {
            list[next[a]] = b * n;
            next[a] += 1;
            list[next[b]] = a * n;
            next[b] += 1;
        }
        Partners { start, list }
    }
}

/// L_B = H_B W for every bin B (`partners`: the pairs of each bin by row; `w`: an N x N
/// matrix, row-major), one bin per row of an nb x N^2 matrix; `transpose` stores L_B^T
/// instead. H_B is the symmetric 0/1 matrix of the bin's pairs, so row a of L_B is the sum of
/// the rows b of W over the pairs (a, b) of the bin, added in the bin's pair order. The widest
/// vector instructions the CPU has are used (chosen at run time); the additions are the same
/// element-wise IEEE additions in the same order whatever the width, so the bytes do not depend
/// on the CPU.
fn left_rows(partners: &[Partners], w: &[f64], n: usize, transpose: bool) -> Array2<f64> {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx512f") {
            // SAFETY: the CPU has AVX-512F (checked just above).
            return unsafe { left_rows_avx512(partners, w, n, transpose) };
        }
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has AVX2 (checked just above).
            return unsafe { left_rows_avx2(partners, w, n, transpose) };
        }
    }
    left_rows_generic(partners, w, n, transpose)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn left_rows_avx2(
    partners: &[Partners],
    w: &[f64],
    n: usize,
    transpose: bool,
) -> Array2<f64> {
    left_rows_generic(partners, w, n, transpose)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn left_rows_avx512(
    partners: &[Partners],
    w: &[f64],
    n: usize,
    transpose: bool,
) -> Array2<f64> {
    left_rows_generic(partners, w, n, transpose)
}

/// Columns per tile of [`left_rows_generic`]: its running sums stay in vector registers.
const TILE: usize = 32;

/// [`left_rows`] for the instruction set it is inlined into.
#[inline(always)]
fn left_rows_generic(partners: &[Partners], w: &[f64], n: usize, transpose: bool) -> Array2<f64> {
    let nn = n * n;
    let mut out = Array2::<f64>::zeros((partners.len(), nn));
    for (pt, mut dst) in partners.iter().zip(out.rows_mut()) {
        let dst = dst.as_slice_mut().expect("standard layout");
        // Column tiles of TILE: the tile of W (N TILE doubles, 25.6 kB at N = 100) stays in
        // the first-level cache, and each row's sums of a tile stay in registers while every
        // partner row is added, then are stored once (before: a load and a store of the sum
        // per addition). The last columns go in tiles of 4, then 1 (fixed widths, so that
        // their sums stay in registers too). Each element still receives its additions from 0
        // in the bin's pair order, so the sums are the same bytes; rows without a pair in the
        // bin stay 0.
        let mut c0 = 0;
        while c0 + TILE <= n {
            tile_rows::<TILE>(pt, w, n, c0, transpose, dst);
            c0 += TILE;
        }
        while c0 + 4 <= n {
            tile_rows::<4>(pt, w, n, c0, transpose, dst);
            c0 += 4;
        }
        while c0 < n {
            tile_rows::<1>(pt, w, n, c0, transpose, dst);
            c0 += 1;
        }
    }
    out
}

/// Columns `c0..c0 + W` of L_B (or of L_B^T with `transpose`) into `dst`: for each row x,
/// the sum from 0 of the partner rows of W in the bin's pair order. Two rows are summed side by
/// side (two independent chains of additions the processor overlaps, instead of one chain
/// waiting on each addition's latency); each element's additions keep their order.
#[inline(always)]
fn tile_rows<const W: usize>(
    pt: &Partners,
    w: &[f64],
    n: usize,
    c0: usize,
    transpose: bool,
    dst: &mut [f64],
) {
    let tile = &w[c0..];
    let row = |off: usize| -> &[f64; W] { tile[off..off + W].try_into().expect("one tile") };
    let add = |acc: &mut [f64; W], src: &[f64; W]| {
        for (d, v) in acc.iter_mut().zip(src) {
            *d += *v;
        }
    };
    let mut store = |x: usize, acc: &[f64; W]| {
        if transpose {
            for (k, v) in acc.iter().enumerate() {
                dst[(c0 + k) * n + x] = *v;
            }
        } else {
            dst[x * n + c0..x * n + c0 + W].copy_from_slice(acc);
        }
    };
    let list = |x: usize| &pt.list[pt.start[x]..pt.start[x + 1]];
    let mut x = 0;
    while x < n {
        let l0 = list(x);
        let l1 = if x + 1 < n { list(x + 1) } else { &[][..] };
        let mut a0 = [0.0f64; W];
        let mut a1 = [0.0f64; W];
        let common = l0.len().min(l1.len());
        for (&b0, &b1) in l0[..common].iter().zip(&l1[..common]) {
            add(&mut a0, row(b0));
            add(&mut a1, row(b1));
        }
        for &b in &l0[common..] {
            add(&mut a0, row(b));
        }
        for &b in &l1[common..] {
            add(&mut a1, row(b));
        }
        // Rows without a pair in the bin stay 0 (the output starts zeroed).
        if !l0.is_empty() {
            store(x, &a0);
        }
        if !l1.is_empty() {
            store(x + 1, &a1);
        }
        x += 2;
    }
}

/// The fit of the Hellings-Downs curve to the bins with their full covariance.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BinFit {
    /// Generalised least-squares A^2 of rho_B = A^2 hd_B.
    pub amplitude2: f64,
    /// Its uncertainty (hd^T Cov^-1 hd)^(-1/2).
    pub amplitude2_sigma: f64,
    pub chi2: f64,
    /// n_bins - 1.
    pub degrees_of_freedom: usize,
    /// P(chi^2_dof > chi2); absent with one bin (no degrees of freedom).
    pub p_value: Option<f64>,
    /// The A^2 at which the covariance was evaluated.
    pub covariance_amplitude2: f64,
    pub assumptions: String,
}

/// What the bin fit's p-value assumes.
pub const BIN_FIT_ASSUMPTIONS: &str = "chi-square of the Hellings-Downs curve (amplitude fitted by generalised least squares) to the binned correlations with their full covariance evaluated at the measured amplitude and held fixed; degrees of freedom n_bins - 1; the p-value assumes Gaussian bins (only approximately true: bins are sums of products of Gaussian data), the noise model, and a background with the template's spectrum; it is a consistency check of the pattern, not a detection statistic; a detection claim needs the collaboration's full analysis.";

/// Fit A^2 hd to the bin correlations `rho` with covariance `cov`.
pub fn fit_bins(rho: &[f64], hd: &[f64], cov: &BinCovariance) -> Result<BinFit> {
    let nb = rho.len();
    if nb == 0 || hd.len() != nb || cov.covariance.len() != nb {
        return Err(Error::setting(
            "bin fit",
            "bins, Hellings-Downs values and covariance must have one size",
        ));
    }
    let c = Array2::from_shape_fn((nb, nb), |(i, j)| cov.covariance[i][j]);
    // Scale to unit diagonal before the Cholesky factor (the entries are ~A^4).
    let d: Vec<f64> = (0..nb).map(|i| c[[i, i]].sqrt()).collect();
    if d.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
        return Err(Error::NotPositiveDefinite {
            what: "the covariance of the binned correlations (a bin with zero variance)".into(),
            pivot: 0,
        });
    }
    let cs = Array2::from_shape_fn((nb, nb), |(i, j)| c[[i, j]] / (d[i] * d[j]));
    let l = cholesky_lower(&cs, "the covariance of the binned correlations")?;
    let solve = |v: &[f64]| -> Array1<f64> {
        // forward substitution L y = v / d
        let mut y = Array1::<f64>::zeros(nb);
        for i in 0..nb {
            let mut s = v[i] / d[i];
            for k in 0..i {
                s -= l[[i, k]] * y[k];
            }
            y[i] = s / l[[i, i]];
        }
        y
    };
    let r = solve(rho);
    let mvec = solve(hd);
    let mm = mvec.dot(&mvec);
    let a2 = mvec.dot(&r) / mm;
    let resid = &r - &(&mvec * a2);
    let chi2 = resid.dot(&resid);
    let dof = nb - 1;
    let p_value = if dof > 0 {
        let dist = ChiSquared::new(dof as f64).map_err(|_| Error::NonFinite {
            what: "the chi-square distribution of the bin fit".into(),
        })?;
        Some(dist.sf(chi2))
    } else {
        None
    };
    Ok(BinFit {
        amplitude2: a2,
        amplitude2_sigma: mm.powf(-0.5),
        chi2,
        degrees_of_freedom: dof,
        p_value,
        covariance_amplitude2: cov.amplitude2,
        assumptions: BIN_FIT_ASSUMPTIONS.to_string(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::optimal::frobenius;
    use crate::orf::{pattern_matrix, Pattern};
    use crate::paircov::joint_covariance;
    use crate::rng::{stream, Purpose};
    use crate::sky::isotropic_direction;
    use ndarray::s;
    use rand::Rng;
    use rand_distr::StandardNormal;

    fn toy(n: usize, m: usize, seed: u64) -> (Vec<Weighted>, Array2<f64>) {
        let mut r = stream(seed, Purpose::Injection, 0);
        let w = (0..n)
            .map(|_| {
                let a = Array2::from_shape_fn((m, m + 2), |_| r.sample::<f64, _>(StandardNormal));
                Weighted {
                    x: Array1::zeros(m),
                    z: a.dot(&a.t()) * 0.3 + Array2::<f64>::eye(m) * 0.2,
                }
            })
            .collect();
        let dirs: Vec<_> = (0..n)
            .map(|_| isotropic_direction(r.random(), r.random()))
            .collect();
        let g = Array2::from_shape_vec((n, n), pattern_matrix(Pattern::Hd, &dirs)).unwrap();
        (w, g)
    }

    fn groups(n: usize, nb: usize) -> Vec<Vec<usize>> {
        let np = n * (n - 1) / 2;
        (0..nb)
            .map(|k| (k * np / nb..(k + 1) * np / nb).collect())
            .collect()
    }

    /// Without signal and without common auto-power the bins are independent with variance
    /// 1 / W_B = sigma_B^2 (Chamberlin et al. 2015: pairs are independent under the null).
    #[test]
    fn without_signal_the_bins_are_independent() {
        let (w, g) = toy(6, 4, 1);
        let gr = groups(6, 4);
        let bc = bin_covariance(&w, &g, &[0.0; 4], 0.0, &gr).unwrap();
        let mut pair = Vec::new();
        for a in 0..6 {
            for b in a + 1..6 {
                pair.push((a, b));
            }
        }
        for (i, idx) in gr.iter().enumerate() {
            let wsum: f64 = idx
                .iter()
                .map(|&p| frobenius(&w[pair[p].0].z, &w[pair[p].1].z))
                .sum();
            assert!((bc.covariance[i][i] * wsum - 1.0).abs() < 1e-12);
            for j in 0..gr.len() {
                if j != i {
                    assert!(bc.covariance[i][j].abs() < 1e-14 * bc.covariance[i][i]);
                }
            }
        }
    }

    /// The trace form equals the explicit sum over pairs of pairs of the Isserlis covariance
    /// Cov(n_ab, n_cd) = <C~_ac, C~_bd> + <C~_ad, C~_bc> (Allen & Romano 2023 in the reduced
    /// space; docs/pair-covariance.md), with and without common auto-power in P.
    #[test]
    fn trace_form_matches_the_sum_over_pairs() {
        let (n, m) = (5, 4);
        let (w, g) = toy(n, m, 2);
        let z: Vec<Array2<f64>> = w.iter().map(|x| x.z.clone()).collect();
        let gr = groups(n, 3);
        let mut pair = Vec::new();
        for a in 0..n {
            for b in a + 1..n {
                pair.push((a, b));
            }
        }
        for dc in [vec![0.0; m], vec![0.5, 0.5, 0.1, 0.1]] {
            let a2 = 1.7;
            let bc = bin_covariance(&w, &g, &dc, a2, &gr).unwrap();
            let c = joint_covariance(&z, &g, &dc, a2).unwrap();
            let blk = |a: usize, b: usize| {
                c.slice(s![a * m..(a + 1) * m, b * m..(b + 1) * m])
                    .to_owned()
            };
            for (i, gi) in gr.iter().enumerate() {
                for (j, gj) in gr.iter().enumerate() {
                    let (mut q, mut wi, mut wj) = (0.0, 0.0, 0.0);
                    for &p in gi {
                        let (a, b) = pair[p];
                        wi += frobenius(&z[a], &z[b]);
                        for &p2 in gj {
                            let (cc, d) = pair[p2];
                            q += frobenius(&blk(a, cc), &blk(b, d))
                                + frobenius(&blk(a, d), &blk(b, cc));
                        }
                    }
                    for &p2 in gj {
                        let (cc, d) = pair[p2];
                        wj += frobenius(&z[cc], &z[d]);
                    }
                    let want = q / (wi * wj);
                    assert!(
                        (bc.covariance[i][j] - want).abs() < 1e-10 * want.abs().max(1e-300),
                        "({i},{j}) {} vs {want}",
                        bc.covariance[i][j]
                    );
                }
            }
        }
    }

    /// The fit recovers an exact Hellings-Downs line with chi^2 = 0, and its p-value follows
    /// statrs' chi-square survival function.
    #[test]
    fn fit_of_an_exact_line() {
        let (w, g) = toy(6, 4, 3);
        let gr = groups(6, 4);
        let bc = bin_covariance(&w, &g, &[0.0; 4], 2.0, &gr).unwrap();
        let hd = [0.3, 0.05, -0.12, 0.1];
        let rho: Vec<f64> = hd.iter().map(|h| 2.5 * h).collect();
        let f = fit_bins(&rho, &hd, &bc).unwrap();
        assert!((f.amplitude2 - 2.5).abs() < 1e-12);
        assert!(f.chi2 < 1e-20);
        assert_eq!(f.degrees_of_freedom, 3);
        assert!((f.p_value.unwrap() - 1.0).abs() < 1e-12);
        assert!(fit_bins(&rho[..2], &hd, &bc).is_err());
    }
}
