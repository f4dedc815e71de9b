//! Overlap reduction functions: the inter-pulsar correlation patterns of a common signal.

use crate::sky::{cos_angle, Direction};

/// Hellings-Downs correlation of two distinct pulsars (Hellings & Downs 1983, ApJ 265, L39):
/// with x = (1 - cos zeta)/2, G = 1/2 - x/4 + (3/2) x ln x. Without the pulsar term, so
/// G -> 1/2 as zeta -> 0; the auto-correlation (with the pulsar term) is 1.
pub fn hellings_downs(cos_zeta: f64) -> f64 {
    let x = (1.0 - cos_zeta.clamp(-1.0, 1.0)) / 2.0;
    let xlnx = if x > 0.0 { x * x.ln() } else { 0.0 };
    0.5 - x / 4.0 + 1.5 * xlnx
}

/// Monopole: a clock error common to all pulsars, G = 1.
pub fn monopole(_cos_zeta: f64) -> f64 {
    1.0
}

/// Dipole: an error in the solar-system ephemeris, G = cos zeta.
pub fn dipole(cos_zeta: f64) -> f64 {
    cos_zeta
}

/// The correlation patterns compared against the data.
#[derive(
    Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "lowercase")]
pub enum Pattern {
    /// Hellings-Downs quadrupole of a gravitational-wave background.
    Hd,
    /// Monopole (clock errors).
    Monopole,
    /// Dipole (ephemeris errors).
    Dipole,
}

impl Pattern {
    /// All patterns in their reporting order.
    pub const ALL: [Pattern; 3] = [Pattern::Hd, Pattern::Monopole, Pattern::Dipole];

    /// The pattern's value for two distinct pulsars at `cos_zeta`.
    pub fn value(self, cos_zeta: f64) -> f64 {
        match self {
            Pattern::Hd => hellings_downs(cos_zeta),
            Pattern::Monopole => monopole(cos_zeta),
            Pattern::Dipole => dipole(cos_zeta),
        }
    }

    /// Short name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            Pattern::Hd => "hd",
            Pattern::Monopole => "monopole",
            Pattern::Dipole => "dipole",
        }
    }

    /// Parse a short name.
    pub fn from_name(s: &str) -> Option<Pattern> {
        Pattern::ALL.into_iter().find(|p| p.name() == s)
    }
}

/// Pattern values for every pair a < b (row-major pair order) of a set of directions.
pub fn pattern_for_pairs(pattern: Pattern, directions: &[Direction]) -> Vec<f64> {
    let n = directions.len();
    let mut out = Vec::with_capacity(n * n.saturating_sub(1) / 2);
    for a in 0..n {
        for b in a + 1..n {
            out.push(pattern.value(cos_angle(&directions[a], &directions[b])));
        }
    }
    out
}

/// The full N x N correlation matrix of a pattern with unit diagonal (the auto-correlation with
/// the pulsar term, Hellings & Downs 1983), row-major.
pub fn pattern_matrix(pattern: Pattern, directions: &[Direction]) -> Vec<f64> {
    let n = directions.len();
    let mut m = vec![0.0; n * n];
    for a in 0..n {
        m[a * n + a] = 1.0;
        for b in a + 1..n {
            let g = pattern.value(cos_angle(&directions[a], &directions[b]));
            m[a * n + b] = g;
            m[b * n + a] = g;
        }
    }
    m
}

#[cfg(test)]
mod tests {
    use super::hellings_downs;

    /// Closed-form values of G(zeta) = 1/2 - x/4 + (3/2) x ln x, x = (1 - cos zeta)/2
    /// (Hellings & Downs 1983), worked by hand; tolerances are a few ulps of the values or the
    /// grid step of the minimum search.
    #[test]
    fn hellings_downs_known_values() {
        assert_eq!(hellings_downs(1.0), 0.5);
        // zeta = 180 deg: x = 1, G = 1/2 - 1/4.
        assert!((hellings_downs(-1.0) - 0.25).abs() < 1e-15);
        // zeta = 90 deg: x = 1/2, G = 3/8 + (3/4) ln(1/2) = -0.1448603...
        assert!((hellings_downs(0.0) + 0.144_860_385_3).abs() < 1e-9);
        // Continuous at zeta -> 0.
        assert!((hellings_downs(1.0 - 1e-12) - 0.5).abs() < 1e-9);
        // dG/dx = 0 at x = exp(-5/6): zeta = 82.5 deg, G = -0.151897...; a 0.1 deg grid.
        let (mut best, mut at) = (1.0, 0.0);
        for i in 0..=1800 {
            let z = i as f64 / 10.0;
            let g = hellings_downs(z.to_radians().cos());
            if g < best {
                best = g;
                at = z;
            }
        }
        assert!((at - 82.5).abs() < 0.5, "minimum at {at}");
        assert!((best + 0.151_897).abs() < 1e-5, "minimum {best}");
    }
}
