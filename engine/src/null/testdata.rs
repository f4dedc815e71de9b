//! Small simulated arrays for the null tests (fictional observatories, as in simulations/).

use crate::analysis::{CommonAutoPower, CorrelateSettings};
use crate::release::{read_release, Release};
use crate::scenario::{lay_out, Scenario};
use crate::simulate::simulate_scenario;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

/// 8 pulsars, 5 years, 30-day cadence, white and red noise, an HD background.
pub const SMALL: &str = r#"
[array]
title = "Null test array (fictional): 8 pulsars, 5 years"
n_pulsars = 8
start_mjd = 55000.0
span_years = 5.0
cadence_days = 30.0

[[backend]]
name = "KRK-L"
observatory = "Karsk"
freq_mhz = [1400.0]
share = 1.0

[[backend]]
name = "KRK-UHF"
observatory = "Karsk"
freq_mhz = [820.0]
share = 0.5

[white]
sigma_us = [0.5, 2.0]
efac = [0.9, 1.2]
equad_log10_s = [-7.5, -6.5]

[red]
share = 0.4
log10_amplitude = [-14.0, -13.5]
spectral_index = [2.0, 4.0]

[background]
log10_amplitude = -14.0
pattern = "hd"
"#;

/// White noise only (the model is exactly right), for uniformity checks.
pub const NOISE_ONLY: &str = r#"
[array]
title = "Noise-only array (fictional): 8 pulsars, 5 years"
n_pulsars = 8
start_mjd = 55000.0
span_years = 5.0
cadence_days = 30.0

[[backend]]
name = "MRL-S"
observatory = "Mirelle"
freq_mhz = [2100.0]

[white]
sigma_us = [0.5, 2.0]
efac = [0.9, 1.2]
"#;

/// A fresh temporary folder (the workspace's one helper).
pub fn temp_dir(name: &str) -> PathBuf {
    crate::testing::temp_dir(&format!("null-{name}"))
}

/// Simulate a scenario text with a seed into `dir` and read it back.
pub fn release_from(text: &str, seed: u64, dir: &Path) -> Release {
    let s = Scenario::parse(text, Path::new("test.toml")).expect("scenario");
    let layout = lay_out(&s, seed);
    simulate_scenario(&layout, seed, dir).expect("simulate");
    read_release(dir).expect("read")
}

/// The small array (simulated once per test binary).
pub fn small() -> &'static Release {
    static R: OnceLock<Release> = OnceLock::new();
    R.get_or_init(|| release_from(SMALL, 11, &temp_dir("small-release")))
}

/// Analysis settings for the small arrays: 6 frequencies.
pub fn settings() -> CorrelateSettings {
    CorrelateSettings {
        n_frequencies: 6,
        ..CorrelateSettings::default()
    }
}

/// Analysis settings without a common process (noise-only arrays).
pub fn settings_no_common() -> CorrelateSettings {
    CorrelateSettings {
        common: CommonAutoPower::Off,
        ..settings()
    }
}
