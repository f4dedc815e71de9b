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

/// The priors of a run, as stated in summary.json.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Priors {
    pub log10_amplitude: String,
    pub spectral_index: String,
    pub fixed_spectral_index: f64,
    pub amplitude_prior: String,
}

/// The fixed-index result of one model in summary.json.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FixedSummary {
    pub spectral_index: f64,
    pub ln_evidence: f64,
    pub ln_evidence_error: f64,
    pub log10_amplitude: Interval1d,
    pub amplitude_upper_limit_95: f64,
}

/// The varied-index result of one model in summary.json.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct VariedSummary {
    pub ln_evidence: f64,
    pub ln_evidence_error: f64,
    pub spectral_index_rule_error: f64,
    /// Gamma nodes the adaptive rule ended with.
    pub spectral_index_nodes: usize,
    pub log10_amplitude: Interval1d,
    pub amplitude_upper_limit_95: f64,
    pub spectral_index: Interval1d,
    /// The `log_posterior` of posterior-grid.csv at the edge of the 68.3% and 95%
    /// highest-density credible regions of (log10 A, gamma) (evaluated on the fine grid of the
    /// fit, 1025 amplitudes per gamma node): the contour levels of a figure.
    pub credible_region_log_posterior: [f64; 2],
}

/// Both fits of one model in summary.json.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelSummary {
    pub fixed_index: FixedSummary,
    pub varied_index: VariedSummary,
}

/// One Bayes factor in summary.json.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct BayesRow {
    /// `numerator/denominator`, e.g. `hd/curn` or `curn/noise`.
    pub comparison: String,
    pub ln_bayes_factor: f64,
    pub ln_error: f64,
    /// log10 of the Bayes factor (finite where the factor itself would overflow).
    pub log10_bayes_factor: f64,
}

/// `summary.json` of a `ptacorr common` folder: written and read (figures, report, `correlate
/// --common-fit`) with this one type.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CommonSummary {
    pub title: String,
    pub n_pulsars: usize,
    pub n_frequencies: usize,
    pub span_years: f64,
    pub frequencies_hz: Vec<f64>,
    pub priors: Priors,
    /// Per model name (`curn`, `hd`, `monopole`, `dipole`).
    pub models: BTreeMap<String, ModelSummary>,
    pub bayes_factors_fixed_index: Vec<BayesRow>,
    pub bayes_factors_varied_index: Vec<BayesRow>,
    /// The posterior draws of the CURN common process in common-draws.csv, if written.
    pub draws: Option<DrawSettings>,
    pub assumptions: String,
    pub provenance: Provenance,
    /// The joint fit of every pulsar's red noise with CURN (`--joint-red`) beside the
    /// fixed-noise answer; absent (and not written) without that option.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub joint_red: Option<super::joint::JointRedSummary>,
}

/// The file names of a common folder.
pub const COMMON_SUMMARY_FILE: &str = "summary.json";
pub const FIXED_INDEX_FILE: &str = "posterior-fixed-index.csv";
pub const GRID_FILE: &str = "posterior-grid.csv";
pub const MARGINALS_FILE: &str = "marginals.csv";

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

/// One row of posterior-fixed-index.csv: the posterior of log10 A at the fixed index.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FixedRow {
    pub model: String,
    pub spectral_index: f64,
    pub log10_amplitude: f64,
    pub log_likelihood_ratio: f64,
    /// Posterior density of log10 A (normalised).
    pub density: f64,
    pub cdf: f64,
}

/// One row of posterior-grid.csv: the joint posterior of (log10 A, gamma) at a gamma node of
/// the adaptive rule and a table amplitude.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GridRow {
    pub model: String,
    pub spectral_index: f64,
    pub log10_amplitude: f64,
    pub log_likelihood_ratio: f64,
    /// ln of the normalised joint posterior density in (log10 A, gamma).
    pub log_posterior: f64,
}

/// One row of marginals.csv: a marginal posterior (`log10_amplitude` or `spectral_index`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct MarginalRow {
    pub model: String,
    pub parameter: String,
    pub value: f64,
    pub density: f64,
    pub cdf: f64,
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
        self.write_with(set, release, data, draws, None)
    }

    /// [`CommonFit::write`] with the joint red-noise fit in summary.json and its chain table
    /// (`joint-red-chains.csv`).
    pub fn write_with(
        &self,
        set: &mut OutputSet,
        release: &Release,
        data: &CommonData,
        draws: Option<(&DrawSettings, &[CommonDraw])>,
        joint: Option<(
            &super::joint::JointRedSummary,
            &super::joint::JointRedSamples,
        )>,
    ) -> Result<()> {
        let s = &self.settings;
        let ul = |u: f64| 10f64.powf(u);
        let ln_gamma_prior = -(s.spectral_index_max - s.spectral_index_min).ln();
        let models = self
            .fits
            .iter()
            .map(|(m, f)| {
                let fx = f.fixed.posterior.summary();
                let va = f.varied.log10_amplitude.summary();
                let to_lp = |l: f64| l + ln_gamma_prior - f.varied.evidence.ln_evidence;
                (
                    m.name().to_string(),
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
                            credible_region_log_posterior: f.varied.credible_levels.map(to_lp),
                        },
                    },
                )
            })
            .collect();
        let summary = CommonSummary {
            title: release.title.clone(),
            n_pulsars: data.n_pulsars(),
            n_frequencies: data.k(),
            span_years: data.t_span / SECONDS_PER_YEAR,
            frequencies_hz: data.freqs.clone(),
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
                    "gamma uniform on [{}, {}] (locally adaptive Simpson from {} equally spaced nodes: an interval is split until its error estimate is below {} relative times its share of the range, at most {} nodes; nodes per model in varied_index.spectral_index_nodes); the fixed-index case has gamma = {}",
                    s.spectral_index_min,
                    s.spectral_index_max,
                    s.n_spectral_index,
                    s.index_tolerance,
                    super::evidence::MAX_REFINED_INDEX_NODES,
                    s.fixed_spectral_index
                ),
                fixed_spectral_index: s.fixed_spectral_index,
                amplitude_prior: s.amplitude_prior.name().to_string(),
            },
            models,
            bayes_factors_fixed_index: bayes_rows(self.standard_bayes_factors(true)),
            bayes_factors_varied_index: bayes_rows(self.standard_bayes_factors(false)),
            draws: draws.map(|(d, _)| *d),
            assumptions: COMMON_ASSUMPTIONS.to_string(),
            provenance: Provenance::new(release, s),
            joint_red: joint.map(|(j, _)| j.clone()),
        };

        let mut fixed_rows = Vec::new();
        let mut grid_rows = Vec::new();
        let mut marg_rows = Vec::new();
        for (m, f) in &self.fits {
            let ln_z = f.fixed.evidence.ln_evidence;
            for u in table_with_bulk(&self.table_amplitudes, &f.fixed.posterior) {
                let ll = f.fixed.curve.at_log10(u);
                let (_, cdf) = interp(&f.fixed.posterior, u);
                fixed_rows.push(FixedRow {
                    model: m.name().to_string(),
                    spectral_index: f.fixed.spectral_index,
                    log10_amplitude: u,
                    log_likelihood_ratio: ll,
                    density: (ll + s_ln_prior(s, u) - ln_z).exp(),
                    cdf,
                });
            }
            let ln_zv = f.varied.evidence.ln_evidence;
            let table = table_with_bulk(&self.table_amplitudes, &f.varied.log10_amplitude);
            for (j, &g) in f.varied.spectral_indices.iter().enumerate() {
                let curve = &f.varied.curves[j];
                for &u in &table {
                    let ll = curve.at_log10(u);
                    grid_rows.push(GridRow {
                        model: m.name().to_string(),
                        spectral_index: g,
                        log10_amplitude: u,
                        log_likelihood_ratio: ll,
                        log_posterior: ll + s_ln_prior(s, u) + ln_gamma_prior - ln_zv,
                    });
                }
            }
            for &u in &table {
                let (density, cdf) = interp(&f.varied.log10_amplitude, u);
                marg_rows.push(MarginalRow {
                    model: m.name().to_string(),
                    parameter: "log10_amplitude".to_string(),
                    value: u,
                    density,
                    cdf,
                });
            }
            let t = &f.varied.spectral_index;
            for i in 0..t.x.len() {
                marg_rows.push(MarginalRow {
                    model: m.name().to_string(),
                    parameter: "spectral_index".to_string(),
                    value: t.x[i],
                    density: t.density[i],
                    cdf: t.cdf[i],
                });
            }
        }
        let fixed_csv = crate::output::csv_table(&fixed_rows, FIXED_INDEX_FILE)?;
        let grid_csv = crate::output::csv_table(&grid_rows, GRID_FILE)?;
        let marg_csv = crate::output::csv_table(&marg_rows, MARGINALS_FILE)?;
        let draws_csv = draws.map(|(_, d)| draws_csv(d)).transpose()?;
        set.write_json(COMMON_SUMMARY_FILE, &summary)?;
        set.write(FIXED_INDEX_FILE, &fixed_csv)?;
        set.write(GRID_FILE, &grid_csv)?;
        set.write(MARGINALS_FILE, &marg_csv)?;
        if let Some(d) = draws_csv {
            set.write("common-draws.csv", &d)?;
        }
        if let Some((j, samples)) = joint {
            set.write(&j.chain_table, samples.table()?.to_csv()?.as_bytes())?;
        }
        Ok(())
    }
}

/// The amplitudes of a table: the settings' equally spaced ones plus as many again, equally
/// spaced over the bulk of `posterior` (its 0.0001 to 0.9999 quantiles, widened by a tenth on
/// each side, inside the prior range), so a narrow posterior is resolved in the tables and in
/// figures drawn from them. Sorted, without repeats.
fn table_with_bulk(table: &[f64], posterior: &Tabulated) -> Vec<f64> {
    let (lo, hi) = (table[0], table[table.len() - 1]);
    let (q0, q1) = (posterior.quantile(1e-4), posterior.quantile(1.0 - 1e-4));
    let pad = 0.1 * (q1 - q0);
    let (a, b) = ((q0 - pad).max(lo), (q1 + pad).min(hi));
    let mut v = table.to_vec();
    if b > a {
        v.extend(super::evidence::linspace(a, b, table.len()));
    }
    v.sort_by(f64::total_cmp);
    v.dedup();
    v
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
    let path = dir.join(COMMON_SUMMARY_FILE);
    let summary: CommonSummary = crate::output::read_json(&path)?;
    let field = format!("models.{}.fixed_index", model.name());
    let fixed = summary.models.get(model.name()).ok_or_else(|| {
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
    let fixed = &fixed.fixed_index;
    let (key, u) = match statistic {
        FitStatistic::Median => ("median", fixed.log10_amplitude.median),
        FitStatistic::Map => ("map", fixed.log10_amplitude.map),
    };
    let num = |x: f64, name: &str| {
        if x.is_finite() {
            Ok(x)
        } else {
            Err(Error::input(
                &path,
                None,
                Some(&format!("{field}.{name}")),
                "not a finite number",
            ))
        }
    };
    let gamma = num(fixed.spectral_index, "spectral_index")?;
    let u = num(u, &format!("log10_amplitude.{key}"))?;
    Ok(FittedCommon {
        power_law: PowerLaw {
            log10_amplitude: u,
            spectral_index: gamma,
        },
        model,
        statistic,
    })
}
