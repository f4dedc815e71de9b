//! The `ptacorr` command: argument parsing and presentation only; every number comes from the
//! engine.

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};
use ptacorr::analysis::{
    correlate_observed, CommonAutoPower, CorrelateSettings, Correlation, Stage, DEFAULT_BINS,
    DEFAULT_FREQUENCIES, DEFAULT_SPECTRAL_INDEX,
};
use ptacorr::bins::Binning;
use ptacorr::orf::Pattern;
use ptacorr::release::{read_release, Release};
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::spectrum::PowerLaw;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Instant;

/// `println!` that cannot panic on a closed standard output (print.rs).
macro_rules! outln {
    ($($t:tt)*) => {
        $crate::print::line(false, format_args!($($t)*))
    };
}

/// `eprintln!` that cannot panic on a closed standard error (print.rs).
macro_rules! errln {
    ($($t:tt)*) => {
        $crate::print::line(true, format_args!($($t)*))
    };
}

mod common_cmd;
mod demo;
mod figures_cmd;
mod inject_cmd;
mod job_array_cmd;
mod noise_cmd;
mod null_cmd;
mod print;

#[derive(Parser)]
#[command(
    name = "ptacorr",
    version,
    about = "Search pulsar-timing residuals for the Hellings-Downs correlation of a gravitational-wave background"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
    /// Treat warnings about the data (an isolated TOA, duplicate rows, two pulsars on one
    /// file, a null from another release) as errors.
    #[arg(long, global = true)]
    strict: bool,
    /// Read releases whose residual or design-matrix paths leave the release folder.
    #[arg(long, global = true)]
    allow_outside_paths: bool,
}

/// Print a data warning to stderr (it is also recorded in the output's provenance).
fn print_warning(w: &str) {
    errln!("warning: {w}");
}

/// A seed: a whole number in 0..=2^64-1 (negative numbers reach here and get this message).
pub fn seed_arg(s: &str) -> std::result::Result<u64, String> {
    s.trim()
        .parse::<u64>()
        .map_err(|_| format!("a seed is a whole number from 0 to {}, got {s:?}", u64::MAX))
}

#[derive(Subcommand)]
enum Command {
    /// Simulate the built-in demo array, analyse it and print a summary.
    Demo {
        /// Folder for the simulated release and the analysis.
        #[arg(long, default_value = "ptacorr-demo")]
        out: PathBuf,
        #[arg(long, default_value_t = 2026, allow_negative_numbers = true, value_parser = seed_arg)]
        seed: u64,
    },
    /// Simulate an array from a scenario file and write it as a release.
    Simulate {
        scenario: PathBuf,
        #[arg(long)]
        out: PathBuf,
        #[arg(long, allow_negative_numbers = true, value_parser = seed_arg)]
        seed: Option<u64>,
        /// Replace the release already in --out, as a whole.
        #[arg(long)]
        replace_release: bool,
    },
    /// Cross-correlate every pair of pulsars of a release with the optimal statistic.
    Correlate {
        release: PathBuf,
        #[arg(long)]
        out: PathBuf,
        #[command(flatten)]
        analysis: AnalysisArgs,
        /// Take the auto-power common process from a `ptacorr common` output folder (its CURN
        /// fit at the fixed index) instead of noise.toml.
        #[arg(long, conflicts_with_all = ["no_common", "common_log10_amplitude"])]
        common_fit: Option<PathBuf>,
        /// Which value of that fit's log10 A posterior to take.
        #[arg(long, value_enum, default_value = "median", requires = "common_fit")]
        common_fit_value: common_cmd::FitValueArg,
        #[command(flatten)]
        draws: NmosArgs,
    },
    /// Fit a common red process (CURN, HD, monopole, dipole) and compare them by Bayes factors.
    Common(Box<common_cmd::CommonArgs>),
    /// Draw the figure of an output folder (correlate, null, inject or noise).
    Plot(figures_cmd::PlotArgs),
    /// Gather output folders into a memo-ready report (Markdown, HTML, LaTeX tables, figures).
    Report(figures_cmd::ReportArgs),
    /// Inject a background at several amplitudes and measure how well it is recovered.
    Inject(inject_cmd::InjectArgs),
    /// False-alarm probability of the observed SNR from null trials (and the analytic null).
    Null(Box<null_cmd::NullArgs>),
    /// Merge the shard folders of one `ptacorr null` run or of one `correlate` run with
    /// noise draws.
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
    /// Write a SLURM job-array recipe (array, merge job, submit script) for a null, inject or
    /// noise campaign (docs/cluster.md).
    JobArray(job_array_cmd::JobArrayArgs),
}

#[derive(clap::Args, Clone)]
pub(crate) struct AnalysisArgs {
    /// Number of analysis frequencies f_j = j / T_span.
    #[arg(long, default_value_t = DEFAULT_FREQUENCIES)]
    frequencies: usize,
    /// Spectral index of the template (13/3 for a background of binaries).
    #[arg(long, default_value_t = DEFAULT_SPECTRAL_INDEX)]
    spectral_index: f64,
    /// Number of angular bins.
    #[arg(long, default_value_t = DEFAULT_BINS)]
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

/// The noise-marginalised OS of `correlate` (docs/noise-marginalised.md).
#[derive(clap::Args, Clone)]
pub(crate) struct NmosArgs {
    /// Repeat the OS over noise draws from this folder of per-pulsar chain tables (LABEL.csv,
    /// as `ptacorr noise` writes them under chains/).
    #[arg(long)]
    noise_draws: Option<PathBuf>,
    /// Also draw the common process's amplitude from this table (common-draws.csv of
    /// `ptacorr common`).
    #[arg(long)]
    common_draws: Option<PathBuf>,
    /// Number of noise draws (over all shards).
    #[arg(long, default_value_t = ptacorr::nmos::DEFAULT_DRAWS)]
    draws: u64,
    /// Seed of the row picks: draw d uses (seed, d) alone.
    #[arg(long, default_value_t = 0, allow_negative_numbers = true, value_parser = seed_arg)]
    seed: u64,
    /// Run only shard I of N of the draws (merge the folders with `ptacorr merge`).
    #[arg(long)]
    shard: Option<String>,
}

impl NmosArgs {
    /// The settings, or None without any draw table.
    fn settings(&self) -> ptacorr::Result<Option<ptacorr::nmos::NmosSettings>> {
        if self.noise_draws.is_none() && self.common_draws.is_none() {
            if self.shard.is_some() {
                return Err(ptacorr::Error::setting(
                    "shard",
                    "correlate is sharded over noise draws; give --noise-draws or --common-draws",
                ));
            }
            return Ok(None);
        }
        let shard = match &self.shard {
            Some(s) => ptacorr::shard::Shard::parse(s)?,
            None => ptacorr::shard::Shard::ALL,
        };
        let s = ptacorr::nmos::NmosSettings {
            chains: self.noise_draws.clone(),
            common_draws: self.common_draws.clone(),
            draws: self.draws,
            seed: self.seed,
            shard,
        };
        s.validate()?;
        Ok(Some(s))
    }
}

/// A correlation pattern on the command line.
#[derive(Clone, Copy, clap::ValueEnum)]
pub(crate) enum PatternArg {
    Hd,
    Monopole,
    Dipole,
}

impl PatternArg {
    pub(crate) fn pattern(self) -> Pattern {
        match self {
            PatternArg::Hd => Pattern::Hd,
            PatternArg::Monopole => Pattern::Monopole,
            PatternArg::Dipole => Pattern::Dipole,
        }
    }
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
    ptacorr::linalg::keep_freed_memory();
    let cli = Cli::parse();
    ptacorr::release::set_default_read_options(ptacorr::release::ReadOptions {
        allow_outside_paths: cli.allow_outside_paths,
        strict: cli.strict,
        on_warning: Some(print_warning),
    });
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            errln!("error: {e}");
            for cause in e.chain().skip(1) {
                errln!("  caused by: {cause}");
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
            replace_release,
        } => {
            let s = Scenario::read(&scenario)?;
            let seed = s.seed(seed);
            ptacorr::output::check_release_target(&out, replace_release)?;
            let layout = lay_out(&s, seed);
            let pulsars =
                ptacorr::simulate::simulate_release(&layout, seed, &out, replace_release)?;
            outln!(
                "simulated {} pulsars, {} TOAs (seed {seed}) -> {}",
                pulsars.len(),
                ptacorr::release::total_toas(&pulsars),
                out.display()
            );
            Ok(())
        }
        Command::Correlate {
            release,
            out,
            analysis,
            common_fit,
            common_fit_value,
            draws,
        } => {
            let nmos = draws.settings()?;
            let mut settings = analysis.settings();
            if let Some(dir) = common_fit {
                settings.common = CommonAutoPower::FromCommonFit(common_cmd::common_from_fit(
                    &dir,
                    common_fit_value,
                )?);
            }
            settings.validate()?;
            let Some(nmos) = nmos else {
                let (rel, c) = correlate_release(&release, &settings)?;
                c.write(&out, &rel, &settings)?;
                print_summary(&rel, &c);
                outln!("wrote {}/summary.json, pairs.csv, bins.csv", out.display());
                return Ok(());
            };
            // The chain tables are read and checked before any work.
            let rel = read_release(&release)
                .with_context(|| format!("reading release {}", release.display()))?;
            let tables = ptacorr::nmos::read_tables(&rel, &nmos, &settings)?;
            let (rel, c) = correlate_release(&release, &settings)?;
            let (summary, results) = ptacorr::nmos::run(&rel, &settings, &nmos, &tables)?;
            errln!("{} noise draws done", results.len());
            c.write_with(&out, &rel, &settings, Some((&summary, &results)))?;
            print_summary(&rel, &c);
            print_nmos(&summary);
            outln!(
                "wrote {}/summary.json, pairs.csv, bins.csv, {}",
                out.display(),
                ptacorr::nmos::DRAWS_FILE
            );
            Ok(())
        }
        Command::Common(args) => common_cmd::run(&args),
        Command::Plot(args) => figures_cmd::plot(&args),
        Command::Report(args) => figures_cmd::report(&args).map(|_| ()),
        Command::Inject(args) => inject_cmd::run(args),
        Command::Null(args) => null_cmd::run_null(*args),
        Command::Merge { dirs, out } => {
            // Shards of a correlate run with noise draws, or of a null run.
            let first = ptacorr::output::check_manifest(&dirs[0])?;
            if first.command == "correlate" {
                let s = ptacorr::nmos::merge_shards(&dirs, &out)?;
                print_nmos(&s);
                outln!("merged {} shards into {}", dirs.len(), out.display());
                Ok(())
            } else {
                null_cmd::run_merge(&dirs, &out)
            }
        }
        Command::Noise(args) => noise_cmd::run(args),
        Command::MergeNoise(args) => noise_cmd::run_merge(args),
        Command::JobArray(args) => job_array_cmd::run(args, cli.strict, cli.allow_outside_paths),
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
    // Wall and CPU clock at the start of each stage of the engine's analysis.
    let mut marks: Vec<(Stage, Instant, f64)> = Vec::with_capacity(3);
    let c = correlate_observed(&rel, settings, &mut |stage| {
        marks.push((stage, Instant::now(), cpu_seconds()))
    })?;
    let mark = |s: Stage| marks.iter().find(|m| m.0 == s).map(|m| (m.1, m.2));
    let (Some(reduce), Some(pairs), Some(done)) =
        (mark(Stage::Reduce), mark(Stage::Pairs), mark(Stage::Done))
    else {
        anyhow::bail!("the analysis did not report its stages");
    };
    let reduce_s = (pairs.0 - reduce.0).as_secs_f64();
    let reduce_cpu = pairs.1 - reduce.1;
    let pairs_s = (done.0 - pairs.0).as_secs_f64();
    errln!(
        "read {} TOAs in {read_s:.3} s (cpu {read_cpu:.3} s); reduced {} pulsars in {reduce_s:.3} s \
         (cpu {reduce_cpu:.3} s, {:.3} GFlop counted); pairs and fits in {pairs_s:.3} s",
        rel.n_toa(),
        rel.pulsars.len(),
        c.reduction_flops() * 1e-9,
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
    outln!("{}", rel.title);
    outln!(
        "  {} pulsars, {} pairs, {} frequencies (1/{:.2} yr to {}/{:.2} yr), template index {:.3}",
        c.n_pulsars(),
        c.pairs.len(),
        c.grid.k(),
        c.grid.t_span / ptacorr::constants::SECONDS_PER_YEAR,
        c.grid.k(),
        c.grid.t_span / ptacorr::constants::SECONDS_PER_YEAR,
        c.spectral_index
    );
    outln!(
        "  {:<9} {:>12} {:>12} {:>7}",
        "pattern",
        "A^2",
        "sigma(A^2)",
        "SNR"
    );
    for p in Pattern::ALL {
        let e = c.estimates[&p];
        outln!(
            "  {:<9} {:>12.3e} {:>12.3e} {:>7.2}",
            p.name(),
            e.amplitude2,
            e.amplitude2_sigma,
            e.snr
        );
    }
    if let Some(a) = c.estimates[&Pattern::Hd].amplitude() {
        outln!("  hd amplitude A = {a:.3e} (sqrt of A^2)");
    }
    outln!("  SNR is not a false-alarm probability: use `ptacorr null` for that.");
}

/// The noise-marginalised OS in a few lines.
pub(crate) fn print_nmos(s: &ptacorr::nmos::NmosSummary) {
    outln!(
        "  noise-marginalised over {} draws ({} pulsars drawn, {} at noise.toml{}):",
        s.draws,
        s.pulsars_drawn.len(),
        s.pulsars_fixed.len(),
        if s.common_draws.is_some() {
            ", common amplitude drawn"
        } else {
            ""
        }
    );
    outln!(
        "  {:<9} {:>12} {:>25} {:>7} {:>15}",
        "pattern",
        "median A^2",
        "68% interval of A^2",
        "SNR",
        "68% of SNR"
    );
    for (p, x) in &s.patterns {
        outln!(
            "  {:<9} {:>12.3e} {:>12.3e}..{:<11.3e} {:>7.2} {:>6.2}..{:<6.2}",
            p.name(),
            x.amplitude2.median,
            x.amplitude2.interval_68[0],
            x.amplitude2.interval_68[1],
            x.snr.median,
            x.snr.interval_68[0],
            x.snr.interval_68[1]
        );
    }
}
