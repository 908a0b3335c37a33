//! Assembly of the transfer matrix from the coefficients of a launch sequence.
//!
//! Input: coefficients of shape (frames, channels, modes) in modes.json order and the
//! [`LaunchLayout`] of the sequence. Output: the matrix (outputs, inputs) with
//! `row = out_channel * n_modes + mode`, `col = in_pol * n_modes + mode`
//! (docs/conventions.md "Matrices"), i.e. column `col` is the frame's (channels, modes)
//! array flattened channel-major.
//!
//! Steps: (1) drift tracking from the reference launches and its removal from every frame
//! ([`super::drift`]), when the layout has references (or when required); (2) without drift
//! tracking the repeats of an input are aligned to its first repeat by the phase of their
//! inner product `arg <v_0, v_r>`, since each frame's phase is then arbitrary; (3) the
//! repeats are averaged, and the standard error of each entry is
//! `sqrt(sum_r |v_r - mean|^2 / (R - 1)) / sqrt(R)` (sample standard deviation of the complex
//! values over the R repeats divided by sqrt(R); 0 for R = 1).
use super::drift::{remove_drift, track_drift, DriftTrack};
use super::launch::LaunchLayout;
use crate::error::{Error, Result};
use ndarray::{Array2, ArrayView3, Axis};
use num_complex::Complex64;
use serde::Serialize;

/// Whether to track the reference arm's drift.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum DriftPolicy {
    /// Track when the layout has reference launches, otherwise leave phases arbitrary.
    #[default]
    Auto,
    /// Track; an error when the layout has no reference launches.
    Require,
    /// Do not track (column phases arbitrary).
    Off,
}

/// Whether the relative phases of the matrix columns mean anything.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ColumnPhases {
    /// Drift removed: columns share one phase reference (one global phase is arbitrary).
    DriftTracked,
    /// No drift tracking: every column has its own arbitrary phase.
    Arbitrary,
}

impl ColumnPhases {
    /// The label written to summary.json.
    pub fn label(self) -> &'static str {
        match self {
            ColumnPhases::DriftTracked => "drift_tracked",
            ColumnPhases::Arbitrary => "arbitrary",
        }
    }
}

/// An assembled transfer matrix with its uncertainty.
#[derive(Debug, Clone)]
pub struct Assembly {
    /// Transfer matrix, (outputs, inputs), in the units of the coefficients.
    pub matrix: Array2<Complex64>,
    /// Standard error of each entry (same shape, same units).
    pub stderr: Array2<f64>,
    /// The drift removed, when tracked.
    pub drift: Option<DriftTrack>,
    pub column_phases: ColumnPhases,
    pub n_channels: usize,
    pub n_modes: usize,
    pub n_pols: usize,
    pub repeats: usize,
}

/// Assemble the matrix of the sequence `coeffs` (frames, channels, modes) laid out by `layout`.
pub fn assemble(
    coeffs: ArrayView3<Complex64>,
    layout: &LaunchLayout,
    drift: DriftPolicy,
) -> Result<Assembly> {
    let (n_frames, n_channels, n_modes) = coeffs.dim();
    if n_modes != layout.n_modes {
        return Err(Error::Input(format!(
            "the coefficients hold {n_modes} modes per channel, the launch layout has {} modes",
            layout.n_modes
        )));
    }
    if n_channels == 0 {
        return Err(Error::Input(
            "the coefficients hold no output channel".into(),
        ));
    }
    layout.validate_frames(n_frames, "the coefficient stack")?;
    for (f, frame) in coeffs.axis_iter(Axis(0)).enumerate() {
        if let Some(z) = frame
            .iter()
            .find(|z| !(z.re.is_finite() && z.im.is_finite()))
        {
            return Err(Error::Input(format!(
                "coefficients of frame {f} hold a non-finite value ({z})"
            )));
        }
    }
    let track = match (drift, layout.reference_frames.is_empty()) {
        (DriftPolicy::Off, _) | (DriftPolicy::Auto, true) => None,
        _ => Some(track_drift(coeffs, layout)?),
    };
    let mut c = coeffs.to_owned();
    if let Some(t) = &track {
        remove_drift(&mut c, t);
    }
    let n_out = n_channels * n_modes;
    let n_in = layout.n_inputs();
    let r = layout.repeats;
    let mut matrix = Array2::<Complex64>::zeros((n_out, n_in));
    let mut stderr = Array2::<f64>::zeros((n_out, n_in));
    let mut reps: Vec<Vec<Complex64>> = vec![vec![Complex64::new(0.0, 0.0); n_out]; r];
    for (col, frames) in layout.input_frames.iter().enumerate() {
        for (v, &f) in reps.iter_mut().zip(frames) {
            let frame = c.index_axis(Axis(0), f);
            for (slot, z) in v.iter_mut().zip(frame.iter()) {
                *slot = *z;
            }
        }
        if track.is_none() {
            let (first, rest) = reps.split_at_mut(1);
            for v in rest {
                let ip: Complex64 = first[0]
                    .iter()
                    .zip(v.iter())
                    .map(|(a, b)| a.conj() * b)
                    .sum();
                if ip.norm() > 0.0 {
                    let rot = (ip / ip.norm()).conj();
                    v.iter_mut().for_each(|z| *z *= rot);
                }
            }
        }
        for row in 0..n_out {
            let mean = reps.iter().map(|v| v[row]).sum::<Complex64>() / r as f64;
            matrix[(row, col)] = mean;
            if r > 1 {
                let var =
                    reps.iter().map(|v| (v[row] - mean).norm_sqr()).sum::<f64>() / (r - 1) as f64;
                stderr[(row, col)] = (var / r as f64).sqrt();
            }
        }
    }
    Ok(Assembly {
        matrix,
        stderr,
        column_phases: if track.is_some() {
            ColumnPhases::DriftTracked
        } else {
            ColumnPhases::Arbitrary
        },
        drift: track,
        n_channels,
        n_modes,
        n_pols: layout.n_pols,
        repeats: r,
    })
}
