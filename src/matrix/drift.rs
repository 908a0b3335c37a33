//! Drift of the reference arm's phase over a launch sequence, tracked from the reference
//! launches and removed from every frame.
//!
//! Every reference frame launches the same input, so its output coefficient vector
//! `c_k` (all channels and modes of frame `f_k`) differs from the first one only by the
//! reference arm's phase (and noise). The drift at reference `k` is
//! `theta_k = arg <c_0, c_k> = arg sum_j conj(c_0j) c_kj`, unwrapped along k (each step
//! taken in (-pi, pi]), so theta_0 = 0. Between references the drift is interpolated linearly
//! in frame index; frames before the first / after the last reference take its value.
//! The correction multiplies frame f by `exp(-i theta(f))`. Steps of more than pi between
//! neighbouring references cannot be told from their wrapped value: choose
//! `reference_every` so the phase moves less than that between references.
//!
//! Stability of the references is reported beside the drift: the power
//! `sum_j |c_kj|^2` relative to the first reference, and the shape fidelity
//! `|<c_0, c_k>|^2 / (|c_0|^2 |c_k|^2)` (1 when the output pattern did not change).
use super::launch::LaunchLayout;
use crate::error::{Error, Result};
use ndarray::{Array3, ArrayView3, Axis};
use num_complex::Complex64;
use serde::Serialize;
use std::f64::consts::PI;

/// The drift tracked over one launch sequence.
#[derive(Debug, Clone, Serialize)]
pub struct DriftTrack {
    /// Frame index of each reference launch.
    pub reference_frames: Vec<usize>,
    /// Unwrapped drift at each reference launch, radians (first = 0).
    pub drift_rad: Vec<f64>,
    /// Interpolated drift of every frame, radians.
    pub per_frame_rad: Vec<f64>,
    /// Largest |drift| over the references, radians.
    pub max_abs_rad: f64,
    /// Power of each reference launch relative to the first.
    pub reference_power_ratio: Vec<f64>,
    /// Relative standard deviation of the reference powers (std / mean).
    pub reference_power_rel_std: f64,
    /// Shape fidelity `|<c_0, c_k>|^2 / (|c_0|^2 |c_k|^2)` of each reference.
    pub reference_shape_fidelity: Vec<f64>,
}

/// Wrap an angle into (-pi, pi].
fn wrap(a: f64) -> f64 {
    let mut w = a.rem_euclid(2.0 * PI);
    if w > PI {
        w -= 2.0 * PI;
    }
    w
}

/// Track the drift from the reference launches of `coeffs` (frames, channels, modes).
///
/// Errors: no reference launches in the layout (drift tracking was asked for without
/// `launch.reference_every`), a frame count that does not fit, or a reference frame
/// without power.
pub fn track_drift(coeffs: ArrayView3<Complex64>, layout: &LaunchLayout) -> Result<DriftTrack> {
    layout.validate_frames(coeffs.len_of(Axis(0)), "the coefficient stack")?;
    if layout.reference_frames.is_empty() {
        return Err(Error::Input(
            "drift tracking needs reference launches, but launch.reference_every = 0: \
             set launch.reference_every to K > 0 (a reference before every K inputs) or \
             switch drift tracking off (column phases are then arbitrary)"
                .into(),
        ));
    }
    let refs = &layout.reference_frames;
    let c0 = coeffs.index_axis(Axis(0), refs[0]);
    let p0: f64 = c0.iter().map(|z| z.norm_sqr()).sum();
    let mut raw = Vec::with_capacity(refs.len());
    let mut power = Vec::with_capacity(refs.len());
    let mut shape = Vec::with_capacity(refs.len());
    for (k, &f) in refs.iter().enumerate() {
        let ck = coeffs.index_axis(Axis(0), f);
        let pk: f64 = ck.iter().map(|z| z.norm_sqr()).sum();
        if !(pk.is_finite() && pk > 0.0) {
            return Err(Error::Input(format!(
                "reference launch {k} (frame {f}) has no usable power (sum |c|^2 = {pk}): \
                 cannot track the drift"
            )));
        }
        let ip: Complex64 = c0.iter().zip(ck.iter()).map(|(a, b)| a.conj() * b).sum();
        raw.push(ip.arg());
        power.push(pk / p0);
        shape.push(ip.norm_sqr() / (p0 * pk));
    }
    let mut drift = vec![0.0; refs.len()];
    for k in 1..refs.len() {
        drift[k] = drift[k - 1] + wrap(raw[k] - raw[k - 1]);
    }
    let n = coeffs.len_of(Axis(0));
    let mut per_frame = vec![0.0; n];
    for (f, slot) in per_frame.iter_mut().enumerate() {
        *slot = interpolate(refs, &drift, f);
    }
    let max_abs_rad = drift.iter().fold(0.0f64, |m, d| m.max(d.abs()));
    let mean = power.iter().sum::<f64>() / power.len() as f64;
    let var = power.iter().map(|p| (p - mean).powi(2)).sum::<f64>() / power.len() as f64;
    Ok(DriftTrack {
        reference_frames: refs.clone(),
        drift_rad: drift,
        per_frame_rad: per_frame,
        max_abs_rad,
        reference_power_ratio: power,
        reference_power_rel_std: var.sqrt() / mean,
        reference_shape_fidelity: shape,
    })
}

/// Linear interpolation of `values` given at frames `at` (ascending), held constant outside.
fn interpolate(at: &[usize], values: &[f64], f: usize) -> f64 {
    if f <= at[0] {
        return values[0];
    }
    let last = at.len() - 1;
    if f >= at[last] {
        return values[last];
    }
    let k = at.partition_point(|&a| a <= f) - 1;
    let (f0, f1) = (at[k] as f64, at[k + 1] as f64);
    let t = (f as f64 - f0) / (f1 - f0);
    values[k] + t * (values[k + 1] - values[k])
}

/// Multiply every frame of `coeffs` by `exp(-i theta(f))`.
pub fn remove_drift(coeffs: &mut Array3<Complex64>, track: &DriftTrack) {
    for (f, mut frame) in coeffs.axis_iter_mut(Axis(0)).enumerate() {
        let rot = Complex64::from_polar(1.0, -track.per_frame_rad[f]);
        frame.mapv_inplace(|z| z * rot);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wrap_range() {
        assert!((wrap(3.0 * PI) - PI).abs() < 1e-12);
        assert!((wrap(-PI) - PI).abs() < 1e-12);
        assert!((wrap(0.5) - 0.5).abs() < 1e-15);
        assert!((wrap(-0.5 - 2.0 * PI) + 0.5).abs() < 1e-12);
    }

    #[test]
    fn interpolation_is_linear_between_references() {
        let at = [0, 4, 10];
        let v = [0.0, 1.0, -2.0];
        assert_eq!(interpolate(&at, &v, 0), 0.0);
        assert!((interpolate(&at, &v, 2) - 0.5).abs() < 1e-15);
        assert_eq!(interpolate(&at, &v, 4), 1.0);
        assert!((interpolate(&at, &v, 7) + 0.5).abs() < 1e-15);
        assert_eq!(interpolate(&at, &v, 12), -2.0);
    }
}
