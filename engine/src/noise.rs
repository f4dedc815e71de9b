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
            check_label(label).map_err(|m| at(format!("pulsar.{label}"), m))?;
            for (i, w) in p.white.iter().enumerate() {
                let field = format!("pulsar.{label}.white[{i}]");
                let [elo, ehi] = EFAC_RANGE;
                if !(w.efac.is_finite() && w.efac > elo && w.efac <= ehi) {
                    return Err(at(
                        format!("{field}.efac"),
                        format!("EFAC must be in ({elo}, {ehi}], got {}", w.efac),
                    ));
                }
                for (name, v) in [
                    ("equad_log10_s", w.equad_log10_s),
                    ("ecorr_log10_s", w.ecorr_log10_s),
                ] {
                    if let Some(v) = v {
                        let [lo, hi] = WHITE_LOG10_S_RANGE;
                        if !(v.is_finite() && (lo..=hi).contains(&v)) {
                            return Err(at(
                                format!("{field}.{name}"),
                                format!("must be a log10 of seconds in [{lo}, {hi}], got {v}"),
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

/// Allowed log10 amplitudes of red, DM and common power laws (dimensionless strain at
/// 1/yr). Every amplitude seen or predicted for pulsar timing lies far inside; the bounds
/// only catch typing errors (a sign dropped, a unit confused).
pub const LOG10_AMPLITUDE_RANGE: [f64; 2] = [-20.0, -8.0];

/// Allowed log10 amplitudes of the common process in a prior range of `ptacorr common` and in
/// its posterior draws (`common.log10_amplitude` of a chain table). Wider than
/// [`LOG10_AMPLITUDE_RANGE`]: an upper-limit or a prior-sensitivity run may reach far below
/// any amplitude a `noise.toml` states, and its draws must be writable and readable.
pub const COMMON_LOG10_AMPLITUDE_RANGE: [f64; 2] = [-30.0, 0.0];

/// Allowed spectral indices gamma of a power law (open below, closed above).
pub const SPECTRAL_INDEX_RANGE: [f64; 2] = [0.0, 10.0];

/// Allowed log10 EQUAD and ECORR in seconds: 1e-10 s (0.1 ns) to 1e-3 s (1 ms).
pub const WHITE_LOG10_S_RANGE: [f64; 2] = [-10.0, -3.0];

/// Allowed EFAC (a multiplier of the stated uncertainties).
pub const EFAC_RANGE: [f64; 2] = [0.0, 100.0];

/// Most Fourier frequencies of any one process (each adds two columns to every pulsar's
/// basis; 1000 frequencies over 20,000 TOAs is already 0.3 GB per pulsar).
pub const MAX_FREQUENCIES: usize = 1000;

/// Check a power law's amplitude and index; `Err((field suffix, message))`.
pub fn check_power_law(
    log10_amplitude: f64,
    spectral_index: f64,
) -> std::result::Result<(), (&'static str, String)> {
    let [alo, ahi] = LOG10_AMPLITUDE_RANGE;
    if !(log10_amplitude.is_finite() && (alo..=ahi).contains(&log10_amplitude)) {
        return Err((
            "log10_amplitude",
            format!("must be a log10 amplitude in [{alo}, {ahi}], got {log10_amplitude}"),
        ));
    }
    let [glo, ghi] = SPECTRAL_INDEX_RANGE;
    if !(spectral_index.is_finite() && spectral_index > glo && spectral_index <= ghi) {
        return Err((
            "spectral_index",
            format!("must be in ({glo}, {ghi}], got {spectral_index}"),
        ));
    }
    Ok(())
}

/// Check a caller's common process (a command-line amplitude such as
/// `--common-log10-amplitude`) against the physical ranges.
pub fn check_common_setting(common: &crate::analysis::CommonAutoPower) -> Result<()> {
    if let crate::analysis::CommonAutoPower::Given(p) = common {
        check_power_law(p.log10_amplitude, p.spectral_index).map_err(|(f, m)| {
            let name = if f == "log10_amplitude" {
                "common-log10-amplitude"
            } else {
                "spectral-index"
            };
            Error::setting(name, m)
        })?;
    }
    Ok(())
}

/// Check a label (pulsar or backend) is usable as a file name and a CSV cell: 1 to 64
/// characters from letters, digits, `.`, `_`, `-`, `+`, not starting with `.`.
pub fn check_label(label: &str) -> std::result::Result<(), String> {
    let ok = !label.is_empty()
        && label.chars().count() <= 64
        && !label.starts_with('.')
        && label
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-' | '+'));
    if ok {
        Ok(())
    } else {
        Err(format!(
            "{} is not a usable label: 1 to 64 characters from letters, digits, '.', '_', '-', '+', not starting with '.'",
            crate::output::quote(label)
        ))
    }
}

fn check_red(r: &RedProcess, field: &str) -> std::result::Result<(), (String, String)> {
    check_power_law(r.log10_amplitude, r.spectral_index)
        .map_err(|(f, m)| (format!("{field}.{f}"), m))?;
    if let Some(n) = r.n_frequencies {
        if n == 0 || n > MAX_FREQUENCIES {
            return Err((
                format!("{field}.n_frequencies"),
                format!("must be in 1..={MAX_FREQUENCIES}, got {n}"),
            ));
        }
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
