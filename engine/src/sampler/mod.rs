//! Posterior sampling with the No-U-Turn Sampler (Hoffman & Gelman 2014, JMLR 15, 1593) of the
//! `nuts-rs` crate: model-agnostic glue (docs/noise-estimation.md, "Sampling").
//!
//! - [`LogDensity`]: a log density and its gradient on R^d (an unconstrained parameterisation).
//! - [`SamplerSettings`]: warm-up length, draws, chains, tree depth, target acceptance.
//! - [`sample`]: several chains of one item in parallel; chain c of item i draws its random
//!   numbers from `rng::stream(seed, purpose, (i << 16) | c)` alone, so the draws do not depend
//!   on the thread count or on how items are sharded.
//! - [`diagnostics`]: split R-hat, bulk and tail ESS (Vehtari et al. 2021).
//!
//! Warm-up is `nuts-rs`'s: step size by dual averaging (Hoffman & Gelman 2014, sec. 3.2) towards
//! the target acceptance rate, and a diagonal mass matrix adapted from the draws and their
//! gradients during the first `warmup` iterations; warm-up draws are discarded. A leapfrog step
//! whose energy error exceeds 1000 (or is not finite, or whose density evaluation fails) ends
//! its trajectory as a divergence (the threshold is common practice, as in Stan; from memory).

pub mod diagnostics;

use crate::error::{Error, Result};
use crate::rng::{stream, Purpose};
use nuts_rs::{new_sampler, Chain, CpuLogpFunc, LogpError, SampleStats, SamplerArgs};
use rand::{Rng, RngCore};
use rayon::prelude::*;

/// A log density (up to a constant) and its gradient on R^d.
pub trait LogDensity: Sync {
    /// The dimension d.
    fn dim(&self) -> usize;
    /// ln p(x), writing d ln p / dx into `grad` (length d). An error ends the trajectory as a
    /// divergence when [`is_recoverable`] says so, otherwise it stops the chain.
    fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64>;
}

/// Errors a sampler treats as "the density is not defined here" (a divergence, the trajectory
/// stops) rather than as a fault: a matrix that is not positive definite or a non-finite value at
/// extreme parameters.
pub fn is_recoverable(e: &Error) -> bool {
    matches!(
        e,
        Error::NotPositiveDefinite { .. } | Error::NonFinite { .. }
    )
}

/// Settings of a sampling run.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SamplerSettings {
    /// Warm-up (adaptation) iterations per chain, discarded.
    pub warmup: u64,
    /// Kept draws per chain.
    pub draws: u64,
    /// Chains per item.
    pub chains: usize,
    /// Maximum tree depth (at most 2^depth - 1 leapfrog steps per draw).
    pub max_depth: u64,
    /// Target acceptance rate of the step-size adaptation.
    pub target_accept: f64,
    /// Chains start at the given point plus independent uniform jitter in [-j, j] per
    /// coordinate.
    pub init_jitter: f64,
}

impl Default for SamplerSettings {
    fn default() -> Self {
        SamplerSettings {
            warmup: 500,
            draws: 500,
            chains: 4,
            max_depth: 8,
            target_accept: 0.8,
            init_jitter: 0.5,
        }
    }
}

/// Allowed ranges of the settings.
pub const MAX_CHAINS: usize = 64;
pub const MAX_DRAWS: u64 = 1_000_000;
pub const MAX_DEPTH: u64 = 14;

impl SamplerSettings {
    /// Check every setting against its range (names as the CLI options).
    pub fn check(&self) -> Result<()> {
        if self.chains < 2 || self.chains > MAX_CHAINS {
            return Err(Error::setting(
                "chains",
                format!(
                    "{} is outside [2, {MAX_CHAINS}] (R-hat needs two chains)",
                    self.chains
                ),
            ));
        }
        if self.draws < 8 || self.draws > MAX_DRAWS {
            return Err(Error::setting(
                "draws",
                format!("{} is outside [8, {MAX_DRAWS}]", self.draws),
            ));
        }
        if self.warmup < 20 || self.warmup > MAX_DRAWS {
            return Err(Error::setting(
                "warmup",
                format!("{} is outside [20, {MAX_DRAWS}]", self.warmup),
            ));
        }
        if self.max_depth < 1 || self.max_depth > MAX_DEPTH {
            return Err(Error::setting(
                "max-depth",
                format!("{} is outside [1, {MAX_DEPTH}]", self.max_depth),
            ));
        }
        if !(self.target_accept > 0.5 && self.target_accept < 1.0) {
            return Err(Error::setting(
                "target-accept",
                format!("{} is outside (0.5, 1)", self.target_accept),
            ));
        }
        if !(self.init_jitter >= 0.0 && self.init_jitter <= 10.0) {
            return Err(Error::setting(
                "init-jitter",
                format!("{} is outside [0, 10]", self.init_jitter),
            ));
        }
        Ok(())
    }
}

/// The kept draws of one chain.
#[derive(Clone, Debug, PartialEq)]
pub struct ChainDraws {
    pub chain: usize,
    pub dim: usize,
    /// Draws in the sampled (unconstrained) coordinates, row-major: draw i is
    /// `values[i * dim..(i + 1) * dim]`.
    pub values: Vec<f64>,
    /// ln p at each draw.
    pub log_density: Vec<f64>,
    /// Whether each draw's trajectory ended in a divergence.
    pub diverging: Vec<bool>,
    /// Divergences during warm-up (not counted in `diverging`).
    pub warmup_divergences: usize,
    /// Kept draws whose tree reached the maximum depth.
    pub max_depth_hits: usize,
    /// Leapfrog steps (gradient evaluations) over warm-up and draws.
    pub gradient_evaluations: u64,
}

impl ChainDraws {
    /// Number of kept draws.
    pub fn len(&self) -> usize {
        self.log_density.len()
    }

    /// No kept draws.
    pub fn is_empty(&self) -> bool {
        self.log_density.is_empty()
    }

    /// Draw i.
    pub fn draw(&self, i: usize) -> &[f64] {
        &self.values[i * self.dim..(i + 1) * self.dim]
    }

    /// The draws of coordinate k.
    pub fn coordinate(&self, k: usize) -> Vec<f64> {
        self.values
            .iter()
            .skip(k)
            .step_by(self.dim)
            .copied()
            .collect()
    }

    /// Divergences among the kept draws.
    pub fn divergences(&self) -> usize {
        self.diverging.iter().filter(|&&d| d).count()
    }
}

/// The stream index of chain `chain` of item `item`.
pub fn chain_stream_index(item: u64, chain: usize) -> u64 {
    (item << 16) | chain as u64
}

/// The largest item index [`sample`] accepts (the chain index takes the low 16 bits).
pub const MAX_ITEM: u64 = (1 << 48) - 1;

/// The density as `nuts-rs` sees it.
struct Adapter<'a, D: LogDensity> {
    density: &'a D,
}

/// A failed density evaluation, as `nuts-rs` needs it.
#[derive(Debug, thiserror::Error)]
#[error("{message}")]
struct DensityError {
    message: String,
    recoverable: bool,
}

impl LogpError for DensityError {
    fn is_recoverable(&self) -> bool {
        self.recoverable
    }
}

impl<D: LogDensity> CpuLogpFunc for Adapter<'_, D> {
    type Err = DensityError;

    fn dim(&self) -> usize {
        self.density.dim()
    }

    fn logp(&mut self, position: &[f64], grad: &mut [f64]) -> std::result::Result<f64, Self::Err> {
        match self.density.log_density_and_gradient(position, grad) {
            Ok(v) if v.is_finite() && grad.iter().all(|g| g.is_finite()) => Ok(v),
            Ok(_) => Err(DensityError {
                message: "non-finite log density or gradient".into(),
                recoverable: true,
            }),
            Err(e) => Err(DensityError {
                recoverable: is_recoverable(&e),
                message: e.to_string(),
            }),
        }
    }
}

/// Run one chain: seeded from (seed, purpose, item, chain) alone.
pub fn run_chain<D: LogDensity>(
    density: &D,
    start: &[f64],
    settings: &SamplerSettings,
    seed: u64,
    purpose: Purpose,
    item: u64,
    chain: usize,
) -> Result<ChainDraws> {
    let dim = density.dim();
    let mut ours = stream(seed, purpose, chain_stream_index(item, chain));
    // nuts-rs 0.8 takes a rand 0.8 generator: a ChaCha8 keyed by 32 bytes of our stream.
    let mut key = [0u8; 32];
    ours.fill_bytes(&mut key);
    let mut theirs =
        <rand_chacha_03::ChaCha8Rng as rand_chacha_03::rand_core::SeedableRng>::from_seed(key);
    let mut init: Vec<f64> = start.to_vec();
    for x in &mut init {
        *x += settings.init_jitter * (2.0 * ours.random::<f64>() - 1.0);
    }
    let mut args = SamplerArgs {
        num_tune: settings.warmup,
        num_draws: settings.draws,
        maxdepth: settings.max_depth,
        ..SamplerArgs::default()
    };
    args.mass_matrix_adapt.dual_average_options.target_accept = settings.target_accept;
    let mut sampler = new_sampler(Adapter { density }, args, chain as u64, &mut theirs);
    let fail = |what: &str, e: nuts_rs::NutsError| {
        Error::setting(
            "sampler",
            format!("item {item}, chain {chain}: {what}: {e}"),
        )
    };
    // An initial point where the density is undefined: try fresh jitter a few times.
    let mut placed = sampler.set_position(&init);
    for _ in 0..20 {
        if placed.is_ok() {
            break;
        }
        for (x, s) in init.iter_mut().zip(start) {
            *x = s + settings.init_jitter.max(0.5) * (2.0 * ours.random::<f64>() - 1.0);
        }
        placed = sampler.set_position(&init);
    }
    placed.map_err(|e| fail("no valid starting point", e))?;
    let n = settings.draws as usize;
    let mut out = ChainDraws {
        chain,
        dim,
        values: Vec::with_capacity(n * dim),
        log_density: Vec::with_capacity(n),
        diverging: Vec::with_capacity(n),
        warmup_divergences: 0,
        max_depth_hits: 0,
        gradient_evaluations: 0,
    };
    for i in 0..settings.warmup + settings.draws {
        let (position, stats) = sampler.draw().map_err(|e| fail("sampling failed", e))?;
        // A tree of depth k holds 2^k - 1 leapfrog steps beyond its start.
        out.gradient_evaluations += (1u64 << stats.depth().min(62)) - 1;
        let diverging = stats.divergence_info().is_some();
        if i < settings.warmup {
            out.warmup_divergences += diverging as usize;
            continue;
        }
        out.values.extend_from_slice(&position);
        out.log_density.push(stats.logp());
        out.diverging.push(diverging);
        out.max_depth_hits += stats.maxdepth_reached() as usize;
    }
    Ok(out)
}

/// Run `settings.chains` chains of item `item` in parallel from `start` (plus jitter); `done`
/// is called after each finished chain. The result is ordered by chain and depends on
/// (seed, purpose, item) alone.
pub fn sample<D: LogDensity>(
    density: &D,
    start: &[f64],
    settings: &SamplerSettings,
    seed: u64,
    purpose: Purpose,
    item: u64,
    done: &(dyn Fn(usize) + Sync),
) -> Result<Vec<ChainDraws>> {
    settings.check()?;
    if item > MAX_ITEM {
        return Err(Error::setting("item", format!("{item} exceeds {MAX_ITEM}")));
    }
    if start.len() != density.dim() {
        return Err(Error::setting(
            "start",
            format!(
                "{} coordinates for a density on R^{}",
                start.len(),
                density.dim()
            ),
        ));
    }
    (0..settings.chains)
        .into_par_iter()
        .map(|c| {
            let r = run_chain(density, start, settings, seed, purpose, item, c);
            done(c);
            r
        })
        .collect()
}

/// Like [`sample`] with `settings.draws` kept draws per chain; then, while `more` (judged on
/// all chains' draws, e.g. their effective sample sizes) asks for a longer run, every chain is
/// run again from its start with the number of kept draws `more` names (capped at
/// `max_draws`). A chain's first draws do not depend on how many follow (`nuts-rs` adapts
/// during the warm-up only, and draws its random numbers in order from the chain's own
/// generator), so the longer run extends the shorter one draw for draw; it is recomputed
/// rather than continued because a `nuts-rs` chain cannot move between threads. The decisions
/// depend on the draws alone, so the result still depends on (seed, purpose, item) alone,
/// whatever the thread count. Each returned chain's `gradient_evaluations` includes those of
/// the shorter runs. `done` is called once per chain when it is final.
#[allow(clippy::too_many_arguments)]
pub fn sample_until<D: LogDensity>(
    density: &D,
    start: &[f64],
    settings: &SamplerSettings,
    max_draws: u64,
    more: &(dyn Fn(&[ChainDraws]) -> Option<u64> + Sync),
    seed: u64,
    purpose: Purpose,
    item: u64,
    done: &(dyn Fn(usize) + Sync),
) -> Result<Vec<ChainDraws>> {
    if max_draws < settings.draws || max_draws > MAX_DRAWS {
        return Err(Error::setting(
            "max-draws",
            format!(
                "{max_draws} is outside [{}, {MAX_DRAWS}] (at least --draws)",
                settings.draws
            ),
        ));
    }
    let mut run = *settings;
    let mut spent = vec![0u64; settings.chains];
    loop {
        let mut chains = sample(density, start, &run, seed, purpose, item, &|_| {})?;
        for (c, s) in chains.iter_mut().zip(&mut spent) {
            *s += c.gradient_evaluations;
            c.gradient_evaluations = *s;
        }
        let next = if run.draws >= max_draws {
            None
        } else {
            more(&chains).map(|d| d.clamp(run.draws + 1, max_draws))
        };
        match next {
            Some(d) => run.draws = d,
            None => {
                (0..chains.len()).for_each(done);
                return Ok(chains);
            }
        }
    }
}

/// The chain table of an item's draws: `parameters` name the columns of `mapped` (the draws of
/// `chains` in the reported scale, [`map_draws`]); `log_posterior` is the log density on the
/// sampler's unconstrained scale.
pub fn chain_table(
    parameters: Vec<crate::chains::Parameter>,
    chains: &[ChainDraws],
    mapped: &[Vec<Vec<f64>>],
) -> Result<crate::chains::ChainTable> {
    let mut table = crate::chains::ChainTable::new(parameters)?;
    for (c, rows) in chains.iter().zip(mapped) {
        for (i, row) in rows.iter().enumerate() {
            table.push(crate::chains::ChainDraw {
                chain: c.chain as u32,
                draw: i as u64,
                log_posterior: Some(c.log_density[i]),
                diverging: c.diverging[i],
                values: row.clone(),
            })?;
        }
    }
    Ok(table)
}

/// Every draw of every chain mapped by `map` (e.g. to the physical scale): per chain, one row
/// per draw.
pub fn map_draws(chains: &[ChainDraws], map: &dyn Fn(&[f64]) -> Vec<f64>) -> Vec<Vec<Vec<f64>>> {
    chains
        .iter()
        .map(|c| (0..c.len()).map(|i| map(c.draw(i))).collect())
        .collect()
}

/// Per-coordinate diagnostics of the chains of one item, from their draws mapped by
/// [`map_draws`] (e.g. to the physical scale; R-hat and ESS are invariant under monotone maps
/// only in their rank-based parts, so summarise the scale you report).
pub fn summarise_coordinates(mapped: &[Vec<Vec<f64>>]) -> Vec<diagnostics::Summary> {
    let dim = mapped.first().and_then(|c| c.first()).map_or(0, Vec::len);
    (0..dim)
        .map(|k| {
            let series: Vec<Vec<f64>> = mapped
                .iter()
                .map(|c| c.iter().map(|d| d[k]).collect())
                .collect();
            let refs: Vec<&[f64]> = series.iter().map(|s| s.as_slice()).collect();
            diagnostics::summarise(&refs)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::diagnostics::{ess_bulk, summarise};
    use super::*;

    /// A Gaussian with mean mu and covariance Sigma = L L^T given by its precision Q.
    struct Gaussian {
        mu: Vec<f64>,
        precision: Vec<Vec<f64>>,
    }

    impl LogDensity for Gaussian {
        fn dim(&self) -> usize {
            self.mu.len()
        }
        fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
            let d: Vec<f64> = x.iter().zip(&self.mu).map(|(a, b)| a - b).collect();
            let mut v = 0.0;
            for i in 0..d.len() {
                let qd: f64 = (0..d.len()).map(|j| self.precision[i][j] * d[j]).sum();
                grad[i] = -qd;
                v -= 0.5 * d[i] * qd;
            }
            Ok(v)
        }
    }

    fn coordinate_chains(chains: &[ChainDraws], k: usize) -> Vec<Vec<f64>> {
        chains.iter().map(|c| c.coordinate(k)).collect()
    }

    /// |estimate - truth| <= z * sd / sqrt(ESS): the Monte Carlo error of a mean (e.g. Geyer
    /// 1992, sec. 1). z = 4.4 gives a two-sided false-failure rate of 1e-5 per check.
    const Z: f64 = 4.4;

    #[test]
    fn a_longer_run_extends_the_shorter_one_draw_for_draw() {
        // The premise of `sample_until`: a chain's first draws do not depend on how many
        // follow, so re-running with more draws continues the shorter run exactly.
        let target = Gaussian {
            mu: vec![0.5, -1.0],
            precision: vec![vec![2.0, 0.3], vec![0.3, 1.0]],
        };
        let short = SamplerSettings {
            warmup: 40,
            draws: 30,
            chains: 2,
            ..SamplerSettings::default()
        };
        let long = SamplerSettings { draws: 75, ..short };
        let none = |_: usize| {};
        let a = sample(
            &target,
            &[0.0, 0.0],
            &short,
            3,
            Purpose::NoiseChain,
            9,
            &none,
        )
        .unwrap();
        let b = sample(
            &target,
            &[0.0, 0.0],
            &long,
            3,
            Purpose::NoiseChain,
            9,
            &none,
        )
        .unwrap();
        for (x, y) in a.iter().zip(&b) {
            assert_eq!(x.values[..], y.values[..x.values.len()]);
            assert_eq!(x.log_density[..], y.log_density[..x.len()]);
        }
        // Asked once for 75 draws, then satisfied: the same draws as the direct long run, and
        // the work of both runs counted.
        let asked = std::sync::atomic::AtomicUsize::new(0);
        let more = |c: &[ChainDraws]| {
            asked.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
            (c[0].len() < 75).then_some(75)
        };
        let u = sample_until(
            &target,
            &[0.0, 0.0],
            &short,
            200,
            &more,
            3,
            Purpose::NoiseChain,
            9,
            &none,
        )
        .unwrap();
        assert_eq!(asked.load(std::sync::atomic::Ordering::SeqCst), 2);
        for ((x, y), z) in u.iter().zip(&b).zip(&a) {
            assert_eq!(x.values, y.values);
            assert_eq!(
                x.gradient_evaluations,
                y.gradient_evaluations + z.gradient_evaluations
            );
        }
        // The cap holds, and a cap below the first run is a setting error.
        let always = |_: &[ChainDraws]| Some(1_000);
        let capped = sample_until(
            &target,
            &[0.0, 0.0],
            &short,
            50,
            &always,
            3,
            Purpose::NoiseChain,
            9,
            &none,
        )
        .unwrap();
        assert!(capped.iter().all(|c| c.len() == 50));
        assert!(sample_until(
            &target,
            &[0.0, 0.0],
            &short,
            20,
            &always,
            3,
            Purpose::NoiseChain,
            9,
            &none
        )
        .is_err());
    }

    #[test]
    fn standard_normal_moments_within_monte_carlo_error() {
        let d = 5;
        let target = Gaussian {
            mu: vec![0.0; d],
            precision: (0..d)
                .map(|i| (0..d).map(|j| if i == j { 1.0 } else { 0.0 }).collect())
                .collect(),
        };
        let settings = SamplerSettings {
            warmup: 300,
            draws: 1000,
            ..SamplerSettings::default()
        };
        let chains = sample(
            &target,
            &vec![0.0; d],
            &settings,
            5,
            Purpose::NoiseChain,
            0,
            &|_| {},
        )
        .unwrap();
        assert_eq!(chains.len(), 4);
        for k in 0..d {
            let series = coordinate_chains(&chains, k);
            let refs: Vec<&[f64]> = series.iter().map(|s| s.as_slice()).collect();
            let s = summarise(&refs);
            assert!(s.rhat < 1.01, "R-hat {}", s.rhat);
            assert!(
                s.mean.abs() < Z / s.ess_bulk.sqrt(),
                "mean {} ess {}",
                s.mean,
                s.ess_bulk
            );
            // Var(x^2) = 2 for a standard normal; the MC error of the mean of x^2 uses the ESS
            // of the x^2 series.
            let sq: Vec<Vec<f64>> = series
                .iter()
                .map(|c| c.iter().map(|x| x * x).collect())
                .collect();
            let sq_refs: Vec<&[f64]> = sq.iter().map(|s| s.as_slice()).collect();
            let m2 = sq.iter().flatten().sum::<f64>() / 4000.0;
            let ess2 = ess_bulk(&sq_refs);
            assert!(
                (m2 - 1.0).abs() < Z * 2f64.sqrt() / ess2.sqrt(),
                "E x^2 = {m2}, ess {ess2}"
            );
        }
        let div: usize = chains.iter().map(|c| c.divergences()).sum();
        assert_eq!(div, 0, "a standard normal has no divergences");
    }

    #[test]
    fn correlated_gaussian_moments_within_monte_carlo_error() {
        // Sigma = [[4, 1.8], [1.8, 1]] (correlation 0.9, scales 2 and 1); precision by hand:
        // det = 4 - 3.24 = 0.76, Q = [[1, -1.8], [-1.8, 4]] / 0.76.
        let det = 0.76;
        let target = Gaussian {
            mu: vec![1.0, -2.0],
            precision: vec![vec![1.0 / det, -1.8 / det], vec![-1.8 / det, 4.0 / det]],
        };
        let settings = SamplerSettings {
            warmup: 500,
            draws: 1000,
            ..SamplerSettings::default()
        };
        let chains = sample(
            &target,
            &[0.0, 0.0],
            &settings,
            6,
            Purpose::NoiseChain,
            3,
            &|_| {},
        )
        .unwrap();
        let sd = [2.0f64, 1.0];
        let var = [4.0f64, 1.0];
        for k in 0..2 {
            let series = coordinate_chains(&chains, k);
            let refs: Vec<&[f64]> = series.iter().map(|s| s.as_slice()).collect();
            let s = summarise(&refs);
            assert!(s.rhat < 1.01, "R-hat {}", s.rhat);
            let mu = target.mu[k];
            assert!(
                (s.mean - mu).abs() < Z * sd[k] / s.ess_bulk.sqrt(),
                "mean {}",
                s.mean
            );
            // Centred squares: Var((x - mu)^2) = 2 sigma^4.
            let sq: Vec<Vec<f64>> = series
                .iter()
                .map(|c| c.iter().map(|x| (x - mu).powi(2)).collect())
                .collect();
            let sq_refs: Vec<&[f64]> = sq.iter().map(|s| s.as_slice()).collect();
            let v = sq.iter().flatten().sum::<f64>() / 4000.0;
            let ess2 = ess_bulk(&sq_refs);
            assert!(
                (v - var[k]).abs() < Z * 2f64.sqrt() * var[k] / ess2.sqrt(),
                "variance {v} vs {}",
                var[k]
            );
        }
        // The covariance: E[(x0 - 1)(x1 + 2)] = 1.8; Var of the product of a bivariate normal
        // pair = s0^2 s1^2 (1 + rho^2) = 4 * 1.81 (Isserlis' theorem).
        let prods: Vec<Vec<f64>> = chains
            .iter()
            .map(|c| {
                (0..c.len())
                    .map(|i| (c.draw(i)[0] - 1.0) * (c.draw(i)[1] + 2.0))
                    .collect()
            })
            .collect();
        let refs: Vec<&[f64]> = prods.iter().map(|s| s.as_slice()).collect();
        let cov = prods.iter().flatten().sum::<f64>() / 4000.0;
        let e = ess_bulk(&refs);
        assert!(
            (cov - 1.8).abs() < Z * (4.0f64 * 1.81).sqrt() / e.sqrt(),
            "cov {cov}, ess {e}"
        );
    }

    #[test]
    fn chains_depend_on_seed_item_and_chain_only() {
        let target = Gaussian {
            mu: vec![0.5],
            precision: vec![vec![2.0]],
        };
        let settings = SamplerSettings {
            warmup: 50,
            draws: 30,
            chains: 3,
            ..SamplerSettings::default()
        };
        let a = sample(
            &target,
            &[0.0],
            &settings,
            9,
            Purpose::NoiseChain,
            7,
            &|_| {},
        )
        .unwrap();
        // The same chain run alone, on this thread, gives the same draws.
        let b = run_chain(&target, &[0.0], &settings, 9, Purpose::NoiseChain, 7, 2).unwrap();
        assert_eq!(a[2], b);
        let c = sample(
            &target,
            &[0.0],
            &settings,
            9,
            Purpose::NoiseChain,
            8,
            &|_| {},
        )
        .unwrap();
        assert_ne!(a[0].values, c[0].values);
        assert_ne!(a[0].values, a[1].values);
    }

    /// A density that is undefined for x > 1 (as a likelihood whose matrix stops being positive
    /// definite): trajectories that step there end as divergences, the chain goes on.
    struct Walled;
    impl LogDensity for Walled {
        fn dim(&self) -> usize {
            1
        }
        fn log_density_and_gradient(&self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
            if x[0] > 1.0 {
                return Err(Error::NotPositiveDefinite {
                    what: "test".into(),
                    pivot: 0,
                });
            }
            grad[0] = -x[0];
            Ok(-0.5 * x[0] * x[0])
        }
    }

    #[test]
    fn undefined_regions_are_divergences_not_failures() {
        let settings = SamplerSettings {
            warmup: 100,
            draws: 200,
            chains: 2,
            ..SamplerSettings::default()
        };
        let chains = sample(
            &Walled,
            &[0.0],
            &settings,
            1,
            Purpose::NoiseChain,
            0,
            &|_| {},
        )
        .unwrap();
        let total: usize = chains
            .iter()
            .map(|c| c.divergences() + c.warmup_divergences)
            .sum();
        assert!(total > 0);
        assert!(chains.iter().all(|c| c.values.iter().all(|&x| x <= 1.0)));
    }

    #[test]
    fn settings_outside_their_ranges_are_refused() {
        for bad in [
            SamplerSettings {
                chains: 1,
                ..Default::default()
            },
            SamplerSettings {
                draws: 0,
                ..Default::default()
            },
            SamplerSettings {
                max_depth: 40,
                ..Default::default()
            },
            SamplerSettings {
                target_accept: 1.0,
                ..Default::default()
            },
            SamplerSettings {
                init_jitter: f64::NAN,
                ..Default::default()
            },
        ] {
            assert!(matches!(bad.check(), Err(Error::Setting { .. })), "{bad:?}");
        }
        assert!(SamplerSettings::default().check().is_ok());
    }
}
