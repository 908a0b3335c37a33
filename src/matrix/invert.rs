//! The input that produces a target output: Tikhonov-regularised pseudo-inverse.
//!
//! For a matrix M (outputs x inputs) with SVD `M = U diag(s) V^H` and a target y, the input
//! minimising `|M x - y|^2 + lambda^2 |x|^2` is
//! `x = (M^H M + lambda^2 I)^-1 M^H y = V diag(s_i / (s_i^2 + lambda^2)) U^H y`
//! (Tikhonov regularisation; Hansen, Rank-Deficient and Discrete Ill-Posed Problems, 1998,
//! from memory). lambda = 0 gives the Moore-Penrose pseudo-inverse, with singular values
//! below `s_max * max(rows, cols) * eps` dropped.
//!
//! Regularisation: explicit (absolute lambda, or lambda relative to s_max) or the default
//! `lambda = 1e-6 s_max`, which only guards against rounding: it changes the result by at most
//! `(1e-6 * condition)^2` relative. The default refuses matrices with condition number above
//! 1e6 (an error naming the condition number): an explicit regularisation must then be chosen.
//!
//! Reported per target: the predicted output `M x`, the fidelity
//! `|<y, M x>|^2 / (|y|^2 |M x|^2)` and the relative residual `|M x - y| / |y|`.
//! Targets are plain mode vectors here; other target kinds (images projected onto a basis)
//! are turned into vectors before they reach [`invert_targets`].
use super::linalg::{check_finite, svd, to_dmatrix};
use crate::error::{Error, Result};
use nalgebra::DMatrix;
use ndarray::Array2;
use num_complex::Complex64;
use serde::Serialize;

/// Default lambda relative to the largest singular value.
pub const DEFAULT_RELATIVE_REGULARIZATION: f64 = 1e-6;
/// Largest condition number accepted without an explicit regularisation.
pub const MAX_CONDITION_DEFAULT: f64 = 1e6;

/// How lambda is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Regularization {
    /// `DEFAULT_RELATIVE_REGULARIZATION * s_max`; refuses ill-conditioned matrices.
    Default,
    /// lambda itself (units of the matrix entries).
    Absolute(f64),
    /// lambda = value * s_max.
    Relative(f64),
}

/// What the inversion did and how well the targets are reached.
#[derive(Debug, Clone, Serialize)]
pub struct InversionReport {
    pub outputs: usize,
    pub inputs: usize,
    pub targets: usize,
    pub condition_number: f64,
    pub singular_value_max: f64,
    pub singular_value_min: f64,
    /// lambda used (units of the matrix entries).
    pub regularization: f64,
    /// lambda / s_max.
    pub regularization_relative: f64,
    /// "default" | "absolute" | "relative".
    pub regularization_source: &'static str,
    /// Per target.
    pub fidelity: Vec<f64>,
    /// Per target.
    pub relative_residual: Vec<f64>,
    pub warnings: Vec<String>,
}

/// Inputs and predicted outputs of a batch of targets.
#[derive(Debug, Clone)]
pub struct InversionResult {
    /// (targets, inputs).
    pub inputs: Array2<Complex64>,
    /// (targets, outputs): M x for each target.
    pub predicted: Array2<Complex64>,
    pub report: InversionReport,
}

/// The inputs producing `targets` (targets, outputs) through `m` (outputs, inputs).
pub fn invert_targets(
    m: &Array2<Complex64>,
    targets: &Array2<Complex64>,
    reg: Regularization,
) -> Result<InversionResult> {
    check_finite(m, "the transfer matrix")?;
    let (rows, cols) = m.dim();
    let (nt, len) = targets.dim();
    if len != rows {
        return Err(Error::Input(format!(
            "the target has length {len}, the matrix has {rows} outputs ({rows} x {cols}): \
             a target must hold one value per output"
        )));
    }
    check_finite(targets, "the target")?;
    for (t, y) in targets.outer_iter().enumerate() {
        if y.iter().all(|z| z.norm_sqr() == 0.0) {
            return Err(Error::Input(format!("target {t} is all zeros")));
        }
    }
    let d = svd(m)?;
    let (s_max, s_min) = (d.s[0], d.s[d.s.len() - 1]);
    if s_max <= 0.0 {
        return Err(Error::Input("the transfer matrix is all zeros".into()));
    }
    let condition = s_max / s_min;
    let mut warnings = Vec::new();
    let (lambda, source) = match reg {
        Regularization::Default => {
            if condition > MAX_CONDITION_DEFAULT {
                return Err(Error::Input(format!(
                    "the matrix is ill-conditioned: condition number {condition:.3e} \
                     (s_max {s_max:.3e}, s_min {s_min:.3e}) exceeds {MAX_CONDITION_DEFAULT:e}; \
                     choose a regularisation (--regularization VALUE or \
                     --relative-regularization FRACTION)"
                )));
            }
            (DEFAULT_RELATIVE_REGULARIZATION * s_max, "default")
        }
        Regularization::Absolute(l) => {
            check_lambda(l, "--regularization")?;
            (l, "absolute")
        }
        Regularization::Relative(r) => {
            check_lambda(r, "--relative-regularization")?;
            (r * s_max, "relative")
        }
    };
    if source != "default" && condition > MAX_CONDITION_DEFAULT {
        let gain = if lambda > 0.0 {
            1.0 / (2.0 * lambda)
        } else {
            1.0 / s_min
        };
        warnings.push(format!(
            "ill-conditioned matrix: condition number {condition:.3e}; with lambda = \
             {lambda:.3e} the inputs can amplify target components by up to {gain:.3e}"
        ));
    }
    let cutoff = s_max * rows.max(cols) as f64 * f64::EPSILON;
    let filter: Vec<f64> =
        d.s.iter()
            .map(|&s| {
                if lambda > 0.0 {
                    s / (s * s + lambda * lambda)
                } else if s > cutoff {
                    1.0 / s
                } else {
                    0.0
                }
            })
            .collect();
    let y = DMatrix::from_fn(rows, nt, |i, t| targets[(t, i)]);
    let mut uy = d.u.adjoint() * &y;
    for (i, mut row) in uy.row_iter_mut().enumerate() {
        row *= Complex64::new(filter[i], 0.0);
    }
    let x = d.v_t.adjoint() * uy;
    let pred = to_dmatrix(m) * &x;
    let mut fidelity = Vec::with_capacity(nt);
    let mut residual = Vec::with_capacity(nt);
    for t in 0..nt {
        let (yt, pt) = (y.column(t), pred.column(t));
        let y2 = yt.norm_squared();
        let p2 = pt.norm_squared();
        let ip = yt.dotc(&pt);
        fidelity.push(if p2 > 0.0 {
            ip.norm_sqr() / (y2 * p2)
        } else {
            0.0
        });
        residual.push((pt - yt).norm() / y2.sqrt());
    }
    Ok(InversionResult {
        inputs: Array2::from_shape_fn((nt, cols), |(t, i)| x[(i, t)]),
        predicted: Array2::from_shape_fn((nt, rows), |(t, i)| pred[(i, t)]),
        report: InversionReport {
            outputs: rows,
            inputs: cols,
            targets: nt,
            condition_number: condition,
            singular_value_max: s_max,
            singular_value_min: s_min,
            regularization: lambda,
            regularization_relative: lambda / s_max,
            regularization_source: source,
            fidelity,
            relative_residual: residual,
            warnings,
        },
    })
}

fn check_lambda(v: f64, option: &str) -> Result<()> {
    if !(v.is_finite() && v >= 0.0) {
        return Err(Error::Input(format!(
            "{option} {v}: must be a finite number >= 0"
        )));
    }
    Ok(())
}
