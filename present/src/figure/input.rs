//! Readers for ptacorr's output folders. Every file is read with the engine type it is
//! written with (`ptacorr::output::read_json` / `read_csv`: one schema per file, defined once
//! in the engine); the ranges a figure relies on (angles, probabilities, non-negative sigmas,
//! finite values) are then checked, and a bad value is reported with the file and the field
//! (JSON) or the line and column (CSV).

use std::path::{Path, PathBuf};

use super::FigureError;

pub const SUMMARY_JSON: &str = "summary.json";
pub const BINS_CSV: &str = "bins.csv";
pub const PAIRS_CSV: &str = "pairs.csv";
/// Optional files of a correlate folder (absent in folders written before they existed).
pub const HD_SPREAD_CSV: &str = "hd-spread.csv";
pub const BINS_COVARIANCE_CSV: &str = "bins-covariance.csv";
pub const PER_FREQUENCY_CSV: &str = "per-frequency.csv";
pub const NULL_JSON: &str = "null.json";
pub const TRIALS_CSV: &str = "trials.csv";
pub const RECOVERY_JSON: &str = "recovery.json";
pub const RECOVERY_CSV: &str = "recovery.csv";

/// The kind of a ptacorr output folder, in the order the report presents them.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum FolderKind {
    /// `ptacorr correlate`: summary.json, bins.csv, pairs.csv.
    Correlate,
    /// `ptacorr null`: null.json, trials.csv.
    Null,
    /// `ptacorr inject`: recovery.json, recovery.csv.
    Inject,
    /// `ptacorr noise`: estimates.csv, diagnostics.csv, provenance.json (figure/noise.rs).
    Noise,
    /// `ptacorr common`: posterior-fixed-index.csv, summary.json, posterior-grid.csv,
    /// marginals.csv (figure/common.rs). Its summary.json is not a correlate folder's.
    Common,
}

impl FolderKind {
    pub fn name(self) -> &'static str {
        match self {
            FolderKind::Correlate => "correlate",
            FolderKind::Null => "null",
            FolderKind::Inject => "inject",
            FolderKind::Noise => "noise",
            FolderKind::Common => "common",
        }
    }

    fn files(self) -> &'static [&'static str] {
        match self {
            FolderKind::Correlate => &[SUMMARY_JSON, BINS_CSV, PAIRS_CSV],
            FolderKind::Null => &[NULL_JSON, TRIALS_CSV],
            FolderKind::Inject => &[RECOVERY_JSON, RECOVERY_CSV],
            FolderKind::Noise => &[
                ptacorr::noise_fit::ESTIMATES_FILE,
                ptacorr::noise_fit::DIAGNOSTICS_FILE,
                ptacorr::noise_fit::PROVENANCE_FILE,
            ],
            FolderKind::Common => &[
                ptacorr::common::FIXED_INDEX_FILE,
                ptacorr::common::COMMON_SUMMARY_FILE,
                ptacorr::common::GRID_FILE,
                ptacorr::common::MARGINALS_FILE,
            ],
        }
    }
}

/// The kinds of output found in `dir`. A folder is of a kind when it holds that kind's JSON
/// file; the kind's other files must then be there too.
/// The folder's manifest is then checked (`output::check_manifest`), so a folder whose files
/// come from different runs, or were edited since, is refused before anything is read.
pub fn detect_kinds(dir: &Path) -> Result<Vec<FolderKind>, FigureError> {
    if !dir.is_dir() {
        return Err(FigureError::UnknownFolder {
            dir: dir.to_path_buf(),
            reason: "it is not a readable directory".to_string(),
        });
    }
    let mut kinds = Vec::new();
    // A common folder's summary.json is its own, not a correlate folder's.
    let common = dir.join(FolderKind::Common.files()[0]).is_file();
    for kind in [
        FolderKind::Correlate,
        FolderKind::Null,
        FolderKind::Inject,
        FolderKind::Noise,
        FolderKind::Common,
    ] {
        if common && kind == FolderKind::Correlate {
            continue;
        }
        let files = kind.files();
        if dir.join(files[0]).is_file() {
            for f in &files[1..] {
                if !dir.join(f).is_file() {
                    return Err(FigureError::MissingFile {
                        dir: dir.to_path_buf(),
                        file: f,
                        kind: kind.name(),
                    });
                }
            }
            kinds.push(kind);
        }
    }
    if kinds.is_empty() {
        return Err(FigureError::UnknownFolder {
            dir: dir.to_path_buf(),
            reason: format!(
                "none of {SUMMARY_JSON}, {NULL_JSON}, {RECOVERY_JSON}, {} or {} is there",
                ptacorr::noise_fit::ESTIMATES_FILE,
                ptacorr::common::FIXED_INDEX_FILE
            ),
        });
    }
    ptacorr::output::check_manifest(dir)?;
    Ok(kinds)
}

/// A JSON file read with the engine type it is written with.
fn read_json<T: serde::de::DeserializeOwned>(path: &Path) -> Result<T, FigureError> {
    Ok(ptacorr::output::read_json(path)?)
}

/// A CSV table read with the engine row type it is written with: (line, row) pairs.
fn read_csv<T: serde::de::DeserializeOwned>(
    path: &Path,
    nonempty: bool,
) -> Result<Vec<(u64, T)>, FigureError> {
    let rows = ptacorr::output::read_csv::<T>(path)?;
    if nonempty && rows.is_empty() {
        return Err(FigureError::InvalidCell {
            path: path.to_path_buf(),
            line: 2,
            column: "*".to_string(),
            reason: "the file has a header but no rows".to_string(),
        });
    }
    Ok(rows.into_iter().map(|(l, r)| (l as u64, r)).collect())
}

/// Range checks of values read from one file: each failure names the file, line and column
/// (CSV) or the field (JSON, line 0).
struct Check<'a> {
    path: &'a Path,
    line: u64,
}

impl Check<'_> {
    fn fail(&self, column: &str, reason: String) -> FigureError {
        if self.line == 0 {
            FigureError::InvalidField {
                path: self.path.to_path_buf(),
                field: column.to_string(),
                reason,
            }
        } else {
            FigureError::InvalidCell {
                path: self.path.to_path_buf(),
                line: self.line,
                column: column.to_string(),
                reason,
            }
        }
    }

    fn finite(&self, column: &str, x: f64) -> Result<f64, FigureError> {
        if x.is_finite() {
            Ok(x)
        } else {
            Err(self.fail(column, format!("`{x}` is not a finite number")))
        }
    }

    fn nonneg(&self, column: &str, x: f64) -> Result<f64, FigureError> {
        if self.finite(column, x)? < 0.0 {
            return Err(self.fail(column, format!("{x} is negative")));
        }
        Ok(x)
    }

    fn angle(&self, column: &str, x: f64) -> Result<f64, FigureError> {
        if !(0.0..=180.0).contains(&self.finite(column, x)?) {
            return Err(self.fail(column, format!("angle {x} deg is outside 0-180")));
        }
        Ok(x)
    }

    fn probability(&self, column: &str, x: f64) -> Result<f64, FigureError> {
        if !(0.0..=1.0).contains(&x) {
            return Err(self.fail(column, format!("{x} is not a probability in [0, 1]")));
        }
        Ok(x)
    }
}

/// `summary.json` of a correlate folder: the engine's own type.
pub use ptacorr::analysis::{BinFitSummary, PairRow as Pair, Provenance, Summary};
/// One row of bins.csv: the engine's own type.
pub use ptacorr::bins::Bin;
/// One row of hd-spread.csv.
pub use ptacorr::hd_spread::HdSpreadRow as SpreadRow;
/// One row of recovery.csv: the same type the injection campaign writes.
pub use ptacorr::inject::{RecoveryFile, RecoveryRow};
/// null.json and one row of trials.csv.
pub use ptacorr::null::{NullReport, Trial};
use ptacorr::optimal::OsEstimate;
/// One row of per-frequency.csv.
pub use ptacorr::per_frequency::PerFrequencyRow;

/// The rank of a pattern in display order: hd, monopole, dipole, then any other by name.
fn pattern_rank(name: &str) -> (usize, &str) {
    let r = match name {
        "hd" => 0,
        "monopole" => 1,
        "dipole" => 2,
        _ => 3,
    };
    (r, name)
}

/// The single-pattern fits of a summary in display order.
pub fn patterns_in_order(s: &Summary) -> Vec<(&str, &OsEstimate)> {
    let mut v: Vec<(&str, &OsEstimate)> = s.patterns.iter().map(|(n, e)| (n.as_str(), e)).collect();
    v.sort_by_key(|(n, _)| pattern_rank(n));
    v
}

/// The bin fit of a summary, when there is one.
pub fn bin_fit(s: &Summary) -> Option<&ptacorr::bin_covariance::BinFit> {
    match &s.bin_fit {
        BinFitSummary::Fit(f) => Some(f),
        BinFitSummary::Skipped { .. } => None,
    }
}

fn load_summary(path: &Path) -> Result<Summary, FigureError> {
    let s: Summary = read_json(path)?;
    let check = Check { path, line: 0 };
    for (name, e) in &s.patterns {
        check.nonneg(
            &format!("patterns.{name}.amplitude2_sigma"),
            e.amplitude2_sigma,
        )?;
    }
    if !s.patterns.contains_key("hd") {
        return Err(FigureError::MissingField {
            path: path.to_path_buf(),
            field: "patterns.hd".to_string(),
        });
    }
    if let Some(m) = &s.multiple_component {
        let k = m.patterns.len();
        if m.amplitude2.len() != k
            || m.covariance.len() != k
            || m.covariance.iter().any(|r| r.len() != k)
        {
            return Err(check.fail(
                "multiple_component",
                format!("expected {k} amplitudes and a {k} x {k} covariance"),
            ));
        }
    }
    Ok(s)
}

/// Everything in a correlate folder.
#[derive(Clone, Debug, PartialEq)]
pub struct CorrelateData {
    pub dir: PathBuf,
    pub summary: Summary,
    pub bins: Vec<Bin>,
    pub pairs: Vec<Pair>,
    /// hd-spread.csv (empty when the folder has none).
    pub spread: Vec<SpreadRow>,
    /// The full-covariance error bar of each bin, from bins-covariance.csv, when present.
    pub bin_sigma_full: Option<Vec<f64>>,
    /// per-frequency.csv (empty when the folder has none).
    pub per_frequency: Vec<PerFrequencyRow>,
    /// The noise-marginalised OS (summary.json `noise_marginalised` and nmos-draws.csv), when
    /// the run had noise draws.
    pub nmos: Option<NmosRead>,
}

/// The noise-marginalised OS of a correlate folder, read through the engine's own types.
#[derive(Clone, Debug, PartialEq)]
pub struct NmosRead {
    pub summary: ptacorr::nmos::NmosSummary,
    pub draws: Vec<ptacorr::nmos::DrawResult>,
}

fn load_nmos(dir: &Path, summary: &Summary) -> Result<Option<NmosRead>, FigureError> {
    let Some(block) = &summary.noise_marginalised else {
        return Ok(None);
    };
    let draws_path = dir.join(ptacorr::nmos::DRAWS_FILE);
    if !draws_path.is_file() {
        return Err(FigureError::MissingFile {
            dir: dir.to_path_buf(),
            file: ptacorr::nmos::DRAWS_FILE,
            kind: "correlate with noise draws",
        });
    }
    let draws = ptacorr::nmos::files::read_draws(&draws_path)?;
    Ok(Some(NmosRead {
        summary: block.clone(),
        draws,
    }))
}

fn load_spread(dir: &Path) -> Result<Vec<SpreadRow>, FigureError> {
    let path = dir.join(HD_SPREAD_CSV);
    if !path.is_file() {
        return Ok(Vec::new());
    }
    read_csv::<SpreadRow>(&path, false)?
        .into_iter()
        .map(|(line, r)| {
            let c = Check { path: &path, line };
            c.angle("angle_deg", r.angle_deg)?;
            c.finite("hd", r.hd)?;
            c.nonneg("cosmic_sigma", r.cosmic_sigma)?;
            c.nonneg("total_sigma", r.total_sigma)?;
            Ok(r)
        })
        .collect()
}

fn load_bin_sigma(dir: &Path, n_bins: usize) -> Result<Option<Vec<f64>>, FigureError> {
    let path = dir.join(BINS_COVARIANCE_CSV);
    if !path.is_file() {
        return Ok(None);
    }
    let mut sig = vec![None; n_bins];
    for (line, r) in read_csv::<ptacorr::bin_covariance::BinCovarianceRow>(&path, false)? {
        let c = Check { path: &path, line };
        let (a, b) = (r.bin_a, r.bin_b);
        if a == 0 || a > n_bins || b == 0 || b > n_bins {
            return Err(c.fail("bin_a", format!("bins run from 1 to {n_bins} (bins.csv)")));
        }
        if a == b {
            sig[a - 1] = Some(c.nonneg("covariance", r.covariance)?.sqrt());
        }
    }
    sig.into_iter()
        .enumerate()
        .map(|(i, s)| {
            s.ok_or_else(|| {
                Check {
                    path: &path,
                    line: 0,
                }
                .fail(
                    "bin_a",
                    format!("no variance for bin {} (row bin_a = bin_b missing)", i + 1),
                )
            })
        })
        .collect::<Result<Vec<f64>, _>>()
        .map(Some)
}

fn load_per_frequency(dir: &Path) -> Result<Vec<PerFrequencyRow>, FigureError> {
    let path = dir.join(PER_FREQUENCY_CSV);
    if !path.is_file() {
        return Ok(Vec::new());
    }
    read_csv::<PerFrequencyRow>(&path, false)?
        .into_iter()
        .map(|(line, r)| {
            let c = Check { path: &path, line };
            c.nonneg("frequency_hz", r.frequency_hz)?;
            c.finite("amplitude2", r.amplitude2)?;
            c.nonneg("amplitude2_sigma", r.amplitude2_sigma)?;
            if let Some(x) = r.amplitude2_sigma_signal {
                c.nonneg("amplitude2_sigma_signal", x)?;
            }
            c.finite("power_s2", r.power_s2)?;
            c.finite("expected_s2", r.expected_s2)?;
            Ok(r)
        })
        .collect()
}

impl CorrelateData {
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let summary = load_summary(&dir.join(SUMMARY_JSON))?;
        let path = dir.join(BINS_CSV);
        let mut bins = Vec::new();
        for (line, b) in read_csv::<Bin>(&path, true)? {
            let c = Check { path: &path, line };
            c.angle("angle_lo_deg", b.angle_lo_deg)?;
            c.angle("angle_hi_deg", b.angle_hi_deg)?;
            c.angle("angle_mean_deg", b.angle_mean_deg)?;
            c.finite("rho", b.rho)?;
            c.nonneg("sigma", b.sigma)?;
            c.finite("hd", b.hd)?;
            if b.angle_hi_deg < b.angle_lo_deg {
                return Err(c.fail("angle_hi_deg", "is below angle_lo_deg".to_string()));
            }
            bins.push(b);
        }
        let path = dir.join(PAIRS_CSV);
        let mut pairs = Vec::new();
        for (line, p) in read_csv::<Pair>(&path, false)? {
            let c = Check { path: &path, line };
            c.angle("angle_deg", p.angle_deg)?;
            c.finite("rho", p.rho)?;
            c.nonneg("sigma", p.sigma)?;
            c.finite("hd", p.hd)?;
            pairs.push(p);
        }
        let bin_sigma_full = load_bin_sigma(dir, bins.len())?;
        let nmos = load_nmos(dir, &summary)?;
        Ok(Self {
            dir: dir.to_path_buf(),
            summary,
            bins,
            pairs,
            spread: load_spread(dir)?,
            bin_sigma_full,
            per_frequency: load_per_frequency(dir)?,
            nmos,
        })
    }
}

/// Everything in a null folder.
#[derive(Clone, Debug, PartialEq)]
pub struct NullData {
    pub dir: PathBuf,
    pub summary: NullReport,
    /// `provenance` of null.json, read as the engine's [`Provenance`].
    pub provenance: Provenance,
    pub trials: Vec<Trial>,
}

impl NullData {
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let path = dir.join(NULL_JSON);
        let summary: NullReport = read_json(&path)?;
        let c = Check {
            path: &path,
            line: 0,
        };
        c.probability("p_value", summary.p_value)?;
        for x in summary.p_value_ci95 {
            c.probability("p_value_ci95", x)?;
        }
        if summary.p_value_ci95[0] > summary.p_value_ci95[1] {
            return Err(c.fail(
                "p_value_ci95",
                "expected [low, high] with low <= high".to_string(),
            ));
        }
        if let Some(a) = &summary.analytic {
            c.probability("analytic.p_value", a.p_value)?;
        }
        if let Some(d) = &summary.analytic_density {
            if d.snr.len() != d.density.len() || d.snr.len() < 2 {
                return Err(c.fail(
                    "analytic_density",
                    format!(
                        "snr has {} values and density {}; need two or more of each, equal in number",
                        d.snr.len(),
                        d.density.len()
                    ),
                ));
            }
            if d.density.iter().any(|x| *x < 0.0) {
                return Err(c.fail(
                    "analytic_density.density",
                    "a density is negative".to_string(),
                ));
            }
        }
        let provenance: Provenance = serde_json::from_value(summary.provenance.clone())
            .map_err(|e| c.fail("provenance", e.to_string()))?;
        let tpath = dir.join(TRIALS_CSV);
        let text = std::fs::read_to_string(&tpath).map_err(|source| FigureError::Read {
            path: tpath.clone(),
            source,
        })?;
        let trials = ptacorr::null::parse_trials(&text, &tpath)?;
        if trials.is_empty() {
            return Err(Check {
                path: &tpath,
                line: 2,
            }
            .fail("*", "the file has a header but no rows".to_string()));
        }
        Ok(Self {
            dir: dir.to_path_buf(),
            summary,
            provenance,
            trials,
        })
    }

    /// The analytic p-value and its Gaussian-equivalent sigma, and whether the p-value is only
    /// an upper bound (below the inversion's absolute accuracy: then the accuracy, no sigma).
    pub fn analytic(&self) -> Option<(f64, Option<f64>, bool)> {
        self.summary.analytic.as_ref().map(|a| {
            if a.p_value < a.absolute_accuracy {
                (a.absolute_accuracy, None, true)
            } else {
                (a.p_value, a.gaussian_sigma, false)
            }
        })
    }
}

/// Everything in an inject folder.
#[derive(Clone, Debug, PartialEq)]
pub struct InjectData {
    pub dir: PathBuf,
    /// recovery.json.
    pub recovery: RecoveryFile,
    /// `provenance` of recovery.json, read as the engine's [`Provenance`].
    pub provenance: Provenance,
    /// Rows of recovery.csv in file order.
    pub rows: Vec<RecoveryRow>,
}

impl InjectData {
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let path = dir.join(RECOVERY_JSON);
        let recovery: RecoveryFile = read_json(&path)?;
        let c = Check {
            path: &path,
            line: 0,
        };
        let fap = recovery.false_alarm_probability;
        if !(fap > 0.0 && fap < 1.0) {
            return Err(c.fail("false_alarm_probability", format!("{fap} is not in (0, 1)")));
        }
        let provenance: Provenance = serde_json::from_value(recovery.provenance.clone())
            .map_err(|e| c.fail("provenance", e.to_string()))?;
        let cpath = dir.join(RECOVERY_CSV);
        let mut rows = Vec::new();
        for (line, r) in read_csv::<RecoveryRow>(&cpath, true)? {
            let c = Check { path: &cpath, line };
            c.nonneg("amplitude", r.amplitude)?;
            c.nonneg("amplitude2_injected", r.amplitude2_injected)?;
            c.finite("amplitude2_mean", r.amplitude2_mean)?;
            c.nonneg("amplitude2_std", r.amplitude2_std)?;
            c.probability(
                "detection_probability",
                c.finite("detection_probability", r.detection_probability)?,
            )?;
            rows.push(r);
        }
        Ok(Self {
            dir: dir.to_path_buf(),
            recovery,
            provenance,
            rows,
        })
    }
}
