//! Sampling a basis on a camera grid, the Gram matrix and the coarse-grid warning.
//!
//! [`Basis::sample`] maps each grid pixel to fibre coordinates with
//! [`Alignment::to_fibre`] (centre, rotation, scale; tilt and defocus are *not* applied),
//! evaluates every mode and renormalises each so that sum |psi|^2 * pixel_area = 1.
//! Per row, the geometry is computed once and shared by all modes: the radial stencil into
//! the common radial tables, exp(i l phi) by repeated multiplication of (u + i v)/r (no
//! atan2 or trig per pixel), and the Hermite functions along u and v. Rows run in parallel
//! (rayon); each value depends only on its pixel, so the result is the same for any
//! thread count.
use super::analytic::{hermite_functions, lg_radial};
use super::basis::{azimuth, Basis, Shape};
use super::radial::Stencil;
use crate::grid::{Alignment, Grid};
use ndarray::{Array2, Array3, ArrayViewMut2, Axis};
use num_complex::Complex64;
use rayon::prelude::*;

/// Gram deviation above which a sampled basis is reported as not orthonormal.
pub const GRAM_TOLERANCE: f64 = 1e-3;

impl Basis {
    /// The basis sampled on `grid` under `align`: shape (modes, ny, nx), each mode
    /// renormalised to sum |psi|^2 dA = 1 on the grid.
    pub fn sample(&self, grid: &Grid, align: &Alignment) -> Array3<Complex64> {
        let mut out = Array3::zeros((self.len(), grid.ny, grid.nx));
        self.sample_into(grid, align, &mut out);
        out
    }

    /// As [`Basis::sample`], writing into `out` (reallocated only if its shape differs), so
    /// repeated sampling (alignment fits) reuses one buffer.
    pub fn sample_into(&self, grid: &Grid, align: &Alignment, out: &mut Array3<Complex64>) {
        let shape = (self.len(), grid.ny, grid.nx);
        if out.dim() != shape {
            *out = Array3::zeros(shape);
        }
        if self.is_empty() || grid.is_empty() {
            return;
        }
        let l_max = self
            .shapes
            .iter()
            .map(|s| match *s {
                Shape::Radial { l, .. } | Shape::Lg { l, .. } => l,
                Shape::Hg { .. } => 0,
            })
            .max()
            .unwrap_or(0) as usize;
        let h_max = self
            .shapes
            .iter()
            .map(|s| match *s {
                Shape::Hg { n, m } => n.max(m) as usize + 1,
                _ => 0,
            })
            .max()
            .unwrap_or(0);
        out.axis_iter_mut(Axis(1))
            .into_par_iter()
            .enumerate()
            .for_each(|(row, view)| self.sample_row(grid, align, row, l_max, h_max, view));
        let area = grid.pixel_area_um2();
        out.axis_iter_mut(Axis(0))
            .into_par_iter()
            .for_each(|mut m| {
                let s = m.iter().map(|z| z.norm_sqr()).sum::<f64>() * area;
                if s > 0.0 && s.is_finite() {
                    let f = 1.0 / s.sqrt();
                    m.mapv_inplace(|z| z * f);
                }
            });
    }

    fn sample_row(
        &self,
        grid: &Grid,
        align: &Alignment,
        row: usize,
        l_max: usize,
        h_max: usize,
        mut view: ArrayViewMut2<Complex64>,
    ) {
        let nx = grid.nx;
        let y = grid.y_um(row);
        let a = self.core_radius_um;
        let mut r = Vec::with_capacity(nx);
        let mut st: Vec<Stencil> = Vec::with_capacity(nx);
        // zl[l * nx + c] = exp(i l phi) at column c
        let mut zl = vec![Complex64::new(1.0, 0.0); (l_max + 1) * nx];
        let mut gu = vec![0.0; h_max * nx];
        let mut gv = vec![0.0; h_max * nx];
        let hs = std::f64::consts::SQRT_2 / self.waist_um.max(1e-300);
        let mut tmp = vec![0.0; h_max];
        for c in 0..nx {
            let (u, v) = align.to_fibre(grid.x_um(c), y);
            let rr = u.hypot(v);
            r.push(rr);
            st.push(self.stencil(rr / a));
            let z = if rr > 0.0 {
                Complex64::new(u / rr, v / rr)
            } else {
                Complex64::new(1.0, 0.0)
            };
            for l in 1..=l_max {
                zl[l * nx + c] = zl[(l - 1) * nx + c] * z;
            }
            if h_max > 0 {
                hermite_functions(hs * u, &mut tmp);
                for n in 0..h_max {
                    gu[n * nx + c] = tmp[n];
                }
                hermite_functions(hs * v, &mut tmp);
                for n in 0..h_max {
                    gv[n * nx + c] = tmp[n];
                }
            }
        }
        for (k, shape) in self.shapes.iter().enumerate() {
            let mut line = view.row_mut(k);
            match *shape {
                Shape::Radial { table, l, az } => {
                    let t = &self.tables[table];
                    let zrow = &zl[l as usize * nx..(l as usize + 1) * nx];
                    for c in 0..nx {
                        line[c] = azimuth(l, az, zrow[c]) * t.at(&st[c]);
                    }
                }
                Shape::Lg { p, l, az } => {
                    let zrow = &zl[l as usize * nx..(l as usize + 1) * nx];
                    for c in 0..nx {
                        line[c] = azimuth(l, az, zrow[c]) * lg_radial(p, l, r[c], self.waist_um);
                    }
                }
                Shape::Hg { n, m } => {
                    let (n, m) = (n as usize, m as usize);
                    for c in 0..nx {
                        line[c] = Complex64::new(gu[n * nx + c] * gv[m * nx + c] * hs, 0.0);
                    }
                }
            }
        }
    }
}

/// Gram matrix G_ij = sum conj(psi_i) psi_j dA of a sampled basis (modes, ny, nx).
pub fn gram(sampled: &Array3<Complex64>, grid: &Grid) -> Array2<Complex64> {
    let (n, ny, nx) = sampled.dim();
    let flat = sampled
        .view()
        .into_shape_with_order((n, ny * nx))
        .map(|v| v.to_owned())
        .unwrap_or_else(|_| {
            let v: Vec<Complex64> = sampled.iter().copied().collect();
            Array2::from_shape_vec((n, ny * nx), v).expect("shape")
        });
    let conj = flat.mapv(|z| z.conj());
    let area = Complex64::new(grid.pixel_area_um2(), 0.0);
    conj.dot(&flat.t()).mapv(|z| z * area)
}

/// max |G - I| over all entries.
pub fn gram_deviation(g: &Array2<Complex64>) -> f64 {
    g.indexed_iter()
        .map(|((i, j), z)| {
            let d = if i == j { *z - 1.0 } else { *z };
            d.norm()
        })
        .fold(0.0, f64::max)
}

/// A warning when the sampled basis is not orthonormal to 1e-3 on `grid`, naming the grid,
/// the basis's finest mode and what to change.
pub fn sampling_warning(dev: f64, grid: &Grid, basis: &Basis) -> Option<String> {
    if dev.is_finite() && dev <= GRAM_TOLERANCE {
        return None;
    }
    let a = basis.core_radius_um;
    let half_x = 0.5 * grid.nx as f64 * grid.pitch_um;
    let half_y = 0.5 * grid.ny as f64 * grid.pitch_um;
    let half = half_x.min(half_y);
    let last = basis
        .modes
        .last()
        .map(|m| m.label.clone())
        .unwrap_or_default();
    // finest transverse scale: the core's largest transverse wavenumber ~ V / a (LP), or the
    // Gaussian's sqrt(2 g)/w (LG/HG); two samples per period at least, four advised.
    let v = basis.v_number.unwrap_or(1.0).max(1.0);
    let g = basis.modes.iter().map(|m| m.group).max().unwrap_or(1) as f64;
    let k_max = match basis.waist_um() {
        Some(w) => (2.0 * g).sqrt() * 2.0 / w,
        None => v / a,
    };
    let pitch_needed = std::f64::consts::PI / (2.0 * k_max);
    let span_needed = match basis.waist_um() {
        Some(w) => w * ((g + 1.0).sqrt() + 2.0),
        None => 1.5 * a,
    };
    Some(format!(
        "sampled basis is not orthonormal: max |G - I| = {dev:.3e} > {GRAM_TOLERANCE:e} on the \
         {}x{} grid of pitch {:.4} um (half-width {:.2} um = {:.2} core radii); the grid is too \
         coarse or too small for the highest mode {last}: use a pitch <= {:.3} um and a \
         half-width >= {:.1} um",
        grid.nx,
        grid.ny,
        grid.pitch_um,
        half,
        half / a,
        pitch_needed,
        span_needed
    ))
}
