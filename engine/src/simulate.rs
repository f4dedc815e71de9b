//! Time-domain simulation of residuals (docs/simulation.md): white noise with ECORR, red and
//! chromatic noise from Fourier coefficients drawn from their power-law priors, a common
//! background correlated across pulsars, then the timing model fitted out by weighted least
//! squares as a timing package would.

use crate::basis::{chromatic_scale, ecorr_epochs, fourier_basis, timing_model, ECORR_EPOCH_GAP_S};
use crate::constants::SECONDS_PER_DAY;
use crate::error::{Error, Result};
use crate::linalg::PsdRoot;
use crate::noise::NoiseModel;
use crate::orf::pattern_matrix;
use crate::output::{fmt_f64, write_atomic};
use crate::release::{Pulsar, ResidualRow};
use crate::rng::{stream, Purpose};
use crate::scenario::{BackgroundPattern, BackgroundSpec, Layout, SimulationSpec};
use crate::spectrum::{power_law_phi, PowerLaw};
use ndarray::{Array1, Array2};
use ndarray_linalg::Solve;
use rand::Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;
use serde::Serialize;
use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

/// The index of item `k` of realization `realization` in a generator family.
pub fn item(realization: u64, k: u64) -> u64 {
    (realization << 24) | (k & 0xff_ffff)
}

/// The frequency ladder of a simulation: f_j = j / (span_factor T_span),
/// j = 1 .. n_frequencies * span_factor, and its spacing.
pub fn simulation_ladder(sim: &SimulationSpec, t_span: f64) -> (Vec<f64>, f64) {
    let t_sim = t_span * sim.span_factor as f64;
    let n = sim.n_frequencies * sim.span_factor;
    ((1..=n).map(|j| j as f64 / t_sim).collect(), t_sim)
}

/// A square root L with L L^T = G of a symmetric positive semi-definite pattern matrix
/// ([`PsdRoot`], so rank-deficient monopole and dipole matrices work).
pub fn pattern_root(g: &Array2<f64>) -> Result<Array2<f64>> {
    PsdRoot::new(g, "the background's correlation matrix").map(PsdRoot::into_factor)
}

/// What to put into simulated residuals.
#[derive(Clone, Copy, Debug)]
pub struct Ingredients<'a> {
    pub noise: &'a NoiseModel,
    pub background: Option<BackgroundSpec>,
    pub simulation: SimulationSpec,
    /// Include white noise, intrinsic red and DM noise (false: background only).
    pub include_noise: bool,
}

/// Simulate one realization of the residuals of every pulsar (timing model fitted out). The
/// generators are keyed by (seed, purpose, realization, pulsar), so the result does not depend on
/// the number of threads.
pub fn simulate_residuals(
    pulsars: &[Pulsar],
    t0_mjd: f64,
    t_span: f64,
    what: Ingredients,
    seed: u64,
    purpose: Purpose,
    realization: u64,
) -> Result<Vec<Vec<f64>>> {
    crate::linalg::single_threaded_blas();
    let (ladder, t_sim) = simulation_ladder(&what.simulation, t_span);
    let n_psr = pulsars.len();
    let n_c = 2 * ladder.len();
    // Background coefficients: for each frequency and quadrature, c ~ N(0, phi(f) G).
    let mut bg = Array2::<f64>::zeros((n_psr, n_c));
    if let Some(b) = what
        .background
        .filter(|b| b.pattern != BackgroundPattern::None)
    {
        let a2 = 10f64.powf(2.0 * b.log10_amplitude);
        let root = match b.pattern.pattern() {
            Some(p) => {
                let dirs: Vec<_> = pulsars.iter().map(|p| p.direction).collect();
                let g = Array2::from_shape_vec((n_psr, n_psr), pattern_matrix(p, &dirs))
                    .expect("square");
                Some(pattern_root(&g)?)
            }
            None => None,
        };
        let mut r = stream(seed, Purpose::Background, item(realization, 0));
        for c in 0..n_c {
            let f = ladder[c / 2];
            let sd = power_law_phi(a2, b.spectral_index, f, t_sim).sqrt();
            let z: Array1<f64> = (0..n_psr)
                .map(|_| r.sample::<f64, _>(StandardNormal))
                .collect();
            let col = match &root {
                Some(l) => l.dot(&z),
                None => z,
            };
            for a in 0..n_psr {
                bg[[a, c]] = sd * col[a];
            }
        }
    }
    pulsars
        .par_iter()
        .enumerate()
        .map(|(a, p)| {
            let t: Vec<f64> = p
                .mjd
                .iter()
                .map(|m| (m - t0_mjd) * SECONDS_PER_DAY)
                .collect();
            let mut rng = stream(seed, purpose, item(realization, 1 + a as u64));
            let pn = what.noise.pulsar(&p.label);
            let mut achromatic = bg.row(a).to_owned();
            let mut chromatic = Array1::<f64>::zeros(n_c);
            let mut r = vec![0.0; p.n_toa()];
            if what.include_noise {
                let draw = |rng: &mut rand_chacha::ChaCha8Rng,
                            law: PowerLaw,
                            out: &mut Array1<f64>| {
                    let a2 = law.amplitude().powi(2);
                    for c in 0..n_c {
                        let sd = power_law_phi(a2, law.spectral_index, ladder[c / 2], t_sim).sqrt();
                        out[c] += sd * rng.sample::<f64, _>(StandardNormal);
                    }
                };
                if let Some(red) = pn.red {
                    draw(&mut rng, red.power_law(), &mut achromatic);
                }
                if let Some(dm) = pn.dm {
                    draw(&mut rng, dm.power_law(), &mut chromatic);
                }
                let whites: Vec<_> = p.backends.iter().map(|b| pn.white_for(b)).collect();
                for i in 0..p.n_toa() {
                    let w = &whites[p.backend[i]];
                    let sd = ((w.efac * p.sigma[i]).powi(2) + w.equad().powi(2)).sqrt();
                    r[i] += sd * rng.sample::<f64, _>(StandardNormal);
                }
                let use_ecorr: Vec<bool> = whites.iter().map(|w| w.ecorr().is_some()).collect();
                if use_ecorr.iter().any(|&u| u) {
                    for (b, idx) in ecorr_epochs(&t, &p.backend, &use_ecorr, ECORR_EPOCH_GAP_S) {
                        let j =
                            whites[b].ecorr().unwrap_or(0.0) * rng.sample::<f64, _>(StandardNormal);
                        for i in idx {
                            r[i] += j;
                        }
                    }
                }
            }
            let basis = fourier_basis(&t, &ladder);
            let ach = basis.dot(&achromatic);
            let chr = basis.dot(&chromatic);
            let scale = chromatic_scale(&p.freq_mhz);
            for i in 0..p.n_toa() {
                r[i] += ach[i] + scale[i] * chr[i];
            }
            fit_out_timing_model(p, &t, &mut r)?;
            Ok(r)
        })
        .collect()
}

/// Remove the weighted least-squares fit of the timing model (weights 1 / sigma^2) from `r`.
pub fn fit_out_timing_model(p: &Pulsar, t: &[f64], r: &mut [f64]) -> Result<()> {
    let m = timing_model(p, t)?;
    let w: Vec<f64> = p.sigma.iter().map(|s| 1.0 / (s * s)).collect();
    let mut mw = m.clone();
    for (i, mut row) in mw.rows_mut().into_iter().enumerate() {
        row *= w[i];
    }
    let normal = mw.t().dot(&m);
    let rhs = mw.t().dot(&Array1::from(r.to_vec()));
    let coef = normal.solve(&rhs).map_err(|_| Error::NotPositiveDefinite {
        what: format!("the timing-model normal matrix of pulsar {}", p.label),
        pivot: 0,
    })?;
    let fit = m.dot(&coef);
    for (ri, fi) in r.iter_mut().zip(fit.iter()) {
        *ri -= fi;
    }
    Ok(())
}

/// The truth file of a simulated release: every injected parameter.
#[derive(Serialize)]
struct Truth<'a> {
    truth: TruthHeader<'a>,
    #[serde(skip_serializing_if = "Option::is_none")]
    background: Option<BackgroundSpec>,
    simulation: SimulationSpec,
    pulsar: BTreeMap<&'a str, TruthPulsar<'a>>,
}

#[derive(Serialize)]
struct TruthHeader<'a> {
    title: &'a str,
    seed: u64,
    program: &'static str,
    version: &'static str,
}

#[derive(Serialize)]
struct TruthPulsar<'a> {
    ra_deg: f64,
    dec_deg: f64,
    n_toa: usize,
    #[serde(flatten)]
    noise: &'a crate::noise::PulsarNoise,
}

/// Sexagesimal right ascension `hh:mm:ss.ssssss` from radians.
pub fn format_ra(ra: f64) -> String {
    let total = ra.to_degrees().rem_euclid(360.0) / 15.0 * 3600.0;
    let total = (total * 1e6).round() / 1e6;
    let h = (total / 3600.0).floor();
    let m = ((total - h * 3600.0) / 60.0).floor();
    let s = total - h * 3600.0 - m * 60.0;
    format!("{:02}:{:02}:{:09.6}", h as u32 % 24, m as u32, s.max(0.0))
}

/// Sexagesimal declination `+dd:mm:ss.sssss` from radians.
pub fn format_dec(dec: f64) -> String {
    let sign = if dec < 0.0 { '-' } else { '+' };
    let total = (dec.to_degrees().abs() * 3600.0 * 1e5).round() / 1e5;
    let d = (total / 3600.0).floor();
    let m = ((total - d * 3600.0) / 60.0).floor();
    let s = total - d * 3600.0 - m * 60.0;
    format!("{sign}{:02}:{:02}:{:08.5}", d as u32, m as u32, s.max(0.0))
}

/// Write a release folder: `release.toml`, `residuals/LABEL.csv`, `design/LABEL.csv` for a
/// pulsar with a design matrix, `noise.toml`, and (for simulations) `truth.toml`. Each file is written atomically.
pub fn write_release(
    dir: &Path,
    title: &str,
    pulsars: &[Pulsar],
    noise: &NoiseModel,
    truth: Option<(&Layout, u64)>,
) -> Result<()> {
    for p in pulsars {
        crate::noise::check_label(&p.label).map_err(|m| Error::setting("pulsar label", m))?;
    }
    let mut rel = String::new();
    let _ = writeln!(rel, "[release]\ntitle = {}\n", toml_string(title));
    for p in pulsars {
        let _ = writeln!(
            rel,
            "[[pulsar]]\nlabel = {}\nra = \"{}\"\ndec = \"{}\"\nresiduals = \"residuals/{}.csv\"",
            toml_string(&p.label),
            format_ra(p.ra),
            format_dec(p.dec),
            p.label
        );
        if let Some(d) = &p.design {
            let _ = writeln!(rel, "design_matrix = \"design/{}.csv\"", p.label);
            let mut w = csv::Writer::from_writer(Vec::new());
            let bad = |e: csv::Error| Error::setting("design matrix", e.to_string());
            w.write_record(&d.names).map_err(bad)?;
            for row in d.values.rows() {
                w.write_record(row.iter().map(|&v| fmt_f64(v)))
                    .map_err(bad)?;
            }
            let csv = w.into_inner().map_err(|e| bad(e.into_error().into()))?;
            write_atomic(&dir.join("design").join(format!("{}.csv", p.label)), &csv)?;
        }
        rel.push('\n');
        let rows: Vec<ResidualRow> = (0..p.n_toa())
            .map(|i| ResidualRow {
                mjd: p.mjd[i],
                residual_s: p.residual[i],
                sigma_s: p.sigma[i],
                freq_mhz: p.freq_mhz[i],
                backend: p.backends[p.backend[i]].clone(),
            })
            .collect();
        let csv = crate::output::csv_table(&rows, "residuals")?;
        write_atomic(
            &dir.join("residuals").join(format!("{}.csv", p.label)),
            &csv,
        )?;
    }
    let noise_text = toml::to_string(noise).map_err(|e| Error::setting("noise", e.to_string()))?;
    write_atomic(&dir.join("noise.toml"), noise_text.as_bytes())?;
    if let Some((layout, seed)) = truth {
        let t = Truth {
            truth: TruthHeader {
                title,
                seed,
                program: "ptacorr",
                version: crate::VERSION,
            },
            background: layout.background,
            simulation: layout.simulation,
            pulsar: pulsars
                .iter()
                .map(|p| {
                    (
                        p.label.as_str(),
                        TruthPulsar {
                            ra_deg: p.ra.to_degrees(),
                            dec_deg: p.dec.to_degrees(),
                            n_toa: p.n_toa(),
                            noise: noise
                                .pulsars
                                .get(&p.label)
                                .expect("every simulated pulsar has noise"),
                        },
                    )
                })
                .collect(),
        };
        let text = toml::to_string(&t).map_err(|e| Error::setting("truth", e.to_string()))?;
        write_atomic(&dir.join("truth.toml"), text.as_bytes())?;
    }
    // release.toml last: a folder without it is not a release, so an interrupted write is
    // never mistaken for a complete one.
    write_atomic(&dir.join("release.toml"), rel.as_bytes())
}

fn toml_string(s: &str) -> String {
    toml::Value::String(s.to_string()).to_string()
}

/// Simulate a scenario's array and write it as a release, replacing a release already in
/// `dir` (library callers; the command line asks first, see [`simulate_release`]).
pub fn simulate_scenario(layout: &Layout, seed: u64, dir: &Path) -> Result<Vec<Pulsar>> {
    simulate_release(layout, seed, dir, true)
}

/// Simulate a scenario's array and write it as a release in `dir`, as a whole: the release is
/// written into a hidden sibling folder and moved into place only when every file is written.
/// A folder already holding a release is replaced only with `replace`; a non-empty folder that
/// is not a release is never touched. A failure leaves `dir` as it was.
pub fn simulate_release(
    layout: &Layout,
    seed: u64,
    dir: &Path,
    replace: bool,
) -> Result<Vec<Pulsar>> {
    crate::output::check_release_target(dir, replace)?;
    for p in &layout.pulsars {
        if p.n_toa() < 8 {
            return Err(Error::setting(
                "scenario",
                format!(
                    "pulsar {} would have {} TOAs, too few for a release (its backends' active ranges or the cadence leave it almost unobserved)",
                    p.label,
                    p.n_toa()
                ),
            ));
        }
    }
    let staging = crate::output::SiblingStaging::new(dir)?;
    let pulsars = simulate_scenario_into(layout, seed, staging.path())?;
    staging.replace(dir, replace)?;
    Ok(pulsars)
}

fn simulate_scenario_into(layout: &Layout, seed: u64, dir: &Path) -> Result<Vec<Pulsar>> {
    let (lo, hi) = layout
        .pulsars
        .iter()
        .flat_map(|p| p.mjd.iter().copied())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), m| {
            (a.min(m), b.max(m))
        });
    let what = Ingredients {
        noise: &layout.noise,
        background: layout.background,
        simulation: layout.simulation,
        include_noise: true,
    };
    let res = simulate_residuals(
        &layout.pulsars,
        lo,
        (hi - lo) * SECONDS_PER_DAY,
        what,
        seed,
        Purpose::Pulsar,
        0,
    )?;
    let mut pulsars = layout.pulsars.clone();
    for (p, r) in pulsars.iter_mut().zip(res) {
        p.residual = r;
    }
    write_release(
        dir,
        &layout.title,
        &pulsars,
        &layout.noise,
        Some((layout, seed)),
    )?;
    Ok(pulsars)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::{lay_out, Scenario};

    fn demo(dm_quadratic: bool) -> Layout {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/demo.toml");
        let mut s = Scenario::read(&path).expect("demo scenario");
        s.timing_model.dm_quadratic = dm_quadratic;
        lay_out(&s, 2026)
    }

    /// With `dm_quadratic`, a dispersion-measure quadratic (nu_ref / nu)^2 (a + b t + c t^2) lies
    /// in the column span of the timing model, so the weighted least-squares fit removes it
    /// exactly (a projection reproduces any vector of its range; e.g. Golub & Van Loan 2013,
    /// Matrix Computations, sec. 5.3). Tolerance 1e-9 of the input: rounding of a six-column
    /// normal-equation solve with condition number below ~1e6 (columns scaled to unit norm)
    /// is ~1e-10 in f64. Without the DM columns the same signal is left largely in place (the
    /// quadratic spin model takes out only its achromatic part), which is the leak the option
    /// exists to stop.
    #[test]
    fn dm_quadratic_timing_model_removes_a_chromatic_quadratic() {
        for fit_dm in [true, false] {
            let layout = demo(fit_dm);
            let t0 = layout.pulsars[0].mjd[0];
            let mut multi = 0;
            for p in &layout.pulsars {
                let mut f = p.freq_mhz.clone();
                f.sort_by(f64::total_cmp);
                f.dedup();
                assert_eq!(
                    p.design.is_some(),
                    fit_dm && f.len() >= 2,
                    "pulsar {}: design matrix present iff dm_quadratic and two frequencies",
                    p.label
                );
                if f.len() < 2 {
                    continue;
                }
                multi += 1;
                let t: Vec<f64> = p.mjd.iter().map(|m| (m - t0) * SECONDS_PER_DAY).collect();
                let span = t.iter().cloned().fold(0.0, f64::max);
                let signal: Vec<f64> = (0..p.n_toa())
                    .map(|i| {
                        let x = t[i] / span;
                        let s = (crate::constants::DM_REFERENCE_MHZ / p.freq_mhz[i]).powi(2);
                        1e-6 * s * (0.3 - 1.1 * x + 0.9 * x * x)
                    })
                    .collect();
                let size = signal.iter().map(|v| v.abs()).fold(0.0, f64::max);
                let mut r = signal.clone();
                fit_out_timing_model(p, &t, &mut r).expect("fit");
                let left = r.iter().map(|v| v.abs()).fold(0.0, f64::max);
                if fit_dm {
                    assert!(left < 1e-9 * size, "{}: {left:e} of {size:e} left", p.label);
                } else {
                    assert!(left > 1e-3 * size, "{}: {left:e} of {size:e} left", p.label);
                }
            }
            assert!(multi > 10, "the demo has multi-frequency pulsars ({multi})");
        }
    }
}
