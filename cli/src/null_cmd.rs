//! `ptacorr null` and `ptacorr merge`: argument handling, the progress bar and Ctrl-C. Every
//! number comes from the engine (ptacorr::null).

use crate::{AnalysisArgs, PatternArg};
use anyhow::{Context, Result};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use ptacorr::null::{self, merge::merge, Control, Method, NullReport, NullSettings, Shard};
use ptacorr::release::read_release;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

/// How null trials are made, on the command line.
#[derive(Clone, Copy, clap::ValueEnum)]
pub enum MethodArg {
    Scramble,
    Phase,
    Simulate,
}

/// Arguments of `ptacorr null`.
#[derive(clap::Args)]
pub struct NullArgs {
    /// The release folder.
    pub release: PathBuf,
    /// scramble (sky positions), phase (Fourier phases) or simulate (draws from the noise model).
    #[arg(long, value_enum)]
    pub method: MethodArg,
    /// Number of trials N (over all shards).
    #[arg(long)]
    pub trials: u64,
    #[arg(long, default_value_t = 1, allow_negative_numbers = true, value_parser = crate::seed_arg)]
    pub seed: u64,
    /// The correlation pattern whose OS is tested: hd, dipole or monopole.
    #[arg(long, value_enum, default_value = "hd")]
    pub pattern: PatternArg,
    /// Scrambles: keep those whose |match| with the true pattern is below this.
    #[arg(long)]
    pub match_threshold: Option<f64>,
    /// Scrambles: also require |match| below the threshold against every earlier accepted
    /// scramble (sequential, O(N^2 pairs); no --shard, no resume).
    #[arg(long)]
    pub mutual_match: bool,
    /// Simulate: full time-domain residuals from the noise model instead of reduced-space draws.
    #[arg(long)]
    pub time_domain: bool,
    /// Skip the analytic generalised chi-square null (eigenvalues of a 2KN x 2KN matrix).
    #[arg(long)]
    pub no_analytic: bool,
    /// Run only shard I of N (e.g. 2/4); combine the shard folders with `ptacorr merge`.
    #[arg(long)]
    pub shard: Option<String>,
    /// Output folder (null.json, trials.csv; checkpoints in OUT/.partial while running).
    #[arg(long)]
    pub out: PathBuf,
    #[command(flatten)]
    pub analysis: AnalysisArgs,
}

impl NullArgs {
    fn settings(&self) -> Result<NullSettings> {
        let method = match self.method {
            MethodArg::Scramble => Method::Scramble,
            MethodArg::Phase => Method::Phase,
            MethodArg::Simulate => Method::Simulate,
        };
        let mut s = NullSettings::new(method, self.trials, self.seed);
        s.pattern = self.pattern.pattern();
        if self.match_threshold.is_some() {
            s.match_threshold = self.match_threshold;
        }
        s.mutual_match = self.mutual_match;
        s.time_domain = self.time_domain;
        s.analytic = !self.no_analytic;
        s.shard = self.shard.as_deref().map(Shard::parse).transpose()?;
        s.analysis = self.analysis.settings();
        Ok(s)
    }
}

/// A progress bar on stderr when it is a terminal; hidden otherwise (CI, pipes).
fn progress_bar(total: u64) -> ProgressBar {
    let pb = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::stderr());
    if !std::io::stderr().is_terminal() {
        pb.set_draw_target(ProgressDrawTarget::hidden());
    }
    pb.set_style(
        ProgressStyle::with_template(
            "{bar:40} {pos}/{len} trials  {per_sec}  {elapsed_precise} elapsed, {eta} left",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    pb
}

/// Ctrl-C (and SIGTERM) set a flag; the run stops after the current chunk, keeping every
/// finished chunk in OUT/.partial.
fn interrupt_flag() -> Arc<AtomicBool> {
    let flag = Arc::new(AtomicBool::new(false));
    let f = flag.clone();
    let _ = ctrlc::set_handler(move || {
        if f.swap(true, Ordering::SeqCst) {
            // A second Ctrl-C: leave at once (every file is written atomically).
            std::process::exit(130);
        }
        errln!(
            "\ninterrupt: finishing the current chunk, then stopping (Ctrl-C again to quit now)"
        );
    });
    flag
}

pub fn run_null(args: NullArgs) -> Result<()> {
    let settings = args.settings()?;
    settings.validate()?;
    let rel = read_release(&args.release)
        .with_context(|| format!("reading release {}", args.release.display()))?;
    let flag = interrupt_flag();
    let range = settings.range();
    let pb = progress_bar(range.end - range.start);
    let progress = |done: u64, _total: u64| pb.set_position(done);
    let control = Control {
        cancel: Some(&flag),
        progress: Some(&progress),
    };
    let report = null::run_null(&rel, &settings, &args.out, control);
    pb.finish_and_clear();
    let report = report?;
    print_report(&report, &args.out);
    Ok(())
}

pub fn run_merge(dirs: &[PathBuf], out: &Path) -> Result<()> {
    let report = merge(dirs, out)?;
    print_report(&report, out);
    Ok(())
}

fn print_report(r: &NullReport, out: &Path) {
    let method = match (r.method, r.time_domain) {
        (Method::Scramble, _) => "sky scrambles",
        (Method::Phase, _) => "phase shifts",
        (Method::Simulate, false) => "simulated nulls (reduced space)",
        (Method::Simulate, true) => "simulated nulls (time domain)",
    };
    outln!(
        "{} pattern, {} {method} (seed {}{})",
        r.pattern.name(),
        r.trials,
        r.seed,
        r.shard
            .map(|s| format!(", shard {}/{}", s.index, s.count))
            .unwrap_or_default()
    );
    outln!("  observed SNR {:.3}", r.observed_snr);
    outln!(
        "  {} trials at least as extreme: p = {:.3e} (95% interval of k/N {:.2e} .. {:.2e}), {} sigma one-sided",
        r.n_at_least_as_extreme,
        r.p_value,
        r.p_value_ci95[0],
        r.p_value_ci95[1],
        r.gaussian_sigma
            .map_or("-".to_string(), |z| format!("{z:.2}"))
    );
    if let Some(a) = r.acceptance_rate {
        outln!(
            "  acceptance rate {:.3} under |match| < {}",
            a,
            r.match_threshold.unwrap_or(1.0)
        );
    }
    if let Some(a) = &r.analytic {
        if a.p_value < a.absolute_accuracy {
            outln!(
                "  analytic null (generalised chi-square): p < {:.0e} (below the inversion's accuracy)",
                a.absolute_accuracy
            );
        } else {
            outln!(
                "  analytic null (generalised chi-square): p = {:.3e}, {} sigma",
                a.p_value,
                a.gaussian_sigma
                    .map_or("-".to_string(), |z| format!("{z:.2}"))
            );
        }
    }
    outln!("  the p-values assume the noise model; a detection claim needs the collaboration's full analysis");
    outln!("wrote {}/null.json, trials.csv", out.display());
}
