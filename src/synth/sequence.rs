//! The launch sequence: which input each frame launches, in the order of
//! docs/conventions.md "Matrices": polarisations outer, modes inner, each input `repeats`
//! times in a row; with `reference_every = K` a single reference launch (input
//! `reference_input`) before inputs 0, K, 2K, ... and one after the last input.
use serde::Serialize;

/// One frame of the launch sequence.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Launch {
    /// Column of the transfer matrix launched (in_polarisation * n_modes + mode).
    pub input: usize,
    /// True for a drift-reference launch.
    pub reference: bool,
    /// Repeat number of this input (0 for reference launches).
    pub repeat: usize,
}

/// The frames of a launch sequence with `n_inputs` inputs.
pub fn launch_sequence(
    n_inputs: usize,
    repeats: usize,
    reference_every: usize,
    reference_input: usize,
) -> Vec<Launch> {
    let mut out = Vec::new();
    let reference = Launch {
        input: reference_input,
        reference: true,
        repeat: 0,
    };
    for input in 0..n_inputs {
        if reference_every > 0 && input % reference_every == 0 {
            out.push(reference);
        }
        for repeat in 0..repeats {
            out.push(Launch {
                input,
                reference: false,
                repeat,
            });
        }
    }
    if reference_every > 0 {
        out.push(reference);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn references_bracket_blocks_of_inputs() {
        let s = launch_sequence(5, 2, 2, 3);
        // R 0 0 1 1 R 2 2 3 3 R 4 4 R
        assert_eq!(s.len(), 5 * 2 + 4);
        let refs: Vec<usize> = (0..s.len()).filter(|&i| s[i].reference).collect();
        assert_eq!(refs, vec![0, 5, 10, 13]);
        assert!(s.iter().filter(|l| l.reference).all(|l| l.input == 3));
        assert_eq!(s[1].input, 0);
        assert_eq!(s[2].repeat, 1);
        assert_eq!(launch_sequence(4, 1, 0, 0).len(), 4);
    }
}
