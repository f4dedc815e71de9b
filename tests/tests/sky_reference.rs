//! Angular separations against spherical trigonometry.

use ptacorr::sky::{angle, direction_from_radec, parse_dec, parse_ra};

/// Vincenty's formula for the great-circle distance (Vincenty 1975, the special case of a
/// sphere), an independent route to the separation of (ra1, dec1) and (ra2, dec2).
fn vincenty(ra1: f64, dec1: f64, ra2: f64, dec2: f64) -> f64 {
    let dra = ra2 - ra1;
    let num = ((dec2.cos() * dra.sin()).powi(2)
        + (dec1.cos() * dec2.sin() - dec1.sin() * dec2.cos() * dra.cos()).powi(2))
    .sqrt();
    let den = dec1.sin() * dec2.sin() + dec1.cos() * dec2.cos() * dra.cos();
    num.atan2(den)
}

#[test]
fn known_separations() {
    let pole = direction_from_radec(0.0, 90f64.to_radians());
    let eq0 = direction_from_radec(0.0, 0.0);
    let eq90 = direction_from_radec(90f64.to_radians(), 0.0);
    let eq180 = direction_from_radec(180f64.to_radians(), 0.0);
    assert!((angle(&pole, &eq0).to_degrees() - 90.0).abs() < 1e-12);
    assert!((angle(&eq0, &eq90).to_degrees() - 90.0).abs() < 1e-12);
    assert!((angle(&eq0, &eq180).to_degrees() - 180.0).abs() < 1e-12);
    // 1 arcsecond apart on the equator: acos would lose most digits here.
    let a = direction_from_radec(0.0, 0.0);
    let b = direction_from_radec((1.0f64 / 3600.0).to_radians(), 0.0);
    assert!((angle(&a, &b).to_degrees() * 3600.0 - 1.0).abs() < 1e-9);
}

#[test]
fn agrees_with_vincenty_and_the_law_of_cosines() {
    let mut s = 12345u64;
    let mut next = || {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    };
    for _ in 0..2000 {
        let (ra1, ra2) = (
            next() * std::f64::consts::TAU,
            next() * std::f64::consts::TAU,
        );
        let (d1, d2) = ((next() * 2.0 - 1.0).asin(), (next() * 2.0 - 1.0).asin());
        let ours = angle(
            &direction_from_radec(ra1, d1),
            &direction_from_radec(ra2, d2),
        );
        assert!((ours - vincenty(ra1, d1, ra2, d2)).abs() < 1e-12);
        // Spherical law of cosines: cos c = sin d1 sin d2 + cos d1 cos d2 cos(dra).
        let cosc = d1.sin() * d2.sin() + d1.cos() * d2.cos() * (ra2 - ra1).cos();
        assert!((ours.cos() - cosc).abs() < 1e-12);
    }
}

#[test]
fn sexagesimal_positions_round_trip_through_the_writer() {
    use ptacorr::simulate::{format_dec, format_ra};
    for (ra, dec) in [
        (0.0, -89.9),
        (359.99, 45.123456),
        (123.456, -0.5),
        (15.0, 0.0),
    ] {
        let r = parse_ra(&format_ra(f64::to_radians(ra)))
            .unwrap()
            .to_degrees();
        let d = parse_dec(&format_dec(f64::to_radians(dec)))
            .unwrap()
            .to_degrees();
        assert!(
            (r - ra).abs() < 1e-7 && (d - dec).abs() < 1e-7,
            "{ra} {dec} -> {r} {d}"
        );
    }
}
