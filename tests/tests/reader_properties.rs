//! Property-based checks of every reader (proptest): arbitrary bytes and randomly mutated valid
//! files give a clear error or a correct result, never a panic. "Correct" here means the
//! invariants the readers promise (finite numbers, positive uncertainties, labels in the safe
//! set); the exact values of valid files are checked by the other suites. Case counts are
//! modest so the suite stays fast (common practice: a few dozen cases per reader per run).

use proptest::prelude::*;
use ptacorr::noise::NoiseModel;
use ptacorr::release::read_release;
use ptacorr::scenario::Scenario;
use ptacorr_checks::{simulate_release, small_scenario, temp_dir};
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

/// One byte-level edit of a file: overwrite, insert or delete at a position (taken modulo the
/// length), or cut the file there.
#[derive(Clone, Debug)]
enum Edit {
    Set(usize, u8),
    Insert(usize, u8),
    Delete(usize),
    Cut(usize),
}

fn edit() -> impl Strategy<Value = Edit> {
    // Bytes biased to the ones that matter to the formats (digits, separators, quotes,
    // brackets, newlines, signs, a non-UTF-8 byte) as well as arbitrary ones.
    let byte = prop_oneof![
        any::<u8>(),
        prop::sample::select(b"0123456789.,-+e\n\"=[]{}#\xff ".to_vec()),
    ];
    prop_oneof![
        (any::<usize>(), byte.clone()).prop_map(|(i, b)| Edit::Set(i, b)),
        (any::<usize>(), byte).prop_map(|(i, b)| Edit::Insert(i, b)),
        any::<usize>().prop_map(Edit::Delete),
        any::<usize>().prop_map(Edit::Cut),
    ]
}

fn apply(bytes: &[u8], edits: &[Edit]) -> Vec<u8> {
    let mut b = bytes.to_vec();
    for e in edits {
        let n = b.len().max(1);
        match *e {
            Edit::Set(i, v) if !b.is_empty() => b[i % n] = v,
            Edit::Insert(i, v) => b.insert(i % (b.len() + 1), v),
            Edit::Delete(i) if !b.is_empty() => {
                b.remove(i % n);
            }
            Edit::Cut(i) => b.truncate(i % (b.len() + 1)),
            _ => {}
        }
    }
    b
}

/// A valid 3-pulsar release, simulated once per test process.
fn valid_release() -> &'static PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let d = temp_dir("prop-valid");
        simulate_release(&small_scenario(3, 2.0, 60.0, None), &d, 3);
        d
    })
}

/// Copy the valid release into a fresh folder with one file replaced.
fn release_with(case: &str, file: &str, bytes: &[u8]) -> PathBuf {
    let src = valid_release();
    let d = temp_dir(case);
    for sub in ["", "residuals"] {
        std::fs::create_dir_all(d.join(sub)).unwrap();
        for e in std::fs::read_dir(src.join(sub)).unwrap() {
            let p = e.unwrap().path();
            if p.is_file() {
                std::fs::copy(&p, d.join(sub).join(p.file_name().unwrap())).unwrap();
            }
        }
    }
    std::fs::write(d.join(file), bytes).unwrap();
    d
}

/// The reader's promise when it accepts: every value finite, uncertainties and radio
/// frequencies positive, labels in the safe set.
fn check_accepted(dir: &Path) {
    if let Ok(rel) = read_release(dir) {
        for p in &rel.pulsars {
            ptacorr::noise::check_label(&p.label).unwrap();
            assert!(p.n_toa() > 4);
            for i in 0..p.n_toa() {
                assert!(p.mjd[i].is_finite() && p.residual[i].is_finite());
                assert!(p.sigma[i] > 0.0 && p.freq_mhz[i] > 0.0);
            }
        }
    }
}

fn config() -> ProptestConfig {
    ProptestConfig {
        cases: 48,
        failure_persistence: None,
        ..ProptestConfig::default()
    }
}

proptest! {
    #![proptest_config(config())]

    #[test]
    fn residual_tables_never_panic(edits in prop::collection::vec(edit(), 1..12)) {
        let good = std::fs::read(valid_release().join("residuals/P02.csv")).unwrap();
        let d = release_with("prop-res", "residuals/P02.csv", &apply(&good, &edits));
        check_accepted(&d);
        std::fs::remove_dir_all(&d).ok();
    }

    #[test]
    fn release_files_never_panic(edits in prop::collection::vec(edit(), 1..8)) {
        let good = std::fs::read(valid_release().join("release.toml")).unwrap();
        let d = release_with("prop-rel", "release.toml", &apply(&good, &edits));
        check_accepted(&d);
        std::fs::remove_dir_all(&d).ok();
    }

    #[test]
    fn noise_files_never_panic(edits in prop::collection::vec(edit(), 1..8)) {
        let good = std::fs::read(valid_release().join("noise.toml")).unwrap();
        let bytes = apply(&good, &edits);
        if let Ok(text) = std::str::from_utf8(&bytes) {
            if let Ok(m) = NoiseModel::parse(text, Path::new("noise.toml")) {
                for p in m.pulsars.values() {
                    for w in &p.white {
                        prop_assert!(w.efac.is_finite() && w.efac > 0.0);
                        prop_assert!(w.equad().is_finite());
                    }
                }
            }
        }
        let d = release_with("prop-noise", "noise.toml", &bytes);
        check_accepted(&d);
        std::fs::remove_dir_all(&d).ok();
    }

    #[test]
    fn arbitrary_bytes_never_panic(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        let text = String::from_utf8_lossy(&bytes);
        let _ = NoiseModel::parse(&text, Path::new("noise.toml"));
        let _ = Scenario::parse(&text, Path::new("s.toml"));
        let _ = ptacorr::null::parse_trials(&text, Path::new("trials.csv"));
        let _ = ptacorr::shard::Shard::parse(&text);
        let d = release_with("prop-bytes", "residuals/P01.csv", &bytes);
        check_accepted(&d);
        std::fs::remove_dir_all(&d).ok();
    }

    #[test]
    fn scenarios_never_panic_and_accepted_ones_lay_out(edits in prop::collection::vec(edit(), 1..6)) {
        let good = small_scenario(4, 2.0, 60.0, Some(-14.0));
        let bytes = apply(good.as_bytes(), &edits);
        if let Ok(text) = std::str::from_utf8(&bytes) {
            if let Ok(s) = Scenario::parse(text, Path::new("s.toml")) {
                // Accepted scenarios are small enough to lay out here (the size limit holds).
                let n = s.array.n_pulsars.unwrap_or(0).max(s.pulsars.len());
                let toas = n as f64 * s.array.span_years * 365.25 / s.array.cadence_days * 4.0;
                prop_assume!(toas < 2.0e5);
                let layout = ptacorr::scenario::lay_out(&s, 1);
                for p in &layout.pulsars {
                    prop_assert!(p.sigma.iter().all(|x| x.is_finite() && *x > 0.0));
                }
            }
        }
    }

    #[test]
    fn manifests_never_panic(edits in prop::collection::vec(edit(), 1..8)) {
        let d = temp_dir("prop-manifest");
        let mut set = ptacorr::output::OutputSet::begin(&d, "check").unwrap();
        set.write("a.csv", b"x,y\n1,2\n").unwrap();
        set.commit().unwrap();
        let good = std::fs::read(d.join("manifest.json")).unwrap();
        std::fs::write(d.join("manifest.json"), apply(&good, &edits)).unwrap();
        let _ = ptacorr::output::check_manifest(&d);
        std::fs::remove_dir_all(&d).ok();
    }
}
