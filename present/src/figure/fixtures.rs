//! Test fixtures: small fictional ptacorr output folders written with the exact shapes the
//! program produces, from a fixed pseudo-random sequence (no dependence on the engine).

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

use serde_json::{json, Value};

pub(crate) const CORRELATE_PULSARS: usize = 16;
pub(crate) const CORRELATE_PAIRS: usize = CORRELATE_PULSARS * (CORRELATE_PULSARS - 1) / 2;
pub(crate) const CORRELATE_A2_HD: f64 = 4.0e-30;
pub(crate) const NULL_TRIALS: usize = 2000;
pub(crate) const INJECT_ROWS: usize = 6;

/// A folder under the system temporary directory, removed when dropped.
pub(crate) struct TempDir(PathBuf);

impl TempDir {
    pub(crate) fn new(label: &str) -> Self {
        static N: AtomicU64 = AtomicU64::new(0);
        let p = ptacorr::testing::temp_dir(&format!(
            "figure-{label}-{}",
            N.fetch_add(1, Ordering::Relaxed)
        ));
        Self(p)
    }

    pub(crate) fn path(&self) -> &Path {
        &self.0
    }

    pub(crate) fn sub(&self, name: &str) -> PathBuf {
        let p = self.0.join(name);
        std::fs::create_dir_all(&p).expect("create temporary sub-folder");
        p
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Closes a fixture folder as the engine closes an output set: every file in it (but the
/// manifest itself) rewritten through `output::OutputSet`, which writes `manifest.json` last.
/// Tests that edit a file on purpose call it again, as a run would.
pub(crate) fn seal(dir: &Path) {
    let mut files: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
        .expect("read fixture folder")
        .flatten()
        .filter(|e| e.path().is_file())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with('.') && n != ptacorr::output::MANIFEST_FILE)
        .map(|n| {
            let bytes = std::fs::read(dir.join(&n)).expect("read fixture file");
            (n, bytes)
        })
        .collect();
    files.sort();
    let mut set = ptacorr::output::OutputSet::begin(dir, "fixture").expect("lock fixture folder");
    for (name, bytes) in &files {
        set.write(name, bytes).expect("stage fixture file");
    }
    set.commit().expect("commit fixture folder");
}

/// SplitMix64 with Box-Muller normals: a fixed sequence for fixtures.
struct Rng(u64);

impl Rng {
    fn uniform(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^= z >> 31;
        ((z >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
}

fn hd(cos_zeta: f64) -> f64 {
    let x = (1.0 - cos_zeta) / 2.0;
    if x <= 0.0 {
        0.5
    } else {
        0.5 - x / 4.0 + 1.5 * x * x.ln()
    }
}

fn provenance(hash: &str) -> Value {
    json!({
        "program": "ptacorr",
        "version": "0.1.0",
        "release_title": "Fictional release FR-1 (demo data)",
        "input_hash": hash,
        "settings": {
            "noise_model": "per-pulsar white + red power law (fictional)",
            "n_bins": 8,
            "n_frequencies": 10,
            "reference_frequency": "1/span",
            "pulsars": (1..=CORRELATE_PULSARS).map(|i| format!("P{i:02}")).collect::<Vec<_>>(),
        }
    })
}

fn write_json(path: &Path, v: &Value) {
    let text = serde_json::to_string_pretty(v).expect("serialise fixture");
    std::fs::write(path, text + "\n").expect("write fixture JSON");
}

/// Reads a JSON file, lets `f` change it and writes it back.
pub(crate) fn edit_json(path: &Path, f: impl FnOnce(&mut Value)) {
    let mut v: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    f(&mut v);
    write_json(path, &v);
    seal(path.parent().expect("a file in a folder"));
}

/// Number of data rows of a folder's bins.csv.
pub(crate) fn correlate_bin_rows(dir: &Path) -> usize {
    let text = std::fs::read_to_string(dir.join("bins.csv")).unwrap();
    text.lines()
        .skip(1)
        .filter(|l| !l.trim().is_empty())
        .count()
}

/// angle, rho, sigma, G of one fixture pair.
type PairRow = (f64, f64, f64, f64);

/// A correlate folder: 16 fictional pulsars, 120 pairs, up to 8 angular bins.
pub(crate) fn write_correlate(dir: &Path) {
    let mut rng = Rng(20_240_101);
    // Pulsars at isotropic random sky positions.
    let pos: Vec<[f64; 3]> = (0..CORRELATE_PULSARS)
        .map(|_| {
            let z = 2.0 * rng.uniform() - 1.0;
            let r = (1.0 - z * z).sqrt();
            let phi = std::f64::consts::TAU * rng.uniform();
            [r * phi.cos(), r * phi.sin(), z]
        })
        .collect();
    let mut pairs = String::from("pulsar_a,pulsar_b,angle_deg,rho,sigma,hd\n");
    let mut rows: Vec<PairRow> = Vec::new();
    for a in 0..CORRELATE_PULSARS {
        for b in a + 1..CORRELATE_PULSARS {
            let c: f64 = (0..3)
                .map(|k| pos[a][k] * pos[b][k])
                .sum::<f64>()
                .clamp(-1.0, 1.0);
            let angle = c.acos().to_degrees();
            let g = hd(c);
            let sigma = 2.0e-30 * (1.0 + 0.5 * rng.uniform());
            let rho = CORRELATE_A2_HD * g + sigma * rng.normal();
            pairs.push_str(&format!(
                "P{:02},P{:02},{angle},{rho},{sigma},{g}\n",
                a + 1,
                b + 1
            ));
            rows.push((angle, rho, sigma, g));
        }
    }
    std::fs::write(dir.join("pairs.csv"), pairs).unwrap();
    let mut bins = String::from("angle_lo_deg,angle_hi_deg,angle_mean_deg,n_pairs,rho,sigma,hd\n");
    let width = 22.5;
    for k in 0..8 {
        let (lo, hi) = (k as f64 * width, (k + 1) as f64 * width);
        let inside: Vec<_> = rows
            .iter()
            .filter(|r| r.0 >= lo && (r.0 < hi || (k == 7 && r.0 <= hi)))
            .collect();
        if inside.is_empty() {
            continue;
        }
        let wsum: f64 = inside.iter().map(|r| 1.0 / (r.2 * r.2)).sum();
        let mean = |f: &dyn Fn(&PairRow) -> f64| {
            inside.iter().map(|r| f(r) / (r.2 * r.2)).sum::<f64>() / wsum
        };
        bins.push_str(&format!(
            "{lo},{hi},{},{},{},{},{}\n",
            mean(&|r| r.0),
            inside.len(),
            mean(&|r| r.1),
            1.0 / wsum.sqrt(),
            mean(&|r| r.3)
        ));
    }
    std::fs::write(dir.join("bins.csv"), bins).unwrap();
    let freqs: Vec<f64> = (1..=10)
        .map(|i| i as f64 / (13.0 * 365.25 * 86400.0))
        .collect();
    write_json(
        &dir.join("summary.json"),
        &json!({
            "n_pulsars": CORRELATE_PULSARS,
            "n_pairs": CORRELATE_PAIRS,
            "n_frequencies": 10,
            "spectral_index": 13.0 / 3.0,
            "span_years": 13.0,
            "frequencies_hz": freqs,
            "title": "Fictional release FR-1 (demo data)",
            "patterns": {
                "hd": {"amplitude2": CORRELATE_A2_HD, "amplitude2_sigma": 1.1e-30, "snr": 3.64},
                "monopole": {"amplitude2": 3.0e-31, "amplitude2_sigma": 4.0e-31, "snr": 0.75},
                "dipole": {"amplitude2": -2.0e-31, "amplitude2_sigma": 6.0e-31, "snr": -0.33}
            },
            "multiple_component": {
                "patterns": ["hd", "monopole", "dipole"],
                "amplitude2": [3.8e-30, 1.0e-31, -1.5e-31],
                "covariance": [[1.4e-60, -1.0e-61, 2.0e-62], [-1.0e-61, 1.8e-61, 0.0], [2.0e-62, 0.0, 3.9e-61]]
            },
            "common_auto_power": null,
            "per_frequency": null,
            "hd_spread": null,
            "bin_fit": {"skipped": "not computed for the fixture"},
            "notes": "fixture",
            "provenance": provenance("sha256:0f3c9a7e5b21d4c86a0e9f1b2c3d4e5f60718293a4b5c6d7e8f9011223344556")
        }),
    );
    seal(dir);
}

/// A null folder with 2000 Gaussian trials; `with_density` adds the analytic density.
pub(crate) fn write_null(dir: &Path, with_density: bool) {
    let mut rng = Rng(7);
    let observed = 3.2;
    let mut trials = String::from("trial,snr,amplitude2\n");
    let mut extreme = 0;
    for i in 0..NULL_TRIALS {
        let snr = rng.normal();
        if snr >= observed {
            extreme += 1;
        }
        trials.push_str(&format!("{i},{snr},{}\n", snr * 1.1e-30));
    }
    std::fs::write(dir.join("trials.csv"), trials).unwrap();
    let density = with_density.then(|| {
        let snr: Vec<f64> = (0..=90).map(|i| -4.5 + 0.1 * i as f64).collect();
        let d: Vec<f64> = snr
            .iter()
            .map(|x| (-0.5 * x * x).exp() / (std::f64::consts::TAU).sqrt())
            .collect();
        json!({"snr": snr, "density": d})
    });
    let p = (extreme as f64 + 1.0) / (NULL_TRIALS as f64 + 1.0);
    write_json(
        &dir.join("null.json"),
        &json!({
            "method": "scramble",
            "time_domain": false,
            "pattern": "hd",
            "trials": NULL_TRIALS,
            "total_trials": NULL_TRIALS,
            "first_trial": 0,
            "shard": null,
            "seed": 1,
            "observed_snr": observed,
            "observed_amplitude2": observed * 1.1e-30,
            "mutual_match": false,
            "attempts": NULL_TRIALS * 5 / 2,
            "n_at_least_as_extreme": extreme,
            "p_value": p,
            "p_value_ci95": [p * 0.3, p * 2.6],
            "gaussian_sigma": 2.9,
            "match_threshold": 0.1,
            "acceptance_rate": 0.4,
            "analytic": if with_density { json!({"p_value": 6.9e-4, "gaussian_sigma": 3.2, "n_eigenvalues": 120, "absolute_accuracy": 1e-10}) } else { Value::Null },
            "analytic_density": density,
            "assumptions": "Trials keep each pulsar's fitted noise and scramble sky positions; one-sided: S/N at least as large as observed.",
            "provenance": provenance("sha256:0f3c9a7e5b21d4c86a0e9f1b2c3d4e5f60718293a4b5c6d7e8f9011223344556")
        }),
    );
    seal(dir);
}

/// An inject folder with six amplitudes, the first being zero (the false-alarm check) and
/// the second so weak that its mean recovered A^2 is negative.
pub(crate) fn write_inject(dir: &Path) {
    let amps = [0.0, 1.0e-15, 2.0e-15, 4.0e-15, 8.0e-15, 1.6e-14];
    let pdet = [0.001, 0.02, 0.15, 0.6, 0.97, 1.0];
    let header = "amplitude,amplitude2_injected,realizations,amplitude2_mean,amplitude2_std,amplitude2_sem,bias,bias_sem,snr_mean,snr_std,coverage68_weak,coverage95_weak,coverage68_full,coverage95_full,detection_probability";
    let mut csv = format!("{header}\n");
    let mut rows = Vec::new();
    let n = 200.0;
    for (k, (&a, &p)) in amps.iter().zip(&pdet).enumerate() {
        let inj = a * a;
        let mean = if k == 1 {
            -2.0e-31
        } else {
            inj * (1.0 + 0.02 * k as f64)
        };
        let std = 2.5e-30 + 0.3 * inj;
        let sem = std / f64::sqrt(n);
        let bias = mean - inj;
        let snr = mean / 1.1e-30;
        let row = json!({
            "amplitude": a, "amplitude2_injected": inj, "realizations": 200,
            "amplitude2_mean": mean, "amplitude2_std": std, "amplitude2_sem": sem,
            "bias": bias, "bias_sem": sem, "snr_mean": snr, "snr_std": 1.0 + 0.1 * k as f64,
            "coverage68_weak": 0.66, "coverage95_weak": 0.94, "coverage68_full": 0.68,
            "coverage95_full": 0.95, "detection_probability": p
        });
        csv.push_str(&format!(
            "{a},{inj},200,{mean},{std},{sem},{bias},{sem},{snr},{},0.66,0.94,0.68,0.95,{p}\n",
            1.0 + 0.1 * k as f64
        ));
        rows.push(row);
    }
    std::fs::write(dir.join("recovery.csv"), csv).unwrap();
    let mut real = String::from(
        "amplitude,realization,amplitude2,amplitude2_sigma_weak,amplitude2_sigma_full,snr\n",
    );
    for &a in &amps {
        for r in 0..3 {
            real.push_str(&format!(
                "{a},{r},{},1.1e-30,1.2e-30,{}\n",
                a * a,
                a * a / 1.1e-30
            ));
        }
    }
    std::fs::write(dir.join("realizations.csv"), real).unwrap();
    write_json(
        &dir.join("recovery.json"),
        &json!({
            "pattern": "hd",
            "false_alarm_probability": 0.001,
            "detection_threshold_snr": 3.1,
            "realizations": 200,
            "mode": "reduced",
            "rows": rows,
            "assumptions": "fixture",
            "provenance": provenance("sha256:0f3c9a7e5b21d4c86a0e9f1b2c3d4e5f60718293a4b5c6d7e8f9011223344556")
        }),
    );
    seal(dir);
}

/// A `ptacorr common` folder of two models (curn, hd), written with the engine's own types:
/// at the fixed index a Gaussian posterior of log10 A (mean -14, sd 0.05), and on the
/// (gamma, log10 A) grid a correlated bivariate Gaussian (means -14 and 13/3, sds 0.05 and
/// 0.3, correlation -0.6) whose highest-density regions are the ellipses
/// Q = -2 ln(1 - content) of the chi-square with two degrees of freedom (the closed form of a
/// bivariate normal's regions; e.g. Box & Tiao 1973, sec. 2.8). The hd posterior is the curn
/// one shifted by +0.01 in log10 A. Sealed with a manifest.
pub(crate) fn common_folder(dir: &Path) {
    use ptacorr::common::{
        BayesRow, CommonSummary, FixedRow, FixedSummary, GridRow, Interval1d, MarginalRow,
        ModelSummary, Priors, VariedSummary,
    };
    let (mu_u, mu_g, su, sg, rho): (f64, f64, f64, f64, f64) = (-14.0, 13.0 / 3.0, 0.05, 0.3, -0.6);
    // The uniform table plus a fine stretch over the bulk, as the engine writes them.
    let mut us: Vec<f64> = (0..=240).map(|i| -18.0 + 6.0 * i as f64 / 240.0).collect();
    us.extend((0..=120).map(|i| -14.3 + 0.6 * i as f64 / 120.0));
    us.sort_by(f64::total_cmp);
    us.dedup();
    let gs: Vec<f64> = (0..=140).map(|j| 7.0 * j as f64 / 140.0).collect();
    let ln_norm = -(std::f64::consts::TAU * su * sg * (1.0 - rho * rho).sqrt()).ln();
    let q = |u: f64, g: f64, shift: f64| {
        let (x, y) = ((u - mu_u - shift) / su, (g - mu_g) / sg);
        (x * x - 2.0 * rho * x * y + y * y) / (1.0 - rho * rho)
    };
    let interval = |m: f64, s: f64| Interval1d {
        median: m,
        map: m,
        interval_68: [m - s, m + s],
        interval_95: [m - 1.96 * s, m + 1.96 * s],
        upper_limit_95: m + 1.645 * s,
    };
    let mut models = std::collections::BTreeMap::new();
    let (mut fixed, mut grid, mut marg) = (Vec::new(), Vec::new(), Vec::new());
    for (name, shift) in [("curn", 0.0), ("hd", 0.01)] {
        let levels = [0.682_689_49f64, 0.95].map(|c| ln_norm + 0.5 * 2.0 * (1.0 - c).ln());
        models.insert(
            name.to_string(),
            ModelSummary {
                fixed_index: FixedSummary {
                    spectral_index: mu_g,
                    ln_evidence: 100.0 + shift * 100.0,
                    ln_evidence_error: 1e-10,
                    log10_amplitude: interval(mu_u + shift, su),
                    amplitude_upper_limit_95: 10f64.powf(mu_u + shift + 1.645 * su),
                },
                varied_index: VariedSummary {
                    ln_evidence: 99.0 + shift * 100.0,
                    ln_evidence_error: 2e-5,
                    spectral_index_rule_error: 1.5e-5,
                    spectral_index_nodes: gs.len(),
                    log10_amplitude: interval(mu_u + shift, su),
                    amplitude_upper_limit_95: 10f64.powf(mu_u + shift + 1.645 * su),
                    spectral_index: interval(mu_g, sg),
                    credible_region_log_posterior: levels,
                },
            },
        );
        for &u in &us {
            let z = (u - mu_u - shift) / su;
            fixed.push(FixedRow {
                model: name.to_string(),
                spectral_index: mu_g,
                log10_amplitude: u,
                log_likelihood_ratio: -0.5 * z * z,
                density: (-0.5 * z * z).exp() / (su * std::f64::consts::TAU.sqrt()),
                cdf: 0.5,
            });
            marg.push(MarginalRow {
                model: name.to_string(),
                parameter: "log10_amplitude".to_string(),
                value: u,
                density: 0.0,
                cdf: 0.0,
            });
        }
        for &g in &gs {
            for &u in &us {
                grid.push(GridRow {
                    model: name.to_string(),
                    spectral_index: g,
                    log10_amplitude: u,
                    log_likelihood_ratio: 0.0,
                    log_posterior: ln_norm - 0.5 * q(u, g, shift),
                });
            }
        }
    }
    let row = |c: &str, ln: f64| BayesRow {
        comparison: c.to_string(),
        ln_bayes_factor: ln,
        ln_error: 2e-5,
        log10_bayes_factor: ln / std::f64::consts::LN_10,
    };
    let summary = CommonSummary {
        title: "Fictional release FR-1 (demo data)".to_string(),
        n_pulsars: 12,
        n_frequencies: 10,
        span_years: 12.5,
        frequencies_hz: (1..=10).map(|j| j as f64 * 2.5e-9).collect(),
        priors: Priors {
            log10_amplitude: "log10 A uniform on [-18, -12]".to_string(),
            spectral_index: "gamma uniform on [0, 7]".to_string(),
            fixed_spectral_index: mu_g,
            amplitude_prior: "uniform-log10".to_string(),
        },
        models,
        bayes_factors_fixed_index: vec![row("hd/curn", 1.0), row("curn/noise", 100.0)],
        bayes_factors_varied_index: vec![row("hd/curn", 1.0), row("curn/noise", 99.0)],
        draws: None,
        assumptions: ptacorr::common::COMMON_ASSUMPTIONS.to_string(),
        provenance: serde_json::from_value(provenance("c0ffee")).expect("provenance"),
        joint_red: None,
    };
    let text = serde_json::to_string_pretty(&summary).expect("serialise summary");
    std::fs::write(dir.join("summary.json"), text + "\n").unwrap();
    let csv = |name: &str, bytes: ptacorr::Result<Vec<u8>>| {
        std::fs::write(dir.join(name), bytes.expect("fixture table")).unwrap();
    };
    csv(
        "posterior-fixed-index.csv",
        ptacorr::output::csv_table(&fixed, "fixed"),
    );
    csv(
        "posterior-grid.csv",
        ptacorr::output::csv_table(&grid, "grid"),
    );
    csv(
        "marginals.csv",
        ptacorr::output::csv_table(&marg, "marginals"),
    );
    seal(dir);
}
