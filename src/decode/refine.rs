//! Basis refinement of an automatic carrier.
//!
//! A residual carrier error `d` (cycles/px) leaves the decoded field multiplied by
//! `exp(i 2 pi k . x)` with `k = d / p` (cycles/um, `p` the camera pixel pitch in the fibre
//! plane): a tilt. The refinement finds the `k` that maximises the power captured by the
//! basis over the carrier-search frames,
//!
//! `g(k) = sum_frames sum_modes |<psi_m, E exp(-i 2 pi k . x)>|^2`,
//!
//! by Newton steps with the exact gradient and Hessian (projections of `E`, `x E`, `y E`,
//! `x^2 E`, `x y E`, `y^2 E`), each step capped at half an FFT bin and accepted only when `g`
//! grows. The carrier becomes `c + k p`. The uncertainty is the curvature bound for white
//! field noise whose level is the power the basis leaves over (an upper bound when the basis
//! is incomplete). Refinements further than [`MAX_SHIFT_BINS`] from the centroid are refused:
//! the centroid is then kept and a warning given.
use super::plan::DecodePlan;
use crate::projection::{field_power, Projector};
use ndarray::Array2;
use num_complex::Complex64;
use std::f64::consts::PI;

/// Largest accepted refinement, FFT bins of the region (per axis).
pub const MAX_SHIFT_BINS: f64 = 2.0;
/// Largest pull from the centre of power that is taken without question, FFT bins per axis
/// (beyond it, and beyond three standard deviations of the centre, the caller keeps the
/// centre: see `decode::refine_auto_carriers`).
pub const ACCEPT_BINS: f64 = 0.25;
/// Largest single Newton step, FFT bins.
const MAX_STEP_BINS: f64 = 0.5;

/// Result of a refinement.
#[derive(Debug, Clone, Copy)]
pub struct Refined {
    /// Refined carrier, cycles/px.
    pub carrier: [f64; 2],
    /// Shift from the starting carrier, FFT bins (Euclidean).
    pub shift_bins: f64,
    /// One-sigma uncertainty, cycles/px per axis.
    pub uncertainty: [f64; 2],
    /// Captured fraction before and after.
    pub captured: [f64; 2],
}

/// Why a refinement was not taken.
#[derive(Debug, Clone, Copy)]
pub enum NotRefined {
    /// No power in the frames or a flat objective.
    NoSignal,
    /// The maximum lies further than [`MAX_SHIFT_BINS`] (bins along x, y).
    TooFar([f64; 2]),
}

#[derive(Clone, Copy)]
struct Eval {
    g: f64,
    grad: [f64; 2],
    hess: [[f64; 2]; 2],
}

/// Refine `plan`'s carrier on `frames` (full camera frames) with `proj` (the channel's basis
/// on the plan's grid).
pub fn refine(
    plan: &DecodePlan,
    proj: &Projector,
    frames: &[Vec<f32>],
) -> Result<Refined, NotRefined> {
    let g = plan.grid;
    let n = g.len();
    let mut scratch = plan.scratch();
    let mut fields = Vec::with_capacity(frames.len());
    let mut power = 0.0;
    for fr in frames {
        let mut out = vec![Complex64::default(); n];
        plan.decode(fr, &mut scratch, &mut out);
        power += field_power(&out, &g);
        fields.push(out);
    }
    if !(power > 0.0 && power.is_finite()) || proj.n_modes() == 0 {
        return Err(NotRefined::NoSignal);
    }
    // Coordinates from the grid's centre (conditioning only: a shift of the origin changes
    // every coefficient of a frame by one phase).
    let xm = g.x_um(0) + 0.5 * (g.nx as f64 - 1.0) * g.pitch_um;
    let ym = g.y_um(0) + 0.5 * (g.ny as f64 - 1.0) * g.pitch_um;
    let xs: Vec<f64> = (0..g.nx).map(|i| g.x_um(i) - xm).collect();
    let ys: Vec<f64> = (0..g.ny).map(|i| g.y_um(i) - ym).collect();
    let [_, _, w, h] = plan.spec.region;
    let fp = plan.spec.fibre_pitch_um;
    // One FFT bin as a fibre-plane frequency, cycles/um.
    let bin = [1.0 / (w as f64 * fp), 1.0 / (h as f64 * fp)];
    let mut rows = Array2::<Complex64>::zeros((6, n));
    let mut eval = |k: [f64; 2]| -> Eval {
        let mut e = Eval {
            g: 0.0,
            grad: [0.0; 2],
            hess: [[0.0; 2]; 2],
        };
        let px: Vec<Complex64> = xs
            .iter()
            .map(|&x| Complex64::from_polar(1.0, -2.0 * PI * k[0] * x))
            .collect();
        for f in &fields {
            for (iy, &y) in ys.iter().enumerate() {
                let py = Complex64::from_polar(1.0, -2.0 * PI * k[1] * y);
                for (ix, (&x, &pxv)) in xs.iter().zip(&px).enumerate() {
                    let i = iy * g.nx + ix;
                    let v = f[i] * pxv * py;
                    rows[[0, i]] = v;
                    rows[[1, i]] = v * x;
                    rows[[2, i]] = v * y;
                    rows[[3, i]] = v * (x * x);
                    rows[[4, i]] = v * (x * y);
                    rows[[5, i]] = v * (y * y);
                }
            }
            let a = proj.project(rows.view());
            let c1 = Complex64::new(0.0, -2.0 * PI);
            let c2 = -(2.0 * PI) * (2.0 * PI);
            for m in 0..a.ncols() {
                let a0 = a[[0, m]];
                let ai = [c1 * a[[1, m]], c1 * a[[2, m]]];
                let aij = [
                    [c2 * a[[3, m]], c2 * a[[4, m]]],
                    [c2 * a[[4, m]], c2 * a[[5, m]]],
                ];
                e.g += a0.norm_sqr();
                for i in 0..2 {
                    e.grad[i] += 2.0 * (a0.conj() * ai[i]).re;
                    for j in 0..2 {
                        e.hess[i][j] += 2.0 * (ai[i].conj() * ai[j] + a0.conj() * aij[i][j]).re;
                    }
                }
            }
        }
        e
    };
    let start = eval([0.0, 0.0]);
    let mut k = [0.0, 0.0];
    let mut cur = start;
    for _ in 0..30 {
        let [[a, b], [_, d]] = cur.hess;
        let det = a * d - b * b;
        // Newton step when the Hessian is negative definite, else a gradient step of one
        // step cap.
        let mut step = if a < 0.0 && det > 0.0 {
            [
                -(d * cur.grad[0] - b * cur.grad[1]) / det,
                -(-b * cur.grad[0] + a * cur.grad[1]) / det,
            ]
        } else {
            // gradient in bin coordinates
            let gb = [cur.grad[0] * bin[0], cur.grad[1] * bin[1]];
            let gn = gb[0].hypot(gb[1]);
            if gn == 0.0 {
                break;
            }
            [
                MAX_STEP_BINS * gb[0] / gn * bin[0],
                MAX_STEP_BINS * gb[1] / gn * bin[1],
            ]
        };
        let len = (step[0] / bin[0]).hypot(step[1] / bin[1]);
        if len > MAX_STEP_BINS {
            step = [step[0] * MAX_STEP_BINS / len, step[1] * MAX_STEP_BINS / len];
        }
        let mut taken = false;
        for _ in 0..6 {
            let trial = [k[0] + step[0], k[1] + step[1]];
            let e = eval(trial);
            if e.g > cur.g {
                k = trial;
                cur = e;
                taken = true;
                break;
            }
            step = [0.5 * step[0], 0.5 * step[1]];
        }
        let moved = (step[0] / bin[0]).hypot(step[1] / bin[1]);
        if !taken || moved < 1e-4 {
            break;
        }
    }
    let shift = [k[0] / bin[0], k[1] / bin[1]];
    if shift[0].abs() > MAX_SHIFT_BINS || shift[1].abs() > MAX_SHIFT_BINS {
        return Err(NotRefined::TooFar(shift));
    }
    if cur.g.is_nan() || cur.g <= 0.0 {
        return Err(NotRefined::NoSignal);
    }
    // Noise level per pixel (times dA) from the power left over.
    let dof = (frames.len() * proj.active_pixels().saturating_sub(proj.n_modes())).max(1);
    let vda = (power - cur.g).max(0.0) / dof as f64;
    let [[a, b], [_, d]] = cur.hess;
    let det = a * d - b * b;
    let unc = if a < 0.0 && det > 0.0 {
        // Cov = v dA (-H)^-1
        let inv = [-d / det, -a / det];
        [
            (vda * inv[0]).max(0.0).sqrt() * fp,
            (vda * inv[1]).max(0.0).sqrt() * fp,
        ]
    } else {
        [f64::NAN; 2]
    };
    let c = plan.spec.carrier_cycles_per_px;
    Ok(Refined {
        carrier: [c[0] + k[0] * fp, c[1] + k[1] * fp],
        shift_bins: shift[0].hypot(shift[1]),
        uncertainty: unc,
        captured: [start.g / power, cur.g / power],
    })
}
