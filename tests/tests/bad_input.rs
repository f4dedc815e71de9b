//! Every kind of bad input gives a clear error naming the file, line and field, never a panic.

use ptacorr::analysis::{correlate, CorrelateSettings};
use ptacorr::release::read_release;
use ptacorr::Error;
use ptacorr_checks::{simulate_release, small_scenario, temp_dir};
use std::fs;
use std::path::{Path, PathBuf};

/// A good 3-pulsar release in a fresh folder.
fn good_release(name: &str) -> PathBuf {
    let dir = temp_dir(name);
    simulate_release(&small_scenario(3, 3.0, 30.0, None), &dir, 5);
    dir
}

fn edit(path: &Path, f: impl FnOnce(String) -> String) {
    let t = fs::read_to_string(path).unwrap();
    fs::write(path, f(t)).unwrap();
}

/// Replace line `n` (1-based) of a file.
fn set_line(path: &Path, n: usize, line: &str) {
    edit(path, |t| {
        let mut lines: Vec<String> = t.lines().map(str::to_string).collect();
        lines[n - 1] = line.to_string();
        lines.join("\n") + "\n"
    });
}

fn error_of(dir: &Path) -> String {
    match read_release(dir) {
        Ok(rel) => match correlate(&rel, &CorrelateSettings::default()) {
            Ok(_) => panic!("expected an error for {}", dir.display()),
            Err(e) => e.to_string(),
        },
        Err(e) => e.to_string(),
    }
}

/// Run one broken case and check the message names what it should.
fn case(name: &str, breakit: impl FnOnce(&Path), expect: &[&str]) {
    let dir = good_release(name);
    breakit(&dir);
    let msg = error_of(&dir);
    for e in expect {
        assert!(msg.contains(e), "case {name}: message `{msg}` lacks `{e}`");
    }
    fs::remove_dir_all(&dir).ok();
}

const P1: &str = "residuals/P01.csv";

#[test]
fn malformed_residual_tables() {
    case(
        "nonnumber",
        |d| set_line(&d.join(P1), 10, "56100.0,abc,1e-6,1400.0,KRK-L"),
        &[
            "P01.csv line 10",
            "field residual_s",
            "\"abc\" is not a number",
        ],
    );
    case(
        "nan",
        |d| set_line(&d.join(P1), 4, "56100.0,NaN,1e-6,1400.0,KRK-L"),
        &["P01.csv line 4", "field residual_s", "not a finite number"],
    );
    case(
        "inf",
        |d| set_line(&d.join(P1), 5, "inf,0.0,1e-6,1400.0,KRK-L"),
        &["P01.csv line 5", "field mjd", "not a finite number"],
    );
    case(
        "sigma0",
        |d| set_line(&d.join(P1), 6, "56100.0,1e-7,0.0,1400.0,KRK-L"),
        &["P01.csv line 6", "field sigma_s", "must be positive"],
    );
    case(
        "sigmaneg",
        |d| set_line(&d.join(P1), 7, "56100.0,1e-7,-1e-6,1400.0,KRK-L"),
        &["line 7", "field sigma_s"],
    );
    case(
        "missingcol",
        |d| set_line(&d.join(P1), 1, "mjd,residual_s,sigma_s,backend"),
        &["P01.csv line 1", "header must be exactly"],
    );
    case(
        "shortrow",
        |d| set_line(&d.join(P1), 8, "56100.0,1e-7,1e-6"),
        &["P01.csv line 8", "columns"],
    );
    case(
        "nobackend",
        |d| set_line(&d.join(P1), 9, "56100.0,1e-7,1e-6,1400.0,"),
        &["line 9", "field backend"],
    );
    case(
        "missingfile",
        |d| fs::remove_file(d.join(P1)).unwrap(),
        &["P01.csv"],
    );
    case(
        "toofew",
        |d| {
            edit(&d.join(P1), |t| {
                t.lines().take(4).collect::<Vec<_>>().join("\n") + "\n"
            })
        },
        &["P01.csv", "3 TOAs, too few for its timing model"],
    );
}

#[test]
fn malformed_release_files() {
    case(
        "duplabel",
        |d| {
            edit(&d.join("release.toml"), |t| {
                t.replace("label = \"P02\"", "label = \"P01\"")
            })
        },
        &["release.toml line", "field pulsar[1].label", "used twice"],
    );
    case(
        "missinglabel",
        |d| {
            edit(&d.join("release.toml"), |t| {
                t.replacen("label = \"P02\"\n", "", 1)
            })
        },
        &["release.toml line", "label"],
    );
    case(
        "badra",
        |d| {
            edit(&d.join("release.toml"), |t| {
                let i = t.find("ra = \"").unwrap();
                format!(
                    "{}ra = \"25:00:00.0\"{}",
                    &t[..i],
                    &t[i + t[i..].find('\n').unwrap()..]
                )
            })
        },
        &["release.toml line", "field pulsar[0].ra", "25:00:00.0"],
    );
    case(
        "baddec",
        |d| {
            edit(&d.join("release.toml"), |t| {
                let i = t.find("dec = \"").unwrap();
                format!(
                    "{}dec = \"+91:00:00.0\"{}",
                    &t[..i],
                    &t[i + t[i..].find('\n').unwrap()..]
                )
            })
        },
        &["field pulsar[0].dec"],
    );
    case(
        "twopulsars",
        |d| {
            edit(&d.join("release.toml"), |t| {
                let i = t.rfind("[[pulsar]]").unwrap();
                t[..i].to_string()
            })
        },
        &["at least 3 pulsars, found 2"],
    );
    case(
        "toml",
        |d| {
            edit(&d.join("release.toml"), |t| {
                t.replace("[release]", "[release")
            })
        },
        &["release.toml line 1"],
    );
}

#[test]
fn malformed_noise_files() {
    case(
        "unknownbackend",
        |d| {
            edit(&d.join("noise.toml"), |t| {
                t.replace("backend = \"KRK-L\"", "backend = \"XYZ\"")
            })
        },
        &[
            "noise.toml line",
            "field pulsar.P01.white[0].backend",
            "\"XYZ\" does not occur",
        ],
    );
    case(
        "unknownpulsar",
        |d| {
            edit(&d.join("noise.toml"), |t| {
                t + "\n[pulsar.P99]\nwhite = []\n"
            })
        },
        &["noise.toml", "pulsar P99 is not in the release"],
    );
    case(
        "badefac",
        |d| {
            edit(&d.join("noise.toml"), |t| {
                let i = t.find("efac = ").unwrap();
                let j = i + t[i..].find(['\n', ',', '}']).unwrap();
                format!("{}efac = -2.0{}", &t[..i], &t[j..])
            })
        },
        &["noise.toml line", "efac", "EFAC must be in (0, 100]"],
    );
}

#[test]
fn degenerate_timing_model_is_reported_as_not_positive_definite() {
    let dir = good_release("degenerate");
    let rel = read_release(&dir).unwrap();
    let n = rel.pulsars[0].n_toa();
    // Two identical columns: the timing-model block of S is singular.
    let csv: String = std::iter::once("offset,offset_again,f0\n".to_string())
        .chain((0..n).map(|i| format!("1.0,1.0,{i}.0\n")))
        .collect();
    fs::write(dir.join("dm.csv"), csv).unwrap();
    edit(&dir.join("release.toml"), |t| {
        t.replacen(
            "residuals = \"residuals/P01.csv\"",
            "residuals = \"residuals/P01.csv\"\ndesign_matrix = \"dm.csv\"",
            1,
        )
    });
    let rel = read_release(&dir).unwrap();
    let err = correlate(&rel, &CorrelateSettings::default()).unwrap_err();
    assert!(matches!(err, Error::NotPositiveDefinite { .. }), "{err}");
    assert!(err.to_string().contains("pulsar P01"), "{err}");
    fs::remove_dir_all(&dir).ok();
}

// ---------------------------------------------------------------------------------------------
// The table-driven campaign: every class of bad input (scenario, noise model, release, options,
// output folder, shards) for every reader and command, each classified as a clear error (the
// message names what it should), an unclear error, a panic, or a silent accept. The tally is
// printed (`cargo test -- --nocapture`) and every case must be a clear error.

use ptacorr::analysis::CommonAutoPower;
use ptacorr::noise::NoiseModel;
use ptacorr::null::{self, Control, Method, NullSettings};
use ptacorr::output::{check_manifest, OutputSet};
use ptacorr::release::{read_release_with, ReadOptions};
use ptacorr::scenario::Scenario;
use ptacorr::shard::Shard;
use ptacorr::spectrum::PowerLaw;
use std::panic::{catch_unwind, AssertUnwindSafe};

#[derive(Debug, PartialEq)]
enum Verdict {
    Clear,
    Unclear(String),
    Panic,
    Accepted,
}

/// Run one case: `Err` whose message holds every `expect` is clear; no message may quote
/// more than about 80 characters of input, so messages longer than 700 characters are unclear.
fn judge<T>(f: impl FnOnce() -> Result<T, String>, expect: &[&str]) -> Verdict {
    match catch_unwind(AssertUnwindSafe(f)) {
        Err(_) => Verdict::Panic,
        Ok(Ok(_)) => Verdict::Accepted,
        Ok(Err(m)) if m.len() <= 700 && expect.iter().all(|e| m.contains(e)) => Verdict::Clear,
        Ok(Err(m)) => Verdict::Unclear(m.chars().take(300).collect()),
    }
}

struct Tally(Vec<(String, Verdict)>);

impl Tally {
    fn add(&mut self, name: &str, v: Verdict) {
        self.0.push((name.to_string(), v));
    }
    fn finish(self, what: &str) {
        let count = |p: fn(&Verdict) -> bool| self.0.iter().filter(|(_, v)| p(v)).count();
        println!(
            "{what}: {} cases, {} clear errors, {} unclear, {} panics, {} silent accepts",
            self.0.len(),
            count(|v| *v == Verdict::Clear),
            count(|v| matches!(v, Verdict::Unclear(_))),
            count(|v| *v == Verdict::Panic),
            count(|v| *v == Verdict::Accepted)
        );
        let bad: Vec<_> = self
            .0
            .iter()
            .filter(|(_, v)| *v != Verdict::Clear)
            .collect();
        assert!(bad.is_empty(), "{what}: {bad:#?}");
    }
}

const SCENARIO: &str = r#"
[array]
title = "Bad-input array (fictional)"
n_pulsars = 4
start_mjd = 56000.0
span_years = 3.0
cadence_days = 30.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1400.0]

[white]
sigma_us = [0.5, 1.0]
efac = [1.0, 1.1]

[red]
share = 0.5
log10_amplitude = [-14.0, -13.0]
spectral_index = [2.0, 4.0]
"#;

#[test]
fn scenario_settings_are_checked_before_any_work() {
    let path = Path::new("bad.toml");
    let run = |text: String| move || Scenario::parse(&text, path).map_err(|e| e.to_string());
    let with = |a: &str, b: &str| SCENARIO.replace(a, b);
    let pulsars = |label: &str| {
        with("n_pulsars = 4\n", "")
            + &(0..3)
                .map(|i| {
                    let l = if i == 0 {
                        label.to_string()
                    } else {
                        format!("P{i}")
                    };
                    format!(
                        "\n[[pulsar]]\nlabel = {l:?}\nra_deg = {}.0\ndec_deg = 0.0\n",
                        10 * i
                    )
                })
                .collect::<String>()
    };
    let cases: Vec<(&str, String, Vec<&str>)> = vec![
        (
            "efac inf",
            with("efac = [1.0, 1.1]", "efac = [0.9, inf]"),
            vec!["bad.toml", "white.efac", "(0, 100]"],
        ),
        (
            "efac nan",
            with("efac = [1.0, 1.1]", "efac = [nan, 1.0]"),
            vec!["white.efac"],
        ),
        (
            "sigma inf",
            with("sigma_us = [0.5, 1.0]", "sigma_us = [0.5, inf]"),
            vec!["white.sigma_us"],
        ),
        (
            "scatter 1000",
            with(
                "efac = [1.0, 1.1]",
                "efac = [1.0, 1.1]\nsigma_scatter_dex = 1000.0",
            ),
            vec!["white.sigma_scatter_dex", "[0, 1]"],
        ),
        (
            "scatter nan",
            with(
                "efac = [1.0, 1.1]",
                "efac = [1.0, 1.1]\nsigma_scatter_dex = nan",
            ),
            vec!["white.sigma_scatter_dex"],
        ),
        (
            "equad positive",
            with(
                "efac = [1.0, 1.1]",
                "efac = [1.0, 1.1]\nequad_log10_s = [-7.0, 2.0]",
            ),
            vec!["white.equad_log10_s", "[-10, -3]"],
        ),
        (
            "ecorr inf",
            with(
                "efac = [1.0, 1.1]",
                "efac = [1.0, 1.1]\necorr_log10_s = [-inf, -7.0]",
            ),
            vec!["white.ecorr_log10_s"],
        ),
        (
            "n_pulsars 1e8",
            with("n_pulsars = 4", "n_pulsars = 100000000"),
            vec!["array.n_pulsars", "10000"],
        ),
        (
            "too many toas",
            with("n_pulsars = 4", "n_pulsars = 9000")
                .replace("cadence_days = 30.0", "cadence_days = 1.0")
                .replace(
                    "[1400.0]",
                    "[1400.0, 1500.0, 1600.0, 1700.0, 1800.0, 1900.0, 2000.0, 2100.0]",
                ),
            vec!["array.n_pulsars", "GB"],
        ),
        (
            "red amplitude 10",
            with(
                "log10_amplitude = [-14.0, -13.0]",
                "log10_amplitude = [-14.0, 10.0]",
            ),
            vec!["red.log10_amplitude", "[-20, -8]"],
        ),
        (
            "red index nan",
            with("spectral_index = [2.0, 4.0]", "spectral_index = [nan, 4.0]"),
            vec!["red.spectral_index"],
        ),
        (
            "background 10",
            SCENARIO.to_string() + "\n[background]\nlog10_amplitude = 10.0\n",
            vec!["background.log10_amplitude"],
        ),
        (
            "background index inf",
            SCENARIO.to_string()
                + "\n[background]\nlog10_amplitude = -14.0\nspectral_index = inf\n",
            vec!["background.spectral_index"],
        ),
        (
            "simulation 1e5",
            SCENARIO.to_string() + "\n[simulation]\nn_frequencies = 100000\n",
            vec!["simulation.n_frequencies", "4000"],
        ),
        (
            "label escape",
            pulsars("../../escape"),
            vec!["pulsar[0].label", "not a usable label"],
        ),
        (
            "label absolute",
            pulsars("/tmp/abs"),
            vec!["pulsar[0].label"],
        ),
        ("label comma", pulsars("P,1"), vec!["pulsar[0].label"]),
        ("label empty", pulsars(""), vec!["pulsar[0].label"]),
        (
            "ra inf",
            pulsars("P9").replacen("ra_deg = 0.0", "ra_deg = inf", 1),
            vec!["pulsar[0].ra_deg"],
        ),
        (
            "backend name",
            with("name = \"KRK-L\"", "name = \"KRK L/../x\""),
            vec!["backend[0].name"],
        ),
        (
            "start mjd huge",
            with("start_mjd = 56000.0", "start_mjd = 999999.0"),
            vec!["array.start_mjd"],
        ),
        (
            "freq huge",
            with("[1400.0]", "[1e9]"),
            vec!["backend[0].freq_mhz"],
        ),
    ];
    let mut t = Tally(Vec::new());
    for (name, text, expect) in cases {
        t.add(name, judge(run(text), &expect));
    }
    t.finish("scenario");
}

#[test]
fn noise_model_settings_are_checked_before_any_work() {
    let path = Path::new("noise.toml");
    let good = "[common]\nlog10_amplitude = -14.5\nspectral_index = 4.33\n\n[pulsar.P01]\nwhite = [{ backend = \"KRK-L\", efac = 1.1, equad_log10_s = -7.0 }]\nred = { log10_amplitude = -13.8, spectral_index = 3.0, n_frequencies = 30 }\n";
    NoiseModel::parse(good, path).unwrap();
    let with = |a: &str, b: &str| good.replace(a, b);
    let cases: Vec<(&str, String, Vec<&str>)> = vec![
        (
            "n_frequencies 1e5",
            with("n_frequencies = 30", "n_frequencies = 100000"),
            vec![
                "noise.toml line 7",
                "pulsar.P01.red.n_frequencies",
                "1..=1000",
            ],
        ),
        (
            "red amplitude 10",
            with("-13.8", "10.0"),
            vec!["pulsar.P01.red.log10_amplitude", "[-20, -8]"],
        ),
        (
            "common index nan",
            with("4.33", "nan"),
            vec!["common.spectral_index"],
        ),
        (
            "equad 5",
            with("-7.0", "5.0"),
            vec!["white[0].equad_log10_s", "[-10, -3]"],
        ),
        (
            "efac inf",
            with("efac = 1.1", "efac = inf"),
            vec!["white[0].efac"],
        ),
        (
            "efac 1e6",
            with("efac = 1.1", "efac = 1e6"),
            vec!["white[0].efac", "(0, 100]"],
        ),
        (
            "old key name",
            with("equad_log10_s", "log10_equad"),
            vec!["noise.toml line 6", "unknown field"],
        ),
        (
            "label escape",
            with("[pulsar.P01]", "[pulsar.\"../x\"]"),
            vec!["pulsar.../x", "not a usable label"],
        ),
        (
            "not toml",
            "[common\n".to_string(),
            vec!["noise.toml line 1"],
        ),
    ];
    let mut t = Tally(Vec::new());
    for (name, text, expect) in cases {
        t.add(
            name,
            judge(
                || NoiseModel::parse(&text, path).map_err(|e| e.to_string()),
                &expect,
            ),
        );
    }
    t.finish("noise model");
}

#[test]
fn release_labels_paths_and_bytes_are_checked() {
    let mut t = Tally(Vec::new());
    let mut run = |name: &str, breakit: &dyn Fn(&Path), expect: &[&str]| {
        let dir = good_release(&format!("tbl-{}", name.replace(' ', "-")));
        breakit(&dir);
        t.add(name, judge(|| read_and_correlate(&dir), expect));
        fs::remove_dir_all(&dir).ok();
    };
    let toml = |a: &'static str, b: &'static str| {
        move |d: &Path| edit(&d.join("release.toml"), |t| t.replacen(a, b, 1))
    };
    run(
        "residuals outside",
        &toml("\"residuals/P01.csv\"", "\"../../../etc/passwd\""),
        &[
            "release.toml line",
            "pulsar[0].residuals",
            "outside the release folder",
        ],
    );
    run(
        "residuals absolute",
        &toml("\"residuals/P01.csv\"", "\"/etc/passwd\""),
        &["pulsar[0].residuals", "outside"],
    );
    run(
        "label escape",
        &toml("label = \"P01\"", "label = \"../../escape\""),
        &["pulsar[0].label", "not a usable label"],
    );
    run(
        "design outside",
        &toml(
            "residuals = \"residuals/P01.csv\"",
            "residuals = \"residuals/P01.csv\"\ndesign_matrix = \"/tmp/dm.csv\"",
        ),
        &["pulsar[0].design_matrix"],
    );
    run(
        "huge field",
        &|d: &Path| {
            set_line(
                &d.join(P1),
                3,
                &format!("56100.0,{},1e-6,1400.0,KRK-L", "9x".repeat(500_000)),
            )
        },
        &[
            "P01.csv line 3",
            "field residual_s",
            "not a number",
            "(1000000 characters)",
        ],
    );
    run(
        "huge header",
        &|d: &Path| set_line(&d.join(P1), 1, &"h".repeat(1_000_000)),
        &["P01.csv line 1", "header must be exactly"],
    );
    run(
        "non-utf8 field",
        &|d: &Path| {
            let mut b = fs::read(d.join(P1)).unwrap();
            let i = b.iter().position(|&c| c == b'\n').unwrap() + 3;
            b[i] = 0xff;
            fs::write(d.join(P1), b).unwrap();
        },
        &["P01.csv line 2", "field mjd", "not UTF-8"],
    );
    run(
        "non-utf8 toml",
        &|d: &Path| {
            let mut b = fs::read(d.join("release.toml")).unwrap();
            b[3] = 0xfe;
            fs::write(d.join("release.toml"), b).unwrap();
        },
        &["release.toml", "not UTF-8 text: byte 0xfe at offset 3"],
    );
    run(
        "tiny sigma",
        &|d: &Path| set_line(&d.join(P1), 4, "56100.0,1e-7,1e-300,1400.0,KRK-L"),
        &["pulsar P01", "TOA row 3", "sigma_s"],
    );
    // An outside path is read with the explicit option.
    let dir = good_release("tbl-outside-ok");
    let outside = dir
        .parent()
        .unwrap()
        .join(format!("ptacorr-outside-{}.csv", std::process::id()));
    fs::copy(dir.join(P1), &outside).unwrap();
    edit(&dir.join("release.toml"), |t| {
        t.replacen(
            "\"residuals/P01.csv\"",
            &format!("{:?}", outside.display().to_string()),
            1,
        )
    });
    assert!(read_release(&dir).is_err());
    let opts = ReadOptions {
        allow_outside_paths: true,
        ..ReadOptions::default()
    };
    read_release_with(&dir, opts).unwrap();
    fs::remove_file(&outside).ok();
    fs::remove_dir_all(&dir).ok();
    t.finish("release");
}

/// Read a release and run the analysis (bad values may only show in the reduction).
fn read_and_correlate(dir: &Path) -> Result<(), String> {
    let rel = read_release(dir).map_err(|e| e.to_string())?;
    correlate(&rel, &CorrelateSettings::default())
        .map(|_| ())
        .map_err(|e| e.to_string())
}

#[test]
fn non_finite_reductions_name_pulsar_row_and_cause() {
    let dir = good_release("nonfinite");
    set_line(&dir.join(P1), 4, "56100.0,1e-7,1e-300,1400.0,KRK-L");
    let e = read_and_correlate(&dir).unwrap_err();
    assert!(
        e.contains("pulsar P01") && e.contains("TOA row 3") && e.contains("sigma_s"),
        "{e}"
    );
    fs::remove_dir_all(&dir).ok();
}

#[test]
fn command_options_are_checked_before_any_work() {
    let mut t = Tally(Vec::new());
    let settings = |f: &dyn Fn(&mut CorrelateSettings)| {
        let mut s = CorrelateSettings::default();
        f(&mut s);
        s.validate().map_err(|e| e.to_string())
    };
    let given = |a: f64, g: f64| {
        CommonAutoPower::Given(PowerLaw {
            log10_amplitude: a,
            spectral_index: g,
        })
    };
    t.add(
        "common amplitude 10",
        judge(
            || settings(&|s| s.common = given(10.0, 4.33)),
            &["common-log10-amplitude", "[-20, -8]"],
        ),
    );
    t.add(
        "common amplitude nan",
        judge(
            || settings(&|s| s.common = given(f64::NAN, 4.33)),
            &["common-log10-amplitude"],
        ),
    );
    t.add(
        "frequencies 0",
        judge(
            || settings(&|s| s.n_frequencies = 0),
            &["frequencies", "1..=1000"],
        ),
    );
    t.add(
        "frequencies 1e5",
        judge(
            || settings(&|s| s.n_frequencies = 100_000),
            &["frequencies"],
        ),
    );
    t.add("bins 0", judge(|| settings(&|s| s.n_bins = 0), &["bins"]));
    t.add(
        "index inf",
        judge(
            || settings(&|s| s.spectral_index = f64::INFINITY),
            &["spectral-index"],
        ),
    );
    let inj = ptacorr::inject::InjectSettings {
        common: given(10.0, 4.33),
        ..Default::default()
    };
    t.add(
        "inject common 10",
        judge(
            || inj.validate().map_err(|e| e.to_string()),
            &["common-log10-amplitude"],
        ),
    );
    for (text, expect) in [
        ("0/3", "1 <= I <= N"),
        ("4/3", "1 <= I <= N"),
        ("1/1000000000000", "at most 1000000 shards"),
        ("-1/3", "I/N"),
        ("1/0", "I/N"),
    ] {
        t.add(
            &format!("shard {text}"),
            judge(|| Shard::parse(text).map_err(|e| e.to_string()), &[expect]),
        );
    }
    let mut n = NullSettings::new(Method::Phase, 0, 1);
    t.add(
        "trials 0",
        judge(|| n.validate().map_err(|e| e.to_string()), &["trials"]),
    );
    n.trials = 10;
    n.time_domain = true;
    t.add(
        "time domain with phase",
        judge(|| n.validate().map_err(|e| e.to_string()), &["time-domain"]),
    );
    t.finish("options");
}

#[test]
fn data_that_look_wrong_warn_and_fail_under_strict() {
    let strict = ReadOptions {
        strict: true,
        ..ReadOptions::default()
    };
    let mut t = Tally(Vec::new());
    let mut run = |name: &str, breakit: &dyn Fn(&Path), expect: &[&str]| {
        let dir = good_release(&format!("warn-{}", name.replace(' ', "-")));
        breakit(&dir);
        let rel = read_release(&dir).expect("legal data are read");
        assert!(
            rel.warnings
                .iter()
                .any(|w| expect.iter().all(|e| w.contains(e))),
            "{name}: warnings {:?}",
            rel.warnings
        );
        t.add(
            name,
            judge(
                || read_release_with(&dir, strict).map_err(|e| e.to_string()),
                &["--strict", expect[0]],
            ),
        );
        fs::remove_dir_all(&dir).ok();
    };
    run(
        "duplicate rows",
        &|d: &Path| {
            edit(&d.join(P1), |t| {
                let row = t.lines().nth(5).unwrap().to_string();
                t + &row + "\n"
            })
        },
        &["exact duplicate row", "pulsar P01"],
    );
    run(
        "isolated toa",
        &|d: &Path| edit(&d.join(P1), |t| t + "99000.0,1e-7,1e-6,1310.0,KRK-L\n"),
        &["lies", "days from the others", "MJD 99000"],
    );
    run(
        "shared file",
        &|d: &Path| {
            edit(&d.join("release.toml"), |t| {
                t.replace("residuals/P02.csv", "residuals/P01.csv")
            })
        },
        &["read the same residual file"],
    );
    // The warnings are recorded in the provenance of the outputs.
    let dir = good_release("warn-provenance");
    edit(&dir.join(P1), |t| {
        let row = t.lines().nth(5).unwrap().to_string();
        t + &row + "\n"
    });
    let rel = read_release(&dir).unwrap();
    let c = correlate(&rel, &CorrelateSettings::default()).unwrap();
    let out = dir.join("out");
    c.write(&out, &rel, &CorrelateSettings::default()).unwrap();
    let s = fs::read_to_string(out.join("summary.json")).unwrap();
    assert!(
        s.contains("\"warnings\"") && s.contains("exact duplicate row"),
        "{s}"
    );
    fs::remove_dir_all(&dir).ok();
    t.finish("warnings");
}

/// Rewrite an output folder's file through an output set (so its manifest is valid again),
/// as a hand edit by someone who also updated the manifest would.
fn rewrite_with_manifest(dir: &Path, file: &str, f: impl Fn(String) -> String) {
    let m = check_manifest(dir).unwrap();
    let mut set = OutputSet::begin(dir, "edited").unwrap();
    for e in &m.files {
        let bytes = fs::read(dir.join(&e.name)).unwrap();
        let bytes = if e.name == file {
            f(String::from_utf8(bytes).unwrap()).into_bytes()
        } else {
            bytes
        };
        set.write(&e.name, &bytes).unwrap();
    }
    set.commit().unwrap();
}

#[test]
fn output_folders_and_shards_are_checked() {
    let base = temp_dir("outputs");
    let rel_dir = base.join("rel");
    let rel = simulate_release(&small_scenario(4, 3.0, 30.0, None), &rel_dir, 5);
    let mut t = Tally(Vec::new());
    let shard_run = |i: u64, n: u64, dir: &Path| {
        let mut s = NullSettings::new(Method::Phase, 40, 3);
        s.analytic = false;
        s.shard = Some(Shard { index: i, count: n });
        null::run_null(&rel, &s, dir, Control::default()).unwrap();
    };
    let (s1, s2) = (base.join("s1"), base.join("s2"));
    shard_run(1, 2, &s1);
    shard_run(2, 2, &s2);
    let merged = base.join("merged");
    null::merge::merge(&[s1.clone(), s2.clone()], &merged).unwrap();
    // Missing shard, mixed folder, no manifest, hand-edited shard index 0 and count 1e12.
    let merge =
        |dirs: Vec<PathBuf>| null::merge::merge(&dirs, &base.join("m")).map_err(|e| e.to_string());
    t.add(
        "merge missing shard",
        judge(|| merge(vec![s1.clone()]), &["missing shards: 2/2"]),
    );
    let mixed = base.join("mixed");
    fs::create_dir_all(&mixed).unwrap();
    for f in ["null.json", "trials.csv", "manifest.json"] {
        fs::copy(s1.join(f), mixed.join(f)).unwrap();
    }
    fs::copy(s2.join("trials.csv"), mixed.join("trials.csv")).unwrap();
    t.add(
        "merge mixed folder",
        judge(
            || merge(vec![mixed.clone(), s2.clone()]),
            &["trials.csv", "different runs"],
        ),
    );
    fs::remove_file(mixed.join("manifest.json")).unwrap();
    t.add(
        "merge no manifest",
        judge(
            || merge(vec![mixed.clone(), s2.clone()]),
            &["manifest.json", "missing"],
        ),
    );
    for (name, from, to, expect) in [
        (
            "shard index 0",
            "\"index\": 1",
            "\"index\": 0",
            "shard index 0 is outside 1..=2",
        ),
        (
            "shard count 1e12",
            "\"count\": 2",
            "\"count\": 1000000000000",
            "shard count 1000000000000 is outside 1..=40",
        ),
    ] {
        let d = base.join(name.replace(' ', "-"));
        fs::create_dir_all(&d).unwrap();
        for f in ["null.json", "trials.csv", "manifest.json"] {
            fs::copy(s1.join(f), d.join(f)).unwrap();
        }
        rewrite_with_manifest(&d, "null.json", |t| t.replacen(from, to, 1));
        t.add(
            name,
            judge(
                || merge(vec![d.clone(), s2.clone()]),
                &["null.json", "field shard", expect],
            ),
        );
    }
    // A second run into a folder another run holds.
    let held = base.join("held");
    let lock = OutputSet::begin(&held, "other").unwrap();
    let mut s = NullSettings::new(Method::Phase, 20, 9);
    s.analytic = false;
    t.add(
        "null into a held folder",
        judge(
            || null::run_null(&rel, &s, &held, Control::default()).map_err(|e| e.to_string()),
            &["in use by another ptacorr run"],
        ),
    );
    drop(lock);
    // A failed run leaves the earlier output untouched.
    let before: Vec<(String, Vec<u8>)> = ["null.json", "trials.csv", "manifest.json"]
        .iter()
        .map(|f| (f.to_string(), fs::read(merged.join(f)).unwrap()))
        .collect();
    let mut bad = NullSettings::new(Method::Scramble, 20, 9);
    bad.pattern = ptacorr::orf::Pattern::Monopole;
    t.add(
        "failed run keeps old output",
        judge(
            || null::run_null(&rel, &bad, &merged, Control::default()).map_err(|e| e.to_string()),
            &["monopole"],
        ),
    );
    let after: Vec<(String, Vec<u8>)> = ["null.json", "trials.csv", "manifest.json"]
        .iter()
        .map(|f| (f.to_string(), fs::read(merged.join(f)).unwrap()))
        .collect();
    assert!(before == after, "a failed run changed the earlier output");
    let stray: Vec<_> = fs::read_dir(&merged)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".tmp") || n.starts_with(".staging"))
        .collect();
    assert!(stray.is_empty(), "{stray:?}");
    check_manifest(&merged).unwrap();
    t.finish("outputs and shards");
    fs::remove_dir_all(&base).ok();
}

/// Chain tables for the noise-marginalised OS (issue 13.8): tables that do not fit the
/// release's pulsars or backends, NaN rows, fewer rows than draws and malformed tables are
/// refused before any work with the file and row; nothing is computed.
#[test]
fn chain_tables_are_checked_against_the_release_before_any_work() {
    use ptacorr::nmos::{read_tables, NmosSettings};
    let rel_dir = temp_dir("bad-chains-release");
    let text = SCENARIO.replace("n_pulsars = 4", "n_pulsars = 3");
    let s = Scenario::parse(&text, Path::new("bad.toml")).unwrap();
    ptacorr::simulate::simulate_scenario(&ptacorr::scenario::lay_out(&s, 3), 3, &rel_dir).unwrap();
    let rel = read_release(&rel_dir).unwrap();
    let label = rel.pulsars[0].label.clone();
    let red = rel
        .pulsars
        .iter()
        .find(|p| rel.noise.pulsar(&p.label).red.is_none())
        .map(|p| p.label.clone());
    let b = rel.pulsars[0].backends[0].clone();
    let head = "chain,draw,log_posterior,diverging";
    let good = format!("{head},efac.{b}\n0,0,-1,false,1.0\n0,1,-2,true,1.1\n1,0,,false,0.9\n");
    let mut t = Tally(Vec::new());
    let mut run =
        |name: &str, files: &[(&str, String)], draws: u64, common: bool, expect: &[&str]| {
            let dir = temp_dir(&format!("bad-chains-{name}"));
            for (f, body) in files {
                fs::write(dir.join(f), body).unwrap();
            }
            let settings = NmosSettings {
                chains: (!common).then(|| dir.clone()),
                common_draws: common.then(|| dir.join(files[0].0)),
                draws,
                seed: 1,
                shard: Shard::ALL,
            };
            let v = judge(
                || {
                    read_tables(&rel, &settings, &CorrelateSettings::default())
                        .map_err(|e| e.to_string())
                },
                expect,
            );
            t.add(name, v);
            fs::remove_dir_all(&dir).ok();
        };
    let own = format!("{label}.csv");
    run(
        "no pulsar of that name",
        &[("Q99.csv", good.clone())],
        2,
        false,
        &["Q99.csv", "no pulsar \"Q99\""],
    );
    run(
        "backend the pulsar lacks",
        &[(&own, format!("{head},efac.ZZZ-X\n0,0,1,false,1.0\n"))],
        1,
        false,
        &[&own, "line 1", "field efac.ZZZ-X", "no backend"],
    );
    run(
        "NaN row",
        &[(
            &own,
            format!("{head},efac.{b}\n0,0,1,false,1.0\n0,1,1,false,NaN\n"),
        )],
        1,
        false,
        &[&own, "line 3", "field efac.", "not a finite number"],
    );
    run(
        "inf log posterior",
        &[(&own, format!("{head},efac.{b}\n0,0,-inf,false,1.0\n"))],
        1,
        false,
        &[&own, "line 2", "field log_posterior"],
    );
    run(
        "fewer rows than draws",
        &[(&own, good.clone())],
        4,
        false,
        &[&own, "line 4", "fewer than the 4 draws"],
    );
    run(
        "unknown column",
        &[(&own, format!("{head},efac.{b},speed\n0,0,1,false,1.0,2\n"))],
        1,
        false,
        &[&own, "line 1", "field speed"],
    );
    run(
        "duplicated column",
        &[(
            &own,
            format!("{head},efac.{b},efac.{b}\n0,0,1,false,1.0,1.0\n"),
        )],
        1,
        false,
        &[&own, "line 1", "given twice"],
    );
    run(
        "non-integer chain",
        &[(&own, format!("{head},efac.{b}\n0.5,0,1,false,1.0\n"))],
        1,
        false,
        &[&own, "line 2", "field chain"],
    );
    run(
        "repeated draw",
        &[(
            &own,
            format!("{head},efac.{b}\n0,0,1,false,1.0\n0,0,1,false,1.0\n"),
        )],
        1,
        false,
        &[&own, "line 3", "given twice"],
    );
    run(
        "EFAC out of range",
        &[(&own, format!("{head},efac.{b}\n0,0,1,false,-1\n"))],
        1,
        false,
        &[&own, "line 2", "EFAC must be in"],
    );
    run(
        "missing fixed columns",
        &[(&own, format!("chain,draw,efac.{b}\n0,0,1.0\n"))],
        1,
        false,
        &[&own, "line 1", "header must start with"],
    );
    run(
        "short row",
        &[(&own, format!("{head},efac.{b}\n0,0,1,false\n"))],
        1,
        false,
        &[&own, "line 2", "expected 5 columns"],
    );
    run(
        "empty table",
        &[(&own, format!("{head},efac.{b}\n"))],
        1,
        false,
        &[&own, "no rows"],
    );
    run(
        "common column in a pulsar table",
        &[(
            &own,
            format!("{head},common.log10_amplitude\n0,0,1,false,-14\n"),
        )],
        1,
        false,
        &[&own, "field common.log10_amplitude"],
    );
    if let Some(r) = &red {
        run(
            "half a red power law without a red process",
            &[(
                &format!("{r}.csv"),
                format!("{head},red.log10_amplitude\n0,0,1,false,-14\n"),
            )],
            1,
            false,
            &[&format!("{r}.csv"), "red.spectral_index"],
        );
    }
    run(
        "pulsar column in a common table",
        &[(
            "common-draws.csv",
            format!("{head},efac.{b}\n0,0,1,false,1.0\n"),
        )],
        1,
        true,
        &["common-draws.csv", "line 1", "common-process draw table"],
    );
    run(
        "common table with too few draws",
        &[(
            "common-draws.csv",
            format!("{head},common.log10_amplitude\n0,0,1,false,-14.2\n"),
        )],
        2,
        true,
        &["common-draws.csv", "line 2", "fewer than the 2 draws"],
    );
    run(
        "zero draws",
        &[(&own, good.clone())],
        0,
        false,
        &["draws", "1..="],
    );
    let empty = temp_dir("bad-chains-empty");
    let v = judge(
        || {
            let s = NmosSettings {
                chains: Some(empty.clone()),
                common_draws: None,
                draws: 1,
                seed: 1,
                shard: Shard::ALL,
            };
            read_tables(&rel, &s, &CorrelateSettings::default()).map_err(|e| e.to_string())
        },
        &["no chain tables"],
    );
    t.add("folder without tables", v);
    t.finish("chain tables");
    fs::remove_dir_all(&rel_dir).ok();
}

/// The common process (`ptacorr common`, docs/common-process.md): a grid with no points, priors
/// that hold no mass and a degenerate noise model (a singular Z_a, so B = Z + Z Phi_int Z is
/// singular) are clear errors that say what to change, before any work; a prior range far from
/// the likelihood still gives finite Bayes factors, never NaN.
#[test]
fn common_process_grids_priors_and_degenerate_noise_are_refused() {
    use ptacorr::common::{fit_common, AmplitudePrior, CommonData, CommonSettings};
    let mut t = Tally(Vec::new());
    let settings = |f: &dyn Fn(&mut CommonSettings)| {
        let mut s = CommonSettings::default();
        f(&mut s);
        s.validate().map_err(|e| e.to_string())
    };
    type Edit = Box<dyn Fn(&mut CommonSettings)>;
    let cases: Vec<(&str, Edit, Vec<&str>)> = vec![
        (
            "no index points",
            Box::new(|s| s.n_spectral_index = 0),
            vec!["index-points", "odd number of points >= 3"],
        ),
        (
            "one index point",
            Box::new(|s| s.n_spectral_index = 1),
            vec!["index-points", "odd number"],
        ),
        (
            "even index points",
            Box::new(|s| s.n_spectral_index = 40),
            vec!["index-points", "odd number", "got 40"],
        ),
        (
            "zero gamma-rule tolerance",
            Box::new(|s| s.index_tolerance = 0.0),
            vec!["index-tolerance", "(0, 1)"],
        ),
        (
            "more index points than the adaptive rule allows",
            Box::new(|s| s.n_spectral_index = 1001),
            vec!["index-points", "at most 257"],
        ),
        (
            "no amplitude points",
            Box::new(|s| s.n_table_amplitudes = 0),
            vec!["amplitude-points", "at least 2"],
        ),
        (
            "no frequencies",
            Box::new(|s| s.n_frequencies = 0),
            vec!["frequencies", "1..=1000"],
        ),
        (
            "no models",
            Box::new(|s| s.models.clear()),
            vec!["models", "no correlation model"],
        ),
        (
            "empty amplitude prior",
            Box::new(|s| s.log10_amplitude_max = s.log10_amplitude_min),
            vec!["log10-amplitude-range", "holds no mass", "LO < HI"],
        ),
        (
            "reversed amplitude prior",
            Box::new(|s| {
                s.log10_amplitude_min = -12.0;
                s.log10_amplitude_max = -18.0;
            }),
            vec!["log10-amplitude-range", "holds no mass"],
        ),
        (
            "nan amplitude prior",
            Box::new(|s| s.log10_amplitude_min = f64::NAN),
            vec!["log10-amplitude-range"],
        ),
        (
            "empty uniform-amplitude prior",
            Box::new(|s| {
                s.amplitude_prior = AmplitudePrior::UniformAmplitude;
                s.log10_amplitude_min = -14.0;
                s.log10_amplitude_max = -14.0;
            }),
            vec!["log10-amplitude-range", "holds no mass"],
        ),
        (
            "amplitude prior beyond range",
            Box::new(|s| s.log10_amplitude_max = 3.0),
            vec!["log10-amplitude-range", "[-30, 0]"],
        ),
        (
            "empty index prior",
            Box::new(|s| {
                s.spectral_index_min = 3.0;
                s.spectral_index_max = 3.0;
            }),
            vec![
                "spectral-index-range",
                "holds no mass",
                "0 <= LO < HI <= 10",
            ],
        ),
        (
            "negative index prior",
            Box::new(|s| s.spectral_index_min = -2.0),
            vec!["spectral-index-range"],
        ),
        (
            "nan fixed index",
            Box::new(|s| s.fixed_spectral_index = f64::NAN),
            vec!["fixed-index", "[0, 10]"],
        ),
    ];
    for (name, f, expect) in &cases {
        t.add(name, judge(|| settings(f.as_ref()), expect));
    }
    // A degenerate noise model: 2K = 120 Fourier columns on pulsars with about 74 TOAs, so Z_a
    // is singular. The message names the pulsar and what to change.
    let dir = good_release("common-singular");
    let rel = read_release(&dir).unwrap();
    t.add(
        "singular Z (more frequencies than TOAs)",
        judge(
            || {
                CommonData::from_release(&rel, &rel.noise, 60)
                    .map(|_| ())
                    .map_err(|e| e.to_string())
            },
            &["pulsar P0", "fewer frequencies", "not positive definite"],
        ),
    );
    // Never a NaN Bayes factor: a prior range where the likelihood is flat (far below any
    // detectable amplitude) gives ln BF near 0, and a range far above it a very negative but
    // finite one.
    let data = CommonData::from_release(&rel, &rel.noise, 5).unwrap();
    for (lo, hi) in [(-30.0, -28.0), (-4.0, -1.0)] {
        let s = CommonSettings {
            n_frequencies: 5,
            log10_amplitude_min: lo,
            log10_amplitude_max: hi,
            n_spectral_index: 5,
            ..Default::default()
        };
        let fit = fit_common(&data, &s).unwrap();
        for fixed in [true, false] {
            for b in fit.standard_bayes_factors(fixed) {
                assert!(
                    b.ln_bayes_factor.is_finite() && b.ln_error.is_finite(),
                    "[{lo}, {hi}]: {b:?}"
                );
            }
        }
        let flat = fit.bayes_factor(ptacorr::common::CommonModel::Curn, None, true);
        if lo < -20.0 {
            assert!(flat.unwrap().ln_bayes_factor.abs() < 1e-6);
        } else {
            assert!(flat.unwrap().ln_bayes_factor < -10.0);
        }
    }
    fs::remove_dir_all(&dir).ok();
    t.finish("common process");
}

/// `ptacorr noise`: priors files, sampler settings and degenerate models (issue 11.8). Each
/// case is judged as above; nothing is computed before the check that refuses it.
#[test]
fn noise_priors_sampler_settings_and_degenerate_models() {
    use ptacorr::noise_fit::sample::SampleMode;
    use ptacorr::noise_fit::{fit_release, NoiseSettings};
    use ptacorr::priors::PriorFile;
    use ptacorr::sampler::SamplerSettings;
    let dir = temp_dir("bad-noise");
    let rel = simulate_release(SCENARIO, &dir.join("rel"), 3);
    let path = Path::new("priors.toml");
    let mut t = Tally(Vec::new());
    let priors_cases: Vec<(&str, &str, Vec<&str>)> = vec![
        (
            "empty range",
            "[ranges]\nefac = [1.0, 1.0]\n",
            vec!["priors.toml line 2", "ranges.efac", "empty or inverted"],
        ),
        (
            "inverted dotted range",
            "[ranges]\nefac = [0.5, 2.0]\nred.log10_amplitude = [-12.0, -16.0]\n",
            vec![
                "priors.toml line 3",
                "ranges.red.log10_amplitude",
                "inverted",
            ],
        ),
        (
            "inverted inline range of one pulsar",
            "[pulsar.P01]\nranges = { dm = { spectral_index = [5.0, 1.0] } }\n",
            vec!["priors.toml line 2", "pulsar.P01.ranges.dm.spectral_index"],
        ),
        (
            "range outside noise.toml",
            "[ranges]\nred.spectral_index = [0.0, 12.0]\n",
            vec!["ranges.red.spectral_index", "[0, 10]"],
        ),
        (
            "nan range",
            "[ranges]\nequad_log10_s = [nan, -6.0]\n",
            vec!["priors.toml line 2", "ranges.equad_log10_s", "not finite"],
        ),
        (
            "old key name",
            "[ranges]\nlog10_equad_s = [-8.0, -6.0]\n",
            vec!["priors.toml line 2", "unknown field"],
        ),
        (
            "unknown process",
            "[common]\nprocess = \"maybe\"\n",
            vec!["common.process", "\"maybe\""],
        ),
    ];
    for (name, text, expect) in priors_cases {
        t.add(
            name,
            judge(
                || PriorFile::parse(text, path).map_err(|e| e.to_string()),
                &expect,
            ),
        );
    }
    let release_cases: Vec<(&str, &str, Vec<&str>)> = vec![
        (
            "ecorr for a backend the pulsar lacks",
            "[pulsar.P02]\necorr_backends = [\"NOPE\"]\n",
            vec![
                "priors.toml line 2",
                "pulsar.P02.ecorr_backends",
                "no backend \"NOPE\"",
            ],
        ),
        (
            "ecorr for a backend no pulsar has",
            "[components]\necorr_backends = [\"NOPE\"]\n",
            vec!["components.ecorr_backends", "\"NOPE\""],
        ),
        (
            "table of a pulsar not in the release",
            "[pulsar.P99]\nred = false\n",
            vec!["pulsar.P99", "not in the release"],
        ),
    ];
    for (name, text, expect) in release_cases {
        t.add(
            name,
            judge(
                || {
                    let f = PriorFile::parse(text, path).map_err(|e| e.to_string())?;
                    f.check_release(&rel).map_err(|e| e.to_string())
                },
                &expect,
            ),
        );
    }
    let defaults = PriorFile::defaults();
    let settings_cases: Vec<(&str, SamplerSettings, Vec<&str>)> = vec![
        (
            "one chain",
            SamplerSettings {
                chains: 1,
                ..SamplerSettings::default()
            },
            vec!["chains", "[2, 64]"],
        ),
        (
            "no draws",
            SamplerSettings {
                draws: 0,
                ..SamplerSettings::default()
            },
            vec!["draws"],
        ),
        (
            "target acceptance 1",
            SamplerSettings {
                target_accept: 1.0,
                ..SamplerSettings::default()
            },
            vec!["target-accept"],
        ),
    ];
    for (name, sampler, expect) in settings_cases {
        let settings = NoiseSettings {
            sampler,
            ..NoiseSettings::default()
        };
        t.add(
            name,
            judge(
                || fit_release(&rel, &defaults, &settings, &|| {}).map_err(|e| e.to_string()),
                &expect,
            ),
        );
    }
    // A degenerate model: two identical timing-model columns make S singular at every point;
    // the run stops naming the pulsar (no NaN reaches an output).
    let n = rel.pulsars[0].n_toa();
    let csv: String = std::iter::once("offset,offset_again,f0\n".to_string())
        .chain((0..n).map(|i| format!("1.0,1.0,{i}.0\n")))
        .collect();
    fs::write(dir.join("rel/dm.csv"), csv).unwrap();
    edit(&dir.join("rel/release.toml"), |t| {
        t.replacen(
            "residuals = \"residuals/P01.csv\"",
            "residuals = \"residuals/P01.csv\"\ndesign_matrix = \"dm.csv\"",
            1,
        )
    });
    let degenerate = read_release(&dir.join("rel")).unwrap();
    let map_only = NoiseSettings {
        mode: SampleMode::MapOnly,
        ..NoiseSettings::default()
    };
    t.add(
        "degenerate timing model",
        judge(
            || fit_release(&degenerate, &defaults, &map_only, &|| {}).map_err(|e| e.to_string()),
            &["pulsar P01"],
        ),
    );
    fs::remove_dir_all(&dir).ok();
    t.finish("noise priors, sampler settings and degenerate models");
}
