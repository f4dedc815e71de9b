//! The files of a campaign: recovery.csv, recovery.json, realizations.csv,
//! coverage_plugin.csv and campaign.json.

use super::campaign::Record;
use super::summary::{Outcome, RecoveryRow};
use crate::error::Result;
use serde::{Deserialize, Serialize};
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
        let real = crate::output::csv_table(&self.records, "realizations.csv")?;
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
        set.write("realizations.csv", &real)?;
        set.write("coverage_plugin.csv", &plug)?;
        set.write_json("campaign.json", &self.state)?;
        set.write("recovery.csv", &csv)?;
        set.write_json("recovery.json", &json)?;
        set.commit().map(|_| ())
    }
}

/// Read realizations.csv (as written by [`Outcome::write`]; the files of shards concatenated
/// read too, [`crate::output::read_csv`] skips a repeated header).
pub fn read_realizations(path: &Path) -> Result<Vec<Record>> {
    Ok(crate::output::read_csv::<Record>(path)?
        .into_iter()
        .map(|(_, r)| r)
        .collect())
}
