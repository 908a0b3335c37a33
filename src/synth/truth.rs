//! The device's true transfer matrix, the matrix "as launched", and the seeded random
//! streams of the simulator.
//!
//! Device matrix T (rows = out_channel * n_modes + mode, columns = in_polarisation * n_modes
//! + mode, docs/conventions.md "Matrices"): random from [`crate::matrix::random_transfer`]
//! (block-diagonal by mode group, Haar blocks, exact MDL, tuned group crosstalk) scaled by
//! 10^(-insertion_loss_db / 20), or read from the scenario's NPY file.
//!
//! Matrix as launched: channel c's camera sees sqrt(signal_counts_c) T_c; the setup written
//! next to the frames says power_counts = P (the mean of the channels' signal_counts), so an
//! ideal decoder recovers M = diag(sqrt(signal_counts_c / P)) T, which is what
//! truth_matrix.npy holds (M = T when every channel has the same signal_counts).
use crate::error::{Error, Result};
use crate::matrix::random_transfer;
use crate::synth::scenario::{Scenario, TransferKind};
use ndarray::Array2;
use num_complex::Complex64;
use rand::SeedableRng;

/// The random generator used for drift and noise (portable across platforms and versions).
pub type SynthRng = rand::rngs::Xoshiro256PlusPlus;

/// A generator for one purpose (`stream`) and item (`index`) derived from the scenario seed,
/// so that every frame draws the same numbers whatever thread renders it.
pub fn rng_for(seed: u64, stream: u64, index: u64) -> SynthRng {
    let mut z = seed
        ^ stream.wrapping_mul(0x9E37_79B9_7F4A_7C15)
        ^ index.wrapping_add(1).wrapping_mul(0xD1B5_4A32_D192_ED03);
    // splitmix64 finaliser
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^= z >> 31;
    SynthRng::seed_from_u64(z)
}

/// Random streams (the `stream` argument of [`rng_for`]).
pub const STREAM_DRIFT: u64 = 2;
pub const STREAM_FRAME: u64 = 3;
pub const STREAM_CALIBRATION: u64 = 4;

/// The device matrix T of the scenario; `groups[m]` is the mode group of mode m.
pub fn device_matrix(scn: &Scenario, groups: &[u32]) -> Result<Array2<Complex64>> {
    let n = groups.len();
    let (nc, np) = (scn.channels.len(), scn.launch.polarizations.len());
    let (rows, cols) = (nc * n, np * n);
    let t = &scn.transfer;
    let file = scn.file.display().to_string();
    match t.kind {
        TransferKind::Random => {
            let m = random_transfer(
                groups,
                np,
                nc,
                t.mdl_db,
                t.group_crosstalk_db.unwrap_or(f64::NEG_INFINITY),
                t.pol_mixing,
                scn.seed,
            )
            .map_err(|e| Error::setup(&file, "transfer", "(random)", e.to_string()))?;
            let a = 10f64.powf(-t.insertion_loss_db / 20.0);
            Ok(m.mapv(|z| z * a))
        }
        TransferKind::File => {
            let rel = t.file.clone().unwrap_or_default();
            let path = scn.resolve(&rel);
            let m: Array2<Complex64> = crate::export::read_npy(&path)
                .map_err(|e| Error::setup(&file, "transfer.file", rel.display(), e.to_string()))?;
            if m.dim() != (rows, cols) {
                return Err(Error::setup(
                    &file,
                    "transfer.file",
                    rel.display(),
                    format!(
                        "matrix has shape {:?}; this scenario needs ({rows}, {cols}) \
                         (channels * modes, polarizations * modes with {n} modes)",
                        m.dim()
                    ),
                ));
            }
            if m.iter().any(|z| !z.re.is_finite() || !z.im.is_finite()) {
                return Err(Error::setup(
                    &file,
                    "transfer.file",
                    rel.display(),
                    "matrix holds non-finite values",
                ));
            }
            if m.iter().all(|z| z.norm_sqr() == 0.0) {
                return Err(Error::setup(
                    &file,
                    "transfer.file",
                    rel.display(),
                    "matrix is all zeros (no power reaches the camera)",
                ));
            }
            Ok(m)
        }
    }
}

/// Counts per unit launched power written to the setup: the mean of the channels'
/// `signal_counts`.
pub fn power_counts(scn: &Scenario) -> f64 {
    scn.channels.iter().map(|c| c.signal_counts).sum::<f64>() / scn.channels.len() as f64
}

/// The matrix an ideal decoder recovers, diag(sqrt(signal_counts_c / P)) T.
pub fn as_launched(
    scn: &Scenario,
    device: &Array2<Complex64>,
    n_modes: usize,
) -> Array2<Complex64> {
    let p = power_counts(scn);
    let mut m = device.clone();
    for (r, mut row) in m.rows_mut().into_iter().enumerate() {
        let g = (scn.channels[r / n_modes].signal_counts / p).sqrt();
        row.mapv_inplace(|z| z * g);
    }
    m
}
