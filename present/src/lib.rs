//! ptacorr-present: the figures and the report of ptacorr, drawn from its output folders.
//!
//! This crate computes no statistic: it reads what the engine (`ptacorr`) wrote into an
//! output folder and draws it ([`figure`]) or writes it up ([`report`]).

// Index loops mirror the drawing arithmetic (ticks, bins); keep them.
#![allow(clippy::needless_range_loop)]

pub mod figure;
pub mod report;
