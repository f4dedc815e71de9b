//! The priors file of `ptacorr noise` (TOML, our own format; docs/noise-estimation.md): which
//! noise components each pulsar gets and the uniform prior range of every hyperparameter.
//!
//! ```toml
//! [components]                 # every pulsar, unless its own table says otherwise
//! efac = true
//! equad = true
//! ecorr_backends = "all"       # "all", "none" or a list such as ["KRK-L"]
//! red = true
//! red_frequencies = 30
//! dm = false
//! dm_frequencies = 30
//!
//! [ranges]                     # uniform priors, [low, high]
//! efac = [0.01, 10.0]
//! equad_log10_s = [-9.0, -5.0]  # the keys are the noise.toml names
//! red.log10_amplitude = [-20.0, -11.0]
//!
//! [pulsar.P03]                 # per-pulsar choices, same keys as [components]
//! dm = true
//! ecorr_backends = ["KRK-L"]
//! ranges = { red = { log10_amplitude = [-18.0, -12.0] } }
//!
//! [common]                     # optional common process in every pulsar's auto-power
//! process = "fixed"            # "none", "fixed" or "free"
//! log10_amplitude = -14.5
//! spectral_index = 4.333333333333333
//! frequencies = 14
//! ```

use crate::error::{Error, Result};
use crate::likelihood::{
    BackendTerms, CommonSpec, CommonTerm, Components, Hyper, PulsarLikelihood,
};
use crate::noise::{
    toml_error, EFAC_RANGE, LOG10_AMPLITUDE_RANGE, SPECTRAL_INDEX_RANGE, WHITE_LOG10_S_RANGE,
};
use crate::release::{Pulsar, Release};
use crate::spectrum::PowerLaw;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Default uniform range of EFAC (dimensionless). Common practice (from memory): wide enough
/// to hold any plausible mis-estimate of the TOA uncertainties.
pub const DEFAULT_EFAC: [f64; 2] = [0.01, 10.0];
/// Default range of log10 EQUAD and log10 ECORR in seconds (1 ns to 10 us; common practice,
/// from memory).
pub const DEFAULT_LOG10_WHITE_S: [f64; 2] = [-9.0, -5.0];
/// Default range of log10 of a red, DM or common power-law amplitude (dimensionless strain
/// amplitude at f_yr; common practice, from memory).
pub const DEFAULT_LOG10_AMPLITUDE: [f64; 2] = [-20.0, -11.0];
/// Default range of a spectral index gamma (common practice, from memory).
pub const DEFAULT_SPECTRAL_INDEX: [f64; 2] = [0.0, 7.0];
/// Default number of Fourier frequencies of a red or DM process (common practice, from memory).
pub const DEFAULT_FREQUENCIES: usize = 30;

/// Which backends get ECORR.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum BackendSet {
    /// "all" or "none".
    Word(String),
    List(Vec<String>),
}

/// A struct of the component keys (`efac`, `equad`, `ecorr_backends`, `red`, `red_frequencies`,
/// `dm`, `dm_frequencies`), each optional, then `$extra` fields: the `[components]` table and a
/// pulsar's table share them. (Not `#[serde(flatten)]`, which cannot refuse unknown keys.)
macro_rules! component_keys {
    ($(#[$doc:meta])* $name:ident { $($extra:tt)* }) => {
        $(#[$doc])*
        #[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
        #[serde(deny_unknown_fields)]
        pub struct $name {
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub efac: Option<bool>,
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub equad: Option<bool>,
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub ecorr_backends: Option<BackendSet>,
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub red: Option<bool>,
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub red_frequencies: Option<usize>,
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub dm: Option<bool>,
            #[serde(default, skip_serializing_if = "Option::is_none")]
            pub dm_frequencies: Option<usize>,
            $($extra)*
        }
    };
}

component_keys! {
    /// Component choices; absent keys fall back to the `[components]` table, then to the
    /// defaults.
    ComponentChoice {}
}

/// The ranges of a power law's two parameters (`[ranges] red.log10_amplitude = [...]`).
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PowerLawRanges {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub log10_amplitude: Option<[f64; 2]>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spectral_index: Option<[f64; 2]>,
}

/// Uniform prior ranges [low, high], keyed by the `noise.toml` names of the parameters (a
/// white-noise key covers every backend); absent keys fall back as for [`ComponentChoice`].
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Ranges {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub efac: Option<[f64; 2]>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub equad_log10_s: Option<[f64; 2]>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ecorr_log10_s: Option<[f64; 2]>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub red: Option<PowerLawRanges>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dm: Option<PowerLawRanges>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub common: Option<PowerLawRanges>,
}

impl Ranges {
    /// The named ranges (dotted `noise.toml` names), in file order, for checks and lookups.
    fn entries(&self) -> [(&'static str, Option<[f64; 2]>); 9] {
        let amp = |p: &Option<PowerLawRanges>| p.and_then(|p| p.log10_amplitude);
        let idx = |p: &Option<PowerLawRanges>| p.and_then(|p| p.spectral_index);
        [
            ("efac", self.efac),
            ("equad_log10_s", self.equad_log10_s),
            ("ecorr_log10_s", self.ecorr_log10_s),
            ("red.log10_amplitude", amp(&self.red)),
            ("red.spectral_index", idx(&self.red)),
            ("dm.log10_amplitude", amp(&self.dm)),
            ("dm.spectral_index", idx(&self.dm)),
            ("common.log10_amplitude", amp(&self.common)),
            ("common.spectral_index", idx(&self.common)),
        ]
    }

    fn get(&self, key: &str) -> Option<[f64; 2]> {
        self.entries()
            .into_iter()
            .find(|(k, _)| *k == key)
            .and_then(|(_, v)| v)
    }
}

component_keys! {
    /// One pulsar's table: the keys of [`ComponentChoice`] and range overrides.
    PulsarChoice {
        #[serde(default, skip_serializing_if = "Option::is_none")]
        pub ranges: Option<Ranges>,
    }
}

impl PulsarChoice {
    /// The component keys of this table.
    pub fn components(&self) -> ComponentChoice {
        ComponentChoice {
            efac: self.efac,
            equad: self.equad,
            ecorr_backends: self.ecorr_backends.clone(),
            red: self.red,
            red_frequencies: self.red_frequencies,
            dm: self.dm,
            dm_frequencies: self.dm_frequencies,
        }
    }
}

/// The common process of the noise fit.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CommonChoice {
    /// "none" (default), "fixed" or "free".
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub process: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub log10_amplitude: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spectral_index: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub frequencies: Option<usize>,
}

/// A priors file as written.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PriorFile {
    #[serde(default)]
    pub components: ComponentChoice,
    #[serde(default)]
    pub ranges: Ranges,
    #[serde(default, rename = "pulsar", skip_serializing_if = "BTreeMap::is_empty")]
    pub pulsars: BTreeMap<String, PulsarChoice>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub common: Option<CommonChoice>,
    /// Where it was read from (for messages); not part of the file.
    #[serde(skip)]
    pub path: PathBuf,
    #[serde(skip)]
    text: String,
}

/// The resolved prior of one pulsar: its components and one uniform range per hyperparameter
/// of the likelihood built from them.
#[derive(Clone, Debug, PartialEq)]
pub struct PulsarPrior {
    pub components: Components,
    /// Per hyperparameter, in the likelihood's order: [low, high].
    pub bounds: Vec<[f64; 2]>,
}

impl PriorFile {
    /// The built-in defaults (no file).
    pub fn defaults() -> PriorFile {
        PriorFile {
            path: PathBuf::from("(built-in priors)"),
            ..Default::default()
        }
    }

    /// Read and check a priors file.
    pub fn read(path: &Path) -> Result<PriorFile> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Self::parse(&text, path)
    }

    /// Parse priors text; `path` is used in messages.
    pub fn parse(text: &str, path: &Path) -> Result<PriorFile> {
        let mut file: PriorFile = toml::from_str(text).map_err(|e| toml_error(path, text, &e))?;
        file.path = path.to_path_buf();
        file.text = text.to_string();
        file.check_ranges()?;
        file.common_spec()?;
        Ok(file)
    }

    /// The file with every default written out (what a run used).
    pub fn to_toml(&self) -> String {
        toml::to_string(self).expect("priors serialise")
    }

    /// An input error at `field` (dotted), with the line of its key under its table when found.
    fn error(&self, field: &str, message: impl Into<String>) -> Error {
        let parts: Vec<&str> = field.split('.').collect();
        let key = parts.last().copied().unwrap_or(field);
        // A dotted range key (`red.log10_amplitude`) may be written as such on its line.
        let dotted = (parts.len() >= 2).then(|| parts[parts.len() - 2..].join("."));
        // The table header: [pulsar.LABEL] for per-pulsar fields, else the first component.
        let header = if parts.first() == Some(&"pulsar") && parts.len() >= 2 {
            format!("[pulsar.{}]", parts[1])
        } else {
            format!("[{}]", parts[0])
        };
        let lines: Vec<&str> = self.text.lines().collect();
        let start = lines.iter().position(|l| l.trim() == header);
        let is_key = |l: &str| {
            let l = l.trim_start();
            let starts = |k: &str| l.starts_with(k) && l[k.len()..].trim_start().starts_with('=');
            starts(key)
                || dotted.as_deref().is_some_and(starts)
                || l.contains(&format!("{{ {key} "))
                || l.contains(&format!(", {key} "))
        };
        let line = start.map(|h| {
            (h + 1..lines.len())
                .take_while(|&k| !lines[k].trim_start().starts_with('['))
                .find(|&k| is_key(lines[k]))
                .unwrap_or(h)
                + 1
        });
        Error::input(&self.path, line, Some(field), message)
    }

    fn check_ranges(&self) -> Result<()> {
        let mut all = vec![("ranges".to_string(), &self.ranges)];
        for (label, p) in &self.pulsars {
            if let Some(r) = &p.ranges {
                all.push((format!("pulsar.{label}.ranges"), r));
            }
        }
        for (prefix, r) in all {
            for (key, v) in r.entries() {
                let Some([lo, hi]) = v else { continue };
                let field = format!("{prefix}.{key}");
                if !(lo.is_finite() && hi.is_finite()) {
                    return Err(self.error(&field, format!("range [{lo}, {hi}] is not finite")));
                }
                if lo >= hi {
                    return Err(self.error(
                        &field,
                        format!("range [{lo}, {hi}] is empty or inverted (need low < high)"),
                    ));
                }
                if key == "efac" && lo <= 0.0 {
                    return Err(self.error(
                        &field,
                        format!("EFAC range must be positive, got [{lo}, {hi}]"),
                    ));
                }
                // Every value of the range must be one noise.toml accepts (noise.rs), so the
                // written model and chain tables are readable.
                let (allowed, open_low) = match key {
                    "efac" => (EFAC_RANGE, true),
                    "equad_log10_s" | "ecorr_log10_s" => (WHITE_LOG10_S_RANGE, false),
                    k if k.ends_with("log10_amplitude") => (LOG10_AMPLITUDE_RANGE, false),
                    _ => (SPECTRAL_INDEX_RANGE, false),
                };
                let [a, b] = allowed;
                if lo < a || hi > b || (open_low && lo <= a) {
                    return Err(self.error(
                        &field,
                        format!(
                            "range [{lo}, {hi}] leaves the allowed {}{a}, {b}] of noise.toml",
                            if open_low { "(" } else { "[" }
                        ),
                    ));
                }
            }
        }
        let tables: Vec<(String, ComponentChoice)> =
            std::iter::once(("components".to_string(), self.components.clone()))
                .chain(
                    self.pulsars
                        .iter()
                        .map(|(l, p)| (format!("pulsar.{l}"), p.components())),
                )
                .collect();
        for (prefix, c) in &tables {
            for (key, k) in [
                ("red_frequencies", c.red_frequencies),
                ("dm_frequencies", c.dm_frequencies),
            ] {
                if k == Some(0) {
                    return Err(self.error(&format!("{prefix}.{key}"), "must be at least 1"));
                }
            }
            if let Some(BackendSet::Word(w)) = &c.ecorr_backends {
                if w != "all" && w != "none" {
                    return Err(self.error(
                        &format!("{prefix}.ecorr_backends"),
                        format!("expected \"all\", \"none\" or a list of backends, got \"{w}\""),
                    ));
                }
            }
        }
        Ok(())
    }

    /// The common process of the fit, if any.
    pub fn common_spec(&self) -> Result<Option<CommonSpec>> {
        let Some(c) = &self.common else {
            return Ok(None);
        };
        let n_frequencies = c.frequencies.unwrap_or(DEFAULT_FREQUENCIES);
        if n_frequencies == 0 {
            return Err(self.error("common.frequencies", "must be at least 1"));
        }
        match c.process.as_deref().unwrap_or("none") {
            "none" => Ok(None),
            "free" => Ok(Some(CommonSpec {
                n_frequencies,
                term: CommonTerm::Free,
            })),
            "fixed" => {
                let a = c.log10_amplitude.ok_or_else(|| {
                    self.error(
                        "common.log10_amplitude",
                        "a fixed common process needs log10_amplitude",
                    )
                })?;
                let g = c.spectral_index.ok_or_else(|| {
                    self.error(
                        "common.spectral_index",
                        "a fixed common process needs spectral_index",
                    )
                })?;
                if !(a.is_finite() && a <= 0.0) {
                    return Err(self.error(
                        "common.log10_amplitude",
                        format!("must be a finite log10 amplitude (<= 0), got {a}"),
                    ));
                }
                if !(g.is_finite() && g > 0.0 && g <= 10.0) {
                    return Err(self.error(
                        "common.spectral_index",
                        format!("must be in (0, 10], got {g}"),
                    ));
                }
                Ok(Some(CommonSpec {
                    n_frequencies,
                    term: CommonTerm::Fixed(PowerLaw {
                        log10_amplitude: a,
                        spectral_index: g,
                    }),
                }))
            }
            other => Err(self.error(
                "common.process",
                format!("expected \"none\", \"fixed\" or \"free\", got \"{other}\""),
            )),
        }
    }

    /// Check the file against a release: every pulsar table names a pulsar of the release and
    /// every listed ECORR backend exists (in that pulsar, or for `[components]` in some pulsar).
    pub fn check_release(&self, release: &Release) -> Result<()> {
        for label in self.pulsars.keys() {
            if !release.pulsars.iter().any(|p| &p.label == label) {
                return Err(self.error(
                    &format!("pulsar.{label}"),
                    format!("pulsar {label} is not in the release"),
                ));
            }
        }
        if let Some(BackendSet::List(list)) = &self.components.ecorr_backends {
            for b in list {
                if !release.pulsars.iter().any(|p| p.backends.contains(b)) {
                    return Err(self.error(
                        "components.ecorr_backends",
                        format!("backend \"{b}\" is not used by any pulsar of the release"),
                    ));
                }
            }
        }
        for p in &release.pulsars {
            self.pulsar(p)?;
        }
        Ok(())
    }

    /// The resolved prior of one pulsar.
    pub fn pulsar(&self, p: &Pulsar) -> Result<PulsarPrior> {
        let own_table = self.pulsars.get(&p.label);
        let own_choice = own_table.map(PulsarChoice::components);
        let own = own_choice.as_ref();
        let choice = |f: fn(&ComponentChoice) -> Option<bool>, default: bool| {
            own.and_then(f)
                .or_else(|| f(&self.components))
                .unwrap_or(default)
        };
        let count = |f: fn(&ComponentChoice) -> Option<usize>| {
            own.and_then(f)
                .or_else(|| f(&self.components))
                .unwrap_or(DEFAULT_FREQUENCIES)
        };
        let (efac, equad) = (choice(|c| c.efac, true), choice(|c| c.equad, true));
        let own_set = own.and_then(|o| o.ecorr_backends.clone());
        let ecorr: Vec<bool> = match own_set
            .clone()
            .or_else(|| self.components.ecorr_backends.clone())
        {
            None => vec![true; p.backends.len()],
            Some(BackendSet::Word(w)) => vec![w == "all"; p.backends.len()],
            Some(BackendSet::List(list)) => {
                if let Some(BackendSet::List(l)) = &own_set {
                    for b in l {
                        if !p.backends.contains(b) {
                            return Err(self.error(
                                &format!("pulsar.{}.ecorr_backends", p.label),
                                format!(
                                    "pulsar {} has no backend \"{b}\" (it has {})",
                                    p.label,
                                    p.backends.join(", ")
                                ),
                            ));
                        }
                    }
                }
                p.backends.iter().map(|b| list.contains(b)).collect()
            }
        };
        let components = Components {
            backends: ecorr
                .iter()
                .map(|&e| BackendTerms {
                    efac,
                    log10_equad: equad,
                    log10_ecorr: e,
                })
                .collect(),
            red: choice(|c| c.red, true).then(|| count(|c| c.red_frequencies)),
            dm: choice(|c| c.dm, false).then(|| count(|c| c.dm_frequencies)),
            common: self.common_spec()?,
        };
        let range = |key: &str, default: [f64; 2]| {
            own_table
                .and_then(|o| o.ranges.as_ref())
                .and_then(|r| r.get(key))
                .or_else(|| self.ranges.get(key))
                .unwrap_or(default)
        };
        let bounds = parameter_kinds(&components)
            .into_iter()
            .map(|kind| match kind {
                Hyper::Efac(_) => range("efac", DEFAULT_EFAC),
                Hyper::Log10Equad(_) => range("equad_log10_s", DEFAULT_LOG10_WHITE_S),
                Hyper::Log10Ecorr(_) => range("ecorr_log10_s", DEFAULT_LOG10_WHITE_S),
                Hyper::RedLog10Amplitude => range("red.log10_amplitude", DEFAULT_LOG10_AMPLITUDE),
                Hyper::RedSpectralIndex => range("red.spectral_index", DEFAULT_SPECTRAL_INDEX),
                Hyper::DmLog10Amplitude => range("dm.log10_amplitude", DEFAULT_LOG10_AMPLITUDE),
                Hyper::DmSpectralIndex => range("dm.spectral_index", DEFAULT_SPECTRAL_INDEX),
                Hyper::CommonLog10Amplitude => {
                    range("common.log10_amplitude", DEFAULT_LOG10_AMPLITUDE)
                }
                Hyper::CommonSpectralIndex => {
                    range("common.spectral_index", DEFAULT_SPECTRAL_INDEX)
                }
            })
            .collect();
        Ok(PulsarPrior { components, bounds })
    }
}

/// The kinds of the hyperparameters of `components`, in the order [`PulsarLikelihood`] uses.
pub fn parameter_kinds(components: &Components) -> Vec<Hyper> {
    let mut kinds = Vec::new();
    for (b, t) in components.backends.iter().enumerate() {
        if t.efac {
            kinds.push(Hyper::Efac(b));
        }
        if t.log10_equad {
            kinds.push(Hyper::Log10Equad(b));
        }
        if t.log10_ecorr {
            kinds.push(Hyper::Log10Ecorr(b));
        }
    }
    if components.red.is_some() {
        kinds.extend([Hyper::RedLog10Amplitude, Hyper::RedSpectralIndex]);
    }
    if components.dm.is_some() {
        kinds.extend([Hyper::DmLog10Amplitude, Hyper::DmSpectralIndex]);
    }
    if matches!(components.common.map(|c| c.term), Some(CommonTerm::Free)) {
        kinds.extend([Hyper::CommonLog10Amplitude, Hyper::CommonSpectralIndex]);
    }
    kinds
}

/// Check that a likelihood and a prior agree on the parameter order (a programming error
/// otherwise).
pub fn matches(lik: &PulsarLikelihood, prior: &PulsarPrior) -> bool {
    let kinds: Vec<Hyper> = lik.parameters().iter().map(|p| p.kind).collect();
    kinds == parameter_kinds(&prior.components) && kinds.len() == prior.bounds.len()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pulsar(backends: &[&str]) -> Pulsar {
        Pulsar {
            label: "P01".into(),
            ra: 0.0,
            dec: 0.0,
            direction: crate::sky::direction_from_radec(0.0, 0.0),
            mjd: vec![55000.0, 55001.0],
            residual: vec![0.0; 2],
            sigma: vec![1e-7; 2],
            freq_mhz: vec![1400.0; 2],
            backend: vec![0, 0],
            backends: backends.iter().map(|s| s.to_string()).collect(),
            design: None,
        }
    }

    #[test]
    fn defaults_are_the_documented_ones() {
        let prior = PriorFile::defaults().pulsar(&pulsar(&["A", "B"])).unwrap();
        // efac, equad, ecorr for each of two backends, then red (amplitude, index).
        assert_eq!(prior.bounds.len(), 8);
        assert_eq!(prior.bounds[0], [0.01, 10.0]);
        assert_eq!(prior.bounds[1], [-9.0, -5.0]);
        assert_eq!(prior.bounds[6], [-20.0, -11.0]);
        assert_eq!(prior.bounds[7], [0.0, 7.0]);
        assert_eq!(prior.components.red, Some(30));
        assert_eq!(prior.components.dm, None);
    }

    #[test]
    fn per_pulsar_tables_override_the_defaults() {
        let text = "[components]\necorr_backends = \"none\"\nred = false\n\n[pulsar.P01]\ndm = true\ndm_frequencies = 12\necorr_backends = [\"B\"]\nranges = { dm = { spectral_index = [1.0, 5.0] } }\n";
        let f = PriorFile::parse(text, Path::new("priors.toml")).unwrap();
        let prior = f.pulsar(&pulsar(&["A", "B"])).unwrap();
        assert_eq!(prior.components.red, None);
        assert_eq!(prior.components.dm, Some(12));
        assert!(!prior.components.backends[0].log10_ecorr);
        assert!(prior.components.backends[1].log10_ecorr);
        assert_eq!(*prior.bounds.last().unwrap(), [1.0, 5.0]);
        let back = PriorFile::parse(&f.to_toml(), Path::new("x")).unwrap();
        assert_eq!(back.pulsar(&pulsar(&["A", "B"])).unwrap(), prior);
    }

    #[test]
    fn bad_input_names_file_and_field() {
        let e = PriorFile::parse("[ranges]\nefac = [2.0, 1.0]\n", Path::new("priors.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("priors.toml line 2, field ranges.efac"), "{e}");
        assert!(e.contains("empty or inverted"), "{e}");
        let e = PriorFile::parse(
            "[ranges]\nefac = [0.5, 2.0]\nred.spectral_index = [3.0, 3.0]\n",
            Path::new("p.toml"),
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("p.toml line 3, field ranges.red.spectral_index"),
            "{e}"
        );
        let e = PriorFile::parse(
            "[ranges]\nlog10_equad_s = [-8.0, -6.0]\n",
            Path::new("p.toml"),
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("p.toml line 2") && e.contains("unknown field"),
            "{e}"
        );
        let f = PriorFile::parse(
            "[pulsar.P01]\necorr_backends = [\"C\"]\n",
            Path::new("p.toml"),
        )
        .unwrap();
        let e = f.pulsar(&pulsar(&["A", "B"])).unwrap_err().to_string();
        assert!(
            e.contains("p.toml line 2, field pulsar.P01.ecorr_backends"),
            "{e}"
        );
        assert!(e.contains("no backend \"C\""), "{e}");
        let e = PriorFile::parse("[common]\nprocess = \"fixed\"\n", Path::new("p.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("common.log10_amplitude"), "{e}");
        let e = PriorFile::parse("[ranges]\nefac_range = [1.0, 2.0]\n", Path::new("p.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("p.toml line 2"), "{e}");
    }
}
