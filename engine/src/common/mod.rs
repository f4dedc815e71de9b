//! The common red process of the whole array and the Bayesian half of the search: the exact
//! likelihood of the reduced data for a power-law common process with a chosen inter-pulsar
//! correlation, its posterior on a (log10 A, gamma) grid, and Bayes factors between correlation
//! models (docs/common-process.md).

pub mod draws;
pub mod evidence;
pub mod free_sampling;
pub mod free_spectrum;
pub mod joint;
pub mod likelihood;
pub mod write;

pub use draws::*;
pub use evidence::*;
pub use free_sampling::*;
pub use free_spectrum::*;
pub use joint::*;
pub use likelihood::*;
pub use write::*;
