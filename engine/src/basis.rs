//! Basis matrices of the Gaussian model of one pulsar: Fourier (achromatic and chromatic),
//! the timing model, and ECORR epoch indicators.

use crate::constants::DM_REFERENCE_MHZ;
use crate::error::{Error, Result};
use crate::release::Pulsar;
use ndarray::Array2;
use std::f64::consts::PI;

/// Fourier basis (n x 2k), interleaved per frequency: column 2j is sin(2 pi f_j t), column
/// 2j+1 is cos(2 pi f_j t), t in seconds (Lentati et al. 2013).
pub fn fourier_basis(t: &[f64], freqs: &[f64]) -> Array2<f64> {
    let mut f = Array2::zeros((t.len(), 2 * freqs.len()));
    for (i, &ti) in t.iter().enumerate() {
        for (j, &fj) in freqs.iter().enumerate() {
            let (s, c) = (2.0 * PI * fj * ti).sin_cos();
            f[[i, 2 * j]] = s;
            f[[i, 2 * j + 1]] = c;
        }
    }
    f
}

/// One row of the Fourier basis on the uniform ladder f_j = j f_1 (j = 1..out.len()/2), in the
/// interleaved order of [`fourier_basis`], by the angle-addition recurrence
/// sin((j+1)x) = sin(jx) cos(x) + cos(jx) sin(x), cos((j+1)x) = cos(jx) cos(x) - sin(jx) sin(x)
/// (Abramowitz & Stegun 1964, 4.3.16-17): one sin_cos per TOA instead of one per frequency.
/// The rounding error grows about linearly with j, to ~1e-13 at j = 1000.
pub fn fourier_row_ladder(t: f64, f1: f64, out: &mut [f64]) {
    let (s1, c1) = (2.0 * PI * f1 * t).sin_cos();
    let (mut s, mut c) = (s1, c1);
    for pair in out.chunks_exact_mut(2) {
        pair[0] = s;
        pair[1] = c;
        (s, c) = (s * c1 + c * s1, c * c1 - s * s1);
    }
}

/// Rows of [`fourier_row_ladder`] for `LANES` TOAs at once: `out` holds `LANES` rows of
/// `width` (even) values one after the other. Each row is the same operations in the same
/// order as [`fourier_row_ladder`] (the same bytes); the rows' recurrences run side by side,
/// so the processor overlaps them instead of waiting on one chain of multiply-adds per row.
pub fn fourier_rows_ladder<const LANES: usize>(
    t: &[f64; LANES],
    f1: f64,
    width: usize,
    out: &mut [f64],
) {
    let mut s1 = [0.0; LANES];
    let mut c1 = [0.0; LANES];
    for l in 0..LANES {
        (s1[l], c1[l]) = (2.0 * PI * f1 * t[l]).sin_cos();
    }
    let (mut s, mut c) = (s1, c1);
    for j in (0..width).step_by(2) {
        for l in 0..LANES {
            out[l * width + j] = s[l];
            out[l * width + j + 1] = c[l];
            (s[l], c[l]) = (s[l] * c1[l] + c[l] * s1[l], c[l] * c1[l] - s[l] * s1[l]);
        }
    }
}

/// Row scale of the chromatic (DM) basis, (nu_ref / nu)^2 with nu_ref = 1400 MHz: the
/// cold-plasma delay D DM / nu^2 (Lorimer & Kramer 2004) relative to its value at nu_ref.
pub fn chromatic_scale(freq_mhz: &[f64]) -> Vec<f64> {
    freq_mhz
        .iter()
        .map(|&nu| (DM_REFERENCE_MHZ / nu).powi(2))
        .collect()
}

/// Chromatic Fourier basis: the Fourier basis with each row scaled by (nu_ref / nu_i)^2.
pub fn chromatic_basis(t: &[f64], freq_mhz: &[f64], freqs: &[f64]) -> Array2<f64> {
    let mut f = fourier_basis(t, freqs);
    for (mut row, s) in f.rows_mut().into_iter().zip(chromatic_scale(freq_mhz)) {
        row *= s;
    }
    f
}

/// The timing-model design matrix with unit-norm columns: the exported one if present,
/// else offset, spin and spin-down (1, t, t^2).
pub fn timing_model(p: &Pulsar, t: &[f64]) -> Result<Array2<f64>> {
    let mut m = match &p.design {
        Some(d) => d.values.clone(),
        None => {
            let mut m = Array2::zeros((t.len(), 3));
            for (i, &ti) in t.iter().enumerate() {
                m[[i, 0]] = 1.0;
                m[[i, 1]] = ti;
                m[[i, 2]] = ti * ti;
            }
            m
        }
    };
    for (k, mut col) in m.columns_mut().into_iter().enumerate() {
        let norm = col.dot(&col).sqrt();
        if !(norm.is_finite() && norm > 0.0) {
            let name = p
                .design
                .as_ref()
                .map_or_else(|| format!("column {k}"), |d| d.names[k].clone());
            return Err(Error::setting(
                "design_matrix",
                format!(
                    "pulsar {}: timing-model column {name} is zero or not finite",
                    p.label
                ),
            ));
        }
        col /= norm;
    }
    Ok(m)
}

/// Default grouping window of ECORR epochs: TOAs of one backend separated by at most this many
/// seconds belong to the same observing epoch.
pub const ECORR_EPOCH_GAP_S: f64 = 3600.0;

/// ECORR epochs: for each listed backend, groups of TOA indices (sorted by time) whose
/// consecutive gaps are at most `gap_s`. A single-TOA epoch is kept: its jitter still adds
/// ECORR^2 to that TOA's variance. Returns (backend index, TOA indices) per epoch.
pub fn ecorr_epochs(
    t: &[f64],
    backend: &[usize],
    use_backend: &[bool],
    gap_s: f64,
) -> Vec<(usize, Vec<usize>)> {
    let mut order: Vec<usize> = (0..t.len()).filter(|&i| use_backend[backend[i]]).collect();
    order.sort_by(|&a, &b| backend[a].cmp(&backend[b]).then(t[a].total_cmp(&t[b])));
    let mut epochs = Vec::new();
    let mut current: Vec<usize> = Vec::new();
    for &i in &order {
        if let Some(&last) = current.last() {
            if backend[last] != backend[i] || t[i] - t[last] > gap_s {
                epochs.push((backend[last], std::mem::take(&mut current)));
            }
        }
        current.push(i);
    }
    if !current.is_empty() {
        epochs.push((backend[current[0]], current));
    }
    epochs
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fourier_columns_are_interleaved_sin_cos() {
        let t = [0.0, 0.25, 0.5];
        let f = fourier_basis(&t, &[1.0, 2.0]);
        assert!((f[[1, 0]] - 1.0).abs() < 1e-15); // sin(pi/2)
        assert!(f[[1, 1]].abs() < 1e-15); // cos(pi/2)
        assert!((f[[2, 3]] - 1.0).abs() < 1e-15); // cos(2 pi 2 0.5)
    }

    #[test]
    fn side_by_side_rows_are_the_single_rows() {
        // The lockstep form must give the bytes of the one-row form (no reference beyond it:
        // it is the same arithmetic reordered across rows only).
        let f1 = 1.0 / 3.2e8;
        let t = [0.0, 1.234e7, 2.9e8, 3.2e8];
        let width = 120;
        let mut rows = vec![0.0; 4 * width];
        fourier_rows_ladder(&t, f1, width, &mut rows);
        let mut one = vec![0.0; width];
        for (l, &tl) in t.iter().enumerate() {
            fourier_row_ladder(tl, f1, &mut one);
            let bits: Vec<u64> = one.iter().map(|v| v.to_bits()).collect();
            let lane: Vec<u64> = rows[l * width..(l + 1) * width]
                .iter()
                .map(|v| v.to_bits())
                .collect();
            assert_eq!(bits, lane, "row {l}");
        }
    }

    #[test]
    fn ladder_rows_match_the_direct_basis() {
        let t_span = 3.2e8;
        let freqs: Vec<f64> = (1..=60).map(|j| j as f64 / t_span).collect();
        let t: Vec<f64> = (0..50).map(|i| i as f64 * t_span / 49.0).collect();
        let f = fourier_basis(&t, &freqs);
        let mut row = vec![0.0; 120];
        for (i, &ti) in t.iter().enumerate() {
            fourier_row_ladder(ti, freqs[0], &mut row);
            for (j, v) in row.iter().enumerate() {
                assert!((v - f[[i, j]]).abs() < 1e-12, "row {i} column {j}");
            }
        }
    }

    #[test]
    fn epochs_group_by_backend_and_gap() {
        let t = [0.0, 10.0, 5000.0, 5001.0, 20.0, 9000.0];
        let b = [0, 0, 0, 0, 1, 1];
        let e = ecorr_epochs(&t, &b, &[true, true], 3600.0);
        assert_eq!(
            e,
            vec![(0, vec![0, 1]), (0, vec![2, 3]), (1, vec![4]), (1, vec![5])]
        );
        let e = ecorr_epochs(&t, &b, &[true, false], 3600.0);
        assert_eq!(e, vec![(0, vec![0, 1]), (0, vec![2, 3])]);
    }
}
