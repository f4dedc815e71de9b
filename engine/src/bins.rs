//! Angular binning of pair correlations for the angular-correlation figure: inverse-variance
//! weighted means of rho in bins of separation (Chamberlin et al. 2015). Bins are correlated
//! once a signal is present (Allen & Romano 2023): their `sigma` is the independent-pair error
//! bar; the full covariance and the fit of the Hellings-Downs curve to the bins are in
//! bin_covariance.rs.

use crate::optimal::PairCorrelations;
use crate::orf::hellings_downs;

/// How bin edges are chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Binning {
    /// Each bin holds (as nearly as possible) the same number of pairs.
    EqualCount,
    /// Bins of equal width in angle over 0-180 deg.
    EqualWidth,
}

/// One angular bin: a row of `bins.csv` (written and read with this type).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Bin {
    pub angle_lo_deg: f64,
    pub angle_hi_deg: f64,
    /// Weighted mean angle of the bin's pairs.
    pub angle_mean_deg: f64,
    pub n_pairs: usize,
    /// sum(rho / sigma^2) / sum(1 / sigma^2).
    pub rho: f64,
    /// (sum 1 / sigma^2)^(-1/2).
    pub sigma: f64,
    /// The weighted mean of the Hellings-Downs value over the bin's pairs (what rho / A^2
    /// should be for a background).
    pub hd: f64,
}

/// Bin the pairs into `n_bins` bins.
pub fn bin_pairs(pairs: &PairCorrelations, n_bins: usize, binning: Binning) -> Vec<Bin> {
    let angles: Vec<f64> = pairs.angle.iter().map(|a| a.to_degrees()).collect();
    bin_groups(pairs, n_bins, binning)
        .into_iter()
        .map(|(lo, hi, idx)| {
            let (mut sw, mut swr, mut swa, mut swg) = (0.0, 0.0, 0.0, 0.0);
            for &i in &idx {
                let w = 1.0 / (pairs.sigma[i] * pairs.sigma[i]);
                sw += w;
                swr += w * pairs.rho[i];
                swa += w * angles[i];
                swg += w * hellings_downs(pairs.cos_angle[i]);
            }
            Bin {
                angle_lo_deg: lo,
                angle_hi_deg: hi,
                angle_mean_deg: swa / sw,
                n_pairs: idx.len(),
                rho: swr / sw,
                sigma: sw.powf(-0.5),
                hd: swg / sw,
            }
        })
        .collect()
}

/// The bins of [`bin_pairs`] as (lower edge, upper edge, indices of the bin's pairs), for the
/// covariance of the binned correlations (bin_covariance.rs).
pub fn bin_groups(
    pairs: &PairCorrelations,
    n_bins: usize,
    binning: Binning,
) -> Vec<(f64, f64, Vec<usize>)> {
    let n = pairs.len();
    if n == 0 || n_bins == 0 {
        return Vec::new();
    }
    let angles: Vec<f64> = pairs.angle.iter().map(|a| a.to_degrees()).collect();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| angles[i].total_cmp(&angles[j]));
    let groups: Vec<(f64, f64, Vec<usize>)> = match binning {
        Binning::EqualCount => {
            let nb = n_bins.min(n);
            (0..nb)
                .map(|k| {
                    let lo = k * n / nb;
                    let hi = (k + 1) * n / nb;
                    let idx = order[lo..hi].to_vec();
                    let a_lo = if k == 0 {
                        0.0
                    } else {
                        midpoint(&angles, &order, lo)
                    };
                    let a_hi = if k + 1 == nb {
                        180.0
                    } else {
                        midpoint(&angles, &order, hi)
                    };
                    (a_lo, a_hi, idx)
                })
                .collect()
        }
        Binning::EqualWidth => {
            let w = 180.0 / n_bins as f64;
            let mut g: Vec<(f64, f64, Vec<usize>)> = (0..n_bins)
                .map(|k| (k as f64 * w, (k + 1) as f64 * w, Vec::new()))
                .collect();
            for &i in &order {
                let k = ((angles[i] / w) as usize).min(n_bins - 1);
                g[k].2.push(i);
            }
            g.retain(|x| !x.2.is_empty());
            g
        }
    };
    groups
}

fn midpoint(angles: &[f64], order: &[usize], k: usize) -> f64 {
    0.5 * (angles[order[k - 1]] + angles[order[k]])
}
