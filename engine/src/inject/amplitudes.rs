//! Amplitude lists of an injection campaign (`--amplitudes`).

use crate::error::{Error, Result};

/// Parse an amplitude list: comma-separated items, each a number (`0`, `1e-15`) or a
/// log-spaced range `log:LO:HI:N` (N >= 2 values from LO to HI inclusive, LO, HI > 0).
/// Amplitudes must be finite, >= 0, below 1e-9, and distinct.
pub fn parse_amplitudes(text: &str) -> Result<Vec<f64>> {
    let bad = |m: String| Error::setting("amplitudes", m);
    let mut out: Vec<f64> = Vec::new();
    for item in text.split(',').map(str::trim) {
        if item.is_empty() {
            return Err(bad(format!("empty item in {text:?}")));
        }
        if let Some(rest) = item.strip_prefix("log:") {
            let parts: Vec<&str> = rest.split(':').collect();
            if parts.len() != 3 {
                return Err(bad(format!("{item:?}: expected log:LO:HI:N")));
            }
            let lo: f64 = parts[0]
                .parse()
                .map_err(|_| bad(format!("{item:?}: LO is not a number")))?;
            let hi: f64 = parts[1]
                .parse()
                .map_err(|_| bad(format!("{item:?}: HI is not a number")))?;
            let n: usize = parts[2]
                .parse()
                .map_err(|_| bad(format!("{item:?}: N is not a count")))?;
            let ok = lo > 0.0 && hi > lo && lo.is_finite() && hi.is_finite();
            if !ok || !(2..=1000).contains(&n) {
                return Err(bad(format!(
                    "{item:?}: need 0 < LO < HI and 2 <= N <= 1000"
                )));
            }
            let (l0, l1) = (lo.log10(), hi.log10());
            for k in 0..n {
                let v = if k == n - 1 {
                    hi
                } else {
                    10f64.powf(l0 + (l1 - l0) * k as f64 / (n - 1) as f64)
                };
                out.push(v);
            }
        } else {
            let v: f64 = item
                .parse()
                .map_err(|_| bad(format!("{item:?} is not a number")))?;
            out.push(v);
        }
    }
    for &v in &out {
        if !(v.is_finite() && (0.0..1e-9).contains(&v)) {
            return Err(bad(format!(
                "{v} is not a plausible amplitude (need 0 <= A < 1e-9)"
            )));
        }
    }
    for (i, &v) in out.iter().enumerate() {
        if out[..i].contains(&v) {
            return Err(bad(format!("{v} appears twice")));
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn amplitude_lists_parse_values_and_log_ranges() {
        assert_eq!(
            parse_amplitudes("0, 1e-15,3e-15").unwrap(),
            vec![0.0, 1e-15, 3e-15]
        );
        let v = parse_amplitudes("0,log:1e-16:1e-14:3").unwrap();
        assert_eq!(v.len(), 4);
        assert_eq!((v[0], v[1], v[3]), (0.0, 1e-16, 1e-14));
        assert!((v[2] / 1e-15 - 1.0).abs() < 1e-12);
        for bad in [
            "",
            "x",
            "1e-15,",
            "-1e-15",
            "1e-15,1e-15",
            "log:0:1e-14:3",
            "log:1e-14:1e-16:3",
            "log:1e-16:1e-14:1",
            "log:1e-16:1e-14",
            "1e-3",
            "nan",
        ] {
            assert!(parse_amplitudes(bad).is_err(), "{bad:?} accepted");
        }
    }
}
