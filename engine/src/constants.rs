//! Physical and calendar constants used throughout.

/// Seconds per day (SI).
pub const SECONDS_PER_DAY: f64 = 86_400.0;
/// Julian year in seconds (365.25 d), the year of `f_yr` in the power-law convention.
pub const SECONDS_PER_YEAR: f64 = 365.25 * SECONDS_PER_DAY;
/// Reference frequency of one inverse year, f_yr = 1 / (365.25 d) in Hz.
pub const F_YR: f64 = 1.0 / SECONDS_PER_YEAR;
/// Dispersion constant D in s MHz^2 pc^-1 cm^3: the delay is D * DM / nu^2
/// (Lorimer & Kramer 2004, Handbook of Pulsar Astronomy, eq. 4.7).
pub const DISPERSION_CONSTANT: f64 = 4.148808e3;
/// Reference radio frequency (MHz) at which the chromatic basis has unit scale.
pub const DM_REFERENCE_MHZ: f64 = 1400.0;
/// Spectral index of a background of circular binaries driven by GW emission, 13/3
/// (Phinney 2001).
pub const GAMMA_BINARIES: f64 = 13.0 / 3.0;
