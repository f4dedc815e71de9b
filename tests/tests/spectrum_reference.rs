//! Dispersion constant, the nu^-2 law, and the power-law conventions.

use ptacorr::basis::{chromatic_basis, chromatic_scale, fourier_basis};
use ptacorr::constants::{DISPERSION_CONSTANT, F_YR};
use ptacorr::spectrum::{characteristic_strain, power_law_phi, residual_psd};
use std::f64::consts::PI;

#[test]
fn dispersion_constant_from_codata() {
    // D = e^2 / (2 pi m_e c) in Gaussian units (Lorimer & Kramer 2004, eq. 4.6), with DM in
    // pc cm^-3 and nu in MHz. CODATA 2018: e = 4.803204713e-10 esu, m_e = 9.1093837015e-28 g,
    // c = 2.99792458e10 cm/s; IAU 2015: pc = 3.0856775814913673e18 cm.
    let e = 4.803_204_713e-10;
    let me = 9.109_383_701_5e-28;
    let c = 2.997_924_58e10;
    let pc = 3.085_677_581_491_367_3e18;
    let d = e * e / (2.0 * PI * me * c) * pc / 1e12;
    // The handbook value 4.148808e3 is quoted to 7 digits.
    assert!(
        (d / DISPERSION_CONSTANT - 1.0).abs() < 2e-6,
        "CODATA gives {d}"
    );
}

#[test]
fn chromatic_basis_follows_the_inverse_square_law() {
    // A cold-plasma delay D DM / nu^2 (Lorimer & Kramer 2004, ch. 4) relative to
    // its value at the reference 1400 MHz (docs/conventions.md): 4 at 700 MHz, 1 at 1400 MHz,
    // 1/4 at 2800 MHz, 2.9142... at 820 MHz ((1400/820)^2 = 19600/6724, exact rational). The
    // chromatic basis must carry exactly these ratios row by row.
    let t = [0.0, 1.0e7, 2.0e7, 3.0e7];
    let nu = [700.0, 1400.0, 2800.0, 820.0];
    let ratio = [4.0, 1.0, 0.25, 19600.0 / 6724.0];
    // Powers of two are exact in binary; the 820 MHz ratio is one rounding (0.5 ulp) away from
    // the exact rational, the engine's (nu_ref / nu)^2 at most two, so 4 ulp relative.
    let scale = chromatic_scale(&nu);
    for i in 0..nu.len() {
        assert!(
            (scale[i] / ratio[i] - 1.0).abs() <= 4.0 * f64::EPSILON,
            "{} MHz: {} vs {}",
            nu[i],
            scale[i],
            ratio[i]
        );
    }
    let freqs = [1.0 / 3.0e8, 2.0 / 3.0e8];
    let f = fourier_basis(&t, &freqs);
    let fd = chromatic_basis(&t, &nu, &freqs);
    for i in 0..nu.len() {
        for j in 0..4 {
            // |F| <= 1, so 4 ulp of the ratio times |F| plus one rounding of the product.
            assert!((fd[[i, j]] - ratio[i] * f[[i, j]]).abs() <= 8.0 * ratio[i] * f64::EPSILON);
        }
    }
}

#[test]
fn coefficient_variance_is_psd_times_bin_width() {
    // phi(f) = S(f) / T_span with S(f) = h_c^2 / (12 pi^2 f^3) (Jenet et al. 2006) and
    // h_c = A (f / f_yr)^((3 - gamma)/2) (Phinney 2001 for gamma = 13/3).
    let a = 2.4e-15;
    let t = 15.0 * 365.25 * 86400.0;
    for gamma in [13.0 / 3.0, 3.0, 5.5] {
        for j in 1..30 {
            let f = j as f64 / t;
            let phi = power_law_phi(a * a, gamma, f, t);
            let s = residual_psd(a, gamma, f);
            // Same formula by two routes: rounding only (a handful of ulps).
            assert!((phi * t / s - 1.0).abs() < 1e-12);
        }
    }
    // At f = f_yr, h_c = A exactly.
    assert!((characteristic_strain(a, 13.0 / 3.0, F_YR) / a - 1.0).abs() < 1e-15);
    // The variance of a red process on a fine ladder integrates the PSD in closed form:
    // int_{f1}^{f2} S df = A^2 f_yr^(gamma-3) / (12 pi^2) [f^(1-gamma) / (1-gamma)].
    let gamma: f64 = 13.0 / 3.0;
    let (f1, f2) = (1.0 / t, 10.0 / t);
    let n = 200_000;
    let df = (f2 - f1) / n as f64;
    let sum: f64 = (0..n)
        .map(|i| power_law_phi(a * a, gamma, f1 + (i as f64 + 0.5) * df, 1.0 / df))
        .sum();
    let exact = a * a * F_YR.powf(gamma - 3.0) / (12.0 * PI * PI)
        * (f2.powf(1.0 - gamma) - f1.powf(1.0 - gamma))
        / (1.0 - gamma);
    // Midpoint rule: relative error ~ h^2 gamma (gamma + 1) / 24 with h = df / f1 = 4.5e-5,
    // about 5e-10 (a standard bound, e.g. Abramowitz & Stegun 25.4.2); 1e-6 is loose on purpose.
    assert!((sum / exact - 1.0).abs() < 1e-6, "{sum} vs {exact}");
}
