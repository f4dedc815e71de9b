//! Scenario files: the recipe of a simulated array (pulsars, observing campaign, noise and the
//! common background), read from TOML, and its layout into pulsars with TOAs.

use crate::constants::{DM_REFERENCE_MHZ, GAMMA_BINARIES};
use crate::error::{Error, Result};
use crate::noise::{line_of, toml_error, NoiseModel, PulsarNoise, RedProcess, WhiteNoise};
use crate::release::Pulsar;
use crate::rng::{stream, Purpose};
use crate::sky::{isotropic_direction, Direction};
use rand::Rng;
use rand_distr::{Distribution, Normal};
use serde::{Deserialize, Serialize};
use std::path::Path;

/// A whole scenario file.
#[derive(Clone, Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    pub array: ArraySpec,
    #[serde(rename = "backend")]
    pub backends: Vec<BackendSpec>,
    pub white: WhiteSpec,
    #[serde(default)]
    pub red: Option<RedSpec>,
    #[serde(default)]
    pub dm: Option<RedSpec>,
    #[serde(default)]
    pub background: Option<BackgroundSpec>,
    #[serde(default)]
    pub simulation: SimulationSpec,
    /// The timing model fitted to the simulated residuals and shipped with the release.
    #[serde(default)]
    pub timing_model: TimingModelSpec,
    /// Optional explicit pulsars (positions); otherwise `array.n_pulsars` isotropic ones.
    #[serde(default, rename = "pulsar")]
    pub pulsars: Vec<PulsarSpec>,
}

/// The array and its campaign.
#[derive(Clone, Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct ArraySpec {
    pub title: String,
    /// Number of pulsars at isotropic random positions (ignored when `[[pulsar]]` are given).
    #[serde(default)]
    pub n_pulsars: Option<usize>,
    pub start_mjd: f64,
    pub span_years: f64,
    /// Mean days between observing epochs of one pulsar with one backend.
    pub cadence_days: f64,
    /// Default seed (the command line's --seed overrides).
    #[serde(default)]
    pub seed: Option<u64>,
}

/// The timing model of the simulated pulsars (docs/simulation.md). Without a design matrix
/// every pulsar has the quadratic spin model (offset, spin frequency, spin-down).
#[derive(Clone, Copy, Debug, Default, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct TimingModelSpec {
    /// Also fit a dispersion-measure offset, slope and curvature, (nu_ref / nu)^2 x {1, t, t^2},
    /// in every pulsar observed at two or more radio frequencies, as timing fits of
    /// multi-frequency data do (the DM and its first two time derivatives; common practice,
    /// recalled from memory; see Keith et al. 2013, MNRAS 429, 2161). The release then ships each such
    /// pulsar's design matrix. Without it, chromatic power below 1 / T_span (`span_factor` > 1)
    /// stays in the residuals as a chromatic quadratic that no analysis model describes.
    #[serde(default)]
    pub dm_quadratic: bool,
}

/// Names of the design-matrix columns of the simulated timing model.
pub const TIMING_COLUMNS: [&str; 6] = [
    "offset",
    "spin_frequency",
    "spin_down",
    "dm_offset",
    "dm_slope",
    "dm_curvature",
];

/// The design matrix of a simulated pulsar's timing model (raw columns; every reader scales
/// them to unit norm): t in days since the start of the array, s = (nu_ref / nu)^2, columns
/// {1, t, t^2} and, with `dm_quadratic` and two or more distinct radio frequencies,
/// {s, s t, s t^2}. None when the quadratic spin model alone applies (the default model of a
/// release without a design matrix).
pub fn simulated_design(
    p: &Pulsar,
    start_mjd: f64,
    spec: TimingModelSpec,
) -> Option<crate::release::DesignMatrix> {
    let distinct = {
        let mut f: Vec<f64> = p.freq_mhz.clone();
        f.sort_by(f64::total_cmp);
        f.dedup();
        f.len()
    };
    if !spec.dm_quadratic || distinct < 2 {
        return None;
    }
    let n = p.n_toa();
    let mut values = ndarray::Array2::<f64>::zeros((n, TIMING_COLUMNS.len()));
    for i in 0..n {
        let t = p.mjd[i] - start_mjd;
        let s = (DM_REFERENCE_MHZ / p.freq_mhz[i]).powi(2);
        for (k, v) in [1.0, t, t * t, s, s * t, s * t * t].into_iter().enumerate() {
            values[[i, k]] = v;
        }
    }
    Some(crate::release::DesignMatrix {
        names: TIMING_COLUMNS.iter().map(|c| c.to_string()).collect(),
        values,
    })
}

/// An explicit pulsar.
#[derive(Clone, Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct PulsarSpec {
    pub label: String,
    pub ra_deg: f64,
    pub dec_deg: f64,
}

/// One backend (receiver and recorder at one of our fictional observatories).
#[derive(Clone, Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct BackendSpec {
    pub name: String,
    pub observatory: String,
    /// Radio frequency channels (MHz); one TOA per channel per epoch.
    pub freq_mhz: Vec<f64>,
    /// Share of pulsars this backend observes (each pulsar has at least one backend).
    #[serde(default = "one")]
    pub share: f64,
    /// When the backend starts and stops, as fractions of the span (default 0 to 1).
    #[serde(default)]
    pub active: Option<[f64; 2]>,
}

fn one() -> f64 {
    1.0
}

/// White-noise ranges; each pulsar (and backend) draws from them.
#[derive(Clone, Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct WhiteSpec {
    /// Range of a pulsar's typical TOA uncertainty (microseconds), drawn log-uniformly.
    pub sigma_us: [f64; 2],
    /// Per-TOA scatter of the uncertainty about the pulsar's level, in dex.
    #[serde(default)]
    pub sigma_scatter_dex: f64,
    /// Range of EFAC per (pulsar, backend), uniform.
    #[serde(default = "unit_range")]
    pub efac: [f64; 2],
    /// Range of log10 EQUAD (s) per (pulsar, backend), uniform; none if absent.
    #[serde(default)]
    pub equad_log10_s: Option<[f64; 2]>,
    /// Range of log10 ECORR (s) per (pulsar, backend), uniform; none if absent.
    #[serde(default)]
    pub ecorr_log10_s: Option<[f64; 2]>,
}

fn unit_range() -> [f64; 2] {
    [1.0, 1.0]
}

/// Intrinsic red (or DM) noise of a share of the pulsars.
#[derive(Clone, Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RedSpec {
    pub share: f64,
    pub log10_amplitude: [f64; 2],
    pub spectral_index: [f64; 2],
}

/// The common background.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct BackgroundSpec {
    pub log10_amplitude: f64,
    #[serde(default = "gamma_default")]
    pub spectral_index: f64,
    #[serde(default = "pattern_default")]
    pub pattern: BackgroundPattern,
}

fn gamma_default() -> f64 {
    GAMMA_BINARIES
}
fn pattern_default() -> BackgroundPattern {
    BackgroundPattern::Hd
}

/// The inter-pulsar correlation of the injected background.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum BackgroundPattern {
    Hd,
    Monopole,
    Dipole,
    /// A common process with no inter-pulsar correlation.
    Uncorrelated,
    None,
}

impl BackgroundPattern {
    /// The correlation pattern, when there is one.
    pub fn pattern(self) -> Option<crate::orf::Pattern> {
        use crate::orf::Pattern;
        match self {
            BackgroundPattern::Hd => Some(Pattern::Hd),
            BackgroundPattern::Monopole => Some(Pattern::Monopole),
            BackgroundPattern::Dipole => Some(Pattern::Dipole),
            _ => None,
        }
    }
}

/// How red processes are synthesised in the time domain.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct SimulationSpec {
    /// Highest simulated frequency in units of 1 / T_span.
    #[serde(default = "sim_k")]
    pub n_frequencies: usize,
    /// The simulated ladder has spacing 1 / (span_factor T_span), reaching down to that
    /// frequency, so power below 1 / T_span leaks in as it does in real data.
    #[serde(default = "sim_factor")]
    pub span_factor: usize,
}

fn sim_k() -> usize {
    30
}
fn sim_factor() -> usize {
    4
}

impl Default for SimulationSpec {
    fn default() -> Self {
        SimulationSpec {
            n_frequencies: sim_k(),
            span_factor: sim_factor(),
        }
    }
}

impl Scenario {
    /// Read and validate a scenario file.
    pub fn read(path: &Path) -> Result<Scenario> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Self::parse(&text, path)
    }

    /// Parse and validate scenario text.
    pub fn parse(text: &str, path: &Path) -> Result<Scenario> {
        let s: Scenario = toml::from_str(text).map_err(|e| toml_error(path, text, &e))?;
        let bad = |field: &str, msg: String| {
            let key = field.rsplit('.').next().unwrap_or(field);
            let line = text
                .find(&format!("{key} "))
                .or_else(|| text.find(&format!("{key}=")))
                .map(|o| line_of(text, o));
            Error::input(path, line, Some(field), msg)
        };
        let a = &s.array;
        if !(a.span_years.is_finite() && a.span_years > 0.1 && a.span_years < 100.0) {
            return Err(bad(
                "array.span_years",
                format!("must be in (0.1, 100), got {}", a.span_years),
            ));
        }
        if !(a.cadence_days.is_finite()
            && a.cadence_days >= 1.0
            && a.cadence_days < a.span_years * 365.25 / 4.0)
        {
            return Err(bad(
                "array.cadence_days",
                format!(
                    "must be at least 1 day and give several epochs, got {}",
                    a.cadence_days
                ),
            ));
        }
        if !(a.start_mjd.is_finite() && a.start_mjd > 0.0) {
            return Err(bad(
                "array.start_mjd",
                format!("{} is not a plausible MJD", a.start_mjd),
            ));
        }
        let n = if s.pulsars.is_empty() {
            a.n_pulsars.unwrap_or(0)
        } else {
            s.pulsars.len()
        };
        if n < crate::release::MIN_PULSARS {
            return Err(bad(
                "array.n_pulsars",
                format!(
                    "need at least {} pulsars, got {n}",
                    crate::release::MIN_PULSARS
                ),
            ));
        }
        if s.backends.is_empty() {
            return Err(bad("backend", "give at least one [[backend]]".into()));
        }
        for (i, b) in s.backends.iter().enumerate() {
            if b.freq_mhz.is_empty() || b.freq_mhz.iter().any(|f| !(f.is_finite() && *f > 10.0)) {
                return Err(bad(
                    &format!("backend[{i}].freq_mhz"),
                    "give radio frequencies above 10 MHz".into(),
                ));
            }
            if !(0.0..=1.0).contains(&b.share) {
                return Err(bad(
                    &format!("backend[{i}].share"),
                    format!("must be in [0, 1], got {}", b.share),
                ));
            }
            if let Some([lo, hi]) = b.active {
                if !(0.0 <= lo && lo < hi && hi <= 1.0) {
                    return Err(bad(
                        &format!("backend[{i}].active"),
                        "must be [start, stop] with 0 <= start < stop <= 1".into(),
                    ));
                }
            }
        }
        let w = &s.white;
        if !(w.sigma_us[0] > 0.0 && w.sigma_us[0] <= w.sigma_us[1] && w.sigma_us[1].is_finite()) {
            return Err(bad(
                "white.sigma_us",
                "must be [low, high] with 0 < low <= high".into(),
            ));
        }
        if !(w.efac[0] > 0.0 && w.efac[0] <= w.efac[1]) {
            return Err(bad(
                "white.efac",
                "must be [low, high] with 0 < low <= high".into(),
            ));
        }
        for (name, r) in [("red", &s.red), ("dm", &s.dm)] {
            if let Some(r) = r {
                if !(0.0..=1.0).contains(&r.share) {
                    return Err(bad(&format!("{name}.share"), "must be in [0, 1]".into()));
                }
                if r.log10_amplitude[0] > r.log10_amplitude[1]
                    || r.spectral_index[0] > r.spectral_index[1]
                    || r.spectral_index[0] <= 0.0
                {
                    return Err(bad(
                        &format!("{name}.spectral_index"),
                        "ranges must be [low, high] with positive indices".into(),
                    ));
                }
            }
        }
        if let Some(b) = &s.background {
            if !(b.log10_amplitude.is_finite() && b.log10_amplitude < -10.0) {
                return Err(bad(
                    "background.log10_amplitude",
                    format!("{} is not a plausible log10 amplitude", b.log10_amplitude),
                ));
            }
            if !(b.spectral_index > 0.0 && b.spectral_index <= 10.0) {
                return Err(bad(
                    "background.spectral_index",
                    "must be in (0, 10]".into(),
                ));
            }
        }
        if s.simulation.n_frequencies == 0 || s.simulation.span_factor == 0 {
            return Err(bad(
                "simulation.n_frequencies",
                "n_frequencies and span_factor must be at least 1".into(),
            ));
        }
        check_ranges(&s).map_err(|(f, m)| bad(&f, m))?;
        Ok(s)
    }

    /// The seed: the command line's if given, else the file's, else 1.
    pub fn seed(&self, cli: Option<u64>) -> u64 {
        cli.or(self.array.seed).unwrap_or(1)
    }
}

/// Most pulsars in a scenario.
pub const MAX_PULSARS: usize = 10_000;

/// Most simulated TOAs of a whole scenario (about 100 bytes each while simulating and
/// writing, so 10 GB at the limit).
pub const MAX_TOAS: f64 = 1.0e8;

/// Most residual-domain simulation frequencies (n_frequencies x span_factor).
pub const MAX_SIMULATION_FREQUENCIES: usize = 4000;

/// The checks of `Scenario::parse` beyond the first structural ones: every number finite and
/// inside a physical range, every label safe, and the size within reach of memory.
fn check_ranges(s: &Scenario) -> std::result::Result<(), (String, String)> {
    use crate::noise::{
        check_label, check_power_law, EFAC_RANGE, LOG10_AMPLITUDE_RANGE, WHITE_LOG10_S_RANGE,
    };
    let err = |f: &str, m: String| Err((f.to_string(), m));
    let a = &s.array;
    if let Some(n) = a.n_pulsars {
        if n > MAX_PULSARS {
            return err(
                "array.n_pulsars",
                format!("must be in 3..={MAX_PULSARS}, got {n}"),
            );
        }
    }
    if s.pulsars.len() > MAX_PULSARS {
        return err(
            "pulsar",
            format!("at most {MAX_PULSARS} pulsars, got {}", s.pulsars.len()),
        );
    }
    if !(a.start_mjd < 9.0e5 && a.start_mjd + a.span_years * 365.25 < 1.0e6) {
        return err(
            "array.start_mjd",
            format!(
                "{} is not a plausible MJD (the release reader takes MJDs below 1e6)",
                a.start_mjd
            ),
        );
    }
    for (i, p) in s.pulsars.iter().enumerate() {
        check_label(&p.label).map_err(|m| (format!("pulsar[{i}].label"), m))?;
        if s.pulsars[..i].iter().any(|o| o.label == p.label) {
            return err(
                &format!("pulsar[{i}].label"),
                format!("label {} is used twice", p.label),
            );
        }
        if !(p.ra_deg.is_finite() && (0.0..360.0).contains(&p.ra_deg)) {
            return err(
                &format!("pulsar[{i}].ra_deg"),
                format!("{} is outside [0, 360) deg", p.ra_deg),
            );
        }
        if !(p.dec_deg.is_finite() && (-90.0..=90.0).contains(&p.dec_deg)) {
            return err(
                &format!("pulsar[{i}].dec_deg"),
                format!("{} is outside [-90, 90] deg", p.dec_deg),
            );
        }
    }
    for (i, b) in s.backends.iter().enumerate() {
        check_label(&b.name).map_err(|m| (format!("backend[{i}].name"), m))?;
        if s.backends[..i].iter().any(|o| o.name == b.name) {
            return err(
                &format!("backend[{i}].name"),
                format!("backend {} is given twice", b.name),
            );
        }
        if b.freq_mhz.len() > 64 || b.freq_mhz.iter().any(|f| *f > 1.0e5) {
            return err(
                &format!("backend[{i}].freq_mhz"),
                "give at most 64 channels between 10 and 100000 MHz".into(),
            );
        }
        if !b.share.is_finite() {
            return err(&format!("backend[{i}].share"), "must be in [0, 1]".into());
        }
    }
    let range = |f: &str, r: [f64; 2], lo: f64, hi: f64, open_lo: bool| {
        let in_range = |x: f64| x.is_finite() && x <= hi && if open_lo { x > lo } else { x >= lo };
        if in_range(r[0]) && in_range(r[1]) && r[0] <= r[1] {
            Ok(())
        } else {
            let open = if open_lo { "(" } else { "[" };
            Err((
                f.to_string(),
                format!(
                    "must be [low, high] with low <= high, both finite in {open}{lo}, {hi}], got [{}, {}]",
                    r[0], r[1]
                ),
            ))
        }
    };
    let w = &s.white;
    range("white.sigma_us", w.sigma_us, 0.0, 1.0e4, true)?;
    range("white.efac", w.efac, EFAC_RANGE[0], EFAC_RANGE[1], true)?;
    let [wlo, whi] = WHITE_LOG10_S_RANGE;
    if let Some(q) = w.equad_log10_s {
        range("white.equad_log10_s", q, wlo, whi, false)?;
    }
    if let Some(q) = w.ecorr_log10_s {
        range("white.ecorr_log10_s", q, wlo, whi, false)?;
    }
    if !(w.sigma_scatter_dex.is_finite() && (0.0..=1.0).contains(&w.sigma_scatter_dex)) {
        return err(
            "white.sigma_scatter_dex",
            format!("must be in [0, 1] dex, got {}", w.sigma_scatter_dex),
        );
    }
    let [alo, ahi] = LOG10_AMPLITUDE_RANGE;
    for (name, r) in [("red", &s.red), ("dm", &s.dm)] {
        if let Some(r) = r {
            if !r.share.is_finite() {
                return err(&format!("{name}.share"), "must be in [0, 1]".into());
            }
            range(
                &format!("{name}.log10_amplitude"),
                r.log10_amplitude,
                alo,
                ahi,
                false,
            )?;
            range(
                &format!("{name}.spectral_index"),
                r.spectral_index,
                0.0,
                10.0,
                true,
            )?;
        }
    }
    if let Some(b) = &s.background {
        check_power_law(b.log10_amplitude, b.spectral_index)
            .map_err(|(f, m)| (format!("background.{f}"), m))?;
    }
    let sim = &s.simulation;
    if sim.n_frequencies.saturating_mul(sim.span_factor) > MAX_SIMULATION_FREQUENCIES {
        return err(
            "simulation.n_frequencies",
            format!(
                "n_frequencies x span_factor must be at most {MAX_SIMULATION_FREQUENCIES}, got {} x {}",
                sim.n_frequencies, sim.span_factor
            ),
        );
    }
    // Size: every pulsar observed by every backend is an upper bound on the TOAs.
    let n = if s.pulsars.is_empty() {
        a.n_pulsars.unwrap_or(0)
    } else {
        s.pulsars.len()
    } as f64;
    let per_pulsar: f64 = s
        .backends
        .iter()
        .map(|b| {
            let [lo, hi] = b.active.unwrap_or([0.0, 1.0]);
            (hi - lo) * a.span_years * 365.25 / (0.75 * a.cadence_days) * b.freq_mhz.len() as f64
        })
        .sum();
    let toas = n * per_pulsar;
    if toas > MAX_TOAS {
        return err(
            "array.n_pulsars",
            format!(
                "the array would hold up to {toas:.3e} TOAs (about {:.0} GB to simulate and write); the limit is {MAX_TOAS:.0e}: fewer pulsars, channels or a longer cadence",
                toas * 100.0 / 1e9
            ),
        );
    }
    Ok(())
}

/// A laid-out array: pulsars with TOAs (residuals still zero) and their true noise model.
#[derive(Clone, Debug)]
pub struct Layout {
    pub title: String,
    pub pulsars: Vec<Pulsar>,
    pub noise: NoiseModel,
    pub background: Option<BackgroundSpec>,
    pub simulation: SimulationSpec,
}

/// Lay out the array of a scenario: positions, TOAs, uncertainties and the noise parameters of
/// every pulsar, all drawn from generators keyed by (seed, pulsar index).
pub fn lay_out(s: &Scenario, seed: u64) -> Layout {
    let mut rng = stream(seed, Purpose::Layout, 0);
    let positions: Vec<(String, f64, f64)> = if s.pulsars.is_empty() {
        let n = s.array.n_pulsars.unwrap_or(0);
        let width = n.to_string().len().max(2);
        (0..n)
            .map(|i| {
                let d: Direction = isotropic_direction(rng.random(), rng.random());
                let ra = d[1].atan2(d[0]).rem_euclid(std::f64::consts::TAU);
                let dec = d[2].clamp(-1.0, 1.0).asin();
                (format!("P{:0width$}", i + 1), ra, dec)
            })
            .collect()
    } else {
        s.pulsars
            .iter()
            .map(|p| {
                (
                    p.label.clone(),
                    p.ra_deg.to_radians(),
                    p.dec_deg.to_radians(),
                )
            })
            .collect()
    };
    let span_days = s.array.span_years * 365.25;
    let mut noise = NoiseModel::default();
    let mut pulsars = Vec::with_capacity(positions.len());
    for (i, (label, ra, dec)) in positions.into_iter().enumerate() {
        let mut r = stream(seed, Purpose::Layout, 1 + i as u64);
        let mut used: Vec<usize> = (0..s.backends.len())
            .filter(|&b| r.random::<f64>() < s.backends[b].share)
            .collect();
        if used.is_empty() {
            used.push(0);
        }
        let level = log_uniform(&mut r, s.white.sigma_us[0], s.white.sigma_us[1]) * 1e-6;
        let scatter = Normal::new(0.0, s.white.sigma_scatter_dex.max(0.0)).expect("finite scatter");
        let mut p = Pulsar {
            label: label.clone(),
            ra,
            dec,
            direction: crate::sky::direction_from_radec(ra, dec),
            mjd: Vec::new(),
            residual: Vec::new(),
            sigma: Vec::new(),
            freq_mhz: Vec::new(),
            backend: Vec::new(),
            backends: used.iter().map(|&b| s.backends[b].name.clone()).collect(),
            design: None,
        };
        let mut pn = PulsarNoise::default();
        for (bi, &b) in used.iter().enumerate() {
            let spec = &s.backends[b];
            let [lo, hi] = spec.active.unwrap_or([0.0, 1.0]);
            let (d0, d1) = (lo * span_days, hi * span_days);
            let mut day = d0 + r.random::<f64>() * s.array.cadence_days;
            while day <= d1 {
                for &f in &spec.freq_mhz {
                    p.mjd.push(s.array.start_mjd + day);
                    p.freq_mhz.push(f);
                    p.backend.push(bi);
                    p.residual.push(0.0);
                    p.sigma.push(level * 10f64.powf(scatter.sample(&mut r)));
                }
                day += s.array.cadence_days * (0.75 + 0.5 * r.random::<f64>());
            }
            let efac = uniform(&mut r, s.white.efac);
            pn.white.push(WhiteNoise {
                backend: spec.name.clone(),
                efac: round6(efac),
                equad_log10_s: s.white.equad_log10_s.map(|q| round6(uniform(&mut r, q))),
                ecorr_log10_s: s.white.ecorr_log10_s.map(|q| round6(uniform(&mut r, q))),
            });
        }
        // Make sure the span of the whole array is exactly the scenario's.
        if i == 0 && !p.mjd.is_empty() {
            p.mjd[0] = s.array.start_mjd;
            let last = p.mjd.len() - 1;
            p.mjd[last] = s.array.start_mjd + span_days;
        }
        sort_by_time(&mut p);
        for (spec, slot) in [(&s.red, &mut pn.red), (&s.dm, &mut pn.dm)] {
            if let Some(rs) = spec {
                if r.random::<f64>() < rs.share {
                    *slot = Some(RedProcess {
                        log10_amplitude: round6(uniform(&mut r, rs.log10_amplitude)),
                        spectral_index: round6(uniform(&mut r, rs.spectral_index)),
                        n_frequencies: None,
                    });
                }
            }
        }
        p.design = simulated_design(&p, s.array.start_mjd, s.timing_model);
        noise.pulsars.insert(label, pn);
        pulsars.push(p);
    }
    if let Some(b) = s
        .background
        .filter(|b| b.pattern != BackgroundPattern::None)
    {
        noise.common = Some(RedProcess {
            log10_amplitude: b.log10_amplitude,
            spectral_index: b.spectral_index,
            n_frequencies: None,
        });
    }
    Layout {
        title: s.array.title.clone(),
        pulsars,
        noise,
        background: s
            .background
            .filter(|b| b.pattern != BackgroundPattern::None),
        simulation: s.simulation,
    }
}

fn sort_by_time(p: &mut Pulsar) {
    let mut idx: Vec<usize> = (0..p.mjd.len()).collect();
    idx.sort_by(|&a, &b| {
        p.mjd[a]
            .total_cmp(&p.mjd[b])
            .then(p.freq_mhz[a].total_cmp(&p.freq_mhz[b]))
    });
    let take = |v: &Vec<f64>| idx.iter().map(|&i| v[i]).collect::<Vec<f64>>();
    p.mjd = take(&p.mjd);
    p.freq_mhz = take(&p.freq_mhz);
    p.sigma = take(&p.sigma);
    p.residual = take(&p.residual);
    p.backend = idx.iter().map(|&i| p.backend[i]).collect();
}

fn uniform<R: Rng>(r: &mut R, [lo, hi]: [f64; 2]) -> f64 {
    lo + (hi - lo) * r.random::<f64>()
}

fn log_uniform<R: Rng>(r: &mut R, lo: f64, hi: f64) -> f64 {
    (lo.ln() + (hi.ln() - lo.ln()) * r.random::<f64>()).exp()
}

/// Round to 6 decimals so that the noise file states exactly what was simulated.
fn round6(x: f64) -> f64 {
    (x * 1e6).round() / 1e6
}
