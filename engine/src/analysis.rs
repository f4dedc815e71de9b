//! The correlation analysis of a release, end to end: reduce every pulsar, correlate every pair,
//! fit the patterns, bin by angle, and write `summary.json`, `pairs.csv` and `bins.csv`.

use crate::bin_covariance::{bin_covariance_with, fit_bins, BinCovariance, BinFit, MAX_STACKED};
use crate::bins::{bin_groups, bin_pairs, Bin, Binning};
use crate::constants::{GAMMA_BINARIES, SECONDS_PER_YEAR};
use crate::error::{Error, Result};
use crate::hd_spread::{hd_spread, HdSpread, BAND_STEPS};
use crate::noise::RedProcess;
use crate::optimal::{
    multiple_component, optimal_statistic, pair_correlations, weight, MultiComponent, OsEstimate,
    PairCorrelations, Weighted,
};
use crate::orf::{hellings_downs, pattern_matrix, Pattern};
use crate::per_frequency::{per_frequency, PerFrequency};
use crate::reduce::{reduce_release, FrequencyGrid, Reduced};
use crate::release::Release;
use crate::spectrum::{template, PowerLaw};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

/// Where the common process in each pulsar's auto-power comes from.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum CommonAutoPower {
    /// The `[common]` table of noise.toml (none if absent).
    FromNoiseModel,
    /// No common process in the auto-power.
    Off,
    /// This power law instead.
    Given(PowerLaw),
    /// The fixed-index fit of a `ptacorr common` run (docs/common-process.md).
    FromCommonFit(crate::common::FittedCommon),
}

/// Settings of a correlation analysis.
#[derive(Clone, Debug, Serialize)]
pub struct CorrelateSettings {
    /// Number of analysis frequencies K.
    pub n_frequencies: usize,
    /// Spectral index of the template (and of the common process unless given).
    pub spectral_index: f64,
    /// Number of angular bins.
    pub n_bins: usize,
    pub binning: Binning,
    pub common: CommonAutoPower,
}

/// Default number of analysis frequencies K (f_j = j / T_span, j = 1..K).
pub const DEFAULT_FREQUENCIES: usize = 14;

/// Default number of angular bins.
pub const DEFAULT_BINS: usize = 10;

/// Default spectral index of the template: 13/3, a background of circular binaries driven by
/// gravitational-wave emission (Phinney 2001).
pub const DEFAULT_SPECTRAL_INDEX: f64 = GAMMA_BINARIES;

impl Default for CorrelateSettings {
    fn default() -> Self {
        CorrelateSettings {
            n_frequencies: DEFAULT_FREQUENCIES,
            spectral_index: DEFAULT_SPECTRAL_INDEX,
            n_bins: DEFAULT_BINS,
            binning: Binning::EqualCount,
            common: CommonAutoPower::FromNoiseModel,
        }
    }
}

impl CorrelateSettings {
    /// Check ranges.
    pub fn validate(&self) -> Result<()> {
        if self.n_frequencies == 0 || self.n_frequencies > 1000 {
            return Err(Error::setting(
                "frequencies",
                format!("must be in 1..=1000, got {}", self.n_frequencies),
            ));
        }
        if !(self.spectral_index.is_finite()
            && self.spectral_index > 0.0
            && self.spectral_index <= 10.0)
        {
            return Err(Error::setting(
                "spectral-index",
                format!("must be in (0, 10], got {}", self.spectral_index),
            ));
        }
        if self.n_bins == 0 || self.n_bins > 10_000 {
            return Err(Error::setting(
                "bins",
                format!("must be in 1..=10000, got {}", self.n_bins),
            ));
        }
        crate::noise::check_common_setting(&self.common)?;
        Ok(())
    }

    /// The common power law in the auto-power for a release, if any.
    pub fn common_power_law(&self, release: &Release) -> Option<PowerLaw> {
        match self.common {
            CommonAutoPower::FromNoiseModel => {
                release.noise.common.as_ref().map(RedProcess::power_law)
            }
            CommonAutoPower::Off => None,
            CommonAutoPower::Given(p) => Some(p),
            CommonAutoPower::FromCommonFit(f) => Some(f.power_law),
        }
    }
}

/// Everything a correlation analysis produces.
#[derive(Clone, Debug)]
pub struct Correlation {
    pub grid: FrequencyGrid,
    pub labels: Vec<String>,
    pub reduced: Vec<Reduced>,
    /// The template Phi (A = 1), length 2K.
    pub phi: Vec<f64>,
    pub pairs: PairCorrelations,
    pub estimates: BTreeMap<Pattern, OsEstimate>,
    pub multi: Option<MultiComponent>,
    pub bins: Vec<Bin>,
    pub common: Option<PowerLaw>,
    /// Spectral index of the template.
    pub spectral_index: f64,
    /// The Hellings-Downs OS at each frequency (per_frequency.rs); None without pairs.
    pub per_frequency: Option<PerFrequency>,
    /// The expected spread of the Hellings-Downs correlation at the measured amplitude
    /// (hd_spread.rs); None without pairs.
    pub hd_spread: Option<HdSpread>,
    /// The covariance of the bins with the signal at the measured amplitude and the fit of the
    /// Hellings-Downs curve to them (bin_covariance.rs), or why they were not computed.
    pub bin_covariance: std::result::Result<(BinCovariance, BinFit), String>,
}

/// Run the correlation analysis of a release.
pub fn correlate(release: &Release, settings: &CorrelateSettings) -> Result<Correlation> {
    correlate_observed(release, settings, &mut |_| {})
}

/// The stages of [`correlate`], announced to an observer as each one begins.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Stage {
    /// Per-pulsar reduction (Woodbury form), after the settings are checked.
    Reduce,
    /// Every pair's rho and sigma, the pattern fits and the bins.
    Pairs,
    /// The analysis is complete.
    Done,
}

/// [`correlate`], calling `observe` at the start of each [`Stage`] (so a caller can time the
/// stages without re-wiring the pipeline; the results are the same).
pub fn correlate_observed(
    release: &Release,
    settings: &CorrelateSettings,
    observe: &mut dyn FnMut(Stage),
) -> Result<Correlation> {
    settings.validate()?;
    let grid = FrequencyGrid::for_release(release, settings.n_frequencies)?;
    let common = settings.common_power_law(release);
    observe(Stage::Reduce);
    let reduced = reduce_release(release, &release.noise, &grid, common.as_ref())?;
    observe(Stage::Pairs);
    let c = correlate_reduced(reduced, grid, settings, common)?;
    observe(Stage::Done);
    Ok(c)
}

/// [`correlate`] without the products that only `correlate` writes (the per-frequency
/// statistic, the Hellings-Downs spread and the bin covariance: `per_frequency` and `hd_spread`
/// are None and `bin_covariance` says it was not computed). The reduction, the pairs, the
/// estimates and the bins are the same numbers. Null runs use it: they need the reduced pulsars
/// and the template only, and at 100 pulsars and K = 14 the bin covariance alone costs more CPU
/// than 10^4 sky scrambles (docs/performance.md).
pub fn correlate_core(release: &Release, settings: &CorrelateSettings) -> Result<Correlation> {
    settings.validate()?;
    let grid = FrequencyGrid::for_release(release, settings.n_frequencies)?;
    let common = settings.common_power_law(release);
    let reduced = reduce_release(release, &release.noise, &grid, common.as_ref())?;
    pair_stage(reduced, grid, settings, common, false)
}

/// The pair stage of the analysis from already reduced pulsars.
pub fn correlate_reduced(
    reduced: Vec<Reduced>,
    grid: FrequencyGrid,
    settings: &CorrelateSettings,
    common: Option<PowerLaw>,
) -> Result<Correlation> {
    pair_stage(reduced, grid, settings, common, true)
}

/// The pair stage, with or without the products of [`extras`].
fn pair_stage(
    reduced: Vec<Reduced>,
    grid: FrequencyGrid,
    settings: &CorrelateSettings,
    common: Option<PowerLaw>,
    with_extras: bool,
) -> Result<Correlation> {
    let phi = template(settings.spectral_index, &grid.freqs, grid.t_span);
    let pairs = pair_correlations(&reduced, &phi)?;
    let estimates: BTreeMap<Pattern, OsEstimate> = Pattern::ALL
        .iter()
        .map(|&p| {
            (
                p,
                optimal_statistic(&pairs.rho, &pairs.sigma, &pairs.pattern_values(p)),
            )
        })
        .collect();
    // The joint fit needs the patterns to be linearly independent over the array's pairs; when
    // they are not (a handful of pulsars) its Fisher matrix is singular, and summary.json
    // records `multiple_component: null` instead of failing the whole analysis.
    let multi = match multiple_component(&pairs, &Pattern::ALL) {
        Ok(m) => Some(m),
        Err(Error::NotPositiveDefinite { .. }) => None,
        Err(e) => return Err(e),
    };
    let bins = bin_pairs(&pairs, settings.n_bins, settings.binning);
    let extras = if pairs.is_empty() {
        Extras {
            per_frequency: None,
            hd_spread: None,
            bin_covariance: Err("no pulsar pairs".into()),
        }
    } else if !with_extras {
        Extras {
            per_frequency: None,
            hd_spread: None,
            bin_covariance: Err("not computed in this command".into()),
        }
    } else {
        extras(
            &reduced,
            &grid,
            &pairs,
            &bins,
            estimates[&Pattern::Hd],
            common.as_ref(),
            settings,
        )?
    };
    Ok(Correlation {
        labels: reduced.iter().map(|r| r.label.clone()).collect(),
        grid,
        reduced,
        phi,
        pairs,
        estimates,
        multi,
        bins,
        common,
        spectral_index: settings.spectral_index,
        per_frequency: extras.per_frequency,
        hd_spread: extras.hd_spread,
        bin_covariance: extras.bin_covariance,
    })
}

struct Extras {
    per_frequency: Option<PerFrequency>,
    hd_spread: Option<HdSpread>,
    bin_covariance: std::result::Result<(BinCovariance, BinFit), String>,
}

/// D_c = Phi_c / Phi: the common auto-power inside the analysis covariance in units of the
/// template (length 2K; docs/pair-covariance.md).
pub fn common_in_template_units(
    common: Option<&PowerLaw>,
    spectral_index: f64,
    grid: &FrequencyGrid,
) -> Vec<f64> {
    grid.freqs
        .iter()
        .flat_map(|&f| {
            let r = common.map_or(0.0, |l| {
                l.coefficient_variance(f, grid.t_span)
                    / crate::spectrum::power_law_phi(1.0, spectral_index, f, grid.t_span)
            });
            [r, r]
        })
        .collect()
}

/// The per-frequency OS, the Hellings-Downs spread and the bin covariance with its fit, all at
/// the measured Hellings-Downs amplitude.
#[allow(clippy::too_many_arguments)]
fn extras(
    reduced: &[Reduced],
    grid: &FrequencyGrid,
    pairs: &PairCorrelations,
    bins: &[Bin],
    hd: OsEstimate,
    common: Option<&PowerLaw>,
    settings: &CorrelateSettings,
) -> Result<Extras> {
    use rayon::prelude::*;
    // The same template as the pair stage (correlate_reduced).
    let phi = &template(settings.spectral_index, &grid.freqs, grid.t_span);
    let w: Vec<Weighted> = reduced.par_iter().map(|r| weight(r, phi)).collect();
    let g_pairs = pairs.pattern_values(Pattern::Hd);
    let mut pf = per_frequency(&w, &g_pairs, &grid.freqs, phi)?;
    let spread = hd_spread(&w, hd.amplitude2)?;
    let n = w.len();
    let m = 2 * grid.k();
    let bin_cov = if n * m > MAX_STACKED {
        Err(format!(
            "not computed: N 2K = {} exceeds {MAX_STACKED} (the cost grows as N^3 (2K)^2)",
            n * m
        ))
    } else {
        // One joint covariance C~ at the measured amplitude serves both uses.
        let dirs: Vec<_> = reduced.iter().map(|r| r.direction).collect();
        let g = ndarray::Array2::from_shape_vec((n, n), pattern_matrix(Pattern::Hd, &dirs))
            .expect("square pattern matrix");
        let dc = common_in_template_units(common, settings.spectral_index, grid);
        let a2 = hd.amplitude2.max(0.0);
        let z: Vec<ndarray::Array2<f64>> = w.iter().map(|x| x.z.clone()).collect();
        let c = crate::paircov::JointBlocks::new(&z, &g, &dc, a2)?;
        drop(z);
        pf.covariance_signal = Some(crate::per_frequency::signal_covariance_with(
            &c,
            &g,
            &pf.amplitude2_sigma,
        )?);
        pf.signal_amplitude2 = Some(a2);
        let groups: Vec<Vec<usize>> = bin_groups(pairs, settings.n_bins, settings.binning)
            .into_iter()
            .map(|g| g.2)
            .collect();
        let bc = bin_covariance_with(&c, &w, a2, &groups)?;
        let rho: Vec<f64> = bins.iter().map(|b| b.rho).collect();
        let hdv: Vec<f64> = bins.iter().map(|b| b.hd).collect();
        match fit_bins(&rho, &hdv, &bc) {
            Ok(f) => Ok((bc, f)),
            Err(Error::NotPositiveDefinite { .. }) => Err(
                "not computed: the covariance of the bins is not positive definite (bins with too few pairs?)"
                    .to_string(),
            ),
            Err(e) => return Err(e),
        }
    };
    Ok(Extras {
        per_frequency: Some(pf),
        hd_spread: Some(spread),
        bin_covariance: bin_cov,
    })
}

/// The inputs and settings of a run, recorded in every output (`provenance` of summary.json,
/// null.json and recovery.json; written and read with this type).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    pub program: String,
    pub version: String,
    pub release_title: String,
    pub input_hash: String,
    pub settings: serde_json::Value,
    /// Warnings about the release (release.rs `residual_warnings`); absent when none.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub warnings: Vec<String>,
}

impl Provenance {
    /// Provenance of a run on `release` with `settings`.
    pub fn new<S: Serialize>(release: &Release, settings: &S) -> Self {
        Provenance {
            program: "ptacorr".to_string(),
            version: crate::VERSION.to_string(),
            release_title: release.title.clone(),
            input_hash: release.input_hash.clone(),
            settings: serde_json::to_value(settings).unwrap_or(serde_json::Value::Null),
            warnings: release.warnings.clone(),
        }
    }
}

/// `summary.json` of a correlate folder: the engine writes it and every reader (the figures
/// and the report in `ptacorr-present`) reads it with this one type.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    pub title: String,
    pub n_pulsars: usize,
    pub n_pairs: usize,
    pub n_frequencies: usize,
    pub spectral_index: f64,
    pub span_years: f64,
    pub frequencies_hz: Vec<f64>,
    pub common_auto_power: Option<PowerLaw>,
    /// Keyed by pattern name (`hd`, `monopole`, `dipole`).
    pub patterns: BTreeMap<String, OsEstimate>,
    pub multiple_component: Option<MultiComponent>,
    pub per_frequency: Option<PerFrequencySummary>,
    pub hd_spread: Option<HdSpreadSummary>,
    pub bin_fit: BinFitSummary,
    pub notes: String,
    pub provenance: Provenance,
    /// The noise-marginalised OS (nmos/); kept the last field (its shard merge splices it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub noise_marginalised: Option<crate::nmos::NmosSummary>,
}

/// The per-frequency section of summary.json (the table is in per-frequency.csv).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PerFrequencySummary {
    pub pattern: String,
    /// The GLS combination of the per-frequency estimates (equal to the broadband HD OS).
    pub combined: OsEstimate,
    pub notes: String,
}

/// The Hellings-Downs spread section of summary.json (the band is in hd-spread.csv).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HdSpreadSummary {
    #[serde(flatten)]
    pub spread: HdSpread,
    pub notes: String,
}

/// The bin fit of summary.json, or why there is none.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum BinFitSummary {
    Fit(BinFit),
    Skipped { skipped: String },
}

/// One row of `pairs.csv` (written and read with this type).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PairRow {
    pub pulsar_a: String,
    pub pulsar_b: String,
    pub angle_deg: f64,
    pub rho: f64,
    pub sigma: f64,
    /// The Hellings-Downs value of the pair's separation.
    pub hd: f64,
}

/// What per-frequency.csv holds.
pub const PER_FREQUENCY_NOTES: &str = "per-frequency.csv: the Hellings-Downs optimal statistic at each analysis frequency alone (amplitude2 in units of the template's A^2; power_s2 = amplitude2 phi(f) in s^2), with its no-signal uncertainty; per-frequency-covariance.csv holds their covariance without signal; power_law_s2 is the power law at the broadband amplitude and expected_s2 the same with the leakage between frequencies; `combined` is their generalised least-squares combination, equal to the broadband statistic.";

/// What hd-spread.csv holds.
pub const HD_SPREAD_NOTES: &str = "hd-spread.csv: the Hellings-Downs curve at the measured amplitude with the expected spread of a Gaussian background around it (Allen 2023): cosmic_sigma for the average of infinitely many pulsar pairs at one separation in one sky, total_sigma for one pair with its pulsar terms; both scale as 1/sqrt(effective_modes), the effective number of independent modes of one pair correlation of this array (mean over pairs, an approximation when pulsars differ); noise is not included.";

/// What every summary says about its numbers.
pub const SUMMARY_NOTES: &str = "amplitude2 estimates A^2 of the template power law (Phi with A = 1) under the noise model given; amplitude2_sigma is the no-signal uncertainty sigma_0, which understates the scatter when a signal is present; snr = amplitude2 / amplitude2_sigma is not a false-alarm probability (see `ptacorr null`); a detection claim needs the collaboration's full analysis.";

impl Correlation {
    /// Number of pulsars.
    pub fn n_pulsars(&self) -> usize {
        self.labels.len()
    }

    /// Floating-point operations of the per-pulsar reductions, as counted by
    /// [`crate::reduce::PulsarModel::flops`].
    pub fn reduction_flops(&self) -> f64 {
        self.reduced.iter().map(|r| r.flops).sum()
    }

    /// Write summary.json, pairs.csv, bins.csv and (when there are pairs) per-frequency.csv,
    /// per-frequency-covariance.csv, hd-spread.csv and bins-covariance.csv into `dir` as one
    /// output set (with manifest.json).
    pub fn write(&self, dir: &Path, release: &Release, settings: &CorrelateSettings) -> Result<()> {
        self.write_with(dir, release, settings, None)
    }

    /// [`Correlation::write`], with the noise-marginalised OS when given: its block closes
    /// summary.json and its draws go to `nmos-draws.csv` (nmos/files.rs).
    pub fn write_with(
        &self,
        dir: &Path,
        release: &Release,
        settings: &CorrelateSettings,
        nmos: Option<(&crate::nmos::NmosSummary, &[crate::nmos::DrawResult])>,
    ) -> Result<()> {
        let provenance = Provenance::new(release, settings);
        let summary = Summary {
            title: release.title.clone(),
            n_pulsars: self.n_pulsars(),
            n_pairs: self.pairs.len(),
            n_frequencies: self.grid.k(),
            spectral_index: settings.spectral_index,
            span_years: self.grid.t_span / SECONDS_PER_YEAR,
            frequencies_hz: self.grid.freqs.clone(),
            common_auto_power: self.common,
            patterns: self
                .estimates
                .iter()
                .map(|(p, e)| (p.name().to_string(), *e))
                .collect(),
            multiple_component: self.multi.clone(),
            per_frequency: self.per_frequency.as_ref().map(|p| PerFrequencySummary {
                pattern: Pattern::Hd.name().to_string(),
                combined: p.combined,
                notes: PER_FREQUENCY_NOTES.to_string(),
            }),
            hd_spread: self.hd_spread.map(|s| HdSpreadSummary {
                spread: s,
                notes: HD_SPREAD_NOTES.to_string(),
            }),
            bin_fit: match &self.bin_covariance {
                Ok((_, f)) => BinFitSummary::Fit(f.clone()),
                Err(why) => BinFitSummary::Skipped {
                    skipped: why.clone(),
                },
            },
            notes: SUMMARY_NOTES.to_string(),
            provenance,
            noise_marginalised: nmos.map(|n| n.0.clone()),
        };
        let pairs = self.pairs_csv()?;
        let bins = crate::output::csv_table(&self.bins, "bins.csv")?;
        // One output set: all three files or none (output.rs).
        let mut set = crate::output::OutputSet::begin(dir, "correlate")?;
        set.write_json("summary.json", &summary)?;
        set.write("pairs.csv", pairs.as_bytes())?;
        set.write("bins.csv", &bins)?;
        use crate::common::write::to_csv;
        if let Some(pf) = &self.per_frequency {
            let a2 = self.estimates[&Pattern::Hd].amplitude2;
            set.write(
                "per-frequency.csv",
                &to_csv(&pf.rows(a2), "per-frequency.csv")?,
            )?;
            set.write(
                "per-frequency-covariance.csv",
                &to_csv(&pf.covariance_rows(), "per-frequency-covariance.csv")?,
            )?;
        }
        if let Some(sp) = &self.hd_spread {
            set.write(
                "hd-spread.csv",
                &to_csv(&sp.rows(BAND_STEPS), "hd-spread.csv")?,
            )?;
        }
        if let Ok((bc, _)) = &self.bin_covariance {
            set.write(
                "bins-covariance.csv",
                &to_csv(&bc.rows(), "bins-covariance.csv")?,
            )?;
        }
        if let Some((_, draws)) = nmos {
            set.write(
                crate::nmos::DRAWS_FILE,
                crate::nmos::files::draws_csv(draws)?.as_bytes(),
            )?;
        }
        set.commit().map(|_| ())
    }

    /// The rows of `pairs.csv`.
    pub fn pair_rows(&self) -> Vec<PairRow> {
        let p = &self.pairs;
        (0..p.len())
            .map(|i| PairRow {
                pulsar_a: self.labels[p.a[i]].clone(),
                pulsar_b: self.labels[p.b[i]].clone(),
                angle_deg: p.angle[i].to_degrees(),
                rho: p.rho[i],
                sigma: p.sigma[i],
                hd: hellings_downs(p.cos_angle[i]),
            })
            .collect()
    }

    /// The text of `pairs.csv` (`pulsar_a,pulsar_b,angle_deg,rho,sigma,hd`).
    pub fn pairs_csv(&self) -> Result<String> {
        let bytes = crate::output::csv_table(&self.pair_rows(), "pairs.csv")?;
        Ok(String::from_utf8(bytes).expect("csv of UTF-8 labels and numbers"))
    }
}
