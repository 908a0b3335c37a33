//! Compact fields for the alignment fit: the decoded fields resampled onto the coarsest,
//! smallest grid that still holds every mode of the basis wherever the fit may move it.
//!
//! Contract. [`Compact::new`] takes one channel's decoded fields (frames x ny x nx on the
//! decoding grid) and the basis sampled on that grid at the starting geometry, and returns
//! the fields on a square-pixel grid of pitch `p <= 1 / (2 f_B)` that covers a disk around
//! the pattern, plus each frame's power on the *decoding* grid (the captured fraction's
//! denominator, so light outside the compact grid still counts as not captured). Overlaps
//! `<phi, F> = sum conj(phi) F dA` of any mode `phi` whose spectrum lies in the box
//! `|f_x|, |f_y| < f_B` and that is negligible outside the compact grid are the same on both
//! grids (to the truncated tails, below 1e-8 of the basis power).
//!
//! Why. Let `L` be `F` low-passed to the box `|f| < f_B` (trigonometric interpolation of the
//! decoding grid's samples restricted to the band). A mode inside the band is orthogonal
//! to the rest of `F`, so `<phi, F> = <phi, L>`. The product `conj(phi) L` has its spectrum
//! inside `|f| < 2 f_B`, so by the Poisson summation formula its lattice sum at pitch
//! `p < 1 / (2 f_B)` times `p^2` equals its integral (Bracewell, The Fourier Transform and
//! Its Applications, 3rd ed., ch. 10, sampling theorem); the lattice points outside the
//! compact grid carry no mode power. The same argument keeps the modes' normalisation.
//!
//! Band and extent. `f_m(tail)` is the half-width of the box holding all but `tail` of the
//! basis power spectrum and `r_m(tail)` the radius around the basis centre holding all but
//! `tail` of its power ([`BasisExtent`]); modes near cut-off have long evanescent tails, so
//! the tail sets the trade between size and fidelity (the fit searches on a loose grid
//! and refines on a tight one). The band is `f_B = 1.3 f_m + |f_t| + f_s`, with `f_t` the
//! fields' spectral centroid (a residual tilt t moves the spectrum by t / lambda,
//! docs/conventions.md) and `f_s` the caller's room for the tilt search: room for a 20 %
//! scale change and for a carrier that is a few FFT bins off. The grid
//! covers the disk of radius `r_m + margin + max |c - c_0| + (max |dz| + dz_margin) lambda f_B`
//! around its centre `c_0`, the maxima over the alignments it must hold: room for the
//! centre search and for the spreading of the defocused modes.
use super::objective::{captured_total, freq, overlap_power_per_frame, Fft2, Reduced};
use crate::grid::{Alignment, Grid};
use crate::synth::fft2::smooth_size;
use ndarray::{linalg::general_mat_mul, Array2, Array3, ArrayView3, Axis};
use num_complex::Complex64;
use rayon::prelude::*;

/// What the compact grid must hold.
#[derive(Debug, Clone)]
pub struct Extent {
    pub wavelength_nm: f64,
    /// Centre of the grid, um; None: the fields' power centroid (or the first alignment's
    /// centre when the fields are empty).
    pub center_um: Option<[f64; 2]>,
    /// Alignments whose modes must fit on the grid (centre and defocus).
    pub around: Vec<Alignment>,
    /// Room for the centre search beyond those centres, um.
    pub center_margin_um: f64,
    /// Room for the defocus search beyond those defocus values, um.
    pub defocus_margin_um: f64,
    /// Part of the basis power allowed outside the band and outside the grid.
    pub tail: f64,
    /// Extra band for the tilt search beyond the fields' spectral centroid, cycles/um.
    pub tilt_margin_cycles_per_um: f64,
}

/// The decoded fields' spectra and power figures, computed once per channel.
pub struct FineFields {
    pub grid: Grid,
    /// 2-D FFT of each frame (FFT bin order).
    spectra: Vec<Vec<Complex64>>,
    /// Each frame's power sum |F|^2 dA.
    pub frame_power: Vec<f64>,
    /// Centroid of the summed power (pixels above 5 % of the peak), um.
    pub centroid_um: Option<[f64; 2]>,
    /// Centroid of the summed power spectrum (bins above 1 % of the peak), cycles/um.
    pub spectral_centroid: Option<[f64; 2]>,
}

impl FineFields {
    pub fn new(fields: ArrayView3<Complex64>, grid: &Grid) -> FineFields {
        let (_, ny, nx) = fields.dim();
        assert_eq!((ny, nx), (grid.ny, grid.nx), "fields must lie on the grid");
        let fft = Fft2::new(ny, nx);
        let da = grid.pixel_area_um2();
        let per: Vec<(Vec<Complex64>, f64)> = fields
            .axis_iter(Axis(0))
            .into_par_iter()
            .map_init(
                || vec![Complex64::new(0.0, 0.0); fft.scratch_len()],
                |scratch, f| {
                    let mut d: Vec<Complex64> = f.iter().copied().collect();
                    let p: f64 = d.iter().map(|z| z.norm_sqr()).sum::<f64>() * da;
                    fft.forward(&mut d, scratch);
                    (d, p)
                },
            )
            .collect();
        let mut power_map = vec![0.0; grid.len()];
        for f in fields.axis_iter(Axis(0)) {
            power_map
                .iter_mut()
                .zip(f.iter())
                .for_each(|(a, z)| *a += z.norm_sqr());
        }
        let mut power_spec = vec![0.0; grid.len()];
        for (d, _) in &per {
            power_spec
                .iter_mut()
                .zip(d)
                .for_each(|(a, z)| *a += z.norm_sqr());
        }
        FineFields {
            grid: *grid,
            centroid_um: super::fit::centroid_um(&power_map, grid, 0.05),
            spectral_centroid: spectral_centroid(&power_spec, grid),
            frame_power: per.iter().map(|x| x.1).collect(),
            spectra: per.into_iter().map(|x| x.0).collect(),
        }
    }

    /// Tilt from the spectral centroid, mrad.
    pub fn tilt_start_mrad(&self, wavelength_nm: f64) -> Option<[f64; 2]> {
        let wl_um = wavelength_nm * 1e-3;
        self.spectral_centroid
            .map(|f| [1e3 * wl_um * f[0], 1e3 * wl_um * f[1]])
    }
}

/// Power map and power spectrum of the basis sampled on the decoding grid, for its extent.
pub struct BasisExtent {
    grid: Grid,
    center_um: [f64; 2],
    power: Vec<f64>,
    spectrum: Vec<f64>,
}

/// Modes per work item when summing a basis' power and spectrum (fixed, so the sum order is).
const EXTENT_CHUNK_MODES: usize = 4;

impl BasisExtent {
    /// `basis` (modes x ny x nx) sampled on `grid` with its axis at `center_um`.
    pub fn new(basis: ArrayView3<Complex64>, grid: &Grid, center_um: [f64; 2]) -> BasisExtent {
        let fft = Fft2::new(grid.ny, grid.nx);
        let zero = || (vec![0.0; grid.len()], vec![0.0; grid.len()]);
        // Fixed groups of modes summed in parallel, the partial sums added in group order,
        // so the result does not depend on the number of threads.
        let n_modes = basis.dim().0;
        let starts: Vec<usize> = (0..n_modes).step_by(EXTENT_CHUNK_MODES).collect();
        let parts: Vec<(Vec<f64>, Vec<f64>)> = starts
            .into_par_iter()
            .map(|start| {
                let (mut p, mut s) = zero();
                let mut scratch = vec![Complex64::new(0.0, 0.0); fft.scratch_len()];
                let mut work = vec![Complex64::new(0.0, 0.0); grid.len()];
                let end = (start + EXTENT_CHUNK_MODES).min(n_modes);
                for k in start..end {
                    let m = basis.index_axis(Axis(0), k);
                    for ((o, w), z) in p.iter_mut().zip(work.iter_mut()).zip(m.iter()) {
                        *o += z.norm_sqr();
                        *w = *z;
                    }
                    fft.forward(&mut work, &mut scratch);
                    for (o, z) in s.iter_mut().zip(&work) {
                        *o += z.norm_sqr();
                    }
                }
                (p, s)
            })
            .collect();
        let (mut power, mut spectrum) = zero();
        for (c, d) in &parts {
            power.iter_mut().zip(c).for_each(|(x, y)| *x += y);
            spectrum.iter_mut().zip(d).for_each(|(x, y)| *x += y);
        }
        BasisExtent {
            grid: *grid,
            center_um,
            power,
            spectrum,
        }
    }

    /// f_m(tail), cycles/um (at most the grid's Nyquist frequency).
    pub fn band(&self, tail: f64) -> f64 {
        band_half_width(&self.spectrum, &self.grid, tail).min(0.5 / self.grid.pitch_um)
    }

    /// r_m(tail), um.
    pub fn radius(&self, tail: f64) -> f64 {
        let g = &self.grid;
        let mut v: Vec<(f64, f64)> = self
            .power
            .iter()
            .enumerate()
            .map(|(i, &p)| {
                let dx = g.x_um(i % g.nx) - self.center_um[0];
                let dy = g.y_um(i / g.nx) - self.center_um[1];
                (dx.hypot(dy), p)
            })
            .collect();
        outer_radius(&mut v, tail)
    }
}

/// One channel's fields on the compact grid (see the module header).
#[derive(Debug, Clone)]
pub struct Compact {
    /// (frames, ny, nx) on `grid`.
    pub fields: Array3<Complex64>,
    pub grid: Grid,
    /// Each frame's power sum |F|^2 dA on the decoding grid.
    pub frame_power: Vec<f64>,
    /// Pixels of the decoding grid.
    pub fine_pixels: usize,
    /// The band half-width f_B and the basis band f_m, cycles per micrometre.
    pub band_cycles_per_um: f64,
    pub mode_band_cycles_per_um: f64,
    /// Box the basis centre may move in without leaving the grid: [lo, hi] per axis, um.
    pub center_bounds_um: [[f64; 2]; 2],
    /// Largest |tilt| per axis that keeps the tilted modes inside the band, mrad.
    pub tilt_max_mrad: f64,
    /// Largest |defocus| the grid was sized for, um.
    pub defocus_limit_um: f64,
}

/// Smallest even n >= m whose prime factors are 2, 3 and 5 (fast FFT sizes).
fn smooth_even(m: usize) -> usize {
    let mut n = smooth_size(m.max(2));
    while !n.is_multiple_of(2) {
        n = smooth_size(n + 1);
    }
    n
}

/// Smallest box half-width (max(|fx|, |fy|)) holding all but `tail` of `power` (FFT order).
fn band_half_width(power: &[f64], grid: &Grid, tail: f64) -> f64 {
    let mut v: Vec<(f64, f64)> = power
        .iter()
        .enumerate()
        .map(|(i, &p)| {
            let fx = freq(i % grid.nx, grid.nx, grid.pitch_um).abs();
            let fy = freq(i / grid.nx, grid.ny, grid.pitch_um).abs();
            (fx.max(fy), p)
        })
        .collect();
    outer_radius(&mut v, tail)
}

/// Given (distance, power) pairs, the smallest distance holding all but `tail` of the power.
fn outer_radius(v: &mut [(f64, f64)], tail: f64) -> f64 {
    let total: f64 = v.iter().map(|x| x.1).sum();
    if total <= 0.0 {
        return 0.0;
    }
    v.sort_by(|a, b| b.0.total_cmp(&a.0));
    let mut acc = 0.0;
    for &(d, p) in v.iter() {
        acc += p;
        if acc > tail * total {
            return d;
        }
    }
    0.0
}

impl Compact {
    /// Resample the fields of `fine` for a basis of extent `basis` onto a grid holding
    /// `ext`.
    pub fn new(fine: &FineFields, basis: &BasisExtent, ext: &Extent) -> Compact {
        let grid = &fine.grid;
        let (ny, nx) = (grid.ny, grid.nx);
        let wl_um = ext.wavelength_nm * 1e-3;
        let f_nyq = 0.5 / grid.pitch_um;
        let f_m = basis.band(ext.tail);
        let r_m = basis.radius(ext.tail);

        // Band and pitch.
        let ft_abs = fine
            .spectral_centroid
            .map(|f| f[0].abs().max(f[1].abs()))
            .unwrap_or(0.0);
        let f_b = (1.3 * f_m + ft_abs + ext.tilt_margin_cycles_per_um.max(0.0)).min(f_nyq);
        let pitch_um = if f_b >= f_nyq || f_b <= 0.0 {
            grid.pitch_um
        } else {
            (0.5 / f_b).max(grid.pitch_um)
        };
        // Extent.
        let first = ext.around.first().copied().unwrap_or_default();
        let c0 = ext
            .center_um
            .or(fine.centroid_um)
            .unwrap_or(first.center_um);
        let shift = ext
            .around
            .iter()
            .map(|a| (a.center_um[0] - c0[0]).hypot(a.center_um[1] - c0[1]))
            .fold(0.0, f64::max);
        let dz = ext
            .around
            .iter()
            .map(|a| a.defocus_um.abs())
            .fold(0.0, f64::max);
        let spread = (dz + ext.defocus_margin_um) * wl_um * f_b;
        let radius = r_m + ext.center_margin_um + shift + spread;
        let fov_x = nx as f64 * grid.pitch_um;
        let fov_y = ny as f64 * grid.pitch_um;
        let n_for = |fov: f64| {
            let want = (2.0 * radius).min(fov);
            smooth_even((want / pitch_um).ceil() as usize + 1)
        };
        let (ncx, ncy) = (n_for(fov_x), n_for(fov_y));
        let cgrid = Grid {
            nx: ncx,
            ny: ncy,
            pitch_um,
            origin_um: [
                c0[0] - (ncx / 2) as f64 * pitch_um,
                c0[1] - (ncy / 2) as f64 * pitch_um,
            ],
        };

        // Trigonometric interpolation of the band onto the compact grid, separable:
        // L(x_i, y_j) = (1/N) sum_ky sum_kx Ey[j, ky] F^[ky, kx] Ex[i, kx],
        // E[., k] = exp(+i 2 pi f_k (x - x_0)), x_0 the decoding grid's first sample.
        let band = |n: usize| -> Vec<usize> {
            (0..n)
                .filter(|&k| {
                    freq(k, n, grid.pitch_um).abs() <= f_b && !(n.is_multiple_of(2) && k == n / 2)
                })
                .collect()
        };
        let (kx, ky) = (band(nx), band(ny));
        let expo = |ks: &[usize], n: usize, m: usize, pos: &dyn Fn(usize) -> f64| {
            Array2::from_shape_fn((m, ks.len()), |(i, j)| {
                let f = freq(ks[j], n, grid.pitch_um);
                Complex64::from_polar(1.0, std::f64::consts::TAU * f * pos(i))
            })
        };
        let ex = expo(&kx, nx, ncx, &|i| cgrid.x_um(i) - grid.x_um(0));
        let ey = expo(&ky, ny, ncy, &|j| cgrid.y_um(j) - grid.y_um(0));
        let ext_t = ex.t().to_owned();
        let norm = 1.0 / grid.len() as f64;
        let nf = fine.spectra.len();
        let mut out = Array3::<Complex64>::zeros((nf, ncy, ncx));
        out.axis_iter_mut(Axis(0))
            .into_par_iter()
            .zip(fine.spectra.par_iter())
            .for_each(|(mut o, d)| {
                let t = Array2::from_shape_fn((ky.len(), kx.len()), |(a, b)| {
                    d[ky[a] * nx + kx[b]] * norm
                });
                let mut a = Array2::<Complex64>::zeros((ncy, kx.len()));
                let (one, zero) = (Complex64::new(1.0, 0.0), Complex64::new(0.0, 0.0));
                general_mat_mul(one, &ey, &t, zero, &mut a);
                general_mat_mul(one, &a, &ext_t, zero, &mut o);
            });

        let free = (radius - r_m - spread).max(0.0);
        let lim = |c: f64, n: usize, o: f64| -> [f64; 2] {
            let half = n as f64 * pitch_um / 2.0;
            let lo = o + r_m.min(half);
            let hi = o + n as f64 * pitch_um - r_m.min(half);
            [(c - free).max(lo).min(c), (c + free).min(hi).max(c)]
        };
        let center_bounds_um = [
            lim(c0[0], ncx, cgrid.origin_um[0]),
            lim(c0[1], ncy, cgrid.origin_um[1]),
        ];
        let f_band = 0.5 / pitch_um;
        let tilt_max_mrad = (1e3 * wl_um * (f_band - f_m))
            .max(1.5e3 * wl_um * ft_abs)
            .max(1e-3);
        Compact {
            fields: out,
            grid: cgrid,
            frame_power: fine.frame_power.clone(),
            fine_pixels: grid.len(),
            band_cycles_per_um: f_b,
            mode_band_cycles_per_um: f_m,
            center_bounds_um,
            tilt_max_mrad,
            defocus_limit_um: dz + ext.defocus_margin_um,
        }
    }

    /// Power-weighted captured fraction over the frames for modes on the compact grid (from
    /// [`super::objective::Objective::corrected_modes`]): overlaps here, each frame's power
    /// on the decoding grid.
    pub fn captured(&self, modes: &[Vec<Complex64>]) -> f64 {
        let per: Vec<(f64, f64)> = overlap_power_per_frame(self.fields.view(), &self.grid, modes)
            .into_iter()
            .zip(&self.frame_power)
            .map(|(num, &p)| (if p > 0.0 { num / p } else { 0.0 }, p))
            .collect();
        captured_total(&per)
    }

    /// The compact fields reduced to at most `rank` principal components, with the decoding
    /// grid's total power as the objective's denominator.
    pub fn reduce(&self, wavelength_nm: f64, rank: usize) -> Reduced {
        let mut r = Reduced::new(self.fields.view(), &self.grid, wavelength_nm, rank);
        r.total = self.total_power();
        r
    }

    /// Sum of the frames' power on the decoding grid.
    pub fn total_power(&self) -> f64 {
        self.frame_power.iter().sum()
    }

    /// True when the grid holds the modes at `a`: its centre strictly inside the centre
    /// bounds and |defocus| within the defocus the grid was sized for (callers rebuild the
    /// grid around `a` otherwise).
    pub fn holds(&self, a: &Alignment) -> bool {
        let b = &self.center_bounds_um;
        let inside = |v: f64, r: [f64; 2]| v > r[0] && v < r[1];
        inside(a.center_um[0], b[0])
            && inside(a.center_um[1], b[1])
            && a.defocus_um.abs() <= self.defocus_limit_um
    }
}

/// Centroid (cycles/um) of a power spectrum (FFT order) over bins above 1 % of its peak.
fn spectral_centroid(power: &[f64], grid: &Grid) -> Option<[f64; 2]> {
    let peak = power.iter().cloned().fold(0.0, f64::max);
    if peak.is_nan() || peak <= 0.0 {
        return None;
    }
    let (mut s, mut fx, mut fy) = (0.0, 0.0, 0.0);
    for (i, &p) in power.iter().enumerate() {
        if p > 0.01 * peak {
            s += p;
            fx += p * freq(i % grid.nx, grid.nx, grid.pitch_um);
            fy += p * freq(i / grid.nx, grid.ny, grid.pitch_um);
        }
    }
    Some([fx / s, fy / s])
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::align::analytic::{hg_fields, sample_hg};

    #[test]
    fn smooth_sizes() {
        assert_eq!(smooth_even(1), 2);
        assert_eq!(smooth_even(7), 8);
        assert_eq!(smooth_even(49), 50);
        assert_eq!(smooth_even(98), 100);
        assert_eq!(smooth_even(121), 128);
    }

    /// Overlaps on the compact grid equal those on the decoding grid (sampling theorem,
    /// Bracewell, The Fourier Transform and Its Applications, ch. 10), for modes moved and
    /// tilted within the compact grid's bounds.
    #[test]
    fn overlaps_survive_the_resampling() {
        let grid = Grid::centred(96, 96, 0.4);
        let truth = Alignment {
            center_um: [1.5, -1.0],
            tilt_mrad: [4.0, -3.0],
            defocus_um: 6.0,
            ..Default::default()
        };
        let (fields, _) = hg_fields(&grid, 3, 4.0, &truth, 1064.0, 12, 0.05, 5);
        let idx: Vec<(usize, usize)> = (0..3)
            .flat_map(|g| (0..=g).map(move |n| (n, g - n)))
            .collect();
        let start = Alignment::default();
        let basis = sample_hg(&grid, &start, &idx, 4.0);
        let ext = Extent {
            wavelength_nm: 1064.0,
            center_um: None,
            around: vec![start],
            center_margin_um: 1.2,
            defocus_margin_um: 20.0,
            tail: 1e-8,
            tilt_margin_cycles_per_um: 0.0,
        };
        let fine = FineFields::new(fields.view(), &grid);
        let c = Compact::new(
            &fine,
            &BasisExtent::new(basis.view(), &grid, start.center_um),
            &ext,
        );
        assert!(c.grid.len() * 2 < grid.len(), "{:?}", c.grid);
        assert!(c.grid.pitch_um > grid.pitch_um);
        let t = fine.tilt_start_mrad(1064.0).unwrap();
        assert!(
            (t[0] - 4.0).abs() < 1.0 && (t[1] + 3.0).abs() < 1.0,
            "{t:?}"
        );
        // a probe alignment inside the bounds
        let probe = Alignment {
            center_um: [1.0, -0.5],
            tilt_mrad: [3.0, -2.0],
            ..Default::default()
        };
        let ov = |g: &Grid, f: ndarray::ArrayView3<Complex64>| -> Vec<Complex64> {
            let mut b = sample_hg(g, &probe, &idx, 4.0);
            for mut m in b.axis_iter_mut(Axis(0)) {
                let mut v: Vec<Complex64> = m.iter().copied().collect();
                super::super::objective::apply_tilt(&mut v, g, 1064.0, probe.tilt_mrad, 1.0);
                m.iter_mut().zip(v).for_each(|(o, x)| *o = x);
            }
            let mut out = Vec::new();
            for fr in f.axis_iter(Axis(0)) {
                for m in b.axis_iter(Axis(0)) {
                    let s: Complex64 = m.iter().zip(fr.iter()).map(|(a, b)| a.conj() * b).sum();
                    out.push(s * g.pixel_area_um2());
                }
            }
            out
        };
        let fine = ov(&grid, fields.view());
        let coarse = ov(&c.grid, c.fields.view());
        let scale = fine.iter().map(|z| z.norm()).fold(0.0, f64::max);
        for (a, b) in fine.iter().zip(&coarse) {
            assert!((a - b).norm() < 1e-6 * scale, "{a} {b}");
        }
        let p: f64 = fields.iter().map(|z| z.norm_sqr()).sum::<f64>() * grid.pixel_area_um2();
        assert!((c.total_power() - p).abs() < 1e-9 * p);
    }
}
