//! The Hellings-Downs curve against independent references.

use ptacorr::orf::hellings_downs;

/// Legendre series of the Hellings-Downs curve (Gair, Romano, Taylor & Mingarelli 2014, PRD 90,
/// 082001): G = sum_{l>=2} (3/2)(2l+1) (l-2)!/(l+2)! P_l(cos zeta), with P_l from Bonnet's
/// recursion (l+1) P_{l+1} = (2l+1) x P_l - l P_{l-1}. The tail after L terms is below ~1.5/L^2.
fn hd_legendre(x: f64, l_max: usize) -> f64 {
    let (mut p_prev, mut p) = (1.0, x); // P_0, P_1
    let mut sum = 0.0;
    for l in 1..l_max {
        let p_next = ((2 * l + 1) as f64 * x * p - l as f64 * p_prev) / (l + 1) as f64;
        p_prev = p;
        p = p_next; // P_{l+1}
        let ll = (l + 1) as f64;
        let coef = 1.5 * (2.0 * ll + 1.0) / ((ll - 1.0) * ll * (ll + 1.0) * (ll + 2.0));
        sum += coef * p;
    }
    sum
}

#[test]
fn closed_form_matches_the_legendre_series() {
    // 20,000 terms: truncation below 4e-9 (bound above).
    for k in 0..=90 {
        let zeta = (k as f64 * 2.0).to_radians();
        let c = zeta.cos();
        let a = hellings_downs(c);
        let b = hd_legendre(c, 20_000);
        assert!(
            (a - b).abs() < 2e-8,
            "zeta = {} deg: closed {a}, series {b}",
            k * 2
        );
    }
}

#[test]
fn derived_values_of_the_science_notes() {
    // Values computed with SciPy from the closed form (science notes section 4).
    assert!((hellings_downs(1.0) - 0.5).abs() < 1e-15);
    assert!((hellings_downs(-1.0) - 0.25).abs() < 1e-15);
    // Minimum -0.15190 at 82.48 deg: find it on a fine grid.
    let (mut best, mut at) = (f64::INFINITY, 0.0);
    for i in 0..=180_000 {
        let deg = i as f64 * 1e-3;
        let g = hellings_downs(deg.to_radians().cos());
        if g < best {
            best = g;
            at = deg;
        }
    }
    assert!((best + 0.15190).abs() < 5e-6, "minimum {best}");
    assert!((at - 82.48).abs() < 5e-3, "minimum at {at} deg");
    // Zeros at 49.32 and 121.79 deg: sign changes bracket them.
    for zero in [49.32f64, 121.79] {
        let lo = hellings_downs((zero - 0.01).to_radians().cos());
        let hi = hellings_downs((zero + 0.01).to_radians().cos());
        assert!(lo * hi < 0.0, "no zero near {zero} deg ({lo}, {hi})");
    }
}
