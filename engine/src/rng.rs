//! Reproducible randomness: every generator is a function of (seed, purpose, index) alone, so a
//! trial's numbers do not depend on the thread that runs it or on how trials are split into
//! shards.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// What a generator is for; distinct purposes give independent streams for the same seed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[repr(u64)]
pub enum Purpose {
    Layout = 1,
    Pulsar = 2,
    Background = 3,
    Scramble = 4,
    Phase = 5,
    SimulatedNull = 6,
    Injection = 7,
    TimeDomainNull = 8,
    NoiseStart = 9,
    NoiseChain = 10,
    /// Row picks of the noise-marginalised OS (nmos/).
    NoiseDraws = 13,
    /// Posterior draws of the common process (`ptacorr common`, common-draws.csv).
    CommonDraw = 21,
    /// Chains of the common free spectrum.
    FreeSpectrumChain = 22,
    /// Chains of the joint fit of the pulsars' red noise with the common process.
    JointRedChain = 23,
}

/// SplitMix64 finaliser (Steele, Lea & Flood 2014), used to spread seeds.
pub fn splitmix64(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// The generator of item `index` for `purpose` under `seed`: a ChaCha8 key derived from
/// (seed, purpose) and the ChaCha stream number set to `index`.
pub fn stream(seed: u64, purpose: Purpose, index: u64) -> ChaCha8Rng {
    let mut key = [0u8; 32];
    let mut z = splitmix64(seed ^ splitmix64(purpose as u64));
    for chunk in key.chunks_mut(8) {
        z = splitmix64(z);
        chunk.copy_from_slice(&z.to_le_bytes());
    }
    let mut rng = ChaCha8Rng::from_seed(key);
    rng.set_stream(index);
    rng
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;

    #[test]
    fn streams_depend_only_on_their_arguments() {
        let a: u64 = stream(7, Purpose::Scramble, 3).random();
        let b: u64 = stream(7, Purpose::Scramble, 3).random();
        let c: u64 = stream(7, Purpose::Scramble, 4).random();
        let d: u64 = stream(7, Purpose::Phase, 3).random();
        let e: u64 = stream(8, Purpose::Scramble, 3).random();
        assert_eq!(a, b);
        assert!(a != c && a != d && a != e);
    }
}
