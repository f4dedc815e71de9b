//! The true noise values of a simulated release, for the figures of `ptacorr noise`.
//!
//! `ptacorr simulate` writes `truth.toml` beside the release: per pulsar its position, TOA
//! count and the noise it was simulated with, in the shape of a `noise.toml` pulsar entry.
//! When the release has that file, `ptacorr noise` copies the true value of every
//! hyperparameter it fitted into `truth.csv` (`pulsar,parameter,value`, parameters named as in
//! `estimates.csv`), so the figures of the output folder can draw them without the release.
//! A parameter without a true value (an EQUAD or ECORR the simulation did not have, a common
//! process) has no row.

use crate::chains::Parameter;
use crate::error::{Error, Result};
use crate::noise::PulsarNoise;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

/// The file name in the output folder.
pub const TRUTH_FILE: &str = "truth.csv";
/// The file name in a simulated release.
pub const RELEASE_TRUTH_FILE: &str = "truth.toml";

/// One true value.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TruthValue {
    pub pulsar: String,
    pub parameter: String,
    pub value: f64,
}

/// The true value of parameter `name` in a pulsar's simulated noise, if it has one.
fn true_value(noise: &PulsarNoise, name: &str) -> Option<f64> {
    let white = |b: &str| noise.white.iter().find(|w| w.backend == b);
    match Parameter::parse(name).ok()? {
        Parameter::Efac(b) => white(&b).map(|w| w.efac),
        Parameter::EquadLog10S(b) => white(&b)?.equad_log10_s,
        Parameter::EcorrLog10S(b) => white(&b)?.ecorr_log10_s,
        Parameter::RedLog10Amplitude => noise.red.map(|r| r.log10_amplitude),
        Parameter::RedSpectralIndex => noise.red.map(|r| r.spectral_index),
        Parameter::DmLog10Amplitude => noise.dm.map(|r| r.log10_amplitude),
        Parameter::DmSpectralIndex => noise.dm.map(|r| r.spectral_index),
        Parameter::CommonLog10Amplitude
        | Parameter::CommonSpectralIndex
        | Parameter::CommonLog10Power(_)
        | Parameter::PulsarRedLog10Amplitude(_)
        | Parameter::PulsarRedSpectralIndex(_) => None,
    }
}

/// The simulated noise of every pulsar in the release's `truth.toml` (label -> noise); empty
/// when the release has none. Read before any work: a `truth.toml` that is not valid is an
/// error naming the file, line and field.
pub fn read_truth(release_dir: &Path) -> Result<BTreeMap<String, PulsarNoise>> {
    let path = release_dir.join(RELEASE_TRUTH_FILE);
    let mut out = BTreeMap::new();
    if !path.is_file() {
        return Ok(out);
    }
    let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
    let doc: toml::Table = text.parse().map_err(|e: toml::de::Error| {
        let line = e
            .span()
            .map(|s| text[..s.start.min(text.len())].lines().count().max(1));
        Error::input(&path, line, None, e.message().to_string())
    })?;
    let Some(pulsars) = doc.get("pulsar").and_then(|p| p.as_table()) else {
        return Ok(out);
    };
    for (label, entry) in pulsars {
        let field = format!("pulsar.{label}");
        let Some(entry) = entry.as_table() else {
            return Err(Error::input(&path, None, Some(&field), "not a table"));
        };
        let mut noise_part = entry.clone();
        for key in ["ra_deg", "dec_deg", "n_toa"] {
            noise_part.remove(key);
        }
        let noise: PulsarNoise =
            toml::Value::Table(noise_part)
                .try_into()
                .map_err(|e: toml::de::Error| {
                    Error::input(&path, None, Some(&field), e.message().to_string())
                })?;
        out.insert(label.clone(), noise);
    }
    Ok(out)
}

/// The true values of `parameters` of each pulsar (label, parameter names) that `truth` has.
pub fn truth_values(
    truth: &BTreeMap<String, PulsarNoise>,
    pulsars: &[(&str, &[String])],
) -> Vec<TruthValue> {
    let mut out = Vec::new();
    for (label, parameters) in pulsars {
        let Some(noise) = truth.get(*label) else {
            continue;
        };
        for name in parameters.iter() {
            if let Some(value) = true_value(noise, name) {
                out.push(TruthValue {
                    pulsar: label.to_string(),
                    parameter: name.clone(),
                    value,
                });
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn truth_values_follow_the_parameter_names() {
        let dir = std::env::temp_dir().join(format!("ptacorr-truth-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::write(
            dir.join(RELEASE_TRUTH_FILE),
            "[truth]\ntitle = \"t\"\n\n[pulsar.P01]\nra_deg = 1.0\ndec_deg = 2.0\nn_toa = 10\n\n\
             [[pulsar.P01.white]]\nbackend = \"A.B\"\nefac = 1.25\n\n\
             [pulsar.P01.red]\nlog10_amplitude = -13.5\nspectral_index = 3.0\n",
        )
        .unwrap();
        let names: Vec<String> = [
            "efac.A.B",
            "equad_log10_s.A.B",
            "red.log10_amplitude",
            "red.spectral_index",
            "dm.log10_amplitude",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        let truth = read_truth(&dir).unwrap();
        let t = truth_values(&truth, &[("P01", &names), ("P02", &names)]);
        let got: Vec<(&str, f64)> = t.iter().map(|v| (v.parameter.as_str(), v.value)).collect();
        assert_eq!(
            got,
            vec![
                ("efac.A.B", 1.25),
                ("red.log10_amplitude", -13.5),
                ("red.spectral_index", 3.0)
            ]
        );
        std::fs::write(dir.join(RELEASE_TRUTH_FILE), "[pulsar.P01]\nred = 3\n").unwrap();
        let e = read_truth(&dir).unwrap_err().to_string();
        assert!(e.contains("truth.toml") && e.contains("pulsar.P01"), "{e}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
