//! Sky scrambles (Cornish & Sampson 2016; Taylor et al. 2017): move every pulsar to an isotropic
//! random position and recompute the optimal statistic with the same rho_ab and sigma_ab. Only
//! the pattern values G'_ab change, so a trial costs O(pairs):
//!     SNR' = sum G' rho/sigma^2 / (sum G'^2 / sigma^2)^(1/2)      (Chamberlin et al. 2015)
//! A scramble is kept when its match with the true pattern (docs/null.md),
//!     M = sum G G' / (sum G^2 sum G'^2)^(1/2)       (unweighted, as in Taylor et al. 2017)
//! has |M| below the threshold: an anti-matching scramble carries the true pattern as much as a
//! matching one (our choice, documented in docs/null.md).

use super::{Control, NullSettings, Prepared, Trial, TrialSource};
use crate::error::{Error, Result};
use crate::orf::Pattern;
use crate::rng::{stream, Purpose};
use crate::sky::isotropic_direction;
use rand::Rng;

/// Draws allowed for one trial before the threshold is declared unreachable.
pub const MAX_ATTEMPTS: u64 = 100_000;

/// ln x for positive normal x, branch-free so that loops over it vectorise: x = m 2^e with
/// m in [sqrt(1/2), sqrt(2)), ln m = 2 atanh(s) = 2 (s + s^3/3 + ...), s = (m - 1)/(m + 1),
/// |s| <= 0.1716, ten terms (truncation below 1e-16; Abramowitz & Stegun 1964, 4.1.28 with
/// z = m, the series of ln((1+s)/(1-s))).
#[inline(always)]
pub fn fast_ln(x: f64) -> f64 {
    const SQRT2: f64 = std::f64::consts::SQRT_2;
    const LN2: f64 = std::f64::consts::LN_2;
    let bits = x.to_bits();
    // The biased exponent as an exact f64 without an integer conversion instruction.
    let e = f64::from_bits(0x4330_0000_0000_0000 | (bits >> 52)) - 4_503_599_627_370_496.0 - 1023.0;
    let m = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    let big = m > SQRT2;
    let m = if big { 0.5 * m } else { m };
    let e = if big { e + 1.0 } else { e };
    let s = (m - 1.0) / (m + 1.0);
    let s2 = s * s;
    let mut p = 1.0 / 19.0;
    for c in [17.0, 15.0, 13.0, 11.0, 9.0, 7.0, 5.0, 3.0, 1.0] {
        p = p * s2 + 1.0 / c;
    }
    e * LN2 + 2.0 * s * p
}

/// Hellings-Downs G(zeta) = 1/2 - x/4 + (3/2) x ln x, x = (1 - cos zeta)/2 (Hellings & Downs
/// 1983), with [`fast_ln`]; G = 1/2 at x = 0.
#[inline(always)]
pub fn hd_fast(cos_zeta: f64) -> f64 {
    let x = 0.5 * (1.0 - cos_zeta.clamp(-1.0, 1.0));
    let xs = x.max(1e-300);
    0.5 - 0.25 * x + 1.5 * xs * fast_ln(xs)
}

/// Sums of one scramble.
#[derive(Clone, Copy, Debug, Default)]
struct Sums {
    /// sum G' rho/sigma^2 = sum G' num_ab.
    num: f64,
    /// sum G'^2 / sigma^2.
    den: f64,
    /// sum G' G.
    cross: f64,
    /// sum G'^2.
    g2: f64,
}

/// Sky scrambles of a prepared array.
pub struct Scrambles<'a> {
    p: &'a Prepared,
    pattern: Pattern,
    seed: u64,
    threshold: f64,
    /// sum G^2 of the true pattern.
    g2_true: f64,
}

impl<'a> Scrambles<'a> {
    pub fn new(p: &'a Prepared, pattern: Pattern, seed: u64, threshold: f64) -> Result<Self> {
        if pattern == Pattern::Monopole {
            return Err(Error::setting(
                "pattern",
                "sky scrambles leave the monopole unchanged",
            ));
        }
        Ok(Scrambles {
            p,
            pattern,
            seed,
            threshold,
            g2_true: p.g.iter().map(|g| g * g).sum(),
        })
    }

    /// Isotropic directions for every pulsar, as three coordinate arrays.
    fn draw(&self, rng: &mut impl Rng, xyz: &mut [Vec<f64>; 3]) {
        for a in 0..self.p.n {
            let d = isotropic_direction(rng.random(), rng.random());
            for c in 0..3 {
                xyz[c][a] = d[c];
            }
        }
    }

    /// G'_ab of the scramble into `g` (row-major pairs).
    fn pattern_values(&self, xyz: &[Vec<f64>; 3], g: &mut [f64]) {
        let n = self.p.n;
        let (xs, ys, zs) = (&xyz[0], &xyz[1], &xyz[2]);
        let mut k = 0;
        for a in 0..n {
            let (xa, ya, za) = (xs[a], ys[a], zs[a]);
            let row = &mut g[k..k + n - a - 1];
            let (xb, yb, zb) = (&xs[a + 1..], &ys[a + 1..], &zs[a + 1..]);
            match self.pattern {
                Pattern::Hd => {
                    for j in 0..row.len() {
                        row[j] = hd_fast(xa * xb[j] + ya * yb[j] + za * zb[j]);
                    }
                }
                Pattern::Dipole => {
                    for j in 0..row.len() {
                        row[j] = (xa * xb[j] + ya * yb[j] + za * zb[j]).clamp(-1.0, 1.0);
                    }
                }
                Pattern::Monopole => row.fill(1.0),
            }
            k += n - a - 1;
        }
    }

    /// The four sums with fixed-order lane accumulation (the same on every machine and thread).
    fn sums(&self, g: &[f64]) -> Sums {
        let p = self.p;
        let mut acc = [[0.0f64; 4]; 4];
        let n4 = g.len() / 4 * 4;
        for i in (0..n4).step_by(4) {
            for l in 0..4 {
                let gi = g[i + l];
                acc[0][l] += gi * p.numerators[i + l];
                acc[1][l] += gi * gi * p.traces[i + l];
                acc[2][l] += gi * p.g[i + l];
                acc[3][l] += gi * gi;
            }
        }
        let mut s = [0.0; 4];
        for q in 0..4 {
            s[q] = (acc[q][0] + acc[q][1]) + (acc[q][2] + acc[q][3]);
        }
        for i in n4..g.len() {
            let gi = g[i];
            s[0] += gi * p.numerators[i];
            s[1] += gi * gi * p.traces[i];
            s[2] += gi * p.g[i];
            s[3] += gi * gi;
        }
        Sums {
            num: s[0],
            den: s[1],
            cross: s[2],
            g2: s[3],
        }
    }

    /// The directions of trial `index`'s accepted scramble (replaying its stream).
    pub fn accepted_directions(&self, index: u64) -> Result<Vec<crate::sky::Direction>> {
        let mut rng = stream(self.seed, Purpose::Scramble, index);
        let n = self.p.n;
        let mut xyz = [vec![0.0; n], vec![0.0; n], vec![0.0; n]];
        let mut g = vec![0.0; self.p.g.len()];
        for _ in 0..MAX_ATTEMPTS {
            self.draw(&mut rng, &mut xyz);
            self.pattern_values(&xyz, &mut g);
            if self.accepted(&self.sums(&g)) {
                return Ok((0..n).map(|a| [xyz[0][a], xyz[1][a], xyz[2][a]]).collect());
            }
        }
        Err(Error::setting("match-threshold", "no accepted scramble"))
    }

    fn accepted(&self, s: &Sums) -> bool {
        self.threshold >= 1.0 || match_value(s.cross, s.g2, self.g2_true).abs() < self.threshold
    }
}

fn match_value(cross: f64, g2: f64, g2_true: f64) -> f64 {
    let d = (g2 * g2_true).sqrt();
    if d > 0.0 {
        cross / d
    } else {
        0.0
    }
}

impl TrialSource for Scrambles<'_> {
    fn trial(&self, index: u64) -> Result<Trial> {
        let mut rng = stream(self.seed, Purpose::Scramble, index);
        let n = self.p.n;
        let mut xyz = [vec![0.0; n], vec![0.0; n], vec![0.0; n]];
        let mut g = vec![0.0; self.p.g.len()];
        for attempt in 1..=MAX_ATTEMPTS {
            self.draw(&mut rng, &mut xyz);
            self.pattern_values(&xyz, &mut g);
            let s = self.sums(&g);
            if self.accepted(&s) {
                return Ok(Trial {
                    index,
                    snr: s.num / s.den.sqrt(),
                    amplitude2: s.num / s.den,
                    attempts: attempt,
                });
            }
        }
        Err(Error::setting(
            "match-threshold",
            format!(
                "no scramble of {MAX_ATTEMPTS} draws had |match| below {}; raise the threshold",
                self.threshold
            ),
        ))
    }
}

/// Scrambles that must also have |match| below the threshold against every earlier accepted
/// scramble (Taylor et al. 2017 discuss this stricter set). Sequential: trial i depends on the
/// trials before it, so it cannot be sharded or resumed; it costs O(N_accepted * pairs) per
/// candidate (O(N^2 pairs) in all) and keeps N normalised pattern vectors (8 N pairs bytes).
/// Candidates are the draws of the streams (seed, i) in order; the threshold on a candidate
/// must hold for every pair.
pub fn mutual(p: &Prepared, settings: &NullSettings, control: Control) -> Result<Vec<Trial>> {
    let thr = settings.match_threshold.unwrap_or(1.0);
    let s = Scrambles::new(p, settings.pattern, settings.seed, thr)?;
    let n = p.n;
    let mut xyz = [vec![0.0; n], vec![0.0; n], vec![0.0; n]];
    let mut g = vec![0.0; p.g.len()];
    let mut kept: Vec<Vec<f64>> = Vec::new();
    let mut out = Vec::new();
    for index in 0..settings.trials {
        let mut rng = stream(settings.seed, Purpose::Scramble, index);
        let mut done = false;
        for attempt in 1..=MAX_ATTEMPTS {
            s.draw(&mut rng, &mut xyz);
            s.pattern_values(&xyz, &mut g);
            let sums = s.sums(&g);
            if !s.accepted(&sums) {
                continue;
            }
            let norm = sums.g2.sqrt();
            if norm == 0.0 {
                continue;
            }
            let unit: Vec<f64> = g.iter().map(|v| v / norm).collect();
            if kept
                .iter()
                .any(|k| super::dot(k, &unit).abs() >= thr && thr < 1.0)
            {
                continue;
            }
            kept.push(unit);
            out.push(Trial {
                index,
                snr: sums.num / sums.den.sqrt(),
                amplitude2: sums.num / sums.den,
                attempts: attempt,
            });
            done = true;
            break;
        }
        if !done {
            return Err(Error::setting(
                "match-threshold",
                format!(
                    "trial {index}: no scramble of {MAX_ATTEMPTS} draws had |match| below {thr} against the pattern and the {} earlier scrambles; lower --trials or raise the threshold",
                    kept.len()
                ),
            ));
        }
        if let Some(c) = control.cancel {
            if c.load(std::sync::atomic::Ordering::SeqCst) {
                return Err(Error::setting(
                    "interrupted",
                    "mutual-match scrambles cannot be resumed; rerun from the start",
                ));
            }
        }
        if let Some(pr) = control.progress {
            if index % 64 == 63 || index + 1 == settings.trials {
                pr(index + 1, settings.trials);
            }
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::orf::hellings_downs;

    #[test]
    fn fast_log_agrees_with_libm() {
        // Against the platform's ln (glibc/libm, correctly rounded to within 1 ulp).
        let mut worst: f64 = 0.0;
        let mut x = 1e-300;
        while x < 1e3 {
            for f in [1.0, 1.0001, 1.37, 1.414, 1.415, 1.9999] {
                let y = x * f;
                worst = worst.max((fast_ln(y) - y.ln()).abs() / y.ln().abs().max(1.0));
            }
            x *= 1.7;
        }
        assert!(worst < 4e-16, "relative error {worst}");
    }

    #[test]
    fn fast_hellings_downs_matches_the_closed_form_and_published_values() {
        for i in 0..=2000 {
            let c = -1.0 + i as f64 / 1000.0;
            assert!((hd_fast(c) - hellings_downs(c)).abs() < 1e-15, "{c}");
        }
        // Closed-form values (docs/optimal-statistic.md): 0.5 at 0 deg, 0.25 at 180 deg,
        // minimum 1/2 - (3/2) e^(-5/6) = -0.15190 at 82.48 deg.
        assert_eq!(hd_fast(1.0), 0.5);
        assert!((hd_fast(-1.0) - 0.25).abs() < 1e-15);
        assert!((hd_fast(82.48f64.to_radians().cos()) + 0.15190).abs() < 1e-5);
    }
}
