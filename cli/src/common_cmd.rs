//! `ptacorr common`: the common process, its posteriors and Bayes factors (argument parsing and
//! presentation only; every number comes from the engine's `common` module).

use anyhow::{Context, Result};
use ptacorr::common::sample_joint_red;
use ptacorr::common::{
    check_draws, comparison_name, draw_curn, estimate_free_spectrum_cost, fit_common,
    read_fitted_common, sample_free_spectrum, write_free_spectrum, AmplitudePrior, CommonData,
    CommonModel, CommonSettings, DrawIndex, DrawSettings, FitStatistic, FittedCommon,
    FreeSpectrumSettings, JointRedData, JointRedLikelihood, JointRedPosterior, JointRedSettings,
    COMMON_ASSUMPTIONS, DEFAULT_MAX_MINUTES, FREE_SPECTRUM_ASSUMPTIONS,
};
use ptacorr::output::OutputSet;
use ptacorr::priors::PriorFile;
use ptacorr::release::read_release;
use ptacorr::sampler::SamplerSettings;
use std::path::{Path, PathBuf};
use std::time::Instant;

#[derive(Clone, Copy, clap::ValueEnum)]
pub enum PriorArg {
    /// Uniform in log10 A (for Bayes factors).
    UniformLog10,
    /// Uniform in A (for upper limits).
    UniformAmplitude,
}

impl From<AmplitudePrior> for PriorArg {
    fn from(p: AmplitudePrior) -> Self {
        match p {
            AmplitudePrior::UniformLog10 => PriorArg::UniformLog10,
            AmplitudePrior::UniformAmplitude => PriorArg::UniformAmplitude,
        }
    }
}

impl From<DrawIndex> for DrawIndexArg {
    fn from(d: DrawIndex) -> Self {
        match d {
            DrawIndex::Varied => DrawIndexArg::Varied,
            DrawIndex::Fixed => DrawIndexArg::Fixed,
        }
    }
}

#[derive(clap::Args)]
pub struct CommonArgs {
    /// The release folder.
    release: PathBuf,
    /// Output folder for summary.json and the CSV tables.
    #[arg(long)]
    out: PathBuf,
    /// Number of analysis frequencies f_j = j / T_span.
    #[arg(long, default_value_t = CommonSettings::default().n_frequencies)]
    frequencies: usize,
    /// Prior range of log10 A: LO,HI.
    #[arg(long, default_value_t = range_text(CommonSettings::default().log10_amplitude_min, CommonSettings::default().log10_amplitude_max), allow_hyphen_values = true)]
    log10_amplitude_range: String,
    /// Prior range of the spectral index: LO,HI.
    #[arg(long, default_value_t = range_text(CommonSettings::default().spectral_index_min, CommonSettings::default().spectral_index_max))]
    index_range: String,
    /// Number of equally spaced spectral-index nodes the rule starts from (odd; locally adaptive
    /// Simpson: only the intervals whose error estimate is above their share of
    /// --index-tolerance are split, up to 1025 nodes).
    #[arg(long, default_value_t = CommonSettings::default().n_spectral_index)]
    index_points: usize,
    /// Relative error of the varied-index evidence the gamma rule aims for (each interval gets
    /// its share in proportion to its width).
    #[arg(long, default_value_t = CommonSettings::default().index_tolerance)]
    index_tolerance: f64,
    /// The fixed spectral index.
    #[arg(long, default_value_t = ptacorr::analysis::DEFAULT_SPECTRAL_INDEX)]
    fixed_index: f64,
    /// Number of log10 A points in the CSV tables.
    #[arg(long, default_value_t = CommonSettings::default().n_table_amplitudes)]
    amplitude_points: usize,
    #[arg(long, value_enum, default_value_t = CommonSettings::default().amplitude_prior.into())]
    amplitude_prior: PriorArg,
    /// Number of posterior draws of the CURN common process in common-draws.csv.
    #[arg(long, default_value_t = DrawSettings::default().n_draws)]
    draws: usize,
    /// Draw (log10 A, gamma) from the varied-index posterior, or log10 A at the fixed index.
    #[arg(long, value_enum, default_value_t = DrawSettings::default().index.into())]
    draw_index: DrawIndexArg,
    /// Seed of the posterior draws (draw i depends on (seed, i) alone).
    #[arg(long, default_value_t = DrawSettings::default().seed, allow_negative_numbers = true, value_parser = crate::seed_arg)]
    seed: u64,
    /// Also sample the free spectrum (independent power at each frequency) of these models with
    /// NUTS, e.g. `curn,hd` (none by default; a correlated model costs one (2KN)^3 / 3
    /// factorisation per gradient).
    #[arg(long, value_enum, value_delimiter = ',')]
    free_spectrum: Vec<ModelArg>,
    /// Prior range of log10 rho_j (s^2) of the free spectrum: LO,HI.
    #[arg(long, default_value_t = range_text(FreeSpectrumSettings::default().log10_power_min, FreeSpectrumSettings::default().log10_power_max), allow_hyphen_values = true)]
    log10_power_range: String,
    /// Kept NUTS draws per chain of the free spectrum.
    #[arg(long, default_value_t = FreeSpectrumSettings::default().sampler.draws)]
    free_spectrum_draws: u64,
    /// NUTS warm-up iterations per chain of the free spectrum.
    #[arg(long, default_value_t = FreeSpectrumSettings::default().sampler.warmup)]
    free_spectrum_warmup: u64,
    /// NUTS chains of the free spectrum (at least 2, for R-hat).
    #[arg(long, default_value_t = FreeSpectrumSettings::default().sampler.chains)]
    free_spectrum_chains: usize,
    /// Refuse to sample a free spectrum whose estimated wall time (measured gradient cost times
    /// the expected number of gradients) exceeds this many minutes.
    #[arg(long, default_value_t = DEFAULT_MAX_MINUTES)]
    free_spectrum_max_minutes: f64,
    /// Also sample the CURN common process jointly with every pulsar's own red noise
    /// (2 + 2 N_red parameters, NUTS), and report it beside the fixed-noise answer.
    #[arg(long)]
    joint_red: bool,
    /// Priors file (as for `ptacorr noise`) naming which pulsars get red noise in the joint
    /// fit and its ranges; the built-in defaults give every pulsar red noise.
    #[arg(long, requires = "joint_red")]
    joint_red_priors: Option<PathBuf>,
    /// Kept NUTS draws per chain of the joint fit.
    #[arg(long, default_value_t = SamplerSettings::default().draws)]
    joint_red_draws: u64,
    /// NUTS warm-up iterations per chain of the joint fit.
    #[arg(long, default_value_t = SamplerSettings::default().warmup)]
    joint_red_warmup: u64,
    /// NUTS chains of the joint fit (at least 2, for R-hat).
    #[arg(long, default_value_t = SamplerSettings::default().chains)]
    joint_red_chains: usize,
}

/// A correlation model of the common process.
#[derive(Clone, Copy, clap::ValueEnum)]
pub enum ModelArg {
    /// Common uncorrelated red noise.
    Curn,
    /// Hellings-Downs correlations.
    Hd,
    Monopole,
    Dipole,
}

impl From<ModelArg> for CommonModel {
    fn from(m: ModelArg) -> Self {
        match m {
            ModelArg::Curn => CommonModel::Curn,
            ModelArg::Hd => CommonModel::Hd,
            ModelArg::Monopole => CommonModel::Monopole,
            ModelArg::Dipole => CommonModel::Dipole,
        }
    }
}

#[derive(Clone, Copy, clap::ValueEnum)]
pub enum DrawIndexArg {
    Varied,
    Fixed,
}

/// A range as the options write it, `LO,HI` (the engine's defaults shown as defaults).
fn range_text(lo: f64, hi: f64) -> String {
    format!("{lo},{hi}")
}

fn parse_range(s: &str, name: &str) -> Result<(f64, f64)> {
    let parts: Vec<&str> = s.split(',').collect();
    let bad = || anyhow::anyhow!("invalid setting {name}: expected LO,HI (two numbers), got {s:?}");
    if parts.len() != 2 {
        return Err(bad());
    }
    let lo = parts[0].trim().parse::<f64>().map_err(|_| bad())?;
    let hi = parts[1].trim().parse::<f64>().map_err(|_| bad())?;
    Ok((lo, hi))
}

impl CommonArgs {
    fn settings(&self) -> Result<CommonSettings> {
        let (a0, a1) = parse_range(&self.log10_amplitude_range, "log10-amplitude-range")?;
        let (g0, g1) = parse_range(&self.index_range, "index-range")?;
        let s = CommonSettings {
            n_frequencies: self.frequencies,
            log10_amplitude_min: a0,
            log10_amplitude_max: a1,
            spectral_index_min: g0,
            spectral_index_max: g1,
            n_spectral_index: self.index_points,
            index_tolerance: self.index_tolerance,
            fixed_spectral_index: self.fixed_index,
            n_table_amplitudes: self.amplitude_points,
            amplitude_prior: match self.amplitude_prior {
                PriorArg::UniformLog10 => AmplitudePrior::UniformLog10,
                PriorArg::UniformAmplitude => AmplitudePrior::UniformAmplitude,
            },
            ..Default::default()
        };
        s.validate()?;
        check_draws(self.draws)?;
        Ok(s)
    }

    /// The free-spectrum settings, or None when no model was asked for (checked before work).
    fn free_spectrum_settings(&self) -> Result<Option<FreeSpectrumSettings>> {
        if self.free_spectrum.is_empty() {
            return Ok(None);
        }
        let mut models = Vec::new();
        for &arg in &self.free_spectrum {
            let m = CommonModel::from(arg);
            if !models.contains(&m) {
                models.push(m);
            }
        }
        let (lo, hi) = parse_range(&self.log10_power_range, "log10-power-range")?;
        let s = FreeSpectrumSettings {
            models,
            log10_power_min: lo,
            log10_power_max: hi,
            sampler: SamplerSettings {
                draws: self.free_spectrum_draws,
                warmup: self.free_spectrum_warmup,
                chains: self.free_spectrum_chains,
                ..Default::default()
            },
            seed: self.seed,
        };
        s.check()?;
        if !(self.free_spectrum_max_minutes.is_finite() && self.free_spectrum_max_minutes > 0.0) {
            anyhow::bail!(
                "invalid setting free-spectrum-max-minutes: must be a positive number of minutes, got {}",
                self.free_spectrum_max_minutes
            );
        }
        Ok(Some(s))
    }

    /// The joint red-noise settings and priors, or None without --joint-red (checked before
    /// work: the priors file is read and checked here).
    fn joint_settings(&self) -> Result<Option<(JointRedSettings, PriorFile)>> {
        if !self.joint_red {
            return Ok(None);
        }
        let priors = match &self.joint_red_priors {
            Some(p) => PriorFile::read(p)?,
            None => PriorFile::defaults(),
        };
        let s = JointRedSettings {
            sampler: SamplerSettings {
                draws: self.joint_red_draws,
                warmup: self.joint_red_warmup,
                chains: self.joint_red_chains,
                ..Default::default()
            },
            seed: self.seed,
            priors: priors.path.display().to_string(),
        };
        s.sampler.check()?;
        Ok(Some((s, priors)))
    }

    fn draw_settings(&self) -> DrawSettings {
        DrawSettings {
            n_draws: self.draws,
            seed: self.seed,
            index: match self.draw_index {
                DrawIndexArg::Varied => DrawIndex::Varied,
                DrawIndexArg::Fixed => DrawIndex::Fixed,
            },
        }
    }
}

/// Run `ptacorr common`.
pub fn run(args: &CommonArgs) -> Result<()> {
    let settings = args.settings()?;
    let free_settings = args.free_spectrum_settings()?;
    let draw_settings = args.draw_settings();
    let joint_settings = args.joint_settings()?;
    let t = Instant::now();
    let mut set = OutputSet::begin(&args.out, "common")?;
    let rel = read_release(&args.release)
        .with_context(|| format!("reading release {}", args.release.display()))?;
    let data = CommonData::from_release(&rel, &rel.noise, settings.n_frequencies)?;
    // The joint fit's data and priors before any fitting, so a priors file that does not fit
    // the release stops the run at once.
    let joint_data = match &joint_settings {
        Some((_, priors)) => Some(JointRedData::from_release(
            &rel,
            &rel.noise,
            settings.n_frequencies,
            priors,
        )?),
        None => None,
    };
    if let Some(fs) = &free_settings {
        // The cost of every model first, so a run that would take hours stops before any
        // sampling, with advice.
        for &m in &fs.models {
            let c = estimate_free_spectrum_cost(&data, m, fs)?;
            errln!(
                "free spectrum of {}: one gradient factors a {}x{} matrix ({:.2e} flop), measured {:.3} s; about {} gradients ({} chains x {} iterations x {} leapfrog steps, a typical tree; not a bound) on {} threads: about {:.1} min",
                m.name(),
                c.dimension,
                c.dimension,
                c.flops_per_gradient,
                c.seconds_per_gradient,
                c.gradients,
                fs.sampler.chains,
                c.iterations,
                ptacorr::common::ASSUMED_STEPS_PER_ITERATION,
                c.threads,
                c.minutes
            );
            if c.minutes > args.free_spectrum_max_minutes {
                anyhow::bail!(
                    "invalid setting free-spectrum: the {} free spectrum would take about {:.0} min (more than --free-spectrum-max-minutes {}): its cost grows as (rank x 2K)^3 per gradient; use fewer --frequencies (the cost falls as K^3), fewer --free-spectrum-draws/--free-spectrum-warmup, the curn model alone, or raise --free-spectrum-max-minutes",
                    m.name(),
                    c.minutes,
                    args.free_spectrum_max_minutes
                );
            }
        }
    }
    let fit = fit_common(&data, &settings)?;
    let draws = draw_curn(
        &data,
        &fit,
        draw_settings.index,
        draw_settings.n_draws,
        draw_settings.seed,
    )?;
    let joint = match (&joint_settings, joint_data) {
        (Some((js, _)), Some(jd)) => {
            let post = JointRedPosterior::new(
                JointRedLikelihood::new(jd.clone()),
                [settings.log10_amplitude_min, settings.log10_amplitude_max],
                [settings.spectral_index_min, settings.spectral_index_max],
                settings.amplitude_prior,
            )?;
            errln!(
                "joint red-noise fit: {} parameters ({} pulsars with red noise), {} chains x {} iterations",
                post.bounds.len(),
                jd.n_red(),
                js.sampler.chains,
                js.sampler.warmup + js.sampler.draws
            );
            let samples = sample_joint_red(&post, js, &|c| {
                errln!("joint red-noise fit: chain {c} done");
            })?;
            let summary = samples.summary(&jd, js, &post, Some(&fit));
            Some((summary, samples))
        }
        _ => None,
    };
    fit.write_with(
        &mut set,
        &rel,
        &data,
        Some((&draw_settings, &draws)),
        joint.as_ref().map(|(s, d)| (s, d)),
    )?;
    let mut free = Vec::new();
    let mut free_files = Vec::new();
    if let Some(fs) = &free_settings {
        for &m in &fs.models {
            free.push(sample_free_spectrum(&data, m, fs, Some(&fit))?);
        }
        free_files = write_free_spectrum(&mut set, fs, &free)?;
    }
    set.commit()?;
    outln!(
        "{} pulsars, {} frequencies; prior: {} on [{}, {}], gamma uniform on [{}, {}]",
        data.n_pulsars(),
        data.k(),
        settings.amplitude_prior.name(),
        settings.log10_amplitude_min,
        settings.log10_amplitude_max,
        settings.spectral_index_min,
        settings.spectral_index_max
    );
    outln!(
        "  model      log10 A (gamma = {:.3}): median [95% interval]   95% upper limit",
        settings.fixed_spectral_index
    );
    for (m, f) in &fit.fits {
        let s = f.fixed.posterior.summary();
        outln!(
            "  {:<9} {:>8.3} [{:.3}, {:.3}]   {:.3}",
            m.name(),
            s.median,
            s.interval_95[0],
            s.interval_95[1],
            s.upper_limit_95
        );
    }
    for (fixed, label) in [(true, "fixed index"), (false, "varied index")] {
        outln!("  ln Bayes factors, {label}:");
        for b in fit.standard_bayes_factors(fixed) {
            outln!(
                "    {:<14} {:>9.3} +- {:.1e}",
                comparison_name(&b),
                b.ln_bayes_factor,
                b.ln_error
            );
        }
    }
    outln!("  {COMMON_ASSUMPTIONS}");
    for s in &free {
        let (rhat, ess) = s.worst();
        outln!(
            "  free spectrum {}: {} frequencies, largest R-hat {:.3}, smallest bulk ESS {:.0}, {} divergences",
            s.model.name(),
            s.rows.len(),
            rhat,
            ess,
            s.divergences
        );
    }
    if !free.is_empty() {
        outln!("  {FREE_SPECTRUM_ASSUMPTIONS}");
    }
    if let Some((j, _)) = &joint {
        outln!(
            "  CURN with red noise marginalised ({} parameters): log10 A {:.3} [{:.3}, {:.3}], gamma {:.2} [{:.2}, {:.2}] (median [68%]); largest R-hat {:.3}, smallest bulk ESS {:.0}, {} divergences",
            j.n_parameters,
            j.log10_amplitude.median,
            j.log10_amplitude.interval_68[0],
            j.log10_amplitude.interval_68[1],
            j.spectral_index.median,
            j.spectral_index.interval_68[0],
            j.spectral_index.interval_68[1],
            j.max_rhat,
            j.min_ess_bulk,
            j.divergences
        );
        if let (Some(a), Some(da), Some(dg)) = (
            &j.fixed_noise_log10_amplitude,
            j.log10_amplitude_difference,
            j.spectral_index_difference,
        ) {
            outln!(
                "  CURN with red noise fixed: log10 A {:.3} [{:.3}, {:.3}]; joint minus fixed: log10 A {:+.3}, gamma {:+.2}",
                a.median,
                a.interval_68[0],
                a.interval_68[1],
                da,
                dg
            );
        }
    }
    errln!("fitted in {:.2} s", t.elapsed().as_secs_f64());
    outln!(
        "wrote {}/summary.json, posterior-fixed-index.csv, posterior-grid.csv, marginals.csv, \
         common-draws.csv{}",
        args.out.display(),
        free_files
            .iter()
            .map(|f| format!(", {f}"))
            .chain(joint.as_ref().map(|(j, _)| format!(", {}", j.chain_table)))
            .collect::<String>()
    );
    Ok(())
}

/// The value of `correlate --common-fit-value`.
#[derive(Clone, Copy, clap::ValueEnum)]
pub enum FitValueArg {
    Median,
    Map,
}

/// The CURN fixed-index common process of a `ptacorr common` output folder, for `correlate`.
pub fn common_from_fit(dir: &Path, value: FitValueArg) -> Result<FittedCommon> {
    let statistic = match value {
        FitValueArg::Median => FitStatistic::Median,
        FitValueArg::Map => FitStatistic::Map,
    };
    Ok(read_fitted_common(dir, CommonModel::Curn, statistic)?)
}
