//! The launch sequence: which input (or reference) each frame of the stack holds.
//!
//! Contract (docs/conventions.md "Matrices"): polarisations are the outer loop and every
//! basis mode is launched inside each; input index `i = pol * n_modes + mode` is the column
//! of the transfer matrix. Each input is launched `repeats` times in a row. With
//! `reference_every = K > 0`, a single reference frame (input `reference_input`) precedes
//! inputs 0, K, 2K, ... and one more follows the last input, so every input frame is
//! bracketed by two references. The number of frames is therefore
//! `n_inputs * repeats + (ceil(n_inputs / K) + 1)` (or `n_inputs * repeats` with K = 0).
use crate::error::{Error, Result};
use crate::setup::LaunchSpec;
use serde::Serialize;

/// What one frame of the launch stack holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum FrameRole {
    /// Input launch: polarisation index, mode index (modes.json order), repeat number.
    Input {
        pol: usize,
        mode: usize,
        repeat: usize,
    },
    /// The `k`-th reference launch (k = 0, 1, ...).
    Reference { k: usize },
}

/// The frame-by-frame plan of a launch sequence, built once from the setup.
#[derive(Debug, Clone, PartialEq)]
pub struct LaunchLayout {
    /// Number of input polarisations.
    pub n_pols: usize,
    /// Number of basis modes launched per polarisation.
    pub n_modes: usize,
    /// Consecutive repeats of each input.
    pub repeats: usize,
    /// A reference frame before every `reference_every` inputs (0: none).
    pub reference_every: usize,
    /// Column index of the input the reference frames repeat.
    pub reference_input: usize,
    /// Role of every frame, in frame order.
    pub roles: Vec<FrameRole>,
    /// Frame indices of the reference launches, in order.
    pub reference_frames: Vec<usize>,
    /// `input_frames[col]`: the frame indices of the repeats of input `col`.
    pub input_frames: Vec<Vec<usize>>,
}

impl LaunchLayout {
    /// The layout of `spec` for a basis of `n_modes` modes.
    pub fn new(spec: &LaunchSpec, n_modes: usize) -> Result<LaunchLayout> {
        LaunchLayout::from_counts(
            spec.polarizations.len(),
            n_modes,
            spec.repeats,
            spec.reference_every,
            spec.reference_input,
        )
    }

    /// The layout from plain counts (the same rules as [`LaunchLayout::new`]).
    pub fn from_counts(
        n_pols: usize,
        n_modes: usize,
        repeats: usize,
        reference_every: usize,
        reference_input: usize,
    ) -> Result<LaunchLayout> {
        if n_pols == 0 {
            return Err(Error::Input(
                "launch.polarizations: name at least one input polarisation".into(),
            ));
        }
        if n_modes == 0 {
            return Err(Error::Input("the mode basis has no modes to launch".into()));
        }
        if repeats == 0 {
            return Err(Error::Input(
                "launch.repeats = 0: must be at least 1".into(),
            ));
        }
        let n_inputs = n_pols * n_modes;
        if reference_every > 0 && reference_input >= n_inputs {
            return Err(Error::Input(format!(
                "launch.reference_input = {reference_input}: there are only {n_inputs} inputs \
                 ({n_pols} polarisations x {n_modes} modes), so it must be below {n_inputs}"
            )));
        }
        let mut roles = Vec::new();
        let mut reference_frames = Vec::new();
        let mut input_frames = vec![Vec::with_capacity(repeats); n_inputs];
        let mut push_ref = |roles: &mut Vec<FrameRole>| {
            reference_frames.push(roles.len());
            roles.push(FrameRole::Reference {
                k: reference_frames.len() - 1,
            });
        };
        for (col, frames) in input_frames.iter_mut().enumerate() {
            if reference_every > 0 && col % reference_every == 0 {
                push_ref(&mut roles);
            }
            for repeat in 0..repeats {
                frames.push(roles.len());
                roles.push(FrameRole::Input {
                    pol: col / n_modes,
                    mode: col % n_modes,
                    repeat,
                });
            }
        }
        if reference_every > 0 {
            push_ref(&mut roles);
        }
        Ok(LaunchLayout {
            n_pols,
            n_modes,
            repeats,
            reference_every,
            reference_input,
            roles,
            reference_frames,
            input_frames,
        })
    }

    /// Number of inputs (matrix columns), `n_pols * n_modes`.
    pub fn n_inputs(&self) -> usize {
        self.n_pols * self.n_modes
    }

    /// Number of reference launches.
    pub fn n_references(&self) -> usize {
        self.reference_frames.len()
    }

    /// Number of frames the launch sequence holds.
    pub fn expected_frames(&self) -> usize {
        self.roles.len()
    }

    /// Role of frame `f` (None past the end).
    pub fn role(&self, f: usize) -> Option<FrameRole> {
        self.roles.get(f).copied()
    }

    /// The arithmetic behind [`LaunchLayout::expected_frames`], for messages.
    pub fn describe(&self) -> String {
        let mut s = format!(
            "{} polarisations x {} modes x repeats {}",
            self.n_pols, self.n_modes, self.repeats
        );
        if self.n_references() > 0 {
            s.push_str(&format!(
                " + {} reference launches (one before every {} inputs and one after the last)",
                self.n_references(),
                self.reference_every
            ));
        }
        s
    }

    /// Check that a stack of `n_frames` frames (named `what` in the message) fits the layout.
    pub fn validate_frames(&self, n_frames: usize, what: &str) -> Result<()> {
        if n_frames != self.expected_frames() {
            return Err(Error::Input(format!(
                "{what} has {n_frames} frames, the launch description needs {}: {}",
                self.expected_frames(),
                self.describe()
            )));
        }
        Ok(())
    }
}
