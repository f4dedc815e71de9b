//! Criterion benchmarks of the analytic and the reduced-space simulated null at 100 pulsars
//! (simulations/bench100.toml: 4,950 pairs, K = 14, 2,800 eigenvalues): the analytic p-value
//! of one release (the stable roots, the eigenvalues of the quadratic form and the tail at the
//! observed SNR) and 10^5 reduced-space simulated null trials (rayon over trials). The targets
//! of docs/performance.md: under 5 s and under 10 s on 2 cores. Also 10^4 sky scrambles with
//! the 0.1 match threshold on one thread, for every kernel version the CPU runs (the per-trial
//! cost; `ptacorr null --method scramble` runs them on every core).
//!
//!     cargo bench -p ptacorr-engine --bench nulls

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use ptacorr::analysis::{correlate, CorrelateSettings};
use ptacorr::null::scramble::{Isa, Scrambles};
use ptacorr::null::simulated::Reduced;
use ptacorr::null::TrialSource;
use ptacorr::null::{analytic, run_chunks, Control, Prepared};
use ptacorr::orf::Pattern;
use ptacorr::release::read_release;
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::simulate::simulate_scenario;
use ptacorr::whiten::analysis_roots;
use std::path::Path;
use std::time::Duration;

fn nulls(c: &mut Criterion) {
    ptacorr::linalg::single_threaded_blas();
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/bench100.toml");
    let scenario = Scenario::read(&path).expect("simulations/bench100.toml");
    let dir = std::env::temp_dir().join(format!("ptacorr-bench-nulls-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    simulate_scenario(&lay_out(&scenario, 7), 7, &dir).expect("simulate bench100");
    let release = read_release(&dir).expect("read bench100");
    let corr = correlate(&release, &CorrelateSettings::default()).expect("correlate");
    let prepared = Prepared::new(&corr, Pattern::Hd).expect("prepare");

    let mut g = c.benchmark_group("nulls 100 pulsars");
    g.sample_size(10)
        .warm_up_time(Duration::from_secs(1))
        .measurement_time(Duration::from_secs(20));
    g.bench_function("roots of Z~ (bare reduction + stable transform)", |b| {
        b.iter(|| analysis_roots(black_box(&release), &corr).unwrap())
    });
    let roots = analysis_roots(&release, &corr).unwrap();
    g.bench_function("analytic eigenvalues (2800 x 2800)", |b| {
        b.iter(|| analytic::eigenvalues(black_box(&prepared), &roots).unwrap())
    });
    let e = analytic::eigenvalues(&prepared, &roots).unwrap();
    g.bench_function("analytic tail at the observed SNR", |b| {
        b.iter(|| analytic::upper_tail(black_box(&e), prepared.observed_snr).unwrap())
    });
    g.bench_function(
        "analytic p-value of one release (roots + eigenvalues + tail)",
        |b| {
            b.iter(|| {
                let r = analysis_roots(&release, &corr).unwrap();
                let e = analytic::eigenvalues(&prepared, &r).unwrap();
                analytic::upper_tail(&e, prepared.observed_snr).unwrap()
            })
        },
    );
    for isa in Isa::available() {
        let s = Scrambles::new(&prepared, Pattern::Hd, 1, 0.1)
            .unwrap()
            .with_isa(isa);
        g.bench_function(format!("10^4 sky scrambles, 1 thread, {isa:?}"), |b| {
            b.iter(|| {
                (0..10_000)
                    .map(|i| s.trial(i).unwrap().attempts)
                    .sum::<u64>()
            })
        });
    }
    let source = Reduced::new(&prepared, roots.clone(), 1).unwrap();
    g.bench_function("10^5 reduced-space simulated nulls", |b| {
        b.iter(|| {
            run_chunks(&source, 0..100_000, 1000, None, Control::default())
                .unwrap()
                .len()
        })
    });
    g.finish();
    let _ = std::fs::remove_dir_all(&dir);
}

criterion_group!(benches, nulls);
criterion_main!(benches);
