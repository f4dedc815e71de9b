//! One pulsar's noise likelihood and gradient (engine/src/likelihood.rs) under the release's own
//! noise.toml, timed; for benchmarks/noise, which runs the NumPy peer
//! (tests/reference/noise_likelihood.py) on the same pulsar in the same run.
//!
//!     cargo run --release -p ptacorr-engine --example noise_eval -- RELEASE LABEL [REPEAT] [K]
//!
//! Prints `ln_l`, `seconds_per_evaluation` (value and gradient), `flops` (counted; for TOAs
//! grouped by equal uncertainty, `grouped true`, the grouped form's), the same three for the
//! TOA-by-TOA form (`ln_l_by_toa`, `seconds_per_evaluation_by_toa`, `flops_by_toa`), the
//! shape, and the value and time of the fixed-white evaluation at the same point. With distinct
//! uncertainties (TOAs not grouped) the timed evaluation uses the interpolated white-weighted
//! Gram over the default prior ranges (`interpolated true`, engine/src/white_gram.rs; its setup
//! time `setup_seconds`, nodes per piece `nodes`), and `by_toa` is the exact form. Red and DM processes use their `n_frequencies` (14 when absent, as the peer), or K
//! frequencies when K is given (30 is what `ptacorr noise` fits by default).

use ptacorr::likelihood::{BackendTerms, Components, Hyper, PulsarLikelihood, WhiteGramStatus};
use ptacorr::linalg::single_threaded_blas;
use ptacorr::priors::{DEFAULT_EFAC, DEFAULT_LOG10_WHITE_S};
use ptacorr::reduce::FrequencyGrid;
use ptacorr::release::read_release;
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if args.len() < 3 {
        eprintln!("usage: noise_eval RELEASE LABEL [REPEAT] [K]");
        std::process::exit(2);
    }
    let repeat: usize = args.get(3).map_or(50, |s| s.parse().expect("REPEAT"));
    let k: Option<usize> = args.get(4).map(|s| s.parse().expect("K"));
    single_threaded_blas();
    let rel = read_release(std::path::Path::new(&args[1])).expect("release");
    let p = rel
        .pulsars
        .iter()
        .find(|p| p.label == args[2])
        .expect("pulsar");
    let pn = rel.noise.pulsar(&p.label);
    let white = |b: &str| pn.white.iter().find(|w| w.backend == b).cloned();
    let comp = Components {
        backends: p
            .backends
            .iter()
            .map(|b| {
                let w = white(b);
                BackendTerms {
                    efac: true,
                    log10_equad: w.as_ref().is_some_and(|w| w.equad_log10_s.is_some()),
                    log10_ecorr: w.as_ref().is_some_and(|w| w.ecorr_log10_s.is_some()),
                }
            })
            .collect(),
        red: pn.red.map(|r| k.or(r.n_frequencies).unwrap_or(14)),
        dm: pn.dm.map(|r| k.or(r.n_frequencies).unwrap_or(14)),
        common: None,
    };
    let grid = FrequencyGrid::for_release(&rel, 1).expect("grid");
    let mut lik = PulsarLikelihood::new(p, &comp, &grid).expect("likelihood");
    let bounds: Vec<[f64; 2]> = lik
        .parameters()
        .iter()
        .map(|h| match h.kind {
            Hyper::Efac(_) => DEFAULT_EFAC,
            Hyper::Log10Equad(_) => DEFAULT_LOG10_WHITE_S,
            _ => [f64::NEG_INFINITY, f64::INFINITY],
        })
        .collect();
    let start = Instant::now();
    let status = lik.interpolate_white(&bounds, &Default::default());
    let setup = start.elapsed().as_secs_f64();
    if let WhiteGramStatus::Used(r) = &status {
        println!("setup_seconds {setup:?}");
        println!(
            "nodes {}",
            r.iter()
                .map(|g| format!("{}x{}", g.pieces, g.nodes))
                .collect::<Vec<_>>()
                .join(",")
        );
        println!(
            "check_error {:?}",
            r.iter().map(|g| g.max_error).collect::<Vec<_>>()
        );
    }
    if let WhiteGramStatus::Failed(note) = &status {
        println!("note {note}");
    }
    let theta: Vec<f64> = lik
        .parameters()
        .iter()
        .map(|h| match h.kind {
            Hyper::Efac(b) => white(&p.backends[b]).map_or(1.0, |w| w.efac),
            Hyper::Log10Equad(b) => white(&p.backends[b]).and_then(|w| w.equad_log10_s).unwrap(),
            Hyper::Log10Ecorr(b) => white(&p.backends[b]).and_then(|w| w.ecorr_log10_s).unwrap(),
            Hyper::RedLog10Amplitude => pn.red.unwrap().log10_amplitude,
            Hyper::RedSpectralIndex => pn.red.unwrap().spectral_index,
            Hyper::DmLog10Amplitude => pn.dm.unwrap().log10_amplitude,
            Hyper::DmSpectralIndex => pn.dm.unwrap().spectral_index,
            Hyper::CommonLog10Amplitude | Hyper::CommonSpectralIndex => unreachable!(),
        })
        .collect();
    let mut grad = vec![0.0; lik.dim()];
    let value = lik
        .log_likelihood_and_gradient(&theta, &mut grad)
        .expect("ln L");
    let start = Instant::now();
    for _ in 0..repeat {
        std::hint::black_box(lik.log_likelihood_and_gradient(&theta, &mut grad).unwrap());
    }
    let per = start.elapsed().as_secs_f64() / repeat as f64;
    // The fixed-white path (`ptacorr noise --fixed-white`) at the same point: what the sampler
    // evaluates there.
    let fixed = lik.fixed_white(&theta).expect("fixed white");
    let value_fixed = fixed
        .log_likelihood_and_gradient(&theta, &mut grad)
        .expect("ln L fixed white");
    let reps_fixed = repeat * 20;
    let start = Instant::now();
    for _ in 0..reps_fixed {
        std::hint::black_box(
            fixed
                .log_likelihood_and_gradient(&theta, &mut grad)
                .unwrap(),
        );
    }
    let per_fixed = start.elapsed().as_secs_f64() / reps_fixed as f64;
    // The same evaluation TOA by TOA (what a release whose TOAs all have different
    // uncertainties gets; likelihood.rs `Groups`), against its own flop count.
    let by_toa = PulsarLikelihood::new(p, &comp, &grid)
        .expect("likelihood")
        .ungrouped();
    let value_by_toa = by_toa
        .log_likelihood_and_gradient(&theta, &mut grad)
        .expect("ln L by TOA");
    let start = Instant::now();
    for _ in 0..repeat {
        std::hint::black_box(
            by_toa
                .log_likelihood_and_gradient(&theta, &mut grad)
                .unwrap(),
        );
    }
    let per_by_toa = start.elapsed().as_secs_f64() / repeat as f64;
    let (n, c) = lik.shape();
    println!("ln_l {value:?}");
    println!("grouped {}", lik.grouped());
    println!("interpolated {}", lik.white_interpolated());
    println!("ln_l_by_toa {value_by_toa:?}");
    println!("seconds_per_evaluation_by_toa {per_by_toa:?}");
    println!("flops_by_toa {:?}", by_toa.flops());
    println!("seconds_per_evaluation {per:?}");
    println!("flops {:?}", lik.flops());
    println!("shape {n} {c}");
    println!("ln_l_fixed_white {value_fixed:?}");
    println!("seconds_per_fixed_white_evaluation {per_fixed:?}");
}
