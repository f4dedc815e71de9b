//! Times the common-process likelihood on a release (benchmarks/common runs it beside the NumPy
//! peer, tests/reference/common_ref.py, in one run; docs/performance.md has the method):
//!
//!     cargo run --release -p ptacorr-engine --example common_bench -- RELEASE K [POINTS.csv OUT.csv]
//!
//! Prints one JSON line: the reduction (seconds), the fixed-index (13/3) HD likelihood curve at
//! 200 amplitudes (one eigendecomposition plus 200 eigen-form evaluations; best of 3), and the
//! whole fit of all four models on 41 spectral-index nodes with the adaptive amplitude rule and
//! a 40-amplitude table (once). With POINTS.csv (model,log10_amplitude,spectral_index) it writes
//! the engine's ln L - ln L(0) at those points to OUT.csv, for the agreement with the peer.

use ptacorr::common::{fit_common, CommonData, CommonModel, CommonSettings};
use ptacorr::release::read_release;
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if args.len() != 2 && args.len() != 4 {
        eprintln!("usage: common_bench RELEASE K [POINTS.csv OUT.csv]");
        std::process::exit(2);
    }
    let rel = read_release(std::path::Path::new(&args[0])).unwrap_or_else(|e| {
        eprintln!("error: {e}");
        std::process::exit(2)
    });
    let k: usize = args[1].parse().expect("K is a whole number");
    let t = Instant::now();
    let data = CommonData::from_release(&rel, &rel.noise, k).expect("reduction");
    let reduce = t.elapsed().as_secs_f64();
    let gamma = 13.0 / 3.0;
    let mut curve_best = f64::INFINITY;
    let mut check = 0.0;
    for _ in 0..3 {
        let t = Instant::now();
        let curve = data.amplitude_curve(CommonModel::Hd, gamma).expect("curve");
        check = (0..200)
            .map(|i| curve.at_log10(-18.0 + 6.0 * i as f64 / 199.0))
            .sum::<f64>();
        curve_best = curve_best.min(t.elapsed().as_secs_f64());
    }
    let settings = CommonSettings {
        n_frequencies: k,
        n_spectral_index: 41,
        n_table_amplitudes: 40,
        ..Default::default()
    };
    let t = Instant::now();
    let fit = fit_common(&data, &settings).expect("fit");
    let grid = t.elapsed().as_secs_f64();
    let ln_bf = fit
        .bayes_factor(CommonModel::Hd, Some(CommonModel::Curn), false)
        .map(|b| b.ln_bayes_factor);
    if args.len() == 4 {
        let mut r = csv::Reader::from_path(&args[2]).expect("points file");
        let mut out = String::from("model,log10_amplitude,spectral_index,log_likelihood_ratio\n");
        for rec in r.records() {
            let rec = rec.expect("points row");
            let m = CommonModel::from_name(&rec[0]).expect("model name");
            let (u, g): (f64, f64) = (rec[1].parse().unwrap(), rec[2].parse().unwrap());
            let v = data.amplitude_curve(m, g).expect("curve").at_log10(u);
            out.push_str(&format!("{},{u:?},{g:?},{v:?}\n", m.name()));
        }
        std::fs::write(&args[3], out).expect("write values");
    }
    println!(
        "{{\"pulsars\": {}, \"frequencies\": {k}, \"reduce_seconds\": {reduce}, \
         \"hd_curve_200_seconds\": {curve_best}, \"grid_41x40_four_models_seconds\": {grid}, \
         \"rayon_threads\": {}, \"curve_checksum\": {check}, \"ln_bf_hd_curn_varied\": {}}}",
        data.n_pulsars(),
        rayon::current_num_threads(),
        ln_bf.map_or("null".to_string(), |v| format!("{v}"))
    );
}
