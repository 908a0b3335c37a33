//! The one place the simulator asks the modes stage for the basis: solve it from the
//! scenario's [fiber] and [basis] (the setup file's own sections) and hand back the group of
//! every mode and a sampler for the optics.
use crate::error::Result;
use crate::grid::{Alignment, Grid};
use crate::modes::Basis;
use crate::synth::scenario::Scenario;
use ndarray::Array3;
use num_complex::Complex64;

/// The scenario's mode basis (modes.json order).
pub fn solve(scn: &Scenario) -> Result<Basis> {
    Basis::from_setup(&scn.bare_setup())
}

/// Mode group of every mode.
pub fn groups(basis: &Basis) -> Vec<u32> {
    basis.modes.iter().map(|m| m.group).collect()
}

/// The basis sampled on a grid at an alignment (geometry only), normalised on that grid.
pub fn sample(basis: &Basis, grid: &Grid, alignment: &Alignment) -> Result<Array3<Complex64>> {
    Ok(basis.sample(grid, alignment))
}
