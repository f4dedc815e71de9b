//! Criterion benchmark of the noise-marginalised OS (docs/noise-marginalised.md) on
//! simulations/nmos100.toml: 100 pulsars, about 2,400 TOAs each, K = 14, every pulsar drawn
//! from a chain table of 1,000 rows (EFAC and EQUAD of its backend, and its red-noise power law
//! where it has one). One iteration is 100 draws; the goal of issue 13 is 1,000 draws in under
//! a minute on 2 cores, i.e. under 6 s per iteration.
//!
//!     cargo bench -p ptacorr-engine --bench nmos

use criterion::{criterion_group, criterion_main, Criterion};
use ptacorr::analysis::CorrelateSettings;
use ptacorr::chains::{ChainDraw, ChainTable, Parameter};
use ptacorr::nmos::{read_tables, run_draws, NmosSettings};
use ptacorr::release::read_release;
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::shard::Shard;
use ptacorr::simulate::simulate_scenario;
use std::path::Path;
use std::time::Duration;

fn nmos(c: &mut Criterion) {
    ptacorr::linalg::single_threaded_blas();
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/nmos100.toml");
    let scenario = Scenario::read(&path).expect("simulations/nmos100.toml");
    let dir = std::env::temp_dir().join(format!("ptacorr-bench-nmos-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    simulate_scenario(&lay_out(&scenario, 13), 13, &dir.join("release")).expect("simulate");
    let release = read_release(&dir.join("release")).expect("read");
    let chains = dir.join("chains");
    std::fs::create_dir_all(&chains).unwrap();
    for (k, p) in release.pulsars.iter().enumerate() {
        let noise = release.noise.pulsar(&p.label);
        let b = &p.backends[0];
        let w = noise.white_for(b);
        let mut params = vec![
            Parameter::Efac(b.clone()),
            Parameter::EquadLog10S(b.clone()),
        ];
        if noise.red.is_some() {
            params.extend([Parameter::RedLog10Amplitude, Parameter::RedSpectralIndex]);
        }
        let mut t = ChainTable::new(params).unwrap();
        for d in 0..1000u64 {
            let u = ((d * 37 + k as u64 * 11) % 101) as f64 / 101.0 - 0.5;
            let mut values = vec![
                w.efac * (1.0 + 0.1 * u),
                w.equad_log10_s.unwrap_or(-7.0) + 0.3 * u,
            ];
            if let Some(r) = noise.red {
                values.extend([r.log10_amplitude + 0.2 * u, r.spectral_index + 0.5 * u]);
            }
            t.push(ChainDraw {
                chain: 0,
                draw: d,
                log_posterior: None,
                diverging: false,
                values,
            })
            .unwrap();
        }
        t.write(&chains.join(format!("{}.csv", p.label))).unwrap();
    }
    let cs = CorrelateSettings::default();
    let settings = NmosSettings {
        chains: Some(chains.clone()),
        common_draws: None,
        draws: 100,
        seed: 1,
        shard: Shard::ALL,
    };
    let tables = read_tables(&release, &settings, &cs).expect("tables");
    let mut g = c.benchmark_group("nmos 100 pulsars x 2400 TOAs");
    g.sample_size(10)
        .warm_up_time(Duration::from_secs(1))
        .measurement_time(Duration::from_secs(60));
    g.bench_function("100 noise draws (every pulsar drawn)", |b| {
        b.iter(|| run_draws(&release, &cs, &settings, &tables).unwrap())
    });
    g.finish();
    let _ = std::fs::remove_dir_all(&dir);
}

criterion_group!(benches, nmos);
criterion_main!(benches);
