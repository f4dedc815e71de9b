//! `ptacorr inject`: injection campaigns (argument parsing and presentation only; every number
//! comes from the engine's `inject` module).

use crate::PatternArg;
use anyhow::{bail, Context, Result};
use ptacorr::analysis::{CommonAutoPower, DEFAULT_FREQUENCIES, DEFAULT_SPECTRAL_INDEX};
use ptacorr::inject::{
    merge_shards, parse_amplitudes, run_campaign, AutoPowerChoice, InjectSettings, Mode, Outcome,
    Shard, Target, DEFAULT_NULL_TRIALS, DEFAULT_REALIZATIONS,
};
use ptacorr::release::read_release;
use ptacorr::scenario::{Scenario, SimulationSpec};
use ptacorr::spectrum::PowerLaw;
use std::path::PathBuf;
use std::time::Instant;

#[derive(Clone, Copy, clap::ValueEnum)]
pub enum ModeArg {
    /// Draw the reduced data jointly with their covariance (fast).
    Reduced,
    /// Simulate residuals, fit out the timing model and reduce (slow, closest to reality).
    TimeDomain,
}

#[derive(Clone, Copy, clap::ValueEnum)]
pub enum AutoPowerArg {
    /// Each pulsar's auto-power holds the common process at the injected amplitude.
    Injected,
    /// The same common process (noise.toml's, --common-log10-amplitude's, or none) throughout.
    Fixed,
}

#[derive(clap::Args)]
pub struct InjectArgs {
    /// A release folder (the signal is added to its residuals) or a scenario file (fresh
    /// simulated noise every realization). Not needed with --merge.
    target: Option<PathBuf>,
    /// Amplitudes: comma-separated values and log-spaced ranges log:LO:HI:N, e.g.
    /// `0,log:1e-16:1e-14:7`.
    #[arg(long)]
    amplitudes: Option<String>,
    /// Realizations per amplitude (over all shards).
    #[arg(long, default_value_t = DEFAULT_REALIZATIONS)]
    realizations: u64,
    /// Spectral index of the injected background and of the template.
    #[arg(long, default_value_t = DEFAULT_SPECTRAL_INDEX)]
    spectral_index: f64,
    /// Correlation pattern of the injection and of the fit: hd, monopole or dipole.
    #[arg(long, value_enum, default_value = "hd")]
    pattern: PatternArg,
    #[arg(long, default_value_t = 1, allow_negative_numbers = true, value_parser = crate::seed_arg)]
    seed: u64,
    /// Run shard I of N only (a contiguous block of realizations; I/N, 1-based).
    #[arg(long)]
    shard: Option<String>,
    #[arg(long, value_enum, default_value = "reduced")]
    mode: ModeArg,
    /// What the analysis puts into each pulsar's auto-power.
    #[arg(long, value_enum, default_value = "injected")]
    auto_power: AutoPowerArg,
    /// With --auto-power fixed: log10 amplitude of the common process in the auto-power.
    #[arg(long, allow_hyphen_values = true, conflicts_with = "no_common")]
    common_log10_amplitude: Option<f64>,
    /// With --auto-power fixed: no common process in the auto-power.
    #[arg(long)]
    no_common: bool,
    /// Number of analysis frequencies f_j = j / T_span.
    #[arg(long, default_value_t = DEFAULT_FREQUENCIES)]
    frequencies: usize,
    /// False-alarm probability of the detection threshold (default: 0.001, raised to leave at
    /// least 10 null trials above the threshold).
    #[arg(long)]
    false_alarm: Option<f64>,
    /// Simulated null trials for the threshold (when no --null is given).
    #[arg(long, default_value_t = DEFAULT_NULL_TRIALS)]
    null_trials: usize,
    /// A null folder whose trials.csv gives the threshold.
    #[arg(long)]
    null: Option<PathBuf>,
    /// Time domain: highest simulated background frequency in units of 1/T_span (default: the
    /// analysis frequencies).
    #[arg(long)]
    signal_frequencies: Option<usize>,
    /// Time domain: the background ladder's spacing is 1/(factor T_span) (default 1).
    #[arg(long)]
    signal_span_factor: Option<usize>,
    /// On a release: keep its TOAs, sky positions and noise model but draw fresh noise for
    /// every realization instead of adding the signal to its residuals (the threshold then
    /// comes from a simulated null of the same kind).
    #[arg(long)]
    fresh_noise: bool,
    /// Merge these shard folders instead of running (repeat the option).
    #[arg(long)]
    merge: Vec<PathBuf>,
    #[arg(long)]
    out: PathBuf,
}

pub fn run(args: InjectArgs) -> Result<()> {
    let t = Instant::now();
    ptacorr::linalg::single_threaded_blas();
    if !args.merge.is_empty() {
        let out = merge_shards(&args.merge)?;
        out.write(&args.out)?;
        print_table(&out);
        outln!(
            "merged {} shards -> {}/recovery.csv, recovery.json, realizations.csv",
            args.merge.len(),
            args.out.display()
        );
        return Ok(());
    }
    let Some(path) = args.target.clone() else {
        bail!("give a TARGET (release folder or scenario file), or --merge shard folders");
    };
    let Some(amps) = &args.amplitudes else {
        bail!("give --amplitudes, e.g. 0,log:1e-16:1e-14:7");
    };
    let pattern = args.pattern.pattern();
    let is_release = path.is_dir() || path.file_name().is_some_and(|n| n == "release.toml");
    let target = if is_release {
        let rel =
            read_release(&path).with_context(|| format!("reading release {}", path.display()))?;
        if args.fresh_noise {
            Target::from_release_fresh_noise(&rel, args.frequencies)
        } else {
            Target::from_release(&rel)
        }
    } else {
        if args.fresh_noise {
            bail!("--fresh-noise applies to a release target; a scenario always draws fresh noise");
        }
        let text = std::fs::read_to_string(&path)
            .with_context(|| format!("reading scenario {}", path.display()))?;
        let s = Scenario::parse(&text, &path)?;
        Target::from_scenario(&s, &text)
    };
    let settings = InjectSettings {
        amplitudes: parse_amplitudes(amps)?,
        realizations: args.realizations,
        spectral_index: args.spectral_index,
        pattern,
        seed: args.seed,
        shard: match &args.shard {
            Some(s) => Shard::parse(s)?,
            None => Shard::ALL,
        },
        mode: match args.mode {
            ModeArg::Reduced => Mode::Reduced,
            ModeArg::TimeDomain => Mode::TimeDomain,
        },
        auto_power: match args.auto_power {
            AutoPowerArg::Injected => AutoPowerChoice::Injected,
            AutoPowerArg::Fixed => AutoPowerChoice::Fixed,
        },
        common: match (args.no_common, args.common_log10_amplitude) {
            (true, _) => CommonAutoPower::Off,
            (false, Some(a)) => CommonAutoPower::Given(PowerLaw {
                log10_amplitude: a,
                spectral_index: args.spectral_index,
            }),
            (false, None) => CommonAutoPower::FromNoiseModel,
        },
        n_frequencies: args.frequencies,
        false_alarm: args.false_alarm,
        null_trials: args.null_trials,
        null_dir: args.null.clone(),
        signal_simulation: match (args.signal_frequencies, args.signal_span_factor) {
            (None, None) => None,
            (k, f) => Some(SimulationSpec {
                n_frequencies: k.unwrap_or(args.frequencies),
                span_factor: f.unwrap_or(1),
            }),
        },
    };
    let out = run_campaign(target, settings)?;
    out.write(&args.out)?;
    print_table(&out);
    errln!("done in {:.2} s", t.elapsed().as_secs_f64());
    outln!(
        "wrote {}/recovery.csv, recovery.json, realizations.csv, coverage_plugin.csv, campaign.json",
        args.out.display()
    );
    Ok(())
}

fn print_table(out: &Outcome) {
    let s = &out.state;
    outln!("target: {}", s.target.describe());
    outln!(
        "{} injections, {} pattern, {} realizations per amplitude; detection: snr > {:.3} (false-alarm probability {})",
        s.mode.name(),
        s.pattern.name(),
        out.realizations(),
        s.detection_threshold_snr,
        s.false_alarm_probability
    );
    outln!(
        "  {:>10} {:>11} {:>11} {:>9} {:>7} {:>13} {:>13} {:>6}",
        "A",
        "mean A2",
        "bias/sem",
        "std A2",
        "snr",
        "cov68 w/full",
        "cov95 w/full",
        "P_det"
    );
    for r in &out.rows {
        outln!(
            "  {:>10.3e} {:>11.3e} {:>11.2} {:>9.2e} {:>7.2} {:>6.3}/{:<6.3} {:>6.3}/{:<6.3} {:>6.3}",
            r.amplitude,
            r.amplitude2_mean,
            if r.bias_sem > 0.0 { r.bias / r.bias_sem } else { 0.0 },
            r.amplitude2_std,
            r.snr_mean,
            r.coverage68_weak,
            r.coverage68_full,
            r.coverage95_weak,
            r.coverage95_full,
            r.detection_probability
        );
    }
}
