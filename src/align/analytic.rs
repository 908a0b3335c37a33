//! Analytic Hermite-Gauss modes and simulated fields with a known misalignment, so the
//! alignment fit can be tested (and benchmarked) independently of the fibre-mode solver.
//!
//! HG_nm(u, v) = H_n(sqrt2 u / w) H_m(sqrt2 v / w) exp(-(u^2 + v^2) / w^2) (Siegman, Lasers,
//! 1986, ch. 16), physicists' Hermite polynomials, sampled at the fibre coordinates
//! `(u, v) = alignment.to_fibre(x, y)` and normalised to sum |psi|^2 dA = 1 on the grid.
//! Modes are ordered by group g = n + m + 1, then by n descending... precisely: (n, m) with
//! n + m = g - 1, n from g - 1 down to 0. A simulated frame is `M(+t) P(+dz) sum_k c_k psi_k`
//! (the signal as recorded, docs/conventions.md) plus complex white noise.
use super::objective::{apply_tilt, Propagator};
use crate::grid::{Alignment, Grid};
use ndarray::{Array2, Array3};
use num_complex::Complex64;

/// Physicists' Hermite polynomial H_n(x) by the three-term recurrence.
fn hermite(n: usize, x: f64) -> f64 {
    let (mut h0, mut h1) = (1.0, 2.0 * x);
    if n == 0 {
        return h0;
    }
    for k in 1..n {
        let h2 = 2.0 * x * h1 - 2.0 * k as f64 * h0;
        h0 = h1;
        h1 = h2;
    }
    h1
}

/// (n, m) index pairs of the first `groups` HG groups in basis order.
pub fn hg_indices(groups: usize) -> Vec<(usize, usize)> {
    let mut v = Vec::new();
    for g in 0..groups {
        for n in (0..=g).rev() {
            v.push((n, g - n));
        }
    }
    v
}

/// Sample the HG modes `idx` of waist `waist_um` on `grid` at the geometric alignment `a`.
pub fn sample_hg(
    grid: &Grid,
    a: &Alignment,
    idx: &[(usize, usize)],
    waist_um: f64,
) -> Array3<Complex64> {
    let mut out = Array3::<Complex64>::zeros((idx.len(), grid.ny, grid.nx));
    let s = std::f64::consts::SQRT_2 / waist_um;
    for (k, &(n, m)) in idx.iter().enumerate() {
        let mut norm = 0.0;
        for r in 0..grid.ny {
            for c in 0..grid.nx {
                let (u, v) = a.to_fibre(grid.x_um(c), grid.y_um(r));
                let val = hermite(n, s * u)
                    * hermite(m, s * v)
                    * (-(u * u + v * v) / (waist_um * waist_um)).exp();
                out[[k, r, c]] = Complex64::new(val, 0.0);
                norm += val * val;
            }
        }
        let f = 1.0 / (norm * grid.pixel_area_um2()).sqrt();
        out.index_axis_mut(ndarray::Axis(0), k)
            .mapv_inplace(|z| z * f);
    }
    out
}

/// A sampler closure over the first `groups` HG groups.
pub fn hg_sampler(
    groups: usize,
    waist_um: f64,
) -> impl Fn(&Grid, &Alignment) -> Array3<Complex64> + Sync {
    let idx = hg_indices(groups);
    move |g: &Grid, a: &Alignment| sample_hg(g, a, &idx, waist_um)
}

/// Deterministic pseudo-random numbers (SplitMix64, Steele et al. 2014, OOPSLA), so the
/// simulated data do not depend on any external generator's version.
pub struct SplitMix(pub u64);

impl SplitMix {
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in (0, 1).
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    /// Standard normal (Box-Muller).
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform(), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }
}

/// Simulated recorded fields: `frames` random superpositions of the first `groups` HG groups
/// (waist `waist_um`) placed at `truth` (all of centre, rotation, scale, tilt, defocus), plus
/// complex white noise of standard deviation `noise_rel` times the field's rms per pixel.
/// Returns the fields (frames, ny, nx) and the coefficients (frames, modes).
#[allow(clippy::too_many_arguments)]
pub fn hg_fields(
    grid: &Grid,
    groups: usize,
    waist_um: f64,
    truth: &Alignment,
    wavelength_nm: f64,
    frames: usize,
    noise_rel: f64,
    seed: u64,
) -> (Array3<Complex64>, Array2<Complex64>) {
    let idx = hg_indices(groups);
    let geo = super::objective::geometry(truth);
    let basis = sample_hg(grid, &geo, &idx, waist_um);
    let nm = idx.len();
    let mut rng = SplitMix(seed);
    let mut coef = Array2::<Complex64>::zeros((frames, nm));
    for f in 0..frames {
        for k in 0..nm {
            coef[[f, k]] = Complex64::new(rng.normal(), rng.normal());
        }
    }
    let prop = Propagator::new(grid, wavelength_nm);
    let mut scratch = vec![Complex64::new(0.0, 0.0); prop.fft.scratch_len()];
    let mut fields = Array3::<Complex64>::zeros((frames, grid.ny, grid.nx));
    for f in 0..frames {
        let mut e = vec![Complex64::new(0.0, 0.0); grid.len()];
        for k in 0..nm {
            let c = coef[[f, k]];
            for (o, b) in e
                .iter_mut()
                .zip(basis.index_axis(ndarray::Axis(0), k).iter())
            {
                *o += c * b;
            }
        }
        prop.propagate(&mut e, truth.defocus_um, &mut scratch);
        apply_tilt(&mut e, grid, wavelength_nm, truth.tilt_mrad, 1.0);
        if noise_rel > 0.0 {
            let rms = (e.iter().map(|z| z.norm_sqr()).sum::<f64>() / e.len() as f64).sqrt();
            let s = noise_rel * rms / std::f64::consts::SQRT_2;
            for z in e.iter_mut() {
                *z += Complex64::new(s * rng.normal(), s * rng.normal());
            }
        }
        for (o, z) in fields.index_axis_mut(ndarray::Axis(0), f).iter_mut().zip(e) {
            *o = z;
        }
    }
    (fields, coef)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hermite_values() {
        // H_3(x) = 8x^3 - 12x (Abramowitz & Stegun table 22.12)
        assert!((hermite(3, 0.7) - (8.0 * 0.343 - 12.0 * 0.7)).abs() < 1e-12);
        assert_eq!(
            hg_indices(3),
            vec![(0, 0), (1, 0), (0, 1), (2, 0), (1, 1), (0, 2)]
        );
    }

    #[test]
    fn sampled_modes_are_orthonormal_on_a_fine_grid() {
        let g = Grid::centred(64, 64, 0.5);
        let b = sample_hg(&g, &Alignment::default(), &hg_indices(3), 4.0);
        for i in 0..6 {
            for j in 0..6 {
                let s: Complex64 = b
                    .index_axis(ndarray::Axis(0), i)
                    .iter()
                    .zip(b.index_axis(ndarray::Axis(0), j).iter())
                    .map(|(a, c)| a.conj() * c)
                    .sum::<Complex64>()
                    * g.pixel_area_um2();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((s.re - want).abs() < 1e-9 && s.im.abs() < 1e-9);
            }
        }
    }
}
