//! Fibre modes: index profiles, the scalar LP solver (exact step-index characteristic
//! equation and a finite-difference radial solver for any profile), analytic LG / HG bases,
//! and sampling a basis on a camera grid.
//!
//! Contract: [`Basis::from_setup`] gives the modes in the order of docs/conventions.md with
//! fields normalised to integral |psi|^2 dA = 1; [`Basis::sample`] renormalises on the grid;
//! [`gram`] / [`gram_deviation`] / [`sampling_warning`] tell whether the grid is adequate.
//! Methods, accuracy and labels: docs/modes.md.
pub mod analytic;
pub mod basis;
pub mod bessel;
pub mod fd;
pub mod profile;
pub mod radial;
pub mod sample;
pub mod step;

pub use analytic::{hg_to_lg_coefficients, hg_to_lg_matrix};
pub use basis::{lp_label, parabolic_waist_um, Basis, ModeInfo, Orientation};
pub use profile::Profile;
pub use sample::{gram, gram_deviation, sampling_warning, GRAM_TOLERANCE};
