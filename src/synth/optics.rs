//! Per-channel optics, computed once: the "camera basis" (each mode as it arrives on the
//! camera pixels) and the reference beam at the pixel-aperture quadrature points.
//!
//! Camera basis of channel c (docs/conventions.md "Alignment"):
//! 1. sample every mode on the region's pixel grid in the fibre plane (pitch = camera pitch /
//!    magnification, origin at the region's centre pixel), zero-padded on every side, at the
//!    TRUE alignment (centre, rotation, scale);
//! 2. propagate by +defocus_um with the angular spectrum exp(i (kz - k) dz),
//!    kz = sqrt(k^2 - (2 pi f)^2) (evanescent parts decay for dz > 0, are dropped for dz < 0)
//!    on the padded grid, so nothing wraps around;
//! 3. multiply by the tilt phase exp(+i k (tx x + ty y)), k = 2 pi / lambda, x, y from the
//!    region centre: the tilt is that of the recorded field, so the decoder's correction
//!    (tilt removed, then propagation by -dz) undoes steps 2-3 exactly and a tilt does not
//!    move the pattern;
//! 4. crop to the region and scale by sqrt(dA): B_m[pixel] with sum over pixels |B_m|^2 = 1
//!    for a mode that lies inside the region.
//!
//! Reference: R(x, y) = sqrt(peak) exp(-((x - ox)^2 + (y - oy)^2) / w^2) exp(+i 2 pi f_R . r),
//! f_R = -carrier, r = (x, y) in pixels from the region's centre pixel, so the reference
//! phase is 0 at the centre pixel.
//!
//! Pixel aperture: the camera integrates intensity over the light-sensitive square of side
//! fill_factor * pitch; the integral is Gauss-Legendre quadrature with `subpixels` points per
//! axis (nodes and weights: Abramowitz & Stegun 1964, table 25.4, from memory).
use crate::error::Result;
use crate::grid::{Alignment, Grid};
use crate::synth::fft2::{freq, smooth_size, Fft2, Fft2Scratch};
use crate::synth::scenario::{Scenario, SynthChannel};
use ndarray::{Array2, Array3, Axis};
use num_complex::Complex64;
use std::f64::consts::PI;

/// Samples the mode basis on a grid at an alignment (geometry only: centre, rotation,
/// scale), shape (modes, ny, nx), each mode with sum |psi|^2 dA = 1 on that grid.
pub type ModeSampler<'a> = dyn Fn(&Grid, &Alignment) -> Result<Array3<Complex64>> + Sync + 'a;

/// Gauss-Legendre nodes on [-1, 1] and weights (summing to 2), n = 1..=5.
pub fn gauss_legendre(n: usize) -> Vec<(f64, f64)> {
    match n {
        1 => vec![(0.0, 2.0)],
        2 => {
            let x = 0.577_350_269_189_625_7;
            vec![(-x, 1.0), (x, 1.0)]
        }
        3 => {
            let x = 0.774_596_669_241_483_4;
            vec![(-x, 5.0 / 9.0), (0.0, 8.0 / 9.0), (x, 5.0 / 9.0)]
        }
        4 => {
            let (a, wa) = (0.339_981_043_584_856_3, 0.652_145_154_862_546_1);
            let (b, wb) = (0.861_136_311_594_052_6, 0.347_854_845_137_453_9);
            vec![(-b, wb), (-a, wa), (a, wa), (b, wb)]
        }
        _ => {
            let (a, wa) = (0.538_469_310_105_683_1, 0.478_628_670_499_366_5);
            let (b, wb) = (0.906_179_845_938_664, 0.236_926_885_056_189_1);
            vec![
                (-b, wb),
                (-a, wa),
                (0.0, 0.568_888_888_888_888_9),
                (a, wa),
                (b, wb),
            ]
        }
    }
}

/// Quadrature points of the pixel aperture: (dx_px, dy_px, weight), weights summing to 1.
pub fn aperture_nodes(subpixels: usize, fill_factor: f64) -> Vec<(f64, f64, f64)> {
    let gl = gauss_legendre(subpixels);
    let h = 0.5 * fill_factor;
    let mut out = Vec::with_capacity(gl.len() * gl.len());
    for &(y, wy) in &gl {
        for &(x, wx) in &gl {
            out.push((x * h, y * h, wx * wy / 4.0));
        }
    }
    out
}

/// One channel's precomputed optics.
pub struct ChannelOptics {
    /// Region width and height, pixels.
    pub nx: usize,
    pub ny: usize,
    /// Camera basis (modes, ny, nx): per-pixel amplitude, sum |B|^2 = 1 for a contained mode.
    pub basis: Array3<Complex64>,
    /// sqrt(signal counts per unit power).
    pub amplitude: f64,
    /// Pixel-aperture quadrature points (dx_px, dy_px, weight).
    pub nodes: Vec<(f64, f64, f64)>,
    /// The reference at every node, (nodes, ny, nx).
    pub reference: Array3<Complex64>,
    /// Per node, the Fourier shift ramps exp(+i 2 pi f dx) over columns and rows.
    pub ramp_x: Vec<Vec<Complex64>>,
    pub ramp_y: Vec<Vec<Complex64>>,
    pub fft: Fft2,
    pub ifft: Fft2,
}

/// The fibre-plane grid of a region, zero-padded by `pad` pixels on each side (its pixel
/// (pad_x + nx/2, pad_y + ny/2) is the region's centre pixel).
pub fn padded_grid(nx: usize, ny: usize, pitch_um: f64) -> (Grid, usize, usize) {
    let px = nx.div_ceil(4).max(16);
    let py = ny.div_ceil(4).max(16);
    let nxp = smooth_size(nx + 2 * px);
    let nyp = smooth_size(ny + 2 * py);
    let grid = Grid {
        nx: nxp,
        ny: nyp,
        pitch_um,
        origin_um: [
            -((px + nx / 2) as f64) * pitch_um,
            -((py + ny / 2) as f64) * pitch_um,
        ],
    };
    (grid, px, py)
}

/// The camera basis of a channel (steps 1 to 4 of the module header).
pub fn camera_basis(
    ch: &SynthChannel,
    pixel_pitch_um: f64,
    wavelength_nm: f64,
    sampler: &ModeSampler,
) -> Result<Array3<Complex64>> {
    let (nx, ny) = (ch.region[2], ch.region[3]);
    let pitch = pixel_pitch_um / ch.magnification;
    let (grid, px, py) = padded_grid(nx, ny, pitch);
    let al = ch.alignment();
    let geometry = Alignment {
        tilt_mrad: [0.0, 0.0],
        defocus_um: 0.0,
        ..al
    };
    let mut modes = sampler(&grid, &geometry)?;
    let k = 2.0 * PI / (wavelength_nm * 1e-3);
    let (tx, ty) = (al.tilt_mrad[0] * 1e-3, al.tilt_mrad[1] * 1e-3);
    let sq = pitch;
    let (nxp, nyp) = (grid.nx, grid.ny);
    let tilt_x: Vec<Complex64> = (0..nxp)
        .map(|c| Complex64::from_polar(1.0, k * tx * grid.x_um(c)))
        .collect();
    let tilt_y: Vec<Complex64> = (0..nyp)
        .map(|r| Complex64::from_polar(1.0, k * ty * grid.y_um(r)))
        .collect();
    // angular-spectrum transfer exp(i (kz - k) dz), f in cycles per micrometre
    let dz = al.defocus_um;
    let transfer = (dz != 0.0).then(|| {
        Array2::from_shape_fn((nyp, nxp), |(r, c)| {
            let fx = freq(c, nxp) / pitch;
            let fy = freq(r, nyp) / pitch;
            let kt2 = (2.0 * PI) * (2.0 * PI) * (fx * fx + fy * fy);
            let kz2 = k * k - kt2;
            if kz2 >= 0.0 {
                Complex64::from_polar(1.0, (kz2.sqrt() - k) * dz)
            } else if dz > 0.0 {
                Complex64::from_polar((-(-kz2).sqrt() * dz).exp(), -k * dz)
            } else {
                Complex64::new(0.0, 0.0)
            }
        })
    });
    let fwd = Fft2::new(nxp, nyp, false);
    let inv = Fft2::new(nxp, nyp, true);
    let mut scratch = Fft2Scratch::default();
    let n_modes = modes.len_of(Axis(0));
    let mut out = Array3::from_elem((n_modes, ny, nx), Complex64::default());
    let mut buf = vec![Complex64::default(); nxp * nyp];
    for m in 0..n_modes {
        let mode = modes.index_axis_mut(Axis(0), m);
        for ((r, c), v) in mode.indexed_iter() {
            buf[r * nxp + c] = *v * sq;
        }
        if let Some(h) = &transfer {
            fwd.process(&mut buf, &mut scratch);
            let scale = 1.0 / (nxp * nyp) as f64;
            for (b, t) in buf.iter_mut().zip(h.iter()) {
                *b *= *t * scale;
            }
            inv.process(&mut buf, &mut scratch);
        }
        for r in 0..ny {
            for c in 0..nx {
                let (rp, cp) = (r + py, c + px);
                out[(m, r, c)] = buf[rp * nxp + cp] * tilt_x[cp] * tilt_y[rp];
            }
        }
    }
    drop(modes);
    Ok(out)
}

impl ChannelOptics {
    /// Everything channel `c` of the scenario needs to render frames.
    pub fn new(scn: &Scenario, c: usize, sampler: &ModeSampler) -> Result<ChannelOptics> {
        let ch = &scn.channels[c];
        let basis = camera_basis(
            ch,
            scn.camera.pixel_pitch_um,
            scn.light.wavelength_nm,
            sampler,
        )?;
        Ok(Self::from_basis(scn, c, basis))
    }

    /// As [`ChannelOptics::new`] with a given camera basis (modes, ny, nx).
    pub fn from_basis(scn: &Scenario, c: usize, basis: Array3<Complex64>) -> ChannelOptics {
        let ch = &scn.channels[c];
        let (nx, ny) = (ch.region[2], ch.region[3]);
        let nodes = aperture_nodes(scn.sensor.subpixels, scn.camera.fill_factor);
        let reference = reference_field(ch, &nodes);
        let ramp_x = nodes
            .iter()
            .map(|&(dx, _, _)| {
                (0..nx)
                    .map(|k| Complex64::from_polar(1.0, 2.0 * PI * freq(k, nx) * dx))
                    .collect()
            })
            .collect();
        let ramp_y = nodes
            .iter()
            .map(|&(_, dy, _)| {
                (0..ny)
                    .map(|k| Complex64::from_polar(1.0, 2.0 * PI * freq(k, ny) * dy))
                    .collect()
            })
            .collect();
        ChannelOptics {
            nx,
            ny,
            basis,
            amplitude: ch.signal_counts.sqrt(),
            nodes,
            reference,
            ramp_x,
            ramp_y,
            fft: Fft2::new(nx, ny, false),
            ifft: Fft2::new(nx, ny, true),
        }
    }

    /// Number of modes.
    pub fn n_modes(&self) -> usize {
        self.basis.len_of(Axis(0))
    }
}

/// The reference beam at every quadrature node, (nodes, ny, nx).
pub fn reference_field(ch: &SynthChannel, nodes: &[(f64, f64, f64)]) -> Array3<Complex64> {
    let (nx, ny) = (ch.region[2], ch.region[3]);
    let (cx, cy) = ((nx / 2) as f64, (ny / 2) as f64);
    let amp = ch.reference_peak_counts.sqrt();
    let w2 = ch.reference_waist_px * ch.reference_waist_px;
    let f_r = [-ch.carrier[0], -ch.carrier[1]];
    let [ox, oy] = ch.reference_offset_px;
    Array3::from_shape_fn((nodes.len(), ny, nx), |(n, r, c)| {
        let x = c as f64 - cx + nodes[n].0;
        let y = r as f64 - cy + nodes[n].1;
        let env = amp * (-((x - ox) * (x - ox) + (y - oy) * (y - oy)) / w2).exp();
        Complex64::from_polar(env, 2.0 * PI * (f_r[0] * x + f_r[1] * y))
    })
}
