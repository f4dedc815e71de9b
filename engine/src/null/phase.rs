//! Phase shifts (Taylor et al. 2017): rotate each pulsar's (sin, cos) Fourier coefficient pair at
//! each frequency by an independent uniform random phase. A rotation of the pair is a time shift
//! of that frequency's sinusoid, so each pulsar's power spectrum is kept and any inter-pulsar
//! correlation is destroyed. Only the numerators x~_a . x~_b change; sigma_ab (the traces) is
//! kept fixed, as in the published method.

use super::{Prepared, Trial, TrialSource};
use crate::error::Result;
use crate::rng::{stream, Purpose};
use rand::Rng;

/// Phase-shift trials of a prepared array.
pub struct PhaseShifts<'a> {
    p: &'a Prepared,
    seed: u64,
    /// The weighted data x~_a, n rows of 2K.
    x: Vec<f64>,
}

impl<'a> PhaseShifts<'a> {
    pub fn new(p: &'a Prepared, seed: u64) -> Self {
        let x = p
            .weighted
            .iter()
            .flat_map(|w| w.x.iter().copied())
            .collect();
        PhaseShifts { p, seed, x }
    }

    /// The rotated data of trial `index`: for pulsar a and frequency j,
    /// (s, c) -> (s cos t - c sin t, s sin t + c cos t), t uniform in [0, 2 pi).
    pub fn rotated(&self, index: u64) -> Vec<f64> {
        let mut rng = stream(self.seed, Purpose::Phase, index);
        let mut y = self.x.clone();
        for pair in y.chunks_exact_mut(2) {
            let t = std::f64::consts::TAU * rng.random::<f64>();
            let (sn, cs) = t.sin_cos();
            let (s, c) = (pair[0], pair[1]);
            pair[0] = s * cs - c * sn;
            pair[1] = s * sn + c * cs;
        }
        y
    }
}

impl TrialSource for PhaseShifts<'_> {
    fn trial(&self, index: u64) -> Result<Trial> {
        let y = self.rotated(index);
        let snr = self.p.snr_of(&y);
        Ok(Trial {
            index,
            snr,
            amplitude2: snr * self.p.sigma0,
            attempts: 1,
        })
    }
}
