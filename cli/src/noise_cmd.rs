//! `ptacorr noise`: per-pulsar noise estimation (parsing and printing only; the numbers come
//! from `ptacorr::noise_fit`, docs/noise-estimation.md).

use anyhow::{Context, Result};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use ptacorr::noise_fit::map::MapSettings;
use ptacorr::noise_fit::{fit_release, merge_shards, write_run, NoiseSettings};
use ptacorr::priors::PriorFile;
use ptacorr::release::read_release;
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
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Number of L-BFGS starting points per pulsar.
    #[arg(long, default_value_t = 4)]
    starts: usize,
    /// Iteration limit of each L-BFGS run.
    #[arg(long, default_value_t = 500)]
    max_iterations: u64,
    /// This shard of the pulsars, I/N.
    #[arg(long)]
    shard: Option<String>,
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
        ProgressStyle::with_template("{bar:40} {pos}/{len} pulsars  {elapsed_precise} elapsed")
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
    let settings = NoiseSettings {
        seed: args.seed,
        map: MapSettings {
            starts: args.starts,
            max_iterations: args.max_iterations,
            ..MapSettings::default()
        },
        shard,
    };
    let priors = match &args.priors {
        Some(p) => PriorFile::read(p)?,
        None => PriorFile::defaults(),
    };
    let release = read_release(&args.release)
        .with_context(|| format!("reading release {}", args.release.display()))?;
    let pb = progress_bar(shard.range(release.pulsars.len() as u64).count() as u64);
    let run = fit_release(&release, &priors, &settings, &|_| pb.inc(1))?;
    pb.finish_and_clear();
    write_run(&run, &args.out)?;
    println!(
        "{:<8} {:>6} {:>6} {:>16}  MAP",
        "pulsar", "TOAs", "params", "ln posterior"
    );
    let mut not_converged = 0;
    for f in &run.fits {
        let d = f.diagnostics();
        if !d.map_converged {
            not_converged += 1;
        }
        println!(
            "{:<8} {:>6} {:>6} {:>16.3}  {} ({}/{} starts agree)",
            d.pulsar,
            d.n_toa,
            d.n_parameters,
            d.map_log_posterior,
            if d.map_converged {
                "converged"
            } else {
                "NOT CONVERGED"
            },
            d.map_agreeing_starts,
            d.map_starts
        );
    }
    if not_converged > 0 {
        eprintln!(
            "warning: the MAP search of {not_converged} pulsar(s) did not converge (see diagnostics.csv)"
        );
    }
    println!(
        "wrote {}/noise.toml (MAP values), estimates.csv, diagnostics.csv, priors.toml, provenance.json",
        args.out.display()
    );
    Ok(())
}

/// Run `ptacorr merge-noise`.
pub fn run_merge(args: MergeNoiseArgs) -> Result<()> {
    let dirs: Vec<&std::path::Path> = args.dirs.iter().map(PathBuf::as_path).collect();
    merge_shards(&dirs, &args.out)?;
    println!("merged {} shards into {}", dirs.len(), args.out.display());
    Ok(())
}
