//! The decode plan of one channel: plain data built once (crop, window, spectral filter,
//! real-space factor, grid), then executed for every frame with caller-owned scratch.
//!
//! Pipeline per frame (signs: docs/conventions.md):
//! 1. subtract the background (dark, or the reference-only frame, which removes |R|^2);
//! 2. real-to-complex FFT (f32) of every row of the region, keeping only the bins of the
//!    crop's columns (negative bins from X[-k] = conj X[k] of a real row);
//! 3. complex FFT (f32) of those columns only, keeping only the crop's rows;
//! 4. multiply by one precomputed spectral filter (window x 1/pixel-aperture sinc x defocus
//!    x normalisation) and inverse FFT (f64) at the cropped size (the decoded grid);
//! 5. multiply by one precomputed real-space factor (carrier remainder below one bin, tilt,
//!    1/|R|).
//!
//! Crop layout: crop column `ix` holds absolute bin `kc_x + m(ix)` with `m(i) = i` for
//! `i < (n + 1) / 2` and `i - n` above, i.e. the crop is already in FFT order around the
//! carrier's integer bin `kc`. With the unnormalised inverse FFT `e_j` of that crop, the
//! filtered hologram at decoded pixel j (camera position r_j = j * W / nx) is
//! `exp(i 2 pi kc . r_j / N) e_j / (W H)` (the inverse DFT restricted to the crop), so the
//! demodulated signal `S R*(r) exp(-i 2 pi c . (r - r_c))` is that times
//! `exp(i 2 pi (kc / N . r_j - c . (r_j - r_c)))`, r_c the region's centre pixel.
//!
//! Field scale (docs/conventions.md "Field normalisation"): `E = S / p` with p the camera
//! pixel pitch in the fibre plane, so that `sum |E|^2 dA` over the decoded grid equals
//! `sum |S|^2` over the region's camera pixels (Parseval, for a band-limited signal).
use super::window;
use crate::grid::{Alignment, Grid};
use num_complex::{Complex32, Complex64};
use realfft::{RealFftPlanner, RealToComplex};
use rustfft::{Fft, FftPlanner};
use std::f64::consts::PI;
use std::sync::Arc;

/// How the field is divided by the reference amplitude.
#[derive(Debug, Clone, PartialEq)]
pub enum RefAmplitude {
    /// One value |R| (sqrt counts) for the whole region.
    Constant(f64),
    /// |R| on the decoded grid (ny * nx, row-major).
    Map(Vec<f64>),
}

/// Everything a plan is built from.
#[derive(Debug, Clone)]
pub struct PlanSpec {
    /// Width of the full camera frame (pixels).
    pub frame_width: usize,
    /// `[x0, y0, width, height]` of the channel's region.
    pub region: [usize; 4],
    /// Position of the signal's sideband, cycles/px.
    pub carrier_cycles_per_px: [f64; 2],
    /// Window radius, cycles/px.
    pub window_radius_cycles_per_px: f64,
    /// Raised-cosine edge as a fraction of the radius (0: hard edge).
    pub window_edge: f64,
    /// Decoded grid size (nx, ny); `nx / W == ny / H` (square decoded pixels).
    pub grid_px: (usize, usize),
    /// Camera pixel pitch in the fibre plane, micrometres.
    pub fibre_pitch_um: f64,
    pub wavelength_nm: f64,
    /// Light-sensitive fraction of the pixel's width (pixel-aperture correction).
    pub fill_factor: f64,
    /// Tilt and defocus are removed as given here (centre, rotation, scale are the basis's).
    pub alignment: Alignment,
    /// Region-sized background subtracted before the FFT (empty: none).
    pub background: Vec<f32>,
    pub reference: RefAmplitude,
}

/// Per-thread working memory of one plan.
pub struct Scratch {
    row: Vec<f32>,
    spec: Vec<Complex32>,
    rscratch: Vec<Complex32>,
    cols: Vec<Complex32>,
    cscratch: Vec<Complex32>,
    crop: Vec<Complex64>,
    tmp: Vec<Complex64>,
    iscratch: Vec<Complex64>,
}

/// Columns of the inverse FFT's column pass gathered together (4 x 16 bytes = one cache
/// line of the row-major crop).
const INV_COLS: usize = 4;

/// Stride of the column buffer: the column length padded so that consecutive columns do
/// not map to the same cache sets (a power-of-two stride would).
fn col_stride(h: usize) -> usize {
    h + 8
}

/// A channel's decode plan.
#[derive(Clone)]
pub struct DecodePlan {
    pub spec: PlanSpec,
    /// Integer bins (kx, ky) of the carrier.
    pub carrier_bin: [i64; 2],
    /// The decoded grid.
    pub grid: Grid,
    cols: Vec<(usize, bool)>,
    rows: Vec<usize>,
    filter: Vec<Complex64>,
    factor: Vec<Complex64>,
    rfft: Arc<dyn RealToComplex<f32>>,
    cfft: Arc<dyn Fft<f32>>,
    ifft_x: Arc<dyn Fft<f64>>,
    ifft_y: Arc<dyn Fft<f64>>,
}

/// Signed offset of crop index `i` in an `n`-wide crop (FFT order).
#[inline]
pub fn crop_offset(i: usize, n: usize) -> i64 {
    if i < n.div_ceil(2) {
        i as i64
    } else {
        i as i64 - n as i64
    }
}

#[inline]
fn sinc(t: f64) -> f64 {
    if t.abs() < 1e-12 {
        1.0
    } else {
        (PI * t).sin() / (PI * t)
    }
}

impl DecodePlan {
    /// Build the plan (FFT plans, crop tables, filter, factor). Sizes must be consistent:
    /// the caller (`decode::prepare`) checks them and names the setup key.
    pub fn build(spec: PlanSpec) -> DecodePlan {
        let [_, _, w, h] = spec.region;
        let (nx, ny) = spec.grid_px;
        let c = spec.carrier_cycles_per_px;
        let kc = [
            (c[0] * w as f64).round() as i64,
            (c[1] * h as f64).round() as i64,
        ];
        let cols = (0..nx)
            .map(|ix| {
                let k = (kc[0] + crop_offset(ix, nx)).rem_euclid(w as i64) as usize;
                if k <= w / 2 {
                    (k, false)
                } else {
                    (w - k, true)
                }
            })
            .collect();
        let rows = (0..ny)
            .map(|iy| (kc[1] + crop_offset(iy, ny)).rem_euclid(h as i64) as usize)
            .collect();
        let mut rp = RealFftPlanner::<f32>::new();
        let rfft = rp.plan_fft_forward(w);
        let cfft = FftPlanner::<f32>::new().plan_fft_forward(h);
        let mut p64 = FftPlanner::<f64>::new();
        let ifft_x = p64.plan_fft_inverse(nx);
        let ifft_y = p64.plan_fft_inverse(ny);
        let fp = spec.fibre_pitch_um;
        let pitch = w as f64 * fp / nx as f64;
        let grid = Grid {
            nx,
            ny,
            pitch_um: pitch,
            origin_um: [-((w / 2) as f64) * fp, -((h / 2) as f64) * fp],
        };
        let mut plan = DecodePlan {
            spec,
            carrier_bin: kc,
            grid,
            cols,
            rows,
            filter: Vec::new(),
            factor: Vec::new(),
            rfft,
            cfft,
            ifft_x,
            ifft_y,
        };
        plan.build_filter();
        plan.build_factor();
        plan
    }

    /// Spectral filter: window x 1/sinc pixel aperture x defocus x 1/(W H p).
    fn build_filter(&mut self) {
        let s = &self.spec;
        let [_, _, w, h] = s.region;
        let (nx, ny) = s.grid_px;
        let c = s.carrier_cycles_per_px;
        let lambda_um = s.wavelength_nm * 1e-3;
        let k = 2.0 * PI / lambda_um;
        let fp = s.fibre_pitch_um;
        // tilt as a spatial frequency of the fibre plane, cycles/um (phase k t x = 2 pi (t/lambda) x)
        let ft = [
            s.alignment.tilt_mrad[0] * 1e-3 / lambda_um,
            s.alignment.tilt_mrad[1] * 1e-3 / lambda_um,
        ];
        let dz = s.alignment.defocus_um;
        let norm = 1.0 / (w as f64 * h as f64 * fp);
        let wrap = |f: f64| f - f.round();
        let mut filter = vec![Complex64::default(); nx * ny];
        for iy in 0..ny {
            let fy = (self.carrier_bin[1] + crop_offset(iy, ny)) as f64 / h as f64;
            for ix in 0..nx {
                let fx = (self.carrier_bin[0] + crop_offset(ix, nx)) as f64 / w as f64;
                let d = [fx - c[0], fy - c[1]];
                let wgt = window::weight(
                    d[0].hypot(d[1]),
                    s.window_radius_cycles_per_px,
                    s.window_edge,
                );
                if wgt == 0.0 {
                    continue;
                }
                let ap = sinc(s.fill_factor * wrap(fx)) * sinc(s.fill_factor * wrap(fy));
                // Undo propagation by +dz after the tilt is removed (docs/decoding.md):
                // exp(-i (kz - k) dz), kz = sqrt(k^2 - (2 pi q)^2), q in cycles/um.
                let q = [d[0] / fp - ft[0], d[1] / fp - ft[1]];
                let kt2 = (2.0 * PI).powi(2) * (q[0] * q[0] + q[1] * q[1]);
                let prop = if dz == 0.0 {
                    Complex64::new(1.0, 0.0)
                } else if kt2 < k * k {
                    let kz = (k * k - kt2).sqrt();
                    Complex64::from_polar(1.0, -(kz - k) * dz)
                } else {
                    Complex64::default()
                };
                filter[iy * nx + ix] = prop * (wgt * norm / ap.max(1e-3));
            }
        }
        self.filter = filter;
    }

    /// Real-space factor: carrier remainder (phase reference at the region's centre pixel),
    /// tilt `exp(-i k (tx x + ty y))`, and 1 / |R|.
    fn build_factor(&mut self) {
        let s = &self.spec;
        let [_, _, w, h] = s.region;
        let (nx, ny) = s.grid_px;
        let c = s.carrier_cycles_per_px;
        let kc = self.carrier_bin;
        let rc = [(w / 2) as f64, (h / 2) as f64];
        let k = 2.0 * PI / (s.wavelength_nm * 1e-3);
        let t = [
            s.alignment.tilt_mrad[0] * 1e-3,
            s.alignment.tilt_mrad[1] * 1e-3,
        ];
        let mut factor = vec![Complex64::default(); nx * ny];
        for jy in 0..ny {
            let ry = jy as f64 * h as f64 / ny as f64;
            for jx in 0..nx {
                let rx = jx as f64 * w as f64 / nx as f64;
                let carrier_phase = 2.0
                    * PI
                    * (kc[0] as f64 / w as f64 * rx + kc[1] as f64 / h as f64 * ry
                        - c[0] * (rx - rc[0])
                        - c[1] * (ry - rc[1]));
                let (x_um, y_um) = (self.grid.x_um(jx), self.grid.y_um(jy));
                let tilt_phase = -k * (t[0] * x_um + t[1] * y_um);
                let r = match &s.reference {
                    RefAmplitude::Constant(a) => *a,
                    RefAmplitude::Map(m) => m[jy * nx + jx],
                };
                factor[jy * nx + jx] =
                    Complex64::from_polar(1.0 / r.max(1e-300), carrier_phase + tilt_phase);
            }
        }
        self.factor = factor;
    }

    /// The same plan with another tilt / defocus (e.g. zero, for a calibrator that fits them).
    pub fn with_alignment(&self, alignment: &Alignment) -> DecodePlan {
        let mut p = self.clone();
        p.spec.alignment = *alignment;
        p.build_filter();
        p.build_factor();
        p
    }

    /// The same plan with another reference amplitude.
    pub fn with_reference(&self, reference: RefAmplitude) -> DecodePlan {
        let mut p = self.clone();
        p.spec.reference = reference;
        p.build_factor();
        p
    }

    /// Number of decoded pixels (ny * nx).
    pub fn len(&self) -> usize {
        self.spec.grid_px.0 * self.spec.grid_px.1
    }

    /// True for an empty grid (never, for a built plan).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Working memory for [`DecodePlan::decode`]; one per thread.
    pub fn scratch(&self) -> Scratch {
        let [_, _, w, h] = self.spec.region;
        let (nx, ny) = self.spec.grid_px;
        let iscr = self
            .ifft_x
            .get_inplace_scratch_len()
            .max(self.ifft_y.get_inplace_scratch_len());
        Scratch {
            row: vec![0.0; w],
            spec: vec![Complex32::default(); w / 2 + 1],
            rscratch: vec![Complex32::default(); self.rfft.get_scratch_len()],
            cols: vec![Complex32::default(); nx * col_stride(h)],
            cscratch: vec![Complex32::default(); self.cfft.get_inplace_scratch_len()],
            crop: vec![Complex64::default(); nx * ny],
            tmp: vec![Complex64::default(); ny * INV_COLS],
            iscratch: vec![Complex64::default(); iscr],
        }
    }

    /// The cropped spectrum `[iy][ix]` (FFT order around the carrier's integer bin) of the
    /// background-subtracted region of `frame` (a full frame), before the filter; left in
    /// `s` and returned.
    pub fn cropped_spectrum<'s>(&self, frame: &[f32], s: &'s mut Scratch) -> &'s [Complex64] {
        let [x0, y0, w, h] = self.spec.region;
        let fw = self.spec.frame_width;
        let nx = self.spec.grid_px.0;
        let cs = col_stride(h);
        let bg = &self.spec.background;
        for y in 0..h {
            let src = &frame[(y0 + y) * fw + x0..][..w];
            if bg.is_empty() {
                s.row.copy_from_slice(src);
            } else {
                let b = &bg[y * w..][..w];
                for ((r, &v), &b) in s.row.iter_mut().zip(src).zip(b) {
                    *r = v - b;
                }
            }
            // forward FFT, sign -i (docs/conventions.md): exp(+i 2 pi f x) peaks at +f
            self.rfft
                .process_with_scratch(&mut s.row, &mut s.spec, &mut s.rscratch)
                .expect("buffer sizes match the plan");
            for (ix, &(k, conj)) in self.cols.iter().enumerate() {
                let v = s.spec[k];
                s.cols[ix * cs + y] = if conj { v.conj() } else { v };
            }
        }
        for ix in 0..nx {
            let col = &mut s.cols[ix * cs..ix * cs + h];
            self.cfft.process_with_scratch(col, &mut s.cscratch);
            for (iy, &ky) in self.rows.iter().enumerate() {
                let v = col[ky];
                s.crop[iy * nx + ix] = Complex64::new(v.re as f64, v.im as f64);
            }
        }
        &s.crop
    }

    /// Decode one full frame into `out` (ny * nx, row-major `[y][x]`) on [`DecodePlan::grid`].
    pub fn decode(&self, frame: &[f32], s: &mut Scratch, out: &mut [Complex64]) {
        self.cropped_spectrum(frame, s);
        for (c, f) in s.crop.iter_mut().zip(&self.filter) {
            *c *= f;
        }
        self.inverse_in_place(s);
        for ((o, c), f) in out.iter_mut().zip(&s.crop).zip(&self.factor) {
            *o = c * f;
        }
    }

    /// Unnormalised 2-D inverse FFT (sign +i) of `s.crop`, in place.
    fn inverse_in_place(&self, s: &mut Scratch) {
        let (nx, ny) = self.spec.grid_px;
        for row in s.crop.chunks_exact_mut(nx) {
            self.ifft_x.process_with_scratch(row, &mut s.iscratch);
        }
        // Columns in groups of INV_COLS (one cache line of the row-major crop per row).
        let mut ix0 = 0;
        while ix0 < nx {
            let m = INV_COLS.min(nx - ix0);
            for iy in 0..ny {
                let src = &s.crop[iy * nx + ix0..][..m];
                for (j, &v) in src.iter().enumerate() {
                    s.tmp[j * ny + iy] = v;
                }
            }
            for col in s.tmp[..m * ny].chunks_exact_mut(ny) {
                self.ifft_y.process_with_scratch(col, &mut s.iscratch);
            }
            for iy in 0..ny {
                let dst = &mut s.crop[iy * nx + ix0..][..m];
                for (j, d) in dst.iter_mut().enumerate() {
                    *d = s.tmp[j * ny + iy];
                }
            }
            ix0 += m;
        }
    }
}
