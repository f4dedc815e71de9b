//! The detection threshold: null SNRs (a null folder's trials or simulated nulls) and the
//! false-alarm probability.

use crate::error::{Error, Result};
use crate::null::read_trials;
use std::path::Path;

/// The SNRs of a null folder's `trials.csv` (read by [`crate::null::read_trials`]); at least
/// 10 trials.
pub fn read_null_trials(dir: &Path) -> Result<Vec<f64>> {
    crate::output::check_manifest(dir)?;
    let path = dir.join("trials.csv");
    let out: Vec<f64> = read_trials(&path)?.iter().map(|t| t.snr).collect();
    if out.len() < 10 {
        return Err(Error::input(
            &path,
            None,
            None,
            format!("{} trials; need at least 10", out.len()),
        ));
    }
    Ok(out)
}

/// The detection threshold on the SNR at false-alarm probability `fap` from null SNRs: with
/// k = floor(fap n), the (k+1)-th largest value; a detection is snr > threshold, so exactly k of
/// the n null trials are detections (empirical quantile, common practice).
pub fn detection_threshold(null: &[f64], fap: f64) -> Result<f64> {
    let n = null.len();
    let k = (fap * n as f64 + 1e-9).floor() as usize;
    if k < 1 || k >= n {
        return Err(Error::setting(
            "false-alarm",
            format!(
                "{fap} with {n} null trials leaves {k} trials above the threshold; need at least one (use more null trials)"
            ),
        ));
    }
    let mut v = null.to_vec();
    v.sort_by(|a, b| b.total_cmp(a));
    Ok(v[k])
}

/// The default false-alarm probability for `n` null trials: 0.001, raised so that at least 10
/// trials lie above the threshold (0.01 for 1000 trials).
pub fn default_false_alarm(n: usize) -> f64 {
    (10.0 / n as f64).max(0.001)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn threshold_leaves_exactly_k_null_trials_above() {
        let null: Vec<f64> = (0..1000).map(|i| i as f64).collect();
        let t = detection_threshold(&null, 0.01).unwrap();
        assert_eq!(null.iter().filter(|&&v| v > t).count(), 10);
        assert!(detection_threshold(&null, 0.0005).is_err());
        assert_eq!(default_false_alarm(1000), 0.01);
        assert_eq!(default_false_alarm(100_000), 0.001);
    }
}
