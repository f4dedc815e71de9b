//! Null distributions of the optimal statistic and the false-alarm probability of an observed
//! SNR (docs/null.md): sky scrambles (Cornish & Sampson 2016; Taylor et al. 2017),
//! phase shifts (Taylor et al. 2017), simulated nulls in the reduced space or the time domain,
//! and the analytic generalised chi-square null (Hazboun et al. 2023; Imhof 1961).
//!
//! Every trial draws from `rng::stream(seed, purpose, i)` alone, so trial `i` is the same number
//! whatever the thread count, the shard or the chunk it falls in. Trials are processed in chunks;
//! each finished chunk is written atomically to `OUT/.partial/`, so rerunning the same command
//! after an interruption resumes where it stopped (docs/null.md).

pub mod analytic;
pub mod merge;
pub mod phase;
pub mod scramble;
pub mod simulated;

use crate::analysis::{correlate_core, CorrelateSettings, Correlation, Provenance};
use crate::error::{Error, Result};
use crate::optimal::{pair_numerators, pair_traces, weight, Weighted};
use crate::orf::{pattern_for_pairs, Pattern};
use crate::output::{write_atomic, OutputSet};
use crate::pvalue::{clopper_pearson, gaussian_equivalent_sigma, trial_p_value};
use crate::release::Release;
use crate::sky::Direction;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::fmt::Write as _;
use std::ops::Range;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};

/// How null trials are made.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    /// Random sky positions, same rho_ab and sigma_ab.
    Scramble,
    /// Random per-pulsar, per-frequency rotations of the Fourier coefficients.
    Phase,
    /// Gaussian draws from the noise model (reduced space, or time domain for checking).
    Simulate,
}

impl Method {
    /// Parse `scramble`, `phase` or `simulate`.
    pub fn from_name(s: &str) -> Option<Method> {
        match s {
            "scramble" => Some(Method::Scramble),
            "phase" => Some(Method::Phase),
            "simulate" => Some(Method::Simulate),
            _ => None,
        }
    }

    /// The name written in null.json and taken by `from_name`.
    pub fn name(self) -> &'static str {
        match self {
            Method::Scramble => "scramble",
            Method::Phase => "phase",
            Method::Simulate => "simulate",
        }
    }
}

pub use crate::shard::Shard;

/// Everything that defines a null run (recorded in its provenance).
#[derive(Clone, Debug, Serialize)]
pub struct NullSettings {
    pub method: Method,
    /// For `simulate`: simulate full time-domain residuals instead of reduced-space draws.
    pub time_domain: bool,
    /// Total number of trials N over all shards.
    pub trials: u64,
    pub seed: u64,
    pub pattern: Pattern,
    /// For scrambles: keep only scrambles whose |match| with the true pattern is below this.
    pub match_threshold: Option<f64>,
    /// For scrambles: also require |match| below the threshold against every earlier accepted
    /// scramble (sequential; no shards).
    pub mutual_match: bool,
    /// Compute the analytic generalised chi-square null.
    pub analytic: bool,
    pub shard: Option<Shard>,
    pub analysis: CorrelateSettings,
}

/// Default match threshold of sky scrambles (Taylor et al. 2017 used 0.1).
pub const DEFAULT_MATCH_THRESHOLD: f64 = 0.1;

impl NullSettings {
    /// Settings with defaults for a method.
    pub fn new(method: Method, trials: u64, seed: u64) -> Self {
        NullSettings {
            method,
            time_domain: false,
            trials,
            seed,
            pattern: Pattern::Hd,
            match_threshold: (method == Method::Scramble).then_some(DEFAULT_MATCH_THRESHOLD),
            mutual_match: false,
            analytic: true,
            shard: None,
            analysis: CorrelateSettings::default(),
        }
    }

    /// Check the combination of options.
    pub fn validate(&self) -> Result<()> {
        self.analysis.validate()?;
        if self.trials == 0 || self.trials > 1 << 40 {
            return Err(Error::setting("trials", "must be in 1..=2^40"));
        }
        if self.time_domain && self.method != Method::Simulate {
            return Err(Error::setting(
                "time-domain",
                "only applies to --method simulate",
            ));
        }
        match (self.method, self.match_threshold) {
            (Method::Scramble, Some(m)) if !(m > 0.0 && m <= 1.0) => {
                return Err(Error::setting(
                    "match-threshold",
                    format!("must be in (0, 1], got {m}"),
                ))
            }
            (Method::Scramble, _) => {}
            (_, Some(_)) => {
                return Err(Error::setting(
                    "match-threshold",
                    "only applies to --method scramble",
                ))
            }
            _ => {}
        }
        if self.mutual_match && self.method != Method::Scramble {
            return Err(Error::setting(
                "mutual-match",
                "only applies to --method scramble",
            ));
        }
        if self.mutual_match && self.shard.is_some() {
            return Err(Error::setting(
                "mutual-match",
                "mutual matching is sequential over all trials and cannot be sharded",
            ));
        }
        if self.method == Method::Scramble && self.pattern == Pattern::Monopole {
            return Err(Error::setting(
                "pattern",
                "sky scrambles leave the monopole unchanged; use --method phase or simulate",
            ));
        }
        Ok(())
    }

    /// The global trial indices this run computes.
    pub fn range(&self) -> Range<u64> {
        self.shard.map_or(0..self.trials, |s| s.range(self.trials))
    }

    /// Trials per checkpointed chunk (a function of the settings only).
    pub fn chunk_size(&self) -> u64 {
        let len = self.range().end - self.range().start;
        let min = if self.time_domain { 8 } else { 1000 };
        (len / 100).clamp(min, 100_000)
    }
}

/// One trial's result.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Trial {
    /// Global trial index.
    pub index: u64,
    pub snr: f64,
    pub amplitude2: f64,
    /// Draws made for this trial (scrambles rejected by the match threshold count too).
    pub attempts: u64,
}

/// A generator of null trials: trial `i` is a function of (the data, the settings, i) alone.
pub trait TrialSource: Sync {
    fn trial(&self, index: u64) -> Result<Trial>;
}

/// The observed array weighted by the template, with per-pair quantities that do not change
/// across trials (Anholm et al. 2009; Chamberlin et al. 2015): the OS SNR of any data x~ is
/// sum_{a<b} c_ab x~_a . x~_b with c_ab = G_ab / (sum G^2 tr_ab)^(1/2), tr_ab = 1/sigma_ab^2.
pub struct Prepared {
    pub n: usize,
    /// 2K.
    pub dim: usize,
    pub weighted: Vec<Weighted>,
    pub directions: Vec<Direction>,
    /// X_a^T Phi X_b of the data, per pair (row-major a < b).
    pub numerators: Vec<f64>,
    /// tr(Z_a Phi Z_b Phi) = 1/sigma_ab^2 per pair.
    pub traces: Vec<f64>,
    /// The true pattern G_ab per pair.
    pub g: Vec<f64>,
    /// c_ab = G_ab / sqrt(sum G^2 tr).
    pub coef: Vec<f64>,
    /// sigma_0 = (sum G^2 tr)^(-1/2), the no-signal uncertainty of A^2.
    pub sigma0: f64,
    pub observed_snr: f64,
    pub observed_amplitude2: f64,
}

impl Prepared {
    /// Weight the reduced pulsars of a correlation analysis by its template.
    pub fn new(c: &Correlation, pattern: Pattern) -> Result<Prepared> {
        let n = c.reduced.len();
        if n < 2 {
            return Err(Error::setting(
                "release",
                "a null needs at least two pulsars",
            ));
        }
        let weighted: Vec<Weighted> = c.reduced.iter().map(|r| weight(r, &c.phi)).collect();
        let directions: Vec<Direction> = c.reduced.iter().map(|r| r.direction).collect();
        let numerators = pair_numerators(&weighted);
        let traces = pair_traces(&weighted);
        let g = pattern_for_pairs(pattern, &directions);
        let d: f64 = g.iter().zip(&traces).map(|(g, t)| g * g * t).sum();
        if !(d.is_finite() && d > 0.0) {
            return Err(Error::NonFinite {
                what: "sum G^2 / sigma^2 of the optimal statistic".into(),
            });
        }
        let coef: Vec<f64> = g.iter().map(|g| g / d.sqrt()).collect();
        let num: f64 = g.iter().zip(&numerators).map(|(g, x)| g * x).sum();
        Ok(Prepared {
            n,
            dim: c.phi.len(),
            weighted,
            directions,
            observed_snr: num / d.sqrt(),
            observed_amplitude2: num / d,
            numerators,
            traces,
            g,
            coef,
            sigma0: d.powf(-0.5),
        })
    }

    /// The SNR of data x~ (n rows of `dim`, row-major): sum_{a<b} c_ab x~_a . x~_b.
    pub fn snr_of(&self, x: &[f64]) -> f64 {
        let dim = self.dim;
        let mut total = 0.0;
        let mut k = 0;
        for a in 0..self.n {
            let xa = &x[a * dim..(a + 1) * dim];
            let mut row = 0.0;
            for b in a + 1..self.n {
                let xb = &x[b * dim..(b + 1) * dim];
                row += self.coef[k] * dot(xa, xb);
                k += 1;
            }
            total += row;
        }
        total
    }
}

/// Dot product with four independent accumulators (same result for every call).
pub fn dot(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0; 4];
    let ca = a.chunks_exact(4);
    let cb = b.chunks_exact(4);
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for l in 0..4 {
            acc[l] += x[l] * y[l];
        }
    }
    let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    for (x, y) in ra.iter().zip(rb) {
        s += x * y;
    }
    s
}

/// Cancellation and progress reporting for a run.
#[derive(Default, Clone, Copy)]
pub struct Control<'a> {
    /// Checked between chunks; when set the run stops with [`Error::Setting`] `interrupted`
    /// after checkpointing the finished chunks.
    pub cancel: Option<&'a AtomicBool>,
    /// Called after each chunk with (trials done, trials in this run).
    pub progress: Option<&'a (dyn Fn(u64, u64) + Sync)>,
}

/// The generalised chi-square null, kept beside a run for merging and re-plotting.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DensityGrid {
    pub snr: Vec<f64>,
    pub density: Vec<f64>,
}

/// The generalised chi-square null of the observed SNR (Imhof 1961; Hazboun et al. 2023).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct AnalyticTail {
    /// P(SNR >= observed) under the null.
    pub p_value: f64,
    /// The one-sided Gaussian-equivalent significance; null when infinite.
    pub gaussian_sigma: Option<f64>,
    /// Number of eigenvalues of the quadratic form.
    pub n_eigenvalues: usize,
    /// Absolute accuracy of the numerical inversion: a p_value below it only says the tail is
    /// smaller than this.
    pub absolute_accuracy: f64,
}

/// Absolute accuracy of the analytic tail (Imhof inversion on shared nodes, null/analytic.rs).
pub const ANALYTIC_ABSOLUTE_ACCURACY: f64 = 1e-10;

/// The contents of `null.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct NullReport {
    pub method: Method,
    pub time_domain: bool,
    pub pattern: Pattern,
    /// Trials in this file (accepted trials for scrambles).
    pub trials: u64,
    /// Trials requested over all shards, and this file's global trial indices.
    pub total_trials: u64,
    pub first_trial: u64,
    pub shard: Option<Shard>,
    pub seed: u64,
    pub observed_snr: f64,
    pub observed_amplitude2: f64,
    /// k: trials with SNR >= observed.
    pub n_at_least_as_extreme: u64,
    /// (k + 1)/(N + 1).
    pub p_value: f64,
    /// Clopper-Pearson 95% interval of k/N.
    pub p_value_ci95: [f64; 2],
    /// -Phi^-1(p); null when infinite.
    pub gaussian_sigma: Option<f64>,
    pub match_threshold: Option<f64>,
    pub mutual_match: bool,
    /// Accepted scrambles / draws.
    pub acceptance_rate: Option<f64>,
    pub attempts: u64,
    /// The analytic null, when computed.
    pub analytic: Option<AnalyticTail>,
    pub analytic_density: Option<DensityGrid>,
    pub assumptions: String,
    pub provenance: serde_json::Value,
}

/// What every null.json says its p-values assume.
pub fn assumptions(method: Method, time_domain: bool, n: u64) -> String {
    let how = match (method, time_domain) {
        (Method::Scramble, _) => "sky scrambles (Cornish & Sampson 2016; Taylor et al. 2017): the same rho_ab and sigma_ab with pulsars moved to isotropic random positions, kept when the match with the true pattern is below the threshold; this tests the pattern, not the presence of common power",
        (Method::Phase, _) => "phase shifts (Taylor et al. 2017): each pulsar's (sin, cos) coefficient pair at each frequency rotated by an independent uniform phase, which keeps each pulsar's power and destroys inter-pulsar correlation; sigma_ab kept fixed",
        (Method::Simulate, false) => "simulated nulls in the reduced space: X_a ~ N(0, Z_a) independently per pulsar, exact when the noise model (including the common auto-power) is right",
        (Method::Simulate, true) => "simulated nulls in the time domain: residuals drawn from the noise model (white, ECORR, red and DM noise, and an uncorrelated common process when one is in the auto-power) on the analysis frequencies, timing model fitted out, then reduced",
    };
    format!(
        "Trial p-value from {n} trials of {how}. One-sided: trials with SNR >= the observed SNR count as at least as extreme; p = (k + 1)/(N + 1) with a Clopper-Pearson 95% interval for k/N, so it cannot resolve p below about 1/(N + 1). The analytic p-value assumes the noise model is right and the data Gaussian (generalised chi-square of the OS quadratic form, Hazboun et al. 2023; Imhof 1961, absolute accuracy about 1e-10). Both depend on the noise model given; a detection claim needs the collaboration's full analysis."
    )
}

/// Analytic ingredients shared by a run and a merge.
#[derive(Clone, Debug, PartialEq)]
pub struct AnalyticNull {
    pub eigenvalues: Vec<f64>,
}

/// Build a report from trials sorted by index (shared by runs and merges, so a merge of
/// shards equals the unsharded run exactly).
#[allow(clippy::too_many_arguments)]
pub fn build_report(
    method: Method,
    time_domain: bool,
    pattern: Pattern,
    total_trials: u64,
    shard: Option<Shard>,
    seed: u64,
    observed_snr: f64,
    observed_amplitude2: f64,
    match_threshold: Option<f64>,
    mutual_match: bool,
    trials: &[Trial],
    attempts: u64,
    analytic: Option<&AnalyticNull>,
    provenance: serde_json::Value,
) -> Result<NullReport> {
    let n = trials.len() as u64;
    let k = trials.iter().filter(|t| t.snr >= observed_snr).count() as u64;
    let perr = |e: crate::pvalue::PValueError| Error::setting("p-value", e.to_string());
    let p = trial_p_value(k, n).map_err(perr)?;
    let (lo, hi) = clopper_pearson(k, n, 0.95).map_err(perr)?;
    let sigma = |p: f64| {
        gaussian_equivalent_sigma(p)
            .ok()
            .filter(|z: &f64| z.is_finite())
    };
    let (ap, asig, neig, dens) = match analytic {
        Some(a) => {
            let p = analytic::upper_tail(&a.eigenvalues, observed_snr)?;
            let grid = analytic::density_grid(&a.eigenvalues, trials, observed_snr)?;
            (Some(p), sigma(p), Some(a.eigenvalues.len()), Some(grid))
        }
        None => (None, None, None, None),
    };
    Ok(NullReport {
        method,
        time_domain,
        pattern,
        trials: n,
        total_trials,
        first_trial: trials.first().map_or(0, |t| t.index),
        shard,
        seed,
        observed_snr,
        observed_amplitude2,
        n_at_least_as_extreme: k,
        p_value: p,
        p_value_ci95: [lo, hi],
        gaussian_sigma: sigma(p),
        match_threshold,
        mutual_match,
        acceptance_rate: (method == Method::Scramble && attempts > 0)
            .then(|| n as f64 / attempts as f64),
        attempts,
        analytic: ap.map(|p_value| AnalyticTail {
            p_value,
            gaussian_sigma: asig,
            n_eigenvalues: neig.unwrap_or(0),
            absolute_accuracy: ANALYTIC_ABSOLUTE_ACCURACY,
        }),
        analytic_density: dens,
        assumptions: assumptions(method, time_domain, n),
        provenance,
    })
}

/// One row of `trials.csv`: a trial's global index, its S/N and its A^2 estimate. The one
/// schema of the file: [`trials_csv`] takes its header from this type and writes its cells as
/// [`crate::output::csv_table`] would (checked by a test), and [`parse_trials`] reads it with
/// [`crate::output::read_csv`]'s parser.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrialRow {
    pub trial: u64,
    pub snr: f64,
    pub amplitude2: f64,
}

impl From<&Trial> for TrialRow {
    fn from(t: &Trial) -> Self {
        TrialRow {
            trial: t.index,
            snr: t.snr,
            amplitude2: t.amplitude2,
        }
    }
}

/// A header and one line per trial, the lines formatted in parallel in blocks and joined in
/// order (the same bytes as one sequential loop: formatting a number does not depend on the
/// thread; at 10^6 trials the sequential loop was a serial second of a run that scrambles in a
/// few seconds on two cores).
fn trial_lines(header: &str, trials: &[Trial], line: fn(&mut String, &Trial)) -> String {
    const BLOCK: usize = 8192;
    let blocks: Vec<String> = trials
        .par_chunks(BLOCK)
        .map(|b| {
            let mut s = String::with_capacity(b.len() * 48);
            for t in b {
                line(&mut s, t);
            }
            s
        })
        .collect();
    let mut s = String::with_capacity(header.len() + blocks.iter().map(String::len).sum::<usize>());
    s.push_str(header);
    for b in &blocks {
        s.push_str(b);
    }
    s
}

/// `trials.csv`: the rows of [`TrialRow`] (the scramble's hot path, so the cells are written in
/// place rather than through the csv writer; the bytes equal `csv_table` of the rows).
pub fn trials_csv(trials: &[Trial]) -> String {
    let header = format!("{}\n", crate::output::csv_columns::<TrialRow>().join(","));
    trial_lines(&header, trials, |s, t| {
        // Every field of the row, in its order (a field added to TrialRow fails to compile
        // here); `{:?}` is fmt_f64's round-trip form, written in place (no String per value).
        let TrialRow {
            trial,
            snr,
            amplitude2,
        } = TrialRow::from(t);
        let _ = writeln!(s, "{trial},{snr:?},{amplitude2:?}");
    })
}

impl From<TrialRow> for Trial {
    fn from(r: TrialRow) -> Self {
        Trial {
            index: r.trial,
            snr: r.snr,
            amplitude2: r.amplitude2,
            attempts: 1,
        }
    }
}

/// The trials of the rows of a table read from `path`, each with a finite SNR and A^2
/// (trials.csv and the checkpoints; a bad value names its line and column).
fn finite_trials<R: Into<Trial>>(rows: Vec<(usize, R)>, path: &Path) -> Result<Vec<Trial>> {
    rows.into_iter()
        .map(|(line, r)| {
            let t: Trial = r.into();
            for (field, v) in [("snr", t.snr), ("amplitude2", t.amplitude2)] {
                if !v.is_finite() {
                    return Err(Error::input(
                        path,
                        Some(line),
                        Some(field),
                        "not a finite number",
                    ));
                }
            }
            Ok(t)
        })
        .collect()
}

/// Parse a `trials.csv` read from `path` with its row type [`TrialRow`] (through
/// [`crate::output::parse_csv`]): the one reader of trials files (null merging, the injection
/// threshold, the figures). SNR and amplitude2 must be finite. Checkpoint chunks, which add an
/// `attempts` column, are read with their own row type.
pub fn parse_trials(text: &str, path: &Path) -> Result<Vec<Trial>> {
    finite_trials(
        crate::output::parse_csv::<TrialRow>(text.as_bytes(), path)?,
        path,
    )
}

/// Read a null folder's `trials.csv` ([`parse_trials`]).
pub fn read_trials(path: &Path) -> Result<Vec<Trial>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    parse_trials(&text, path)
}

/// One row of a checkpoint chunk (`.partial/chunk-*.csv`): a trial with the draws it took.
/// Written by [`crate::output::csv_table`] and read back by [`crate::output::read_csv`].
#[derive(Serialize, Deserialize)]
struct CheckpointRow {
    trial: u64,
    snr: f64,
    amplitude2: f64,
    attempts: u64,
}

impl From<CheckpointRow> for Trial {
    fn from(r: CheckpointRow) -> Self {
        Trial {
            index: r.trial,
            snr: r.snr,
            amplitude2: r.amplitude2,
            attempts: r.attempts,
        }
    }
}

fn checkpoint_csv(trials: &[Trial]) -> Result<Vec<u8>> {
    let rows: Vec<CheckpointRow> = trials
        .iter()
        .map(|t| CheckpointRow {
            trial: t.index,
            snr: t.snr,
            amplitude2: t.amplitude2,
            attempts: t.attempts,
        })
        .collect();
    crate::output::csv_table(&rows, "a checkpoint chunk")
}

/// Read a checkpoint chunk; SNR and amplitude2 must be finite (as in trials.csv).
fn read_checkpoint(path: &Path) -> Result<Vec<Trial>> {
    finite_trials(crate::output::read_csv::<CheckpointRow>(path)?, path)
}

/// One row of the analytic null's eigenvalue file ([`EIGENVALUES_FILE`]).
#[derive(Serialize, Deserialize)]
pub(crate) struct EigenvalueRow {
    pub(crate) eigenvalue: f64,
}

/// The name of the eigenvalue file written beside null.json when the analytic null is on.
pub const EIGENVALUES_FILE: &str = "analytic_eigenvalues.csv";

/// A fingerprint of the data and settings of a run, used to refuse resuming a different run.
pub fn fingerprint(input_hash: &str, settings: &NullSettings) -> String {
    let mut h = Sha256::new();
    h.update(input_hash.as_bytes());
    h.update(
        serde_json::to_string(settings)
            .unwrap_or_default()
            .as_bytes(),
    );
    h.update(crate::VERSION.as_bytes());
    let d = h.finalize();
    d.iter().map(|b| format!("{b:02x}")).collect()
}

/// Make the trial source of a method.
pub fn make_source<'a>(
    release: &'a Release,
    c: &'a Correlation,
    prepared: &'a Prepared,
    settings: &NullSettings,
) -> Result<Box<dyn TrialSource + 'a>> {
    Ok(match settings.method {
        Method::Scramble => Box::new(scramble::Scrambles::new(
            prepared,
            settings.pattern,
            settings.seed,
            settings.match_threshold.unwrap_or(1.0),
        )?),
        Method::Phase => Box::new(phase::PhaseShifts::new(prepared, settings.seed)),
        Method::Simulate if settings.time_domain => Box::new(simulated::TimeDomain::new(
            release,
            c,
            prepared,
            &settings.analysis,
            settings.seed,
        )?),
        Method::Simulate => Box::new(simulated::Reduced::new(
            prepared,
            crate::whiten::analysis_roots(release, c)?,
            settings.seed,
        )?),
    })
}

/// Run trials `range` in checkpointed chunks under `partial` (created if needed). Finished
/// chunks found there are read back instead of recomputed.
///
/// A finished chunk is formatted and written (with an fsync, [`write_atomic`]) by a writer
/// thread while the next chunk is computed, so the trials never wait for the disk; at most one
/// write is in flight, and every write has ended (and its error is reported) before this
/// returns, also when the run is interrupted.
pub fn run_chunks(
    source: &dyn TrialSource,
    range: Range<u64>,
    chunk: u64,
    partial: Option<&Path>,
    control: Control,
) -> Result<Vec<Trial>> {
    type Pending<'s> = Option<(
        std::thread::ScopedJoinHandle<'s, Result<()>>,
        std::path::PathBuf,
    )>;
    fn finish(pending: &mut Pending<'_>) -> Result<()> {
        match pending.take() {
            Some((h, f)) => h.join().unwrap_or_else(|_| {
                Err(Error::io(
                    &f,
                    std::io::Error::other("the checkpoint writer stopped"),
                ))
            }),
            None => Ok(()),
        }
    }
    let total = range.end - range.start;
    std::thread::scope(|scope| {
        let mut pending: Pending<'_> = None;
        let mut out = Vec::with_capacity(total as usize);
        let mut start = range.start;
        while start < range.end {
            let end = (start + chunk).min(range.end);
            let file = partial.map(|p| p.join(format!("chunk-{start:013}-{end:013}.csv")));
            let existing = match &file {
                Some(f) if f.exists() => {
                    let t = read_checkpoint(f)?;
                    let ok = t.len() as u64 == end - start
                        && t.iter().zip(start..end).all(|(t, i)| t.index == i);
                    ok.then_some(t)
                }
                _ => None,
            };
            let trials = match existing {
                Some(t) => t,
                None => {
                    if control.cancel.is_some_and(|c| c.load(Ordering::SeqCst)) {
                        finish(&mut pending)?;
                        return Err(Error::setting(
                            "interrupted",
                            format!(
                                "stopped after {} of {total} trials; finished chunks are kept, rerun the same command to resume",
                                start - range.start
                            ),
                        ));
                    }
                    let t: Vec<Trial> = match (start..end)
                        .into_par_iter()
                        .map(|i| source.trial(i))
                        .collect::<Result<_>>()
                    {
                        Ok(t) => t,
                        Err(e) => {
                            finish(&mut pending)?;
                            return Err(e);
                        }
                    };
                    if let Some(f) = file {
                        finish(&mut pending)?;
                        let copy = t.clone();
                        let path = f.clone();
                        let h = scope.spawn(move || write_atomic(&path, &checkpoint_csv(&copy)?));
                        pending = Some((h, f));
                    }
                    t
                }
            };
            out.extend(trials);
            start = end;
            if let Some(p) = control.progress {
                p(start - range.start, total);
            }
        }
        finish(&mut pending)?;
        Ok(out)
    })
}

/// Run a null analysis of a release and write `null.json`, `trials.csv` (and the analytic
/// eigenvalues) into `out`, resuming from `out/.partial/` when it holds the same run.
pub fn run_null(
    release: &Release,
    settings: &NullSettings,
    out: &Path,
    control: Control,
) -> Result<NullReport> {
    settings.validate()?;
    // The lock (one run per folder) is taken before any work or checkpoint.
    let mut set = OutputSet::begin(out, "null")?;
    let c = correlate_core(release, &settings.analysis)?;
    let prepared = Prepared::new(&c, settings.pattern)?;
    let partial = out.join(".partial");
    let fp = fingerprint(&release.input_hash, settings);
    let stamp = partial.join("run.txt");
    if stamp.exists() {
        let old = std::fs::read_to_string(&stamp).map_err(|e| Error::io(&stamp, e))?;
        if old.trim() != fp {
            return Err(Error::setting(
                "out",
                format!(
                    "{} holds checkpoints of a different run (other release or settings); remove it or choose another --out",
                    partial.display()
                ),
            ));
        }
    } else {
        write_atomic(&stamp, format!("{fp}\n").as_bytes())?;
    }
    let trials = if settings.mutual_match {
        scramble::mutual(&prepared, settings, control)?
    } else {
        let source = make_source(release, &c, &prepared, settings)?;
        run_chunks(
            source.as_ref(),
            settings.range(),
            settings.chunk_size(),
            Some(&partial),
            control,
        )?
    };
    let analytic = if settings.analytic {
        Some(AnalyticNull {
            eigenvalues: analytic::eigenvalues(
                &prepared,
                &crate::whiten::analysis_roots(release, &c)?,
            )?,
        })
    } else {
        None
    };
    let report = build_report(
        settings.method,
        settings.time_domain,
        settings.pattern,
        settings.trials,
        settings.shard,
        settings.seed,
        prepared.observed_snr,
        prepared.observed_amplitude2,
        settings.match_threshold,
        settings.mutual_match,
        &trials,
        trials.iter().map(|t| t.attempts).sum(),
        analytic.as_ref(),
        serde_json::to_value(Provenance::new(release, settings)).unwrap_or_default(),
    )?;
    write_outputs(&mut set, &report, &trials, analytic.as_ref())?;
    set.commit()?;
    let _ = std::fs::remove_dir_all(&partial);
    Ok(report)
}

/// Stage trials.csv, the eigenvalues and null.json in an output set (committed by the caller).
pub fn write_outputs(
    out: &mut OutputSet,
    report: &NullReport,
    trials: &[Trial],
    analytic: Option<&AnalyticNull>,
) -> Result<()> {
    out.write("trials.csv", trials_csv(trials).as_bytes())?;
    if let Some(a) = analytic {
        let rows: Vec<EigenvalueRow> = a
            .eigenvalues
            .iter()
            .map(|&eigenvalue| EigenvalueRow { eigenvalue })
            .collect();
        out.write(
            EIGENVALUES_FILE,
            &crate::output::csv_table(&rows, EIGENVALUES_FILE)?,
        )?;
    }
    out.write_json("null.json", report)
}

#[cfg(test)]
pub(crate) mod testdata;

#[cfg(test)]
mod tests;
