//! The reduced-space Woodbury transform: from a pulsar's bare weighted reduction (its own
//! noise only) to the reduction with a common auto-power D_c Phi on the analysis frequencies,
//! without refactoring anything (Woodbury 1950; Hager 1989). With
//! P_a = P_a,0 + F Phi^(1/2) D_c Phi^(1/2) F^T,
//!
//!   x~_a = R_a x~_a,0,   Z~_a = R_a Z~_a,0,   R_a = (I + Z~_a,0 D_c)^-1.
//!
//! Used by injection campaigns and by the simulated and analytic nulls (docs/injection.md,
//! docs/null.md).

use crate::error::{Error, Result};
use ndarray::Array2;
use ndarray_linalg::Inverse;

/// R = (I + Z~_0 D_c)^-1 and Z~ = R Z~_0 of one pulsar (dim x dim; `dc` has length dim).
/// `label` names the pulsar in the error.
pub fn woodbury_transform(
    z0: &Array2<f64>,
    dc: &[f64],
    label: &str,
) -> Result<(Array2<f64>, Array2<f64>)> {
    let m = dc.len();
    let mut k = z0.clone();
    for (mut col, &d) in k.columns_mut().into_iter().zip(dc) {
        col *= d;
    }
    k += &Array2::<f64>::eye(m);
    let r = k.inv().map_err(|_| Error::NotPositiveDefinite {
        what: format!("I + Z~ D_c of pulsar {label} (the Woodbury transform)"),
        pivot: 0,
    })?;
    let z = symmetrise(r.dot(z0));
    Ok((r, z))
}

fn symmetrise(z: Array2<f64>) -> Array2<f64> {
    let zt = z.t().to_owned();
    (z + zt) * 0.5
}
