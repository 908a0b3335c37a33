//! Overlap integrals of decoded fields with a mode basis sampled on the same grid.
//!
//! Contract (docs/conventions.md "Modes"): `c_k = sum conj(psi_k) E dA` over the decoded grid
//! (dA = pitch_um^2), computed for a batch of frames as one complex matrix product
//! `C (batch x modes) = F (batch x pixels) . conj(Psi)^T (pixels x modes) * dA`; the captured
//! power of a field is `sum_k |c_k|^2 / sum |E|^2 dA` (1 for a field inside the span of an
//! orthonormal basis, by Parseval's identity for orthonormal expansions).
use crate::error::{Error, Result};
use crate::grid::Grid;
use ndarray::{linalg::general_mat_mul, Array2, Array3, ArrayView2, ArrayView3, ArrayViewMut2};
use num_complex::Complex64;

/// A basis prepared for projection on one grid.
#[derive(Debug, Clone)]
pub struct Projector {
    /// conj(psi_k) * dA, shape (modes, pixels).
    basis_conj: Array2<Complex64>,
    pub grid: Grid,
}

impl Projector {
    /// `basis` has shape (modes, ny, nx) and must match `grid`.
    pub fn new(basis: ArrayView3<Complex64>, grid: &Grid) -> Result<Projector> {
        Projector::from_array(basis.to_owned(), grid)
    }

    /// Like [`Projector::new`], taking the sampled basis by value: conjugated and scaled in
    /// place, so no second copy of the basis is held.
    pub fn from_array(basis: Array3<Complex64>, grid: &Grid) -> Result<Projector> {
        let (m, ny, nx) = basis.dim();
        if (ny, nx) != (grid.ny, grid.nx) {
            return Err(Error::Input(format!(
                "basis sampled on {nx}x{ny} pixels, the decoded grid has {}x{}",
                grid.nx, grid.ny
            )));
        }
        let da = grid.pixel_area_um2();
        let basis = if basis.is_standard_layout() {
            basis
        } else {
            basis.as_standard_layout().to_owned()
        };
        let mut b = basis
            .into_shape_with_order((m, nx * ny))
            .map_err(|e| Error::Input(format!("basis array: {e}")))?;
        b.mapv_inplace(|z| z.conj() * da);
        Ok(Projector {
            basis_conj: b,
            grid: *grid,
        })
    }

    /// Number of modes.
    pub fn n_modes(&self) -> usize {
        self.basis_conj.nrows()
    }

    /// Coefficients of a batch: `fields` (batch, pixels) -> `out` (batch, modes).
    pub fn project_into(&self, fields: ArrayView2<Complex64>, mut out: ArrayViewMut2<Complex64>) {
        general_mat_mul(
            Complex64::new(1.0, 0.0),
            &fields,
            &self.basis_conj.t(),
            Complex64::new(0.0, 0.0),
            &mut out,
        );
    }

    /// Coefficients of a batch (batch, pixels) -> (batch, modes).
    pub fn project(&self, fields: ArrayView2<Complex64>) -> Array2<Complex64> {
        let mut out = Array2::zeros((fields.nrows(), self.n_modes()));
        self.project_into(fields, out.view_mut());
        out
    }
}

/// Power of a field on a grid, `sum |E|^2 dA`.
pub fn field_power(field: &[Complex64], grid: &Grid) -> f64 {
    field.iter().map(|z| z.norm_sqr()).sum::<f64>() * grid.pixel_area_um2()
}

/// Captured power `sum |c|^2 / field_power` (0 for a zero field).
pub fn captured_power(coefficients: &[Complex64], field_power: f64) -> f64 {
    if field_power > 0.0 {
        coefficients.iter().map(|c| c.norm_sqr()).sum::<f64>() / field_power
    } else {
        0.0
    }
}
