//! The output of a common-process run: `summary.json` (Bayes factors with errors, intervals,
//! upper limits, priors, assumptions, provenance) and CSV tables of the posteriors, and the
//! reader `correlate` uses to take its auto-power common process from such a run.

use super::draws::{draws_csv, CommonDraw, DrawSettings};
use super::evidence::{BayesFactor, CommonFit, Interval1d, Tabulated};
use super::likelihood::{CommonData, CommonModel};
use crate::analysis::Provenance;
use crate::constants::SECONDS_PER_YEAR;
use crate::error::{Error, Result};
use crate::output::{check_manifest, OutputSet};
use crate::release::Release;
use crate::spectrum::PowerLaw;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

/// What every common-process summary says about its numbers.
pub const COMMON_ASSUMPTIONS: &str = "Each Bayes factor assumes the noise model (every pulsar's white, red and DM noise held fixed at noise.toml) and the priors stated here; fixed-noise Bayes factors are approximations to ones that marginalise the pulsars' own noise. ln_error is the numerical (quadrature) error only. A detection claim needs the collaboration's full analysis.";

#[derive(Serialize)]
struct Priors {
    log10_amplitude: String,
    spectral_index: String,
    fixed_spectral_index: f64,
    amplitude_prior: &'static str,
}

#[derive(Serialize)]
struct FixedSummary {
    spectral_index: f64,
    ln_evidence: f64,
    ln_evidence_error: f64,
    log10_amplitude: Interval1d,
    amplitude_upper_limit_95: f64,
}

#[derive(Serialize)]
struct VariedSummary {
    ln_evidence: f64,
    ln_evidence_error: f64,
    spectral_index_rule_error: f64,
    /// Gamma nodes the adaptive rule ended with.
    spectral_index_nodes: usize,
    log10_amplitude: Interval1d,
    amplitude_upper_limit_95: f64,
    spectral_index: Interval1d,
}

#[derive(Serialize)]
struct ModelSummary {
    fixed_index: FixedSummary,
    varied_index: VariedSummary,
}

#[derive(Serialize)]
struct BayesRow {
    comparison: String,
    ln_bayes_factor: f64,
    ln_error: f64,
    /// log10 of the Bayes factor (finite where the factor itself would overflow).
    log10_bayes_factor: f64,
}

#[derive(Serialize)]
struct Summary<'a> {
    title: &'a str,
    n_pulsars: usize,
    n_frequencies: usize,
    span_years: f64,
    frequencies_hz: &'a [f64],
    priors: Priors,
    models: BTreeMap<&'static str, ModelSummary>,
    bayes_factors_fixed_index: Vec<BayesRow>,
    bayes_factors_varied_index: Vec<BayesRow>,
    /// The posterior draws of the CURN common process in common-draws.csv, if written.
    draws: Option<DrawSettings>,
    assumptions: &'static str,
    provenance: Provenance,
}

/// The name of a comparison, e.g. `hd/curn` or `curn/noise`.
pub fn comparison_name(b: &BayesFactor) -> String {
    format!(
        "{}/{}",
        b.numerator.name(),
        b.denominator.map_or("noise", |m| m.name())
    )
}

fn bayes_rows(v: Vec<BayesFactor>) -> Vec<BayesRow> {
    v.into_iter()
        .map(|b| BayesRow {
            comparison: comparison_name(&b),
            ln_bayes_factor: b.ln_bayes_factor,
            ln_error: b.ln_error,
            log10_bayes_factor: b.ln_bayes_factor / std::f64::consts::LN_10,
        })
        .collect()
}

#[derive(Serialize)]
struct FixedRow {
    model: &'static str,
    spectral_index: f64,
    log10_amplitude: f64,
    log_likelihood_ratio: f64,
    density: f64,
    cdf: f64,
}

#[derive(Serialize)]
struct GridRow {
    model: &'static str,
    spectral_index: f64,
    log10_amplitude: f64,
    log_likelihood_ratio: f64,
    log_posterior: f64,
}

#[derive(Serialize)]
struct MarginalRow {
    model: &'static str,
    parameter: &'static str,
    value: f64,
    density: f64,
    cdf: f64,
}

fn interp(t: &Tabulated, x: f64) -> (f64, f64) {
    let i = t.x.partition_point(|&v| v < x).clamp(1, t.x.len() - 1);
    let (x0, x1) = (t.x[i - 1], t.x[i]);
    let f = if x1 > x0 { (x - x0) / (x1 - x0) } else { 0.0 };
    let lerp = |a: &[f64]| a[i - 1] + f * (a[i] - a[i - 1]);
    (lerp(&t.density), lerp(&t.cdf))
}

/// CSV bytes of serde rows (header from the row type), through the `csv` crate.
pub(crate) fn to_csv<T: Serialize>(rows: &[T], what: &str) -> Result<Vec<u8>> {
    let mut w = csv::Writer::from_writer(Vec::new());
    for r in rows {
        w.serialize(r).map_err(|e| Error::NonFinite {
            what: format!("{what} ({e})"),
        })?;
    }
    w.into_inner().map_err(|e| Error::NonFinite {
        what: format!("{what} ({e})"),
    })
}

impl CommonFit {
    /// Stage summary.json, posterior-fixed-index.csv, posterior-grid.csv, marginals.csv and,
    /// with `draws`, common-draws.csv into the output set `set` (committed by the caller, so
    /// the folder gets all of them or none).
    pub fn write(
        &self,
        set: &mut OutputSet,
        release: &Release,
        data: &CommonData,
        draws: Option<(&DrawSettings, &[CommonDraw])>,
    ) -> Result<()> {
        let s = &self.settings;
        let ul = |u: f64| 10f64.powf(u);
        let models = self
            .fits
            .iter()
            .map(|(m, f)| {
                let fx = f.fixed.posterior.summary();
                let va = f.varied.log10_amplitude.summary();
                (
                    m.name(),
                    ModelSummary {
                        fixed_index: FixedSummary {
                            spectral_index: f.fixed.spectral_index,
                            ln_evidence: f.fixed.evidence.ln_evidence,
                            ln_evidence_error: f.fixed.evidence.error,
                            amplitude_upper_limit_95: ul(fx.upper_limit_95),
                            log10_amplitude: fx,
                        },
                        varied_index: VariedSummary {
                            ln_evidence: f.varied.evidence.ln_evidence,
                            ln_evidence_error: f.varied.evidence.error,
                            spectral_index_rule_error: f.varied.gamma_rule_error,
                            spectral_index_nodes: f.varied.spectral_indices.len(),
                            amplitude_upper_limit_95: ul(va.upper_limit_95),
                            log10_amplitude: va,
                            spectral_index: f.varied.spectral_index.summary(),
                        },
                    },
                )
            })
            .collect();
        let summary = Summary {
            title: &release.title,
            n_pulsars: data.n_pulsars(),
            n_frequencies: data.k(),
            span_years: data.t_span / SECONDS_PER_YEAR,
            frequencies_hz: &data.freqs,
            priors: Priors {
                log10_amplitude: match s.amplitude_prior {
                    super::AmplitudePrior::UniformLog10 => format!(
                        "log10 A uniform on [{}, {}]",
                        s.log10_amplitude_min, s.log10_amplitude_max
                    ),
                    super::AmplitudePrior::UniformAmplitude => format!(
                        "A uniform on [1e{}, 1e{}]",
                        s.log10_amplitude_min, s.log10_amplitude_max
                    ),
                },
                spectral_index: format!(
                    "gamma uniform on [{}, {}] (composite Simpson from {} nodes, spacing halved until the evidence changes by less than {} relative, at most {} nodes; nodes per model in varied_index.spectral_index_nodes); the fixed-index case has gamma = {}",
                    s.spectral_index_min,
                    s.spectral_index_max,
                    s.n_spectral_index,
                    s.index_tolerance,
                    super::evidence::MAX_INDEX_NODES,
                    s.fixed_spectral_index
                ),
                fixed_spectral_index: s.fixed_spectral_index,
                amplitude_prior: s.amplitude_prior.name(),
            },
            models,
            bayes_factors_fixed_index: bayes_rows(self.standard_bayes_factors(true)),
            bayes_factors_varied_index: bayes_rows(self.standard_bayes_factors(false)),
            draws: draws.map(|(d, _)| *d),
            assumptions: COMMON_ASSUMPTIONS,
            provenance: Provenance::new(release, s),
        };

        let table = &self.table_amplitudes;
        let mut fixed_rows = Vec::new();
        let mut grid_rows = Vec::new();
        let mut marg_rows = Vec::new();
        let ln_gamma_prior = -(s.spectral_index_max - s.spectral_index_min).ln();
        for (m, f) in &self.fits {
            let ln_z = f.fixed.evidence.ln_evidence;
            for &u in table {
                let ll = f.fixed.curve.at_log10(u);
                let (_, cdf) = interp(&f.fixed.posterior, u);
                fixed_rows.push(FixedRow {
                    model: m.name(),
                    spectral_index: f.fixed.spectral_index,
                    log10_amplitude: u,
                    log_likelihood_ratio: ll,
                    density: (ll + s_ln_prior(s, u) - ln_z).exp(),
                    cdf,
                });
            }
            let ln_zv = f.varied.evidence.ln_evidence;
            for (j, &g) in f.varied.spectral_indices.iter().enumerate() {
                for (i, &u) in table.iter().enumerate() {
                    let ll = f.varied.log_likelihood_table[j][i];
                    grid_rows.push(GridRow {
                        model: m.name(),
                        spectral_index: g,
                        log10_amplitude: u,
                        log_likelihood_ratio: ll,
                        log_posterior: ll + s_ln_prior(s, u) + ln_gamma_prior - ln_zv,
                    });
                }
            }
            for &u in table {
                let (density, cdf) = interp(&f.varied.log10_amplitude, u);
                marg_rows.push(MarginalRow {
                    model: m.name(),
                    parameter: "log10_amplitude",
                    value: u,
                    density,
                    cdf,
                });
            }
            let t = &f.varied.spectral_index;
            for i in 0..t.x.len() {
                marg_rows.push(MarginalRow {
                    model: m.name(),
                    parameter: "spectral_index",
                    value: t.x[i],
                    density: t.density[i],
                    cdf: t.cdf[i],
                });
            }
        }
        let fixed_csv = to_csv(&fixed_rows, "posterior-fixed-index.csv")?;
        let grid_csv = to_csv(&grid_rows, "posterior-grid.csv")?;
        let marg_csv = to_csv(&marg_rows, "marginals.csv")?;
        let draws_csv = draws.map(|(_, d)| draws_csv(d)).transpose()?;
        set.write_json("summary.json", &summary)?;
        set.write("posterior-fixed-index.csv", &fixed_csv)?;
        set.write("posterior-grid.csv", &grid_csv)?;
        set.write("marginals.csv", &marg_csv)?;
        if let Some(d) = draws_csv {
            set.write("common-draws.csv", &d)?;
        }
        Ok(())
    }
}

fn s_ln_prior(s: &super::CommonSettings, u: f64) -> f64 {
    s.amplitude_prior
        .ln_density(u, s.log10_amplitude_min, s.log10_amplitude_max)
}

/// Which point of the fixed-index posterior of log10 A `correlate` takes.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum FitStatistic {
    Median,
    Map,
}

/// A common power law taken from a `ptacorr common` run, as recorded in provenance.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct FittedCommon {
    pub power_law: PowerLaw,
    pub model: CommonModel,
    pub statistic: FitStatistic,
}

/// Read the fixed-index posterior median or MAP of `model` from `dir/summary.json` of a
/// `ptacorr common` run.
pub fn read_fitted_common(
    dir: &Path,
    model: CommonModel,
    statistic: FitStatistic,
) -> Result<FittedCommon> {
    check_manifest(dir)?;
    let path = dir.join("summary.json");
    let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
    let v: serde_json::Value = serde_json::from_str(&text)
        .map_err(|e| Error::input(&path, Some(e.line()), None, e.to_string()))?;
    let field = format!("models.{}.fixed_index", model.name());
    let fixed = v
        .get("models")
        .and_then(|m| m.get(model.name()))
        .and_then(|m| m.get("fixed_index"))
        .ok_or_else(|| {
            Error::input(
                &path,
                None,
                Some(&field),
                format!(
                    "missing: is this the summary.json of `ptacorr common` with the {} model?",
                    model.name()
                ),
            )
        })?;
    let key = match statistic {
        FitStatistic::Median => "median",
        FitStatistic::Map => "map",
    };
    let num = |x: Option<&serde_json::Value>, name: &str| {
        x.and_then(serde_json::Value::as_f64)
            .filter(|v| v.is_finite())
            .ok_or_else(|| {
                Error::input(
                    &path,
                    None,
                    Some(&format!("{field}.{name}")),
                    "missing or not a finite number",
                )
            })
    };
    let gamma = num(fixed.get("spectral_index"), "spectral_index")?;
    let u = num(
        fixed.get("log10_amplitude").and_then(|a| a.get(key)),
        &format!("log10_amplitude.{key}"),
    )?;
    Ok(FittedCommon {
        power_law: PowerLaw {
            log10_amplitude: u,
            spectral_index: gamma,
        },
        model,
        statistic,
    })
}
