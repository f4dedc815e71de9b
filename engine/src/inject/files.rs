//! The files of a campaign: recovery.csv, recovery.json, realizations.csv,
//! coverage_plugin.csv and campaign.json.

use super::campaign::Record;
use super::summary::{Outcome, RecoveryRow};
use crate::error::{Error, Result};
use crate::output::fmt_f64;
use serde::{Deserialize, Serialize};
use std::fmt::Write as _;
use std::path::Path;

/// recovery.json (written by the campaign and its merge, read by the merge and the figures).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RecoveryFile {
    pub pattern: String,
    pub false_alarm_probability: f64,
    pub detection_threshold_snr: f64,
    pub realizations: u64,
    pub mode: String,
    /// What the realizations are made on, in plain words (`TargetKind::describe`).
    #[serde(default)]
    pub target: String,
    pub rows: Vec<RecoveryRow>,
    pub assumptions: String,
    pub provenance: serde_json::Value,
}

impl Outcome {
    /// Write recovery.csv, recovery.json, realizations.csv, coverage_plugin.csv and
    /// campaign.json into `dir` (each atomically).
    pub fn write(&self, dir: &Path) -> Result<()> {
        let csv = crate::output::csv_table(&self.rows, "recovery.csv")?;
        let mut real = String::from(REALIZATIONS_HEADER);
        real.push('\n');
        for r in &self.records {
            let _ = writeln!(
                real,
                "{},{},{},{},{},{}",
                fmt_f64(r.amplitude),
                r.realization,
                fmt_f64(r.amplitude2),
                fmt_f64(r.sigma_weak),
                fmt_f64(r.sigma_full),
                fmt_f64(r.snr)
            );
        }
        let plug = crate::output::csv_table(&self.plugin, "coverage_plugin.csv")?;
        let json = RecoveryFile {
            pattern: self.state.pattern.name().to_string(),
            false_alarm_probability: self.state.false_alarm_probability,
            detection_threshold_snr: self.state.detection_threshold_snr,
            realizations: self.realizations(),
            mode: self.state.mode.name().to_string(),
            target: self.state.target.describe().to_string(),
            rows: self.rows.clone(),
            assumptions: self.assumptions.clone(),
            provenance: self.provenance.clone(),
        };
        // One output set: all five files or none (output.rs).
        let mut set = crate::output::OutputSet::begin(dir, "inject")?;
        set.write("realizations.csv", real.as_bytes())?;
        set.write("coverage_plugin.csv", &plug)?;
        set.write_json("campaign.json", &self.state)?;
        set.write("recovery.csv", &csv)?;
        set.write_json("recovery.json", &json)?;
        set.commit().map(|_| ())
    }
}

/// Header of recovery.csv.
pub const RECOVERY_HEADER: &str = "amplitude,amplitude2_injected,realizations,amplitude2_mean,amplitude2_std,amplitude2_sem,bias,bias_sem,snr_mean,snr_std,coverage68_weak,coverage95_weak,coverage68_full,coverage95_full,detection_probability";

/// Header of realizations.csv.
pub const REALIZATIONS_HEADER: &str =
    "amplitude,realization,amplitude2,amplitude2_sigma_weak,amplitude2_sigma_full,snr";

/// Parse realizations.csv (as written by [`Outcome::write`]).
pub fn read_realizations(path: &Path) -> Result<Vec<Record>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let mut lines = text.lines().enumerate();
    match lines.next() {
        Some((_, h)) if h.trim() == REALIZATIONS_HEADER => {}
        _ => {
            return Err(Error::input(
                path,
                Some(1),
                None,
                format!("expected the header {REALIZATIONS_HEADER}"),
            ))
        }
    }
    let mut out = Vec::new();
    for (ln, line) in lines {
        if line.trim().is_empty() || line.trim() == REALIZATIONS_HEADER {
            continue; // concatenated shard files may repeat the header
        }
        let f: Vec<&str> = line.split(',').map(str::trim).collect();
        let num = |k: usize, name: &str| -> Result<f64> {
            f.get(k)
                .and_then(|s| s.parse::<f64>().ok())
                .ok_or_else(|| Error::input(path, Some(ln + 1), Some(name), "not a number"))
        };
        let realization = f
            .get(1)
            .and_then(|s| s.parse::<u64>().ok())
            .ok_or_else(|| Error::input(path, Some(ln + 1), Some("realization"), "not an index"))?;
        out.push(Record {
            amplitude: num(0, "amplitude")?,
            realization,
            amplitude2: num(2, "amplitude2")?,
            sigma_weak: num(3, "amplitude2_sigma_weak")?,
            sigma_full: num(4, "amplitude2_sigma_full")?,
            sigma_plugin: f64::NAN,
            snr: num(5, "snr")?,
        });
    }
    Ok(out)
}
