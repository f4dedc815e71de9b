//! Files of the noise-marginalised OS: the per-draw table `nmos-draws.csv`, the
//! `noise_marginalised` block of `summary.json`, and the merge of shard folders into the same
//! bytes as one run.

use super::summary::{spreads, NmosSummary};
use super::DrawResult;
use crate::error::{Error, Result};
use crate::optimal::OsEstimate;
use crate::shard::Shard;
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// The per-draw table of a correlate run with noise draws.
pub const DRAWS_FILE: &str = "nmos-draws.csv";

/// The key of the block in `summary.json`; always the last top-level field.
pub const SUMMARY_KEY: &str = "noise_marginalised";

/// One row of `nmos-draws.csv`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DrawRow {
    pub draw: u64,
    pub common_log10_amplitude: Option<f64>,
    pub hd_amplitude2: f64,
    pub hd_amplitude2_sigma: f64,
    pub hd_snr: f64,
    pub monopole_amplitude2: f64,
    pub monopole_amplitude2_sigma: f64,
    pub monopole_snr: f64,
    pub dipole_amplitude2: f64,
    pub dipole_amplitude2_sigma: f64,
    pub dipole_snr: f64,
}

impl From<&DrawResult> for DrawRow {
    fn from(d: &DrawResult) -> Self {
        let [h, m, p] = d.estimates;
        DrawRow {
            draw: d.draw,
            common_log10_amplitude: d.common_log10_amplitude,
            hd_amplitude2: h.amplitude2,
            hd_amplitude2_sigma: h.amplitude2_sigma,
            hd_snr: h.snr,
            monopole_amplitude2: m.amplitude2,
            monopole_amplitude2_sigma: m.amplitude2_sigma,
            monopole_snr: m.snr,
            dipole_amplitude2: p.amplitude2,
            dipole_amplitude2_sigma: p.amplitude2_sigma,
            dipole_snr: p.snr,
        }
    }
}

impl From<&DrawRow> for DrawResult {
    fn from(r: &DrawRow) -> Self {
        let e = |a, s, snr| OsEstimate {
            amplitude2: a,
            amplitude2_sigma: s,
            snr,
        };
        DrawResult {
            draw: r.draw,
            common_log10_amplitude: r.common_log10_amplitude,
            estimates: [
                e(r.hd_amplitude2, r.hd_amplitude2_sigma, r.hd_snr),
                e(
                    r.monopole_amplitude2,
                    r.monopole_amplitude2_sigma,
                    r.monopole_snr,
                ),
                e(r.dipole_amplitude2, r.dipole_amplitude2_sigma, r.dipole_snr),
            ],
        }
    }
}

/// The CSV text of the per-draw table (csv + serde; floats round-trip exactly).
pub fn draws_csv(draws: &[DrawResult]) -> Result<String> {
    let mut w = csv::Writer::from_writer(Vec::new());
    for d in draws {
        if d.estimates.iter().any(|e| {
            !(e.amplitude2.is_finite() && e.amplitude2_sigma.is_finite() && e.snr.is_finite())
        }) {
            return Err(Error::NonFinite {
                what: format!("the optimal statistic of noise draw {}", d.draw),
            });
        }
        w.serialize(DrawRow::from(d))
            .map_err(|e| Error::NonFinite {
                what: format!("{DRAWS_FILE} ({e})"),
            })?;
    }
    let bytes = w.into_inner().map_err(|e| Error::NonFinite {
        what: format!("{DRAWS_FILE} ({e})"),
    })?;
    Ok(String::from_utf8(bytes).expect("csv of numbers is UTF-8"))
}

/// Read a per-draw table.
pub fn read_draws(path: &Path) -> Result<Vec<DrawResult>> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    let mut rdr = csv::Reader::from_reader(bytes.as_slice());
    let mut out = Vec::new();
    for row in rdr.deserialize::<DrawRow>() {
        let row = row.map_err(|e| {
            let line = e.position().map(|p| p.line() as usize);
            Error::input(path, line, None, e.to_string())
        })?;
        out.push(DrawResult::from(&row));
    }
    Ok(out)
}

/// The tail of `summary.json` from the block's key on: `\n  "noise_marginalised": {...}\n}`,
/// exactly as serde_json's pretty printer writes it as the last field of the summary.
pub fn summary_tail(block: &NmosSummary) -> Result<String> {
    #[derive(Serialize)]
    struct Wrap<'a> {
        noise_marginalised: &'a NmosSummary,
    }
    let text = serde_json::to_string_pretty(&Wrap {
        noise_marginalised: block,
    })
    .map_err(|e| Error::NonFinite {
        what: format!("summary.json ({e})"),
    })?;
    Ok(text[1..].to_string())
}

/// Split `summary.json` text at the block: (everything before its key, the block).
pub fn split_summary(text: &str, path: &Path) -> Result<(String, NmosSummary)> {
    let key = format!("\n  \"{SUMMARY_KEY}\": ");
    let Some(at) = text.find(&key) else {
        return Err(Error::input(
            path,
            None,
            Some(SUMMARY_KEY),
            "the summary has no noise-marginalised block (was the run made with noise draws?)",
        ));
    };
    #[derive(Deserialize)]
    struct Only {
        noise_marginalised: NmosSummary,
    }
    let only: Only = serde_json::from_str(text)
        .map_err(|e| Error::input(path, Some(e.line()), Some(SUMMARY_KEY), e.to_string()))?;
    Ok((text[..at].to_string(), only.noise_marginalised))
}

/// Merge the shard folders of one correlate run with noise draws into `out`: the folders must
/// hold the same analysis (summary.json equal but for the block, pairs.csv and bins.csv equal)
/// and the same draw settings, and together every shard 1..=N exactly once; the merged folder
/// has the same bytes as the run made without shards.
pub fn merge_shards(dirs: &[PathBuf], out: &Path) -> Result<NmosSummary> {
    if dirs.is_empty() {
        return Err(Error::setting("merge", "give at least one shard folder"));
    }
    let mut head: Option<(String, NmosSummary, Vec<u8>, Vec<u8>)> = None;
    let mut draws: Vec<DrawResult> = Vec::new();
    let mut shards: Vec<u64> = Vec::new();
    for d in dirs {
        let manifest = crate::output::check_manifest(d)?;
        if manifest.command != "correlate" || !manifest.has(DRAWS_FILE) {
            return Err(Error::setting(
                "merge",
                format!(
                    "{} is not a shard of a correlate run with noise draws (no {DRAWS_FILE})",
                    d.display()
                ),
            ));
        }
        let read = |name: &str| -> Result<Vec<u8>> {
            let p = d.join(name);
            std::fs::read(&p).map_err(|e| Error::io(&p, e))
        };
        let summary_path = d.join("summary.json");
        let text = String::from_utf8(read("summary.json")?)
            .map_err(|_| Error::input(&summary_path, None, None, "is not UTF-8 text"))?;
        let (prefix, block) = split_summary(&text, &summary_path)?;
        let (pairs, bins) = (read("pairs.csv")?, read("bins.csv")?);
        let mut rows = read_draws(&d.join(DRAWS_FILE))?;
        let range = block.shard.range(block.draws_total);
        if rows.len() as u64 != range.end - range.start
            || rows.iter().zip(range).any(|(r, i)| r.draw != i)
        {
            return Err(Error::input(
                &d.join(DRAWS_FILE),
                None,
                Some("draw"),
                format!(
                    "does not hold exactly the draws of shard {}/{}",
                    block.shard.index, block.shard.count
                ),
            ));
        }
        draws.append(&mut rows);
        shards.push(block.shard.index);
        match &head {
            None => head = Some((prefix, block, pairs, bins)),
            Some((p0, b0, pairs0, bins0)) => {
                let same_run = b0.draws_total == block.draws_total
                    && b0.seed == block.seed
                    && b0.shard.count == block.shard.count
                    && b0.chains == block.chains
                    && b0.common_draws == block.common_draws
                    && b0.tables_sha256 == block.tables_sha256
                    && b0.pulsars_drawn == block.pulsars_drawn;
                if !(same_run && *p0 == prefix && *pairs0 == pairs && *bins0 == bins) {
                    return Err(Error::setting(
                        "merge",
                        format!(
                            "{} is not a shard of the same run (the analysis, the chain tables, seed, draws and shard count must agree)",
                            d.display()
                        ),
                    ));
                }
            }
        }
    }
    let (prefix, mut block, pairs, bins) = head.expect("at least one shard");
    shards.sort_unstable();
    let expected: Vec<u64> = (1..=block.shard.count).collect();
    if shards != expected {
        return Err(Error::setting(
            "merge",
            format!(
                "need shards 1..={} exactly once each, got {:?}",
                block.shard.count, shards
            ),
        ));
    }
    draws.sort_by_key(|d| d.draw);
    block.shard = Shard::ALL;
    block.draws = draws.len() as u64;
    block.patterns = spreads(&draws);
    let summary = format!("{prefix}{}\n", summary_tail(&block)?);
    let mut set = crate::output::OutputSet::begin(out, "correlate")?;
    set.write("summary.json", summary.as_bytes())?;
    set.write("pairs.csv", &pairs)?;
    set.write("bins.csv", &bins)?;
    set.write(DRAWS_FILE, draws_csv(&draws)?.as_bytes())?;
    set.commit()?;
    Ok(block)
}
