//! The covariance of the pair correlations with a signal present, and from it the honest
//! uncertainty of the optimal-statistic amplitude (Allen & Romano 2023, PRD 108, 043026;
//! docs/pair-covariance.md).
//!
//! Everything is in the template-weighted space of [`crate::optimal::weight`]:
//! x~_a = Phi^(1/2) X_a, Z~_a = Phi^(1/2) Z_a Phi^(1/2). For a Gaussian background of amplitude
//! A with the template's spectrum and pattern G (G_aa = 1), on the analysis frequencies, the
//! covariance of the stacked x~ is
//!
//!   C~_ab = A^2 G_ab Z~_a Z~_b                      (a != b)
//!   C~_aa = Z~_a + Z~_a (A^2 I - D_c) Z~_a           (a = b)
//!
//! where D_c = Phi_c / Phi is the common auto-power already inside the analysis covariance P_a,
//! in units of the template (0 when P_a has no common process; A^2 when it holds exactly the
//! injected one, which gives the familiar C~_aa = Z~_a; docs/pair-covariance.md). The diagonal
//! block follows
//! from Cov(X_a) = F^T P_a^-1 C_true P_a^-1 F with C_true = P_a - F Phi_c F^T + A^2 F Phi F^T.
//! The form is linear in a2 = A^2: C~ = C0 + a2 C1 with C0 = blockdiag(Z~_a - Z~_a D_c Z~_a) and
//! C1_ab = G_ab Z~_a Z~_b (G_aa = 1).
//!
//! The OS numerator is the quadratic form Q = sum_{a<b} G_ab x~_a . x~_b = x^T M x with
//! M = (1/2) (G' (x) I), G' = G with zero diagonal, and A2_hat = Q / S with
//! S = sum_{a<b} G_ab^2 tr(Z~_a Z~_b) = sigma_0^-2 (Chamberlin et al. 2015). For Gaussian x,
//! Var(x^T M x) = 2 tr(M C M C) (Isserlis 1918; the pairwise form of docs/pair-covariance.md,
//! Cov(X_a^T Phi X_b, X_c^T Phi X_d) = tr(Phi C_bd Phi C_ac^T) + tr(Phi C_bc Phi C_ad^T), summed
//! with the weights G_ab G_cd). Expanding C = C0 + a2 C1 gives a quadratic polynomial in a2:
//!
//!   Var(Q) = v0 + v1 a2 + v2 a2^2,
//!   v0 = (1/2) tr(Y0 Y0),  v1 = tr(Y0 Y1),  v2 = (1/2) tr(Y1 Y1),  Yk = (G' (x) I) Ck,
//!
//! computed once per analysis in O(N^3 (2K)^2) (two N x N products per pair of components,
//! nothing of size (N 2K)^2 formed), after which the variance at any amplitude (the injected one, or the recovered one a data analyst would plug in) costs
//! nothing. At a2 = 0 with D_c = 0 it reduces to S, i.e. Var(A2_hat) = sigma_0^2.

use crate::error::{Error, Result};
use crate::optimal::frobenius;
use ndarray::{s, Array2};

/// Var(Q) = v0 + v1 a2 + v2 a2^2 and the normalisation S, so that
/// Var(A2_hat) = Var(Q) / S^2.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct VariancePolynomial {
    pub v0: f64,
    pub v1: f64,
    pub v2: f64,
    /// S = sum_{a<b} G_ab^2 tr(Z~_a Z~_b) = sigma_0^-2.
    pub norm: f64,
}

impl VariancePolynomial {
    /// Var(A2_hat) with the signal at amplitude squared `a2` (negative values are clamped to
    /// 0: a negative power has no covariance).
    pub fn amplitude2_variance(&self, a2: f64) -> f64 {
        let a2 = a2.max(0.0);
        (self.v0 + self.v1 * a2 + self.v2 * a2 * a2) / (self.norm * self.norm)
    }

    /// The standard deviation of A2_hat at `a2`.
    pub fn amplitude2_sigma(&self, a2: f64) -> f64 {
        self.amplitude2_variance(a2).max(0.0).sqrt()
    }

    /// sigma_0 = S^(-1/2), the weak-signal uncertainty.
    pub fn sigma0(&self) -> f64 {
        self.norm.powf(-0.5)
    }
}

fn check_inputs(z: &[Array2<f64>], g: &Array2<f64>, dc: &[f64]) -> Result<usize> {
    let n = z.len();
    if n < 2 {
        return Err(Error::setting(
            "pulsars",
            "the pair covariance needs at least two pulsars",
        ));
    }
    let m = z[0].nrows();
    if z.iter().any(|za| za.dim() != (m, m)) || dc.len() != m {
        return Err(Error::setting(
            "pair covariance",
            "every Z~ must be square of one size, matching D_c",
        ));
    }
    if g.dim() != (n, n) {
        return Err(Error::setting(
            "pair covariance",
            "the pattern matrix must be N x N",
        ));
    }
    Ok(m)
}

/// B_a = Z~_a - Z~_a D_c Z~_a, the diagonal blocks of C0.
fn noise_blocks(z: &[Array2<f64>], dc: &[f64]) -> Vec<Array2<f64>> {
    z.iter()
        .map(|za| {
            let mut zd = za.clone();
            for (mut col, &d) in zd.columns_mut().into_iter().zip(dc) {
                col *= d;
            }
            za - &zd.dot(za)
        })
        .collect()
}

/// The variance polynomial of A2_hat for analysis matrices `z` (the weighted Z~_a of the
/// analysis, i.e. with D_c already inside P_a), pattern matrix `g` (N x N with unit diagonal:
/// the injected pattern, also used as the OS weights) and the common auto-power `dc` = D_c
/// (length 2K) in the analysis covariance.
pub fn variance_polynomial(
    z: &[Array2<f64>],
    g: &Array2<f64>,
    dc: &[f64],
) -> Result<VariancePolynomial> {
    let m = check_inputs(z, g, dc)?;
    let n = z.len();
    let mut gp = g.clone();
    for a in 0..n {
        gp[[a, a]] = 0.0;
    }
    let mut norm = 0.0;
    for a in 0..n {
        for b in a + 1..n {
            norm += g[[a, b]] * g[[a, b]] * frobenius(&z[a], &z[b]);
        }
    }
    if !(norm.is_finite() && norm > 0.0) {
        return Err(Error::NonFinite {
            what: "the OS normalisation sum G_ab^2 tr(Z~_a Z~_b) (is the pattern zero for every pair?)"
                .into(),
        });
    }
    let bl = noise_blocks(z, dc);

    // v0 = (1/2) sum_ab G'_ab^2 <B_a, B_b>.
    let mut v0 = 0.0;
    for a in 0..n {
        for b in a + 1..n {
            v0 += gp[[a, b]] * gp[[a, b]] * frobenius(&bl[a], &bl[b]);
        }
    }

    // v2 and v1 one pair of components (i, j) at a time, as in per_frequency.rs: with
    // V_ij[c, b] = C1[(c, i), (b, j)] (the signal slice of JointBlocks at a2 = 1), block (i, j)
    // of Y1 is G' V_ij, and C1 symmetric gives V_ji = V_ij^T, so
    //   tr(Y1 Y1) = sum_ij <G' V_ij, V_ij G'>,
    //   tr(Y0 Y1) = sum_ij sum_ab G'_ab B_b[i, j] (V_ij G')[a, b]   (C0 = blockdiag B),
    // the terms of (i, j) and (j, i) equal (B symmetric, G' symmetric). Two N x N products per
    // pair i <= j (the N^3 (2K)^2 operations of the one product (G' (x) I) C1), on
    // cache-resident matrices: nothing of size (N 2K)^2 is formed (two such matrices were 9.2 GB
    // at 200 pulsars x 60 frequencies). The pairs run in one parallel loop and their terms are
    // added in pair order, so the result does not depend on the thread count.
    let blocks = JointBlocks::new(z, g, dc, 1.0)?;
    let term = |(i, j): (usize, usize)| -> (f64, f64) {
        let v = blocks.signal_slice(i, j);
        let left = gp.dot(&v);
        let right = v.dot(&gp);
        let mut t1 = 0.0;
        for a in 0..n {
            for b in 0..n {
                t1 += gp[[a, b]] * blocks.noise_entry(b, i, j) * right[[a, b]];
            }
        }
        let w = if i == j { 1.0 } else { 2.0 };
        (w * frobenius(&left, &right), w * t1)
    };
    use rayon::prelude::*;
    let tasks: Vec<(usize, usize)> = (0..m).flat_map(|i| (i..m).map(move |j| (i, j))).collect();
    let terms: Vec<(f64, f64)> = tasks.par_iter().map(|&t| term(t)).collect();
    let (mut v1, mut v2) = (0.0, 0.0);
    for (t2, t1) in terms {
        v2 += t2;
        v1 += t1;
    }
    v2 *= 0.5;
    let out = VariancePolynomial { v0, v1, v2, norm };
    if [v0, v1, v2].iter().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: "the pair covariance with signal".into(),
        });
    }
    Ok(out)
}

/// The full joint covariance C~ = C0 + a2 C1 of the stacked weighted data (N 2K square), for
/// checks and small arrays.
pub fn joint_covariance(
    z: &[Array2<f64>],
    g: &Array2<f64>,
    dc: &[f64],
    a2: f64,
) -> Result<Array2<f64>> {
    let m = check_inputs(z, g, dc)?;
    let n = z.len();
    let bl = noise_blocks(z, dc);
    let nm = n * m;
    let mut c = crate::linalg::zeros_large(nm, nm);
    if nm == 0 {
        return Ok(c);
    }
    // Block rows in parallel (each block is the same product as a serial loop would compute,
    // so the bytes do not depend on the thread count).
    use rayon::prelude::*;
    c.as_slice_mut()
        .expect("standard layout")
        .par_chunks_mut(m * nm)
        .enumerate()
        .for_each(|(a, rows)| {
            let mut rows =
                ndarray::ArrayViewMut2::from_shape((m, nm), rows).expect("one block row of C");
            for b in 0..n {
                let mut blk = z[a].dot(&z[b]) * (a2 * g[[a, b]]);
                if a == b {
                    blk += &bl[a];
                }
                rows.slice_mut(s![.., b * m..(b + 1) * m]).assign(&blk);
            }
        });
    Ok(c)
}

/// The joint covariance C~ = C0 + a2 C1 of [`joint_covariance`] served one component pair at a
/// time, without forming its (N 2K)^2 entries: for components r, s (0..2K) the N x N matrix
///
///   S_rs[b, c] = C~[(b, r), (c, s)] = a2 G_bc (Z~_b Z~_c)[r, s] + delta_bc B_b[r, s],
///
/// (B_b the noise block of C0) is one N x 2K by 2K x N product of the stacked rows r of every
/// Z~_b with the stacked columns s of every Z~_c, scaled by a2 G and with B on the diagonal.
/// Every slice together costs the same operations as the full matrix (N^2 (2K)^3 multiply-adds),
/// but each is a cache-resident product and the callers, which need the slices anyway, no longer
/// gather them with strided reads from a matrix of 63 MB at 100 pulsars x 14 frequencies.
pub struct JointBlocks {
    n: usize,
    m: usize,
    /// rows[r]: N x 2K, row b = row r of Z~_b.
    rows: Vec<Array2<f64>>,
    /// cols[s]: N x 2K, row c = column s of Z~_c.
    cols: Vec<Array2<f64>>,
    /// a2 G (N x N).
    scaled_pattern: Array2<f64>,
    /// B_b = Z~_b - Z~_b D_c Z~_b.
    noise: Vec<Array2<f64>>,
}

impl JointBlocks {
    /// The slices of C~ for weighted matrices `z`, pattern `g` (N x N, unit diagonal), common
    /// auto-power `dc` (length 2K) and signal amplitude squared `a2`.
    pub fn new(z: &[Array2<f64>], g: &Array2<f64>, dc: &[f64], a2: f64) -> Result<Self> {
        let m = check_inputs(z, g, dc)?;
        let n = z.len();
        let rows = (0..m)
            .map(|r| Array2::from_shape_fn((n, m), |(b, k)| z[b][[r, k]]))
            .collect();
        let cols = (0..m)
            .map(|s| Array2::from_shape_fn((n, m), |(c, k)| z[c][[k, s]]))
            .collect();
        Ok(JointBlocks {
            n,
            m,
            rows,
            cols,
            scaled_pattern: g * a2,
            noise: noise_blocks(z, dc),
        })
    }

    /// Number of pulsars N.
    pub fn pulsars(&self) -> usize {
        self.n
    }

    /// Components per pulsar, 2K.
    pub fn components(&self) -> usize {
        self.m
    }

    /// S_rs (N x N, see the type's documentation).
    pub fn slice(&self, r: usize, s: usize) -> Array2<f64> {
        let mut out = self.signal_slice(r, s);
        for b in 0..self.n {
            out[[b, b]] += self.noise[b][[r, s]];
        }
        out
    }

    /// The signal part of S_rs alone: a2 G_bc (Z~_b Z~_c)[r, s] (the slice of a2 C1).
    pub fn signal_slice(&self, r: usize, s: usize) -> Array2<f64> {
        let mut out = self.rows[r].dot(&self.cols[s].t());
        out *= &self.scaled_pattern;
        out
    }

    /// B_b[r, s], the noise part of S_rs (its diagonal).
    pub fn noise_entry(&self, b: usize, r: usize, s: usize) -> f64 {
        self.noise[b][[r, s]]
    }
}

/// Var(A2_hat) by the explicit sum over pairs of pairs of the Isserlis form
/// (docs/pair-covariance.md),
/// Cov(n_ab, n_cd) = <C~_ac, C~_bd> + <C~_ad, C~_bc> (Allen & Romano 2023), with n_ab = x~_a.x~_b.
/// O(N^4 (2K)^2): for checks only.
pub fn amplitude2_variance_by_pairs(
    z: &[Array2<f64>],
    g: &Array2<f64>,
    dc: &[f64],
    a2: f64,
) -> Result<f64> {
    let m = check_inputs(z, g, dc)?;
    let n = z.len();
    let c = joint_covariance(z, g, dc, a2)?;
    let blk = |a: usize, b: usize| {
        c.slice(s![a * m..(a + 1) * m, b * m..(b + 1) * m])
            .to_owned()
    };
    let pairs: Vec<(usize, usize)> = (0..n)
        .flat_map(|a| (a + 1..n).map(move |b| (a, b)))
        .collect();
    let mut num = 0.0;
    let mut norm = 0.0;
    for &(a, b) in &pairs {
        norm += g[[a, b]].powi(2) * frobenius(&z[a], &z[b]);
        for &(cc, d) in &pairs {
            let cov = frobenius(&blk(a, cc), &blk(b, d)) + frobenius(&blk(a, d), &blk(b, cc));
            num += g[[a, b]] * g[[cc, d]] * cov;
        }
    }
    Ok(num / (norm * norm))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::linalg::cholesky_lower;
    use crate::orf::{pattern_matrix, Pattern};
    use crate::rng::{stream, Purpose};
    use crate::sky::isotropic_direction;
    use rand::Rng;
    use rand_distr::StandardNormal;

    /// Every slice S_rs of JointBlocks is the full matrix's entries C~[(b, r), (c, s)] (the
    /// definition, formed densely by joint_covariance), to 1e-13 of the largest entry (one
    /// product's rounding, in another summation order), with and without common auto-power.
    #[test]
    fn slices_are_the_joint_covariance() {
        let (n, m) = (6, 4);
        let (z, g) = toy(n, m, 21);
        for dc in [vec![0.0; m], vec![0.5, 0.5, 0.1, 0.1]] {
            let a2 = 2.3;
            let c = joint_covariance(&z, &g, &dc, a2).unwrap();
            let blocks = JointBlocks::new(&z, &g, &dc, a2).unwrap();
            let big = c.iter().fold(0.0f64, |x, v| x.max(v.abs()));
            for r in 0..m {
                for s in 0..m {
                    let sl = blocks.slice(r, s);
                    for b in 0..n {
                        for cc in 0..n {
                            let want = c[[b * m + r, cc * m + s]];
                            assert!(
                                (sl[[b, cc]] - want).abs() <= 1e-13 * big,
                                "({r},{s}) [{b},{cc}]"
                            );
                        }
                    }
                }
            }
        }
    }

    /// Random symmetric positive-definite 2K x 2K matrices and an HD pattern on random skies.
    fn toy(n: usize, m: usize, seed: u64) -> (Vec<Array2<f64>>, Array2<f64>) {
        let mut r = stream(seed, Purpose::Injection, 0);
        let z = (0..n)
            .map(|_| {
                let a = Array2::from_shape_fn((m, m + 2), |_| r.sample::<f64, _>(StandardNormal));
                a.dot(&a.t()) * 0.3 + Array2::<f64>::eye(m) * 0.2
            })
            .collect();
        let dirs: Vec<_> = (0..n)
            .map(|_| isotropic_direction(r.random(), r.random()))
            .collect();
        let g = Array2::from_shape_vec((n, n), pattern_matrix(Pattern::Hd, &dirs)).unwrap();
        (z, g)
    }

    /// Closed form (docs/pair-covariance.md; Chamberlin et al. 2015): with no signal and no
    /// common auto-power, Var(A2_hat) = sigma_0^2 = 1 / sum G_ab^2 / sigma_ab^2.
    #[test]
    fn variance_without_signal_is_sigma0_squared() {
        let (z, g) = toy(6, 4, 3);
        let poly = variance_polynomial(&z, &g, &[0.0; 4]).unwrap();
        let mut s = 0.0;
        for a in 0..6 {
            for b in a + 1..6 {
                s += g[[a, b]].powi(2) * frobenius(&z[a], &z[b]);
            }
        }
        let v = poly.amplitude2_variance(0.0);
        assert!((v * s - 1.0).abs() < 1e-12, "{}", v * s);
        assert!(poly.v1 > 0.0 && poly.v2 > 0.0);
    }

    /// The fast trace expansion equals the explicit sum over pairs of pairs of the
    /// Isserlis form (Allen & Romano 2023; docs/pair-covariance.md), with and without common
    /// auto-power in P.
    #[test]
    fn trace_expansion_matches_the_sum_over_pairs() {
        let (z, g) = toy(5, 4, 11);
        for dc in [vec![0.0; 4], vec![0.7, 0.7, 0.2, 0.2]] {
            let poly = variance_polynomial(&z, &g, &dc).unwrap();
            for a2 in [0.0, 0.5, 3.0] {
                let fast = poly.amplitude2_variance(a2);
                let slow = amplitude2_variance_by_pairs(&z, &g, &dc, a2).unwrap();
                assert!((fast / slow - 1.0).abs() < 1e-10, "{fast} vs {slow}");
            }
        }
    }

    /// Monte Carlo: draw the stacked data from the joint covariance by a Cholesky factor and
    /// compare the sample variance of A2_hat with the formula. The sample variance of n
    /// draws has relative standard error ~ sqrt(2/(n-1)) for near-Gaussian data (common
    /// practice; 5 standard errors allowed for the heavier tails of a quadratic form).
    #[test]
    fn variance_matches_draws_from_the_joint_covariance() {
        let (n, m) = (5, 4);
        let (z, g) = toy(n, m, 5);
        let dc = vec![0.0; m];
        let a2 = 2.0;
        let c = joint_covariance(&z, &g, &dc, a2).unwrap();
        let l = cholesky_lower(&c, "joint covariance").unwrap();
        let poly = variance_polynomial(&z, &g, &dc).unwrap();
        let draws = 20_000;
        let mut r = stream(99, Purpose::Injection, 1);
        let mut vals = Vec::with_capacity(draws);
        for _ in 0..draws {
            let e: ndarray::Array1<f64> = (0..n * m)
                .map(|_| r.sample::<f64, _>(StandardNormal))
                .collect();
            let x = l.dot(&e);
            let mut q = 0.0;
            for a in 0..n {
                for b in a + 1..n {
                    let xa = x.slice(s![a * m..(a + 1) * m]);
                    let xb = x.slice(s![b * m..(b + 1) * m]);
                    q += g[[a, b]] * xa.dot(&xb);
                }
            }
            vals.push(q / poly.norm);
        }
        let mean = vals.iter().sum::<f64>() / draws as f64;
        let var = vals.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (draws - 1) as f64;
        let expect = poly.amplitude2_variance(a2);
        let rel = (var / expect - 1.0).abs();
        assert!(
            rel < 5.0 * (2.0 / draws as f64).sqrt(),
            "sample {var} vs {expect}"
        );
        // and the weak-signal sigma_0 is clearly too small here
        assert!(expect > 1.5 * poly.sigma0().powi(2));
        // the mean is A^2 (unbiased)
        let sem = (var / draws as f64).sqrt();
        assert!((mean - a2).abs() < 4.0 * sem, "mean {mean}");
    }
}
