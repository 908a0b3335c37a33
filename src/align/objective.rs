//! The alignment objective: the fraction of the fields' power that the mode basis captures,
//! as a function of the channel's alignment (centre, rotation, scale, tilt, defocus).
//!
//! Contract. Inputs are decoded fields `F` (frames x ny x nx, `[frame, row, col]`) on a
//! [`Grid`], carrier removed, with **no** tilt or defocus correction applied, and a sampler
//! that returns the basis (modes x ny x nx) sampled at a *geometric* alignment (centre,
//! rotation, scale), each mode normalised to sum |psi|^2 dA = 1 on the grid.
//! [`Objective::captured`] returns
//!
//!   eta(a) = sum_f sum_k |<phi_k(a), F_f>|^2 / sum_f ||F_f||^2,  <g, h> = sum conj(g) h dA,
//!
//! where `phi_k(a) = M(+t) P(+dz) psi_k(center, rotation, scale)`. This is the captured
//! power of the decoder's corrected fields `P(-dz) M(-t) F` (docs/conventions.md: the signal
//! carries the tilt phase `exp(+i k t.r)` and was propagated by `+dz`; the decoder removes the
//! tilt, then propagates by `-dz`), because tilt and propagation are unitary: the
//! correction is applied to the few modes instead of the many fields.
//!
//! Speed: `sum_f |<phi, F_f>|^2 = phi^H (sum_f F_f F_f^H) phi` only needs the span of the
//! fields, so [`Reduced`] keeps the top `r` principal components `q_j = F v_j` (eigenvectors
//! `v_j` of the frames x frames Gram matrix `G = F^H F`); then
//! `sum_f |<phi, F_f>|^2 ~ sum_j |<phi, q_j>|^2`, exact when the fields' rank is <= r.
//!
//! Propagation: angular spectrum, `P(z)` multiplies the 2-D spectrum by
//! `exp(i (kz - k) z)`, `kz = sqrt(k^2 - (2 pi f)^2)` (Goodman, Introduction to Fourier Optics,
//! 3rd ed., section 3.10); evanescent components are set to zero. Periodic boundaries.
use crate::grid::{Alignment, Grid};
use ndarray::{linalg::general_mat_mul, Array2, Array3, ArrayView2, ArrayView3, Axis};
use num_complex::Complex64;
use rayon::prelude::*;
use rustfft::{Fft, FftPlanner};
use std::sync::Arc;

/// 2-D complex FFT on a row-major (ny, nx) buffer (rows, then columns). Forward uses
/// `exp(-i 2 pi k n / N)`, the inverse `exp(+i ...)` and divides by `nx ny`.
#[derive(Clone)]
pub struct Fft2 {
    pub ny: usize,
    pub nx: usize,
    fr: Arc<dyn Fft<f64>>,
    fc: Arc<dyn Fft<f64>>,
    ir: Arc<dyn Fft<f64>>,
    ic: Arc<dyn Fft<f64>>,
}

impl Fft2 {
    pub fn new(ny: usize, nx: usize) -> Fft2 {
        let mut p = FftPlanner::new();
        Fft2 {
            ny,
            nx,
            fr: p.plan_fft_forward(nx),
            fc: p.plan_fft_forward(ny),
            ir: p.plan_fft_inverse(nx),
            ic: p.plan_fft_inverse(ny),
        }
    }

    /// Scratch length callers must provide.
    pub fn scratch_len(&self) -> usize {
        self.ny.max(self.nx) * 2
            + self
                .fr
                .get_inplace_scratch_len()
                .max(self.fc.get_inplace_scratch_len())
                .max(self.ir.get_inplace_scratch_len())
                .max(self.ic.get_inplace_scratch_len())
    }

    fn run(&self, data: &mut [Complex64], scratch: &mut [Complex64], inverse: bool) {
        let (r, c) = if inverse {
            (&self.ir, &self.ic)
        } else {
            (&self.fr, &self.fc)
        };
        let (col, rest) = scratch.split_at_mut(self.ny);
        r.process_with_scratch(data, rest);
        for x in 0..self.nx {
            for y in 0..self.ny {
                col[y] = data[y * self.nx + x];
            }
            c.process_with_scratch(col, rest);
            for y in 0..self.ny {
                data[y * self.nx + x] = col[y];
            }
        }
        if inverse {
            let s = 1.0 / (self.nx * self.ny) as f64;
            data.iter_mut().for_each(|z| *z *= s);
        }
    }

    pub fn forward(&self, data: &mut [Complex64], scratch: &mut [Complex64]) {
        self.run(data, scratch, false)
    }

    pub fn inverse(&self, data: &mut [Complex64], scratch: &mut [Complex64]) {
        self.run(data, scratch, true)
    }
}

/// Frequency (cycles per micrometre) of FFT bin `i` of `n` at sample pitch `pitch_um`.
#[inline]
pub fn freq(i: usize, n: usize, pitch_um: f64) -> f64 {
    let k = if i < n.div_ceil(2) {
        i as f64
    } else {
        i as f64 - n as f64
    };
    k / (n as f64 * pitch_um)
}

/// Angular-spectrum propagation on a grid: `P(z)` multiplies the spectrum by
/// `exp(i (kz - k) z)` (see the module header).
#[derive(Clone)]
pub struct Propagator {
    pub fft: Fft2,
    /// `kz - k` per FFT bin, rad/um; NaN for evanescent bins.
    kz_minus_k: Vec<f64>,
}

impl Propagator {
    pub fn new(grid: &Grid, wavelength_nm: f64) -> Propagator {
        let k = 2.0 * std::f64::consts::PI / (wavelength_nm * 1e-3);
        let mut kz_minus_k = Vec::with_capacity(grid.len());
        for iy in 0..grid.ny {
            let fy = freq(iy, grid.ny, grid.pitch_um);
            for ix in 0..grid.nx {
                let fx = freq(ix, grid.nx, grid.pitch_um);
                let kt2 = (2.0 * std::f64::consts::PI).powi(2) * (fx * fx + fy * fy);
                kz_minus_k.push(if kt2 < k * k {
                    // kz - k computed without cancellation: -kt^2 / (kz + k).
                    -kt2 / ((k * k - kt2).sqrt() + k)
                } else {
                    f64::NAN
                });
            }
        }
        Propagator {
            fft: Fft2::new(grid.ny, grid.nx),
            kz_minus_k,
        }
    }

    /// `kz - k` per FFT bin (rad/um), NaN for evanescent bins.
    pub fn kz_minus_k(&self) -> &[f64] {
        &self.kz_minus_k
    }

    /// Multiply a spectrum (FFT bin order) by the transfer function of propagation by `z_um`.
    pub fn apply_transfer(&self, spectrum: &mut [Complex64], z_um: f64) {
        if z_um == 0.0 {
            return;
        }
        for (d, &q) in spectrum.iter_mut().zip(&self.kz_minus_k) {
            *d = if q.is_nan() {
                Complex64::new(0.0, 0.0)
            } else {
                *d * Complex64::from_polar(1.0, q * z_um)
            };
        }
    }

    /// Propagate `data` (row-major ny x nx) by `z_um` in place.
    pub fn propagate(&self, data: &mut [Complex64], z_um: f64, scratch: &mut [Complex64]) {
        if z_um == 0.0 {
            return;
        }
        self.fft.forward(data, scratch);
        self.apply_transfer(data, z_um);
        self.fft.inverse(data, scratch);
    }
}

/// Multiply `data` (row-major on `grid`) by `exp(i sign k (tx x + ty y))`, t in mrad.
pub fn apply_tilt(
    data: &mut [Complex64],
    grid: &Grid,
    wavelength_nm: f64,
    tilt_mrad: [f64; 2],
    sign: f64,
) {
    if tilt_mrad == [0.0, 0.0] {
        return;
    }
    let k = 2.0 * std::f64::consts::PI / (wavelength_nm * 1e-3);
    let ex: Vec<Complex64> = (0..grid.nx)
        .map(|c| Complex64::from_polar(1.0, sign * k * 1e-3 * tilt_mrad[0] * grid.x_um(c)))
        .collect();
    for r in 0..grid.ny {
        let ey = Complex64::from_polar(1.0, sign * k * 1e-3 * tilt_mrad[1] * grid.y_um(r));
        for (d, e) in data[r * grid.nx..(r + 1) * grid.nx].iter_mut().zip(&ex) {
            *d *= e * ey;
        }
    }
}

/// The decoder's correction of one field: remove the tilt, then propagate by `-dz`.
pub fn correct_field(
    data: &mut [Complex64],
    grid: &Grid,
    wavelength_nm: f64,
    prop: &Propagator,
    tilt_mrad: [f64; 2],
    defocus_um: f64,
    scratch: &mut [Complex64],
) {
    apply_tilt(data, grid, wavelength_nm, tilt_mrad, -1.0);
    prop.propagate(data, -defocus_um, scratch);
}

/// The fields reduced to their leading principal components (see the module header).
#[derive(Debug, Clone)]
pub struct Reduced {
    /// Weighted components `q_j = F v_j`, (r, ny * nx), strongest first.
    pub q: Array2<Complex64>,
    /// sum_f ||F_f||^2 (sum |F|^2 dA over every frame), the objective's denominator.
    pub total: f64,
    /// Part of `total` held by the kept components (1 = nothing lost).
    pub retained_fraction: f64,
    pub grid: Grid,
    pub wavelength_nm: f64,
    /// Number of frames reduced.
    pub frames: usize,
}

impl Reduced {
    /// Reduce `fields` (frames x ny x nx) to at most `rank` components.
    pub fn new(
        fields: ArrayView3<Complex64>,
        grid: &Grid,
        wavelength_nm: f64,
        rank: usize,
    ) -> Reduced {
        let (nf, ny, nx) = fields.dim();
        assert_eq!((ny, nx), (grid.ny, grid.nx), "fields must lie on the grid");
        let da = grid.pixel_area_um2();
        let flat: Vec<&[Complex64]> = fields
            .axis_iter(Axis(0))
            .map(|f| f.to_slice().expect("standard layout"))
            .collect::<Vec<_>>();
        let total: f64 = flat
            .iter()
            .map(|f| f.iter().map(|z| z.norm_sqr()).sum::<f64>())
            .sum::<f64>()
            * da;
        let rank = rank.max(1);
        if nf <= rank {
            let mut q = Array2::zeros((nf, ny * nx));
            for (i, f) in flat.iter().enumerate() {
                q.row_mut(i)
                    .assign(&ArrayView2::from_shape((1, ny * nx), f).unwrap().row(0));
            }
            return Reduced {
                q,
                total,
                retained_fraction: 1.0,
                grid: *grid,
                wavelength_nm,
                frames: nf,
            };
        }
        // Gram matrix G_ij = <F_i, F_j> (without dA; scaled consistently below).
        let rows: Vec<Vec<Complex64>> = (0..nf)
            .into_par_iter()
            .map(|i| {
                (0..nf)
                    .map(|j| {
                        if j < i {
                            Complex64::new(0.0, 0.0)
                        } else {
                            flat[i].iter().zip(flat[j]).map(|(a, b)| a.conj() * b).sum()
                        }
                    })
                    .collect()
            })
            .collect();
        let mut g = nalgebra::DMatrix::<Complex64>::zeros(nf, nf);
        for i in 0..nf {
            for j in i..nf {
                g[(i, j)] = rows[i][j];
                g[(j, i)] = rows[i][j].conj();
            }
        }
        let eig = nalgebra::SymmetricEigen::new(g);
        let mut order: Vec<usize> = (0..nf).collect();
        order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
        let keep: Vec<usize> = order.into_iter().take(rank).collect();
        let sum_all: f64 = eig.eigenvalues.iter().map(|v| v.max(0.0)).sum();
        let sum_kept: f64 = keep.iter().map(|&j| eig.eigenvalues[j].max(0.0)).sum();
        let mut q = Array2::<Complex64>::zeros((keep.len(), ny * nx));
        q.axis_iter_mut(Axis(0))
            .into_par_iter()
            .zip(keep.par_iter())
            .for_each(|(mut row, &j)| {
                for (i, f) in flat.iter().enumerate() {
                    let v = eig.eigenvectors[(i, j)];
                    for (o, a) in row.iter_mut().zip(f.iter()) {
                        *o += a * v;
                    }
                }
            });
        Reduced {
            q,
            total,
            retained_fraction: if sum_all > 0.0 {
                sum_kept / sum_all
            } else {
                1.0
            },
            grid: *grid,
            wavelength_nm,
            frames: nf,
        }
    }
}

/// The components stacked for real matrix products: with `q = qr + i qi` (r x n),
/// `Y = [[qr^T, qi^T], [qi^T, -qr^T]]` (2n x 2r), so that for modes `X = [phi_r, phi_i]`
/// (m x 2n) the product `X Y = [Re A, Im A]` holds `A = conj(phi) q^T`, the overlaps
/// without dA. A real product runs at the speed of the machine's best kernel (dgemm).
fn stacked(q: &Array2<Complex64>) -> Array2<f64> {
    let (r, n) = q.dim();
    let mut y = Array2::<f64>::zeros((2 * n, 2 * r));
    for (j, row) in q.axis_iter(Axis(0)).enumerate() {
        for (p, z) in row.iter().enumerate() {
            y[(p, j)] = z.re;
            y[(p, r + j)] = z.im;
            y[(n + p, j)] = z.im;
            y[(n + p, r + j)] = -z.re;
        }
    }
    y
}

/// Sum over modes and components of |<phi_k, q_j>|^2 (dA included), modes given row-major,
/// components as [`stacked`].
fn captured_sum(modes: &[Vec<Complex64>], y: &Array2<f64>, da: f64) -> f64 {
    let n = y.dim().0 / 2;
    let m = modes.len();
    if m == 0 {
        return 0.0;
    }
    // Fixed-size chunks whose partial sums are added in chunk order: the result does not
    // depend on the number of threads.
    let parts: Vec<f64> = modes
        .par_chunks(CAPTURED_CHUNK_MODES)
        .map(|part| {
            let mut x = Array2::<f64>::zeros((part.len(), 2 * n));
            for (k, phi) in part.iter().enumerate() {
                for (p, z) in phi.iter().enumerate() {
                    x[(k, p)] = z.re;
                    x[(k, n + p)] = z.im;
                }
            }
            let mut out = Array2::<f64>::zeros((part.len(), y.dim().1));
            general_mat_mul(1.0, &x, y, 0.0, &mut out);
            out.iter().map(|v| v * v).sum::<f64>()
        })
        .collect();
    parts.iter().sum::<f64>() * da * da
}

/// Modes per work item of [`captured_sum`] (fixed, so the sum order is too).
const CAPTURED_CHUNK_MODES: usize = 8;

/// Geometric part of an alignment (tilt and defocus zeroed): what the sampler sees.
pub fn geometry(a: &Alignment) -> Alignment {
    Alignment {
        tilt_mrad: [0.0, 0.0],
        defocus_um: 0.0,
        ..*a
    }
}

/// Basis spectra shared between evaluations.
type Spectra = Arc<Vec<Vec<Complex64>>>;

/// The captured-power objective over one channel's reduced fields. The basis and its
/// spectra are cached for the last geometry, so a search over tilt and defocus alone does
/// not resample the modes.
pub struct Objective<'a, S> {
    pub reduced: &'a Reduced,
    pub sampler: S,
    prop: Propagator,
    /// The reduced components stacked for real products ([`stacked`]).
    y: Array2<f64>,
    cache: std::sync::Mutex<Option<(Alignment, Spectra)>>,
    /// Objective evaluations so far.
    pub evaluations: std::sync::atomic::AtomicUsize,
}

impl<'a, S> Objective<'a, S>
where
    S: Fn(&Grid, &Alignment) -> Array3<Complex64> + Sync,
{
    pub fn new(reduced: &'a Reduced, sampler: S) -> Self {
        let prop = Propagator::new(&reduced.grid, reduced.wavelength_nm);
        Objective {
            reduced,
            sampler,
            prop,
            y: stacked(&reduced.q),
            cache: std::sync::Mutex::new(None),
            evaluations: std::sync::atomic::AtomicUsize::new(0),
        }
    }

    /// Spectra (2-D FFT) of the basis sampled at the geometric part of `a`.
    fn spectra(&self, a: &Alignment) -> Arc<Vec<Vec<Complex64>>> {
        let geo = geometry(a);
        if let Some((g, s)) = self.cache.lock().unwrap().as_ref() {
            if *g == geo {
                return s.clone();
            }
        }
        let grid = &self.reduced.grid;
        let basis = (self.sampler)(grid, &geo);
        assert_eq!(
            (basis.dim().1, basis.dim().2),
            (grid.ny, grid.nx),
            "sampler must return (modes, ny, nx) on the grid"
        );
        let spectra: Vec<Vec<Complex64>> = basis
            .axis_iter(Axis(0))
            .into_par_iter()
            .map_init(
                || vec![Complex64::new(0.0, 0.0); self.prop.fft.scratch_len()],
                |scratch, m| {
                    let mut phi: Vec<Complex64> = m.iter().copied().collect();
                    self.prop.fft.forward(&mut phi, scratch);
                    phi
                },
            )
            .collect();
        let spectra = Arc::new(spectra);
        *self.cache.lock().unwrap() = Some((geo, spectra.clone()));
        spectra
    }

    /// Number of basis modes.
    pub fn n_modes(&self, a: &Alignment) -> usize {
        self.spectra(a).len()
    }

    /// The modes `phi_k(a) = M(+t) P(+dz) psi_k`, row-major, one Vec per mode. The transfer
    /// function and the tilt factors are computed once per call, not once per mode.
    pub fn corrected_modes(&self, a: &Alignment) -> Vec<Vec<Complex64>> {
        let spectra = self.spectra(a);
        let grid = &self.reduced.grid;
        let k = 2.0 * std::f64::consts::PI / (self.reduced.wavelength_nm * 1e-3);
        let h: Option<Vec<Complex64>> = (a.defocus_um != 0.0).then(|| {
            self.prop
                .kz_minus_k()
                .iter()
                .map(|&q| {
                    if q.is_nan() {
                        Complex64::new(0.0, 0.0)
                    } else {
                        Complex64::from_polar(1.0, q * a.defocus_um)
                    }
                })
                .collect()
        });
        let tilted = a.tilt_mrad != [0.0, 0.0];
        let ex: Vec<Complex64> = (0..grid.nx)
            .map(|c| Complex64::from_polar(1.0, k * 1e-3 * a.tilt_mrad[0] * grid.x_um(c)))
            .collect();
        let ey: Vec<Complex64> = (0..grid.ny)
            .map(|r| Complex64::from_polar(1.0, k * 1e-3 * a.tilt_mrad[1] * grid.y_um(r)))
            .collect();
        spectra
            .par_iter()
            .map_init(
                || vec![Complex64::new(0.0, 0.0); self.prop.fft.scratch_len()],
                |scratch, s| {
                    let mut phi = match &h {
                        Some(h) => s.iter().zip(h).map(|(a, b)| a * b).collect(),
                        None => s.clone(),
                    };
                    self.prop.fft.inverse(&mut phi, scratch);
                    if tilted {
                        for (row, e) in phi.chunks_exact_mut(grid.nx).zip(&ey) {
                            for (d, x) in row.iter_mut().zip(&ex) {
                                *d *= x * e;
                            }
                        }
                    }
                    phi
                },
            )
            .collect()
    }

    /// Captured fraction eta(a) of the fields' power (see the module header).
    pub fn captured(&self, a: &Alignment) -> f64 {
        self.evaluations
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        let modes = self.corrected_modes(a);
        let r = self.reduced;
        if r.total <= 0.0 {
            return 0.0;
        }
        captured_sum(&modes, &self.y, r.grid.pixel_area_um2()) / r.total
    }

    pub fn propagator(&self) -> &Propagator {
        &self.prop
    }
}

/// Power each frame holds in the modes `phi` (from [`Objective::corrected_modes`]):
/// `sum_k |<phi_k, F_f>|^2`.
pub fn overlap_power_per_frame(
    fields: ArrayView3<Complex64>,
    grid: &Grid,
    modes: &[Vec<Complex64>],
) -> Vec<f64> {
    let da = grid.pixel_area_um2();
    fields
        .axis_iter(Axis(0))
        .into_par_iter()
        .map(|f| {
            let f = f.as_standard_layout();
            let f = f.as_slice().unwrap();
            modes
                .iter()
                .map(|phi| {
                    let s: Complex64 = phi.iter().zip(f).map(|(a, b)| a.conj() * b).sum();
                    (s * da).norm_sqr()
                })
                .sum()
        })
        .collect()
}

/// Exact captured fraction of each frame for modes `phi` (from [`Objective::corrected_modes`]):
/// `sum_k |<phi_k, F_f>|^2 / ||F_f||^2`, and the frame's power ||F_f||^2.
pub fn captured_per_frame(
    fields: ArrayView3<Complex64>,
    grid: &Grid,
    modes: &[Vec<Complex64>],
) -> Vec<(f64, f64)> {
    let da = grid.pixel_area_um2();
    let num = overlap_power_per_frame(fields, grid, modes);
    fields
        .axis_iter(Axis(0))
        .zip(num)
        .map(|(f, c)| {
            let p: f64 = f.iter().map(|z| z.norm_sqr()).sum::<f64>() * da;
            (if p > 0.0 { c / p } else { 0.0 }, p)
        })
        .collect()
}

/// Power-weighted captured fraction over frames: sum captured / sum power.
pub fn captured_total(per_frame: &[(f64, f64)]) -> f64 {
    let p: f64 = per_frame.iter().map(|x| x.1).sum();
    if p <= 0.0 {
        return 0.0;
    }
    per_frame.iter().map(|x| x.0 * x.1).sum::<f64>() / p
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::align::analytic::{hg_fields, hg_sampler};

    #[test]
    fn fft2_matches_direct_dft() {
        let (ny, nx) = (6, 10);
        let data: Vec<Complex64> = (0..ny * nx)
            .map(|i| Complex64::new((i as f64 * 0.37).sin(), (i as f64 * 0.11).cos()))
            .collect();
        let f = Fft2::new(ny, nx);
        let mut a = data.clone();
        let mut s = vec![Complex64::new(9.0, 9.0); f.scratch_len()];
        f.forward(&mut a, &mut s);
        for ky in 0..ny {
            for kx in 0..nx {
                let mut d = Complex64::new(0.0, 0.0);
                for y in 0..ny {
                    for x in 0..nx {
                        let ph = -2.0
                            * std::f64::consts::PI
                            * (ky as f64 * y as f64 / ny as f64 + kx as f64 * x as f64 / nx as f64);
                        d += data[y * nx + x] * Complex64::from_polar(1.0, ph);
                    }
                }
                assert!((d - a[ky * nx + kx]).norm() < 1e-10);
            }
        }
        f.inverse(&mut a, &mut s);
        for (x, y) in a.iter().zip(&data) {
            assert!((x - y).norm() < 1e-12);
        }
    }

    /// A Gaussian beam of waist w0 propagated by z has the 1/e field radius
    /// w(z) = w0 sqrt(1 + (z/zR)^2), zR = pi w0^2 / lambda (Siegman, Lasers, 1986, ch. 17).
    #[test]
    fn propagation_widens_a_gaussian_as_siegman_says() {
        let grid = Grid::centred(128, 128, 0.5);
        let (w0, wl_nm, z) = (4.0, 1000.0, 60.0);
        let mut d: Vec<Complex64> = (0..grid.len())
            .map(|i| {
                let (x, y) = (grid.x_um(i % 128), grid.y_um(i / 128));
                Complex64::new((-(x * x + y * y) / (w0 * w0)).exp(), 0.0)
            })
            .collect();
        let p0: f64 = d.iter().map(|z| z.norm_sqr()).sum();
        let prop = Propagator::new(&grid, wl_nm);
        let mut s = vec![Complex64::new(0.0, 0.0); prop.fft.scratch_len()];
        prop.propagate(&mut d, z, &mut s);
        let p1: f64 = d.iter().map(|z| z.norm_sqr()).sum();
        assert!((p1 / p0 - 1.0).abs() < 1e-10, "unitary");
        // second moment: <r^2> = w^2 / 2 for |E|^2 = exp(-2 r^2 / w^2)
        let m2: f64 = d
            .iter()
            .enumerate()
            .map(|(i, v)| {
                let (x, y) = (grid.x_um(i % 128), grid.y_um(i / 128));
                (x * x + y * y) * v.norm_sqr()
            })
            .sum::<f64>()
            / p1;
        let zr = std::f64::consts::PI * w0 * w0 / (wl_nm * 1e-3);
        let w = w0 * (1.0 + (z / zr).powi(2)).sqrt();
        assert!(
            ((2.0 * m2).sqrt() / w - 1.0).abs() < 2e-3,
            "{} vs {w}",
            (2.0 * m2).sqrt()
        );
        // back-propagation restores the waist
        prop.propagate(&mut d, -z, &mut s);
        let c = d[64 * 128 + 64];
        assert!((c.re - 1.0).abs() < 1e-9 && c.im.abs() < 1e-9);
    }

    /// Direction of the tilt convention (docs/conventions.md): a field carrying
    /// exp(+i k t x) has its spectrum at +t / lambda cycles per um.
    #[test]
    fn tilt_moves_spectrum_to_plus_t_over_lambda() {
        let grid = Grid::centred(64, 64, 1.0);
        let wl = 1000.0;
        let mut d = vec![Complex64::new(1.0, 0.0); grid.len()];
        // 1/lambda = 1 cycle/um; t = 62.5 mrad gives 0.0625 cycles/um = bin 4 of 64.
        apply_tilt(&mut d, &grid, wl, [62.5, 0.0], 1.0);
        let f = Fft2::new(64, 64);
        let mut s = vec![Complex64::new(0.0, 0.0); f.scratch_len()];
        f.forward(&mut d, &mut s);
        let (imax, _) = d
            .iter()
            .enumerate()
            .max_by(|a, b| a.1.norm().total_cmp(&b.1.norm()))
            .unwrap();
        assert_eq!(imax, 4);
    }

    #[test]
    fn reduction_preserves_objective_for_low_rank_fields() {
        let grid = Grid::centred(48, 48, 0.8);
        let truth = Alignment::default();
        let (fields, _) = hg_fields(&grid, 3, 5.0, &truth, 1064.0, 30, 0.0, 7);
        let full = Reduced::new(fields.view(), &grid, 1064.0, 1000);
        let red = Reduced::new(fields.view(), &grid, 1064.0, 8);
        assert!(red.retained_fraction > 1.0 - 1e-9);
        let a = Alignment {
            center_um: [0.7, -0.4],
            defocus_um: 5.0,
            ..Default::default()
        };
        let s = hg_sampler(3, 5.0);
        let e_full = Objective::new(&full, &s).captured(&a);
        let e_red = Objective::new(&red, &s).captured(&a);
        assert!((e_full - e_red).abs() < 1e-9, "{e_full} {e_red}");
        assert!(e_full < 0.99);
        let e_true = Objective::new(&red, &s).captured(&truth);
        assert!((e_true - 1.0).abs() < 1e-6, "{e_true}");
    }
}
