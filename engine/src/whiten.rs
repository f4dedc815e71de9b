//! The reduced-space Woodbury transform: from a pulsar's bare weighted reduction (its own
//! noise only) to the reduction with a common auto-power D_c Phi on the analysis frequencies,
//! without refactoring anything (Woodbury 1950; Hager 1989). With
//! P_a = P_a,0 + F Phi^(1/2) D_c Phi^(1/2) F^T,
//!
//!   x~_a = R_a x~_a,0,   Z~_a = R_a Z~_a,0,   R_a = (I + Z~_a,0 D_c)^-1.
//!
//! Used by injection campaigns and by the simulated and analytic nulls (docs/injection.md,
//! docs/null.md, "Precise pulsars").
//!
//! Why not the direct forms. For a precise pulsar whose auto-power is dominated by a strong
//! common process, Z~_a D_c reaches 10^4 and more at the lowest frequencies, and both the
//! reduction with the common process inside P (Z = F^T N^-1 F - (F^T N^-1 T) S^-1 (...): a
//! difference of nearly equal matrices) and the explicit inverse of I + Z~_0 D_c carry a
//! rounding error of about 10^4 eps relative to |Z~|. Where Z~ is nearly singular (a pulsar
//! with a short span, whose lowest frequencies the timing model absorbs) that error leaves
//! eigenvalues of -1e-9 |Z~|: no longer positive semi-definite, so no square root for the
//! simulated null and no analytic null. Here every result is a product of a square root with
//! its own transpose, positive semi-definite by construction:
//!
//!   Z~_0 = S S^T,  J = S^T D_c S = W diag(g) W^T,  Z~ = S (I + J)^-1 S^T = L L^T,
//!   L = S W diag((1 + g)^(-1/2))
//!
//! (the push-through identity (I + S S^T D)^-1 S = S (I + S^T D S)^-1, Henderson & Searle
//! 1981, eq. 21), and R from the eigen-decomposition of the symmetric K = D^(1/2) Z~_0 D^(1/2)
//! on the frequencies with D_c > 0. No difference of nearly equal matrices is formed and no
//! matrix worse conditioned than I + J (eigenvalues >= 1) is inverted.

use crate::analysis::Correlation;
use crate::error::{Error, Result};
use crate::null::simulated::psd_root;
use crate::reduce::{AutoPower, PulsarModel};
use crate::release::Release;
use ndarray::Array2;
use ndarray_linalg::{Eigh, UPLO};
use rayon::prelude::*;

/// A square root S (S S^T = Z, dim x dim) of a symmetric positive semi-definite matrix, from
/// the engine's eigen-decomposition root.
fn root_of(z: &Array2<f64>, what: &str) -> Result<Array2<f64>> {
    let d = z.nrows();
    let v = psd_root(z, what)?;
    Ok(Array2::from_shape_vec((d, d), v).expect("square root has dim^2 entries"))
}

fn check_dc(dc: &[f64], dim: usize, label: &str) -> Result<()> {
    if dc.len() != dim || dc.iter().any(|d| !(d.is_finite() && *d >= 0.0)) {
        return Err(Error::setting(
            "common auto-power",
            format!("D_c of pulsar {label} must have {dim} finite non-negative entries"),
        ));
    }
    Ok(())
}

/// Eigen-decomposition of a symmetric matrix; `what` names it in the error.
fn eigh(m: &Array2<f64>, what: &str) -> Result<(Vec<f64>, Array2<f64>)> {
    if m.iter().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite {
            what: what.to_string(),
        });
    }
    let (vals, vecs) = m.eigh(UPLO::Lower).map_err(|_| Error::NonFinite {
        what: what.to_string(),
    })?;
    Ok((vals.to_vec(), vecs))
}

/// L with L L^T = Z~ = (I + Z~_0 D_c)^-1 Z~_0, the analysed weighted Z~ of one pulsar, from its
/// bare weighted Z~_0 (dim x dim, symmetric positive semi-definite) and the diagonal D_c >= 0
/// (length dim), in the stable form of the module documentation. `label` names the pulsar in
/// the error (a bare Z~_0 that is not positive semi-definite beyond rounding).
pub fn analysed_root(z0: &Array2<f64>, dc: &[f64], label: &str) -> Result<Array2<f64>> {
    let dim = z0.nrows();
    check_dc(dc, dim, label)?;
    let s = root_of(z0, &format!("the bare Z~ of pulsar {label}"))?;
    if dc.iter().all(|&d| d == 0.0) {
        return Ok(s);
    }
    // J = S^T D S, symmetric positive semi-definite.
    let mut ds = s.clone();
    for (mut row, &d) in ds.rows_mut().into_iter().zip(dc) {
        row *= d;
    }
    let j = s.t().dot(&ds);
    let j = (&j + &j.t()) * 0.5;
    let (g, w) = eigh(&j, &format!("S^T D_c S of pulsar {label}"))?;
    let mut l = s.dot(&w);
    for (mut col, &gk) in l.columns_mut().into_iter().zip(&g) {
        // g >= 0 up to rounding of |J| eps; 1 + g >= 1 - tiny, so the scaling is bounded.
        col *= (1.0 + gk.max(0.0)).powf(-0.5);
    }
    Ok(l)
}

/// R = (I + Z~_0 D_c)^-1 and Z~ = R Z~_0 = L L^T of one pulsar (dim x dim; `dc` has length
/// dim), both in the stable forms of the module documentation. With P the frequencies where
/// D_c > 0 and O the others, I + Z~_0 D_c = [[I + Z_PP D_P, 0], [Z_OP D_P, I]], so
/// R_PP = D_P^(-1/2) (I + K)^-1 D_P^(1/2) with K = D_P^(1/2) Z_PP D_P^(1/2) = V diag(e) V^T,
/// R_OP = -Z_OP D_P R_PP, R_PO = 0, R_OO = I. `label` names the pulsar in the error.
pub fn woodbury_transform(
    z0: &Array2<f64>,
    dc: &[f64],
    label: &str,
) -> Result<(Array2<f64>, Array2<f64>)> {
    let dim = z0.nrows();
    check_dc(dc, dim, label)?;
    let l = analysed_root(z0, dc, label)?;
    let z = l.dot(&l.t());
    let z = (&z + &z.t()) * 0.5;

    let p: Vec<usize> = (0..dim).filter(|&i| dc[i] > 0.0).collect();
    if p.is_empty() {
        return Ok((Array2::<f64>::eye(dim), z));
    }
    let o: Vec<usize> = (0..dim).filter(|&i| dc[i] == 0.0).collect();
    let sq: Vec<f64> = p.iter().map(|&i| dc[i].sqrt()).collect();
    let k = Array2::from_shape_fn((p.len(), p.len()), |(a, b)| {
        sq[a] * 0.5 * (z0[[p[a], p[b]]] + z0[[p[b], p[a]]]) * sq[b]
    });
    let (e, v) = eigh(&k, &format!("D_c^1/2 Z~ D_c^1/2 of pulsar {label}"))?;
    let min = e.iter().cloned().fold(f64::INFINITY, f64::min);
    let top = e.iter().cloned().fold(0.0, f64::max);
    if min < -1e-8 * top.max(1.0) {
        return Err(Error::NotPositiveDefinite {
            what: format!("I + Z~ D_c of pulsar {label} (the Woodbury transform)"),
            pivot: 1,
        });
    }
    // (I + K)^-1 = V diag(1 / (1 + e)) V^T, then the diagonal similarity by D_P^(1/2).
    let mut vs = v.clone();
    for (mut col, &ek) in vs.columns_mut().into_iter().zip(&e) {
        col /= 1.0 + ek.max(0.0);
    }
    let inv = vs.dot(&v.t());
    let mut r = Array2::<f64>::eye(dim);
    for (a, &pa) in p.iter().enumerate() {
        for (b, &pb) in p.iter().enumerate() {
            r[[pa, pb]] = inv[[a, b]] * sq[b] / sq[a];
        }
    }
    for &oi in &o {
        for &pb in &p {
            let s: f64 = p
                .iter()
                .map(|&pa| z0[[oi, pa]] * dc[pa] * r[[pa, pb]])
                .sum();
            r[[oi, pb]] = -s;
        }
    }
    Ok((r, z))
}

/// D_c of a correlation analysis: the common auto-power over the template on each analysis
/// coefficient, phi_c(f_j) / phi(f_j) (length 2K; zeros without a common process).
pub fn common_over_template(c: &Correlation) -> Vec<f64> {
    match &c.common {
        None => vec![0.0; c.phi.len()],
        Some(law) => c
            .grid
            .freqs
            .iter()
            .zip(c.phi.chunks(2))
            .flat_map(|(&f, ph)| {
                let r = law.coefficient_variance(f, c.grid.t_span) / ph[0];
                [r, r]
            })
            .collect(),
    }
}

/// The roots L_a (L_a L_a^T = Z~_a, each 2K x 2K) of the analysed weighted Z~ of every pulsar
/// of a correlation analysis of `release`: the reduced Z itself without a common process, and
/// otherwise each pulsar's bare reduction (rebuilt without the common process, one rayon task
/// per pulsar) carried through [`analysed_root`]. This is the covariance of x~_a under the
/// null that the simulated and analytic nulls draw from (docs/null.md).
pub fn analysis_roots(release: &Release, c: &Correlation) -> Result<Vec<Array2<f64>>> {
    crate::linalg::single_threaded_blas();
    let h: Vec<f64> = c.phi.iter().map(|p| p.sqrt()).collect();
    let weighted = |z: &Array2<f64>| {
        let mut z = z.clone();
        for ((i, j), v) in z.indexed_iter_mut() {
            *v *= h[i] * h[j];
        }
        z
    };
    if c.common.is_none() {
        return c
            .reduced
            .iter()
            .map(|r| root_of(&weighted(&r.z), &format!("Z~ of pulsar {}", r.label)))
            .collect();
    }
    if release.pulsars.len() != c.reduced.len() {
        return Err(Error::setting(
            "release",
            "the correlation analysis is not of this release",
        ));
    }
    let dc = common_over_template(c);
    release
        .pulsars
        .par_iter()
        .map(|p| {
            let md = PulsarModel::build(
                p,
                &release.noise.pulsar(&p.label),
                &c.grid,
                AutoPower { common: None },
            )?;
            if md.z.iter().any(|v| !v.is_finite()) {
                return Err(Error::NonFinite {
                    what: format!("the reduction of pulsar {}", p.label),
                });
            }
            analysed_root(&weighted(&md.z), &dc, &p.label)
        })
        .collect()
}

#[cfg(test)]
mod tests;
