//! Bad input for every command, as a user meets it: a non-zero exit, a short `error:` message
//! naming what is wrong, no panic, and no output written (nothing outside `--out` ever). The
//! tally (clear / unclear / panic / silent accept / output left) is printed with --nocapture.

use std::path::{Path, PathBuf};
use std::process::Command;

fn ptacorr() -> Command {
    Command::new(env!("CARGO_BIN_EXE_ptacorr"))
}

fn temp(name: &str) -> PathBuf {
    ptacorr::testing::temp_path(&format!("badcli-{name}"))
}

const SCENARIO: &str = r#"
[array]
title = "CLI bad-input array (fictional)"
n_pulsars = 4
start_mjd = 56000.0
span_years = 3.0
cadence_days = 20.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1400.0]

[white]
sigma_us = [0.5, 1.0]
efac = [1.0, 1.1]

[background]
log10_amplitude = -14.0

[simulation]
n_frequencies = 14
span_factor = 1
"#;

#[derive(Default)]
struct Tally {
    cases: usize,
    clear: usize,
    bad: Vec<String>,
}

impl Tally {
    /// Run `args`; it must fail with every `expect` in stderr, stderr short, no panic, and
    /// `out` (if given) absent afterwards.
    fn refuse(&mut self, name: &str, args: &[&str], expect: &[&str], out: Option<&Path>) {
        self.cases += 1;
        let o = ptacorr().args(args).output().unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        let verdict = if err.contains("panicked") {
            "panic"
        } else if o.status.success() {
            "silent accept"
        } else if out.is_some_and(Path::exists) {
            "output left"
        } else if err.len() > 1500 || !expect.iter().all(|e| err.contains(e)) {
            "unclear"
        } else {
            "clear"
        };
        if verdict == "clear" {
            self.clear += 1;
        } else {
            self.bad.push(format!(
                "{name}: {verdict}: {}",
                err.chars().take(400).collect::<String>()
            ));
        }
    }
}

#[test]
fn every_command_refuses_bad_input_clearly() {
    let base = temp("base");
    std::fs::create_dir_all(&base).unwrap();
    let s = |p: &Path| p.to_str().unwrap().to_string();
    let scen = base.join("s.toml");
    std::fs::write(&scen, SCENARIO).unwrap();
    let rel = base.join("rel");
    let o = ptacorr()
        .args(["simulate", &s(&scen), "--out", &s(&rel)])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let out = base.join("out");
    let (scen_s, rel_s, out_s) = (s(&scen), s(&rel), s(&out));
    let mut t = Tally::default();

    // simulate: labels that leave --out, ranges, an existing release.
    let escape = base.join("escape.toml");
    std::fs::write(
        &escape,
        SCENARIO.replace("n_pulsars = 4\n", "")
            + "[[pulsar]]\nlabel = \"../../escape\"\nra_deg = 1.0\ndec_deg = 2.0\n[[pulsar]]\nlabel = \"P2\"\nra_deg = 10.0\ndec_deg = 2.0\n[[pulsar]]\nlabel = \"P3\"\nra_deg = 20.0\ndec_deg = 2.0\n",
    )
    .unwrap();
    t.refuse(
        "simulate escape label",
        &["simulate", &s(&escape), "--out", &out_s],
        &["escape.toml", "pulsar[0].label", "not a usable label"],
        Some(&out),
    );
    assert!(!base.parent().unwrap().join("escape.csv").exists());
    let inf = base.join("inf.toml");
    std::fs::write(
        &inf,
        SCENARIO.replace("efac = [1.0, 1.1]", "efac = [0.9, inf]"),
    )
    .unwrap();
    t.refuse(
        "simulate efac inf",
        &["simulate", &s(&inf), "--out", &out_s],
        &["inf.toml", "white.efac"],
        Some(&out),
    );
    let before = std::fs::read(rel.join("residuals/P01.csv")).unwrap();
    t.refuse(
        "simulate onto a release",
        &["simulate", &scen_s, "--out", &rel_s, "--seed", "3"],
        &["already holds a release", "--replace-release"],
        None,
    );
    assert_eq!(
        std::fs::read(rel.join("residuals/P01.csv")).unwrap(),
        before,
        "a refused simulate changed the release"
    );
    t.refuse(
        "simulate negative seed",
        &["simulate", &scen_s, "--out", &out_s, "--seed", "-5"],
        &["a seed is a whole number"],
        Some(&out),
    );

    // correlate / null / inject / merge: options out of range.
    t.refuse(
        "correlate common 10",
        &[
            "correlate",
            &rel_s,
            "--out",
            &out_s,
            "--common-log10-amplitude",
            "10",
        ],
        &["common-log10-amplitude", "[-20, -8]"],
        Some(&out),
    );
    t.refuse(
        "correlate frequencies 0",
        &["correlate", &rel_s, "--out", &out_s, "--frequencies", "0"],
        &["frequencies"],
        Some(&out),
    );
    // common --joint-red: an empty red-noise prior range, a pulsar not in the release.
    let empty = base.join("joint-empty.toml");
    std::fs::write(&empty, "[ranges]\nred.log10_amplitude = [-14.0, -14.0]\n").unwrap();
    t.refuse(
        "common joint-red empty range",
        &[
            "common",
            &rel_s,
            "--out",
            &out_s,
            "--joint-red",
            "--joint-red-priors",
            &s(&empty),
        ],
        &["joint-empty.toml", "ranges.red.log10_amplitude", "empty"],
        Some(&out),
    );
    let stranger = base.join("joint-stranger.toml");
    std::fs::write(&stranger, "[pulsar.P99]\nred = false\n").unwrap();
    t.refuse(
        "common joint-red unknown pulsar",
        &[
            "common",
            &rel_s,
            "--out",
            &out_s,
            "--joint-red",
            "--joint-red-priors",
            &s(&stranger),
        ],
        &["joint-stranger.toml", "pulsar.P99", "not in the release"],
        Some(&out),
    );
    t.refuse(
        "null shard 0",
        &[
            "null", &rel_s, "--method", "phase", "--trials", "10", "--shard", "0/3", "--out",
            &out_s,
        ],
        &["shard"],
        Some(&out),
    );
    t.refuse(
        "null shard 1e12",
        &[
            "null",
            &rel_s,
            "--method",
            "phase",
            "--trials",
            "10",
            "--shard",
            "1/1000000000000",
            "--out",
            &out_s,
        ],
        &["at most 1000000 shards"],
        Some(&out),
    );
    t.refuse(
        "null negative seed",
        &[
            "null", &rel_s, "--method", "phase", "--trials", "10", "--seed", "-1", "--out", &out_s,
        ],
        &["a seed is a whole number"],
        Some(&out),
    );
    t.refuse(
        "null trials 0",
        &[
            "null", &rel_s, "--method", "phase", "--trials", "0", "--out", &out_s,
        ],
        &["trials"],
        Some(&out),
    );
    t.refuse(
        "inject common 10",
        &[
            "inject",
            &rel_s,
            "--amplitudes",
            "0,1e-14",
            "--realizations",
            "10",
            "--auto-power",
            "fixed",
            "--common-log10-amplitude",
            "10",
            "--out",
            &out_s,
        ],
        &["common-log10-amplitude"],
        Some(&out),
    );
    t.refuse(
        "merge no manifest",
        &["merge", &rel_s, "--out", &out_s],
        &["manifest.json", "missing"],
        Some(&out),
    );

    // A release with an outside path, and one with a 1 MB field.
    let outside = base.join("outside");
    let o = ptacorr()
        .args(["simulate", &scen_s, "--out", &s(&outside)])
        .output()
        .unwrap();
    assert!(o.status.success());
    let toml = std::fs::read_to_string(outside.join("release.toml")).unwrap();
    std::fs::write(
        outside.join("release.toml"),
        toml.replacen("\"residuals/P01.csv\"", "\"../rel/residuals/P01.csv\"", 1),
    )
    .unwrap();
    t.refuse(
        "correlate outside path",
        &["correlate", &s(&outside), "--out", &out_s],
        &["pulsar[0].residuals", "outside the release folder"],
        Some(&out),
    );
    let o = ptacorr()
        .args([
            "--allow-outside-paths",
            "correlate",
            &s(&outside),
            "--out",
            &out_s,
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    std::fs::remove_dir_all(&out).unwrap();
    let huge = base.join("huge");
    ptacorr()
        .args(["simulate", &scen_s, "--out", &s(&huge)])
        .output()
        .unwrap();
    let csv = huge.join("residuals/P02.csv");
    let text = std::fs::read_to_string(&csv).unwrap();
    std::fs::write(
        &csv,
        text.replacen("\n", &format!("\n{},", "7".repeat(1_000_000)), 1),
    )
    .unwrap();
    t.refuse(
        "correlate 1 MB field",
        &["correlate", &s(&huge), "--out", &out_s],
        &["P02.csv line 2"],
        Some(&out),
    );

    // Warnings: printed, and errors under --strict.
    let dup = base.join("dup");
    ptacorr()
        .args(["simulate", &scen_s, "--out", &s(&dup)])
        .output()
        .unwrap();
    let csv = dup.join("residuals/P03.csv");
    let text = std::fs::read_to_string(&csv).unwrap();
    let row = text.lines().nth(3).unwrap().to_string();
    std::fs::write(&csv, text + &row + "\n").unwrap();
    t.refuse(
        "correlate --strict duplicate",
        &["--strict", "correlate", &s(&dup), "--out", &out_s],
        &["--strict", "exact duplicate row"],
        Some(&out),
    );
    // correlate with noise draws (issue 13.8): chain tables that do not fit, NaN rows, too
    // few rows; nothing is written.
    let chains = base.join("chains");
    std::fs::create_dir_all(&chains).unwrap();
    let head = "chain,draw,log_posterior,diverging,efac.KRK-L\n";
    let p01 = chains.join("P01.csv");
    let mut chain_case = |name: &str, file: &Path, body: &str, draws: &str, expect: &[&str]| {
        std::fs::write(file, body).unwrap();
        t.refuse(
            name,
            &[
                "correlate",
                &rel_s,
                "--out",
                &out_s,
                "--noise-draws",
                &s(&chains),
                "--draws",
                draws,
            ],
            expect,
            Some(&out),
        );
        std::fs::remove_file(file).unwrap();
    };
    chain_case(
        "correlate chain NaN row",
        &p01,
        &format!("{head}0,0,1,false,1.0\n0,1,1,false,NaN\n"),
        "1",
        &["P01.csv line 3", "field efac.KRK-L", "not a finite number"],
    );
    chain_case(
        "correlate chain too few draws",
        &p01,
        &format!("{head}0,0,1,false,1.0\n"),
        "5",
        &["P01.csv line 2", "fewer than the 5 draws"],
    );
    chain_case(
        "correlate chain of no pulsar",
        &chains.join("Q77.csv"),
        &format!("{head}0,0,1,false,1.0\n"),
        "1",
        &["Q77.csv", "no pulsar"],
    );
    chain_case(
        "correlate chain unknown backend",
        &p01,
        "chain,draw,log_posterior,diverging,efac.NOPE\n0,0,1,false,1.0\n",
        "1",
        &["P01.csv line 1", "field efac.NOPE", "no backend"],
    );
    t.refuse(
        "correlate shard without draws",
        &["correlate", &rel_s, "--out", &out_s, "--shard", "1/2"],
        &["shard", "--noise-draws"],
        Some(&out),
    );
    t.refuse(
        "inject fresh noise on a scenario",
        &[
            "inject",
            &scen_s,
            "--amplitudes",
            "0",
            "--fresh-noise",
            "--out",
            &out_s,
        ],
        &["--fresh-noise", "release"],
        Some(&out),
    );
    let o = ptacorr()
        .args(["correlate", &s(&dup), "--out", &out_s])
        .output()
        .unwrap();
    assert!(o.status.success());
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("warning:"),
        "no warning printed"
    );

    println!(
        "cli bad input: {} cases, {} clear errors, {} other",
        t.cases,
        t.clear,
        t.bad.len()
    );
    assert!(t.bad.is_empty(), "{:#?}", t.bad);
    // --replace-release replaces the release as a whole.
    let o = ptacorr()
        .args([
            "simulate",
            &scen_s,
            "--out",
            &rel_s,
            "--seed",
            "3",
            "--replace-release",
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert_ne!(
        std::fs::read(rel.join("residuals/P01.csv")).unwrap(),
        before
    );
    std::fs::remove_dir_all(&base).ok();
}
