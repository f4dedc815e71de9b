//! The release reader: `release.toml`, one residual CSV per pulsar, optional design matrices and
//! `noise.toml`. Every malformed input becomes an [`Error::Input`] naming file, line and field.

use crate::error::{Error, Result};
use crate::noise::{line_of, toml_error, NoiseModel};
use crate::sky::{direction_from_radec, parse_dec, parse_ra, Direction};
use ndarray::Array2;
use rayon::prelude::*;
use serde::Deserialize;
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Header of a residual table, in order (the fields of [`ResidualRow`]).
pub const RESIDUAL_COLUMNS: [&str; 5] = ["mjd", "residual_s", "sigma_s", "freq_mhz", "backend"];

/// One row of a residual table: what `simulate` writes (through [`crate::output::csv_table`]).
/// The reader takes the same columns with a byte-level parser of its own (a release can hold
/// millions of TOAs), checked against the csv reader in the tests.
#[derive(Clone, Debug, PartialEq, serde::Serialize, Deserialize)]
pub struct ResidualRow {
    pub mjd: f64,
    pub residual_s: f64,
    pub sigma_s: f64,
    pub freq_mhz: f64,
    pub backend: String,
}

/// The timing residuals and metadata of one pulsar.
#[derive(Clone, Debug)]
pub struct Pulsar {
    pub label: String,
    /// Right ascension and declination (radians, J2000).
    pub ra: f64,
    pub dec: f64,
    pub direction: Direction,
    /// Times of arrival (MJD), residuals (s), uncertainties (s), radio frequencies (MHz).
    pub mjd: Vec<f64>,
    pub residual: Vec<f64>,
    pub sigma: Vec<f64>,
    pub freq_mhz: Vec<f64>,
    /// Index into `backends` for each TOA.
    pub backend: Vec<usize>,
    /// Distinct backend labels in order of first appearance.
    pub backends: Vec<String>,
    /// The exported timing-model design matrix (n_toa x n_param), if any.
    pub design: Option<DesignMatrix>,
}

impl Pulsar {
    /// Number of TOAs.
    pub fn n_toa(&self) -> usize {
        self.mjd.len()
    }
}

/// A timing-model design matrix with its parameter names.
#[derive(Clone, Debug)]
pub struct DesignMatrix {
    pub names: Vec<String>,
    pub values: Array2<f64>,
}

/// A residual release: pulsars, their noise model, and a content hash of the input files.
#[derive(Clone, Debug)]
pub struct Release {
    pub title: String,
    pub pulsars: Vec<Pulsar>,
    pub noise: NoiseModel,
    /// The release folder.
    pub dir: PathBuf,
    /// `sha256:` hash over the names and bytes of every input file, in reading order.
    pub input_hash: String,
    /// Things that look wrong but are legal (an isolated TOA, duplicate rows, two pulsars on
    /// one file); recorded in the provenance of every output, errors with `strict`.
    pub warnings: Vec<String>,
}

impl Release {
    /// Earliest and latest MJD over all TOAs.
    pub fn mjd_range(&self) -> (f64, f64) {
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        for p in &self.pulsars {
            for &t in &p.mjd {
                lo = lo.min(t);
                hi = hi.max(t);
            }
        }
        (lo, hi)
    }

    /// Span of the whole array in seconds.
    pub fn span_seconds(&self) -> f64 {
        let (lo, hi) = self.mjd_range();
        (hi - lo) * crate::constants::SECONDS_PER_DAY
    }

    /// Total number of TOAs.
    pub fn n_toa(&self) -> usize {
        total_toas(&self.pulsars)
    }
}

/// Total number of TOAs of `pulsars` (a release's, or those `simulate` wrote).
pub fn total_toas(pulsars: &[Pulsar]) -> usize {
    pulsars.iter().map(Pulsar::n_toa).sum()
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ReleaseFile {
    release: ReleaseHeader,
    #[serde(default)]
    pulsar: Vec<toml::Spanned<PulsarEntry>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ReleaseHeader {
    title: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct PulsarEntry {
    label: String,
    ra: Option<String>,
    dec: Option<String>,
    ra_deg: Option<f64>,
    dec_deg: Option<f64>,
    residuals: String,
    design_matrix: Option<String>,
}

/// Smallest number of pulsars for a correlation analysis.
pub const MIN_PULSARS: usize = 3;

/// How a release is read.
#[derive(Clone, Copy, Debug, Default)]
pub struct ReadOptions {
    /// Accept residual and design-matrix paths that leave the release folder (absolute, or
    /// with `..`). Off by default: a release is one self-contained folder.
    pub allow_outside_paths: bool,
    /// Treat every warning as an error.
    pub strict: bool,
    /// Called with each warning as it is found (the command line prints them to stderr).
    pub on_warning: Option<fn(&str)>,
}

static DEFAULT_OPTIONS: std::sync::RwLock<ReadOptions> = std::sync::RwLock::new(ReadOptions {
    allow_outside_paths: false,
    strict: false,
    on_warning: None,
});

/// Set the options [`read_release`] uses (the command line sets them once from its global
/// `--strict` and `--allow-outside-paths` flags).
pub fn set_default_read_options(options: ReadOptions) {
    if let Ok(mut o) = DEFAULT_OPTIONS.write() {
        *o = options;
    }
}

/// The options [`read_release`] uses.
pub fn default_read_options() -> ReadOptions {
    DEFAULT_OPTIONS.read().map(|o| *o).unwrap_or_default()
}

/// Report a warning found outside the release reader (for example a null threshold taken from
/// another release) with the default options: an error under `strict`, else passed to
/// `on_warning`. `path` is the file the warning is about.
pub fn emit_warning(warning: &str, path: &Path) -> Result<()> {
    let o = default_read_options();
    if o.strict {
        return Err(Error::input(
            path,
            None,
            None,
            format!("--strict turns warnings into errors: {warning}"),
        ));
    }
    if let Some(f) = o.on_warning {
        f(warning);
    }
    Ok(())
}

/// The input hash recorded in an output folder's JSON (`null.json`, `summary.json`), if any.
pub fn recorded_input_hash(file: &Path) -> Option<String> {
    let text = std::fs::read_to_string(file).ok()?;
    let v: serde_json::Value = serde_json::from_str(&text).ok()?;
    v.get("provenance")?
        .get("input_hash")?
        .as_str()
        .map(str::to_string)
}

/// A TOA is "isolated" when the gap to its nearest neighbour at either end of a pulsar's
/// TOAs exceeds both this many days and half the span of the other TOAs (common practice
/// for catching a mistyped MJD, our choice of numbers).
pub const ISOLATED_TOA_GAP_DAYS: f64 = 365.25;

/// The rows of the two earliest and the two latest MJDs (at least 2 values), found in one pass:
/// the first two and the last two entries of a stable sort of the rows by MJD (`total_cmp`), so
/// of tied MJDs the earliest row comes first and the latest row last.
fn mjd_ends(mjd: &[f64]) -> ([usize; 2], [usize; 2]) {
    let (mut lo, mut hi) = ([0usize, 1], [0usize, 1]);
    if mjd[1].total_cmp(&mjd[0]).is_lt() {
        lo = [1, 0];
    } else {
        hi = [1, 0];
    }
    for (i, &v) in mjd.iter().enumerate().skip(2) {
        if v.total_cmp(&mjd[lo[0]]).is_lt() {
            lo = [i, lo[0]];
        } else if v.total_cmp(&mjd[lo[1]]).is_lt() {
            lo[1] = i;
        }
        if v.total_cmp(&mjd[hi[0]]).is_ge() {
            hi = [i, hi[0]];
        } else if v.total_cmp(&mjd[hi[1]]).is_ge() {
            hi[1] = i;
        }
    }
    (lo, hi)
}

/// Warnings about one pulsar's residual table: an isolated first or last TOA, exact
/// duplicate rows.
pub fn residual_warnings(p: &Pulsar, path: &Path) -> Vec<String> {
    let mut out = Vec::new();
    let n = p.n_toa();
    if n >= 3 {
        let (lo, hi) = mjd_ends(&p.mjd);
        let (t0, t1) = (p.mjd[lo[0]], p.mjd[lo[1]]);
        let (tn1, tn2) = (p.mjd[hi[0]], p.mjd[hi[1]]);
        let (first_gap, last_gap) = (t1 - t0, tn1 - tn2);
        let rest_first = tn1 - t1;
        let rest_last = tn2 - t0;
        for (gap, rest, k, end) in [
            (first_gap, rest_first, lo[0], "first"),
            (last_gap, rest_last, hi[0], "last"),
        ] {
            if gap > ISOLATED_TOA_GAP_DAYS && gap > 0.5 * rest {
                out.push(format!(
                    "{}: pulsar {}: the {end} TOA (MJD {}, data row {}) lies {:.0} days from the others, which span {:.0} days; a mistyped MJD stretches the array's span and the frequency ladder",
                    path.display(),
                    p.label,
                    p.mjd[k],
                    k + 1,
                    gap,
                    rest
                ));
            }
        }
    }
    // Exact duplicates: adjacent equal rows of the rows sorted by (MJD bits, residual bits,
    // sigma bits, frequency bits, backend, row), each but the first of its group reported.
    let key = |i: usize| {
        (
            p.mjd[i].to_bits(),
            p.residual[i].to_bits(),
            p.sigma[i].to_bits(),
            p.freq_mhz[i].to_bits(),
            p.backend[i],
            i,
        )
    };
    let mut dups: Vec<usize> = Vec::new();
    let mut rows: Vec<(u64, u64, u64, u64, usize, usize)> = Vec::new();
    let mut add_dups = |rows: &mut Vec<(u64, u64, u64, u64, usize, usize)>| {
        rows.sort_unstable();
        dups.extend(
            rows.windows(2)
                .filter(|w| {
                    (w[0].0, w[0].1, w[0].2, w[0].3, w[0].4)
                        == (w[1].0, w[1].1, w[1].2, w[1].3, w[1].4)
                })
                .map(|w| w[1].5 + 1),
        );
    };
    if p.mjd.windows(2).all(|w| w[0].to_bits() <= w[1].to_bits()) {
        // Rows already in MJD order (the usual table): the sorted order is each run of one
        // MJD sorted in turn, and rows of different MJDs are never equal, so each run is
        // sorted and searched by itself (the same list as one sort of all rows).
        let mut start = 0;
        while start < n {
            let bits = p.mjd[start].to_bits();
            let end = start
                + p.mjd[start..]
                    .iter()
                    .take_while(|m| m.to_bits() == bits)
                    .count();
            if end - start > 1 {
                rows.clear();
                rows.extend((start..end).map(key));
                add_dups(&mut rows);
            }
            start = end;
        }
    } else {
        rows.extend((0..n).map(key));
        add_dups(&mut rows);
    }
    if !dups.is_empty() {
        let shown: Vec<String> = dups.iter().take(5).map(usize::to_string).collect();
        out.push(format!(
            "{}: pulsar {}: {} exact duplicate row(s) (data rows {}{}); each counts as an independent TOA",
            path.display(),
            p.label,
            dups.len(),
            shown.join(", "),
            if dups.len() > 5 { ", ..." } else { "" }
        ));
    }
    out
}

/// Check a path given in release.toml stays inside the release folder (relative, no `..`),
/// unless `allow` is set.
pub fn check_inside(rel: &str, allow: bool) -> std::result::Result<(), String> {
    if allow {
        return Ok(());
    }
    let p = Path::new(rel);
    let leaves = p.is_absolute()
        || p.components().any(|c| {
            !matches!(
                c,
                std::path::Component::Normal(_) | std::path::Component::CurDir
            )
        });
    if rel.is_empty() || leaves {
        return Err(format!(
            "{} points outside the release folder; give a path relative to it without '..', or read the release with the option that allows outside paths",
            crate::output::quote(rel)
        ));
    }
    Ok(())
}

/// Read a release folder (or a path to its `release.toml`).
pub fn read_release(path: &Path) -> Result<Release> {
    read_release_with(path, default_read_options())
}

/// Read a release folder with options.
pub fn read_release_with(path: &Path, options: ReadOptions) -> Result<Release> {
    let (dir, toml_path) = if path.is_dir() {
        (path.to_path_buf(), path.join("release.toml"))
    } else {
        (
            path.parent().unwrap_or(Path::new(".")).to_path_buf(),
            path.to_path_buf(),
        )
    };
    let mut hasher = Sha256::new();
    let text = read_text(&toml_path, &mut hasher, "release.toml")?;
    let file: ReleaseFile = toml::from_str(&text).map_err(|e| toml_error(&toml_path, &text, &e))?;
    // Labels and paths are checked for every entry before any residual file is opened.
    for (i, spanned) in file.pulsar.iter().enumerate() {
        let line = Some(line_of(&text, spanned.span().start));
        let e = spanned.get_ref();
        crate::noise::check_label(e.label.trim())
            .map_err(|m| Error::input(&toml_path, line, Some(&format!("pulsar[{i}].label")), m))?;
        check_inside(&e.residuals, options.allow_outside_paths).map_err(|m| {
            Error::input(&toml_path, line, Some(&format!("pulsar[{i}].residuals")), m)
        })?;
        if let Some(d) = &e.design_matrix {
            check_inside(d, options.allow_outside_paths).map_err(|m| {
                Error::input(
                    &toml_path,
                    line,
                    Some(&format!("pulsar[{i}].design_matrix")),
                    m,
                )
            })?;
        }
    }
    if file.pulsar.len() < MIN_PULSARS {
        return Err(Error::input(
            &toml_path,
            None,
            Some("pulsar"),
            format!(
                "a correlation analysis needs at least {MIN_PULSARS} pulsars, found {}",
                file.pulsar.len()
            ),
        ));
    }
    let mut seen: BTreeMap<String, usize> = BTreeMap::new();
    let mut pulsars = Vec::with_capacity(file.pulsar.len());
    // The pulsars' tables are read and parsed in parallel, a few per thread at a time so that
    // only that many files' bytes are held at once; the checks, the errors and the input hash
    // then follow the order of release.toml exactly as a sequential read would.
    // The files' byte buffers are handed back to `spare` once hashed and reused by the next
    // window's reads: new memory is faulted in for one window of files, not for every file.
    let window = 4 * rayon::current_num_threads().max(1);
    let spare: std::sync::Mutex<Vec<Vec<u8>>> = std::sync::Mutex::new(Vec::new());
    let give_back = |bytes: Vec<u8>| {
        if let Ok(mut s) = spare.lock() {
            s.push(bytes);
        }
    };
    let read_window = |chunk: &[toml::Spanned<PulsarEntry>]| -> Vec<Tables> {
        chunk
            .par_iter()
            .map(|spanned| read_tables(&dir, spanned.get_ref(), &spare))
            .collect()
    };
    let mut check_window = |c: usize,
                            chunk: &[toml::Spanned<PulsarEntry>],
                            tables: Vec<Tables>|
     -> Result<()> {
        for (j, (spanned, tables)) in chunk.iter().zip(tables).enumerate() {
            let i = c * window + j;
            let line = Some(line_of(&text, spanned.span().start));
            let entry = spanned.get_ref();
            let field = |name: &str| format!("pulsar[{i}].{name}");
            let label = entry.label.trim().to_string();
            if label.is_empty() || label.contains(|c: char| c.is_whitespace() || c == ',') {
                return Err(Error::input(
                    &toml_path,
                    line,
                    Some(&field("label")),
                    format!(
                        "\"{}\" is not a usable label (non-empty, no spaces or commas)",
                        entry.label
                    ),
                ));
            }
            if let Some(prev) = seen.insert(label.clone(), i) {
                return Err(Error::input(
                    &toml_path,
                    line,
                    Some(&field("label")),
                    format!("label {label} is used twice (also pulsar[{prev}])"),
                ));
            }
            let (ra, dec) = sky_position(entry, &toml_path, line, &field)?;
            let csv_path = dir.join(&entry.residuals);
            let (bytes, mut p) = tables.residuals?;
            hash_file(&mut hasher, &format!("residuals:{label}"), &bytes);
            give_back(bytes);
            p.ra = ra;
            p.dec = dec;
            p.direction = direction_from_radec(ra, dec);
            if let Some(design) = tables.design {
                let (bytes, d) = design?;
                hash_file(&mut hasher, "design_matrix", &bytes);
                give_back(bytes);
                p.design = Some(d);
            }
            let n_params = p.design.as_ref().map_or(3, |d| d.names.len());
            if p.n_toa() <= n_params + 1 {
                return Err(Error::input(
                    &csv_path,
                    None,
                    None,
                    format!(
                        "pulsar {label} has {} TOAs, too few for its timing model of {n_params} parameters",
                        p.n_toa()
                    ),
                ));
            }
            pulsars.push(p);
        }
        Ok(())
    };
    // Window c is checked and hashed (in order, on one thread) while window c + 1 is read and
    // parsed: the input hash no longer waits alone. The errors are the same and come in the
    // same order (window c + 1's results are looked at only after window c passed).
    let windows: Vec<&[toml::Spanned<PulsarEntry>]> = file.pulsar.chunks(window).collect();
    let mut next = windows.first().map(|w| read_window(w));
    for (c, chunk) in windows.iter().enumerate() {
        let tables = next.take().unwrap_or_default();
        let (checked, read) = rayon::join(
            || check_window(c, chunk, tables),
            || windows.get(c + 1).map(|w| read_window(w)),
        );
        checked?;
        next = read;
    }
    // Pulsars in parallel, their warnings kept in the order of release.toml.
    let mut warnings: Vec<String> = file
        .pulsar
        .par_iter()
        .zip(&pulsars)
        .map(|(spanned, p)| residual_warnings(p, &dir.join(&spanned.get_ref().residuals)))
        .collect::<Vec<_>>()
        .into_iter()
        .flatten()
        .collect();
    // Each path resolved once (not once per pair of pulsars).
    let paths: Vec<std::path::PathBuf> = file
        .pulsar
        .iter()
        .map(|e| dir.join(&e.get_ref().residuals))
        .collect();
    let canonical: Vec<Option<std::path::PathBuf>> =
        paths.iter().map(|p| p.canonicalize().ok()).collect();
    for (i, a) in file.pulsar.iter().enumerate() {
        for (j, b) in file.pulsar[..i].iter().enumerate() {
            let (pa, pb) = (&paths[i], &paths[j]);
            let same =
                pa == pb || matches!((&canonical[i], &canonical[j]), (Some(x), Some(y)) if x == y);
            if same {
                warnings.push(format!(
                    "{}: pulsars {} and {} read the same residual file {}",
                    toml_path.display(),
                    b.get_ref().label.trim(),
                    a.get_ref().label.trim(),
                    pa.display()
                ));
            }
        }
    }
    for w in &warnings {
        if let Some(f) = options.on_warning {
            f(w);
        }
    }
    if options.strict {
        if let Some(w) = warnings.first() {
            return Err(Error::input(
                &toml_path,
                None,
                None,
                format!("--strict turns warnings into errors: {w}"),
            ));
        }
    }
    let noise_path = dir.join("noise.toml");
    let noise = if noise_path.exists() {
        let t = read_text(&noise_path, &mut hasher, "noise.toml")?;
        let model = NoiseModel::parse(&t, &noise_path)?;
        check_noise_against(&model, &pulsars, &noise_path, &t)?;
        model
    } else {
        NoiseModel::default()
    };
    Ok(Release {
        title: file.release.title,
        pulsars,
        noise,
        dir,
        input_hash: format!("sha256:{:x}", hasher.finalize()),
        warnings,
    })
}

fn sky_position(
    e: &PulsarEntry,
    path: &Path,
    line: Option<usize>,
    field: &dyn Fn(&str) -> String,
) -> Result<(f64, f64)> {
    let bad = |name: &str, msg: String| Error::input(path, line, Some(&field(name)), msg);
    match (&e.ra, &e.dec, e.ra_deg, e.dec_deg) {
        (Some(ra), Some(dec), None, None) => {
            let r = parse_ra(ra).ok_or_else(|| {
                bad(
                    "ra",
                    format!("\"{ra}\" is not a right ascension hh:mm:ss.s in [0, 24) h"),
                )
            })?;
            let d = parse_dec(dec).ok_or_else(|| {
                bad(
                    "dec",
                    format!("\"{dec}\" is not a declination +dd:mm:ss.s in [-90, 90] deg"),
                )
            })?;
            Ok((r, d))
        }
        (None, None, Some(r), Some(d)) => {
            if !(r.is_finite() && (0.0..360.0).contains(&r)) {
                return Err(bad("ra_deg", format!("{r} is outside [0, 360) deg")));
            }
            if !(d.is_finite() && (-90.0..=90.0).contains(&d)) {
                return Err(bad("dec_deg", format!("{d} is outside [-90, 90] deg")));
            }
            Ok((r.to_radians(), d.to_radians()))
        }
        _ => Err(bad(
            "ra",
            "give the position as ra and dec (sexagesimal) or as ra_deg and dec_deg".into(),
        )),
    }
}

/// A pulsar's residual table and optional design matrix as read (bytes kept for the hash).
struct Tables {
    residuals: Result<(Vec<u8>, Pulsar)>,
    /// Read only when the residual table was read without error.
    design: Option<Result<(Vec<u8>, DesignMatrix)>>,
}

/// Read and parse one pulsar's files (no checks against release.toml beyond its paths).
fn read_tables(dir: &Path, entry: &PulsarEntry, spare: &std::sync::Mutex<Vec<Vec<u8>>>) -> Tables {
    let label = entry.label.trim();
    let csv_path = dir.join(&entry.residuals);
    let residuals = read_into(&csv_path, spare)
        .map_err(|e| Error::io(&csv_path, e))
        .and_then(|bytes| {
            let p = parse_residuals(&csv_path, label, &bytes)?;
            Ok((bytes, p))
        });
    let design = match (&residuals, &entry.design_matrix) {
        (Ok((_, p)), Some(rel)) => {
            let path = dir.join(rel);
            Some(
                read_into(&path, spare)
                    .map_err(|e| Error::io(&path, e))
                    .and_then(|bytes| {
                        let d = parse_design_matrix(&path, p.n_toa(), &bytes)?;
                        Ok((bytes, d))
                    }),
            )
        }
        _ => None,
    };
    Tables { residuals, design }
}

/// The whole file at `path`, read into a buffer from `spare` if there is one (as
/// `std::fs::read` does, into memory already faulted in).
fn read_into(path: &Path, spare: &std::sync::Mutex<Vec<Vec<u8>>>) -> std::io::Result<Vec<u8>> {
    use std::io::Read;
    let mut buf = spare
        .lock()
        .ok()
        .and_then(|mut s| s.pop())
        .unwrap_or_default();
    buf.clear();
    let mut f = std::fs::File::open(path)?;
    if let Ok(m) = f.metadata() {
        buf.reserve(usize::try_from(m.len()).unwrap_or(0));
    }
    f.read_to_end(&mut buf)?;
    Ok(buf)
}

/// Add one input file (its name, length and bytes) to the input hash.
fn hash_file(hasher: &mut Sha256, name: &str, bytes: &[u8]) {
    hasher.update(name.as_bytes());
    hasher.update((bytes.len() as u64).to_le_bytes());
    hasher.update(bytes);
}

fn read_bytes(path: &Path, hasher: &mut Sha256, name: &str) -> Result<Vec<u8>> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    hash_file(hasher, name, &bytes);
    Ok(bytes)
}

fn read_text(path: &Path, hasher: &mut Sha256, name: &str) -> Result<String> {
    let bytes = read_bytes(path, hasher, name)?;
    String::from_utf8(bytes).map_err(|e| {
        let m = crate::output::non_utf8_message(e.as_bytes(), &e.utf8_error());
        Error::input(path, None, None, m)
    })
}

/// Read one residual table (`mjd,residual_s,sigma_s,freq_mhz,backend`).
pub fn read_residuals(path: &Path, label: &str, hasher: &mut Sha256) -> Result<Pulsar> {
    let bytes = read_bytes(path, hasher, &format!("residuals:{label}"))?;
    parse_residuals(path, label, &bytes)
}

/// Parse the bytes of a residual table read from `path`.
fn parse_residuals(path: &Path, label: &str, bytes: &[u8]) -> Result<Pulsar> {
    if let Some(p) = parse_residuals_plain(label, bytes) {
        return Ok(p);
    }
    parse_residuals_csv(path, label, bytes)
}

/// The fast path of [`parse_residuals`] for a plain table (no quotes, `\n` or `\r\n` line
/// ends, five fields on every line, every value valid): lines and fields are split in place,
/// with no allocation per row. It accepts exactly the tables the `csv` reader below accepts
/// and returns the same values (blank lines skipped, fields trimmed of ASCII white space,
/// numbers through the same `str::parse::<f64>`); at the first thing it does not handle, or
/// any bad value, it returns None and the `csv` reader parses the file again and names the
/// line and field. The table is checked to be UTF-8 once, as a whole (any field with a
/// byte outside UTF-8 failed to parse before, too), not field by field.
fn parse_residuals_plain(label: &str, bytes: &[u8]) -> Option<Pulsar> {
    if bytes.contains(&b'"') {
        return None;
    }
    let text = std::str::from_utf8(bytes).ok()?;
    let mut lines = text.split('\n').map(|l| l.strip_suffix('\r').unwrap_or(l));
    let header = lines.next()?;
    let mut fields = [""; 5];
    if split5(header, &mut fields)? != RESIDUAL_COLUMNS {
        return None;
    }
    let cap = bytes.len() / 48;
    let mut p = Pulsar {
        label: label.to_string(),
        ra: 0.0,
        dec: 0.0,
        direction: [0.0; 3],
        mjd: Vec::with_capacity(cap),
        residual: Vec::with_capacity(cap),
        sigma: Vec::with_capacity(cap),
        freq_mhz: Vec::with_capacity(cap),
        backend: Vec::with_capacity(cap),
        backends: Vec::new(),
        design: None,
    };
    let num = |f: &str| -> Option<f64> { f.parse::<f64>().ok().filter(|v| v.is_finite()) };
    for line in lines {
        if line.is_empty() {
            continue;
        }
        let f = split5(line, &mut fields)?;
        let (mjd, r, s, fr) = (num(f[0])?, num(f[1])?, num(f[2])?, num(f[3])?);
        if !(s > 0.0 && fr > 0.0 && (0.0..1.0e6).contains(&mjd)) {
            return None;
        }
        let b = f[4];
        if b.is_empty() {
            return None;
        }
        let bi = match p.backends.iter().position(|x| x == b) {
            Some(i) => i,
            None => {
                p.backends.push(b.to_string());
                p.backends.len() - 1
            }
        };
        p.mjd.push(mjd);
        p.residual.push(r);
        p.sigma.push(s);
        p.freq_mhz.push(fr);
        p.backend.push(bi);
    }
    // Give back the capacity reserved beyond the rows (in place): the columns are kept for the
    // whole run, and the freed tails leave room for the next tables' buffers.
    for col in [&mut p.mjd, &mut p.residual, &mut p.sigma, &mut p.freq_mhz] {
        col.shrink_to_fit();
    }
    p.backend.shrink_to_fit();
    (!p.mjd.is_empty()).then_some(p)
}

/// Split one line into exactly five comma-separated fields trimmed of ASCII white space (as
/// the `csv` reader with `Trim::All` does); None for another count or a stray `\r`.
fn split5<'a>(line: &'a str, out: &mut [&'a str; 5]) -> Option<[&'a str; 5]> {
    // Eight bytes at a time: the commas and carriage returns of a word are found with a few
    // integer operations (a byte loop with two tests per byte was the reader's largest single
    // cost); the tail is scanned byte by byte. Slicing a str at an ASCII comma is always at a
    // character boundary.
    const ONES: u64 = 0x0101_0101_0101_0101;
    const LOW7: u64 = 0x7f7f_7f7f_7f7f_7f7f;
    // The high bit of every zero byte of `x` (exact: no carry crosses a byte).
    let zero_bytes = |x: u64| !(((x & LOW7) + LOW7) | x | LOW7);
    let bytes = line.as_bytes();
    let mut k = 0;
    let mut start = 0;
    let mut field = |end: usize, k: &mut usize, start: &mut usize| -> Option<()> {
        if *k == 4 {
            return None;
        }
        out[*k] = line[*start..end].trim_ascii();
        *k += 1;
        *start = end + 1;
        Some(())
    };
    let mut words = bytes.chunks_exact(8);
    let mut i = 0;
    for word in &mut words {
        let x = u64::from_le_bytes(word.try_into().expect("eight bytes"));
        if zero_bytes(x ^ (u64::from(b'\r') * ONES)) != 0 {
            return None;
        }
        let mut commas = zero_bytes(x ^ (u64::from(b',') * ONES));
        while commas != 0 {
            field(
                i + (commas.trailing_zeros() / 8) as usize,
                &mut k,
                &mut start,
            )?;
            commas &= commas - 1;
        }
        i += 8;
    }
    for (j, &c) in words.remainder().iter().enumerate() {
        if c == b'\r' {
            return None;
        }
        if c == b',' {
            field(i + j, &mut k, &mut start)?;
        }
    }
    if k != 4 {
        return None;
    }
    out[4] = line[start..].trim_ascii();
    Some(*out)
}

/// The `csv` reader of residual tables: the reference parse, and the one that names the line
/// and field of a bad value.
fn parse_residuals_csv(path: &Path, label: &str, bytes: &[u8]) -> Result<Pulsar> {
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .trim(csv::Trim::All)
        .from_reader(bytes);
    let header = rdr.byte_headers().map_err(|e| csv_error(path, &e))?.clone();
    let names: Vec<String> = header
        .iter()
        .map(|h| String::from_utf8_lossy(h).into_owned())
        .collect();
    if names != RESIDUAL_COLUMNS {
        return Err(Error::input(
            path,
            Some(1),
            None,
            format!(
                "header must be exactly `{}`, found `{}`",
                RESIDUAL_COLUMNS.join(","),
                crate::output::truncate(&names.join(","), crate::output::QUOTE_CHARS)
            ),
        ));
    }
    let cap = bytes.len() / 48;
    let mut p = Pulsar {
        label: label.to_string(),
        ra: 0.0,
        dec: 0.0,
        direction: [0.0; 3],
        mjd: Vec::with_capacity(cap),
        residual: Vec::with_capacity(cap),
        sigma: Vec::with_capacity(cap),
        freq_mhz: Vec::with_capacity(cap),
        backend: Vec::with_capacity(cap),
        backends: Vec::new(),
        design: None,
    };
    let mut rec = csv::ByteRecord::new();
    loop {
        match rdr.read_byte_record(&mut rec) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => return Err(csv_error(path, &e)),
        }
        let line = rec.position().map(|q| q.line() as usize);
        if rec.len() != 5 {
            return Err(Error::input(
                path,
                line,
                None,
                format!("expected 5 columns, found {}", rec.len()),
            ));
        }
        let num =
            |k: usize| -> Result<f64> { parse_number(&rec[k], path, line, RESIDUAL_COLUMNS[k]) };
        let mjd = num(0)?;
        let r = num(1)?;
        let s = num(2)?;
        let f = num(3)?;
        if s <= 0.0 {
            return Err(Error::input(
                path,
                line,
                Some("sigma_s"),
                format!("uncertainty must be positive, got {s}"),
            ));
        }
        if f <= 0.0 {
            return Err(Error::input(
                path,
                line,
                Some("freq_mhz"),
                format!("radio frequency must be positive, got {f}"),
            ));
        }
        if !(0.0..1.0e6).contains(&mjd) {
            return Err(Error::input(
                path,
                line,
                Some("mjd"),
                format!("{mjd} is not a plausible MJD"),
            ));
        }
        let b = std::str::from_utf8(&rec[4]).map_err(|_| {
            Error::input(
                path,
                line,
                Some("backend"),
                "holds bytes that are not UTF-8; save the file as UTF-8",
            )
        })?;
        if b.is_empty() {
            return Err(Error::input(
                path,
                line,
                Some("backend"),
                "backend label is empty",
            ));
        }
        let bi = match p.backends.iter().position(|x| x == b) {
            Some(i) => i,
            None => {
                p.backends.push(b.to_string());
                p.backends.len() - 1
            }
        };
        p.mjd.push(mjd);
        p.residual.push(r);
        p.sigma.push(s);
        p.freq_mhz.push(f);
        p.backend.push(bi);
    }
    if p.mjd.is_empty() {
        return Err(Error::input(
            path,
            None,
            None,
            "the residual table has no rows",
        ));
    }
    Ok(p)
}

fn parse_number(field: &[u8], path: &Path, line: Option<usize>, name: &str) -> Result<f64> {
    let text = std::str::from_utf8(field).map_err(|e| {
        Error::input(
            path,
            line,
            Some(name),
            format!(
                "holds bytes that are not UTF-8 (byte 0x{:02x} at position {} of the field); save the file as UTF-8",
                field.get(e.valid_up_to()).copied().unwrap_or(0),
                e.valid_up_to() + 1
            ),
        )
    })?;
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(v) => Err(Error::input(
            path,
            line,
            Some(name),
            format!("{v} is not a finite number"),
        )),
        Err(_) => Err(Error::input(
            path,
            line,
            Some(name),
            format!("{} is not a number", crate::output::quote(text)),
        )),
    }
}

fn csv_error(path: &Path, e: &csv::Error) -> Error {
    let line = e.position().map(|p| p.line() as usize);
    let msg = match e.kind() {
        csv::ErrorKind::UnequalLengths {
            expected_len, len, ..
        } => {
            format!("expected {expected_len} columns, found {len}")
        }
        _ => e.to_string(),
    };
    Error::input(path, line, None, msg)
}

/// Read a design matrix CSV: header of parameter names, one row per TOA.
pub fn read_design_matrix(path: &Path, n_toa: usize, hasher: &mut Sha256) -> Result<DesignMatrix> {
    let bytes = read_bytes(path, hasher, "design_matrix")?;
    parse_design_matrix(path, n_toa, &bytes)
}

/// Parse the bytes of a design matrix read from `path`.
fn parse_design_matrix(path: &Path, n_toa: usize, bytes: &[u8]) -> Result<DesignMatrix> {
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .trim(csv::Trim::All)
        .from_reader(bytes);
    let names: Vec<String> = rdr
        .headers()
        .map_err(|e| csv_error(path, &e))?
        .iter()
        .map(str::to_string)
        .collect();
    if names.is_empty() || names.iter().any(String::is_empty) {
        return Err(Error::input(
            path,
            Some(1),
            None,
            "header must name every parameter column",
        ));
    }
    let m = names.len();
    let mut values = Vec::with_capacity(n_toa * m);
    let mut rows = 0;
    let mut rec = csv::ByteRecord::new();
    loop {
        match rdr.read_byte_record(&mut rec) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => return Err(csv_error(path, &e)),
        }
        let line = rec.position().map(|q| q.line() as usize);
        for (k, name) in names.iter().enumerate() {
            values.push(parse_number(&rec[k], path, line, name)?);
        }
        rows += 1;
    }
    if rows != n_toa {
        return Err(Error::input(
            path,
            None,
            None,
            format!("has {rows} rows but the residual table has {n_toa} TOAs"),
        ));
    }
    let values = Array2::from_shape_vec((rows, m), values).expect("shape checked");
    Ok(DesignMatrix { names, values })
}

fn check_noise_against(
    model: &NoiseModel,
    pulsars: &[Pulsar],
    path: &Path,
    text: &str,
) -> Result<()> {
    let line_with = |needle: &str| text.lines().position(|l| l.contains(needle)).map(|i| i + 1);
    for (label, pn) in &model.pulsars {
        let Some(p) = pulsars.iter().find(|p| &p.label == label) else {
            return Err(Error::input(
                path,
                line_with(&format!("pulsar.{label}")),
                Some(&format!("pulsar.{label}")),
                format!("pulsar {label} is not in the release"),
            ));
        };
        for (i, w) in pn.white.iter().enumerate() {
            if !p.backends.contains(&w.backend) {
                return Err(Error::input(
                    path,
                    line_with(&format!("\"{}\"", w.backend)),
                    Some(&format!("pulsar.{label}.white[{i}].backend")),
                    format!(
                        "backend \"{}\" does not occur in {label}'s residuals (it has: {})",
                        w.backend,
                        p.backends.join(", ")
                    ),
                ));
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn same(a: &Pulsar, b: &Pulsar) {
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&a.mjd), bits(&b.mjd));
        assert_eq!(bits(&a.residual), bits(&b.residual));
        assert_eq!(bits(&a.sigma), bits(&b.sigma));
        assert_eq!(bits(&a.freq_mhz), bits(&b.freq_mhz));
        assert_eq!(a.backend, b.backend);
        assert_eq!(a.backends, b.backends);
    }

    #[test]
    fn plain_reader_agrees_with_the_csv_reader() {
        // The `csv` crate's reader is the reference: on every table the fast path accepts, it
        // must give the same values bit for bit; on the others it must step aside.
        let path = Path::new("t.csv");
        let accepted = [
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,-1.2e-07,3.0e-07,1310.0,KRK-L\n55000.5,4e-8,3.5e-07,1510,MRL-S\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\r\n55000.0,-1.2e-07,3.0e-07,1310.0,KRK-L\r\n\r\n55001.0, 1e-7 ,1e-6,\t820.0 , KRK-L\r\n",
            " mjd , residual_s,sigma_s,freq_mhz,backend\n\n55000.0,0,1e-6,1400,A\n55000.0,0,1e-6,1400,A",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n59000.123456789012345,-0.000000123456789012345,1.0000000000000002e-6,1400.0000000001,B.1+x\n",
        ];
        for text in accepted {
            let fast = parse_residuals_plain("P", text.as_bytes()).expect(text);
            let reference = parse_residuals_csv(path, "P", text.as_bytes()).unwrap();
            same(&fast, &reference);
        }
        let declined = [
            // Quotes, a stray carriage return, a wrong count, bad and out-of-range values, an
            // empty backend, no rows, a wrong header, a blank first line.
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400,\"A\"\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\r55000.0,0,1e-6,1400,A\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400,A,B\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,abc,1e-6,1400,A\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,inf,1e-6,1400,A\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,0,1400,A\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,-1,A\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n2e6,0,1e-6,1400,A\n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400, \n",
            "mjd,residual_s,sigma_s,freq_mhz,backend\n",
            "mjd,residual,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400,A\n",
            "\nmjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400,A\n",
        ];
        for text in declined {
            assert!(
                parse_residuals_plain("P", text.as_bytes()).is_none(),
                "{text:?}"
            );
        }
        // A quoted backend is legal CSV: the csv reader takes it.
        let quoted = "mjd,residual_s,sigma_s,freq_mhz,backend\n55000.0,0,1e-6,1400,\"A\"\n";
        let p = parse_residuals(path, "P", quoted.as_bytes()).unwrap();
        assert_eq!(p.backends, ["A"]);
    }

    /// The one-pass ends against the standard library's stable sort (`slice::sort_by`, stable
    /// by its documentation), on tables with many ties, with an earliest and a latest row that
    /// are repeated, and at the shortest length.
    #[test]
    fn split5_is_a_split_at_commas() {
        // Against the standard library's `str::split` (the reference): five trimmed fields
        // exactly, None for another count or any carriage return.
        let reference = |line: &str| -> Option<Vec<String>> {
            if line.contains('\r') {
                return None;
            }
            let f: Vec<String> = line
                .split(',')
                .map(|x| x.trim_ascii().to_string())
                .collect();
            (f.len() == 5).then_some(f)
        };
        let lines = [
            "mjd,residual_s,sigma_s,freq_mhz,backend",
            "56000.529730471804,3.338320132217876e-7,1.2897112702394973e-7,1310.0,KRK-L",
            " 1 , 2,3 ,4,  b  ",
            "1,2,3,4",
            "1,2,3,4,5,6",
            ",,,,",
            "1,2,3,4,b\r",
            "12345678,2,3,4,b\rxxxxxxxx",
            "1234567,",
            "a,b,c,d,e,f,g,h,i,j,k,l,m,n,o,p",
            "12345678,12345678,12345678,12345678,12345678",
            "1234567,1234567,1234567,1234567,1234567,",
            "é,ü,ø,å,ñ",
            "",
        ];
        let mut out = [""; 5];
        for line in lines {
            let got = split5(line, &mut out).map(|f| f.map(str::to_string).to_vec());
            assert_eq!(got, reference(line), "{line:?}");
        }
    }

    #[test]
    fn duplicate_rows_by_runs_are_those_of_one_sort() {
        // The reference: one sort of all rows (the form used before, and still for tables not
        // in MJD order), adjacent equal rows, each but the first of its group.
        let reference = |p: &Pulsar| -> Vec<usize> {
            let mut rows: Vec<_> = (0..p.n_toa())
                .map(|i| {
                    let k = (p.mjd[i].to_bits(), p.residual[i].to_bits());
                    (
                        k.0,
                        k.1,
                        p.sigma[i].to_bits(),
                        p.freq_mhz[i].to_bits(),
                        p.backend[i],
                        i,
                    )
                })
                .collect();
            rows.sort_unstable();
            rows.windows(2)
                .filter(|w| {
                    (w[0].0, w[0].1, w[0].2, w[0].3, w[0].4)
                        == (w[1].0, w[1].1, w[1].2, w[1].3, w[1].4)
                })
                .map(|w| w[1].5 + 1)
                .collect()
        };
        let shown = |rows: &[usize]| -> Option<String> {
            (!rows.is_empty()).then(|| {
                let s: Vec<String> = rows.iter().take(5).map(usize::to_string).collect();
                format!(
                    "{} exact duplicate row(s) (data rows {}",
                    rows.len(),
                    s.join(", ")
                )
            })
        };
        let header = "mjd,residual_s,sigma_s,freq_mhz,backend\n";
        let tables = [
            // In MJD order, duplicates within runs of one MJD (not adjacent in the file).
            "50000.0,1e-6,1e-7,1400,A\n50000.0,2e-6,1e-7,1400,A\n50000.0,1e-6,1e-7,1400,A\n\
             50001.0,3e-6,1e-7,1400,B\n50001.0,3e-6,1e-7,1400,B\n50001.0,3e-6,1e-7,1400,A\n\
             50002.0,1e-6,1e-7,1400,A\n50003.0,1e-6,1e-7,1400,A\n",
            // Not in MJD order: the full sort.
            "50003.0,1e-6,1e-7,1400,A\n50000.0,1e-6,1e-7,1400,A\n50003.0,1e-6,1e-7,1400,A\n\
             50001.0,1e-6,1e-7,1400,A\n50000.0,1e-6,1e-7,1400,A\n",
            // No duplicates.
            "50000.0,1e-6,1e-7,1400,A\n50000.0,1e-6,1e-7,1500,A\n50001.0,1e-6,1e-7,1400,A\n",
        ];
        for body in tables {
            let text = format!("{header}{body}");
            let p = parse_residuals_plain("P", text.as_bytes()).expect("a plain table");
            let want = shown(&reference(&p));
            let got = residual_warnings(&p, Path::new("t.csv"))
                .into_iter()
                .find(|w| w.contains("duplicate"));
            match (want, got) {
                (None, None) => {}
                (Some(w), Some(g)) => assert!(g.contains(&w), "{g} lacks {w}"),
                (w, g) => panic!("{body}: expected {w:?}, got {g:?}"),
            }
        }
    }

    #[test]
    fn mjd_ends_are_those_of_a_stable_sort() {
        let tables: Vec<Vec<f64>> = vec![
            vec![3.0, 1.0],
            vec![1.0, 1.0],
            vec![5.0, 1.0, 5.0, 1.0, 3.0, 5.0, 1.0],
            vec![2.0, 2.0, 2.0, 2.0],
            (0..200).map(|i| ((i * 37) % 11) as f64).collect(),
            (0..200).map(|i| ((i * 7919) % 101) as f64 * 0.5).collect(),
        ];
        for mjd in tables {
            let mut order: Vec<usize> = (0..mjd.len()).collect();
            order.sort_by(|&a, &b| mjd[a].total_cmp(&mjd[b]));
            let n = mjd.len();
            let (lo, hi) = mjd_ends(&mjd);
            assert_eq!(lo[0], order[0], "{mjd:?}");
            assert_eq!(mjd[lo[1]], mjd[order[1]], "{mjd:?}");
            assert_eq!(hi[0], order[n - 1], "{mjd:?}");
            assert_eq!(mjd[hi[1]], mjd[order[n - 2]], "{mjd:?}");
        }
    }

    #[test]
    fn plain_reader_agrees_on_a_simulated_table() {
        // A larger table as `simulate` writes it (round-trip float formatting).
        use rand::Rng;
        let mut r = crate::rng::stream(5, crate::rng::Purpose::Pulsar, 0);
        let mut text = String::from("mjd,residual_s,sigma_s,freq_mhz,backend\n");
        for i in 0..2000 {
            let b = ["KRK-L", "MRL-S", "MRL-UHF"][i % 3];
            text.push_str(&format!(
                "{:?},{:?},{:?},{:?},{b}\n",
                55000.0 + r.random::<f64>() * 4000.0,
                (r.random::<f64>() - 0.5) * 1e-5,
                r.random::<f64>() * 1e-6 + 1e-9,
                800.0 + r.random::<f64>() * 2000.0
            ));
        }
        let fast = parse_residuals_plain("P", text.as_bytes()).unwrap();
        let reference = parse_residuals_csv(Path::new("t.csv"), "P", text.as_bytes()).unwrap();
        same(&fast, &reference);
        assert_eq!(fast.mjd.len(), 2000);
    }
}
