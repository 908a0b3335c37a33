//! Image targets: a desired output intensity pattern in one output channel, turned into the
//! mode vector that [`super::invert::invert_targets`] takes.
//!
//! Contract: the image holds the target *intensity* on the channel's grid (the camera region,
//! at its fibre-plane pitch, under its alignment); the target field is `sqrt(I)` with a flat
//! phase, normalised to `sum |E|^2 dA = 1`. Its coefficients `c_k = sum conj(psi_k) E dA`
//! (docs/conventions.md "Modes") fill the rows `channel * n_modes + k` of the target
//! vector; the other channels' rows are 0. The captured power `sum |c_k|^2` (<= 1) says how
//! much of the pattern the basis can represent at all.
use crate::error::{Error, Result};
use crate::grid::Grid;
use crate::projection::Projector;
use ndarray::{Array1, Array2, ArrayView3, Axis};
use num_complex::Complex64;

/// A target built from an image.
#[derive(Debug, Clone)]
pub struct ImageTarget {
    /// Target output vector, length n_channels * n_modes.
    pub vector: Array1<Complex64>,
    /// The target field as the basis represents it, `sum_k c_k psi_k`, on the grid.
    pub projected: Array2<Complex64>,
    /// `sum |c_k|^2` of the unit-power target field.
    pub captured_power: f64,
}

/// The target vector of an intensity image (ny, nx) on `grid` for output `channel` of
/// `n_channels`, with the basis sampled on that grid (modes, ny, nx).
pub fn image_target(
    intensity: &Array2<f64>,
    sampled: ArrayView3<Complex64>,
    grid: &Grid,
    channel: usize,
    n_channels: usize,
) -> Result<ImageTarget> {
    let (n_modes, ny, nx) = sampled.dim();
    if intensity.dim() != (ny, nx) {
        return Err(Error::Input(format!(
            "the target image is {} x {} pixels (width x height), the channel's grid is \
             {nx} x {ny}",
            intensity.ncols(),
            intensity.nrows()
        )));
    }
    if channel >= n_channels {
        return Err(Error::Input(format!(
            "output channel {channel} of {n_channels} does not exist"
        )));
    }
    if let Some(((r, c), v)) = intensity
        .indexed_iter()
        .find(|(_, v)| !(v.is_finite() && **v >= 0.0))
    {
        return Err(Error::Input(format!(
            "the target image has the intensity {v} at row {r}, column {c}: must be >= 0"
        )));
    }
    let power: f64 = intensity.sum() * grid.pixel_area_um2();
    if power <= 0.0 {
        return Err(Error::Input(
            "the target image is black (no intensity)".into(),
        ));
    }
    let scale = 1.0 / power.sqrt();
    let field = Array2::from_shape_fn((1, nx * ny), |(_, p)| {
        Complex64::new(intensity[(p / nx, p % nx)].sqrt() * scale, 0.0)
    });
    let proj = Projector::new(sampled, grid)?;
    let c = proj.project(field.view());
    let coeffs: Vec<Complex64> = c.row(0).to_vec();
    let mut vector = Array1::<Complex64>::zeros(n_channels * n_modes);
    for (k, z) in coeffs.iter().enumerate() {
        vector[channel * n_modes + k] = *z;
    }
    Ok(ImageTarget {
        vector,
        projected: field_from_coefficients(&coeffs, sampled),
        captured_power: coeffs.iter().map(|z| z.norm_sqr()).sum(),
    })
}

/// `sum_k c_k psi_k` on the grid of `sampled` (modes, ny, nx).
pub fn field_from_coefficients(
    coeffs: &[Complex64],
    sampled: ArrayView3<Complex64>,
) -> Array2<Complex64> {
    let (_, ny, nx) = sampled.dim();
    let mut out = Array2::<Complex64>::zeros((ny, nx));
    for (c, psi) in coeffs.iter().zip(sampled.axis_iter(Axis(0))) {
        out.zip_mut_with(&psi, |o, p| *o += c * p);
    }
    out
}
