//! Tests of the null distributions. External references are named beside each check.

use super::testdata::{self, release_from, settings, settings_no_common, small, temp_dir};
use super::*;
use crate::analysis::correlate;
use crate::optimal::optimal_statistic;
use crate::orf::pattern_for_pairs;
use std::path::PathBuf;

/// Kolmogorov-Smirnov two-sample statistic D = sup |F_a - F_b| (Smirnov 1939).
fn ks_two_sample(a: &[f64], b: &[f64]) -> f64 {
    let mut a = a.to_vec();
    let mut b = b.to_vec();
    a.sort_by(f64::total_cmp);
    b.sort_by(f64::total_cmp);
    let (mut i, mut j, mut d) = (0, 0, 0.0f64);
    while i < a.len() && j < b.len() {
        let x = a[i].min(b[j]);
        while i < a.len() && a[i] <= x {
            i += 1;
        }
        while j < b.len() && b[j] <= x {
            j += 1;
        }
        d = d.max((i as f64 / a.len() as f64 - j as f64 / b.len() as f64).abs());
    }
    d
}

/// One-sample KS statistic against a continuous CDF (Kolmogorov 1933).
fn ks_one_sample(x: &[f64], cdf: impl Fn(f64) -> f64) -> f64 {
    let mut x = x.to_vec();
    x.sort_by(f64::total_cmp);
    let n = x.len() as f64;
    x.iter()
        .enumerate()
        .map(|(i, &v)| {
            let f = cdf(v);
            (f - i as f64 / n).abs().max(((i + 1) as f64 / n - f).abs())
        })
        .fold(0.0, f64::max)
}

/// Asymptotic KS critical coefficient c(alpha) = sqrt(-ln(alpha/2)/2) (Smirnov 1948 table;
/// c(0.001) = 1.949): reject when D > c sqrt((n+m)/(nm)) (two-sample) or c/sqrt(n).
fn ks_coefficient(alpha: f64) -> f64 {
    (-(alpha / 2.0).ln() / 2.0).sqrt()
}

fn null_settings(method: Method, trials: u64) -> NullSettings {
    NullSettings {
        analysis: settings(),
        ..NullSettings::new(method, trials, 42)
    }
}

fn trials_of(
    rel: &Release,
    s: &NullSettings,
    range: std::ops::Range<u64>,
) -> (Prepared, Vec<Trial>) {
    let c = correlate(rel, &s.analysis).unwrap();
    let p = Prepared::new(&c, s.pattern).unwrap();
    let src = make_source(rel, &c, &p, s).unwrap();
    let t = run_chunks(src.as_ref(), range, 97, None, Control::default()).unwrap();
    drop(src);
    (p, t)
}

/// The analytic null's eigenvalues of a prepared analysis of `rel`.
fn eigenvalues_of(rel: &Release, analysis: &CorrelateSettings, p: &Prepared) -> Vec<f64> {
    let c = correlate(rel, analysis).unwrap();
    analytic::eigenvalues(p, &crate::whiten::analysis_roots(rel, &c).unwrap()).unwrap()
}

#[test]
fn null_ks_coefficient_matches_the_table() {
    // Smirnov (1948) table: c(0.05) = 1.358, c(0.001) = 1.949.
    assert!((ks_coefficient(0.05) - 1.358).abs() < 1e-3);
    assert!((ks_coefficient(0.001) - 1.949).abs() < 1e-3);
}

#[test]
fn null_observed_snr_is_the_optimal_statistic() {
    let rel = small();
    let c = correlate(rel, &settings()).unwrap();
    let p = Prepared::new(&c, Pattern::Hd).unwrap();
    let e = c.estimates[&Pattern::Hd];
    assert!((p.observed_snr - e.snr).abs() < 1e-10 * e.snr.abs());
    assert!((p.observed_amplitude2 - e.amplitude2).abs() < 1e-10 * e.amplitude2.abs());
    let x: Vec<f64> = p
        .weighted
        .iter()
        .flat_map(|w| w.x.iter().copied())
        .collect();
    assert!((p.snr_of(&x) - e.snr).abs() < 1e-10 * e.snr.abs());
}

#[test]
fn null_trials_do_not_depend_on_the_thread_count() {
    let rel = small();
    for (method, td) in [
        (Method::Scramble, false),
        (Method::Phase, false),
        (Method::Simulate, false),
        (Method::Simulate, true),
    ] {
        let mut s = null_settings(method, 300);
        s.time_domain = td;
        let n = if td { 24 } else { 300 };
        let one = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let two = rayon::ThreadPoolBuilder::new()
            .num_threads(2)
            .build()
            .unwrap();
        let a = one.install(|| trials_of(rel, &s, 0..n).1);
        let b = two.install(|| trials_of(rel, &s, 0..n).1);
        // And trial 17 alone, outside any chunk, is the same number.
        let c = trials_of(rel, &s, 17..18).1;
        assert_eq!(a, b, "{method:?} td={td}");
        assert_eq!(a[17], c[0]);
        assert!(a.windows(2).all(|w| w[0].snr != w[1].snr));
    }
}

#[test]
fn null_shards_merge_to_the_unsharded_run() {
    let rel = small();
    for method in [Method::Scramble, Method::Simulate] {
        let s = null_settings(method, 2500);
        let root = temp_dir(&format!("shards-{method:?}"));
        let whole = root.join("whole");
        run_null(rel, &s, &whole, Control::default()).unwrap();
        let mut dirs = Vec::new();
        for i in 1..=4 {
            let mut si = s.clone();
            si.shard = Some(Shard { index: i, count: 4 });
            let d = root.join(format!("shard{i}"));
            run_null(rel, &si, &d, Control::default()).unwrap();
            dirs.push(d);
        }
        dirs.reverse(); // order of the arguments does not matter
        let merged = root.join("merged");
        merge::merge(&dirs, &merged).unwrap();
        for f in ["trials.csv", "null.json", EIGENVALUES_FILE] {
            let a = std::fs::read(whole.join(f)).unwrap();
            let b = std::fs::read(merged.join(f)).unwrap();
            assert!(
                a == b,
                "{method:?}: {f} differs between the merged and unsharded runs"
            );
        }
        assert!(!whole.join(".partial").exists());
        std::fs::remove_dir_all(&root).unwrap();
    }
}

#[test]
fn null_merge_refuses_mixed_missing_and_duplicated_shards() {
    let rel = small();
    let root = temp_dir("merge-refuse");
    let s = null_settings(Method::Phase, 400);
    let mut dirs = Vec::new();
    for i in 1..=3 {
        let mut si = s.clone();
        si.analytic = false;
        si.shard = Some(Shard { index: i, count: 3 });
        let d = root.join(format!("s{i}"));
        run_null(rel, &si, &d, Control::default()).unwrap();
        dirs.push(d);
    }
    let mut other = s.clone();
    other.analytic = false;
    other.seed = 7;
    other.shard = Some(Shard { index: 3, count: 3 });
    let od = root.join("other-seed");
    run_null(rel, &other, &od, Control::default()).unwrap();
    let out = root.join("m");
    let err = |d: Vec<PathBuf>| merge::merge(&d, &out).unwrap_err().to_string();
    let e = err(vec![dirs[0].clone(), dirs[1].clone(), od.clone()]);
    assert!(e.contains("different seeds"), "{e}");
    let e = err(vec![dirs[0].clone(), dirs[2].clone()]);
    assert!(e.contains("missing shards: 2/3"), "{e}");
    let e = err(vec![
        dirs[0].clone(),
        dirs[1].clone(),
        dirs[1].clone(),
        dirs[2].clone(),
    ]);
    assert!(e.contains("duplicated shards: 2/3"), "{e}");
    assert!(!out.join("null.json").exists());
    merge::merge(&dirs, &out).unwrap();
    std::fs::remove_dir_all(&root).unwrap();
}

#[test]
fn null_interrupted_run_resumes_to_the_same_result() {
    let rel = small();
    let root = temp_dir("resume");
    let s = null_settings(Method::Phase, 5000);
    let whole = root.join("whole");
    run_null(rel, &s, &whole, Control::default()).unwrap();
    let out = root.join("interrupted");
    let cancel = AtomicBool::new(false);
    let stop = |done: u64, _: u64| {
        if done >= 2000 {
            cancel.store(true, Ordering::SeqCst);
        }
    };
    let control = Control {
        cancel: Some(&cancel),
        progress: Some(&stop),
    };
    let e = run_null(rel, &s, &out, control).unwrap_err().to_string();
    assert!(e.contains("interrupted"), "{e}");
    assert!(!out.join("null.json").exists() && !out.join("trials.csv").exists());
    let chunks = std::fs::read_dir(out.join(".partial")).unwrap().count();
    assert!(chunks >= 3, "{chunks} files in .partial");
    // A different run into the same folder is refused, not mixed in.
    let mut other = s.clone();
    other.seed = 9;
    let e = run_null(rel, &other, &out, Control::default())
        .unwrap_err()
        .to_string();
    assert!(e.contains("different run"), "{e}");
    run_null(rel, &s, &out, Control::default()).unwrap();
    for f in ["trials.csv", "null.json"] {
        assert_eq!(
            std::fs::read(whole.join(f)).unwrap(),
            std::fs::read(out.join(f)).unwrap(),
            "{f}"
        );
    }
    std::fs::remove_dir_all(&root).unwrap();
}

#[test]
fn null_quadratic_form_has_zero_mean_and_unit_variance() {
    // Cumulants of z^T M z: mean tr M = 0, variance 2 tr M^2 = 1 (analytic.rs derivation;
    // Imhof 1961 section 2).
    let c = correlate(small(), &settings()).unwrap();
    let p = Prepared::new(&c, Pattern::Hd).unwrap();
    let e = eigenvalues_of(small(), &settings(), &p);
    let (mean, var) = crate::gchisq::mean_variance(&e).unwrap();
    let scale: f64 = e.iter().map(|v| v.abs()).sum();
    assert!(mean.abs() < 1e-10 * scale, "mean {mean}");
    assert!((var - 1.0).abs() < 1e-9, "variance {var}");
}

#[test]
fn null_scrambles_agree_with_the_direct_optimal_statistic() {
    let rel = small();
    let s = null_settings(Method::Scramble, 50);
    let c = correlate(rel, &s.analysis).unwrap();
    let p = Prepared::new(&c, Pattern::Hd).unwrap();
    let sc = scramble::Scrambles::new(&p, Pattern::Hd, 42, 0.1).unwrap();
    let g_true = pattern_for_pairs(Pattern::Hd, &p.directions);
    let mut attempts = 0;
    for i in 0..50 {
        let t = sc.trial(i).unwrap();
        attempts += t.attempts;
        let dirs = sc.accepted_directions(i).unwrap();
        let g = pattern_for_pairs(Pattern::Hd, &dirs);
        let e = optimal_statistic(&c.pairs.rho, &c.pairs.sigma, &g);
        assert!((e.snr - t.snr).abs() < 1e-9 * e.snr.abs().max(1.0), "{i}");
        let m: f64 = g.iter().zip(&g_true).map(|(a, b)| a * b).sum::<f64>()
            / (g.iter().map(|v| v * v).sum::<f64>() * g_true.iter().map(|v| v * v).sum::<f64>())
                .sqrt();
        assert!(m.abs() < 0.1, "match {m}");
    }
    assert!(
        attempts > 50,
        "a threshold of 0.1 rejects some scrambles of 8 pulsars"
    );
}

#[test]
fn null_phase_shifts_keep_each_pulsars_power() {
    // Taylor et al. 2017: the rotation keeps s^2 + c^2 at every frequency of every pulsar.
    let c = correlate(small(), &settings()).unwrap();
    let p = Prepared::new(&c, Pattern::Hd).unwrap();
    let ps = phase::PhaseShifts::new(&p, 3);
    let y = ps.rotated(5);
    let x: Vec<f64> = p
        .weighted
        .iter()
        .flat_map(|w| w.x.iter().copied())
        .collect();
    for (a, b) in x.chunks(2).zip(y.chunks(2)) {
        let (pa, pb) = (a[0] * a[0] + a[1] * a[1], b[0] * b[0] + b[1] * b[1]);
        assert!((pa - pb).abs() <= 1e-12 * pa.max(1e-300));
    }
    assert!(x
        .iter()
        .zip(&y)
        .any(|(a, b)| (a - b).abs() > 1e-6 * a.abs()));
}

#[test]
fn null_psd_root_handles_singular_and_rejects_indefinite_matrices() {
    use ndarray::array;
    let z = array![[4.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 9.0]]; // rank 2
    let l = simulated::psd_root(&z, "z").unwrap();
    let l = ndarray::Array2::from_shape_vec((3, 3), l).unwrap();
    let back = l.dot(&l.t());
    assert!((&back - &z).iter().all(|v| v.abs() < 1e-12));
    let bad = array![[1.0, 2.0], [2.0, 1.0]]; // eigenvalues 3 and -1
    assert!(simulated::psd_root(&bad, "bad").is_err());
}

/// Reduced-space and time-domain simulated nulls of the same array have the same distribution:
/// KS two-sample test at alpha = 0.001 (Smirnov 1939; threshold c(0.001) sqrt(2/n)).
fn reduced_vs_time_domain(n: u64) {
    let rel = small();
    let mut s = null_settings(Method::Simulate, n);
    let reduced = trials_of(rel, &s, 0..n).1;
    s.time_domain = true;
    let td = trials_of(rel, &s, 0..n).1;
    let a: Vec<f64> = reduced.iter().map(|t| t.snr).collect();
    let b: Vec<f64> = td.iter().map(|t| t.snr).collect();
    let d = ks_two_sample(&a, &b);
    let crit = ks_coefficient(0.001) * (2.0 / n as f64).sqrt();
    assert!(d < crit, "KS D = {d}, critical {crit}");
    // Both have the unit variance of the analytic null (within 5 standard errors, the
    // standard error of a sample variance of a near-Gaussian variable being sqrt(2/n)).
    for v in [&a, &b] {
        let var = v.iter().map(|x| x * x).sum::<f64>() / n as f64;
        assert!(
            (var - 1.0).abs() < 5.0 * (2.0f64 / n as f64).sqrt() * 1.5,
            "var {var}"
        );
    }
}

#[test]
fn null_reduced_and_time_domain_nulls_agree_in_distribution() {
    reduced_vs_time_domain(400);
}

#[test]
#[ignore = "Monte Carlo, about a minute"]
fn null_reduced_and_time_domain_nulls_agree_in_distribution_long() {
    reduced_vs_time_domain(4000);
}

/// Simulated nulls follow the analytic generalised chi-square: one-sample KS at alpha = 0.001
/// against its CDF, and the tail fractions at SNR 1 and 2 within 4 binomial standard errors.
fn simulated_vs_analytic(rel: &Release, analysis: CorrelateSettings, n: u64) {
    let s = NullSettings {
        analysis,
        ..null_settings(Method::Simulate, n)
    };
    let (p, t) = trials_of(rel, &s, 0..n);
    let e = eigenvalues_of(rel, &s.analysis, &p);
    let snr: Vec<f64> = t.iter().map(|t| t.snr).collect();
    let q = crate::gchisq::GeneralisedChiSquare::new(&e).unwrap();
    let d = ks_one_sample(&snr, |x| q.cdf(x).unwrap());
    let crit = ks_coefficient(0.001) / (n as f64).sqrt();
    assert!(d < crit, "KS D = {d}, critical {crit}");
    for x in [1.0, 2.0, p.observed_snr] {
        let q = q.upper_tail(x).unwrap();
        let f = snr.iter().filter(|&&v| v >= x).count() as f64 / n as f64;
        let se = (q * (1.0 - q) / n as f64).sqrt().max(1.0 / n as f64);
        assert!(
            (f - q).abs() < 4.0 * se,
            "tail at {x}: simulated {f}, analytic {q}"
        );
    }
}

#[test]
fn null_simulated_and_analytic_nulls_agree_on_the_small_array() {
    simulated_vs_analytic(small(), settings(), 4000);
}

fn demo_release() -> Release {
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../simulations/demo.toml"),
    )
    .unwrap();
    release_from(&text, 2026, &temp_dir("demo"))
}

#[test]
#[ignore = "Monte Carlo on the 40-pulsar demo array"]
fn null_demo_array_simulated_analytic_agree_and_scrambles_are_significant() {
    let rel = demo_release();
    simulated_vs_analytic(&rel, CorrelateSettings::default(), 20_000);
    let out = temp_dir("demo-scramble");
    let s = NullSettings::new(Method::Scramble, 2000, 5);
    let r = run_null(&rel, &s, &out, Control::default()).unwrap();
    assert!(r.p_value < 0.01, "demo scramble p = {}", r.p_value);
    // The analytic p-value lies inside the trial p-value's Clopper-Pearson interval (the demo
    // has a strong background, so both are small).
    let sim = run_null(
        &rel,
        &NullSettings::new(Method::Simulate, 2000, 5),
        &out,
        Control::default(),
    )
    .unwrap();
    let a = sim.analytic.as_ref().unwrap().p_value;
    assert!(
        a <= sim.p_value_ci95[1],
        "analytic {a} vs {:?}",
        sim.p_value_ci95
    );
    std::fs::remove_dir_all(&out).unwrap();
}

/// Null p-values of many independent noise-only arrays are uniform (KS at alpha = 0.001
/// against U(0, 1)). Fixed seeds; the model is exactly right (white noise only).
fn noise_only_uniform(arrays: u64) {
    let root = temp_dir("uniform");
    let mut analytic_p = Vec::new();
    let mut trial_p = Vec::new();
    for seed in 0..arrays {
        let dir = root.join(format!("a{seed}"));
        let rel = release_from(testdata::NOISE_ONLY, 1000 + seed, &dir);
        let s = NullSettings {
            analysis: settings_no_common(),
            analytic: false,
            ..NullSettings::new(Method::Simulate, 199, seed)
        };
        let (p, t) = trials_of(&rel, &s, 0..199);
        let e = eigenvalues_of(&rel, &s.analysis, &p);
        analytic_p.push(analytic::upper_tail(&e, p.observed_snr).unwrap());
        let k = t.iter().filter(|t| t.snr >= p.observed_snr).count() as u64;
        trial_p.push(crate::pvalue::trial_p_value(k, 199).unwrap());
        std::fs::remove_dir_all(&dir).unwrap();
    }
    let crit = ks_coefficient(0.001) / (arrays as f64).sqrt();
    // The trial p-values are discrete in steps of 1/200; allow that step on top.
    for (name, ps, extra) in [("analytic", &analytic_p, 0.0), ("trial", &trial_p, 0.005)] {
        let d = ks_one_sample(ps, |x| x.clamp(0.0, 1.0));
        assert!(d < crit + extra, "{name}: KS D = {d}, critical {crit}");
    }
    std::fs::remove_dir_all(&root).unwrap();
}

#[test]
fn null_noise_only_p_values_are_uniform() {
    noise_only_uniform(100);
}

#[test]
#[ignore = "Monte Carlo over 1000 arrays"]
fn null_noise_only_p_values_are_uniform_long() {
    noise_only_uniform(1000);
}

/// Reference: the csv crate's writer (through `output::csv_table`, the engine's one table
/// writer) and Rust's own f64 parser for the round trip. The fast writer of trials.csv must
/// produce the bytes `csv_table` writes for the same `TrialRow`s, across the parallel blocks of
/// `trial_lines` (8192 rows each) and for floats whose shortest form is exponential, subnormal,
/// negative zero or integral; the reader must give every bit back.
#[test]
fn trials_csv_is_the_csv_table_of_its_row_type_and_reads_back() {
    let edge = [
        0.0,
        -0.0,
        1.0,
        -2.5,
        1e-300,
        f64::MIN_POSITIVE,
        5e-324,
        1e16,
        1e300,
        f64::MAX,
        0.1 + 0.2,
        std::f64::consts::PI,
    ];
    let trials: Vec<Trial> = (0..20_000u64)
        .map(|i| {
            // A fixed, varied set of finite floats (a golden-ratio sequence scaled by powers of
            // ten), plus the edge cases above.
            let u = (i as f64 * 0.618_033_988_749_895).fract();
            let scale = 10f64.powi((i % 61) as i32 - 30);
            Trial {
                index: 7 + i,
                snr: if i < edge.len() as u64 {
                    edge[i as usize]
                } else {
                    (u - 0.5) * scale
                },
                amplitude2: if i < edge.len() as u64 {
                    -edge[i as usize]
                } else {
                    u * 1e-30 * scale
                },
                attempts: 1,
            }
        })
        .collect();
    let fast = trials_csv(&trials);
    let rows: Vec<TrialRow> = trials.iter().map(TrialRow::from).collect();
    let table = crate::output::csv_table(&rows, "trials.csv").unwrap();
    assert!(
        fast.as_bytes() == table.as_slice(),
        "trials_csv differs from csv_table"
    );
    let back = parse_trials(&fast, Path::new("trials.csv")).unwrap();
    assert_eq!(back.len(), trials.len());
    for (a, b) in back.iter().zip(&trials) {
        assert_eq!(a.index, b.index);
        assert_eq!(a.snr.to_bits(), b.snr.to_bits());
        assert_eq!(a.amplitude2.to_bits(), b.amplitude2.to_bits());
    }
    // The header alone: no trials, no rows.
    assert_eq!(trials_csv(&[]), "trial,snr,amplitude2\n");
    assert!(parse_trials("trial,snr,amplitude2\n", Path::new("t.csv"))
        .unwrap()
        .is_empty());
}

/// The errors of a bad trials.csv name the file, the line and the column (house rule: every
/// bad input is a typed error naming file, line and field).
#[test]
fn bad_trials_files_name_the_line_and_the_column() {
    let path = Path::new("null/trials.csv");
    let where_ = |text: &str| match parse_trials(text, path) {
        Err(Error::Input {
            path: p,
            line,
            field,
            message,
        }) => {
            assert_eq!(p, path);
            (line, field, message)
        }
        other => panic!("{text:?}: expected an input error, got {other:?}"),
    };
    let ok = "trial,snr,amplitude2\n0,1.5,2e-30\n";
    assert_eq!(parse_trials(ok, path).unwrap().len(), 1);
    for (text, line, field, message) in [
        (
            "trial,snr,amplitude2\n0,1.5,2e-30\n1,NaN,1.0\n",
            3,
            Some("snr"),
            Some("not a finite number"),
        ),
        (
            "trial,snr,amplitude2\n0,1.5,inf\n",
            2,
            Some("amplitude2"),
            Some("not a finite number"),
        ),
        ("trial,snr,amplitude2\n0,x,1.0\n", 2, Some("snr"), None),
        ("trial,snr,amplitude2\n-1,1.0,1.0\n", 2, Some("trial"), None),
        ("trial,snr,amplitude2\n0,1.0\n", 2, None, None),
        ("trial,snr\n0,1.0\n", 1, Some("amplitude2"), None),
        ("", 1, Some("trial"), None),
    ] {
        let (l, f, m) = where_(text);
        assert_eq!(l, Some(line), "{text:?}");
        assert_eq!(f.as_deref(), field, "{text:?}");
        if let Some(want) = message {
            assert!(m.contains(want), "{text:?}: {m}");
        }
    }
    // The files of shards concatenated repeat the header; it is skipped.
    let cat = format!("{ok}trial,snr,amplitude2\n1,0.5,1e-31\n");
    assert_eq!(parse_trials(&cat, path).unwrap().len(), 2);
}
