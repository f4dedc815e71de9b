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
        &["noise.toml line", "efac", "EFAC must be a positive number"],
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
