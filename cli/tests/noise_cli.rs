//! `ptacorr noise` as a user meets it: a release without `noise.toml` in, a `noise.toml` that
//! `correlate` reads out; shards merge to the unsharded run's bytes; bad priors stop the run
//! before anything is written.

use std::path::PathBuf;
use std::process::Command;

fn ptacorr() -> Command {
    Command::new(env!("CARGO_BIN_EXE_ptacorr"))
}

fn temp(name: &str) -> PathBuf {
    ptacorr::testing::temp_dir(&format!("noise-cli-{name}"))
}

const SCENARIO: &str = r#"
[array]
title = "Noise CLI check (fictional)"
n_pulsars = 3
start_mjd = 57000.0
span_years = 5.0
cadence_days = 40.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1310.0, 1510.0]

[white]
sigma_us = [0.3, 1.0]
efac = [0.9, 1.3]
equad_log10_s = [-7.0, -6.5]

[red]
share = 1.0
log10_amplitude = [-13.5, -13.0]
spectral_index = [3.0, 4.0]
"#;

fn ok(cmd: &mut Command) -> String {
    let out = cmd.output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

#[test]
fn noise_writes_a_model_correlate_reads_and_shards_merge() {
    let d = temp("run");
    std::fs::write(d.join("s.toml"), SCENARIO).unwrap();
    std::fs::write(
        d.join("p.toml"),
        "[components]\necorr_backends = \"none\"\nred_frequencies = 8\n",
    )
    .unwrap();
    ok(ptacorr()
        .arg("simulate")
        .arg(d.join("s.toml"))
        .arg("--out")
        .arg(d.join("rel"))
        .args(["--seed", "4"]));
    std::fs::remove_file(d.join("rel/noise.toml")).ok();
    let priors = d.join("p.toml");
    let printed = ok(ptacorr()
        .arg("noise")
        .arg(d.join("rel"))
        .arg("--out")
        .arg(d.join("all"))
        .arg("--priors")
        .arg(&priors)
        .args(["--warmup", "200", "--draws", "300"]));
    assert!(
        printed.contains("P01") && printed.contains("converged"),
        "{printed}"
    );
    for (i, name) in ["1/2", "2/2"].iter().enumerate() {
        ok(ptacorr()
            .arg("noise")
            .arg(d.join("rel"))
            .arg("--out")
            .arg(d.join(format!("s{i}")))
            .arg("--priors")
            .arg(&priors)
            .args(["--warmup", "200", "--draws", "300"])
            .args(["--shard", name]));
    }
    ok(ptacorr()
        .arg("merge-noise")
        .arg(d.join("s0"))
        .arg(d.join("s1"))
        .arg("--out")
        .arg(d.join("merged")));
    for f in [
        "noise.toml",
        "estimates.csv",
        "diagnostics.csv",
        "priors.toml",
        "truth.csv",
        "chains/P01.csv",
        "chains/P03.csv",
    ] {
        assert_eq!(
            std::fs::read(d.join("all").join(f)).unwrap(),
            std::fs::read(d.join("merged").join(f)).unwrap(),
            "{f}"
        );
    }
    // The merged folder is drawn like the unsharded one: one posterior figure per pulsar.
    for (dir, out) in [("all", "fig-all"), ("merged", "fig-merged")] {
        ok(ptacorr()
            .arg("plot")
            .arg(d.join(dir))
            .arg("--out")
            .arg(d.join(out)));
    }
    let svg = std::fs::read(d.join("fig-all/noise-posterior-P01.svg")).unwrap();
    assert_eq!(
        svg,
        std::fs::read(d.join("fig-merged/noise-posterior-P01.svg")).unwrap()
    );
    assert!(String::from_utf8_lossy(&svg).contains("truth-line"));
    // The written model is what correlate reads.
    std::fs::copy(d.join("all/noise.toml"), d.join("rel/noise.toml")).unwrap();
    ok(ptacorr()
        .arg("correlate")
        .arg(d.join("rel"))
        .arg("--out")
        .arg(d.join("corr"))
        .args(["--frequencies", "8"]));
    let _ = std::fs::remove_dir_all(&d);
}

#[test]
fn bad_priors_stop_before_writing() {
    let d = temp("bad");
    std::fs::write(d.join("s.toml"), SCENARIO).unwrap();
    ok(ptacorr()
        .arg("simulate")
        .arg(d.join("s.toml"))
        .arg("--out")
        .arg(d.join("rel"))
        .args(["--seed", "4"]));
    std::fs::write(
        d.join("p.toml"),
        "[pulsar.P02]\necorr_backends = [\"NOPE\"]\n",
    )
    .unwrap();
    let out = ptacorr()
        .arg("noise")
        .arg(d.join("rel"))
        .arg("--out")
        .arg(d.join("out"))
        .arg("--priors")
        .arg(d.join("p.toml"))
        .output()
        .unwrap();
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("p.toml line 2, field pulsar.P02.ecorr_backends"),
        "{err}"
    );
    assert!(!d.join("out").exists(), "nothing may be written");
    let _ = std::fs::remove_dir_all(&d);
}
