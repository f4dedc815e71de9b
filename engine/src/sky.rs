//! Sky positions: sexagesimal parsing, unit vectors and angular separations (J2000 equatorial).

use std::f64::consts::PI;

/// A unit vector on the sky, `p = (cos dec cos ra, cos dec sin ra, sin dec)`.
pub type Direction = [f64; 3];

/// Unit vector from right ascension and declination in radians.
pub fn direction_from_radec(ra: f64, dec: f64) -> Direction {
    [dec.cos() * ra.cos(), dec.cos() * ra.sin(), dec.sin()]
}

/// Parse right ascension `hh:mm:ss.s` (hours) into radians; `None` if malformed or outside
/// [0, 24) h.
pub fn parse_ra(text: &str) -> Option<f64> {
    let (sign, [h, m, s]) = parse_sexagesimal(text)?;
    if sign < 0.0 || !(0.0..24.0).contains(&h) {
        return None;
    }
    let hours = h + m / 60.0 + s / 3600.0;
    (hours < 24.0).then_some(hours * PI / 12.0)
}

/// Parse declination `+dd:mm:ss.s` (degrees) into radians; `None` if malformed or outside
/// [-90, 90] deg.
pub fn parse_dec(text: &str) -> Option<f64> {
    let (sign, [d, m, s]) = parse_sexagesimal(text)?;
    let deg = d + m / 60.0 + s / 3600.0;
    (deg <= 90.0).then_some(sign * deg * PI / 180.0)
}

/// Split `[+-]a:b:c` into a sign and three non-negative fields (minutes and seconds < 60).
fn parse_sexagesimal(text: &str) -> Option<(f64, [f64; 3])> {
    let t = text.trim();
    let (sign, body) = match t.as_bytes().first()? {
        b'-' => (-1.0, &t[1..]),
        b'+' => (1.0, &t[1..]),
        _ => (1.0, t),
    };
    let parts: Vec<&str> = body.split(':').collect();
    if parts.len() != 3 {
        return None;
    }
    let mut out = [0.0; 3];
    for (o, p) in out.iter_mut().zip(&parts) {
        if p.is_empty() || p.starts_with(['+', '-']) {
            return None;
        }
        *o = p
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite() && *v >= 0.0)?;
    }
    if out[1] >= 60.0 || out[2] >= 60.0 {
        return None;
    }
    Some((sign, out))
}

/// Cosine of the angle between two unit vectors, clamped to [-1, 1].
pub fn cos_angle(a: &Direction, b: &Direction) -> f64 {
    (a[0] * b[0] + a[1] * b[1] + a[2] * b[2]).clamp(-1.0, 1.0)
}

/// Angle between two unit vectors in radians, from atan2(|a x b|, a . b), which is accurate at
/// all separations (acos loses precision near 0 and 180 deg).
pub fn angle(a: &Direction, b: &Direction) -> f64 {
    let c = [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ];
    let s = (c[0] * c[0] + c[1] * c[1] + c[2] * c[2]).sqrt();
    let d = a[0] * b[0] + a[1] * b[1] + a[2] * b[2];
    s.atan2(d)
}

/// A direction uniform on the sphere from two uniform deviates in [0, 1):
/// z = 2u - 1, phi = 2 pi v (Archimedes' hat-box theorem).
pub fn isotropic_direction(u: f64, v: f64) -> Direction {
    let z = 2.0 * u - 1.0;
    let r = (1.0 - z * z).max(0.0).sqrt();
    let phi = 2.0 * PI * v;
    [r * phi.cos(), r * phi.sin(), z]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_sexagesimal_positions() {
        // 06:00:00 = 90 deg of right ascension; -45:30:00 = -45.5 deg.
        assert!((parse_ra("06:00:00.0").unwrap() - PI / 2.0).abs() < 1e-15);
        assert!((parse_dec("-45:30:00").unwrap() + 45.5f64.to_radians()).abs() < 1e-15);
        assert!((parse_dec("+00:00:36").unwrap() - 0.01f64.to_radians()).abs() < 1e-15);
        for bad in ["24:00:00", "12:60:00", "12:00", "ab:cd:ef", "-01:00:00", ""] {
            assert!(parse_ra(bad).is_none(), "{bad}");
        }
        for bad in ["+90:00:01", "+10:-1:00", "91:00:00"] {
            assert!(parse_dec(bad).is_none(), "{bad}");
        }
    }
}
