//! Merging the shards of a null run (`ptacorr merge`): the trials of shards 1/N .. N/N of the
//! same command are concatenated in trial order and the report rebuilt exactly as an unsharded
//! run builds it, so the merged files equal the unsharded run's. Shards of different releases,
//! seeds or settings are refused, and missing or duplicated shards are reported.

use super::{
    build_report, read_trials, write_outputs, AnalyticNull, EigenvalueRow, NullReport, Trial,
    EIGENVALUES_FILE,
};
use crate::error::{Error, Result};
use std::path::{Path, PathBuf};

struct Part {
    dir: PathBuf,
    report: NullReport,
    trials: Vec<Trial>,
    eigenvalues: Option<Vec<f64>>,
}

fn read_part(dir: &Path) -> Result<Part> {
    crate::output::check_manifest(dir)?;
    let path = dir.join("null.json");
    let text = std::fs::read_to_string(&path).map_err(|e| Error::io(&path, e))?;
    let report: NullReport = serde_json::from_str(&text)
        .map_err(|e| Error::input(&path, Some(e.line()), None, e.to_string()))?;
    let trials = read_trials(&dir.join("trials.csv"))?;
    let eigenvalues = if report.analytic.is_some() {
        let rows = crate::output::read_csv::<EigenvalueRow>(&dir.join(EIGENVALUES_FILE))?;
        Some(rows.into_iter().map(|(_, r)| r.eigenvalue).collect())
    } else {
        None
    };
    Ok(Part {
        dir: dir.to_path_buf(),
        report,
        trials,
        eigenvalues,
    })
}

/// Settings of a shard's provenance without the shard itself.
fn settings_without_shard(r: &NullReport) -> serde_json::Value {
    let mut s = r.provenance.get("settings").cloned().unwrap_or_default();
    if let Some(o) = s.as_object_mut() {
        o.remove("shard");
    }
    s
}

/// Merge the shard folders `dirs` into `out` (null.json, trials.csv and the eigenvalues).
pub fn merge(dirs: &[PathBuf], out: &Path) -> Result<NullReport> {
    if dirs.is_empty() {
        return Err(Error::setting("merge", "give the shard folders to merge"));
    }
    let mut set = crate::output::OutputSet::begin(out, "merge")?;
    let mut parts: Vec<Part> = dirs.iter().map(|d| read_part(d)).collect::<Result<_>>()?;
    let refuse = |msg: String| Err(Error::setting("merge", msg));
    for p in &parts {
        if let Some(s) = p.report.shard {
            s.check(p.report.total_trials)
                .map_err(|m| Error::input(&p.dir.join("null.json"), None, Some("shard"), m))?;
        }
    }
    for p in &parts {
        if p.report.shard.is_none() {
            return refuse(format!(
                "{} is a complete run, not a shard (made without --shard)",
                p.dir.display()
            ));
        }
    }
    let first = &parts[0];
    let hash = |r: &NullReport| r.provenance.get("input_hash").cloned();
    for p in &parts[1..] {
        let (a, b) = (&first.report, &p.report);
        if hash(a) != hash(b) {
            return refuse(format!(
                "{} and {} come from different releases (input hashes differ)",
                first.dir.display(),
                p.dir.display()
            ));
        }
        if a.seed != b.seed {
            return refuse(format!(
                "{} and {} used different seeds ({} and {})",
                first.dir.display(),
                p.dir.display(),
                a.seed,
                b.seed
            ));
        }
        if settings_without_shard(a) != settings_without_shard(b)
            || a.shard.map(|s| s.count) != b.shard.map(|s| s.count)
        {
            return refuse(format!(
                "{} and {} used different settings (method, trials, pattern, threshold, analysis or shard count)",
                first.dir.display(),
                p.dir.display()
            ));
        }
        let rel = (a.observed_snr - b.observed_snr).abs() / a.observed_snr.abs().max(1e-300);
        if rel > 1e-9 || first.eigenvalues.is_some() != p.eigenvalues.is_some() {
            return refuse(format!(
                "{} and {} disagree about the observed data; rerun the shards with one program version",
                first.dir.display(),
                p.dir.display()
            ));
        }
    }
    let count = first.report.shard.map_or(1, |s| s.count);
    let mut seen: Vec<Vec<&Path>> = vec![Vec::new(); count as usize];
    for p in &parts {
        let i = p.report.shard.map_or(1, |s| s.index);
        seen[(i - 1) as usize].push(&p.dir);
    }
    let dup: Vec<String> = seen
        .iter()
        .enumerate()
        .filter(|(_, d)| d.len() > 1)
        .map(|(i, d)| {
            format!(
                "{}/{count} in {}",
                i + 1,
                d.iter()
                    .map(|p| p.display().to_string())
                    .collect::<Vec<_>>()
                    .join(" and ")
            )
        })
        .collect();
    let missing: Vec<String> = seen
        .iter()
        .enumerate()
        .filter(|(_, d)| d.is_empty())
        .map(|(i, _)| format!("{}/{count}", i + 1))
        .collect();
    let n_missing = missing.len();
    let missing: Vec<String> = missing
        .into_iter()
        .take(10)
        .chain((n_missing > 10).then(|| format!("and {} more", n_missing - 10)))
        .collect();
    if !dup.is_empty() || !missing.is_empty() {
        let mut msg = String::new();
        if !dup.is_empty() {
            msg.push_str(&format!("duplicated shards: {}", dup.join("; ")));
        }
        if !missing.is_empty() {
            if !msg.is_empty() {
                msg.push_str("; ");
            }
            msg.push_str(&format!("missing shards: {}", missing.join(", ")));
        }
        return refuse(msg);
    }
    parts.sort_by_key(|p| p.report.shard.map_or(0, |s| s.index));
    let total = parts[0].report.total_trials;
    let mut trials = Vec::with_capacity(total as usize);
    let mut attempts = 0;
    for p in &parts {
        if p.trials.len() as u64 != p.report.trials {
            return refuse(format!(
                "{}: trials.csv has {} rows but null.json says {}",
                p.dir.display(),
                p.trials.len(),
                p.report.trials
            ));
        }
        attempts += p.report.attempts;
        trials.extend(p.trials.iter().copied());
    }
    if trials.len() as u64 != total || trials.iter().zip(0..).any(|(t, i)| t.index != i) {
        return refuse(format!(
            "the shards' trial indices do not cover 0..{total} exactly once"
        ));
    }
    let r = &parts[0].report;
    let analytic = parts[0]
        .eigenvalues
        .clone()
        .map(|eigenvalues| AnalyticNull { eigenvalues });
    let mut provenance = r.provenance.clone();
    if let Some(s) = provenance
        .get_mut("settings")
        .and_then(|s| s.as_object_mut())
    {
        s.insert("shard".into(), serde_json::Value::Null);
    }
    let report = build_report(
        r.method,
        r.time_domain,
        r.pattern,
        total,
        None,
        r.seed,
        r.observed_snr,
        r.observed_amplitude2,
        r.match_threshold,
        r.mutual_match,
        &trials,
        attempts,
        analytic.as_ref(),
        provenance,
    )?;
    write_outputs(&mut set, &report, &trials, analytic.as_ref())?;
    set.commit()?;
    Ok(report)
}
