//! modegram: from off-axis holograms of a multimode device to its mode transfer matrix.
//!
//! The modules follow the pipeline:
//! [`frames`] (reading camera frames) -> [`decode`] (carrier, window, pruned FFT, corrections)
//! -> [`modes`] (index profiles, LP solver, analytic bases, sampling on the camera grid)
//! -> [`projection`] (overlap integrals) -> [`matrix`] (assembly, drift, figures of merit,
//! inversion) -> [`export`] / [`render`] (files, pictures, report).
//! [`synth`] simulates launch sequences with known truth; [`align`] fits and checks the
//! holography alignment; [`cli`] is the command-line front end.
//!
//! Conventions (axes, carrier sign, mode order, normalisation) are in docs/conventions.md.

pub mod align;
pub mod cli;
pub mod decode;
pub mod error;
pub mod export;
pub mod frames;
pub mod grid;
pub mod matrix;
pub mod modes;
pub mod pipeline;
pub mod projection;
pub mod render;
pub mod setup;
pub mod synth;

pub use error::{Error, Result};
