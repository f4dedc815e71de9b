//! Merging the shard folders of one campaign.

use super::files::{read_realizations, RecoveryFile};
use super::summary::{CampaignState, Outcome};
use crate::error::{Error, Result};
use crate::shard::Shard;
use std::path::PathBuf;

/// Merge shard folders (each with campaign.json, recovery.json and realizations.csv) of one
/// campaign: check they agree, concatenate the realizations (no index twice), summarise.
pub fn merge_shards(dirs: &[PathBuf]) -> Result<Outcome> {
    if dirs.is_empty() {
        return Err(Error::setting("merge", "give at least one shard folder"));
    }
    let mut first: Option<(CampaignState, RecoveryFile)> = None;
    let mut records = Vec::new();
    let mut shard_indices = Vec::new();
    for d in dirs {
        crate::output::check_manifest(d)?;
        let read_json = |name: &str| -> Result<serde_json::Value> {
            let p = d.join(name);
            let text = std::fs::read_to_string(&p).map_err(|e| Error::io(&p, e))?;
            serde_json::from_str(&text)
                .map_err(|e| Error::input(&p, Some(e.line()), None, e.to_string()))
        };
        let state: CampaignState = serde_json::from_value(read_json("campaign.json")?)
            .map_err(|e| Error::input(&d.join("campaign.json"), None, None, e.to_string()))?;
        let rec: RecoveryFile = serde_json::from_value(read_json("recovery.json")?)
            .map_err(|e| Error::input(&d.join("recovery.json"), None, None, e.to_string()))?;
        let mut rs = read_realizations(&d.join("realizations.csv"))?;
        // The plug-in sigma from the shard's variance polynomial at the recovered amplitude.
        for r in &mut rs {
            let k = state
                .amplitudes
                .iter()
                .position(|&a| a == r.amplitude)
                .ok_or_else(|| {
                    Error::input(
                        &d.join("realizations.csv"),
                        None,
                        Some("amplitude"),
                        format!("{} is not an amplitude of the campaign", r.amplitude),
                    )
                })?;
            r.sigma_plugin = state.variance_polynomials[k].amplitude2_sigma(r.amplitude2);
        }
        records.extend(rs);
        shard_indices.push(state.shard.index);
        match &first {
            None => first = Some((state, rec)),
            Some((s0, _)) => {
                let same = s0.mode == state.mode
                    && s0.pattern == state.pattern
                    && s0.seed == state.seed
                    && s0.amplitudes == state.amplitudes
                    && s0.realizations_total == state.realizations_total
                    && s0.input_hash == state.input_hash
                    && s0.detection_threshold_snr == state.detection_threshold_snr
                    && s0.shard.count == state.shard.count;
                if !same {
                    return Err(Error::setting(
                        "merge",
                        format!(
                            "{} is not a shard of the same campaign (mode, pattern, seed, amplitudes, realizations, input, threshold and shard count must agree)",
                            d.display()
                        ),
                    ));
                }
            }
        }
    }
    let (mut state, rec) = first.expect("at least one shard");
    records.sort_by(|a, b| {
        let ka = state.amplitudes.iter().position(|&x| x == a.amplitude);
        let kb = state.amplitudes.iter().position(|&x| x == b.amplitude);
        ka.cmp(&kb).then(a.realization.cmp(&b.realization))
    });
    for w in records.windows(2) {
        if w[0].amplitude == w[1].amplitude && w[0].realization == w[1].realization {
            return Err(Error::setting(
                "merge",
                format!(
                    "realization {} at amplitude {} appears twice (a shard given twice?)",
                    w[0].realization, w[0].amplitude
                ),
            ));
        }
    }
    // A merge is complete only with every realization of every amplitude: a missing shard
    // must not be labelled complete.
    let expected = state.amplitudes.len() as u64 * state.realizations_total;
    if records.len() as u64 != expected {
        let count = state.shard.count;
        let missing: Vec<String> = (1..=count.min(1000))
            .filter(|i| !shard_indices.contains(i))
            .take(10)
            .map(|i| format!("{i}/{count}"))
            .collect();
        return Err(Error::setting(
            "merge",
            format!(
                "the shards hold {} of the campaign's {expected} realizations (missing shards: {}); give every shard 1/{count} .. {count}/{count}",
                records.len(),
                if missing.is_empty() { "?".to_string() } else { missing.join(", ") }
            ),
        ));
    }
    state.shard = Shard::ALL;
    // The merged folder is the whole campaign: its provenance names no shard, as one process's
    // does (so the merge of a job array is byte for byte the single run, docs/cluster.md).
    let mut provenance = rec.provenance;
    if let Some(s) = provenance.pointer_mut("/settings/shard") {
        *s = serde_json::to_value(Shard::ALL).unwrap_or_default();
    }
    Ok(Outcome::new(state, records, rec.assumptions, provenance))
}
