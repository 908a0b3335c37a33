//! Small dense linear-algebra helpers over nalgebra: conversion from ndarray and a singular
//! value decomposition that reports non-convergence instead of looping or panicking.
use crate::error::{Error, Result};
use nalgebra::DMatrix;
use ndarray::Array2;
use num_complex::Complex64;

/// Iteration cap of the implicit-shift SVD (far above what a few hundred rows need).
const SVD_MAX_ITER: usize = 1_000_000;

/// A singular value decomposition `M = U diag(s) V^H`, s descending.
pub struct Svd {
    /// Left singular vectors, (rows, k), k = min(rows, cols).
    pub u: DMatrix<Complex64>,
    /// Singular values, descending.
    pub s: Vec<f64>,
    /// `V^H`, (k, cols).
    pub v_t: DMatrix<Complex64>,
}

/// Copy an ndarray matrix into nalgebra's column-major layout.
pub fn to_dmatrix(m: &Array2<Complex64>) -> DMatrix<Complex64> {
    let (r, c) = m.dim();
    DMatrix::from_fn(r, c, |i, j| m[(i, j)])
}

/// Copy a nalgebra matrix back into an ndarray matrix.
pub fn from_dmatrix(m: &DMatrix<Complex64>) -> Array2<Complex64> {
    Array2::from_shape_fn((m.nrows(), m.ncols()), |(i, j)| m[(i, j)])
}

/// Error unless every entry of `m` (named `what`) is finite and the matrix is not empty.
pub fn check_finite(m: &Array2<Complex64>, what: &str) -> Result<()> {
    if m.is_empty() {
        return Err(Error::Input(format!(
            "{what} is empty (shape {:?})",
            m.dim()
        )));
    }
    if let Some(((i, j), z)) = m
        .indexed_iter()
        .find(|(_, z)| !(z.re.is_finite() && z.im.is_finite()))
    {
        return Err(Error::Input(format!(
            "{what} holds a non-finite entry {z} at row {i}, column {j}"
        )));
    }
    Ok(())
}

fn decompose(
    m: &Array2<Complex64>,
    vectors: bool,
) -> Result<nalgebra::SVD<Complex64, nalgebra::Dyn, nalgebra::Dyn>> {
    nalgebra::SVD::try_new(to_dmatrix(m), vectors, vectors, f64::EPSILON, SVD_MAX_ITER).ok_or_else(
        || {
            Error::NotConverged(format!(
                "singular value decomposition of a {} x {} matrix",
                m.nrows(),
                m.ncols()
            ))
        },
    )
}

/// Singular values of `m`, descending.
pub fn singular_values(m: &Array2<Complex64>) -> Result<Vec<f64>> {
    let svd = decompose(m, false)?;
    let mut s: Vec<f64> = svd.singular_values.iter().copied().collect();
    s.sort_by(|a, b| b.total_cmp(a));
    Ok(s)
}

/// Full SVD of `m`.
pub fn svd(m: &Array2<Complex64>) -> Result<Svd> {
    let svd = decompose(m, true)?;
    let s: Vec<f64> = svd.singular_values.iter().copied().collect();
    let (u, v_t) = match (svd.u, svd.v_t) {
        (Some(u), Some(v_t)) => (u, v_t),
        _ => {
            return Err(Error::NotConverged(
                "singular vectors were not computed".into(),
            ))
        }
    };
    // try_new sorts descending; keep the order explicit for callers.
    debug_assert!(s.windows(2).all(|w| w[0] >= w[1]));
    Ok(Svd { u, s, v_t })
}
