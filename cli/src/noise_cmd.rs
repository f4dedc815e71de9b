//! `ptacorr noise`: per-pulsar noise estimation (parsing and printing only; the numbers come
//! from `ptacorr::noise_fit`, docs/noise-estimation.md).

use anyhow::{Context, Result};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use ptacorr::noise_fit::map::MapSettings;
use ptacorr::noise_fit::sample::SampleMode;
use ptacorr::noise_fit::{
    check_settings, fit_release, merge_shards, mode_name, progress_units, write_run, ModelValues,
    NoiseSettings,
};
use ptacorr::output::OutputSet;
use ptacorr::priors::PriorFile;
use ptacorr::release::read_release;
use ptacorr::sampler::SamplerSettings;
use ptacorr::shard::Shard;
use std::io::IsTerminal;
use std::path::PathBuf;

/// Arguments of `ptacorr noise`.
#[derive(clap::Args, Clone)]
pub struct NoiseArgs {
    /// The release folder.
    release: PathBuf,
    /// Output folder.
    #[arg(long)]
    out: PathBuf,
    /// Priors file (TOML); the built-in defaults when absent.
    #[arg(long)]
    priors: Option<PathBuf>,
    /// Seed of the starting points.
    #[arg(long, default_value_t = NoiseSettings::default().seed)]
    seed: u64,
    /// Number of L-BFGS starting points per pulsar.
    #[arg(long, default_value_t = MapSettings::default().starts)]
    starts: usize,
    /// Iteration limit of each L-BFGS run.
    #[arg(long, default_value_t = MapSettings::default().max_iterations)]
    max_iterations: u64,
    /// This shard of the pulsars, I/N.
    #[arg(long)]
    shard: Option<String>,
    /// Hold the white noise at its MAP and sample only red, DM (and a free common process).
    #[arg(long, conflicts_with = "map_only")]
    fixed_white: bool,
    /// No posterior sampling: noise.toml gets the MAP values.
    #[arg(long)]
    map_only: bool,
    /// Values written to noise.toml after sampling: posterior medians or the MAP.
    #[arg(long, value_enum, default_value_t = Values::Median)]
    values: Values,
    /// Chains per pulsar.
    #[arg(long, default_value_t = SamplerSettings::default().chains)]
    chains: usize,
    /// Warm-up (adaptation) iterations per chain, discarded.
    #[arg(long, default_value_t = SamplerSettings::default().warmup)]
    warmup: u64,
    /// Kept draws per chain.
    #[arg(long, default_value_t = SamplerSettings::default().draws)]
    draws: u64,
    /// Most kept draws per chain: chains whose draws miss the convergence thresholds (R-hat,
    /// bulk and tail ESS) are continued in blocks of draws/2 up to this (default 4 x draws;
    /// equal to --draws: never continued).
    #[arg(long)]
    max_draws: Option<u64>,
    /// Maximum tree depth of the sampler.
    #[arg(long, default_value_t = SamplerSettings::default().max_depth)]
    max_depth: u64,
    /// Target acceptance rate of the step-size adaptation.
    #[arg(long, default_value_t = SamplerSettings::default().target_accept)]
    target_accept: f64,
}

/// Values written to noise.toml.
#[derive(clap::ValueEnum, Clone, Copy, Debug)]
enum Values {
    Median,
    Map,
}

/// Arguments of `ptacorr merge-noise`.
#[derive(clap::Args, Clone)]
pub struct MergeNoiseArgs {
    #[arg(required = true)]
    dirs: Vec<PathBuf>,
    #[arg(long)]
    out: PathBuf,
}

fn progress_bar(total: u64) -> ProgressBar {
    let pb = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::stderr());
    if !std::io::stderr().is_terminal() {
        pb.set_draw_target(ProgressDrawTarget::hidden());
    }
    pb.set_style(
        ProgressStyle::with_template("{bar:40} {pos}/{len} {msg}  {elapsed_precise} elapsed")
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    pb
}

/// Run `ptacorr noise`.
pub fn run(args: NoiseArgs) -> Result<()> {
    // Settings first, before any reading or work.
    let shard = match &args.shard {
        Some(s) => Shard::parse(s)?,
        None => Shard::ALL,
    };
    let mode = if args.map_only {
        SampleMode::MapOnly
    } else if args.fixed_white {
        SampleMode::FixedWhite
    } else {
        SampleMode::Full
    };
    let settings = NoiseSettings {
        seed: args.seed,
        map: MapSettings {
            starts: args.starts,
            max_iterations: args.max_iterations,
            ..MapSettings::default()
        },
        mode,
        sampler: SamplerSettings {
            chains: args.chains,
            warmup: args.warmup,
            draws: args.draws,
            max_depth: args.max_depth,
            target_accept: args.target_accept,
            ..SamplerSettings::default()
        },
        max_draws: args.max_draws,
        values: match args.values {
            Values::Median => ModelValues::Median,
            Values::Map => ModelValues::Map,
        },
        shard,
        ..NoiseSettings::default()
    };
    check_settings(&settings)?;
    let priors = match &args.priors {
        Some(p) => PriorFile::read(p)?,
        None => PriorFile::defaults(),
    };
    let release = read_release(&args.release)
        .with_context(|| format!("reading release {}", args.release.display()))?;
    priors.check_release(&release)?;
    let mut set = OutputSet::begin(&args.out, "noise")?;
    let n = shard.range(release.pulsars.len() as u64).count() as u64;
    let pb = progress_bar(progress_units(n, &settings));
    pb.set_message(if mode == SampleMode::MapOnly {
        "pulsars".to_string()
    } else {
        format!("chains ({n} pulsars x {})", settings.sampler.chains)
    });
    let run = fit_release(&release, &priors, &settings, &|| pb.inc(1))?;
    pb.finish_and_clear();
    write_run(&run, &mut set)?;
    set.commit()?;
    outln!(
        "{:<8} {:>6} {:>6} {:>16}  {:<28} posterior ({})",
        "pulsar",
        "TOAs",
        "params",
        "ln posterior",
        "MAP",
        mode_name(mode)
    );
    for f in &run.fits {
        let d = f.diagnostics(mode);
        let map = format!(
            "{} ({}/{} starts agree)",
            if d.map_converged {
                "converged"
            } else {
                "NOT CONVERGED"
            },
            d.map_agreeing_starts,
            d.map_starts
        );
        let post = match (&f.samples, d.posterior_converged) {
            (Some(s), Some(ok)) => format!(
                "{}  R-hat <= {:.3}, ESS >= {:.0}, {} divergent",
                if ok { "converged" } else { "NOT CONVERGED" },
                s.max_rhat(),
                s.min_ess_bulk().min(s.min_ess_tail()),
                s.divergences
            ),
            _ => "-".to_string(),
        };
        outln!(
            "{:<8} {:>6} {:>6} {:>16.3}  {:<28} {}",
            d.pulsar,
            d.n_toa,
            d.n_parameters,
            d.map_log_posterior,
            map,
            post
        );
    }
    for w in &run.provenance.fit_warnings {
        errln!("warning: {w}");
    }
    let what = match (mode, settings.values) {
        (SampleMode::MapOnly, _) | (_, ModelValues::Map) => "MAP values",
        _ => "posterior medians",
    };
    outln!(
        "wrote {}/noise.toml ({what}), estimates.csv, diagnostics.csv, priors.toml, provenance.json{}{}",
        args.out.display(),
        if mode == SampleMode::MapOnly {
            ""
        } else {
            ", chains/LABEL.csv"
        },
        if run.truth.is_empty() {
            ""
        } else {
            ", truth.csv (the simulation's true values)"
        }
    );
    if mode != SampleMode::MapOnly {
        outln!(
            "figures: ptacorr plot {} (marginal posteriors per pulsar)",
            args.out.display()
        );
    }
    Ok(())
}

/// Run `ptacorr merge-noise`.
pub fn run_merge(args: MergeNoiseArgs) -> Result<()> {
    let dirs: Vec<&std::path::Path> = args.dirs.iter().map(PathBuf::as_path).collect();
    let mut set = OutputSet::begin(&args.out, "merge-noise")?;
    merge_shards(&dirs, &mut set)?;
    set.commit()?;
    outln!("merged {} shards into {}", dirs.len(), args.out.display());
    Ok(())
}
