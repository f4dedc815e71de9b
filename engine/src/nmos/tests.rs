//! Checks of the noise-marginalised OS: draws equal to the fixed model give the fixed OS bit
//! for bit; the EFAC scaling law of the reduction; shards, threads and merges; bad tables.

use super::*;
use crate::analysis::correlate;
use crate::chains::{ChainDraw, ChainTable, Parameter};
use crate::null::testdata::{release_from, settings, small, temp_dir, NOISE_ONLY};
use std::sync::OnceLock;

/// A chain table for every pulsar whose rows all equal the pulsar's noise.toml values.
fn fixed_model_tables(release: &Release, dir: &Path, rows: usize) {
    std::fs::create_dir_all(dir).unwrap();
    for p in &release.pulsars {
        let noise = release.noise.pulsar(&p.label);
        let mut params = Vec::new();
        let mut values = Vec::new();
        for b in &p.backends {
            let w = noise.white_for(b);
            params.push(Parameter::Efac(b.clone()));
            values.push(w.efac);
            if let Some(q) = w.equad_log10_s {
                params.push(Parameter::EquadLog10S(b.clone()));
                values.push(q);
            }
        }
        if let Some(r) = noise.red {
            params.extend([Parameter::RedLog10Amplitude, Parameter::RedSpectralIndex]);
            values.extend([r.log10_amplitude, r.spectral_index]);
        }
        let mut t = ChainTable::new(params).unwrap();
        for d in 0..rows {
            t.push(ChainDraw {
                chain: 0,
                draw: d as u64,
                log_posterior: Some(-1.0),
                diverging: false,
                values: values.clone(),
            })
            .unwrap();
        }
        t.write(&dir.join(format!("{}.csv", p.label))).unwrap();
    }
}

fn nmos_settings(chains: &Path, draws: u64) -> NmosSettings {
    NmosSettings {
        chains: Some(chains.to_path_buf()),
        common_draws: None,
        draws,
        seed: 5,
        shard: Shard::ALL,
    }
}

/// Outside reference: the definition of the NMOS (Vigeland et al. 2018, eq. for the OS at one
/// noise draw) reduces to the fixed-noise OS when every draw is the fixed model, so each draw
/// must equal `correlate` bit for bit.
#[test]
fn draws_equal_to_the_fixed_model_give_the_fixed_os_exactly() {
    let rel = small();
    let dir = temp_dir("nmos-fixed");
    fixed_model_tables(rel, &dir.join("chains"), 4);
    let s = nmos_settings(&dir.join("chains"), 3);
    let tables = read_tables(rel, &s, &settings()).unwrap();
    assert!(tables.pulsars.iter().all(|t| t.is_some()));
    let (summary, draws) = run(rel, &settings(), &s, &tables).unwrap();
    let fixed = correlate(rel, &settings()).unwrap();
    assert_eq!(draws.len(), 3);
    for d in &draws {
        for (k, p) in Pattern::ALL.iter().enumerate() {
            assert_eq!(d.estimates[k], fixed.estimates[p], "draw {} {p:?}", d.draw);
        }
    }
    let hd = &summary.patterns[&Pattern::Hd];
    assert_eq!(
        hd.amplitude2.median,
        fixed.estimates[&Pattern::Hd].amplitude2
    );
    assert_eq!(summary.pulsars_fixed.len(), 0);
}

/// White noise only, so for a pulsar with EFAC e, P^-1 = P_1^-1 / e^2 with the timing model
/// marginalised (it scales N alone): X and Z scale as 1/e^2, rho_ab is unchanged and
/// sigma_ab scales as e (Woodbury form, van Haasteren & Vallisneri 2014). With only pulsar 0
/// drawn, A^2(e) = (S_0 + S_a / e^2) / (W_0 + W_a / e^2) in the sums of the OS over the pairs
/// without and with pulsar 0 (Anholm et al. 2009 estimator), checked at every draw.
#[test]
fn efac_draws_follow_the_closed_form_scaling() {
    let dir = temp_dir("nmos-efac");
    let rel = noise_only();
    let cs = crate::null::testdata::settings_no_common();
    let p0 = &rel.pulsars[0];
    let e0 = rel.noise.pulsar(&p0.label).white_for(&p0.backends[0]).efac;
    std::fs::create_dir_all(dir.join("chains")).unwrap();
    let mut t = ChainTable::new(vec![Parameter::Efac(p0.backends[0].clone())]).unwrap();
    for d in 0..20u64 {
        t.push(ChainDraw {
            chain: (d % 2) as u32,
            draw: d / 2,
            log_posterior: None,
            diverging: false,
            values: vec![0.6 + 0.05 * d as f64],
        })
        .unwrap();
    }
    t.write(&dir.join("chains").join(format!("{}.csv", p0.label)))
        .unwrap();
    let s = nmos_settings(&dir.join("chains"), 12);
    let tables = read_tables(rel, &s, &cs).unwrap();
    let draws = run_draws(rel, &cs, &s, &tables).unwrap();
    let fixed = correlate(rel, &cs).unwrap();
    let pr = &fixed.pairs;
    let g = pr.pattern_values(Pattern::Hd);
    for d in &draws {
        let (rows, _) = pick_rows(&tables, s.seed, d.draw);
        let e = t.draws[rows[0].unwrap()].values[0];
        // 1/sigma^2 of a pair with pulsar 0 scales as (e0/e)^2.
        let (mut num, mut den) = (0.0, 0.0);
        for i in 0..pr.len() {
            let scale = if pr.a[i] == 0 { (e0 / e).powi(2) } else { 1.0 };
            let w = scale / (pr.sigma[i] * pr.sigma[i]);
            num += g[i] * pr.rho[i] * w;
            den += g[i] * g[i] * w;
        }
        let want = num / den;
        let got = d.estimates[0].amplitude2;
        assert!(
            ((got - want) / want).abs() < 1e-9,
            "draw {}: {got} vs {want}",
            d.draw
        );
        let snr = want * den.sqrt();
        assert!(((d.estimates[0].snr - snr) / snr).abs() < 1e-9);
    }
}

fn noise_only() -> &'static Release {
    static R: OnceLock<Release> = OnceLock::new();
    R.get_or_init(|| release_from(NOISE_ONLY, 3, &temp_dir("nmos-noise-only")))
}

/// Varied rows (red amplitude and EFAC) for the shard and merge checks.
fn varied_tables(release: &Release, dir: &Path, rows: usize) {
    std::fs::create_dir_all(dir).unwrap();
    for (k, p) in release.pulsars.iter().enumerate().take(5) {
        let b = &p.backends[0];
        let mut t = ChainTable::new(vec![
            Parameter::Efac(b.clone()),
            Parameter::RedLog10Amplitude,
            Parameter::RedSpectralIndex,
        ])
        .unwrap();
        for d in 0..rows {
            let u = ((d * 7 + k * 3) % 11) as f64 / 11.0;
            t.push(ChainDraw {
                chain: 0,
                draw: d as u64,
                log_posterior: Some(-(d as f64)),
                diverging: d == 3,
                values: vec![0.9 + 0.3 * u, -14.5 + u, 2.0 + 2.0 * u],
            })
            .unwrap();
        }
        t.write(&dir.join(format!("{}.csv", p.label))).unwrap();
    }
}

#[test]
fn shards_threads_and_merge_give_the_bytes_of_one_run() {
    let rel = small();
    let dir = temp_dir("nmos-merge");
    varied_tables(rel, &dir.join("chains"), 15);
    let cs = settings();
    let fixed = correlate(rel, &cs).unwrap();
    let write = |shard: Shard, out: &str, threads: usize| {
        let s = NmosSettings {
            shard,
            ..nmos_settings(&dir.join("chains"), 9)
        };
        let tables = read_tables(rel, &s, &cs).unwrap();
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        let (summary, draws) = pool.install(|| run(rel, &cs, &s, &tables)).unwrap();
        fixed
            .write_with(&dir.join(out), rel, &cs, Some((&summary, &draws)))
            .unwrap();
        draws
    };
    let all = write(Shard::ALL, "all", 2);
    let one = write(Shard::ALL, "one-thread", 1);
    assert_eq!(all, one);
    assert!(all.windows(2).any(|w| w[0].estimates != w[1].estimates));
    write(Shard { index: 2, count: 2 }, "s2", 2);
    write(Shard { index: 1, count: 2 }, "s1", 1);
    let merged = merge_shards(&[dir.join("s2"), dir.join("s1")], &dir.join("merged")).unwrap();
    assert_eq!(merged.draws, 9);
    for f in [
        "summary.json",
        "pairs.csv",
        "bins.csv",
        DRAWS_FILE,
        "manifest.json",
    ] {
        let a = std::fs::read(dir.join("all").join(f)).unwrap();
        let m = std::fs::read(dir.join("merged").join(f)).unwrap();
        assert!(a == m, "{f} differs after merge");
    }
    // The splice of the block is exact, and a missing shard is refused.
    let text = std::fs::read_to_string(dir.join("all/summary.json")).unwrap();
    let (prefix, block) = files::split_summary(&text, Path::new("summary.json")).unwrap();
    assert_eq!(
        format!("{prefix}{}\n", files::summary_tail(&block).unwrap()),
        text
    );
    let e = merge_shards(&[dir.join("s1")], &dir.join("bad")).unwrap_err();
    assert!(e.to_string().contains("exactly once"), "{e}");
    assert!(!dir.join("bad/summary.json").exists());
}

#[test]
fn tables_that_do_not_fit_the_release_are_refused_naming_file_and_row() {
    let rel = small();
    let cs = settings();
    let dir = temp_dir("nmos-bad");
    let p = &rel.pulsars[0];
    let b = &p.backends[0];
    let case = |name: &str, file: &str, text: &str, draws: u64| -> String {
        let d = dir.join(name);
        std::fs::create_dir_all(&d).unwrap();
        std::fs::write(d.join(file), text).unwrap();
        read_tables(rel, &nmos_settings(&d, draws), &cs)
            .unwrap_err()
            .to_string()
    };
    let head = "chain,draw,log_posterior,diverging";
    let good = format!("{head},efac.{b}\n0,0,1,false,1.0\n0,1,1,false,1.1\n");
    let e = case("unknown-pulsar", "NOPE.csv", &good, 2);
    assert!(e.contains("NOPE.csv") && e.contains("no pulsar"), "{e}");
    let e = case(
        "unknown-backend",
        &format!("{}.csv", p.label),
        &format!("{head},efac.ZZZ\n0,0,1,false,1.0\n"),
        1,
    );
    assert!(
        e.contains("line 1, field efac.ZZZ") && e.contains("no backend"),
        "{e}"
    );
    let e = case(
        "nan-row",
        &format!("{}.csv", p.label),
        &format!("{head},efac.{b}\n0,0,1,false,1.0\n0,1,1,false,NaN\n"),
        1,
    );
    assert!(
        e.contains("line 3, field efac.") && e.contains("not a finite"),
        "{e}"
    );
    let e = case("too-few", &format!("{}.csv", p.label), &good, 3);
    assert!(
        e.contains(&format!("{}.csv line 3", p.label)) && e.contains("fewer than the 3 draws"),
        "{e}"
    );
    let e = case(
        "common-in-pulsar",
        &format!("{}.csv", p.label),
        &format!("{head},common.log10_amplitude\n0,0,1,false,-14\n"),
        1,
    );
    assert!(e.contains("common-process"), "{e}");
    std::fs::create_dir_all(dir.join("empty")).unwrap();
    let e = read_tables(rel, &nmos_settings(&dir.join("empty"), 1), &cs)
        .unwrap_err()
        .to_string();
    assert!(e.contains("no chain tables"), "{e}");
    let s = NmosSettings {
        draws: 0,
        ..nmos_settings(&dir, 1)
    };
    assert!(s.validate().is_err());
}

/// Monte Carlo (ignored: run by `./run test`): a known Gaussian posterior of one pulsar's
/// EFAC, e ~ N(1.1, 0.05^2), m = 2000 table rows resampled into n = 2000 draws. A^2 is a
/// monotone function of e (the closed form above), so the median of A^2 over the draws is A^2
/// at the median of the drawn e, whose standard deviation is about sqrt(pi/2) sigma
/// sqrt(1/m + 1/n) (asymptotic variance of the sample median, pi sigma^2 / (2 n), from memory,
/// for each of the two resampling stages). Tolerance 4.4 of those: false-failure rate 1e-5.
#[test]
#[ignore]
fn median_over_a_gaussian_efac_posterior_matches_the_pushforward() {
    use rand_distr::{Distribution, Normal};
    let dir = temp_dir("nmos-gauss");
    let rel = noise_only();
    let cs = crate::null::testdata::settings_no_common();
    let p0 = &rel.pulsars[0];
    std::fs::create_dir_all(dir.join("chains")).unwrap();
    let (mu, sd, m, n) = (1.1, 0.05, 2000usize, 2000u64);
    let mut t = ChainTable::new(vec![Parameter::Efac(p0.backends[0].clone())]).unwrap();
    let normal = Normal::new(mu, sd).unwrap();
    let mut rng = crate::rng::stream(99, crate::rng::Purpose::Layout, 0);
    for d in 0..m {
        t.push(ChainDraw {
            chain: 0,
            draw: d as u64,
            log_posterior: None,
            diverging: false,
            values: vec![normal.sample(&mut rng)],
        })
        .unwrap();
    }
    t.write(&dir.join("chains").join(format!("{}.csv", p0.label)))
        .unwrap();
    let s = nmos_settings(&dir.join("chains"), n);
    let tables = read_tables(rel, &s, &cs).unwrap();
    let (summary, _) = run(rel, &cs, &s, &tables).unwrap();
    // A^2 at e = mu and its derivative by the closed form (as in the scaling check).
    let fixed = correlate(rel, &cs).unwrap();
    let e0 = rel.noise.pulsar(&p0.label).white_for(&p0.backends[0]).efac;
    let pr = &fixed.pairs;
    let g = pr.pattern_values(Pattern::Hd);
    let a2 = |e: f64| {
        let (mut num, mut den) = (0.0, 0.0);
        for i in 0..pr.len() {
            let scale = if pr.a[i] == 0 { (e0 / e).powi(2) } else { 1.0 };
            let w = scale / (pr.sigma[i] * pr.sigma[i]);
            num += g[i] * pr.rho[i] * w;
            den += g[i] * g[i] * w;
        }
        num / den
    };
    let slope = (a2(mu + 1e-4) - a2(mu - 1e-4)) / 2e-4;
    let sd_median =
        (std::f64::consts::PI / 2.0).sqrt() * sd * (1.0 / m as f64 + 1.0 / n as f64).sqrt();
    let got = summary.patterns[&Pattern::Hd].amplitude2.median;
    let tol = 4.4 * sd_median * slope.abs();
    assert!(
        (got - a2(mu)).abs() < tol,
        "median A^2 {got} vs {} (tolerance {tol})",
        a2(mu)
    );
    // The 68% interval spans A^2 at about mu -/+ sd.
    let [lo, hi] = summary.patterns[&Pattern::Hd].amplitude2.interval_68;
    let width = (hi - lo).abs();
    let want = (a2(mu + sd) - a2(mu - sd)).abs();
    assert!(
        (width - want).abs() < 0.15 * want,
        "68% width {width} vs {want}"
    );
}
