//! Criterion benchmarks of the engine's kernels at the size of one pulsar of the 100 x 10k
//! benchmark array (docs/performance.md): the Fourier rows, the rank-k update of the reduction,
//! the reduction of one pulsar, the pair traces of 100 pulsars, the covariances with signal of
//! 100 pulsars and the parse of one residual table.
//!
//!     cargo bench -p ptacorr-engine

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use ndarray::Array2;
use ptacorr::basis::fourier_row_ladder;
use ptacorr::linalg::{single_threaded_blas, syrk_tn};
use ptacorr::noise::{PulsarNoise, RedProcess, WhiteNoise};
use ptacorr::optimal::{pair_traces, weight};
use ptacorr::reduce::{reduce_pulsar, AutoPower, FrequencyGrid};
use ptacorr::release::{read_residuals, Pulsar};
use ptacorr::spectrum::PowerLaw;

const N: usize = 10_000;
const K: usize = 30;

/// A fictional pulsar: N TOAs in epochs of 4 channels every ~1.5 days over 10 years.
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
        backends: vec!["KRK-L".into()],
        design: None,
    };
    for i in 0..N {
        let epoch = (i / 4) as f64;
        p.mjd.push(56000.0 + 1.461 * epoch + 1e-4 * (i % 4) as f64);
        p.residual
            .push(1e-7 * ((i * 7919) % 1000) as f64 / 1000.0 - 0.5e-7);
        p.sigma.push(1e-6 * (1.0 + 0.1 * (i % 5) as f64));
        p.freq_mhz.push(1210.0 + 100.0 * (i % 4) as f64);
        p.backend.push(0);
    }
    p
}

fn noise(dm: bool) -> PulsarNoise {
    let proc = |a: f64, g: f64| RedProcess {
        log10_amplitude: a,
        spectral_index: g,
        n_frequencies: None,
    };
    PulsarNoise {
        white: vec![WhiteNoise {
            backend: "KRK-L".into(),
            efac: 1.05,
            equad_log10_s: Some(-7.5),
            ecorr_log10_s: Some(-7.3),
        }],
        red: Some(proc(-14.0, 3.0)),
        dm: dm.then(|| proc(-13.5, 2.5)),
    }
}

fn kernels(c: &mut Criterion) {
    single_threaded_blas();
    let p = pulsar();
    let grid = FrequencyGrid::new(p.mjd[0], *p.mjd.last().unwrap(), K).unwrap();
    let common = PowerLaw {
        log10_amplitude: -14.5,
        spectral_index: 13.0 / 3.0,
    };
    let auto = AutoPower {
        common: Some(&common),
    };

    c.bench_function("fourier rows 10k TOAs x 60 columns", |b| {
        let mut row = vec![0.0; 2 * K];
        b.iter(|| {
            let mut acc = 0.0;
            for &m in &p.mjd {
                fourier_row_ladder((m - p.mjd[0]) * 86400.0, grid.freqs[0], &mut row);
                acc += row[7];
            }
            black_box(acc)
        })
    });

    let a = Array2::from_shape_fn((N, 123), |(i, j)| ((i * 31 + j * 17) % 89) as f64 - 44.0);
    c.bench_function("syrk 10k x 123 (A^T A, upper)", |b| {
        let mut g = Array2::zeros((123, 123));
        b.iter(|| syrk_tn(1.0, black_box(&a), 0.0, &mut g))
    });

    for dm in [false, true] {
        let pn = noise(dm);
        let name = if dm {
            "reduce one pulsar 10k TOAs K=30 (red, DM, ECORR)"
        } else {
            "reduce one pulsar 10k TOAs K=30 (red, ECORR)"
        };
        c.bench_function(name, |b| {
            b.iter(|| reduce_pulsar(black_box(&p), &pn, &grid, auto).unwrap())
        });
    }

    let r = reduce_pulsar(&p, &noise(false), &grid, auto).unwrap();
    let phi = ptacorr::spectrum::template(13.0 / 3.0, &grid.freqs, grid.t_span);
    let w: Vec<_> = (0..100).map(|_| weight(&r, &phi)).collect();
    c.bench_function("pair traces 100 pulsars K=30 (4950 pairs)", |b| {
        b.iter(|| pair_traces(black_box(&w)))
    });

    // The covariances with signal at 100 pulsars x 14 frequencies (N 2K = 2,800), 10 bins: the
    // per-frequency covariance and the bin covariance from one set of joint-covariance slices.
    let grid14 = FrequencyGrid::new(p.mjd[0], *p.mjd.last().unwrap(), 14).unwrap();
    let r14 = reduce_pulsar(&p, &noise(false), &grid14, auto).unwrap();
    let phi14 = ptacorr::spectrum::template(13.0 / 3.0, &grid14.freqs, grid14.t_span);
    let w14: Vec<_> = (0..100).map(|_| weight(&r14, &phi14)).collect();
    let dirs: Vec<_> = (0..100)
        .map(|i| {
            let (u, v) = ((i as f64 * 0.618_034) % 1.0, (i as f64 * 0.414_214) % 1.0);
            ptacorr::sky::isotropic_direction(u, v)
        })
        .collect();
    let g = Array2::from_shape_vec(
        (100, 100),
        ptacorr::orf::pattern_matrix(ptacorr::orf::Pattern::Hd, &dirs),
    )
    .unwrap();
    let z14: Vec<_> = w14.iter().map(|x| x.z.clone()).collect();
    let dc = vec![0.0; 28];
    let slices = ptacorr::paircov::JointBlocks::new(&z14, &g, &dc, 1.0).unwrap();
    let groups: Vec<Vec<usize>> = (0..10)
        .map(|b| (b * 495..(b + 1) * 495).collect())
        .collect();
    c.bench_function("bin covariance 100 pulsars K=14 (10 bins)", |b| {
        b.iter(|| {
            ptacorr::bin_covariance::bin_covariance_with(black_box(&slices), &w14, 1.0, &groups)
                .unwrap()
        })
    });
    c.bench_function("per-frequency covariance 100 pulsars K=14", |b| {
        b.iter(|| {
            ptacorr::per_frequency::signal_covariance_with(black_box(&slices), &g, &[1.0; 14])
                .unwrap()
        })
    });

    let dir = std::env::temp_dir().join(format!("ptacorr-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("B01.csv");
    let mut text = String::from("mjd,residual_s,sigma_s,freq_mhz,backend\n");
    for i in 0..N {
        text.push_str(&format!(
            "{},{:e},{:e},{},KRK-L\n",
            p.mjd[i], p.residual[i], p.sigma[i], p.freq_mhz[i]
        ));
    }
    std::fs::write(&path, text).unwrap();
    c.bench_function("read one residual table (10k rows)", |b| {
        b.iter(|| {
            let mut h = <sha2::Sha256 as sha2::Digest>::new();
            read_residuals(black_box(&path), "B01", &mut h).unwrap()
        })
    });
    let _ = std::fs::remove_dir_all(&dir);
}

criterion_group!(benches, kernels);
criterion_main!(benches);
