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
