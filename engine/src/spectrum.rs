//! Power-law spectra of red processes: the prior variance of Fourier coefficients and the
//! conversions between characteristic strain and residual power.

use crate::constants::F_YR;
use std::f64::consts::PI;

/// A power law with amplitude `10^log10_amplitude` at f_yr and spectral index gamma.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PowerLaw {
    pub log10_amplitude: f64,
    pub spectral_index: f64,
}

impl PowerLaw {
    /// The amplitude A.
    pub fn amplitude(&self) -> f64 {
        10f64.powf(self.log10_amplitude)
    }

    /// Prior variance of one Fourier coefficient at frequency `f` (Hz) for a basis spanning
    /// `t_span` seconds (Lentati et al. 2013; van Haasteren & Vallisneri 2014):
    /// phi(f) = A^2 / (12 pi^2) f_yr^(gamma-3) f^(-gamma) / T_span, in s^2.
    pub fn coefficient_variance(&self, f: f64, t_span: f64) -> f64 {
        let a = self.amplitude();
        power_law_phi(a * a, self.spectral_index, f, t_span)
    }
}

/// phi(f) for amplitude squared `a2` (see [`PowerLaw::coefficient_variance`]).
pub fn power_law_phi(a2: f64, gamma: f64, f: f64, t_span: f64) -> f64 {
    a2 / (12.0 * PI * PI) * F_YR.powf(gamma - 3.0) * f.powf(-gamma) / t_span
}

/// Characteristic strain h_c(f) = A (f / f_yr)^alpha with alpha = (3 - gamma)/2
/// (Jenet et al. 2006).
pub fn characteristic_strain(amplitude: f64, gamma: f64, f: f64) -> f64 {
    amplitude * (f / F_YR).powf((3.0 - gamma) / 2.0)
}

/// One-sided residual power spectral density S(f) = h_c(f)^2 / (12 pi^2 f^3) in s^2/Hz
/// (Jenet et al. 2006; Hobbs et al. 2009).
pub fn residual_psd(amplitude: f64, gamma: f64, f: f64) -> f64 {
    let hc = characteristic_strain(amplitude, gamma, f);
    hc * hc / (12.0 * PI * PI * f.powi(3))
}

/// The analysis frequencies f_j = j / T_span, j = 1..k.
pub fn frequencies(k: usize, t_span: f64) -> Vec<f64> {
    (1..=k).map(|j| j as f64 / t_span).collect()
}

/// The template Phi of the optimal statistic, diag(phi(f_j)) with A = 1, each frequency twice
/// (sin then cos), as a vector of length 2k.
pub fn template(gamma: f64, freqs: &[f64], t_span: f64) -> Vec<f64> {
    freqs
        .iter()
        .flat_map(|&f| {
            let p = power_law_phi(1.0, gamma, f, t_span);
            [p, p]
        })
        .collect()
}
