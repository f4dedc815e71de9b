//! `import ptacorr`: the engine as a Python module (PyO3 + numpy), for notebooks.
//!
//! Every function here converts Python arguments into the engine's settings, runs the same
//! engine function the `ptacorr` command runs (so the output folders are byte for byte the
//! command's), and converts the results into NumPy arrays and plain dicts. No number is computed
//! here. Long calls run on a worker thread with the GIL released; the calling thread wakes every
//! 100 ms to let Python handle Ctrl-C (see [`run_blocking`]). Engine errors become Python
//! exceptions carrying the engine's file/line/field message ([`to_py_err`]).

use numpy::ndarray::Array1;
use numpy::{AllowTypeChange, PyArray1, PyArrayLike1};
use ptacorr::analysis::{
    self, CommonAutoPower, CorrelateSettings, DEFAULT_BINS, DEFAULT_FREQUENCIES,
    DEFAULT_SPECTRAL_INDEX,
};
use ptacorr::bins::Binning;
use ptacorr::orf::{hellings_downs, Pattern};
use ptacorr::release::{read_release_with, ReadOptions};
use ptacorr::spectrum::PowerLaw;
use pyo3::exceptions::{PyKeyboardInterrupt, PyRuntimeError};
use pyo3::prelude::*;
use pyo3::types::PyDict;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc;
use std::sync::Arc;
use std::time::Duration;

mod convert;
mod errors;

use convert::{columns, json_to_py};
use errors::{to_py_err, Error, FileError, InputError, NumericalError, SettingError};

/// How often the waiting thread looks for Ctrl-C.
const SIGNAL_POLL: Duration = Duration::from_millis(100);

/// What happens to the engine's work when Python raises KeyboardInterrupt during a call.
#[derive(Clone, Copy, PartialEq, Eq)]
enum OnInterrupt {
    /// The engine checks the flag itself (null trials, between checkpointed chunks): wait for it
    /// to stop, then raise.
    Cooperative,
    /// The engine has no stopping point: raise at once; the worker finishes its computation in
    /// the background, sees the flag and writes nothing.
    Abandon,
}

/// Run `work` on a worker thread with the GIL released, waking every [`SIGNAL_POLL`] to run
/// Python's signal handlers. A KeyboardInterrupt (or any exception a handler raises) sets the
/// cancel flag handed to `work` and is raised in the caller.
fn run_blocking<T: Send + 'static>(
    py: Python<'_>,
    mode: OnInterrupt,
    work: impl FnOnce(&AtomicBool) -> ptacorr::Result<T> + Send + 'static,
) -> PyResult<T> {
    let cancel = Arc::new(AtomicBool::new(false));
    let flag = cancel.clone();
    let (tx, rx) = mpsc::channel();
    // The receiver is only used by this thread; the mutex makes it shareable with `detach`.
    let rx = std::sync::Mutex::new(rx);
    let recv = |timeout: Option<Duration>| {
        let rx = rx.lock().unwrap_or_else(|p| p.into_inner());
        match timeout {
            Some(t) => rx.recv_timeout(t),
            None => rx.recv().map_err(|_| mpsc::RecvTimeoutError::Disconnected),
        }
    };
    std::thread::Builder::new()
        .name("ptacorr-engine".into())
        .spawn(move || {
            let _ = tx.send(work(&flag));
        })
        .map_err(|e| PyRuntimeError::new_err(format!("cannot start the engine thread: {e}")))?;
    loop {
        match py.detach(|| recv(Some(SIGNAL_POLL))) {
            Ok(r) => return r.map_err(|e| to_py_err(py, e)),
            Err(mpsc::RecvTimeoutError::Timeout) => {
                if let Err(interrupt) = py.check_signals() {
                    cancel.store(true, Ordering::SeqCst);
                    if mode == OnInterrupt::Cooperative {
                        // The engine stops after its current chunk and keeps what it finished.
                        if let Ok(Err(e)) = py.detach(|| recv(None)) {
                            return Err(PyKeyboardInterrupt::new_err(e.to_string()));
                        }
                    }
                    return Err(interrupt);
                }
            }
            Err(mpsc::RecvTimeoutError::Disconnected) => {
                return Err(PyRuntimeError::new_err(
                    "the engine thread stopped without a result (a bug: please report it)",
                ))
            }
        }
    }
}

/// The error a worker returns when it was cancelled before writing (never seen by the user:
/// the caller raises KeyboardInterrupt instead).
fn interrupted() -> ptacorr::Error {
    ptacorr::Error::setting(
        "interrupted",
        "stopped by KeyboardInterrupt; nothing written",
    )
}

/// A `ptacorr.SettingError` for a setting checked here, with the engine's message form and the
/// `name` and `message` attributes.
fn setting(name: &str, message: impl Into<String>) -> PyErr {
    let e = ptacorr::Error::setting(name, message);
    Python::attach(|py| to_py_err(py, e))
}

/// Print a data warning on stderr, as the command does (it is also kept in provenance).
fn print_warning(w: &str) {
    eprintln!("warning: {w}");
}

fn parse_pattern(name: &str) -> PyResult<Pattern> {
    Pattern::ALL
        .into_iter()
        .find(|p| p.name() == name)
        .ok_or_else(|| {
            setting(
                "pattern",
                format!("expected hd, monopole or dipole, got {name:?}"),
            )
        })
}

// ---------------------------------------------------------------------------------------------
// Releases

/// A release of timing residuals as read by the engine (read-only).
#[pyclass(frozen, module = "ptacorr")]
struct Release {
    inner: Arc<ptacorr::release::Release>,
}

#[pymethods]
impl Release {
    /// The release title from release.toml.
    #[getter]
    fn title(&self) -> &str {
        &self.inner.title
    }
    /// The release folder.
    #[getter]
    fn path(&self) -> PathBuf {
        self.inner.dir.clone()
    }
    /// Pulsar labels in release order.
    #[getter]
    fn labels(&self) -> Vec<String> {
        self.inner.pulsars.iter().map(|p| p.label.clone()).collect()
    }
    /// Total number of TOAs.
    #[getter]
    fn n_toa(&self) -> usize {
        self.inner.n_toa()
    }
    /// `sha256:` hash of every input file (recorded in every output's provenance).
    #[getter]
    fn input_hash(&self) -> &str {
        &self.inner.input_hash
    }
    /// Warnings about the data (isolated TOAs, duplicate rows, ...).
    #[getter]
    fn warnings(&self) -> Vec<String> {
        self.inner.warnings.clone()
    }
    /// One pulsar's data as a dict of NumPy arrays: mjd, residual_s, sigma_s, freq_mhz, and
    /// backend (a list of labels), ra_deg, dec_deg. The arrays are copies.
    fn pulsar<'py>(&self, py: Python<'py>, label: &str) -> PyResult<Bound<'py, PyDict>> {
        let p = self
            .inner
            .pulsars
            .iter()
            .find(|p| p.label == label)
            .ok_or_else(|| setting("label", format!("no pulsar {label:?} in the release")))?;
        let d = PyDict::new(py);
        d.set_item("label", &p.label)?;
        d.set_item("ra_deg", p.ra.to_degrees())?;
        d.set_item("dec_deg", p.dec.to_degrees())?;
        d.set_item("mjd", PyArray1::from_slice(py, &p.mjd))?;
        d.set_item("residual_s", PyArray1::from_slice(py, &p.residual))?;
        d.set_item("sigma_s", PyArray1::from_slice(py, &p.sigma))?;
        d.set_item("freq_mhz", PyArray1::from_slice(py, &p.freq_mhz))?;
        let backends: Vec<&str> = p.backend.iter().map(|&b| p.backends[b].as_str()).collect();
        d.set_item("backend", backends)?;
        Ok(d)
    }
    fn __len__(&self) -> usize {
        self.inner.pulsars.len()
    }
    fn __repr__(&self) -> String {
        format!(
            "<ptacorr.Release {:?}: {} pulsars, {} TOAs at {}>",
            self.inner.title,
            self.inner.pulsars.len(),
            self.inner.n_toa(),
            self.inner.dir.display()
        )
    }
}

fn release_arc(r: &Bound<'_, Release>) -> Arc<ptacorr::release::Release> {
    r.get().inner.clone()
}

/// Read a release folder (release.toml, residual tables, optional design matrices and
/// noise.toml). Bad input raises InputError naming file, line and field.
#[pyfunction]
#[pyo3(signature = (path, *, strict = false, allow_outside_paths = false))]
fn read_release(
    py: Python<'_>,
    path: PathBuf,
    strict: bool,
    allow_outside_paths: bool,
) -> PyResult<Release> {
    let options = ReadOptions {
        allow_outside_paths,
        strict,
        on_warning: Some(print_warning),
    };
    let rel = run_blocking(py, OnInterrupt::Abandon, move |_| {
        read_release_with(&path, options)
    })?;
    Ok(Release {
        inner: Arc::new(rel),
    })
}

/// Simulate a scenario file into a release folder (as `ptacorr simulate`) and read it.
#[pyfunction]
#[pyo3(signature = (scenario, out, *, seed = None, replace = false))]
fn simulate(
    py: Python<'_>,
    scenario: PathBuf,
    out: PathBuf,
    seed: Option<u64>,
    replace: bool,
) -> PyResult<Release> {
    let rel = run_blocking(py, OnInterrupt::Abandon, move |cancel| {
        let s = ptacorr::scenario::Scenario::read(&scenario)?;
        let seed = s.seed(seed);
        ptacorr::output::check_release_target(&out, replace)?;
        let layout = ptacorr::scenario::lay_out(&s, seed);
        if cancel.load(Ordering::SeqCst) {
            return Err(interrupted());
        }
        ptacorr::simulate::simulate_release(&layout, seed, &out, replace)?;
        ptacorr::release::read_release(&out)
    })?;
    Ok(Release {
        inner: Arc::new(rel),
    })
}

/// Write a release folder from NumPy arrays (one array per pulsar for each TOA column) and read
/// it back through the release reader, so it is checked exactly as a release from disk.
#[pyfunction]
#[pyo3(signature = (out, *, labels, ra_deg, dec_deg, mjd, residual_s, sigma_s, freq_mhz, backend, title = "Release built in Python".to_string(), noise = None, replace = false))]
#[allow(clippy::too_many_arguments)]
fn build_release(
    py: Python<'_>,
    out: PathBuf,
    labels: Vec<String>,
    ra_deg: PyArrayLike1<'_, f64, AllowTypeChange>,
    dec_deg: PyArrayLike1<'_, f64, AllowTypeChange>,
    mjd: Vec<PyArrayLike1<'_, f64, AllowTypeChange>>,
    residual_s: Vec<PyArrayLike1<'_, f64, AllowTypeChange>>,
    sigma_s: Vec<PyArrayLike1<'_, f64, AllowTypeChange>>,
    freq_mhz: Vec<PyArrayLike1<'_, f64, AllowTypeChange>>,
    backend: Vec<Vec<String>>,
    title: String,
    noise: Option<String>,
    replace: bool,
) -> PyResult<Release> {
    let n = labels.len();
    let ra = ra_deg.as_array().to_vec();
    let dec = dec_deg.as_array().to_vec();
    for (name, len) in [
        ("ra_deg", ra.len()),
        ("dec_deg", dec.len()),
        ("mjd", mjd.len()),
        ("residual_s", residual_s.len()),
        ("sigma_s", sigma_s.len()),
        ("freq_mhz", freq_mhz.len()),
        ("backend", backend.len()),
    ] {
        if len != n {
            return Err(setting(name, format!("has {len} entries for {n} labels")));
        }
    }
    let mut pulsars = Vec::with_capacity(n);
    for i in 0..n {
        let columns = [&mjd[i], &residual_s[i], &sigma_s[i], &freq_mhz[i]];
        let n_toa = mjd[i].as_array().len();
        for (name, c) in ["mjd", "residual_s", "sigma_s", "freq_mhz"]
            .iter()
            .zip(columns)
        {
            if c.as_array().len() != n_toa {
                return Err(setting(
                    &format!("{name}[{i}]"),
                    format!(
                        "pulsar {} has {} values and {n_toa} TOAs",
                        labels[i],
                        c.as_array().len()
                    ),
                ));
            }
        }
        if backend[i].len() != n_toa {
            return Err(setting(
                &format!("backend[{i}]"),
                format!(
                    "pulsar {} has {} labels and {n_toa} TOAs",
                    labels[i],
                    backend[i].len()
                ),
            ));
        }
        let mut backends: Vec<String> = Vec::new();
        let index: Vec<usize> = backend[i]
            .iter()
            .map(|b| match backends.iter().position(|x| x == b) {
                Some(k) => k,
                None => {
                    backends.push(b.clone());
                    backends.len() - 1
                }
            })
            .collect();
        let (ra_rad, dec_rad) = (ra[i].to_radians(), dec[i].to_radians());
        pulsars.push(ptacorr::release::Pulsar {
            label: labels[i].clone(),
            ra: ra_rad,
            dec: dec_rad,
            direction: ptacorr::sky::direction_from_radec(ra_rad, dec_rad),
            mjd: mjd[i].as_array().to_vec(),
            residual: residual_s[i].as_array().to_vec(),
            sigma: sigma_s[i].as_array().to_vec(),
            freq_mhz: freq_mhz[i].as_array().to_vec(),
            backend: index,
            backends,
            design: None,
        });
    }
    let rel = run_blocking(py, OnInterrupt::Abandon, move |_| {
        let noise_model = match &noise {
            Some(text) => ptacorr::noise::NoiseModel::parse(text, Path::new("noise (argument)"))?,
            None => ptacorr::noise::NoiseModel::default(),
        };
        ptacorr::output::check_release_target(&out, replace)?;
        let staging = ptacorr::output::SiblingStaging::new(&out)?;
        ptacorr::simulate::write_release(staging.path(), &title, &pulsars, &noise_model, None)?;
        // The release reader checks every value (finite, positive sigmas, ...) with its own
        // file/line/field messages before the folder is moved into place.
        ptacorr::release::read_release(staging.path())?;
        staging.replace(&out, replace)?;
        ptacorr::release::read_release(&out)
    })?;
    Ok(Release {
        inner: Arc::new(rel),
    })
}

fn as_release(
    py: Python<'_>,
    release: &Bound<'_, PyAny>,
) -> PyResult<Arc<ptacorr::release::Release>> {
    if let Ok(r) = release.cast::<Release>() {
        return Ok(release_arc(r));
    }
    let path: PathBuf = release.extract().map_err(|_| {
        pyo3::exceptions::PyTypeError::new_err("release must be a ptacorr.Release or a path")
    })?;
    Ok(read_release(py, path, false, false)?.inner)
}

// ---------------------------------------------------------------------------------------------
// Correlation

/// The analysis settings shared by correlate, null and inject, as the command's options.
#[allow(clippy::too_many_arguments)]
fn correlate_settings(
    frequencies: usize,
    spectral_index: f64,
    bins: usize,
    equal_width_bins: bool,
    common_log10_amplitude: Option<f64>,
    no_common: bool,
) -> PyResult<CorrelateSettings> {
    if no_common && common_log10_amplitude.is_some() {
        return Err(setting(
            "no_common",
            "cannot be combined with common_log10_amplitude",
        ));
    }
    Ok(CorrelateSettings {
        n_frequencies: frequencies,
        spectral_index,
        n_bins: bins,
        binning: if equal_width_bins {
            Binning::EqualWidth
        } else {
            Binning::EqualCount
        },
        common: match (no_common, common_log10_amplitude) {
            (true, _) => CommonAutoPower::Off,
            (false, Some(a)) => CommonAutoPower::Given(PowerLaw {
                log10_amplitude: a,
                spectral_index,
            }),
            (false, None) => CommonAutoPower::FromNoiseModel,
        },
    })
}

/// The result of `correlate`: pairs, bins and pattern fits. The pair arrays are views of the
/// engine's own memory (no copies; read-only).
#[pyclass(frozen, module = "ptacorr")]
struct Correlation {
    inner: analysis::Correlation,
    release: Arc<ptacorr::release::Release>,
    settings: CorrelateSettings,
    angle_deg: Array1<f64>,
    rho: Array1<f64>,
    sigma: Array1<f64>,
    hd: Array1<f64>,
}

impl Correlation {
    fn new(
        inner: analysis::Correlation,
        release: Arc<ptacorr::release::Release>,
        settings: CorrelateSettings,
    ) -> Self {
        let p = &inner.pairs;
        // The same numbers pairs.csv prints (analysis.rs `pair_rows`).
        let angle_deg = p.angle.iter().map(|a| a.to_degrees()).collect();
        let hd = p.cos_angle.iter().map(|&c| hellings_downs(c)).collect();
        Correlation {
            rho: Array1::from_vec(p.rho.clone()),
            sigma: Array1::from_vec(p.sigma.clone()),
            angle_deg,
            hd,
            inner,
            release,
            settings,
        }
    }

    /// A read-only NumPy view of `array`, kept alive by this object.
    fn view<'py>(slf: &Bound<'py, Self>, array: &Array1<f64>) -> PyResult<Bound<'py, PyAny>> {
        // SAFETY: the array lives inside a frozen pyclass, which the view keeps alive as its
        // base object; it is never mutated or moved (the view is made read-only below).
        let a = unsafe { PyArray1::borrow_from_array(array, slf.clone().into_any()) };
        a.call_method1("setflags", (false,))?;
        Ok(a.into_any())
    }
}

#[pymethods]
impl Correlation {
    /// Pulsar labels in release order.
    #[getter]
    fn labels(&self) -> Vec<String> {
        self.inner.labels.clone()
    }
    /// Number of pulsars.
    #[getter]
    fn n_pulsars(&self) -> usize {
        self.inner.n_pulsars()
    }
    /// Analysis frequencies f_j = j / T_span (Hz).
    #[getter]
    fn frequencies_hz<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray1<f64>> {
        PyArray1::from_slice(py, &self.inner.grid.freqs)
    }
    /// Span of the array in years.
    #[getter]
    fn span_years(&self) -> f64 {
        self.inner.grid.t_span / ptacorr::constants::SECONDS_PER_YEAR
    }
    /// Spectral index of the template.
    #[getter]
    fn spectral_index(&self) -> f64 {
        self.inner.spectral_index
    }
    /// Every pair a < b: `pulsar_a`, `pulsar_b` (labels), `a`, `b` (indices), and the arrays
    /// `angle_deg`, `rho`, `sigma` (in units of A^2) and `hd` (the pair's Hellings-Downs value),
    /// the columns of pairs.csv. The float arrays are read-only views (no copies).
    #[getter]
    fn pairs<'py>(slf: &Bound<'py, Self>) -> PyResult<Bound<'py, PyDict>> {
        let py = slf.py();
        let this = slf.get();
        let p = &this.inner.pairs;
        let d = PyDict::new(py);
        let labels = &this.inner.labels;
        d.set_item(
            "pulsar_a",
            p.a.iter().map(|&i| labels[i].as_str()).collect::<Vec<_>>(),
        )?;
        d.set_item(
            "pulsar_b",
            p.b.iter().map(|&i| labels[i].as_str()).collect::<Vec<_>>(),
        )?;
        d.set_item("a", PyArray1::from_slice(py, &p.a))?;
        d.set_item("b", PyArray1::from_slice(py, &p.b))?;
        d.set_item("angle_deg", Self::view(slf, &this.angle_deg)?)?;
        d.set_item("rho", Self::view(slf, &this.rho)?)?;
        d.set_item("sigma", Self::view(slf, &this.sigma)?)?;
        d.set_item("hd", Self::view(slf, &this.hd)?)?;
        Ok(d)
    }
    /// The angular bins: the columns of bins.csv as NumPy arrays.
    #[getter]
    fn bins<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyDict>> {
        let rows: Vec<serde_json::Value> = self
            .inner
            .bins
            .iter()
            .map(|b| serde_json::to_value(b).unwrap_or_default())
            .collect();
        columns(py, &rows)
    }
    /// The fit of each pattern (hd, monopole, dipole): amplitude2, amplitude2_sigma, snr.
    #[getter]
    fn patterns<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyDict>> {
        let d = PyDict::new(py);
        for (p, e) in &self.inner.estimates {
            let v = serde_json::to_value(e).unwrap_or_default();
            d.set_item(p.name(), json_to_py(py, &v)?)?;
        }
        Ok(d)
    }
    /// The three patterns fitted at once (patterns, amplitude2, covariance), or None when they
    /// are not separable over this array's pairs.
    #[getter]
    fn multiple_component<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyAny>> {
        let v = serde_json::to_value(&self.inner.multi).unwrap_or_default();
        json_to_py(py, &v)
    }
    /// Write summary.json, pairs.csv and bins.csv into `out` (one output set, as
    /// `ptacorr correlate --out`).
    fn write(&self, py: Python<'_>, out: PathBuf) -> PyResult<()> {
        let c = self.inner.clone();
        let rel = self.release.clone();
        let s = self.settings.clone();
        run_blocking(py, OnInterrupt::Abandon, move |_| c.write(&out, &rel, &s))
    }
    fn __repr__(&self) -> String {
        let hd = self.inner.estimates[&Pattern::Hd];
        format!(
            "<ptacorr.Correlation: {} pulsars, {} pairs, hd A^2 = {:.3e} +- {:.3e} (SNR {:.2})>",
            self.inner.n_pulsars(),
            self.inner.pairs.len(),
            hd.amplitude2,
            hd.amplitude2_sigma,
            hd.snr
        )
    }
}

/// The optimal-statistic analysis of a release (as `ptacorr correlate`); with `out`, also
/// write its folder.
#[pyfunction]
#[pyo3(signature = (release, *, out = None, frequencies = DEFAULT_FREQUENCIES, spectral_index = DEFAULT_SPECTRAL_INDEX, bins = DEFAULT_BINS, equal_width_bins = false, common_log10_amplitude = None, no_common = false, common_fit = None, common_fit_value = "median"))]
#[allow(clippy::too_many_arguments)]
fn correlate(
    py: Python<'_>,
    release: &Bound<'_, PyAny>,
    out: Option<PathBuf>,
    frequencies: usize,
    spectral_index: f64,
    bins: usize,
    equal_width_bins: bool,
    common_log10_amplitude: Option<f64>,
    no_common: bool,
    common_fit: Option<PathBuf>,
    common_fit_value: &str,
) -> PyResult<Correlation> {
    let rel = as_release(py, release)?;
    let mut settings = correlate_settings(
        frequencies,
        spectral_index,
        bins,
        equal_width_bins,
        common_log10_amplitude,
        no_common,
    )?;
    let statistic = match common_fit_value {
        "median" => ptacorr::common::FitStatistic::Median,
        "map" => ptacorr::common::FitStatistic::Map,
        other => {
            return Err(setting(
                "common_fit_value",
                format!("expected median or map, got {other:?}"),
            ))
        }
    };
    if common_fit.is_some() && (no_common || common_log10_amplitude.is_some()) {
        return Err(setting(
            "common_fit",
            "cannot be combined with no_common or common_log10_amplitude",
        ));
    }
    let r = rel.clone();
    let (c, settings) = run_blocking(py, OnInterrupt::Abandon, move |cancel| {
        if let Some(dir) = &common_fit {
            settings.common = CommonAutoPower::FromCommonFit(ptacorr::common::read_fitted_common(
                dir,
                ptacorr::common::CommonModel::Curn,
                statistic,
            )?);
        }
        let c = analysis::correlate(&r, &settings)?;
        if let Some(out) = &out {
            if cancel.load(Ordering::SeqCst) {
                return Err(interrupted());
            }
            c.write(out, &r, &settings)?;
        }
        Ok((c, settings))
    })?;
    Ok(Correlation::new(c, rel, settings))
}

// ---------------------------------------------------------------------------------------------
// Campaigns

/// Null trials and the false-alarm probability of the observed SNR (as `ptacorr null`). Writes
/// null.json and trials.csv into `out`; an interrupted run (Ctrl-C) keeps its finished chunks and
/// the same call resumes it. Returns null.json as a dict.
#[pyfunction]
#[pyo3(signature = (release, *, out, method, trials, seed = 1, pattern = "hd", match_threshold = None, mutual_match = false, time_domain = false, analytic = true, shard = None, frequencies = DEFAULT_FREQUENCIES, spectral_index = DEFAULT_SPECTRAL_INDEX, bins = DEFAULT_BINS, equal_width_bins = false, common_log10_amplitude = None, no_common = false))]
#[allow(clippy::too_many_arguments)]
fn null<'py>(
    py: Python<'py>,
    release: &Bound<'py, PyAny>,
    out: PathBuf,
    method: &str,
    trials: u64,
    seed: u64,
    pattern: &str,
    match_threshold: Option<f64>,
    mutual_match: bool,
    time_domain: bool,
    analytic: bool,
    shard: Option<String>,
    frequencies: usize,
    spectral_index: f64,
    bins: usize,
    equal_width_bins: bool,
    common_log10_amplitude: Option<f64>,
    no_common: bool,
) -> PyResult<Bound<'py, PyAny>> {
    use ptacorr::null::{Control, Method, NullSettings, Shard};
    let method = Method::from_name(method).ok_or_else(|| {
        setting(
            "method",
            format!("expected scramble, phase or simulate, got {method:?}"),
        )
    })?;
    let mut s = NullSettings::new(method, trials, seed);
    s.pattern = parse_pattern(pattern)?;
    if match_threshold.is_some() {
        s.match_threshold = match_threshold;
    }
    s.mutual_match = mutual_match;
    s.time_domain = time_domain;
    s.analytic = analytic;
    s.shard = shard
        .as_deref()
        .map(Shard::parse)
        .transpose()
        .map_err(|e| to_py_err(py, e))?;
    s.analysis = correlate_settings(
        frequencies,
        spectral_index,
        bins,
        equal_width_bins,
        common_log10_amplitude,
        no_common,
    )?;
    s.validate().map_err(|e| to_py_err(py, e))?;
    let rel = as_release(py, release)?;
    let report = run_blocking(py, OnInterrupt::Cooperative, move |cancel| {
        let control = Control {
            cancel: Some(cancel),
            progress: None,
        };
        ptacorr::null::run_null(&rel, &s, &out, control)
    })?;
    json_to_py(py, &serde_json::to_value(&report).unwrap_or_default())
}

/// Merge the shard folders of one null run (as `ptacorr merge`); returns null.json as a dict.
#[pyfunction]
#[pyo3(signature = (dirs, *, out))]
fn merge_null<'py>(
    py: Python<'py>,
    dirs: Vec<PathBuf>,
    out: PathBuf,
) -> PyResult<Bound<'py, PyAny>> {
    let report = run_blocking(py, OnInterrupt::Abandon, move |_| {
        ptacorr::null::merge::merge(&dirs, &out)
    })?;
    json_to_py(py, &serde_json::to_value(&report).unwrap_or_default())
}

/// The dict of an injection outcome: recovery rows as columns, the campaign state, the
/// assumptions and the provenance.
fn outcome_dict<'py>(
    py: Python<'py>,
    o: &ptacorr::inject::Outcome,
) -> PyResult<Bound<'py, PyDict>> {
    let d = PyDict::new(py);
    let rows: Vec<serde_json::Value> = o
        .rows
        .iter()
        .map(|r| serde_json::to_value(r).unwrap_or_default())
        .collect();
    d.set_item("recovery", columns(py, &rows)?)?;
    let plugin: Vec<serde_json::Value> = o
        .plugin
        .iter()
        .map(|r| serde_json::to_value(r).unwrap_or_default())
        .collect();
    d.set_item("coverage_plugin", columns(py, &plugin)?)?;
    d.set_item(
        "campaign",
        json_to_py(py, &serde_json::to_value(&o.state).unwrap_or_default())?,
    )?;
    d.set_item("assumptions", &o.assumptions)?;
    d.set_item("provenance", json_to_py(py, &o.provenance)?)?;
    Ok(d)
}

/// An injection-recovery campaign on a release (a ptacorr.Release or a folder) or a scenario
/// file (as `ptacorr inject`). Writes recovery.csv, recovery.json, realizations.csv,
/// coverage_plugin.csv and campaign.json into `out`.
#[pyfunction]
#[pyo3(signature = (target, *, out, amplitudes, realizations = ptacorr::inject::DEFAULT_REALIZATIONS, spectral_index = DEFAULT_SPECTRAL_INDEX, pattern = "hd", seed = 1, shard = None, mode = "reduced", auto_power = "injected", common_log10_amplitude = None, no_common = false, frequencies = DEFAULT_FREQUENCIES, false_alarm = None, null_trials = ptacorr::inject::DEFAULT_NULL_TRIALS, null = None, signal_frequencies = None, signal_span_factor = None))]
#[allow(clippy::too_many_arguments)]
fn inject<'py>(
    py: Python<'py>,
    target: &Bound<'py, PyAny>,
    out: PathBuf,
    amplitudes: &str,
    realizations: u64,
    spectral_index: f64,
    pattern: &str,
    seed: u64,
    shard: Option<String>,
    mode: &str,
    auto_power: &str,
    common_log10_amplitude: Option<f64>,
    no_common: bool,
    frequencies: usize,
    false_alarm: Option<f64>,
    null_trials: usize,
    null: Option<PathBuf>,
    signal_frequencies: Option<usize>,
    signal_span_factor: Option<usize>,
) -> PyResult<Bound<'py, PyDict>> {
    use ptacorr::inject::{AutoPowerChoice, InjectSettings, Mode, Shard, Target};
    let err = |e| to_py_err(py, e);
    let choice = |name: &str, value: &str, allowed: &[&str]| -> PyResult<usize> {
        allowed.iter().position(|a| *a == value).ok_or_else(|| {
            setting(
                name,
                format!("expected one of {}, got {value:?}", allowed.join(", ")),
            )
        })
    };
    if no_common && common_log10_amplitude.is_some() {
        return Err(setting(
            "no_common",
            "cannot be combined with common_log10_amplitude",
        ));
    }
    let settings = InjectSettings {
        amplitudes: ptacorr::inject::parse_amplitudes(amplitudes).map_err(err)?,
        realizations,
        spectral_index,
        pattern: parse_pattern(pattern)?,
        seed,
        shard: match &shard {
            Some(s) => Shard::parse(s).map_err(err)?,
            None => Shard::ALL,
        },
        mode: [Mode::Reduced, Mode::TimeDomain][choice("mode", mode, &["reduced", "time-domain"])?],
        auto_power: [AutoPowerChoice::Injected, AutoPowerChoice::Fixed]
            [choice("auto_power", auto_power, &["injected", "fixed"])?],
        common: match (no_common, common_log10_amplitude) {
            (true, _) => CommonAutoPower::Off,
            (false, Some(a)) => CommonAutoPower::Given(PowerLaw {
                log10_amplitude: a,
                spectral_index,
            }),
            (false, None) => CommonAutoPower::FromNoiseModel,
        },
        n_frequencies: frequencies,
        false_alarm,
        null_trials,
        null_dir: null,
        signal_simulation: match (signal_frequencies, signal_span_factor) {
            (None, None) => None,
            (k, f) => Some(ptacorr::scenario::SimulationSpec {
                n_frequencies: k.unwrap_or(frequencies),
                span_factor: f.unwrap_or(1),
            }),
        },
    };
    // The target: a Release object, a release folder, or a scenario file (as the command).
    let target = if let Ok(r) = target.cast::<Release>() {
        Target::from_release(&release_arc(r))
    } else {
        let path: PathBuf = target.extract().map_err(|_| {
            pyo3::exceptions::PyTypeError::new_err(
                "target must be a ptacorr.Release, a release folder or a scenario file",
            )
        })?;
        if path.is_dir() || path.file_name().is_some_and(|n| n == "release.toml") {
            Target::from_release(&read_release(py, path, false, false)?.inner)
        } else {
            let text = std::fs::read_to_string(&path)
                .map_err(|e| to_py_err(py, ptacorr::Error::io(&path, e)))?;
            let s = ptacorr::scenario::Scenario::parse(&text, &path).map_err(err)?;
            Target::from_scenario(&s, &text)
        }
    };
    let outcome = run_blocking(py, OnInterrupt::Abandon, move |cancel| {
        ptacorr::linalg::single_threaded_blas();
        let o = ptacorr::inject::run_campaign(target, settings)?;
        if cancel.load(Ordering::SeqCst) {
            return Err(interrupted());
        }
        o.write(&out)?;
        Ok(o)
    })?;
    outcome_dict(py, &outcome)
}

/// Merge the shard folders of one injection campaign into `out` (as `ptacorr inject --merge`).
#[pyfunction]
#[pyo3(signature = (dirs, *, out))]
fn merge_inject<'py>(
    py: Python<'py>,
    dirs: Vec<PathBuf>,
    out: PathBuf,
) -> PyResult<Bound<'py, PyDict>> {
    let outcome = run_blocking(py, OnInterrupt::Abandon, move |_| {
        let o = ptacorr::inject::merge_shards(&dirs)?;
        o.write(&out)?;
        Ok(o)
    })?;
    outcome_dict(py, &outcome)
}

/// MAP noise estimation of every pulsar of a release (as `ptacorr noise`). Writes noise.toml,
/// estimates.csv, diagnostics.csv, priors.toml and provenance.json into `out`; returns the
/// estimates and diagnostics as columns.
#[pyfunction]
#[pyo3(signature = (release, *, out, priors = None, seed = 1, starts = 4, max_iterations = 500, shard = None, mode = "full", values = "median", chains = None, warmup = None, draws = None))]
#[allow(clippy::too_many_arguments)]
fn noise<'py>(
    py: Python<'py>,
    release: &Bound<'py, PyAny>,
    out: PathBuf,
    priors: Option<PathBuf>,
    seed: u64,
    starts: usize,
    max_iterations: u64,
    shard: Option<String>,
    mode: &str,
    values: &str,
    chains: Option<usize>,
    warmup: Option<u64>,
    draws: Option<u64>,
) -> PyResult<Bound<'py, PyDict>> {
    use ptacorr::noise_fit::sample::SampleMode;
    use ptacorr::noise_fit::{
        check_settings, fit_release, map::MapSettings, write_run, ModelValues, NoiseSettings,
    };
    use ptacorr::sampler::SamplerSettings;
    let err = |e| to_py_err(py, e);
    let shard = match &shard {
        Some(s) => ptacorr::shard::Shard::parse(s).map_err(err)?,
        None => ptacorr::shard::Shard::ALL,
    };
    let mode = match mode {
        "full" => SampleMode::Full,
        "fixed-white" => SampleMode::FixedWhite,
        "map-only" => SampleMode::MapOnly,
        other => {
            return Err(setting(
                "mode",
                format!("expected full, fixed-white or map-only, got {other:?}"),
            ))
        }
    };
    let values = match values {
        "median" => ModelValues::Median,
        "map" => ModelValues::Map,
        other => {
            return Err(setting(
                "values",
                format!("expected median or map, got {other:?}"),
            ))
        }
    };
    let d = SamplerSettings::default();
    let settings = NoiseSettings {
        seed,
        map: MapSettings {
            starts,
            max_iterations,
            ..MapSettings::default()
        },
        mode,
        sampler: SamplerSettings {
            chains: chains.unwrap_or(d.chains),
            warmup: warmup.unwrap_or(d.warmup),
            draws: draws.unwrap_or(d.draws),
            ..d
        },
        values,
        shard,
        ..NoiseSettings::default()
    };
    check_settings(&settings).map_err(err)?;
    let priors = match &priors {
        Some(p) => ptacorr::priors::PriorFile::read(p).map_err(err)?,
        None => ptacorr::priors::PriorFile::defaults(),
    };
    let rel = as_release(py, release)?;
    priors.check_release(&rel).map_err(err)?;
    let (estimates, diagnostics, provenance) =
        run_blocking(py, OnInterrupt::Abandon, move |cancel| {
            let mut set = ptacorr::output::OutputSet::begin(&out, "noise")?;
            let run = fit_release(&rel, &priors, &settings, &|| {})?;
            if cancel.load(Ordering::SeqCst) {
                return Err(interrupted());
            }
            write_run(&run, &mut set)?;
            set.commit()?;
            let est: Vec<serde_json::Value> = run
                .fits
                .iter()
                .flat_map(|f| f.estimates())
                .map(|e| serde_json::to_value(e).unwrap_or_default())
                .collect();
            let diag: Vec<serde_json::Value> = run
                .fits
                .iter()
                .map(|f| serde_json::to_value(f.diagnostics(mode)).unwrap_or_default())
                .collect();
            Ok((
                est,
                diag,
                serde_json::to_value(&run.provenance).unwrap_or_default(),
            ))
        })?;
    let d = PyDict::new(py);
    d.set_item("estimates", columns(py, &estimates)?)?;
    d.set_item("diagnostics", columns(py, &diagnostics)?)?;
    d.set_item("provenance", json_to_py(py, &provenance)?)?;
    Ok(d)
}

/// Merge the shard folders of one noise run (as `ptacorr merge-noise`).
#[pyfunction]
#[pyo3(signature = (dirs, *, out))]
fn merge_noise(py: Python<'_>, dirs: Vec<PathBuf>, out: PathBuf) -> PyResult<()> {
    run_blocking(py, OnInterrupt::Abandon, move |_| {
        let d: Vec<&Path> = dirs.iter().map(PathBuf::as_path).collect();
        let mut set = ptacorr::output::OutputSet::begin(&out, "merge-noise")?;
        ptacorr::noise_fit::merge_shards(&d, &mut set)?;
        set.commit().map(|_| ())
    })
}

/// The common red process under CURN, HD, monopole and dipole correlations: posteriors, upper
/// limits and Bayes factors (as `ptacorr common`). Writes its folder into `out` and returns its
/// summary.json as a dict. A Bayes factor assumes the noise model and the priors; a detection
/// claim needs the collaboration's full analysis.
#[pyfunction]
#[pyo3(signature = (release, *, out, frequencies = 14, log10_amplitude_range = (-18.0, -12.0), index_range = (0.0, 7.0), index_points = 41, fixed_index = DEFAULT_SPECTRAL_INDEX, amplitude_points = 121, amplitude_prior = "uniform-log10", draws = 1000, draw_index = "varied", seed = 2026))]
#[allow(clippy::too_many_arguments)]
fn common<'py>(
    py: Python<'py>,
    release: &Bound<'py, PyAny>,
    out: PathBuf,
    frequencies: usize,
    log10_amplitude_range: (f64, f64),
    index_range: (f64, f64),
    index_points: usize,
    fixed_index: f64,
    amplitude_points: usize,
    amplitude_prior: &str,
    draws: usize,
    draw_index: &str,
    seed: u64,
) -> PyResult<Bound<'py, PyAny>> {
    use ptacorr::common::{
        check_draws, draw_curn, fit_common, AmplitudePrior, CommonData, CommonSettings, DrawIndex,
        DrawSettings,
    };
    let s = CommonSettings {
        n_frequencies: frequencies,
        log10_amplitude_min: log10_amplitude_range.0,
        log10_amplitude_max: log10_amplitude_range.1,
        spectral_index_min: index_range.0,
        spectral_index_max: index_range.1,
        n_spectral_index: index_points,
        fixed_spectral_index: fixed_index,
        n_table_amplitudes: amplitude_points,
        amplitude_prior: match amplitude_prior {
            "uniform-log10" => AmplitudePrior::UniformLog10,
            "uniform-amplitude" => AmplitudePrior::UniformAmplitude,
            other => {
                return Err(setting(
                    "amplitude_prior",
                    format!("expected uniform-log10 or uniform-amplitude, got {other:?}"),
                ))
            }
        },
        ..Default::default()
    };
    s.validate().map_err(|e| to_py_err(py, e))?;
    check_draws(draws).map_err(|e| to_py_err(py, e))?;
    let draw_settings = DrawSettings {
        n_draws: draws,
        seed,
        index: match draw_index {
            "varied" => DrawIndex::Varied,
            "fixed" => DrawIndex::Fixed,
            other => {
                return Err(setting(
                    "draw_index",
                    format!("expected varied or fixed, got {other:?}"),
                ))
            }
        },
    };
    let rel = as_release(py, release)?;
    let summary = run_blocking(py, OnInterrupt::Abandon, move |cancel| {
        let mut set = ptacorr::output::OutputSet::begin(&out, "common")?;
        let data = CommonData::from_release(&rel, &rel.noise, s.n_frequencies)?;
        let fit = fit_common(&data, &s)?;
        let sample = draw_curn(
            &data,
            &fit,
            draw_settings.index,
            draw_settings.n_draws,
            draw_settings.seed,
        )?;
        if cancel.load(Ordering::SeqCst) {
            return Err(interrupted());
        }
        fit.write(&mut set, &rel, &data, Some((&draw_settings, &sample)))?;
        set.commit()?;
        // The dict is the summary.json just written.
        let path = out.join("summary.json");
        let text = std::fs::read_to_string(&path).map_err(|e| ptacorr::Error::io(&path, e))?;
        serde_json::from_str::<serde_json::Value>(&text)
            .map_err(|e| ptacorr::Error::input(&path, None, None, e.to_string()))
    })?;
    json_to_py(py, &summary)
}

/// ptacorr: the optimal-statistic search for a gravitational-wave background in pulsar-timing
/// residuals. Every function runs the engine function the `ptacorr` command runs and writes the
/// same output folders; p-values and Bayes factors assume the noise model (and the priors), and a
/// detection claim needs the collaboration's full analysis. See help(ptacorr.correlate) etc.
#[pymodule]
#[pyo3(name = "ptacorr")]
fn ptacorr_module(m: &Bound<'_, PyModule>) -> PyResult<()> {
    let py = m.py();
    m.add("__version__", ptacorr::VERSION)?;
    m.add("DEFAULT_FREQUENCIES", DEFAULT_FREQUENCIES)?;
    m.add("DEFAULT_SPECTRAL_INDEX", DEFAULT_SPECTRAL_INDEX)?;
    m.add("DEFAULT_BINS", DEFAULT_BINS)?;
    m.add("Error", py.get_type::<Error>())?;
    m.add("InputError", py.get_type::<InputError>())?;
    m.add("SettingError", py.get_type::<SettingError>())?;
    m.add("NumericalError", py.get_type::<NumericalError>())?;
    m.add("FileError", py.get_type::<FileError>())?;
    m.add_class::<Release>()?;
    m.add_class::<Correlation>()?;
    m.add_function(wrap_pyfunction!(read_release, m)?)?;
    m.add_function(wrap_pyfunction!(simulate, m)?)?;
    m.add_function(wrap_pyfunction!(build_release, m)?)?;
    m.add_function(wrap_pyfunction!(correlate, m)?)?;
    m.add_function(wrap_pyfunction!(null, m)?)?;
    m.add_function(wrap_pyfunction!(merge_null, m)?)?;
    m.add_function(wrap_pyfunction!(inject, m)?)?;
    m.add_function(wrap_pyfunction!(merge_inject, m)?)?;
    m.add_function(wrap_pyfunction!(noise, m)?)?;
    m.add_function(wrap_pyfunction!(merge_noise, m)?)?;
    m.add_function(wrap_pyfunction!(common, m)?)?;
    // Data warnings are printed on stderr, as by the command (and kept in provenance).
    ptacorr::release::set_default_read_options(ReadOptions {
        allow_outside_paths: false,
        strict: false,
        on_warning: Some(print_warning),
    });
    Ok(())
}
