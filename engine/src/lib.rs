//! ptacorr: the engine of a gravitational-wave search with a pulsar timing array. It reads a
//! release of timing residuals, reduces each pulsar once (Woodbury form, Fourier basis, timing
//! model marginalised), forms every pair's cross-correlation with the optimal statistic, and
//! compares them with the Hellings-Downs, monopole and dipole patterns.
//!
//! Data flow: [`release`] -> [`reduce`] -> [`optimal`] -> [`bins`] / [`analysis`].

// Index loops mirror the formulas they implement (sums over i, j); keep them.
#![allow(clippy::needless_range_loop)]

// Link the system OpenBLAS for ndarray's matrix products and LAPACK.
extern crate blas_src;
extern crate openblas_src;

pub mod analysis;
pub mod basis;
pub mod bin_covariance;
pub mod bins;
pub mod chains;
pub mod cluster;
pub mod common;
pub mod constants;
pub mod error;
pub mod gchisq;
pub mod hd_spread;
pub mod inject;
pub mod likelihood;
pub mod linalg;
pub mod nmos;
pub mod noise;
pub mod noise_fit;
pub mod null;
pub mod optimal;
pub mod orf;
pub mod output;
pub mod paircov;
pub mod per_frequency;
pub mod priors;
pub mod pvalue;
pub mod reduce;
pub mod release;
pub mod rng;
pub mod sampler;
pub mod scenario;
pub mod shard;
pub mod simulate;
pub mod sky;
pub mod spectrum;
#[doc(hidden)]
pub mod testing;
pub mod white_gram;
pub mod whiten;

pub use error::{Error, Result};

/// Program version recorded in every output's provenance.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
