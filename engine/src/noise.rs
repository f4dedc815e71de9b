//! The noise model of a release (`noise.toml`): per-backend white noise (EFAC, EQUAD, ECORR),
//! per-pulsar red and chromatic (DM) power laws, and the common process.

use crate::error::{Error, Result};
use crate::spectrum::PowerLaw;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

/// A red process: a power law and, optionally, its own number of Fourier frequencies.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RedProcess {
    pub log10_amplitude: f64,
    pub spectral_index: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub n_frequencies: Option<usize>,
}

impl RedProcess {
    /// The power law of this process.
    pub fn power_law(&self) -> PowerLaw {
        PowerLaw {
            log10_amplitude: self.log10_amplitude,
            spectral_index: self.spectral_index,
        }
    }
}

/// White noise of one backend: N_ii = (EFAC sigma_i)^2 + EQUAD^2, plus optional ECORR jitter.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WhiteNoise {
    pub backend: String,
    #[serde(default = "one")]
    pub efac: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub equad_log10_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ecorr_log10_s: Option<f64>,
}

fn one() -> f64 {
    1.0
}

impl WhiteNoise {
    /// EQUAD in seconds (0 when absent).
    pub fn equad(&self) -> f64 {
        self.equad_log10_s.map_or(0.0, |l| 10f64.powf(l))
    }
    /// ECORR in seconds, if the backend has jitter.
    pub fn ecorr(&self) -> Option<f64> {
        self.ecorr_log10_s.map(|l| 10f64.powf(l))
    }
}

/// The noise of one pulsar.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PulsarNoise {
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub white: Vec<WhiteNoise>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub red: Option<RedProcess>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dm: Option<RedProcess>,
}

impl PulsarNoise {
    /// White-noise parameters of a backend (EFAC 1, no EQUAD, no ECORR when absent).
    pub fn white_for(&self, backend: &str) -> WhiteNoise {
        self.white
            .iter()
            .find(|w| w.backend == backend)
            .cloned()
            .unwrap_or(WhiteNoise {
                backend: backend.to_string(),
                efac: 1.0,
                equad_log10_s: None,
                ecorr_log10_s: None,
            })
    }
}

/// The noise model of a whole release.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NoiseModel {
    /// The common process included in every pulsar's auto-power.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub common: Option<RedProcess>,
    /// Per-pulsar noise, keyed by label.
    #[serde(default, rename = "pulsar")]
    pub pulsars: BTreeMap<String, PulsarNoise>,
}

impl NoiseModel {
    /// The noise of a pulsar (white noise only, EFAC 1, when absent).
    pub fn pulsar(&self, label: &str) -> PulsarNoise {
        self.pulsars.get(label).cloned().unwrap_or_default()
    }

    /// Parse `noise.toml` text; `path` is used in messages.
    pub fn parse(text: &str, path: &Path) -> Result<NoiseModel> {
        let model: NoiseModel = toml::from_str(text).map_err(|e| toml_error(path, text, &e))?;
        model.validate(path, text)?;
        Ok(model)
    }

    /// Check every number is finite and in range.
    fn validate(&self, path: &Path, text: &str) -> Result<()> {
        let at = |field: String, message: String| {
            let line = find_line(text, &field);
            Error::input(path, line, Some(&field), message)
        };
        if let Some(c) = &self.common {
            check_red(c, "common").map_err(|(f, m)| at(f, m))?;
        }
        for (label, p) in &self.pulsars {
            for (i, w) in p.white.iter().enumerate() {
                let field = format!("pulsar.{label}.white[{i}]");
                if !(w.efac.is_finite() && w.efac > 0.0) {
                    return Err(at(
                        format!("{field}.efac"),
                        format!("EFAC must be a positive number, got {}", w.efac),
                    ));
                }
                for (name, v) in [
                    ("equad_log10_s", w.equad_log10_s),
                    ("ecorr_log10_s", w.ecorr_log10_s),
                ] {
                    if let Some(v) = v {
                        if !v.is_finite() || v > 0.0 {
                            return Err(at(
                                format!("{field}.{name}"),
                                format!("must be a finite log10 of seconds (<= 0), got {v}"),
                            ));
                        }
                    }
                }
                if p.white[..i].iter().any(|o| o.backend == w.backend) {
                    return Err(at(
                        format!("{field}.backend"),
                        format!("backend \"{}\" is given twice", w.backend),
                    ));
                }
            }
            for (name, r) in [("red", &p.red), ("dm", &p.dm)] {
                if let Some(r) = r {
                    check_red(r, &format!("pulsar.{label}.{name}")).map_err(|(f, m)| at(f, m))?;
                }
            }
        }
        Ok(())
    }
}

fn check_red(r: &RedProcess, field: &str) -> std::result::Result<(), (String, String)> {
    if !r.log10_amplitude.is_finite() || r.log10_amplitude > 0.0 {
        return Err((
            format!("{field}.log10_amplitude"),
            format!(
                "must be a finite log10 amplitude (<= 0), got {}",
                r.log10_amplitude
            ),
        ));
    }
    if !r.spectral_index.is_finite() || r.spectral_index <= 0.0 || r.spectral_index > 10.0 {
        return Err((
            format!("{field}.spectral_index"),
            format!("must be in (0, 10], got {}", r.spectral_index),
        ));
    }
    if r.n_frequencies == Some(0) {
        return Err((
            format!("{field}.n_frequencies"),
            "must be at least 1".to_string(),
        ));
    }
    Ok(())
}

/// Best-effort line of a dotted field such as `pulsar.P01.white[0].efac` in TOML text, for
/// messages: the key's line under its own table header if there is one, else the line of the
/// inline table that holds it, else the nearest enclosing table header.
fn find_line(text: &str, field: &str) -> Option<usize> {
    let lines: Vec<&str> = text.lines().collect();
    let is_header = |l: &str| l.trim_start().starts_with('[');
    let key_after = |start: usize, key: &str| -> Option<usize> {
        (start + 1..lines.len())
            .take_while(|&k| !is_header(lines[k]))
            .find(|&k| lines[k].trim_start().starts_with(key))
    };
    let parts: Vec<&str> = field.split('.').collect();
    for cut in (1..=parts.len()).rev() {
        let (table, rest) = parts.split_at(cut);
        let (name, index) = match table[cut - 1].split_once('[') {
            Some((n, i)) => (n, i.trim_end_matches(']').parse::<usize>().ok()),
            None => (table[cut - 1], None),
        };
        let path = table[..cut - 1]
            .iter()
            .copied()
            .chain([name])
            .collect::<Vec<_>>()
            .join(".");
        let header = match index {
            Some(_) => format!("[[{path}]]"),
            None => format!("[{path}]"),
        };
        let found = lines
            .iter()
            .enumerate()
            .filter(|(_, l)| l.trim() == header)
            .map(|(k, _)| k)
            .nth(index.unwrap_or(0));
        if let Some(h) = found {
            let line = rest.first().and_then(|key| key_after(h, key)).unwrap_or(h);
            return Some(line + 1);
        }
        // An inline table or array: `name = ...` under the parent table.
        let parent = format!("[{}]", table[..cut - 1].join("."));
        if let Some(h) = lines.iter().position(|l| l.trim() == parent) {
            if let Some(k) = key_after(h, name) {
                return Some(k + 1);
            }
        }
    }
    None
}

/// Turn a TOML error into an input error with a line number.
pub(crate) fn toml_error(path: &Path, text: &str, e: &toml::de::Error) -> Error {
    let line = e.span().map(|s| line_of(text, s.start));
    Error::input(path, line, None, e.message().trim().to_string())
}

/// 1-based line of a byte offset.
pub(crate) fn line_of(text: &str, offset: usize) -> usize {
    text.as_bytes()[..offset.min(text.len())]
        .iter()
        .filter(|&&c| c == b'\n')
        .count()
        + 1
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_a_complete_noise_file() {
        let text = r#"
[common]
log10_amplitude = -14.5
spectral_index = 4.333333333333333

[pulsar.P01]
white = [{ backend = "KAR-L", efac = 1.1, equad_log10_s = -7.0, ecorr_log10_s = -6.5 }]
red = { log10_amplitude = -13.8, spectral_index = 3.0, n_frequencies = 30 }
"#;
        let m = NoiseModel::parse(text, Path::new("noise.toml")).unwrap();
        assert_eq!(m.common.unwrap().log10_amplitude, -14.5);
        let p = m.pulsar("P01");
        assert_eq!(p.white_for("KAR-L").efac, 1.1);
        assert_eq!(p.white_for("OTHER").efac, 1.0);
        assert_eq!(p.red.unwrap().n_frequencies, Some(30));
        let back = toml::to_string(&m).unwrap();
        assert_eq!(NoiseModel::parse(&back, Path::new("x")).unwrap(), m);
    }

    #[test]
    fn rejects_bad_values_with_the_field() {
        let text = "[pulsar.P01]\nwhite = [{ backend = \"A\", efac = -1.0 }]\n";
        let e = NoiseModel::parse(text, Path::new("noise.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("noise.toml line 2, field pulsar.P01.white[0].efac"),
            "{e}"
        );
        let e = NoiseModel::parse("[common]\nlog10_amplitude = -14\n", Path::new("n.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("spectral_index"), "{e}");
    }
}
