//! Per-trial cost of sky scrambles on one thread, for every kernel version the CPU runs, on a
//! release folder (for example one simulated from simulations/bench100.toml): the profile
//! step of docs/performance.md. Prints the time per trial and the checksum of the SNRs (equal
//! for every kernel version).
//!
//!     cargo run --release -p ptacorr-engine --example scramble_bench -- RELEASE [TRIALS] [hd|dipole] [Baseline|Avx2|Avx512]

use ptacorr::analysis::{correlate, CorrelateSettings};
use ptacorr::null::scramble::{Isa, Scrambles};
use ptacorr::null::{Prepared, TrialSource};
use ptacorr::orf::Pattern;
use ptacorr::release::read_release;
use std::time::Instant;

/// CPU seconds of this thread so far (Linux: the first field of /proc/thread-self/schedstat,
/// nanoseconds on the CPU), so a loaded machine does not inflate the figure; wall time when the
/// file is missing.
fn thread_cpu() -> f64 {
    std::fs::read_to_string("/proc/thread-self/schedstat")
        .ok()
        .and_then(|s| s.split_whitespace().next()?.parse::<f64>().ok())
        .map_or_else(
            || {
                std::time::SystemTime::now()
                    .duration_since(std::time::UNIX_EPOCH)
                    .map_or(0.0, |d| d.as_secs_f64())
            },
            |ns| ns * 1e-9,
        )
}

fn main() {
    ptacorr::linalg::single_threaded_blas();
    let args: Vec<String> = std::env::args().collect();
    let dir = args.get(1).expect("usage: scramble_bench RELEASE [TRIALS]");
    let trials: u64 = args.get(2).map_or(100_000, |t| t.parse().expect("TRIALS"));
    let release = read_release(std::path::Path::new(dir)).expect("read the release");
    let corr = correlate(&release, &CorrelateSettings::default()).expect("correlate");
    let pattern = match args.get(3).map(String::as_str) {
        Some("dipole") => Pattern::Dipole,
        _ => Pattern::Hd,
    };
    let prepared = Prepared::new(&corr, pattern).expect("prepare");
    let only = args.get(4).cloned();
    for isa in Isa::available() {
        if only.as_ref().is_some_and(|o| *o != format!("{isa:?}")) {
            continue;
        }
        let s = Scrambles::new(&prepared, pattern, 1, 0.1)
            .expect("scrambles")
            .with_isa(isa);
        let (t0, c0) = (Instant::now(), thread_cpu());
        let mut sum = 0.0;
        for i in 0..trials {
            sum += s.trial(i).expect("trial").snr;
        }
        let (dt, dc) = (t0.elapsed().as_secs_f64(), thread_cpu() - c0);
        let pairs = (prepared.n * (prepared.n - 1) / 2) as f64;
        println!(
            "{isa:?}: {:.3} us CPU per trial ({:.2} ns per pair; wall {:.3} us), {trials} trials, sum of SNRs {sum:e}",
            dc / trials as f64 * 1e6,
            dc / trials as f64 / pairs * 1e9,
            dt / trials as f64 * 1e6,
        );
    }
}
