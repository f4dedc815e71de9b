//! Readers for ptacorr's output folders. Every value is checked on the way in and a bad one
//! is reported with the file, the field (JSON path or CSV line and column) and the reason.

use std::path::{Path, PathBuf};

use serde_json::Value;

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
}

impl FolderKind {
    pub fn name(self) -> &'static str {
        match self {
            FolderKind::Correlate => "correlate",
            FolderKind::Null => "null",
            FolderKind::Inject => "inject",
            FolderKind::Noise => "noise",
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
    for kind in [
        FolderKind::Correlate,
        FolderKind::Null,
        FolderKind::Inject,
        FolderKind::Noise,
    ] {
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
                "none of {SUMMARY_JSON}, {NULL_JSON}, {RECOVERY_JSON} or {} is there",
                ptacorr::noise_fit::ESTIMATES_FILE
            ),
        });
    }
    ptacorr::output::check_manifest(dir)?;
    Ok(kinds)
}

fn read_text(path: &Path) -> Result<String, FigureError> {
    std::fs::read_to_string(path).map_err(|source| FigureError::Read {
        path: path.to_path_buf(),
        source,
    })
}

/// A parsed JSON file with field access by dotted path, e.g. `patterns.hd.snr`.
pub(crate) struct Doc {
    pub path: PathBuf,
    root: Value,
}

impl Doc {
    pub(crate) fn load(path: &Path) -> Result<Self, FigureError> {
        let text = read_text(path)?;
        let root = serde_json::from_str(&text).map_err(|source| FigureError::Json {
            path: path.to_path_buf(),
            source,
        })?;
        Ok(Self {
            path: path.to_path_buf(),
            root,
        })
    }

    pub(crate) fn invalid(&self, field: &str, reason: impl Into<String>) -> FigureError {
        FigureError::InvalidField {
            path: self.path.clone(),
            field: field.to_string(),
            reason: reason.into(),
        }
    }

    /// The value at `field`, or None when it is absent or JSON null.
    pub(crate) fn opt(&self, field: &str) -> Option<&Value> {
        let mut v = &self.root;
        for key in field.split('.') {
            v = v.as_object()?.get(key)?;
        }
        (!v.is_null()).then_some(v)
    }

    pub(crate) fn get(&self, field: &str) -> Result<&Value, FigureError> {
        self.opt(field).ok_or_else(|| FigureError::MissingField {
            path: self.path.clone(),
            field: field.to_string(),
        })
    }

    fn num(&self, field: &str, v: &Value) -> Result<f64, FigureError> {
        let x = v
            .as_f64()
            .ok_or_else(|| self.invalid(field, format!("expected a number, found {v}")))?;
        if x.is_finite() {
            Ok(x)
        } else {
            Err(self.invalid(field, "the number is not finite"))
        }
    }

    pub(crate) fn f64(&self, field: &str) -> Result<f64, FigureError> {
        self.num(field, self.get(field)?)
    }

    pub(crate) fn opt_f64(&self, field: &str) -> Result<Option<f64>, FigureError> {
        self.opt(field).map(|v| self.num(field, v)).transpose()
    }

    pub(crate) fn u64(&self, field: &str) -> Result<u64, FigureError> {
        let v = self.get(field)?;
        if let Some(u) = v.as_u64() {
            return Ok(u);
        }
        match v.as_f64() {
            Some(x) if x >= 0.0 && x.fract() == 0.0 && x < 9.0e15 => Ok(x as u64),
            _ => Err(self.invalid(
                field,
                format!("expected a non-negative whole number, found {v}"),
            )),
        }
    }

    pub(crate) fn string(&self, field: &str) -> Result<String, FigureError> {
        let v = self.get(field)?;
        v.as_str()
            .map(str::to_string)
            .ok_or_else(|| self.invalid(field, format!("expected a string, found {v}")))
    }

    pub(crate) fn opt_string(&self, field: &str) -> Result<Option<String>, FigureError> {
        match self.opt(field) {
            None => Ok(None),
            Some(v) => v
                .as_str()
                .map(|s| Some(s.to_string()))
                .ok_or_else(|| self.invalid(field, format!("expected a string, found {v}"))),
        }
    }

    pub(crate) fn f64_vec(&self, field: &str) -> Result<Vec<f64>, FigureError> {
        let v = self.get(field)?;
        let arr = v
            .as_array()
            .ok_or_else(|| self.invalid(field, "expected an array of numbers"))?;
        arr.iter()
            .enumerate()
            .map(|(i, x)| self.num(&format!("{field}[{i}]"), x))
            .collect()
    }
}

/// Where a program's output came from, as recorded in every JSON file it writes.
#[derive(Clone, Debug, PartialEq)]
pub struct Provenance {
    pub program: String,
    pub version: String,
    /// Content hash of the inputs, e.g. `sha256:...`; None when the file does not record one.
    pub input_hash: Option<String>,
    /// The settings object as written (an empty object when absent).
    pub settings: Value,
}

fn provenance(doc: &Doc) -> Result<Provenance, FigureError> {
    Ok(Provenance {
        program: doc.string("provenance.program")?,
        version: doc.string("provenance.version")?,
        input_hash: doc.opt_string("provenance.input_hash")?,
        settings: doc
            .opt("provenance.settings")
            .cloned()
            .unwrap_or_else(|| Value::Object(Default::default())),
    })
}

/// One pattern's single-component fit.
#[derive(Clone, Debug, PartialEq)]
pub struct PatternFit {
    pub name: String,
    pub amplitude2: f64,
    pub amplitude2_sigma: f64,
    pub snr: f64,
}

/// The joint fit of several patterns.
#[derive(Clone, Debug, PartialEq)]
pub struct MultiFit {
    pub patterns: Vec<String>,
    pub amplitude2: Vec<f64>,
    pub covariance: Vec<Vec<f64>>,
}

/// `summary.json` of a correlate folder.
#[derive(Clone, Debug, PartialEq)]
pub struct Summary {
    pub title: String,
    pub n_pulsars: u64,
    pub n_pairs: u64,
    pub n_frequencies: u64,
    pub spectral_index: f64,
    pub span_years: f64,
    pub frequencies_hz: Vec<f64>,
    /// Fits in display order: hd, monopole, dipole, then any other pattern by name.
    pub patterns: Vec<PatternFit>,
    pub multiple_component: Option<MultiFit>,
    /// The fit of the HD curve to the bins with their full covariance (`bin_fit`), if any.
    pub bin_fit: Option<BinFitRead>,
    pub provenance: Provenance,
}

/// `bin_fit` of a correlate summary.
#[derive(Clone, Debug, PartialEq)]
pub struct BinFitRead {
    pub amplitude2: f64,
    pub amplitude2_sigma: f64,
    pub chi2: f64,
    pub degrees_of_freedom: u64,
    pub p_value: Option<f64>,
}

impl Summary {
    pub fn pattern(&self, name: &str) -> Option<&PatternFit> {
        self.patterns.iter().find(|p| p.name == name)
    }
}

fn pattern_rank(name: &str) -> (usize, String) {
    let r = match name {
        "hd" => 0,
        "monopole" => 1,
        "dipole" => 2,
        _ => 3,
    };
    (r, name.to_string())
}

fn load_summary(path: &Path) -> Result<Summary, FigureError> {
    let doc = Doc::load(path)?;
    let pats = doc
        .get("patterns")?
        .as_object()
        .ok_or_else(|| doc.invalid("patterns", "expected an object keyed by pattern name"))?;
    let mut names: Vec<&String> = pats.keys().collect();
    names.sort_by_key(|n| pattern_rank(n));
    let mut patterns = Vec::new();
    for name in names {
        let base = format!("patterns.{name}");
        let sigma = doc.f64(&format!("{base}.amplitude2_sigma"))?;
        if sigma < 0.0 {
            return Err(doc.invalid(&format!("{base}.amplitude2_sigma"), "sigma is negative"));
        }
        patterns.push(PatternFit {
            name: name.clone(),
            amplitude2: doc.f64(&format!("{base}.amplitude2"))?,
            amplitude2_sigma: sigma,
            snr: doc.f64(&format!("{base}.snr"))?,
        });
    }
    if !patterns.iter().any(|p| p.name == "hd") {
        return Err(FigureError::MissingField {
            path: path.to_path_buf(),
            field: "patterns.hd".to_string(),
        });
    }
    let multiple_component = match doc.opt("multiple_component") {
        None => None,
        Some(_) => {
            let list = doc.get("multiple_component.patterns")?;
            let names: Vec<String> = list
                .as_array()
                .and_then(|a| a.iter().map(|v| v.as_str().map(str::to_string)).collect())
                .ok_or_else(|| {
                    doc.invalid("multiple_component.patterns", "expected an array of names")
                })?;
            let amplitude2 = doc.f64_vec("multiple_component.amplitude2")?;
            let k = names.len();
            if amplitude2.len() != k {
                return Err(doc.invalid(
                    "multiple_component.amplitude2",
                    format!("has {} values for {k} patterns", amplitude2.len()),
                ));
            }
            let cov_v = doc.get("multiple_component.covariance")?;
            let rows = cov_v
                .as_array()
                .ok_or_else(|| doc.invalid("multiple_component.covariance", "expected a matrix"))?;
            let mut covariance = Vec::with_capacity(k);
            for (i, row) in rows.iter().enumerate() {
                let field = format!("multiple_component.covariance[{i}]");
                let r: Option<Vec<f64>> = row
                    .as_array()
                    .and_then(|a| a.iter().map(Value::as_f64).collect());
                match r {
                    Some(r) if r.len() == k && r.iter().all(|x| x.is_finite()) => {
                        covariance.push(r)
                    }
                    _ => return Err(doc.invalid(&field, format!("expected {k} finite numbers"))),
                }
            }
            if covariance.len() != k {
                return Err(doc.invalid(
                    "multiple_component.covariance",
                    format!("has {} rows for {k} patterns", covariance.len()),
                ));
            }
            Some(MultiFit {
                patterns: names,
                amplitude2,
                covariance,
            })
        }
    };
    let provenance = provenance(&doc)?;
    if provenance.input_hash.is_none() {
        return Err(FigureError::MissingField {
            path: path.to_path_buf(),
            field: "provenance.input_hash".to_string(),
        });
    }
    Ok(Summary {
        title: doc.string("title")?,
        n_pulsars: doc.u64("n_pulsars")?,
        n_pairs: doc.u64("n_pairs")?,
        n_frequencies: doc.u64("n_frequencies")?,
        spectral_index: doc.f64("spectral_index")?,
        span_years: doc.f64("span_years")?,
        frequencies_hz: doc.f64_vec("frequencies_hz")?,
        patterns,
        multiple_component,
        bin_fit: match doc.opt("bin_fit.chi2") {
            None => None,
            Some(_) => Some(BinFitRead {
                amplitude2: doc.f64("bin_fit.amplitude2")?,
                amplitude2_sigma: doc.f64("bin_fit.amplitude2_sigma")?,
                chi2: doc.f64("bin_fit.chi2")?,
                degrees_of_freedom: doc.u64("bin_fit.degrees_of_freedom")?,
                p_value: doc.opt_f64("bin_fit.p_value")?,
            }),
        },
        provenance,
    })
}

/// A CSV file read whole, with the positions of the columns asked for.
struct Table {
    path: PathBuf,
    rows: Vec<csv::StringRecord>,
    cols: Vec<(String, usize)>,
}

impl Table {
    fn read(path: &Path, required: &[&str]) -> Result<Self, FigureError> {
        let text = read_text(path)?;
        let csv_err = |source| FigureError::Csv {
            path: path.to_path_buf(),
            source,
        };
        let mut rdr = csv::ReaderBuilder::new()
            .trim(csv::Trim::All)
            .from_reader(text.as_bytes());
        let headers = rdr.headers().map_err(csv_err)?.clone();
        let mut cols = Vec::new();
        for name in required {
            let idx = headers.iter().position(|h| h == *name).ok_or_else(|| {
                FigureError::MissingColumn {
                    path: path.to_path_buf(),
                    column: (*name).to_string(),
                }
            })?;
            cols.push(((*name).to_string(), idx));
        }
        let rows = rdr
            .records()
            .collect::<Result<Vec<_>, _>>()
            .map_err(csv_err)?;
        Ok(Self {
            path: path.to_path_buf(),
            rows,
            cols,
        })
    }

    fn cell<'r>(
        &self,
        row: &'r csv::StringRecord,
        col: &str,
    ) -> Result<(&'r str, u64), FigureError> {
        let line = row.position().map_or(0, |p| p.line());
        let idx = self
            .cols
            .iter()
            .find(|(n, _)| n == col)
            .map(|(_, i)| *i)
            .ok_or_else(|| FigureError::MissingColumn {
                path: self.path.clone(),
                column: col.to_string(),
            })?;
        let s = row.get(idx).ok_or_else(|| FigureError::InvalidCell {
            path: self.path.clone(),
            line,
            column: col.to_string(),
            reason: "the row is too short".to_string(),
        })?;
        Ok((s, line))
    }

    fn bad(&self, line: u64, col: &str, reason: String) -> FigureError {
        FigureError::InvalidCell {
            path: self.path.clone(),
            line,
            column: col.to_string(),
            reason,
        }
    }

    /// A number; when `finite` is set, NaN and infinities are refused.
    fn f64(&self, row: &csv::StringRecord, col: &str, finite: bool) -> Result<f64, FigureError> {
        let (s, line) = self.cell(row, col)?;
        let x: f64 = s
            .parse()
            .map_err(|_| self.bad(line, col, format!("`{s}` is not a number")))?;
        if finite && !x.is_finite() {
            return Err(self.bad(line, col, format!("`{s}` is not a finite number")));
        }
        Ok(x)
    }

    fn nonneg(&self, row: &csv::StringRecord, col: &str) -> Result<f64, FigureError> {
        let x = self.f64(row, col, true)?;
        if x < 0.0 {
            let line = row.position().map_or(0, |p| p.line());
            return Err(self.bad(line, col, format!("{x} is negative")));
        }
        Ok(x)
    }

    fn u64(&self, row: &csv::StringRecord, col: &str) -> Result<u64, FigureError> {
        let (s, line) = self.cell(row, col)?;
        if let Ok(u) = s.parse::<u64>() {
            return Ok(u);
        }
        match s.parse::<f64>() {
            Ok(x) if x >= 0.0 && x.fract() == 0.0 && x < 9.0e15 => Ok(x as u64),
            _ => Err(self.bad(line, col, format!("`{s}` is not a whole number"))),
        }
    }

    fn string(&self, row: &csv::StringRecord, col: &str) -> Result<String, FigureError> {
        Ok(self.cell(row, col)?.0.to_string())
    }

    fn angle(&self, row: &csv::StringRecord, col: &str) -> Result<f64, FigureError> {
        let x = self.f64(row, col, true)?;
        if !(0.0..=180.0).contains(&x) {
            let line = row.position().map_or(0, |p| p.line());
            return Err(self.bad(line, col, format!("angle {x} deg is outside 0-180")));
        }
        Ok(x)
    }

    fn nonempty(self) -> Result<Self, FigureError> {
        if self.rows.is_empty() {
            return Err(FigureError::InvalidCell {
                path: self.path.clone(),
                line: 2,
                column: "*".to_string(),
                reason: "the file has a header but no rows".to_string(),
            });
        }
        Ok(self)
    }
}

/// One row of bins.csv.
#[derive(Clone, Debug, PartialEq)]
pub struct Bin {
    pub angle_lo_deg: f64,
    pub angle_hi_deg: f64,
    pub angle_mean_deg: f64,
    pub n_pairs: u64,
    pub rho: f64,
    pub sigma: f64,
    pub hd: f64,
}

/// One row of pairs.csv.
#[derive(Clone, Debug, PartialEq)]
pub struct Pair {
    pub pulsar_a: String,
    pub pulsar_b: String,
    pub angle_deg: f64,
    pub rho: f64,
    pub sigma: f64,
    pub hd: f64,
}

/// One row of hd-spread.csv.
#[derive(Clone, Debug, PartialEq)]
pub struct SpreadRow {
    pub angle_deg: f64,
    pub hd: f64,
    pub cosmic_sigma: f64,
    pub total_sigma: f64,
}

/// One row of per-frequency.csv.
#[derive(Clone, Debug, PartialEq)]
pub struct PerFrequencyRead {
    pub index: u64,
    pub frequency_hz: f64,
    pub amplitude2: f64,
    pub amplitude2_sigma: f64,
    pub amplitude2_sigma_signal: Option<f64>,
    pub power_s2: f64,
    pub expected_s2: f64,
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
    pub per_frequency: Vec<PerFrequencyRead>,
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

fn load_nmos(dir: &Path) -> Result<Option<NmosRead>, FigureError> {
    let draws_path = dir.join(ptacorr::nmos::DRAWS_FILE);
    let doc = Doc::load(&dir.join(SUMMARY_JSON))?;
    let Some(block) = doc.opt(ptacorr::nmos::files::SUMMARY_KEY) else {
        return Ok(None);
    };
    let summary: ptacorr::nmos::NmosSummary = serde_json::from_value(block.clone())
        .map_err(|e| doc.invalid(ptacorr::nmos::files::SUMMARY_KEY, e.to_string()))?;
    if !draws_path.is_file() {
        return Err(FigureError::MissingFile {
            dir: dir.to_path_buf(),
            file: ptacorr::nmos::DRAWS_FILE,
            kind: "correlate with noise draws",
        });
    }
    let draws =
        ptacorr::nmos::files::read_draws(&draws_path).map_err(|e| FigureError::InvalidField {
            path: draws_path.clone(),
            field: "rows".to_string(),
            reason: e.to_string(),
        })?;
    Ok(Some(NmosRead { summary, draws }))
}

fn load_spread(dir: &Path) -> Result<Vec<SpreadRow>, FigureError> {
    let path = dir.join(HD_SPREAD_CSV);
    if !path.is_file() {
        return Ok(Vec::new());
    }
    let t = Table::read(&path, &["angle_deg", "hd", "cosmic_sigma", "total_sigma"])?;
    t.rows
        .iter()
        .map(|r| {
            Ok(SpreadRow {
                angle_deg: t.angle(r, "angle_deg")?,
                hd: t.f64(r, "hd", true)?,
                cosmic_sigma: t.nonneg(r, "cosmic_sigma")?,
                total_sigma: t.nonneg(r, "total_sigma")?,
            })
        })
        .collect()
}

fn load_bin_sigma(dir: &Path, n_bins: usize) -> Result<Option<Vec<f64>>, FigureError> {
    let path = dir.join(BINS_COVARIANCE_CSV);
    if !path.is_file() {
        return Ok(None);
    }
    let t = Table::read(&path, &["bin_a", "bin_b", "covariance"])?;
    let mut sig = vec![None; n_bins];
    for r in &t.rows {
        let (a, b) = (t.u64(r, "bin_a")?, t.u64(r, "bin_b")?);
        let line = r.position().map_or(0, |p| p.line());
        if a == 0 || a as usize > n_bins || b == 0 || b as usize > n_bins {
            return Err(t.bad(
                line,
                "bin_a",
                format!("bins run from 1 to {n_bins} (bins.csv)"),
            ));
        }
        if a == b {
            sig[a as usize - 1] = Some(t.nonneg(r, "covariance")?.sqrt());
        }
    }
    sig.into_iter()
        .enumerate()
        .map(|(i, s)| {
            s.ok_or_else(|| {
                t.bad(
                    0,
                    "bin_a",
                    format!("no variance for bin {} (row bin_a = bin_b missing)", i + 1),
                )
            })
        })
        .collect::<Result<Vec<f64>, _>>()
        .map(Some)
}

fn load_per_frequency(dir: &Path) -> Result<Vec<PerFrequencyRead>, FigureError> {
    let path = dir.join(PER_FREQUENCY_CSV);
    if !path.is_file() {
        return Ok(Vec::new());
    }
    let t = Table::read(
        &path,
        &[
            "index",
            "frequency_hz",
            "amplitude2",
            "amplitude2_sigma",
            "amplitude2_sigma_signal",
            "power_s2",
            "expected_s2",
        ],
    )?;
    t.rows
        .iter()
        .map(|r| {
            let (sig, _) = t.cell(r, "amplitude2_sigma_signal")?;
            Ok(PerFrequencyRead {
                index: t.u64(r, "index")?,
                frequency_hz: t.nonneg(r, "frequency_hz")?,
                amplitude2: t.f64(r, "amplitude2", true)?,
                amplitude2_sigma: t.nonneg(r, "amplitude2_sigma")?,
                amplitude2_sigma_signal: if sig.is_empty() {
                    None
                } else {
                    Some(t.nonneg(r, "amplitude2_sigma_signal")?)
                },
                power_s2: t.f64(r, "power_s2", true)?,
                expected_s2: t.f64(r, "expected_s2", true)?,
            })
        })
        .collect()
}

impl CorrelateData {
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let summary = load_summary(&dir.join(SUMMARY_JSON))?;
        let t = Table::read(
            &dir.join(BINS_CSV),
            &[
                "angle_lo_deg",
                "angle_hi_deg",
                "angle_mean_deg",
                "n_pairs",
                "rho",
                "sigma",
                "hd",
            ],
        )?
        .nonempty()?;
        let mut bins = Vec::with_capacity(t.rows.len());
        for r in &t.rows {
            let b = Bin {
                angle_lo_deg: t.angle(r, "angle_lo_deg")?,
                angle_hi_deg: t.angle(r, "angle_hi_deg")?,
                angle_mean_deg: t.angle(r, "angle_mean_deg")?,
                n_pairs: t.u64(r, "n_pairs")?,
                rho: t.f64(r, "rho", true)?,
                sigma: t.nonneg(r, "sigma")?,
                hd: t.f64(r, "hd", true)?,
            };
            if b.angle_hi_deg < b.angle_lo_deg {
                let line = r.position().map_or(0, |p| p.line());
                return Err(t.bad(line, "angle_hi_deg", "is below angle_lo_deg".to_string()));
            }
            bins.push(b);
        }
        let t = Table::read(
            &dir.join(PAIRS_CSV),
            &["pulsar_a", "pulsar_b", "angle_deg", "rho", "sigma", "hd"],
        )?;
        let mut pairs = Vec::with_capacity(t.rows.len());
        for r in &t.rows {
            pairs.push(Pair {
                pulsar_a: t.string(r, "pulsar_a")?,
                pulsar_b: t.string(r, "pulsar_b")?,
                angle_deg: t.angle(r, "angle_deg")?,
                rho: t.f64(r, "rho", true)?,
                sigma: t.nonneg(r, "sigma")?,
                hd: t.f64(r, "hd", true)?,
            });
        }
        let bin_sigma_full = load_bin_sigma(dir, bins.len())?;
        Ok(Self {
            dir: dir.to_path_buf(),
            summary,
            bins,
            pairs,
            spread: load_spread(dir)?,
            bin_sigma_full,
            per_frequency: load_per_frequency(dir)?,
            nmos: load_nmos(dir)?,
        })
    }
}

/// `null.json` of a null folder.
#[derive(Clone, Debug, PartialEq)]
pub struct NullSummary {
    pub method: String,
    pub pattern: String,
    pub trials: u64,
    /// The seed as written (a number or a string).
    pub seed: String,
    pub observed_snr: f64,
    pub n_at_least_as_extreme: u64,
    pub p_value: f64,
    pub p_value_ci95: [f64; 2],
    /// None when the file has null (e.g. p = 0 has no finite equivalent).
    pub gaussian_sigma: Option<f64>,
    pub match_threshold: Option<f64>,
    pub acceptance_rate: Option<f64>,
    /// Analytic p-value and its Gaussian-equivalent sigma.
    pub analytic: Option<(f64, Option<f64>)>,
    /// The analytic p-value fell below the inversion's absolute accuracy: `analytic.0` is then
    /// that accuracy, an upper bound, and no sigma is given.
    pub analytic_is_bound: bool,
    /// Analytic null density: (snr, density) samples.
    pub analytic_density: Option<(Vec<f64>, Vec<f64>)>,
    pub assumptions: String,
    pub provenance: Provenance,
}

/// One row of trials.csv.
#[derive(Clone, Debug, PartialEq)]
pub struct Trial {
    pub trial: u64,
    pub snr: f64,
    pub amplitude2: f64,
}

/// Everything in a null folder.
#[derive(Clone, Debug, PartialEq)]
pub struct NullData {
    pub dir: PathBuf,
    pub summary: NullSummary,
    pub trials: Vec<Trial>,
}

fn probability(doc: &Doc, field: &str, x: f64) -> Result<f64, FigureError> {
    if (0.0..=1.0).contains(&x) {
        Ok(x)
    } else {
        Err(doc.invalid(field, format!("{x} is not a probability in [0, 1]")))
    }
}

impl NullData {
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let doc = Doc::load(&dir.join(NULL_JSON))?;
        let ci = doc.f64_vec("p_value_ci95")?;
        if ci.len() != 2 || ci[0] > ci[1] {
            return Err(doc.invalid("p_value_ci95", "expected [low, high] with low <= high"));
        }
        let seed = match doc.get("seed")? {
            Value::String(s) => s.clone(),
            v @ Value::Number(_) => v.to_string(),
            v => return Err(doc.invalid("seed", format!("expected a number, found {v}"))),
        };
        let mut analytic_is_bound = false;
        let analytic = match doc.opt("analytic") {
            None => None,
            Some(_) => {
                let p = probability(&doc, "analytic.p_value", doc.f64("analytic.p_value")?)?;
                match doc.opt_f64("analytic.absolute_accuracy")? {
                    Some(acc) if p < acc => {
                        analytic_is_bound = true;
                        Some((acc, None))
                    }
                    _ => Some((p, doc.opt_f64("analytic.gaussian_sigma")?)),
                }
            }
        };
        let analytic_density = match doc.opt("analytic_density") {
            None => None,
            Some(_) => {
                let snr = doc.f64_vec("analytic_density.snr")?;
                let density = doc.f64_vec("analytic_density.density")?;
                if snr.len() != density.len() || snr.len() < 2 {
                    return Err(doc.invalid(
                        "analytic_density",
                        format!(
                            "snr has {} values and density {}; need two or more of each, equal in number",
                            snr.len(),
                            density.len()
                        ),
                    ));
                }
                if density.iter().any(|d| *d < 0.0) {
                    return Err(doc.invalid("analytic_density.density", "a density is negative"));
                }
                Some((snr, density))
            }
        };
        let trials_n = doc.u64("trials")?;
        let summary = NullSummary {
            method: doc.string("method")?,
            pattern: doc.string("pattern")?,
            trials: trials_n,
            seed,
            observed_snr: doc.f64("observed_snr")?,
            n_at_least_as_extreme: doc.u64("n_at_least_as_extreme")?,
            p_value: probability(&doc, "p_value", doc.f64("p_value")?)?,
            p_value_ci95: [
                probability(&doc, "p_value_ci95", ci[0])?,
                probability(&doc, "p_value_ci95", ci[1])?,
            ],
            gaussian_sigma: doc.opt_f64("gaussian_sigma")?,
            match_threshold: doc.opt_f64("match_threshold")?,
            acceptance_rate: doc.opt_f64("acceptance_rate")?,
            analytic,
            analytic_is_bound,
            analytic_density,
            assumptions: doc.opt_string("assumptions")?.unwrap_or_default(),
            provenance: provenance(&doc)?,
        };
        let t = Table::read(&dir.join(TRIALS_CSV), &["trial", "snr", "amplitude2"])?.nonempty()?;
        let mut trials = Vec::with_capacity(t.rows.len());
        for r in &t.rows {
            trials.push(Trial {
                trial: t.u64(r, "trial")?,
                snr: t.f64(r, "snr", true)?,
                amplitude2: t.f64(r, "amplitude2", false)?,
            });
        }
        Ok(Self {
            dir: dir.to_path_buf(),
            summary,
            trials,
        })
    }
}

/// One row of recovery.csv: the same type the injection campaign writes.
pub use ptacorr::inject::RecoveryRow;

/// Everything in an inject folder.
#[derive(Clone, Debug, PartialEq)]
pub struct InjectData {
    pub dir: PathBuf,
    pub pattern: String,
    pub false_alarm_probability: f64,
    pub detection_threshold_snr: f64,
    pub realizations: u64,
    pub mode: String,
    /// What the realizations are made on (recovery.json `target`; empty in older folders).
    pub target: String,
    /// Rows of recovery.csv in file order.
    pub rows: Vec<RecoveryRow>,
    pub provenance: Provenance,
}

impl InjectData {
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let doc = Doc::load(&dir.join(RECOVERY_JSON))?;
        let fap = doc.f64("false_alarm_probability")?;
        if !(fap > 0.0 && fap < 1.0) {
            return Err(doc.invalid("false_alarm_probability", format!("{fap} is not in (0, 1)")));
        }
        let cols = [
            "amplitude",
            "amplitude2_injected",
            "realizations",
            "amplitude2_mean",
            "amplitude2_std",
            "amplitude2_sem",
            "bias",
            "bias_sem",
            "snr_mean",
            "snr_std",
            "coverage68_weak",
            "coverage95_weak",
            "coverage68_full",
            "coverage95_full",
            "detection_probability",
        ];
        let t = Table::read(&dir.join(RECOVERY_CSV), &cols)?.nonempty()?;
        let mut rows = Vec::with_capacity(t.rows.len());
        for r in &t.rows {
            let p = t.f64(r, "detection_probability", true)?;
            if !(0.0..=1.0).contains(&p) {
                let line = r.position().map_or(0, |p| p.line());
                return Err(t.bad(
                    line,
                    "detection_probability",
                    format!("{p} is not in [0, 1]"),
                ));
            }
            rows.push(RecoveryRow {
                amplitude: t.nonneg(r, "amplitude")?,
                amplitude2_injected: t.nonneg(r, "amplitude2_injected")?,
                realizations: t.u64(r, "realizations")?,
                amplitude2_mean: t.f64(r, "amplitude2_mean", true)?,
                amplitude2_std: t.nonneg(r, "amplitude2_std")?,
                amplitude2_sem: t.f64(r, "amplitude2_sem", false)?,
                bias: t.f64(r, "bias", false)?,
                bias_sem: t.f64(r, "bias_sem", false)?,
                snr_mean: t.f64(r, "snr_mean", false)?,
                snr_std: t.f64(r, "snr_std", false)?,
                coverage68_weak: t.f64(r, "coverage68_weak", false)?,
                coverage95_weak: t.f64(r, "coverage95_weak", false)?,
                coverage68_full: t.f64(r, "coverage68_full", false)?,
                coverage95_full: t.f64(r, "coverage95_full", false)?,
                detection_probability: p,
            });
        }
        Ok(Self {
            dir: dir.to_path_buf(),
            pattern: doc.string("pattern")?,
            false_alarm_probability: fap,
            detection_threshold_snr: doc.f64("detection_threshold_snr")?,
            realizations: doc.u64("realizations")?,
            mode: doc.string("mode")?,
            target: doc.opt_string("target")?.unwrap_or_default(),
            rows,
            provenance: provenance(&doc)?,
        })
    }
}
