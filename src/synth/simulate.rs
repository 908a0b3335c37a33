//! The whole simulation in memory: truth, drift, every frame of the launch sequence, the dark
//! and reference frames. Frames are rendered in parallel (rayon, one task per frame) and are
//! identical for any number of threads (each frame's noise comes from its own seeded stream).
use crate::error::{Error, Result};
use crate::matrix::{FrameRole, LaunchLayout};
use crate::synth::optics::{ChannelOptics, ModeSampler};
use crate::synth::render::{add_hologram, add_reference_only, expose, expose_mean, Scratch};
use crate::synth::scenario::Scenario;
use crate::synth::truth::{
    as_launched, device_matrix, rng_for, STREAM_CALIBRATION, STREAM_DRIFT, STREAM_FRAME,
};
use ndarray::Array2;
use num_complex::Complex64;
use rand_distr::{Distribution, StandardNormal};
use rayon::prelude::*;
use std::sync::atomic::{AtomicUsize, Ordering};

/// Everything `modegram synth` writes, in memory.
pub struct Simulation {
    /// Frames in launch order, (height, width), counts.
    pub frames: Vec<Array2<f64>>,
    pub dark: Array2<f64>,
    pub reference: Array2<f64>,
    /// The device matrix T.
    pub device: Array2<Complex64>,
    /// The matrix as launched (what an ideal decoder recovers, see [`crate::synth::truth`]).
    pub truth: Array2<Complex64>,
    pub layout: LaunchLayout,
    /// Reference phase of every frame, radians (the reference is R exp(i drift)).
    pub drift_rad: Vec<f64>,
    /// Mode group of every mode.
    pub groups: Vec<u32>,
    /// Pixels clipped at saturation over all launch frames.
    pub clipped_pixels: usize,
}

/// Largest simulation held in memory, bytes (8 GB).
pub const MAX_SIMULATION_BYTES: f64 = 8e9;

/// The random-walk drift: drift[0] = 0, drift[f] = drift[f-1] + rate + step * N(0, 1).
pub fn drift_sequence(scn: &Scenario, n_frames: usize) -> Vec<f64> {
    let mut rng = rng_for(scn.seed, STREAM_DRIFT, 0);
    let mut out = Vec::with_capacity(n_frames);
    let mut phi = 0.0;
    for f in 0..n_frames {
        if f > 0 {
            let z: f64 = StandardNormal.sample(&mut rng);
            phi += scn.drift.rate_rad_per_frame + scn.drift.step_rad * z;
        }
        out.push(phi);
    }
    out
}

/// Build every channel's optics with `sampler` and simulate.
pub fn simulate(
    scn: &Scenario,
    groups: &[u32],
    sampler: &ModeSampler,
    tick: &(dyn Fn() + Sync),
) -> Result<Simulation> {
    let optics = (0..scn.channels.len())
        .map(|c| ChannelOptics::new(scn, c, sampler))
        .collect::<Result<Vec<_>>>()?;
    simulate_with_optics(scn, groups, &optics, tick)
}

/// Simulate with precomputed optics (one per channel, in scenario order).
pub fn simulate_with_optics(
    scn: &Scenario,
    groups: &[u32],
    optics: &[ChannelOptics],
    tick: &(dyn Fn() + Sync),
) -> Result<Simulation> {
    let n_modes = groups.len();
    let l = &scn.launch;
    let layout = LaunchLayout::from_counts(
        l.polarizations.len(),
        n_modes,
        l.repeats,
        l.reference_every,
        l.reference_input,
    )
    .map_err(|e| {
        crate::error::Error::setup(
            scn.file.display().to_string(),
            "launch",
            format!("reference_input = {}", l.reference_input),
            e.to_string(),
        )
    })?;
    let device = device_matrix(scn, groups)?;
    let n_frames = layout.expected_frames();
    // Every frame is held in memory (f64) and written out: bound the whole before starting.
    let bytes = n_frames as f64 * (scn.sensor.width_px * scn.sensor.height_px) as f64 * 8.0;
    if bytes > MAX_SIMULATION_BYTES {
        return Err(Error::setup(
            scn.file.display().to_string(),
            "launch.repeats",
            l.repeats,
            format!(
                "{n_frames} frames of {} x {} px would take {:.1} GB in memory, more than the \
                 {:.0} GB limit: fewer repeats, modes or pixels",
                scn.sensor.width_px,
                scn.sensor.height_px,
                bytes / 1e9,
                MAX_SIMULATION_BYTES / 1e9
            ),
        ));
    }
    let drift = drift_sequence(scn, n_frames);
    let (h, w) = (scn.sensor.height_px, scn.sensor.width_px);
    let clipped = AtomicUsize::new(0);
    let frames: Vec<Array2<f64>> = (0..n_frames)
        .into_par_iter()
        .map_init(Scratch::default, |s, f| {
            let col = match layout.roles[f] {
                FrameRole::Input { pol, mode, .. } => pol * n_modes + mode,
                FrameRole::Reference { .. } => layout.reference_input,
            };
            let t = device.column(col);
            let mut frame = Array2::<f64>::zeros((h, w));
            for (c, o) in optics.iter().enumerate() {
                add_hologram(o, scn.channels[c].region, c, t, drift[f], &mut frame, s);
            }
            let mut rng = rng_for(scn.seed, STREAM_FRAME, f as u64);
            clipped.fetch_add(expose(&mut frame, scn, &mut rng), Ordering::Relaxed);
            tick();
            frame
        })
        .collect();
    let mut reference = Array2::<f64>::zeros((h, w));
    for (c, o) in optics.iter().enumerate() {
        add_reference_only(o, scn.channels[c].region, &mut reference);
    }
    let dark = calibration_frame(scn, &Array2::zeros((h, w)), 0);
    let reference = calibration_frame(scn, &reference, 1);
    Ok(Simulation {
        frames,
        dark,
        reference,
        truth: as_launched(scn, &device, n_modes),
        device,
        layout,
        drift_rad: drift,
        groups: groups.to_vec(),
        clipped_pixels: clipped.into_inner(),
    })
}

/// A dark or reference frame from its expected light counts: the noise-free reading when
/// `noise.calibration_averages` = 0, else the mean of that many noisy readings (rounded when
/// quantised).
fn calibration_frame(scn: &Scenario, expected: &Array2<f64>, which: u64) -> Array2<f64> {
    let n = scn.noise.calibration_averages;
    if n == 0 {
        let mut f = expected.clone();
        expose_mean(&mut f, scn);
        return f;
    }
    let mut acc = Array2::<f64>::zeros(expected.dim());
    for i in 0..n {
        let mut f = expected.clone();
        let mut rng = rng_for(scn.seed, STREAM_CALIBRATION, which * 1_000_003 + i as u64);
        expose(&mut f, scn, &mut rng);
        acc += &f;
    }
    acc.mapv(|v| {
        let m = v / n as f64;
        if scn.noise.quantisation {
            m.round()
        } else {
            m
        }
    })
}
