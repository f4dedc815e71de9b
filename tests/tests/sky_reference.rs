//! Angular separations against spherical trigonometry: `sky::angle`, and the `angle_deg` column
//! of `pairs.csv` that the product writes with it.

use ndarray::{Array1, Array2};
use ptacorr::analysis::{correlate_reduced, CorrelateSettings};
use ptacorr::reduce::{FrequencyGrid, Reduced};
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
    // Exact spherical geometry; 1e-12 deg is a few hundred ulps of 180 deg, room for the
    // trigonometric functions' rounding (each within 1 ulp in glibc, as documented).
    let pole = direction_from_radec(0.0, 90f64.to_radians());
    let eq0 = direction_from_radec(0.0, 0.0);
    let eq90 = direction_from_radec(90f64.to_radians(), 0.0);
    let eq180 = direction_from_radec(180f64.to_radians(), 0.0);
    assert!((angle(&pole, &eq0).to_degrees() - 90.0).abs() < 1e-12);
    assert!((angle(&eq0, &eq90).to_degrees() - 90.0).abs() < 1e-12);
    assert!((angle(&eq0, &eq180).to_degrees() - 180.0).abs() < 1e-12);
    // 1 arcsecond apart on the equator: acos would lose about 5 of the 16 digits here; 1e-9
    // relative is far below that loss and far above the atan2 form's rounding.
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
        // Two backward-stable routes from the same (ra, dec): a few ulps of pi apart at most.
        assert!((ours - vincenty(ra1, d1, ra2, d2)).abs() < 1e-12);
        // Spherical law of cosines: cos c = sin d1 sin d2 + cos d1 cos d2 cos(dra).
        let cosc = d1.sin() * d2.sin() + d1.cos() * d2.cos() * (ra2 - ra1).cos();
        // The cosine is insensitive where acos is not, so this holds to rounding everywhere.
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
        // The writer keeps 6 decimals of seconds of time in RA (rounding <= 0.5e-6 s = 2.1e-9
        // deg) and 5 of arcseconds in Dec (<= 1.4e-9 deg): 1e-8 deg covers both.
        assert!(
            (r - ra).abs() < 1e-8 && (d - dec).abs() < 1e-8,
            "{ra} {dec} -> {r} {d}"
        );
    }
}

#[test]
fn pairs_csv_separations_agree_with_vincenty_at_all_angles() {
    // Pulsar positions (ra, dec in degrees) chosen to include pairs 1 arcsecond apart and
    // 1 arcsecond short of antipodal, where acos of the dot product loses about 1e-9 deg
    // (cos zeta = 1 - zeta^2 / 2 keeps only ~5 of zeta's digits at 5e-6 rad).
    let arcsec = 1.0 / 3600.0;
    let pos = [
        (10.0, 20.0),
        (10.0, 20.0 + arcsec),
        (190.0, -20.0 + arcsec),
        (77.7, -63.1),
        (201.3, 44.9),
        (315.0, 0.0),
        (135.0, 0.0),
        (0.0, 89.0),
    ];
    let k = 2;
    let reduced: Vec<Reduced> = pos
        .iter()
        .enumerate()
        .map(|(i, &(ra, dec))| Reduced {
            label: format!("P{:02}", i + 1),
            direction: direction_from_radec(f64::to_radians(ra), f64::to_radians(dec)),
            x: Array1::from_iter((0..2 * k).map(|j| ((i * 7 + j * 3) % 5) as f64 - 2.0)),
            z: Array2::eye(2 * k),
            flops: 0.0,
        })
        .collect();
    let grid = FrequencyGrid::new(50_000.0, 53_000.0, k).unwrap();
    let settings = CorrelateSettings {
        n_frequencies: k,
        n_bins: 3,
        ..Default::default()
    };
    let c = correlate_reduced(reduced, grid, &settings, None).unwrap();
    let csv = c.pairs_csv().unwrap();
    let mut lines = csv.lines();
    assert_eq!(
        lines.next(),
        Some("pulsar_a,pulsar_b,angle_deg,rho,sigma,hd")
    );
    let index = |label: &str| label[1..].parse::<usize>().unwrap() - 1;
    let mut n = 0;
    for line in lines {
        let f: Vec<&str> = line.split(',').collect();
        let (a, b) = (index(f[0]), index(f[1]));
        let ours: f64 = f[2].parse().unwrap();
        let (ra1, d1) = (pos[a].0.to_radians(), pos[a].1.to_radians());
        let (ra2, d2) = (pos[b].0.to_radians(), pos[b].1.to_radians());
        let truth = vincenty(ra1, d1, ra2, d2).to_degrees();
        // Both routes are accurate to a few ulps of the unit vectors (~1e-16 rad, ~1e-14 deg);
        // 1e-12 deg leaves room for the degree conversion and is 1000 times below the error of
        // acos at 1 arcsecond, so this check fails if the product goes back to acos.
        assert!(
            (ours - truth).abs() < 1e-12,
            "{}-{}: pairs.csv {ours} deg, Vincenty {truth} deg",
            f[0],
            f[1]
        );
        n += 1;
    }
    assert_eq!(n, pos.len() * (pos.len() - 1) / 2);
    // The nearly coincident (P01-P02, one meridian) and nearly antipodal (P01-P03) pairs are
    // really there: 1 arcsec and 180 deg - 1 arcsec, to the 1e-12 deg above.
    let angle_of = |row: usize| -> f64 {
        let line = csv.lines().nth(row).unwrap();
        line.split(',').nth(2).unwrap().parse().unwrap()
    };
    assert!((angle_of(1) - arcsec).abs() < 1e-12, "{}", angle_of(1));
    assert!(
        (180.0 - angle_of(2) - arcsec).abs() < 1e-12,
        "{}",
        angle_of(2)
    );
}
