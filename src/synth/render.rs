//! Rendering camera frames from the precomputed optics: hologram, pixel aperture, noise.
//!
//! Per frame f and channel c: S = sqrt(signal_counts) sum_m t[c * n_modes + m] B_m on the
//! pixel grid (so sum over pixels |S|^2 = signal_counts |t_c|^2 for contained modes); S at
//! the pixel-aperture quadrature points by Fourier shift (exact for a band-limited field that
//! vanishes at the region's edge); the expected counts
//! I = sum_nodes w |S + R exp(i drift_f)|^2 (the pixel integral of the intensity).
//! Pixels outside every region see no light. Then the sensor: dark offset + shot noise
//! (Poisson in electrons, `gain_e_per_count`) + read noise (Gaussian) -> round -> clip at
//! saturation (and at the format's range [0, max code]).
//!
//! Random numbers: frame f draws from its own generator seeded by (seed, f), so the frames are
//! identical for any number of threads.
use crate::synth::fft2::Fft2Scratch;
use crate::synth::optics::ChannelOptics;
use crate::synth::scenario::Scenario;
use crate::synth::truth::SynthRng;
use ndarray::{Array2, ArrayView1, Axis};
use num_complex::Complex64;
use rand_distr::{Distribution, Poisson, StandardNormal};

/// Reused buffers of one rendering thread.
#[derive(Default)]
pub struct Scratch {
    signal: Vec<Complex64>,
    spectrum: Vec<Complex64>,
    shifted: Vec<Complex64>,
    fft: Fft2Scratch,
}

/// Add channel `ch`'s expected hologram counts (no dark, no noise) for the field column `t`
/// (length channels * modes; this channel's rows are used) and reference phase `drift_rad`
/// into `frame` (height x width, row-major) at the channel's region.
pub fn add_hologram(
    optics: &ChannelOptics,
    region: [usize; 4],
    channel: usize,
    t: ArrayView1<Complex64>,
    drift_rad: f64,
    frame: &mut Array2<f64>,
    s: &mut Scratch,
) {
    let (nx, ny) = (optics.nx, optics.ny);
    let npx = nx * ny;
    let n_modes = optics.n_modes();
    s.signal.clear();
    s.signal.resize(npx, Complex64::default());
    for m in 0..n_modes {
        let a = t[channel * n_modes + m] * optics.amplitude;
        if a.norm_sqr() == 0.0 {
            continue;
        }
        let b = optics.basis.index_axis(Axis(0), m);
        for (o, v) in s.signal.iter_mut().zip(b.iter()) {
            *o += a * *v;
        }
    }
    let rot = Complex64::from_polar(1.0, drift_rad);
    let single_centre = optics.nodes.len() == 1 && optics.nodes[0].0 == 0.0;
    if !single_centre {
        s.spectrum.clear();
        s.spectrum.extend_from_slice(&s.signal);
        optics.fft.process(&mut s.spectrum, &mut s.fft);
        s.shifted.resize(npx, Complex64::default());
    }
    let [x0, y0, _, _] = region;
    let inv_n = 1.0 / npx as f64;
    for (n, &(_, _, w)) in optics.nodes.iter().enumerate() {
        let field: &[Complex64] = if single_centre {
            &s.signal
        } else {
            let (rx, ry) = (&optics.ramp_x[n], &optics.ramp_y[n]);
            for r in 0..ny {
                let f = ry[r] * inv_n;
                let row = &s.spectrum[r * nx..(r + 1) * nx];
                let out = &mut s.shifted[r * nx..(r + 1) * nx];
                for c in 0..nx {
                    out[c] = row[c] * rx[c] * f;
                }
            }
            optics.ifft.process(&mut s.shifted, &mut s.fft);
            &s.shifted
        };
        let reference = optics.reference.index_axis(Axis(0), n);
        let reference = reference.as_slice().expect("reference is contiguous");
        for r in 0..ny {
            let mut row = frame.row_mut(y0 + r);
            for c in 0..nx {
                let i = r * nx + c;
                row[x0 + c] += w * (field[i] + reference[i] * rot).norm_sqr();
            }
        }
    }
}

/// Add the expected counts of channel `ch`'s reference beam alone (pixel-integrated |R|^2).
pub fn add_reference_only(optics: &ChannelOptics, region: [usize; 4], frame: &mut Array2<f64>) {
    let [x0, y0, _, _] = region;
    for (n, &(_, _, w)) in optics.nodes.iter().enumerate() {
        let reference = optics.reference.index_axis(Axis(0), n);
        for ((r, c), v) in reference.indexed_iter() {
            frame[(y0 + r, x0 + c)] += w * v.norm_sqr();
        }
    }
}

/// Turn expected light counts (no dark) into a camera reading in place: dark offset, shot
/// and read noise as switched on, rounding, clipping. Returns the number of clipped pixels.
pub fn expose(frame: &mut Array2<f64>, scn: &Scenario, rng: &mut SynthRng) -> usize {
    let gain = scn.sensor.gain_e_per_count;
    let read = if scn.noise.read {
        scn.sensor.read_noise_counts
    } else {
        0.0
    };
    let dark = scn.sensor.dark_offset_counts;
    let sat = scn.saturation_counts();
    let mut clipped = 0;
    for v in frame.iter_mut() {
        let mut x = v.max(0.0);
        if scn.noise.shot && x > 0.0 {
            let electrons = x * gain;
            x = match Poisson::new(electrons) {
                Ok(p) => p.sample(rng) / gain,
                Err(_) => x,
            };
        }
        x += dark;
        if read > 0.0 {
            let z: f64 = StandardNormal.sample(rng);
            x += read * z;
        }
        if scn.noise.quantisation {
            x = x.round();
        }
        if x > sat {
            x = sat;
            clipped += 1;
        } else if x < 0.0 {
            x = 0.0;
        }
        *v = x;
    }
    clipped
}

/// The noise-free reading of expected counts: dark offset added, rounded if quantised,
/// clipped. Returns the number of clipped pixels.
pub fn expose_mean(frame: &mut Array2<f64>, scn: &Scenario) -> usize {
    let dark = scn.sensor.dark_offset_counts;
    let sat = scn.saturation_counts();
    let mut clipped = 0;
    for v in frame.iter_mut() {
        let mut x = v.max(0.0) + dark;
        if scn.noise.quantisation {
            x = x.round();
        }
        if x > sat {
            x = sat;
            clipped += 1;
        }
        *v = x;
    }
    clipped
}
