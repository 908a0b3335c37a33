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
//! Band and extent. `f_m` is the half-width of the box holding all but 1e-8 of the basis
//! power spectrum; the band is `f_B = 1.2 f_m + |f_t| + 0.1 f_m` with `f_t` the fields'
//! spectral centroid (a residual tilt t moves the spectrum by t / lambda,
//! docs/conventions.md), room for a 20 % scale change and for the tilt search. `r_m` is the
//! radius around the start centre holding all but 1e-8 of the basis power; the grid covers
//! the disk of radius `r_m + 0.15 a + |c_0 - c_s| + (|dz_s| + 4 lambda / NA^2) lambda f_m`
//! around the fields' centroid `c_0` (start centre `c_s`, core radius `a`): room for the
//! centre search and for the spreading of the modes over the defocus search.
use super::objective::{freq, Fft2};
use crate::grid::{Alignment, Grid};
use ndarray::{linalg::general_mat_mul, Array2, Array3, ArrayView3, Axis};
use num_complex::Complex64;
use rayon::prelude::*;

/// Part of the basis power allowed outside the band and outside the compact grid.
const TAIL: f64 = 1e-8;

/// Physical context the extent of the compact grid depends on.
#[derive(Debug, Clone, Copy)]
pub struct Extent {
    pub wavelength_nm: f64,
    pub core_radius_um: f64,
    pub na: f64,
    /// Half-width of the defocus search around the start, micrometres.
    pub defocus_range_um: f64,
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
    /// Centroid of the fields' power (pixels above 5 % of the peak), um.
    pub centroid_um: Option<[f64; 2]>,
    /// Tilt from the fields' spectral centroid, mrad.
    pub tilt_start_mrad: Option<[f64; 2]>,
    /// Box the basis centre may move in without leaving the grid: [lo, hi] per axis, um.
    pub center_bounds_um: [[f64; 2]; 2],
    /// Largest |tilt| per axis that keeps the tilted modes inside the band, mrad.
    pub tilt_max_mrad: f64,
}

/// Smallest even n >= m whose prime factors are 2, 3 and 5 (fast FFT sizes).
fn smooth_even(m: usize) -> usize {
    let mut n = m.max(2);
    loop {
        if n.is_multiple_of(2) {
            let mut k = n;
            for p in [2, 3, 5] {
                while k.is_multiple_of(p) {
                    k /= p;
                }
            }
            if k == 1 {
                return n;
            }
        }
        n += 1;
    }
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
    /// Resample `fields` (frames x ny x nx on `grid`) for a basis `basis` (modes x ny x nx,
    /// sampled on `grid` at the start's geometry `start`).
    pub fn new(
        fields: ArrayView3<Complex64>,
        grid: &Grid,
        basis: ArrayView3<Complex64>,
        start: &Alignment,
        ext: &Extent,
    ) -> Compact {
        let (nf, ny, nx) = fields.dim();
        assert_eq!((ny, nx), (grid.ny, grid.nx), "fields must lie on the grid");
        let fft = Fft2::new(ny, nx);
        let da = grid.pixel_area_um2();
        let wl_um = ext.wavelength_nm * 1e-3;

        // The basis: spatial and spectral extent.
        let (mode_power, mode_spectrum) = basis
            .axis_iter(Axis(0))
            .into_par_iter()
            .fold(
                || {
                    (
                        vec![0.0; grid.len()],
                        vec![0.0; grid.len()],
                        vec![Complex64::new(0.0, 0.0); fft.scratch_len()],
                        vec![Complex64::new(0.0, 0.0); grid.len()],
                    )
                },
                |(mut p, mut s, mut scratch, mut work), m| {
                    for ((o, w), z) in p.iter_mut().zip(work.iter_mut()).zip(m.iter()) {
                        *o += z.norm_sqr();
                        *w = *z;
                    }
                    fft.forward(&mut work, &mut scratch);
                    for (o, z) in s.iter_mut().zip(&work) {
                        *o += z.norm_sqr();
                    }
                    (p, s, scratch, work)
                },
            )
            .map(|(p, s, _, _)| (p, s))
            .reduce(
                || (vec![0.0; grid.len()], vec![0.0; grid.len()]),
                |(mut a, mut b), (c, d)| {
                    a.iter_mut().zip(&c).for_each(|(x, y)| *x += y);
                    b.iter_mut().zip(&d).for_each(|(x, y)| *x += y);
                    (a, b)
                },
            );
        let f_nyq = 0.5 / grid.pitch_um;
        let f_m = band_half_width(&mode_spectrum, grid, TAIL).min(f_nyq);
        let r_m = {
            let mut v: Vec<(f64, f64)> = mode_power
                .iter()
                .enumerate()
                .map(|(i, &p)| {
                    let dx = grid.x_um(i % nx) - start.center_um[0];
                    let dy = grid.y_um(i / nx) - start.center_um[1];
                    (dx.hypot(dy), p)
                })
                .collect();
            outer_radius(&mut v, TAIL)
        };

        // The fields: spectra, power per frame, power map and power spectrum.
        let spectra: Vec<(Vec<Complex64>, f64, Vec<f64>)> = fields
            .axis_iter(Axis(0))
            .into_par_iter()
            .map_init(
                || vec![Complex64::new(0.0, 0.0); fft.scratch_len()],
                |scratch, f| {
                    let mut d: Vec<Complex64> = f.iter().copied().collect();
                    let p: f64 = d.iter().map(|z| z.norm_sqr()).sum::<f64>() * da;
                    let map: Vec<f64> = d.iter().map(|z| z.norm_sqr()).collect();
                    fft.forward(&mut d, scratch);
                    (d, p, map)
                },
            )
            .collect();
        let frame_power: Vec<f64> = spectra.iter().map(|s| s.1).collect();
        let mut power_map = vec![0.0; grid.len()];
        let mut power_spec = vec![0.0; grid.len()];
        for (d, _, map) in &spectra {
            power_map.iter_mut().zip(map).for_each(|(a, b)| *a += b);
            power_spec
                .iter_mut()
                .zip(d)
                .for_each(|(a, z)| *a += z.norm_sqr());
        }
        let centroid_um = super::fit::centroid_um(&power_map, grid, 0.05);
        let f_t = spectral_centroid(&power_spec, grid);
        let tilt_start_mrad = f_t.map(|f| [1e3 * wl_um * f[0], 1e3 * wl_um * f[1]]);

        // Band and pitch.
        let ft_abs = f_t.map(|f| f[0].abs().max(f[1].abs())).unwrap_or(0.0);
        let f_b = (1.3 * f_m + ft_abs).min(f_nyq);
        let pitch_um = if f_b >= f_nyq || f_b <= 0.0 {
            grid.pitch_um
        } else {
            (0.5 / f_b).max(grid.pitch_um)
        };
        // Extent.
        let c_crop = centroid_um.unwrap_or(start.center_um);
        let shift = (c_crop[0] - start.center_um[0]).hypot(c_crop[1] - start.center_um[1]);
        let dof = wl_um / (ext.na * ext.na).max(1e-12);
        let spread = (start.defocus_um.abs() + ext.defocus_range_um.max(4.0 * dof))
            * wl_um
            * f_m.max(ext.na / wl_um);
        let radius = r_m + 0.15 * ext.core_radius_um + shift + spread;
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
                c_crop[0] - (ncx / 2) as f64 * pitch_um,
                c_crop[1] - (ncy / 2) as f64 * pitch_um,
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
        let mut out = Array3::<Complex64>::zeros((nf, ncy, ncx));
        out.axis_iter_mut(Axis(0))
            .into_par_iter()
            .zip(spectra.par_iter())
            .for_each(|(mut o, (d, _, _))| {
                let t = Array2::from_shape_fn((ky.len(), kx.len()), |(a, b)| {
                    d[ky[a] * nx + kx[b]] * norm
                });
                let mut a = Array2::<Complex64>::zeros((ncy, kx.len()));
                general_mat_mul(
                    Complex64::new(1.0, 0.0),
                    &ey,
                    &t,
                    Complex64::new(0.0, 0.0),
                    &mut a,
                );
                general_mat_mul(
                    Complex64::new(1.0, 0.0),
                    &a,
                    &ext_t,
                    Complex64::new(0.0, 0.0),
                    &mut o,
                );
            });

        let free = (radius - r_m - spread).max(0.0);
        let lim = |c: f64, n: usize, o: f64| -> [f64; 2] {
            let lo = o + (r_m).min(n as f64 * pitch_um / 2.0);
            let hi = o + n as f64 * pitch_um - r_m.min(n as f64 * pitch_um / 2.0);
            [(c - free).max(lo).min(c), (c + free).min(hi).max(c)]
        };
        let center_bounds_um = [
            lim(c_crop[0], ncx, cgrid.origin_um[0]),
            lim(c_crop[1], ncy, cgrid.origin_um[1]),
        ];
        let f_band = 0.5 / pitch_um;
        let tilt_max_mrad = (1e3 * wl_um * (f_band - f_m))
            .max(1.5e3 * wl_um * ft_abs)
            .max(1e-3);
        Compact {
            fields: out,
            grid: cgrid,
            frame_power,
            fine_pixels: grid.len(),
            band_cycles_per_um: f_b,
            mode_band_cycles_per_um: f_m,
            centroid_um,
            tilt_start_mrad,
            center_bounds_um,
            tilt_max_mrad,
        }
    }

    /// sum of the frames' power on the decoding grid.
    pub fn total_power(&self) -> f64 {
        self.frame_power.iter().sum()
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
            core_radius_um: 8.0,
            na: 0.12,
            defocus_range_um: 20.0,
        };
        let c = Compact::new(fields.view(), &grid, basis.view(), &start, &ext);
        assert!(c.grid.len() * 2 < grid.len(), "{:?}", c.grid);
        assert!(c.grid.pitch_um > grid.pitch_um);
        let t = c.tilt_start_mrad.unwrap();
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
