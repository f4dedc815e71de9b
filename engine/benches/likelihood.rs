//! Criterion benchmark of one noise-likelihood-and-gradient evaluation (engine/src/likelihood.rs)
//! at 2,400 TOAs (two backends with ECORR, red noise on 30 frequencies, DM on 30), printed
//! beside its counted flops (`PulsarLikelihood::flops`) so the rate can be set against the
//! dgemm rate of docs/performance.md.
//!
//!     cargo bench -p ptacorr-engine --bench likelihood

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use ptacorr::likelihood::{BackendTerms, Components, PulsarLikelihood};
use ptacorr::linalg::single_threaded_blas;
use ptacorr::reduce::FrequencyGrid;
use ptacorr::release::Pulsar;

const N: usize = 2_400;

/// A fictional pulsar: epochs of 3 channels every ~4.5 days over 10 years, two backends.
fn pulsar() -> Pulsar {
    let mut p = Pulsar {
        label: "B01".into(),
        ra: 1.0,
        dec: 0.3,
        direction: [0.5, 0.5, 0.5f64.sqrt()],
        mjd: Vec::new(),
        residual: Vec::new(),
        sigma: Vec::new(),
        freq_mhz: Vec::new(),
        backend: Vec::new(),
        backends: vec!["KRK-L".into(), "MRL-UHF".into()],
        design: None,
    };
    for i in 0..N {
        let epoch = (i / 3) as f64;
        p.mjd.push(56000.0 + 4.56 * epoch + 1e-4 * (i % 3) as f64);
        p.residual
            .push(1e-7 * ((i * 7919) % 1000) as f64 / 1000.0 - 0.5e-7);
        p.sigma.push(3e-7);
        p.freq_mhz.push([820.0, 1310.0, 1510.0][i % 3]);
        p.backend.push(usize::from(i % 3 == 0));
    }
    p
}

fn likelihood(c: &mut Criterion) {
    single_threaded_blas();
    let p = pulsar();
    let grid = FrequencyGrid::new(p.mjd[0], p.mjd[N - 1], 1).unwrap();
    let all = BackendTerms {
        efac: true,
        log10_equad: true,
        log10_ecorr: true,
    };
    let comp = Components {
        backends: vec![all, all],
        red: Some(30),
        dm: Some(30),
        common: None,
    };
    let lik = PulsarLikelihood::new(&p, &comp, &grid).unwrap();
    let theta = [1.0, -7.0, -7.0, 1.1, -7.2, -6.8, -13.5, 3.0, -13.8, 2.5];
    let mut grad = vec![0.0; lik.dim()];
    let (n, cols) = lik.shape();
    eprintln!(
        "likelihood: n = {n}, columns = {cols}, {:.3e} flops counted per value and gradient",
        lik.flops()
    );
    c.bench_function("likelihood_and_gradient_2400_toas", |b| {
        b.iter(|| {
            black_box(
                lik.log_likelihood_and_gradient(black_box(&theta), &mut grad)
                    .unwrap(),
            )
        })
    });
    c.bench_function("likelihood_value_2400_toas", |b| {
        b.iter(|| black_box(lik.log_likelihood(black_box(&theta)).unwrap()))
    });
}

criterion_group!(benches, likelihood);
criterion_main!(benches);
