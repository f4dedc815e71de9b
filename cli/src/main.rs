//! The `ptacorr` command: argument parsing and presentation only; every number comes from the
//! engine.

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};
use ptacorr::analysis::{correlate_reduced, CommonAutoPower, CorrelateSettings, Correlation};
use ptacorr::bins::Binning;
use ptacorr::orf::Pattern;
use ptacorr::reduce::{reduce_release, FrequencyGrid};
use ptacorr::release::{read_release, Release};
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::simulate::simulate_scenario;
use ptacorr::spectrum::PowerLaw;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Instant;

mod demo;
mod figures_cmd;
mod inject_cmd;
mod noise_cmd;
mod null_cmd;

#[derive(Parser)]
#[command(
    name = "ptacorr",
    version,
    about = "Search pulsar-timing residuals for the Hellings-Downs correlation of a gravitational-wave background"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Simulate the built-in demo array, analyse it and print a summary.
    Demo {
        /// Folder for the simulated release and the analysis.
        #[arg(long, default_value = "ptacorr-demo")]
        out: PathBuf,
        #[arg(long, default_value_t = 2026)]
        seed: u64,
    },
    /// Simulate an array from a scenario file and write it as a release.
    Simulate {
        scenario: PathBuf,
        #[arg(long)]
        out: PathBuf,
        #[arg(long)]
        seed: Option<u64>,
    },
    /// Cross-correlate every pair of pulsars of a release with the optimal statistic.
    Correlate {
        release: PathBuf,
        #[arg(long)]
        out: PathBuf,
        #[command(flatten)]
        analysis: AnalysisArgs,
    },
    /// Draw the figure of an output folder (correlate, null or inject).
    Plot(figures_cmd::PlotArgs),
    /// Gather output folders into a memo-ready report (Markdown, HTML, LaTeX tables, figures).
    Report(figures_cmd::ReportArgs),
    /// Inject a background at several amplitudes and measure how well it is recovered.
    Inject(inject_cmd::InjectArgs),
    /// False-alarm probability of the observed SNR from null trials (and the analytic null).
    Null(Box<null_cmd::NullArgs>),
    /// Merge the shard folders of one `ptacorr null` run.
    Merge {
        #[arg(required = true)]
        dirs: Vec<PathBuf>,
        #[arg(long)]
        out: PathBuf,
    },
    /// Estimate every pulsar's noise model from the release (docs/noise-estimation.md).
    Noise(noise_cmd::NoiseArgs),
    /// Merge the shard folders of one `ptacorr noise` run.
    MergeNoise(noise_cmd::MergeNoiseArgs),
}

#[derive(clap::Args, Clone)]
pub(crate) struct AnalysisArgs {
    /// Number of analysis frequencies f_j = j / T_span.
    #[arg(long, default_value_t = 14)]
    frequencies: usize,
    /// Spectral index of the template (13/3 for a background of binaries).
    #[arg(long, default_value_t = 13.0 / 3.0)]
    spectral_index: f64,
    /// Number of angular bins.
    #[arg(long, default_value_t = 10)]
    bins: usize,
    /// Bins of equal width in angle instead of equal pair count.
    #[arg(long)]
    equal_width_bins: bool,
    /// log10 amplitude of the common process in each pulsar's auto-power (overrides noise.toml).
    #[arg(long, allow_hyphen_values = true, conflicts_with = "no_common")]
    common_log10_amplitude: Option<f64>,
    /// Leave the common process out of the auto-power.
    #[arg(long)]
    no_common: bool,
}

impl AnalysisArgs {
    pub(crate) fn settings(&self) -> CorrelateSettings {
        CorrelateSettings {
            n_frequencies: self.frequencies,
            spectral_index: self.spectral_index,
            n_bins: self.bins,
            binning: if self.equal_width_bins {
                Binning::EqualWidth
            } else {
                Binning::EqualCount
            },
            common: match (self.no_common, self.common_log10_amplitude) {
                (true, _) => CommonAutoPower::Off,
                (false, Some(a)) => CommonAutoPower::Given(PowerLaw {
                    log10_amplitude: a,
                    spectral_index: self.spectral_index,
                }),
                (false, None) => CommonAutoPower::FromNoiseModel,
            },
        }
    }
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e}");
            for cause in e.chain().skip(1) {
                eprintln!("  caused by: {cause}");
            }
            ExitCode::FAILURE
        }
    }
}

fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Demo { out, seed } => demo::run(&out, seed),
        Command::Simulate {
            scenario,
            out,
            seed,
        } => {
            let s = Scenario::read(&scenario)?;
            let seed = s.seed(seed);
            let layout = lay_out(&s, seed);
            let pulsars = simulate_scenario(&layout, seed, &out)?;
            let n: usize = pulsars.iter().map(|p| p.n_toa()).sum();
            println!(
                "simulated {} pulsars, {} TOAs (seed {seed}) -> {}",
                pulsars.len(),
                n,
                out.display()
            );
            Ok(())
        }
        Command::Correlate {
            release,
            out,
            analysis,
        } => {
            let settings = analysis.settings();
            let (rel, c) = correlate_release(&release, &settings)?;
            c.write(&out, &rel, &settings)?;
            print_summary(&rel, &c);
            println!("wrote {}/summary.json, pairs.csv, bins.csv", out.display());
            Ok(())
        }
        Command::Plot(args) => figures_cmd::plot(&args),
        Command::Report(args) => figures_cmd::report(&args).map(|_| ()),
        Command::Inject(args) => inject_cmd::run(args),
        Command::Null(args) => null_cmd::run_null(*args),
        Command::Merge { dirs, out } => null_cmd::run_merge(&dirs, &out),
        Command::Noise(args) => noise_cmd::run(args),
        Command::MergeNoise(args) => noise_cmd::run_merge(args),
    }
}

/// Read and analyse a release, timing each stage on stderr (wall and CPU seconds of the
/// process; `benchmarks/run` reads this line).
pub(crate) fn correlate_release(
    path: &Path,
    settings: &CorrelateSettings,
) -> Result<(Release, Correlation)> {
    let (t, cpu) = (Instant::now(), cpu_seconds());
    let rel = read_release(path).with_context(|| format!("reading release {}", path.display()))?;
    let (read_s, read_cpu) = (t.elapsed().as_secs_f64(), cpu_seconds() - cpu);
    settings.validate()?;
    let grid = FrequencyGrid::for_release(&rel, settings.n_frequencies)?;
    let common = settings.common_power_law(&rel);
    let (t, cpu) = (Instant::now(), cpu_seconds());
    let reduced = reduce_release(&rel, &rel.noise, &grid, common.as_ref())?;
    let (reduce_s, reduce_cpu) = (t.elapsed().as_secs_f64(), cpu_seconds() - cpu);
    let flops: f64 = reduced.iter().map(|r| r.flops).sum();
    let t = Instant::now();
    let c = correlate_reduced(reduced, grid, settings, common)?;
    let pairs_s = t.elapsed().as_secs_f64();
    eprintln!(
        "read {} TOAs in {read_s:.3} s (cpu {read_cpu:.3} s); reduced {} pulsars in {reduce_s:.3} s \
         (cpu {reduce_cpu:.3} s, {:.3} GFlop counted); pairs and fits in {pairs_s:.3} s",
        rel.n_toa(),
        rel.pulsars.len(),
        flops * 1e-9,
    );
    Ok((rel, c))
}

/// User plus system CPU seconds of this process so far (all threads).
fn cpu_seconds() -> f64 {
    // SAFETY: getrusage only writes the struct it is given.
    let mut u: libc::rusage = unsafe { std::mem::zeroed() };
    if unsafe { libc::getrusage(libc::RUSAGE_SELF, &mut u) } != 0 {
        return f64::NAN;
    }
    let tv = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 * 1e-6;
    tv(u.ru_utime) + tv(u.ru_stime)
}

/// A short human summary of a correlation analysis.
pub(crate) fn print_summary(rel: &Release, c: &Correlation) {
    println!("{}", rel.title);
    println!(
        "  {} pulsars, {} pairs, {} frequencies (1/{:.2} yr to {}/{:.2} yr), template index {:.3}",
        c.n_pulsars(),
        c.pairs.len(),
        c.grid.k(),
        c.grid.t_span / ptacorr::constants::SECONDS_PER_YEAR,
        c.grid.k(),
        c.grid.t_span / ptacorr::constants::SECONDS_PER_YEAR,
        c.spectral_index
    );
    println!(
        "  {:<9} {:>12} {:>12} {:>7}",
        "pattern", "A^2", "sigma(A^2)", "SNR"
    );
    for p in Pattern::ALL {
        let e = c.estimates[&p];
        println!(
            "  {:<9} {:>12.3e} {:>12.3e} {:>7.2}",
            p.name(),
            e.amplitude2,
            e.amplitude2_sigma,
            e.snr
        );
    }
    let hd = c.estimates[&Pattern::Hd];
    if hd.amplitude2 > 0.0 {
        println!(
            "  hd amplitude A = {:.3e} (sqrt of A^2)",
            hd.amplitude2.sqrt()
        );
    }
    println!("  SNR is not a false-alarm probability: use `ptacorr null` for that.");
}
