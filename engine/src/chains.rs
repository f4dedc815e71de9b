//! The posterior draw table ("chain table"): one CSV row per post-warm-up draw of a sampler,
//!
//! ```text
//! chain,draw,log_posterior,diverging,<parameter>,<parameter>,...
//! 0,0,-1234.5,false,1.02,-6.9,-13.8,3.1
//! ```
//!
//! `chain` is a 0-based integer, `draw` the 0-based index within its chain, `log_posterior`
//! the sampled log density (a finite float, or empty when the writer did not record it),
//! `diverging` is `true` or `false`, and every further column is one sampled parameter in its
//! physical scale, named by its `noise.toml` key (see [`Parameter`]). `ptacorr noise` writes
//! one table per pulsar (`chains/LABEL.csv`); `ptacorr common` writes `common-draws.csv` with
//! only the `common.*` columns; `correlate` reads both for the noise-marginalised optimal
//! statistic. The format is ours; docs/noise-marginalised.md describes it.
//!
//! The columns after the fourth depend on the model, so rows are read and written as CSV
//! records of the `csv` crate with this module's own typed schema ([`ChainTable`]) in place of
//! a fixed serde row type.

use crate::error::{Error, Result};
use crate::noise::{
    check_label, check_power_law, PulsarNoise, RedProcess, WhiteNoise,
    COMMON_LOG10_AMPLITUDE_RANGE, EFAC_RANGE, WHITE_LOG10_S_RANGE,
};
use crate::output::{fmt_f64, quote, truncate, QUOTE_CHARS};
use std::collections::BTreeSet;
use std::fmt;
use std::path::Path;

/// The four leading columns of every chain table, in order.
pub const FIXED_COLUMNS: [&str; 4] = ["chain", "draw", "log_posterior", "diverging"];

/// One sampled parameter: a column of the chain table, named by its `noise.toml` key. Backend
/// labels may contain '.', so a name is split at its FIRST '.'.
#[derive(Clone, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Parameter {
    /// `efac.BACKEND`
    Efac(String),
    /// `equad_log10_s.BACKEND`
    EquadLog10S(String),
    /// `ecorr_log10_s.BACKEND`
    EcorrLog10S(String),
    /// `red.log10_amplitude`
    RedLog10Amplitude,
    /// `red.spectral_index`
    RedSpectralIndex,
    /// `dm.log10_amplitude`
    DmLog10Amplitude,
    /// `dm.spectral_index`
    DmSpectralIndex,
    /// `common.log10_amplitude`
    CommonLog10Amplitude,
    /// `common.spectral_index`
    CommonSpectralIndex,
    /// `common.log10_rho_J`: log10 of the free-spectrum power (s^2) at frequency J / T_span,
    /// J = 1..K (the free-spectrum chain tables of `ptacorr common`).
    CommonLog10Power(usize),
    /// `red_log10_amplitude.LABEL`: the red-noise amplitude of pulsar LABEL in a table that
    /// holds several pulsars (the joint fit of every pulsar's red noise with the common
    /// process, `ptacorr common --joint-red`).
    PulsarRedLog10Amplitude(String),
    /// `red_spectral_index.LABEL`: the same for the spectral index.
    PulsarRedSpectralIndex(String),
}

impl Parameter {
    /// Parse a column name; `Err(message)` for a name that is not a parameter.
    pub fn parse(name: &str) -> std::result::Result<Parameter, String> {
        let Some((head, tail)) = name.split_once('.') else {
            return Err(format!(
                "{} is not a parameter name (expected e.g. efac.BACKEND, red.log10_amplitude)",
                quote(name)
            ));
        };
        let backend = |make: fn(String) -> Parameter| {
            check_label(tail)
                .map(|_| make(tail.to_string()))
                .map_err(|m| format!("backend of {}: {m}", quote(name)))
        };
        match (head, tail) {
            ("efac", _) => backend(Parameter::Efac),
            ("equad_log10_s", _) => backend(Parameter::EquadLog10S),
            ("ecorr_log10_s", _) => backend(Parameter::EcorrLog10S),
            ("red_log10_amplitude" | "red_spectral_index", _) => check_label(tail)
                .map(|_| {
                    if head == "red_log10_amplitude" {
                        Parameter::PulsarRedLog10Amplitude(tail.to_string())
                    } else {
                        Parameter::PulsarRedSpectralIndex(tail.to_string())
                    }
                })
                .map_err(|m| format!("pulsar of {}: {m}", quote(name))),
            ("red", "log10_amplitude") => Ok(Parameter::RedLog10Amplitude),
            ("red", "spectral_index") => Ok(Parameter::RedSpectralIndex),
            ("dm", "log10_amplitude") => Ok(Parameter::DmLog10Amplitude),
            ("dm", "spectral_index") => Ok(Parameter::DmSpectralIndex),
            ("common", "log10_amplitude") => Ok(Parameter::CommonLog10Amplitude),
            ("common", "spectral_index") => Ok(Parameter::CommonSpectralIndex),
            ("common", t) if t.starts_with("log10_rho_") => match t["log10_rho_".len()..].parse::<usize>() {
                Ok(j) if (1..=1000).contains(&j) && !t["log10_rho_".len()..].starts_with('0') => {
                    Ok(Parameter::CommonLog10Power(j))
                }
                _ => Err(format!(
                    "{} is not a free-spectrum parameter (common.log10_rho_J with J in 1..=1000)",
                    quote(name)
                )),
            },
            _ => Err(format!(
                "{} is not a known parameter (efac.B, equad_log10_s.B, ecorr_log10_s.B, red.log10_amplitude, red.spectral_index, dm.log10_amplitude, dm.spectral_index, common.log10_amplitude, common.spectral_index)",
                quote(name)
            )),
        }
    }

    /// The backend of a white-noise parameter.
    pub fn backend(&self) -> Option<&str> {
        match self {
            Parameter::Efac(b) | Parameter::EquadLog10S(b) | Parameter::EcorrLog10S(b) => Some(b),
            _ => None,
        }
    }

    /// Whether this is a parameter of the common process.
    pub fn is_common(&self) -> bool {
        matches!(
            self,
            Parameter::CommonLog10Amplitude
                | Parameter::CommonSpectralIndex
                | Parameter::CommonLog10Power(_)
        )
    }

    /// Check a value against the ranges `noise.toml` allows (`noise.rs`).
    pub fn check_value(&self, v: f64) -> std::result::Result<(), String> {
        if !v.is_finite() {
            return Err(format!("{v} is not a finite number"));
        }
        match self {
            Parameter::Efac(_) => {
                let [lo, hi] = EFAC_RANGE;
                if !(v > lo && v <= hi) {
                    return Err(format!("EFAC must be in ({lo}, {hi}], got {v}"));
                }
            }
            Parameter::EquadLog10S(_) | Parameter::EcorrLog10S(_) => {
                let [lo, hi] = WHITE_LOG10_S_RANGE;
                if !(lo..=hi).contains(&v) {
                    return Err(format!(
                        "must be a log10 of seconds in [{lo}, {hi}], got {v}"
                    ));
                }
            }
            Parameter::RedLog10Amplitude
            | Parameter::DmLog10Amplitude
            | Parameter::PulsarRedLog10Amplitude(_) => {
                check_power_law(v, 1.0).map_err(|(_, m)| m)?;
            }
            Parameter::CommonLog10Amplitude => {
                // The range of `ptacorr common`'s priors, so every draw it writes reads back.
                let [lo, hi] = COMMON_LOG10_AMPLITUDE_RANGE;
                if !(lo..=hi).contains(&v) {
                    return Err(format!(
                        "must be a log10 amplitude of the common process in [{lo}, {hi}], got {v}"
                    ));
                }
            }
            Parameter::RedSpectralIndex
            | Parameter::DmSpectralIndex
            | Parameter::CommonSpectralIndex
            | Parameter::PulsarRedSpectralIndex(_) => {
                check_power_law(-14.0, v).map_err(|(_, m)| m)?;
            }
            Parameter::CommonLog10Power(_) => {
                // The range free-spectrum priors may take (common/free_spectrum.rs).
                if !(-40.0..=0.0).contains(&v) {
                    return Err(format!("must be a log10 power in s^2 in [-40, 0], got {v}"));
                }
            }
        }
        Ok(())
    }
}

impl fmt::Display for Parameter {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Parameter::Efac(b) => write!(f, "efac.{b}"),
            Parameter::EquadLog10S(b) => write!(f, "equad_log10_s.{b}"),
            Parameter::EcorrLog10S(b) => write!(f, "ecorr_log10_s.{b}"),
            Parameter::RedLog10Amplitude => f.write_str("red.log10_amplitude"),
            Parameter::RedSpectralIndex => f.write_str("red.spectral_index"),
            Parameter::DmLog10Amplitude => f.write_str("dm.log10_amplitude"),
            Parameter::DmSpectralIndex => f.write_str("dm.spectral_index"),
            Parameter::CommonLog10Amplitude => f.write_str("common.log10_amplitude"),
            Parameter::CommonSpectralIndex => f.write_str("common.spectral_index"),
            Parameter::CommonLog10Power(j) => write!(f, "common.log10_rho_{j}"),
            Parameter::PulsarRedLog10Amplitude(l) => write!(f, "red_log10_amplitude.{l}"),
            Parameter::PulsarRedSpectralIndex(l) => write!(f, "red_spectral_index.{l}"),
        }
    }
}

/// One row of a chain table.
#[derive(Clone, Debug, PartialEq)]
pub struct ChainDraw {
    /// 0-based chain index.
    pub chain: u32,
    /// 0-based draw index within the chain (post-warm-up).
    pub draw: u64,
    /// The sampled log density, when the writer recorded it.
    pub log_posterior: Option<f64>,
    /// Whether the sampler flagged this draw's trajectory as divergent.
    pub diverging: bool,
    /// One value per parameter, in the table's column order, physical scale.
    pub values: Vec<f64>,
}

/// A whole chain table: its parameters (columns after the fourth) and its rows in file order.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct ChainTable {
    pub parameters: Vec<Parameter>,
    pub draws: Vec<ChainDraw>,
    /// 1-based line of each draw in the file it was read from (empty for a built table).
    pub lines: Vec<usize>,
}

impl ChainTable {
    /// An empty table with these parameter columns (refuses duplicates).
    pub fn new(parameters: Vec<Parameter>) -> Result<ChainTable> {
        let mut seen = BTreeSet::new();
        for p in &parameters {
            if !seen.insert(p) {
                return Err(Error::setting(
                    "chain table",
                    format!("parameter {p} is given twice"),
                ));
            }
        }
        Ok(ChainTable {
            parameters,
            draws: Vec::new(),
            lines: Vec::new(),
        })
    }

    /// Append a draw after checking its width and values.
    pub fn push(&mut self, draw: ChainDraw) -> Result<()> {
        if draw.values.len() != self.parameters.len() {
            return Err(Error::setting(
                "chain table",
                format!(
                    "a draw has {} values for {} parameters",
                    draw.values.len(),
                    self.parameters.len()
                ),
            ));
        }
        if let Some(lp) = draw.log_posterior {
            if !lp.is_finite() {
                return Err(Error::NonFinite {
                    what: format!("log_posterior of chain {} draw {}", draw.chain, draw.draw),
                });
            }
        }
        for (p, &v) in self.parameters.iter().zip(&draw.values) {
            p.check_value(v).map_err(|m| {
                Error::setting(
                    "chain table",
                    format!("chain {} draw {}, {p}: {m}", draw.chain, draw.draw),
                )
            })?;
        }
        self.draws.push(draw);
        Ok(())
    }

    /// Column index of a parameter.
    pub fn column(&self, p: &Parameter) -> Option<usize> {
        self.parameters.iter().position(|q| q == p)
    }

    /// Number of draws (rows).
    pub fn len(&self) -> usize {
        self.draws.len()
    }

    /// Whether the table has no rows.
    pub fn is_empty(&self) -> bool {
        self.draws.is_empty()
    }

    /// 1-based file line of row `i` (header is line 1), for messages.
    pub fn line(&self, i: usize) -> usize {
        self.lines.get(i).copied().unwrap_or(i + 2)
    }

    /// The CSV text of the table (floats in shortest round-trip form).
    pub fn to_csv(&self) -> Result<String> {
        let mut w = csv::Writer::from_writer(Vec::new());
        let mut header: Vec<String> = FIXED_COLUMNS.iter().map(|s| s.to_string()).collect();
        header.extend(self.parameters.iter().map(|p| p.to_string()));
        let err = |e: csv::Error| Error::NonFinite {
            what: format!("chain table ({e})"),
        };
        w.write_record(&header).map_err(err)?;
        for d in &self.draws {
            let mut rec = vec![
                d.chain.to_string(),
                d.draw.to_string(),
                d.log_posterior.map(fmt_f64).unwrap_or_default(),
                d.diverging.to_string(),
            ];
            rec.extend(d.values.iter().map(|&v| fmt_f64(v)));
            w.write_record(&rec).map_err(err)?;
        }
        let bytes = w.into_inner().map_err(|e| Error::NonFinite {
            what: format!("chain table ({e})"),
        })?;
        Ok(String::from_utf8(bytes).expect("csv of UTF-8 fields is UTF-8"))
    }

    /// Write the table to `path` atomically (outside an output set; command outputs should pass
    /// [`ChainTable::to_csv`] to their `OutputSet`).
    pub fn write(&self, path: &Path) -> Result<()> {
        crate::output::write_atomic(path, self.to_csv()?.as_bytes())
    }

    /// Read and check a chain table file.
    pub fn read(path: &Path) -> Result<ChainTable> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        ChainTable::parse(&bytes, path)
    }

    /// Parse chain-table bytes; `path` names the file in messages. Refuses: a header that does
    /// not start with the four fixed columns, unknown or duplicated parameter columns, rows of
    /// the wrong width, non-integer `chain`/`draw`, a `diverging` other than true/false, any
    /// NaN or infinite value, values outside the `noise.toml` ranges, a (chain, draw) pair
    /// given twice, and a table without rows.
    pub fn parse(bytes: &[u8], path: &Path) -> Result<ChainTable> {
        if let Err(e) = std::str::from_utf8(bytes) {
            return Err(Error::input(
                path,
                None,
                None,
                crate::output::non_utf8_message(bytes, &e),
            ));
        }
        let mut rdr = csv::ReaderBuilder::new()
            .has_headers(true)
            .trim(csv::Trim::All)
            .from_reader(bytes);
        let header = rdr.headers().map_err(|e| csv_error(path, &e))?.clone();
        let names: Vec<&str> = header.iter().collect();
        if names.len() < FIXED_COLUMNS.len() || names[..4] != FIXED_COLUMNS {
            return Err(Error::input(
                path,
                Some(1),
                None,
                format!(
                    "header must start with `{}`, found `{}`",
                    FIXED_COLUMNS.join(","),
                    truncate(&names.join(","), QUOTE_CHARS)
                ),
            ));
        }
        let mut parameters = Vec::with_capacity(names.len() - 4);
        for name in &names[4..] {
            if FIXED_COLUMNS.contains(name) {
                return Err(Error::input(
                    path,
                    Some(1),
                    Some(name),
                    "column is given twice",
                ));
            }
            let p =
                Parameter::parse(name).map_err(|m| Error::input(path, Some(1), Some(name), m))?;
            if parameters.contains(&p) {
                return Err(Error::input(
                    path,
                    Some(1),
                    Some(name),
                    "column is given twice",
                ));
            }
            parameters.push(p);
        }
        let mut table = ChainTable {
            parameters,
            draws: Vec::new(),
            lines: Vec::new(),
        };
        let mut seen = BTreeSet::new();
        let mut rec = csv::StringRecord::new();
        loop {
            match rdr.read_record(&mut rec) {
                Ok(false) => break,
                Ok(true) => {}
                Err(e) => return Err(csv_error(path, &e)),
            }
            let line = rec
                .position()
                .map_or(table.draws.len() + 2, |q| q.line() as usize);
            let at = |field: &str, m: String| Error::input(path, Some(line), Some(field), m);
            let chain: u32 = parse_index(&rec[0]).map_err(|m| at("chain", m))?;
            let draw: u64 = parse_index(&rec[1]).map_err(|m| at("draw", m))?;
            let log_posterior = if rec[2].is_empty() {
                None
            } else {
                Some(parse_float(&rec[2]).map_err(|m| at("log_posterior", m))?)
            };
            let diverging = match &rec[3] {
                "true" => true,
                "false" => false,
                other => {
                    return Err(at(
                        "diverging",
                        format!("{} must be true or false", quote(other)),
                    ))
                }
            };
            let mut values = Vec::with_capacity(table.parameters.len());
            for (k, p) in table.parameters.iter().enumerate() {
                let name = p.to_string();
                let v = parse_float(&rec[4 + k]).map_err(|m| at(&name, m))?;
                p.check_value(v).map_err(|m| at(&name, m))?;
                values.push(v);
            }
            if !seen.insert((chain, draw)) {
                return Err(at(
                    "draw",
                    format!("chain {chain} draw {draw} is given twice"),
                ));
            }
            table.draws.push(ChainDraw {
                chain,
                draw,
                log_posterior,
                diverging,
                values,
            });
            table.lines.push(line);
        }
        if table.draws.is_empty() {
            return Err(Error::input(
                path,
                None,
                None,
                "the chain table has no rows",
            ));
        }
        Ok(table)
    }

    /// Refuse a table with parameters other than those of the common process (for
    /// `common-draws.csv`), or without `common.log10_amplitude`.
    pub fn check_common_only(&self, path: &Path) -> Result<()> {
        if let Some(p) = self.parameters.iter().find(|p| {
            !matches!(
                p,
                Parameter::CommonLog10Amplitude | Parameter::CommonSpectralIndex
            )
        }) {
            return Err(Error::input(
                path,
                Some(1),
                Some(&p.to_string()),
                "a common-process draw table holds only common.log10_amplitude and common.spectral_index",
            ));
        }
        if self.column(&Parameter::CommonLog10Amplitude).is_none() {
            return Err(Error::input(
                path,
                Some(1),
                None,
                "a common-process draw table needs a common.log10_amplitude column",
            ));
        }
        Ok(())
    }

    /// Refuse a per-pulsar table that does not fit a pulsar: a common-process column, a
    /// white-noise parameter of a backend the pulsar does not have, or half of a red/DM power
    /// law where the noise model has no such process to take the other half from.
    pub fn check_pulsar(
        &self,
        path: &Path,
        backends: &[String],
        noise: &PulsarNoise,
    ) -> Result<()> {
        for p in &self.parameters {
            let name = p.to_string();
            if p.is_common() {
                return Err(Error::input(
                    path,
                    Some(1),
                    Some(&name),
                    "a per-pulsar chain table may not hold common-process parameters (give them in a common-process draw table)",
                ));
            }
            if matches!(
                p,
                Parameter::PulsarRedLog10Amplitude(_) | Parameter::PulsarRedSpectralIndex(_)
            ) {
                return Err(Error::input(
                    path,
                    Some(1),
                    Some(&name),
                    "a per-pulsar chain table holds red.log10_amplitude and red.spectral_index; this column belongs to a table of several pulsars (ptacorr common --joint-red)",
                ));
            }
            if let Some(b) = p.backend() {
                if !backends.iter().any(|x| x == b) {
                    return Err(Error::input(
                        path,
                        Some(1),
                        Some(&name),
                        format!(
                            "the pulsar has no backend {}; its backends are {}",
                            quote(b),
                            truncate(&backends.join(", "), QUOTE_CHARS)
                        ),
                    ));
                }
            }
        }
        for (amp, idx, process, present) in [
            (
                Parameter::RedLog10Amplitude,
                Parameter::RedSpectralIndex,
                "red",
                noise.red.is_some(),
            ),
            (
                Parameter::DmLog10Amplitude,
                Parameter::DmSpectralIndex,
                "dm",
                noise.dm.is_some(),
            ),
        ] {
            let (a, i) = (self.column(&amp).is_some(), self.column(&idx).is_some());
            if a != i && !present {
                let missing = if a { idx } else { amp };
                return Err(Error::input(
                    path,
                    Some(1),
                    None,
                    format!(
                        "the table has half of the {process} power law and noise.toml has no {process} process for the pulsar to take {missing} from"
                    ),
                ));
            }
        }
        Ok(())
    }

    /// The pulsar noise of row `i`: `base` (the `noise.toml` model) with this row's values in
    /// place of the parameters the table holds; parameters the table lacks keep `base`'s
    /// values. Call [`ChainTable::check_pulsar`] first.
    pub fn pulsar_noise(&self, i: usize, base: &PulsarNoise) -> PulsarNoise {
        let mut noise = base.clone();
        let d = &self.draws[i];
        for (p, &v) in self.parameters.iter().zip(&d.values) {
            match p {
                Parameter::Efac(b) => white_entry(&mut noise, b).efac = v,
                Parameter::EquadLog10S(b) => white_entry(&mut noise, b).equad_log10_s = Some(v),
                Parameter::EcorrLog10S(b) => white_entry(&mut noise, b).ecorr_log10_s = Some(v),
                Parameter::RedLog10Amplitude => red_entry(&mut noise.red).log10_amplitude = v,
                Parameter::RedSpectralIndex => red_entry(&mut noise.red).spectral_index = v,
                Parameter::DmLog10Amplitude => red_entry(&mut noise.dm).log10_amplitude = v,
                Parameter::DmSpectralIndex => red_entry(&mut noise.dm).spectral_index = v,
                Parameter::CommonLog10Amplitude
                | Parameter::CommonSpectralIndex
                | Parameter::CommonLog10Power(_)
                | Parameter::PulsarRedLog10Amplitude(_)
                | Parameter::PulsarRedSpectralIndex(_) => {}
            }
        }
        noise
    }

    /// The common process of row `i`: `base` with this row's amplitude and, when the table
    /// holds it, index (else `base`'s index, else `default_index`).
    pub fn common_process(
        &self,
        i: usize,
        base: Option<&RedProcess>,
        default_index: f64,
    ) -> RedProcess {
        let mut c = base.copied().unwrap_or(RedProcess {
            log10_amplitude: 0.0,
            spectral_index: default_index,
            n_frequencies: None,
        });
        let d = &self.draws[i];
        for (p, &v) in self.parameters.iter().zip(&d.values) {
            match p {
                Parameter::CommonLog10Amplitude => c.log10_amplitude = v,
                Parameter::CommonSpectralIndex => c.spectral_index = v,
                _ => {}
            }
        }
        c
    }
}

fn white_entry<'a>(noise: &'a mut PulsarNoise, backend: &str) -> &'a mut WhiteNoise {
    let k = match noise.white.iter().position(|w| w.backend == backend) {
        Some(k) => k,
        None => {
            noise.white.push(WhiteNoise {
                backend: backend.to_string(),
                efac: 1.0,
                equad_log10_s: None,
                ecorr_log10_s: None,
            });
            noise.white.len() - 1
        }
    };
    &mut noise.white[k]
}

/// The process to overwrite; a placeholder when absent (check_pulsar guarantees both halves
/// are then overwritten).
fn red_entry(process: &mut Option<RedProcess>) -> &mut RedProcess {
    process.get_or_insert(RedProcess {
        log10_amplitude: 0.0,
        spectral_index: 0.0,
        n_frequencies: None,
    })
}

fn parse_index<T: std::str::FromStr>(text: &str) -> std::result::Result<T, String> {
    text.parse::<T>()
        .map_err(|_| format!("{} is not a non-negative integer", quote(text)))
}

fn parse_float(text: &str) -> std::result::Result<f64, String> {
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(v) => Err(format!("{v} is not a finite number")),
        Err(_) => Err(format!("{} is not a number", quote(text))),
    }
}

fn csv_error(path: &Path, e: &csv::Error) -> Error {
    let line = e.position().map(|p| p.line() as usize);
    let msg = match e.kind() {
        csv::ErrorKind::UnequalLengths {
            expected_len, len, ..
        } => format!("expected {expected_len} columns, found {len}"),
        _ => e.to_string(),
    };
    Error::input(path, line, None, msg)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> ChainTable {
        let mut t = ChainTable::new(vec![
            Parameter::Efac("KRK.L".into()),
            Parameter::EquadLog10S("KRK.L".into()),
            Parameter::RedLog10Amplitude,
            Parameter::RedSpectralIndex,
        ])
        .unwrap();
        for (k, lp) in [Some(-10.25), None, Some(1.0e-300)].into_iter().enumerate() {
            t.push(ChainDraw {
                chain: (k / 2) as u32,
                draw: (k % 2) as u64,
                log_posterior: lp,
                diverging: k == 1,
                values: vec![
                    1.0 + 0.1 * k as f64,
                    -7.0 + 1.0 / 3.0,
                    -13.9,
                    3.1 + k as f64,
                ],
            })
            .unwrap();
        }
        t
    }

    fn parse(text: &str) -> Result<ChainTable> {
        ChainTable::parse(text.as_bytes(), Path::new("chains/P01.csv"))
    }

    fn message(text: &str) -> String {
        parse(text).unwrap_err().to_string()
    }

    #[test]
    fn round_trips_bit_for_bit() {
        let t = sample();
        let text = t.to_csv().unwrap();
        assert!(text.starts_with(
            "chain,draw,log_posterior,diverging,efac.KRK.L,equad_log10_s.KRK.L,red.log10_amplitude,red.spectral_index\n"
        ));
        let back = parse(&text).unwrap();
        assert_eq!(back.parameters, t.parameters);
        assert_eq!(back.draws, t.draws);
        assert_eq!(back.lines, vec![2, 3, 4]);
        assert_eq!(back.to_csv().unwrap(), text);
    }

    #[test]
    fn names_split_at_the_first_dot() {
        assert_eq!(
            Parameter::parse("ecorr_log10_s.A.B.C").unwrap(),
            Parameter::EcorrLog10S("A.B.C".into())
        );
        for name in [
            "efac.X",
            "equad_log10_s.X",
            "ecorr_log10_s.X",
            "red.log10_amplitude",
            "red.spectral_index",
            "dm.log10_amplitude",
            "dm.spectral_index",
            "common.log10_amplitude",
            "common.spectral_index",
        ] {
            assert_eq!(Parameter::parse(name).unwrap().to_string(), name);
        }
        assert!(Parameter::parse("red.amplitude").is_err());
        assert!(Parameter::parse("efac").is_err());
        assert!(Parameter::parse("efac.").is_err());
    }

    #[test]
    fn refuses_bad_headers_naming_the_field() {
        let e = message("chain,draw,diverging,log_posterior,efac.A\n0,0,false,1,1\n");
        assert!(
            e.contains("chains/P01.csv line 1") && e.contains("header must start"),
            "{e}"
        );
        let e = message("chain,draw,log_posterior,diverging,efac.A,speed\n0,0,1,false,1,1\n");
        assert!(
            e.contains("line 1, field speed") && e.contains("not a parameter"),
            "{e}"
        );
        let e = message("chain,draw,log_posterior,diverging,red.colour\n0,0,1,false,1\n");
        assert!(
            e.contains("field red.colour") && e.contains("not a known parameter"),
            "{e}"
        );
        let e = message("chain,draw,log_posterior,diverging,efac.A,efac.A\n0,0,1,false,1,1\n");
        assert!(
            e.contains("line 1, field efac.A: column is given twice"),
            "{e}"
        );
        let e = message("chain,draw,log_posterior,diverging,draw\n0,0,1,false,1\n");
        assert!(e.contains("field draw: column is given twice"), "{e}");
    }

    #[test]
    fn refuses_bad_rows_naming_line_and_field() {
        let h = "chain,draw,log_posterior,diverging,efac.A,red.log10_amplitude\n";
        let cases = [
            (
                "0,0,1,false,1.0,-14\n0,1,1,false,NaN,-14\n",
                "line 3, field efac.A",
                "not a finite",
            ),
            (
                "0,0,1,false,1.0,inf\n",
                "line 2, field red.log10_amplitude",
                "not a finite",
            ),
            (
                "0,0,nan,false,1.0,-14\n",
                "line 2, field log_posterior",
                "not a finite",
            ),
            (
                "0.5,0,1,false,1.0,-14\n",
                "line 2, field chain",
                "non-negative integer",
            ),
            (
                "0,-1,1,false,1.0,-14\n",
                "line 2, field draw",
                "non-negative integer",
            ),
            (
                "0,0,1,yes,1.0,-14\n",
                "line 2, field diverging",
                "true or false",
            ),
            (
                "0,0,1,false,-1.0,-14\n",
                "line 2, field efac.A",
                "EFAC must be",
            ),
            (
                "0,0,1,false,1.0,-2\n",
                "line 2, field red.log10_amplitude",
                "log10 amplitude",
            ),
            ("0,0,1,false,1.0\n", "line 2", "expected 6 columns, found 5"),
            (
                "0,0,1,false,1,-14\n0,0,2,false,1,-14\n",
                "line 3, field draw",
                "given twice",
            ),
            (
                "0,0,1,false,x,-14\n",
                "line 2, field efac.A",
                "\"x\" is not a number",
            ),
        ];
        for (rows, at, what) in cases {
            let e = message(&format!("{h}{rows}"));
            assert!(
                e.contains(&format!("chains/P01.csv {at}")) && e.contains(what),
                "{rows}: {e}"
            );
        }
        let e = message(h);
        assert!(e.contains("no rows"), "{e}");
        let e = ChainTable::parse(
            b"chain,draw,log_posterior,diverging\n0,0,\xff,false\n",
            Path::new("c.csv"),
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("not UTF-8"), "{e}");
    }

    #[test]
    fn writer_refuses_what_the_reader_refuses() {
        let mut t = ChainTable::new(vec![Parameter::Efac("A".into())]).unwrap();
        let draw = |v: f64, lp: Option<f64>| ChainDraw {
            chain: 0,
            draw: 0,
            log_posterior: lp,
            diverging: false,
            values: vec![v],
        };
        assert!(t.push(draw(f64::NAN, None)).is_err());
        assert!(t.push(draw(1.0, Some(f64::INFINITY))).is_err());
        assert!(t.push(draw(0.0, None)).is_err());
        assert!(t
            .push(ChainDraw {
                values: vec![],
                ..draw(1.0, None)
            })
            .is_err());
        assert!(t.push(draw(1.0, None)).is_ok());
        assert!(ChainTable::new(vec![
            Parameter::RedLog10Amplitude,
            Parameter::RedLog10Amplitude
        ])
        .is_err());
    }

    #[test]
    fn draws_replace_only_the_parameters_they_hold() {
        let base = PulsarNoise {
            white: vec![WhiteNoise {
                backend: "KRK.L".into(),
                efac: 1.3,
                equad_log10_s: None,
                ecorr_log10_s: Some(-6.5),
            }],
            red: Some(RedProcess {
                log10_amplitude: -13.0,
                spectral_index: 2.0,
                n_frequencies: Some(30),
            }),
            dm: None,
        };
        let t = sample();
        let backends = vec!["KRK.L".to_string(), "MRL-S".to_string()];
        t.check_pulsar(Path::new("c.csv"), &backends, &base)
            .unwrap();
        let n = t.pulsar_noise(2, &base);
        assert_eq!(n.white[0].efac, 1.2);
        assert_eq!(n.white[0].equad_log10_s, Some(-7.0 + 1.0 / 3.0));
        assert_eq!(n.white[0].ecorr_log10_s, Some(-6.5));
        assert_eq!(n.red.unwrap().log10_amplitude, -13.9);
        assert_eq!(n.red.unwrap().spectral_index, 5.1);
        assert_eq!(n.red.unwrap().n_frequencies, Some(30));
        assert_eq!(n.dm, None);
        // A backend the pulsar lacks, a common column, half a power law with nothing to fill.
        let e = t
            .check_pulsar(Path::new("c.csv"), &["MRL-S".to_string()], &base)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("c.csv line 1, field efac.KRK.L") && e.contains("no backend"),
            "{e}"
        );
        let c = ChainTable::new(vec![Parameter::CommonLog10Amplitude]).unwrap();
        assert!(c
            .check_pulsar(Path::new("c.csv"), &backends, &base)
            .is_err());
        c.check_common_only(Path::new("c.csv")).unwrap();
        let half = ChainTable::new(vec![Parameter::DmLog10Amplitude]).unwrap();
        let e = half
            .check_pulsar(Path::new("c.csv"), &backends, &base)
            .unwrap_err()
            .to_string();
        assert!(e.contains("dm.spectral_index"), "{e}");
        assert!(t.check_common_only(Path::new("d.csv")).is_err());
    }

    #[test]
    fn common_draws_keep_the_base_index_unless_given() {
        let mut t = ChainTable::new(vec![Parameter::CommonLog10Amplitude]).unwrap();
        t.push(ChainDraw {
            chain: 0,
            draw: 0,
            log_posterior: None,
            diverging: false,
            values: vec![-14.2],
        })
        .unwrap();
        let c = t.common_process(0, None, 13.0 / 3.0);
        assert_eq!((c.log10_amplitude, c.spectral_index), (-14.2, 13.0 / 3.0));
        let base = RedProcess {
            log10_amplitude: -15.0,
            spectral_index: 3.0,
            n_frequencies: None,
        };
        assert_eq!(
            t.common_process(0, Some(&base), 13.0 / 3.0).spectral_index,
            3.0
        );
    }
    /// `ptacorr common` accepts prior ranges of log10 A in [-30, 0]
    /// (`COMMON_LOG10_AMPLITUDE_RANGE`), so its draws there must be writable: a common draw at
    /// -25 is accepted (a red-noise amplitude there is still refused, `noise.toml`'s range), and
    /// one outside [-30, 0] is refused.
    #[test]
    fn common_draws_take_the_range_of_the_common_prior() {
        let draw = |v: f64| ChainDraw {
            chain: 0,
            draw: 0,
            log_posterior: None,
            diverging: false,
            values: vec![v],
        };
        let mut t = ChainTable::new(vec![Parameter::CommonLog10Amplitude]).unwrap();
        t.push(draw(-25.0)).unwrap();
        t.push(ChainDraw {
            draw: 1,
            ..draw(-3.0)
        })
        .unwrap();
        let e = t
            .push(ChainDraw {
                draw: 2,
                ..draw(-31.0)
            })
            .unwrap_err()
            .to_string();
        assert!(e.contains("[-30, 0]"), "{e}");
        let mut r = ChainTable::new(vec![Parameter::RedLog10Amplitude]).unwrap();
        assert!(r.push(draw(-25.0)).is_err());
    }
}
