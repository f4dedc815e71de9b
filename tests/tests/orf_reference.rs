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
fn extremes_and_zeros_of_the_closed_form() {
    // Limits of the closed form (Hellings & Downs 1983; docs/optimal-statistic.md): G -> 1/2 at
    // zero separation without the pulsar term, G = 1/4 at 180 deg. Tolerance: a few ulp.
    assert!((hellings_downs(1.0) - 0.5).abs() < 1e-15);
    assert!((hellings_downs(-1.0) - 0.25).abs() < 1e-15);
    // The minimum, derived by hand from G(x) = 1/2 - x/4 + (3/2) x ln x with
    // x = (1 - cos zeta)/2: dG/dx = -1/4 + (3/2)(ln x + 1) = 0 at x* = e^(-5/6), where
    // G(x*) = 1/2 - (3/2) e^(-5/6) = -0.1518973... (at zeta = 82.484 deg).
    let x_star = (-5.0f64 / 6.0).exp();
    let g_min = 0.5 - 1.5 * x_star;
    let c_star = 1.0 - 2.0 * x_star;
    // The engine's value there: a few roundings of terms of size 0.5 (1e-15 absolute).
    assert!(
        (hellings_downs(c_star) - g_min).abs() < 1e-15,
        "{}",
        hellings_downs(c_star)
    );
    assert!((c_star.acos().to_degrees() - 82.484).abs() < 1e-3);
    // It is the minimum: d2G/dx2 = 3 / (2 x*) > 0, so G rises by ~ (3/(4 x*)) dx^2 on each
    // side; at dx = 1e-3 that is 1.7e-6, far above rounding (1e-16).
    for dx in [-1e-3, 1e-3] {
        let g = hellings_downs(1.0 - 2.0 * (x_star + dx));
        assert!(g - g_min > 1e-6, "not a minimum: G(x* + {dx}) = {g}");
    }
    // Zeros near 49.32 and 121.79 deg (values recalled from memory, commonly quoted): the
    // closed form must change sign within +-0.01 deg of each.
    for zero in [49.32f64, 121.79] {
        let lo = hellings_downs((zero - 0.01).to_radians().cos());
        let hi = hellings_downs((zero + 0.01).to_radians().cos());
        assert!(lo * hi < 0.0, "no zero near {zero} deg ({lo}, {hi})");
    }
}
