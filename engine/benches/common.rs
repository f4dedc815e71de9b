//! Criterion benchmarks of the common-process likelihood at 100 pulsars and K = 14
//! (docs/common-process.md): the fixed-index HD likelihood curve over 200 amplitudes (one
//! eigendecomposition of the 2800 x 2800 M = H^T Z H plus 200 O(2KN) evaluations), one
//! spectral-index node of each model, and (with PTACORR_BENCH_FULL_GRID=1, slow) the whole fit of
//! all four models on the 41-index x 40-amplitude grid.
//!
//!     cargo bench -p ptacorr-engine --bench common

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use ndarray::{Array1, Array2};
use ptacorr::common::{fit_common, CommonData, CommonModel, CommonSettings};
use ptacorr::spectrum::frequencies;
use std::time::Duration;

const N_PULSARS: usize = 100;
const K: usize = 14;

/// A fictional array: isotropic-ish directions (a Fibonacci sphere), and per pulsar a positive
/// definite Z_a = B B^T + c I of the scale of 1 us white noise over ~500 TOAs, with X_a drawn
/// deterministically. The cost of the likelihood does not depend on the values.
fn data() -> CommonData {
    let m = 2 * K;
    let t_span = 15.0 * 365.25 * 86400.0;
    let mut x = Vec::new();
    let mut z = Vec::new();
    let mut directions = Vec::new();
    for a in 0..N_PULSARS {
        let b = Array2::from_shape_fn((m, m), |(i, j)| {
            (((a * 31 + i * 7 + j * 13) % 17) as f64 / 17.0 - 0.5) * 1e6
        });
        z.push(b.dot(&b.t()) + Array2::<f64>::eye(m) * 5e14);
        x.push(Array1::from_shape_fn(m, |i| {
            (((a * 11 + i * 5) % 23) as f64 / 23.0 - 0.5) * 1e8
        }));
        let zc = 1.0 - 2.0 * (a as f64 + 0.5) / N_PULSARS as f64;
        let phi = a as f64 * std::f64::consts::PI * (3.0 - 5f64.sqrt());
        let r = (1.0 - zc * zc).sqrt();
        directions.push([r * phi.cos(), r * phi.sin(), zc]);
    }
    CommonData {
        labels: (0..N_PULSARS).map(|a| format!("B{a:03}")).collect(),
        directions,
        x,
        z,
        freqs: frequencies(K, t_span),
        t_span,
    }
}

fn likelihood(c: &mut Criterion) {
    let d = data();
    let mut g = c.benchmark_group("common");
    g.sample_size(10).measurement_time(Duration::from_secs(20));
    g.bench_function("hd_fixed_index_curve_200_amplitudes", |b| {
        b.iter(|| {
            let curve = d.amplitude_curve(CommonModel::Hd, 13.0 / 3.0).unwrap();
            let s: f64 = (0..200)
                .map(|i| curve.at_log10(-18.0 + 6.0 * i as f64 / 199.0))
                .sum();
            black_box(s)
        })
    });
    for m in [
        CommonModel::Curn,
        CommonModel::Monopole,
        CommonModel::Dipole,
    ] {
        g.bench_function(format!("{}_one_index_node", m.name()), |b| {
            b.iter(|| black_box(d.amplitude_curve(m, 3.1).unwrap()))
        });
    }
    if std::env::var_os("PTACORR_BENCH_FULL_GRID").is_some() {
        let s = CommonSettings {
            n_spectral_index: 41,
            n_table_amplitudes: 40,
            ..Default::default()
        };
        g.bench_function("fit_four_models_41x40_grid", |b| {
            b.iter(|| black_box(fit_common(&d, &s).unwrap()))
        });
    }
    g.finish();
}

criterion_group!(benches, likelihood);
criterion_main!(benches);
