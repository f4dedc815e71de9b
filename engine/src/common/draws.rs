//! Posterior draws of the uncorrelated common process (CURN) from the quadrature posterior of a
//! `ptacorr common` run, for analyses that average over the common process (the
//! noise-marginalised optimal statistic). Written as `common-draws.csv` in the chain-table format
//! (docs/common-process.md, "Posterior draws").
//!
//! Draw i uses its own generator `rng::stream(seed, CommonDraw, i)`, so it depends on (seed, i)
//! alone. With the index varied, gamma is drawn from its marginal posterior by inverse
//! transform sampling (Devroye 1986, sec. 2.1) of the cumulative distribution tabulated on the
//! Simpson nodes (linear between nodes), then log10 A from its exact conditional posterior at that
//! gamma (the eigen form, one eigendecomposition per pulsar) by inverse transform on a fine grid.
//! With the index fixed, log10 A is drawn from the fixed-index posterior the same way.

use super::evidence::{linspace, CommonFit, Tabulated};
use super::likelihood::{CommonData, CommonModel};
use crate::chains::{ChainDraw, ChainTable, Parameter};
use crate::error::{Error, Result};
use crate::rng::{stream, Purpose};
use rand::Rng;
use rayon::prelude::*;

/// Points of the conditional log10 A grid of a varied-index draw.
const CONDITIONAL_POINTS: usize = 1025;

/// Most draws one run may ask for.
pub const MAX_DRAWS: usize = 1_000_000;

/// One posterior draw of the common process.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CommonDraw {
    pub log10_amplitude: f64,
    /// None when the index is fixed.
    pub spectral_index: Option<f64>,
    /// ln of the posterior density at the draw, in (log10 A) or (log10 A, gamma).
    pub log_posterior: f64,
}

/// Whether the draws vary the spectral index.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum DrawIndex {
    /// Joint draws of (log10 A, gamma) from the varied-index posterior.
    Varied,
    /// Draws of log10 A at the fixed index.
    Fixed,
}

/// How the posterior draws of a run were made (recorded in summary.json).
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct DrawSettings {
    pub n_draws: usize,
    pub seed: u64,
    pub index: DrawIndex,
}

impl Default for DrawSettings {
    /// 1,000 joint (log10 A, gamma) draws seeded by 2026: enough for the OS to marginalise over
    /// the common process with a Monte Carlo error well under its own spread (our choice).
    fn default() -> Self {
        DrawSettings {
            n_draws: 1000,
            seed: 2026,
            index: DrawIndex::Varied,
        }
    }
}

/// Check the number of draws before any work.
pub fn check_draws(n: usize) -> Result<()> {
    if n == 0 || n > MAX_DRAWS {
        return Err(Error::setting(
            "draws",
            format!(
                "must be in 1..={MAX_DRAWS}, got {n} (default {})",
                DrawSettings::default().n_draws
            ),
        ));
    }
    Ok(())
}

/// `n` draws of the CURN common process from `fit` (which must hold the CURN model).
pub fn draw_curn(
    data: &CommonData,
    fit: &CommonFit,
    index: DrawIndex,
    n: usize,
    seed: u64,
) -> Result<Vec<CommonDraw>> {
    check_draws(n)?;
    let f = fit.fits.get(&CommonModel::Curn).ok_or_else(|| {
        Error::setting(
            "models",
            "posterior draws are of the CURN model, which this run did not fit",
        )
    })?;
    let s = &fit.settings;
    let uniform = |i: usize| {
        let mut r = stream(seed, Purpose::CommonDraw, i as u64);
        (r.random::<f64>(), r.random::<f64>())
    };
    match index {
        DrawIndex::Fixed => {
            let post = &f.fixed.posterior;
            let ln_z = f.fixed.evidence.ln_evidence;
            (0..n)
                .map(|i| {
                    let u = post.quantile(uniform(i).0);
                    let lp = f.fixed.curve.at_log10(u) + s.ln_prior(u) - ln_z;
                    finite_draw(u, None, lp)
                })
                .collect()
        }
        DrawIndex::Varied => {
            let ln_z = f.varied.evidence.ln_evidence;
            let ln_gamma_prior = -(s.spectral_index_max - s.spectral_index_min).ln();
            let grid = linspace(
                s.log10_amplitude_min,
                s.log10_amplitude_max,
                CONDITIONAL_POINTS,
            );
            (0..n)
                .into_par_iter()
                .map(|i| {
                    let (v1, v2) = uniform(i);
                    let gamma = f.varied.spectral_index.quantile(v1);
                    let curve = data.amplitude_curve(CommonModel::Curn, gamma)?;
                    let lp: Vec<f64> = grid
                        .iter()
                        .map(|&u| curve.at_log10(u) + s.ln_prior(u))
                        .collect();
                    let cond = Tabulated::from_log_density(grid.clone(), &lp)?;
                    let u = cond.quantile(v2);
                    let joint = curve.at_log10(u) + s.ln_prior(u) + ln_gamma_prior - ln_z;
                    finite_draw(u, Some(gamma), joint)
                })
                .collect()
        }
    }
}

fn finite_draw(u: f64, gamma: Option<f64>, lp: f64) -> Result<CommonDraw> {
    if !(u.is_finite() && lp.is_finite() && gamma.is_none_or(f64::is_finite)) {
        return Err(Error::NonFinite {
            what: format!(
                "a posterior draw of the common process (log10 A {u}, gamma {gamma:?}, ln p {lp})"
            ),
        });
    }
    Ok(CommonDraw {
        log10_amplitude: u,
        spectral_index: gamma,
        log_posterior: lp,
    })
}

/// The draws as a chain table (`crate::chains`, docs/common-process.md): header
/// `chain,draw,log_posterior,diverging,common.log10_amplitude[,common.spectral_index]`, one
/// chain (0), no divergences (these are independent draws, not a Markov chain).
pub fn draws_table(draws: &[CommonDraw]) -> Result<ChainTable> {
    let varied = draws.first().is_some_and(|d| d.spectral_index.is_some());
    let mut params = vec![Parameter::CommonLog10Amplitude];
    if varied {
        params.push(Parameter::CommonSpectralIndex);
    }
    let mut table = ChainTable::new(params)?;
    for (i, d) in draws.iter().enumerate() {
        let mut values = vec![d.log10_amplitude];
        values.extend(d.spectral_index);
        table.push(ChainDraw {
            chain: 0,
            draw: i as u64,
            log_posterior: Some(d.log_posterior),
            diverging: false,
            values,
        })?;
    }
    Ok(table)
}

/// The CSV bytes of [`draws_table`].
pub fn draws_csv(draws: &[CommonDraw]) -> Result<Vec<u8>> {
    Ok(draws_table(draws)?.to_csv()?.into_bytes())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn draws_csv_has_the_chain_table_header() {
        let d = [CommonDraw {
            log10_amplitude: -14.5,
            spectral_index: Some(4.0),
            log_posterior: -1.25,
        }];
        let text = String::from_utf8(draws_csv(&d).unwrap()).unwrap();
        assert_eq!(
            text,
            "chain,draw,log_posterior,diverging,common.log10_amplitude,common.spectral_index\n\
             0,0,-1.25,false,-14.5,4.0\n"
        );
        assert!(check_draws(0).is_err() && check_draws(MAX_DRAWS + 1).is_err());
        // The shared reader accepts it as a common-process table.
        let p = std::path::Path::new("common-draws.csv");
        let back = ChainTable::parse(text.as_bytes(), p).unwrap();
        back.check_common_only(p).unwrap();
        assert_eq!(back.draws[0].values, vec![-14.5, 4.0]);
    }
}
